"""Integrity of an archive's files: what is checked, when, and at what cost.

Every check uses what the formats already carry, plus SHA-256 (FIPS 180-4) from hashlib:

* **The manifest** carries ``manifest_sha256``, the SHA-256 of its own canonical JSON without
  that entry (``manifest.manifest_digest``): a one-word edit that keeps valid JSON is refused.
  Its fields are then checked against the declared schema (``manifest_schema.validate``) and
  against the files' own Parquet footers and small tables (``check_tables``): row counts,
  column names, types and widths.
* **Small tables** (columns, anchors, cells, blocks: O((c + r) n) bytes) are read whole, hashed
  and parsed from the same bytes (:func:`read_small_table`), so a same-size swap of
  ``columns.parquet`` between two archives of one shape is refused on open.
* **Row files** are too large to hash on every open. Their Parquet footer (schema, row groups,
  offsets, statistics) is hashed on open against ``footer_sha256`` in the manifest; their data
  pages carry Parquet page CRC-32 checksums (written with ``write_page_checksum=True``),
  verified by pyarrow on every read (``page_checksum_verification=True``). Measured on a small
  row file, every one of its 69,442 single-bit flips was either refused or left the values
  read unchanged (flips in page-header fields pyarrow does not use).
* **DuckDB does not verify page checksums** (measured with DuckDB 2.0.1: a flipped bit in a
  data page was served). SQL that reads the row files through DuckDB therefore first checks
  their whole-file SHA-256 against the manifest, once per archive version and process
  (:class:`RowFileSeal`), re-hashing when a file's size, mtime or inode changes.

What this does not stop: someone who rewrites a file *and* the manifest with recomputed
digests. Digests detect damage and edits, not forgery; that would need a signature.
"""

from __future__ import annotations

import glob
import hashlib
import os
import stat
import struct
import threading
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from ..errors import CorruptArchiveError
from . import layout
from .manifest_schema import check_plain_name, files_used

__all__ = ["PAGE_CHECKSUMS", "WRITE_OPTIONS", "footer_sha256", "verified_metadata", "check_listed_files",
           "read_small_table",
           "open_row_file", "check_tables", "RowFileSeal", "read_parquet_sql", "damaged"]

# Parquet write options that every archive file is written with (page CRC-32 checksums).
WRITE_OPTIONS = {"write_page_checksum": True}
# Verify page checksums on every pyarrow read of an archive file. Only the integrity
# benchmark turns this off, to measure what the check costs.
PAGE_CHECKSUMS = True

_FOOTER_TAIL = 8  # 4-byte little-endian footer length + b"PAR1" (Parquet format spec)


def damaged(path: Path, what: str) -> CorruptArchiveError:
    return CorruptArchiveError(
        f"{path} {what}; the archive is damaged or was edited: restore it from a copy or "
        "compress the source again."
    )


def footer_sha256(path: Path) -> str:
    """SHA-256 of the Parquet footer of ``path``: the file metadata, its length and the
    trailing magic (the last ``footer length + 8`` bytes of the file)."""
    return hashlib.sha256(_footer(path)).hexdigest()


def verified_metadata(path: Path, entry: dict[str, Any]) -> pq.FileMetaData:
    """The Parquet metadata of the row file ``path``, parsed from the very footer bytes whose
    SHA-256 matched ``entry["footer_sha256"]``; readers then open the file with this metadata
    (``pq.ParquetFile(path, metadata=...)``), so a footer changed later is never used."""
    tail = _footer(path)
    if hashlib.sha256(tail).hexdigest() != entry["footer_sha256"]:
        raise damaged(path, "has a Parquet footer that does not match its digest in the manifest")
    try:
        return pq.read_metadata(pa.BufferReader(_arrow_owned(b"PAR1" + tail)))
    except (OSError, pa.ArrowException) as exc:
        raise damaged(path, f"has a Parquet footer that cannot be read ({exc})") from None


def _footer(path: Path) -> bytes:
    with open(path, "rb") as handle:
        handle.seek(0, os.SEEK_END)
        size = handle.tell()
        if size < 12:
            raise damaged(path, "is too short to be a Parquet file")
        handle.seek(size - _FOOTER_TAIL)
        tail = handle.read(_FOOTER_TAIL)
        length = struct.unpack("<I", tail[:4])[0]
        if tail[4:] != b"PAR1" or length + 12 > size:
            raise damaged(path, "does not end with a Parquet footer")
        handle.seek(size - _FOOTER_TAIL - length)
        return handle.read(length + _FOOTER_TAIL)


