-- Scan an archive as a table: key columns exact, only the named numeric columns rebuilt,
-- _rf_bound = a guaranteed bound on every rebuilt cell of the row. The filter on the key
-- column site is pushed into the Parquet scan.
-- Placeholder: {archive} an archive of table sites (key id; key column site).
SELECT id, site, v3, v7, _rf_bound
FROM rankfold_scan('{archive}', columns := ['v3', 'v7'])
WHERE site = 'north'
ORDER BY id;
