-- Look one row up by key, with a bound per cell (bounds := 'cell' gives <column>_bound).
-- Placeholder: {archive} an archive of table sites (key id; key column site).
SELECT *
FROM rankfold_scan('{archive}', bounds := 'cell')
WHERE id = 1234;