def check_listed_files(directory: Path, manifest: dict[str, Any]) -> None:
    """Every listed file is a regular file inside ``directory`` (no symlink out of it) with its
    recorded size; every row file's footer matches its recorded digest."""
    root = directory.resolve()
    row_files = {p["name"] for p in manifest["row_parts"]}  # small tables: hashed whole on read
    for entry in manifest["files"]:
        name = entry["name"]
        problem = check_plain_name(name)
        if problem:  # validate() checked this already; kept here for callers that skip it
            raise damaged(directory / layout.MANIFEST, f"lists {name!r}: {problem}")
        path = directory / name
        try:
            info = path.lstat()
        except FileNotFoundError:
            raise CorruptArchiveError(f"{directory} is missing {name}; the archive is damaged.") from None
        if stat.S_ISLNK(info.st_mode):
            if path.resolve().parent != root:
                raise damaged(path, "is a symbolic link that leaves the archive directory")
            info = path.stat()
        if not stat.S_ISREG(info.st_mode):
            raise damaged(path, "is not a regular file")
        if info.st_size != entry["bytes"]:
            raise CorruptArchiveError(
                f"{path} has {info.st_size} bytes where the manifest records {entry['bytes']}; "
                "the archive is damaged or was edited."
            )
        if name in row_files and footer_sha256(path) != entry["footer_sha256"]:
            raise damaged(path, "has a Parquet footer that does not match its digest in the manifest")


def _entry(manifest: dict[str, Any], name: str) -> dict[str, Any]:
    for entry in manifest["files"]:
        if entry["name"] == name:
            return entry
    raise damaged(Path(name), "is used but not listed in the manifest")


def _arrow_owned(data: bytes) -> pa.Buffer:
    """``data`` copied into memory that Arrow owns. A buffer that wraps a Python object must
    take the GIL when Arrow frees it, and pyarrow may free it on one of its own threads; at
    interpreter exit that thread cannot take the GIL and the process aborts ("terminate called
    without an active exception", seen about once in 30 runs under load with
    ``pq.read_table(pa.BufferReader(bytes))``, whose dataset fragment outlived the call)."""
    buffer = pa.allocate_buffer(len(data))
    pa.FixedSizeBufferWriter(buffer).write(data)
    return buffer


def read_small_table(directory: Path, manifest: dict[str, Any], name: str) -> pa.Table:
    """Read the small table file ``name`` whole, check its SHA-256 against the manifest, and
    parse the very bytes that were hashed (no window for a swap between check and read)."""
    entry = _entry(manifest, name)
    path = directory / name
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        raise  # a file of the version that is gone: the reader says so (ArchiveNotFoundError)
    except OSError as exc:
        raise damaged(path, f"cannot be read ({exc.strerror})") from None
    if hashlib.sha256(data).hexdigest() != entry["sha256"]:
        raise damaged(path, "does not match its SHA-256 in the manifest")
    try:
        return pq.ParquetFile(pa.BufferReader(_arrow_owned(data)),
                              page_checksum_verification=PAGE_CHECKSUMS).read()
    except (OSError, pa.ArrowException) as exc:
        raise damaged(path, f"is not readable Parquet ({exc})") from None


def open_row_file(path: Path, metadata: pq.FileMetaData | None = None) -> pq.ParquetFile:
    """A row file opened for reading with page checksum verification (and with ``metadata``
    from :func:`verified_metadata` when given, instead of its footer as it is now)."""
    try:
        return pq.ParquetFile(path, metadata=metadata, page_checksum_verification=PAGE_CHECKSUMS)
    except FileNotFoundError:
        raise  # a file of the version that is gone: the reader says so (ArchiveNotFoundError)
    except (OSError, pa.ArrowException) as exc:
        raise damaged(path, f"is not readable Parquet ({exc})") from None


def _types_match(stored: pa.DataType, declared: str) -> bool:
    """The row file's type is the declared source type, up to what Parquet storage changes:
    dictionary encoding, and the unit of temporal types (seconds are stored as milliseconds)."""
    if pa.types.is_dictionary(stored):
        stored = stored.value_type
    text = str(stored)
    return text == declared or text.split("[")[0].split("(")[0] == declared.split("[")[0].split("(")[0]


