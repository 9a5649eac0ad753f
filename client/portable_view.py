"""The archive as plain SQL: a view that any DuckDB connection can create, no rankfold needed.

``view_sql(archive)`` returns one ``CREATE OR REPLACE VIEW`` statement whose body reads the
archive's own Parquet files (each named explicitly, from the manifest: no globs) with
``read_parquet`` and rebuilds every numeric column with the mixing matrix inlined as DOUBLE
literals. It uses built-in DuckDB functions only (``array_inner_product``, ``least``,
``round_even``), so it runs on a bare connection: ``duckdb.connect().execute(view_sql(a))``,
the DuckDB command-line shell, or any other DuckDB client.

The statement is the one the ``rankfold_scan`` table function runs (``udfs/sql/tables.py``),
so values and bounds are those of ``Archive.rebuild(bounds=True)`` up to floating-point
rounding, which the bounds' slack term covers. File paths in it are absolute: move the
archive and the view must be made again. The files' SHA-256 are checked when the statement is
made; a bare connection that runs it later reads the files as they are then (DuckDB checks
no page checksums): make the view again, or open the archive with rankfold, after any doubt.
"""

from __future__ import annotations

from typing import Any

from rankfold.udfs.errors import InvalidInputError
from rankfold.udfs.sql.tables import BOUND_MODES, scan_sql
from rankfold.udfs.store.sql_text import quote_identifier

from .archive import Archive

__all__ = ["view_sql", "DEFAULT_VIEW_NAME"]

DEFAULT_VIEW_NAME = "archive"


def view_sql(archive: Any, name: str = DEFAULT_VIEW_NAME, *, bounds: str = "row") -> str:
    """SQL text creating the view ``name`` over ``archive`` (an :class:`Archive` or a path).

    Columns: the columns kept exactly (key, non-numeric), every numeric column rebuilt (DOUBLE;
    NULL where the source was NULL), then the bounds -- ``bounds='row'`` (default): one column
    ``_rf_bound``, a guaranteed limit on |true - rebuilt| for every numeric cell of the row;
    ``'cell'``: one ``<column>_bound`` per numeric column; ``'none'`` -- and ``_rf_row``, the
    row's 0-based position. Integer columns come as DOUBLE holding whole numbers, and their
    bounds cover that rounding (as ``rankfold_scan`` serves them).
    """
    if not isinstance(name, str) or not name.strip():
        raise InvalidInputError(f"The view name must be a non-empty text; got {name!r}.")
    if bounds not in BOUND_MODES:
        raise InvalidInputError(
            f"bounds must be one of {', '.join(BOUND_MODES)}; got {bounds!r}.")
    arch = archive if isinstance(archive, Archive) else Archive(archive)
    body = scan_sql(arch._reader, None, bounds)
    return (f"-- rankfold archive {arch.path} (id {arch.manifest['archive_id']}): rebuilt values "
            "are approximate; check the bounds.\n"
            f"CREATE OR REPLACE VIEW {quote_identifier(name)} AS\n{body};\n")
