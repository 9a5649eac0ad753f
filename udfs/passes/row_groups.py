"""Row groups of a Parquet source or a DuckDB table, and the seeded sample of them that the
sketch may read.

A Parquet footer gives every row group's row count without reading any data, so the rows of
a dataset can be numbered (files in the source's order, groups in file order) and a sample
of whole row groups read by index, decoding nothing else. A DuckDB base table is cut the same
way into ranges of its row ids, which DuckDB reads without scanning the rest (a filter on
``rowid`` reaches the table scan: 250,000 of 4e6 rows x 100 read in 0.2 s). The compress sketch (the n x n
Gram matrix that chooses the basis columns and their weights) can come from such a sample;
the encode pass still reads every row and measures every error, so what the archive reports
never rests on the sample.
"""

from __future__ import annotations

import contextlib
from dataclasses import dataclass

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

__all__ = ["RowGroup", "parquet_row_groups", "table_row_groups", "choose_row_groups",
           "rowid_filter", "open_parquet", "is_url"]

# Row-id ranges of a DuckDB table: DuckDB's own row group size, or smaller for small tables
# so that a sample can still be a small part of them (at least 64 ranges, 2048-row vectors).
TABLE_GROUP_ROWS = 122_880
_VECTOR_ROWS = 2048


@dataclass(frozen=True)
class RowGroup:
    """Row group ``index`` of the Parquet file ``path``, or for a DuckDB table (``path``
    None) the rows whose row ids lie in ``rowids`` (inclusive): source rows ``first_row`` ..
    ``first_row + rows - 1``."""

    path: str | None
    index: int
    first_row: int
    rows: int
    rowids: tuple[int, int] | None = None


def is_url(text: str) -> bool:
    """An fsspec URL (s3://, gs://, ...) rather than a local path."""
    return "://" in text and not text.startswith("file://")


def open_parquet(path: str, storage_options: dict | None = None):
    """A context manager giving what ``pyarrow.parquet.ParquetFile`` opens: an fsspec handle
    for a URL, the path itself for a local file (Arrow's native reader: a Python file object
    made the sample pass several times slower)."""
    if is_url(path):
        import fsspec  # installed with the dask extra, the only reader of URLs

        return fsspec.open(path, "rb", **(storage_options or {}))
    return contextlib.nullcontext(path.removeprefix("file://"))


def _is_numeric(data_type: pa.DataType) -> bool:
    return pa.types.is_integer(data_type) or pa.types.is_floating(data_type)


def parquet_row_groups(files: list[str], numeric: list[str] | None = None,
                       storage_options: dict | None = None) -> list[RowGroup] | None:
    """Every row group of ``files`` (in that order), from their footers.

    With ``numeric``, None when some file does not hold every one of those columns as an
    integer or floating-point Parquet column (a column that comes from the directory names
    of a partitioned dataset, or files whose schemas differ): such a source is read only
    through DuckDB, which knows how to assemble it."""
    groups: list[RowGroup] = []
    first = 0
    for path in files:
        with open_parquet(path, storage_options) as handle:
            reader = pq.ParquetFile(handle)
            meta, schema = reader.metadata, reader.schema_arrow
        if numeric is not None:
            found = {f.name: f.type for f in schema}
            if any(name not in found or not _is_numeric(found[name]) for name in numeric):
                return None
        for g in range(meta.num_row_groups):
            rows = meta.row_group(g).num_rows
            if rows:
                groups.append(RowGroup(path, g, first, rows))
            first += rows
    return groups


def table_row_groups(connection, relation: str, names: list[str]) -> list[RowGroup] | None:
    """Ranges of row ids of a DuckDB base table, with the rows each holds (one grouped count
    over the row ids: 19 ms for 4e6 rows); None when ``relation`` has no row ids (a view, a
    query, a file reader) or has a column of its own named rowid, which would shadow them."""
    import duckdb

    if any(name.lower() == "rowid" for name in names):
        return None
    try:
        largest = connection.sql(f"SELECT max(rowid) FROM {relation}").fetchall()[0][0]
        if largest is None:
            return []
        span = _table_span(int(largest) + 1)
        counts = connection.sql(
            f"SELECT rowid // {span} AS g, count(*) FROM {relation} GROUP BY g ORDER BY g").fetchall()
    except duckdb.Error:
        return None
    groups, first = [], 0
    for g, rows in counts:
        groups.append(RowGroup(None, int(g), first, int(rows), (int(g) * span, int(g) * span + span - 1)))
        first += int(rows)
    return groups


def _table_span(rowids: int) -> int:
    """Row ids per range: TABLE_GROUP_ROWS, or fewer (whole vectors) for at least 64 ranges."""
    wanted = -(-rowids // 64)
    return min(TABLE_GROUP_ROWS, max(_VECTOR_ROWS, -(-wanted // _VECTOR_ROWS) * _VECTOR_ROWS))


def rowid_filter(groups: list[RowGroup]) -> str:
    """A SQL condition selecting the rows of the given table row groups."""
    return " OR ".join(f"rowid BETWEEN {g.rowids[0]} AND {g.rowids[1]}" for g in groups)


def choose_row_groups(groups: list[RowGroup], wanted_rows: int, seed: int) -> list[RowGroup]:
    """A seeded sample of whole row groups holding at least ``wanted_rows`` rows (all of
    them when they hold fewer), in source order.

    Groups are taken in the order of a random permutation (``numpy.random.default_rng(seed)``)
    until they hold enough rows: every group is equally likely to be drawn, whatever its
    position, so a drift along the rows (time-ordered readings) is sampled across its range
    rather than from one end. The same groups and seed give the same sample on every
    executor."""
    order = np.random.default_rng([seed, len(groups)]).permutation(len(groups))
    taken, rows = [], 0
    for k in order:
        if rows >= wanted_rows:
            break
        taken.append(int(k))
        rows += groups[k].rows
    return [groups[k] for k in sorted(taken)]
