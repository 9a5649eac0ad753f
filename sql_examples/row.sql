-- Rebuild a whole row. rankfold_row returns STRUCT("column", value, bound)[] in the archive's
-- column order; unnest turns it into one (column, value, bound) row per numeric column.
-- Placeholder: {archive} an archive of table panel.
SELECT 42 AS row, e.column AS col, e.value AS value, e.bound AS bound
FROM (SELECT unnest(rankfold_row('{archive}', 42)) AS e);
