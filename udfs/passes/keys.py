"""The key column: one row per key value, checked on the rows an archive holds.

``compress(key=...)`` and ``Archive.append`` call :func:`check_unique_key` on the row files
they wrote (before anything is committed), so a key lookup (``rankfold.Keys``, ``--keys``)
always names exactly one row. The check is one DuckDB GROUP BY over the key column of those
files: memory follows the number of distinct keys (DuckDB spills to disk past its limit).
"""

from __future__ import annotations

from pathlib import Path

import duckdb
import pyarrow.dataset as ds

from ..errors import InvalidInputError
from ..store.sql_text import quote_identifier

__all__ = ["check_unique_key"]


def check_unique_key(files: list[Path], key: str, description: str, *, filesystem=None) -> None:
    """Raise InvalidInputError naming a repeated value when ``key`` is not unique over the
    Parquet ``files`` (NULL keys are not counted: they name no row); ``filesystem``: an
    fsspec or pyarrow file system holding them (None: local files)."""
    if not files:
        return
    dataset = ds.dataset([str(f) for f in files], format="parquet", filesystem=filesystem)
    con = duckdb.connect()
    try:
        con.register("rankfold_key_rows", dataset)
        column = quote_identifier(key)
        repeated = con.sql(
            f"SELECT {column} AS k, count(*) AS n FROM rankfold_key_rows WHERE {column} IS NOT NULL "
            f"GROUP BY {column} HAVING count(*) > 1 ORDER BY n DESC LIMIT 1").fetchall()
    finally:
        con.close()
    if repeated:
        value, count = repeated[0]
        raise InvalidInputError(
            f"The key column {key!r} of {description} is not unique: {value!r} is in {count} rows. "
            "A key names one row; choose a unique column (or none), or keep this one with "
            "exact_columns=[...] and select rows with a condition instead.")
