"""SQL over an archive, and choosing rows with a SQL predicate on the columns kept exactly.

``query(archive, sql)`` runs ``sql`` on a fresh in-process DuckDB connection where

* the archive is the view ``archive`` (rebuilt values, in source column order and types) with
  one more column, ``_rf_row``, the 0-based row position that the SQL functions take;
* ``rankfold.udfs.register(con)`` has run, so ``rankfold_cell_with_bound`` etc. are there;
* the DuckDB variable ``archive_path`` holds the archive's path, so a bound is one call away:
  ``rankfold_cell_bound(getvariable('archive_path'), _rf_row, 'x3')``.

When the SQL table macro ``rankfold_scan`` is registered by ``rankfold.udfs.register``, the view
is defined over it; until then it is the table that ``Archive.rebuild()`` returns.

Every answer built from rebuilt numeric columns is approximate: check the bounds.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa

from rankfold.udfs.errors import InvalidInputError
from rankfold.udfs.store import layout
from rankfold.udfs.store.aggregate import rows_source_sql
from rankfold.udfs.store.sql_text import checked_condition, quote_identifier, sql_literal

from .archive import Archive

__all__ = ["query", "connect", "select_rows", "open_database", "key_values", "VIEW", "PATH_VARIABLE"]

VIEW = "archive"
PATH_VARIABLE = "archive_path"


def _archive(archive: Any) -> Archive:
    return archive if isinstance(archive, Archive) else Archive(archive)


def connect(archive: Any, *, view: str = VIEW):
    """A fresh DuckDB connection with the SQL functions registered and the archive as ``view``."""
    import duckdb

    import rankfold.udfs

    arch = _archive(archive)
    con = duckdb.connect()
    names = rankfold.udfs.register(con)
    con.execute(f"SET VARIABLE {PATH_VARIABLE} = {sql_literal(str(arch.path))}")
    if "rankfold_scan" in names:
        con.execute(f"CREATE TEMP VIEW {quote_identifier(view)} AS "
                    f"SELECT * FROM rankfold_scan({sql_literal(str(arch.path))})")
    else:
        table = arch.rebuild()
        table = table.add_column(0, layout.ROW_ID, pa.array(np.arange(table.num_rows, dtype=np.int64)))
        # a view over the Arrow table (unlike con.register) is visible from cursors, which the
        # SQL functions use
        con.from_arrow(table).create_view(view)
    return con


def query(archive: Any, sql: str, *, view: str = VIEW) -> pa.Table:
    """Run ``sql`` with the archive available as the view ``view``; return the result table."""
    import duckdb

    if not isinstance(sql, str) or not sql.strip():
        raise InvalidInputError("The query is empty; give a SQL statement, e.g. "
                                f"'SELECT count(*) FROM {view}'.")
    arch = _archive(archive)
    con = connect(arch, view=view)
    try:
        result = con.sql(sql)
        if result is None:  # a statement without a result (SET, CREATE ...)
            return pa.table({})
        return result.to_arrow_table()
    except duckdb.Error as exc:
        first = _first_line(exc)
        raise InvalidInputError(
            f"The query failed: {first} Fix the SQL; the archive {arch.path} is the view "
            f"{view} with the columns {_column_list(con, view)}."
        ) from None
    finally:
        con.close()


def _first_line(exc: Exception) -> str:
    text = str(exc).strip()
    line = text.splitlines()[0].strip() if text else type(exc).__name__
    return line if line.endswith((".", "!", "?")) else line + "."


def _column_list(con, view: str, limit: int = 12) -> str:
    names = con.sql(f"SELECT * FROM {quote_identifier(view)} LIMIT 0").columns
    return ", ".join(names[:limit]) + (f" ... ({len(names)} in all)" if len(names) > limit else "")


def select_rows(archive: Any, predicate: str) -> np.ndarray:
    """Positions (int64, ascending) of the rows where the SQL ``predicate`` is true.

    The predicate may use only columns kept exactly in the row files (key and non-numeric
    columns, and basis columns), so no approximate value decides which rows are chosen:
    e.g. ``"reading_id BETWEEN 100 AND 200"`` or ``"shift = 'night'"``.
    """
    import duckdb

    arch = _archive(archive)
    exact = _exact_names(arch)
    con = duckdb.connect()
    try:
        # one expression over the exactly kept columns, checked by parsing (never run as given)
        condition = checked_condition(predicate, [layout.ROW_ID] + exact, what="row condition", con=con)
        # this version's files, checked, no glob; no residual codes needed
        relation = rows_source_sql(arch._reader, codes=np.zeros(0, np.int64))
        con.execute(f"CREATE TEMP VIEW kept AS SELECT {', '.join(quote_identifier(n) for n in [layout.ROW_ID] + exact)} "
                    f"FROM {relation}")
        rows = con.sql(f"SELECT {layout.ROW_ID} FROM kept WHERE {condition} ORDER BY 1").fetchnumpy()
    except duckdb.Error as exc:
        first = _first_line(exc)
        raise InvalidInputError(
            f"The row predicate {predicate!r} failed: {first} It may use only the columns kept "
            f"exactly: {', '.join(exact) or '(none)'}."
        ) from None
    finally:
        con.close()
    return np.asarray(rows[layout.ROW_ID], dtype=np.int64)


def _exact_names(arch: Archive) -> list[str]:
    """Columns of the row files that hold source values exactly, in source order."""
    # basis columns count only when stored as themselves (not as quantized codes)
    exact_basis = {b["name"] for b in arch.manifest.get("basis", [])
                   if "step" not in b and b.get("stored_as", b["name"]) == b["name"]}
    kept = set(arch.manifest.get("exact_columns", [])) | exact_basis
    return [f["name"] for f in arch.manifest["schema"] if f["name"] in kept]


def open_database(path: str | Path):
    """A read-only DuckDB connection to the database file at ``path`` (it must exist)."""
    import duckdb

    file = Path(path)
    if not file.is_file():
        raise InvalidInputError(f"No DuckDB database file at {file}. Check the path.")
    try:
        return duckdb.connect(str(file), read_only=True)
    except duckdb.Error as exc:
        raise InvalidInputError(f"DuckDB cannot open {file}: {_first_line(exc)} Check that it is a "
                                "DuckDB database file and that no other process holds it open for writing.") from None


def key_values(archive: Any, texts: list[str]) -> list[Any]:
    """Key values given as text (e.g. on a command line), converted to the key column's type."""
    arch = _archive(archive)
    key = arch.manifest.get("key")
    if not key:
        raise InvalidInputError(f"The archive {arch.path} has no key column (it was compressed "
                                "without key=); choose rows by position or with a predicate instead.")
    type_name = next(f["type"] for f in arch.manifest["schema"] if f["name"] == key)
    if type_name.startswith(("int", "uint")):
        try:
            return [int(t) for t in texts]
        except ValueError:
            bad = next(t for t in texts if not t.strip().lstrip("+-").isdigit())
            raise InvalidInputError(f"The key column {key} holds integers; {bad!r} is not one.") from None
    if type_name in ("float", "double", "halffloat"):
        try:
            return [float(t) for t in texts]
        except ValueError:
            raise InvalidInputError(f"The key column {key} holds numbers; got {texts!r}.") from None
    return list(texts)
