"""Row groups of a Parquet source, and the seeded sample of them that the sketch may read.

A Parquet footer gives every row group's row count without reading any data, so the rows of
a dataset can be numbered (files in the source's order, groups in file order) and a sample
of whole row groups read by index, decoding nothing else. The compress sketch (the n x n
Gram matrix that chooses the basis columns and their weights) can come from such a sample;
the verify pass still reads every row and measures every error, so what the archive reports
never rests on the sample.
"""

from __future__ import annotations

import contextlib
from dataclasses import dataclass

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

__all__ = ["RowGroup", "parquet_row_groups", "choose_row_groups", "open_parquet", "is_url"]


@dataclass(frozen=True)
class RowGroup:
    """Row group ``index`` of the Parquet file ``path``: source rows ``first_row`` ..
    ``first_row + rows - 1``."""

    path: str
    index: int
    first_row: int
    rows: int


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
