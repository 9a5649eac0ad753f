"""Sizes compress records and compares: the source's, and the manifest's share of an archive.

* :func:`source_size` -- the size of what was compressed, recorded in the manifest
  (``source_size``) so that compress, ``Archive`` and ``rankfold inspect`` can put it beside
  the archive's. For a Parquet source, the bytes of its files as stored; for any other source
  (a DuckDB table or query, CSV, Arrow, pandas, numpy), the numeric columns as raw values:
  rows x the byte width of each numeric column's type (8 for float64 and int64, 4 for
  float32, ...). ``measure`` says which.
* :func:`manifest_allowance` -- a cheap estimate of ``manifest.json`` before the files are
  hashed, which steers the attempts of a ``target_bytes`` compress. It decides nothing: the
  size checked against the target is exact (``store.manifest.write_manifest(at_most=...)``).
"""

from __future__ import annotations

import os
from typing import Any

import pyarrow as pa

from ..store import remote
from ..store.manifest import manifest_text

__all__ = ["PARQUET_FILES", "RAW_NUMERIC", "parquet_files_of", "source_size", "manifest_allowance"]

PARQUET_FILES = "parquet_files"   # the source's Parquet files, bytes as stored
RAW_NUMERIC = "raw_numeric"       # rows x the byte width of each numeric column's type

# bytes of one file's entry in the manifest beyond its name: the size, SHA-256 and footer
# SHA-256 (64 hex digits each) and JSON punctuation (measured 176-190 bytes on this project's
# archives); row files add per-row-group digests, which the estimate leaves out
_ENTRY_BYTES = 190


def _type_width(data_type: pa.DataType) -> int:
    try:
        return max(1, data_type.bit_width // 8)
    except ValueError:  # not a fixed-width type: count a float64
        return 8


def _parquet_bytes(files: list[str], storage_options: dict | None) -> int:
    total = 0
    for name in files:
        if remote.is_url(name):
            fs, root = remote.filesystem(name, storage_options)
            total += int(fs.size(root))
        else:
            total += os.stat(name).st_size
    return total


def parquet_files_of(executor: Any) -> tuple[list[str] | None, dict | None]:
    """(the source's Parquet files, their fsspec options) as an executor reads them: the
    in-process executor's DuckDB source, or the distinct files of the partitions (Dask);
    (None, None) for a source that is not Parquet files."""
    source = getattr(executor, "source", None)
    if source is not None:
        return source.parquet_files, source.storage_options
    partitions = getattr(executor, "partitions", None) or []
    if not partitions or any(p.url is None for p in partitions):
        return None, None
    return list(dict.fromkeys(p.url for p in partitions)), partitions[0].storage_options


def source_size(schema: pa.Schema, numeric: list[str], rows: int, parquet_files: list[str] | None,
                storage_options: dict | None = None) -> dict[str, Any]:
    """``{"bytes": int, "measure": PARQUET_FILES | RAW_NUMERIC}`` of the source (module
    docstring). A Parquet file that cannot be measured any more (removed meanwhile, a store
    that refuses the request) gives the raw measure instead: the figure must be true."""
    if parquet_files:
        try:
            return {"bytes": _parquet_bytes(parquet_files, storage_options), "measure": PARQUET_FILES}
        except (OSError, ValueError):
            pass
    width = sum(_type_width(schema.field(name).type) for name in numeric)
    return {"bytes": int(rows) * width, "measure": RAW_NUMERIC}


def manifest_allowance(manifest: dict[str, Any], file_names: list[str]) -> int:
    """Estimated bytes of ``manifest.json`` once ``file_names`` are listed in it (see the
    module docstring: an estimate that steers, never a figure that is reported)."""
    text = manifest_text(manifest)
    return len(text.encode("utf-8")) + sum(len(name) + _ENTRY_BYTES for name in file_names)
