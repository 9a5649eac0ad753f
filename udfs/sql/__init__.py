"""rankfold's SQL surface for DuckDB.

``rankfold.udfs.register(con)`` adds these functions (prefix ``rankfold``)::

    rankfold_compress(source, path, rank := NULL, seed := 0, overwrite := false, options := NULL)
        -> STRUCT(path, archive_id, rows, columns, method, rank, basis_columns, anchor_rows,
                  relative_frobenius, largest_error, numeric_columns)
    rankfold_info(path)                      -> the same STRUCT, for an existing archive
    rankfold_cell(path, row, col)            -> DOUBLE  rebuilt value, NULL where the source was NULL
    rankfold_cell_bound(path, row, col)      -> DOUBLE  guaranteed bound on |true - rebuilt|
    rankfold_cell_with_bound(path, row, col) -> STRUCT(value DOUBLE, bound DOUBLE)
    rankfold_row(path, row, cols := NULL)    -> STRUCT("column" VARCHAR, value DOUBLE, bound DOUBLE)[]

Table functions (FROM ...; see udfs/sql/tables.py):

    rankfold_scan(path, columns := NULL, bounds := 'row', predicate := NULL)
        key columns exact, the requested numeric columns rebuilt (NULL where the source was NULL),
        then _rf_bound (bound on every rebuilt cell of the row; bounds := 'cell' gives one
        <column>_bound per column, 'none' none) and _rf_row (0-based position)
    rankfold_aggregate(path, columns, func := 'avg', group_by := NULL, predicate := NULL,
                       row_from := NULL, row_to := NULL, estimates := false)
        sum/avg/count from the factors: group_by columns, then <column>, <column>_bound
        (and <column>_estimate, labelled an estimate)
    rankfold_covariance(path, columns := NULL) / rankfold_correlation(path, columns := NULL)
        (column_a, column_b, value, bound) from the Gram matrix of the basis columns
    rankfold_column_errors(path) / rankfold_row_errors(path)   the error ledger as tables

``source`` is a table name, a SELECT statement on the same database (read through a separate
cursor, so it sees committed data only) or a Parquet/CSV path. ``options`` is JSON text or a
STRUCT literal with any other option of ``rankfold.compress`` (``{'n_columns': 12}``). ``row``
is a 0-based position in source order (negative counts from the end, as in the Python client);
``col`` a numeric column name. NULL arguments give NULL. Wrong argument types, unknown paths,
columns or rows raise rankfold's errors; DuckDB reports them as ``InvalidInputException`` with
the error's class name and message, prefixed by the SQL function's name.

Each call of a cell or row UDF (one DuckDB vector, at most 2048 rows) writes one rebuild-log
record per archive path it touched (logger ``rankfold.rebuild``; also to a JSON Lines file with
``rankfold.udfs.sql.register(con, log_path=...)``).

Registration: the UDFs belong to the database (DuckDB lets only the connection that created a
UDF remove it); the public names are TEMP macros, which belong to one connection. So call
``register`` on every connection or cursor that runs the functions; calling it again is fine.

Why a list of structs for a row: each value keeps its bound next to it, the column order is the
archive's, NaN survives (arrow UDF), ``unnest(rankfold_row(p, r), recursive := true)`` gives a
(column, value, bound) table, and ``map_from_entries`` turns it into a MAP when a lookup by
name is wanted. A STRUCT with one field per column would need a return type per archive, which
a Python UDF cannot have; a MAP(VARCHAR, DOUBLE) would drop the bounds.
"""

from .functions import FUNCTIONS, register

__all__ = ["register", "FUNCTIONS"]
