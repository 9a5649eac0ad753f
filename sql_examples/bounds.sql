-- The error ledger as tables: per column (largest error, root-sum-square, relative RMS) and
-- per row (figures in units of each column's ledger_scale). Joined here: the bound of the
-- row with the largest error figure, in the units of each column.
-- Placeholder: {archive} an archive of table sites (key id; key column site).
WITH worst AS (
    SELECT id, err_max_scaled FROM rankfold_row_errors('{archive}')
    ORDER BY err_max_scaled DESC, id LIMIT 1
)
SELECT c.name, c.err_max, c.err_l2, c.rel_rms, w.id,
       least(w.err_max_scaled * c.ledger_scale, c.err_max) AS row_bound
FROM rankfold_column_errors('{archive}') c, worst w
ORDER BY c.position;
