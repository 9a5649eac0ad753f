-- Value and bound in one call, as STRUCT(value DOUBLE, bound DOUBLE), for many cells of
-- several columns at once (one rebuild per vector of rows, grouped by archive).
-- Placeholder: {archive} an archive of table panel.
SELECT row, col, cb.value AS value, cb.bound AS bound
FROM (
    SELECT i AS row, 'c' || lpad(CAST(i % 30 AS VARCHAR), 2, '0') AS col,
           rankfold_cell_with_bound('{archive}', i, 'c' || lpad(CAST(i % 30 AS VARCHAR), 2, '0')) AS cb
    FROM range(5000) t(i)
)
ORDER BY row;
