-- Rebuild single cells and their guaranteed bounds: |true value - value| <= bound.
-- rankfold_cell is NULL where the source cell was NULL; bound is 0 where a cell is stored
-- exactly (basis columns, anchor rows, NULL/NaN cells).
-- Placeholder: {archive} an archive of table panel (rows addressed by 0-based position).
SELECT i AS row, 'c07' AS col,
       rankfold_cell('{archive}', i, 'c07') AS value,
       rankfold_cell_bound('{archive}', i, 'c07') AS bound
FROM range(0, 5000, 97) t(i)
ORDER BY i;
