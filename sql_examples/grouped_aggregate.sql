-- Averages per group straight from the factors (no row is rebuilt), each with a hard bound
-- on |true average - value|; predicate := filters on key columns before aggregating.
-- Placeholder: {archive} an archive of table sites (key id; key column site).
SELECT *
FROM rankfold_aggregate('{archive}', ['v1', 'v5', 'v9'], func := 'avg',
                        group_by := 'site', predicate := 'id < 6000')
ORDER BY site;
