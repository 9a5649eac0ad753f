-- Compress the result of a SELECT statement: here a subset of the rows and columns of panel,
-- with extra compress options given as JSON text (overwrite replaces an earlier archive).
-- Placeholders: table panel (id BIGINT, c00 .. c29 DOUBLE), {workdir} an empty directory.
SELECT s.rows, s.columns, s.rank, s.method, s.numeric_columns
FROM (
    SELECT rankfold_compress(
        'SELECT c00, c01, c02, c03, c05, c06, c07, c08, c10, c11, c12, c13 FROM panel WHERE id < 3000 ORDER BY id',
        '{workdir}/panel_subset',
        rank := 4,
        seed := 7,
        overwrite := true,
        options := '{"transform": "center", "n_columns": 6}') AS s
);
