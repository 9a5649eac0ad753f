-- Describe an archive: shape, method, rank, the basis columns kept exactly, the number of
-- anchor rows kept exactly, and the largest error measured when it was written.
-- Placeholder: {archive} an archive of table panel.
SELECT i.rows, i.columns, i.method, i.rank, i.basis_columns, i.anchor_rows, i.largest_error
FROM (SELECT rankfold_info('{archive}') AS i);
