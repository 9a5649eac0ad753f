-- Compress a DuckDB table into a rankfold archive and read back its summary.
-- rankfold_compress(source, path, rank := NULL, seed := 0, overwrite := false, options := NULL)
-- reads `source` (a table name or a SELECT statement) through a separate connection, so it
-- sees committed data only. `options` takes any other compress option as a STRUCT or JSON;
-- here the integer column id becomes the key that rows can be looked up by.
-- Placeholders: table panel (id BIGINT, c00 .. c29 DOUBLE), {workdir} an empty directory.
SELECT s.path, s.rows, s.columns, s.rank, s.basis_columns, s.anchor_rows, s.largest_error
FROM (
    SELECT rankfold_compress('panel', '{workdir}/panel_rank8', rank := 8,
                             options := {'key': 'id'}) AS s
);