def check_tables(reader) -> None:
    """Cross-check the manifest against the tables' own contents and the row files' footers:
    raises :class:`CorruptArchiveError` when they disagree (an edited field of the manifest:
    a column type, two names swapped, the shape)."""
    m, path = reader.manifest, reader.path
    cols = reader.columns_table
    where = path / layout.table_file(m, layout.COLUMNS)
    width = len(reader.numeric_columns)
    if cols.num_rows != width:
        raise damaged(where, f"has {cols.num_rows} rows where the manifest has {width} numeric columns")
    if "name" in cols.column_names and cols.column("name").to_pylist() != reader.numeric_columns:
        raise damaged(where, "names the numeric columns differently from the manifest")
    declared = {f["name"]: f["type"] for f in m["schema"]}
    if "type" in cols.column_names and cols.column("type").to_pylist() != [
            declared[n] for n in reader.numeric_columns]:
        raise damaged(where, "gives the numeric columns other types than the manifest")
    lengths = pa.compute.list_value_length(cols.column("weights")).to_numpy(zero_copy_only=False)
    if np.any(lengths != len(m["basis"])):
        raise damaged(where, f"holds weights for other than the manifest's {len(m['basis'])} basis entries")
    anchors = np.sort(reader.anchor_positions)
    if not np.array_equal(anchors, np.sort(np.asarray(m["anchors"], dtype=np.int64))):
        raise damaged(path / layout.table_file(m, layout.ANCHORS), "holds other anchor rows than the manifest")
    rows = reader.rows_count
    if reader.cell_rows.size and (reader.cell_rows.min() < 0 or reader.cell_rows.max() >= rows
                                  or reader.cell_cols.min() < 0 or reader.cell_cols.max() >= width):
        raise damaged(path / layout.table_file(m, layout.CELLS), "addresses a cell outside the archive's shape")
    needed = {layout.ROW_ID: None, layout.ROW_ERR_MAX: None}
    needed.update({n: declared[n] for n in m.get("exact_columns", [])})
    needed.update({s: None for s in reader.basis_stored})
    needed.update({layout.CODE_PATTERN.format(j): None for j in np.flatnonzero(np.isfinite(reader.residual_step))})
    for first, count, name, starts in reader.parts:
        if int(starts[-1]) != count:
            raise damaged(path / name, f"holds {int(starts[-1])} rows where the manifest records {count}")
        schema = reader.row_file_schema(name)
        for column, type_name in needed.items():
            if column not in schema.names:
                raise damaged(path / name, f"lacks the column {column!r} the manifest implies")
            if type_name is not None and not _types_match(schema.field(column).type, type_name):
                raise damaged(path / name, f"stores {column!r} as {schema.field(column).type}, "
                                           f"where the manifest declares {type_name}")


class RowFileSeal:
    """Whole-file SHA-256 of every file an archive's SQL reads (row files and small tables),
    checked once before DuckDB reads them (DuckDB does not verify Parquet page checksums) and
    again only when a file's (size, mtime, inode) changes."""

    def __init__(self, directory: Path, manifest: dict[str, Any]):
        self.directory = directory
        self.entries = [_entry(manifest, name) for name in files_used(manifest)]
        self._checked: dict[str, tuple] = {}
        self._lock = threading.Lock()

    def check(self) -> None:
        for entry in self.entries:
            path = self.directory / entry["name"]
            try:
                info = path.stat()
            except OSError:
                raise CorruptArchiveError(f"{self.directory} is missing {entry['name']}; the archive "
                                          "is damaged.") from None
            signature = (info.st_size, info.st_mtime_ns, info.st_ino)
            with self._lock:
                if self._checked.get(entry["name"]) == signature:
                    continue
            if info.st_size != entry["bytes"] or _sha256_file(path) != entry["sha256"]:
                raise damaged(path, "does not match its SHA-256 in the manifest")
            with self._lock:
                self._checked[entry["name"]] = signature


def _sha256_file(path: Path, chunk: int = 1 << 22) -> str:
    digest = hashlib.sha256()
    with open(path, "rb", buffering=0) as handle:
        buffer = bytearray(chunk)
        view = memoryview(buffer)
        while True:
            got = handle.readinto(buffer)
            if not got:
                break
            digest.update(view[:got])
    return digest.hexdigest()


def read_parquet_sql(paths: list[Path]) -> str:
    """``read_parquet([...])`` over exactly these files. DuckDB expands glob patterns in every
    file name it is given (``*``, ``?``, ``[...]``), so each absolute path is escaped
    (``glob.escape``: a metacharacter becomes a one-character class) and matches only itself:
    an archive under a folder named ``a[ab]`` must not read ``aa`` or ``ab``."""
    literals = []
    for p in paths:
        text = glob.escape(str(Path(p).resolve()))
        literals.append("'" + text.replace("'", "''") + "'")
    return f"read_parquet([{', '.join(literals)}])"
