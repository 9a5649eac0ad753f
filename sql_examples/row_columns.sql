-- Rebuild chosen columns of several rows (cols := a list of names), and look values up by
-- name with a MAP built from the returned list.
-- Placeholder: {archive} an archive of table panel.
SELECT row, 'c11' AS col, m['c11'] AS value, b['c11'] AS bound
FROM (
    SELECT i AS row,
           map_from_entries(list_transform(r, lambda e: {'key': e.column, 'value': e.value})) AS m,
           map_from_entries(list_transform(r, lambda e: {'key': e.column, 'value': e.bound})) AS b
    FROM (SELECT i, rankfold_row('{archive}', i, cols := ['c16', 'c11']) AS r FROM range(100, 110) t(i))
)
ORDER BY row;
