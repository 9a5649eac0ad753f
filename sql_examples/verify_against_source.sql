-- Check an archive against the table it came from, in SQL: count the cells whose rebuilt
-- value is farther from the stored value than the reported bound (expected: none).
-- Placeholder: table panel (id BIGINT = row position, c00 .. c29 DOUBLE), {archive} its archive.
SELECT count(*) AS checked,
       count(*) FILTER (WHERE abs(p.c07 - rankfold_cell('{archive}', p.id, 'c07'))
                              > rankfold_cell_bound('{archive}', p.id, 'c07')) AS violations,
       max(rankfold_cell_bound('{archive}', p.id, 'c07')) AS largest_bound
FROM panel p
WHERE p.c07 IS NOT NULL AND NOT isnan(p.c07);
