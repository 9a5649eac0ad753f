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
  data page was served). SQL that reads the row files through DuckDB therefore checks them
  against SHA-256 digests from the manifest (:class:`RowFileSeal`), in one of two ways:

  - *by row group* (``rankfold_scan``, row files written with :func:`part_digests`): before
    the query, the column chunks of ``_rf_row`` and the key columns, over every row group
    (the only columns DuckDB may filter on before the check, see ``tables.scan_sql``); while
    the query runs, each row group before any of its rows passes on
    (:meth:`RowFileSeal.check_rows`, called by a SQL filter). A point lookup hashes the key
    columns and one row group, not the whole file.
  - *whole files* (every other SQL path, and row files without row-group digests): the
    whole-file SHA-256 of every row file and small table before the query.

  Either way a check is done once per archive version and process, and again when a file's
  size, mtime or inode changes.

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
from collections import OrderedDict
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from ..errors import CorruptArchiveError
from . import layout
from .sql_text import sql_literal
from .table_schemas import check_row_schema
from .manifest_schema import DIGEST_FIELD, check_plain_name, files_used, sealed_by_groups

__all__ = ["PAGE_CHECKSUMS", "WRITE_OPTIONS", "footer_sha256", "verified_metadata", "check_listed_files",
           "read_small_table",
           "open_row_file", "check_tables", "RowFileSeal", "read_parquet_sql", "damaged",
           "part_digests", "row_group_spans", "sealed_rows_sql", "seal_for_token", "sha256_of",
           "footer_length", "FOOTER_TRAILER_BYTES"]

# Parquet write options that every archive file is written with (page CRC-32 checksums).
WRITE_OPTIONS = {"write_page_checksum": True}
# Verify page checksums on every pyarrow read of an archive file. Only the integrity
# benchmark turns this off, to measure what the check costs.
PAGE_CHECKSUMS = True

FOOTER_TRAILER_BYTES = 8  # 4-byte little-endian footer length + b"PAR1" (Parquet format spec)


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


def footer_length(trailer: bytes, size: int) -> int | None:
    """The length of a Parquet file's footer metadata from its last 8 bytes ``trailer``
    (4-byte little-endian length, then ``PAR1``; Parquet format specification) and the
    file's ``size`` in bytes; None when they are not a Parquet footer. The footer as
    :func:`footer_sha256` hashes it is the last ``length + 8`` bytes."""
    if size < 12 or len(trailer) != FOOTER_TRAILER_BYTES or trailer[4:] != b"PAR1":
        return None
    length = struct.unpack("<I", trailer[:4])[0]
    return length if length + 12 <= size else None


def _footer(path: Path) -> bytes:
    with open(path, "rb") as handle:
        handle.seek(0, os.SEEK_END)
        size = handle.tell()
        if size < 12:
            raise damaged(path, "is too short to be a Parquet file")
        handle.seek(size - FOOTER_TRAILER_BYTES)
        length = footer_length(handle.read(FOOTER_TRAILER_BYTES), size)
        if length is None:
            raise damaged(path, "does not end with a Parquet footer")
        handle.seek(size - FOOTER_TRAILER_BYTES - length)
        return handle.read(length + FOOTER_TRAILER_BYTES)


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
    if str(stored) == declared:  # a dictionary column declared as one
        return True
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
    anchors = np.sort(reader.model.anchor_positions)
    if not np.array_equal(anchors, np.sort(np.asarray(m["anchors"], dtype=np.int64))):
        raise damaged(path / layout.table_file(m, layout.ANCHORS), "holds other anchor rows than the manifest")
    rows = reader.rows_count
    if reader.cell_rows.size and (reader.cell_rows.min() < 0 or reader.cell_rows.max() >= rows
                                  or reader.cell_cols.min() < 0 or reader.cell_cols.max() >= width):
        raise damaged(path / layout.table_file(m, layout.CELLS), "addresses a cell outside the archive's shape")
    reserved = reader.model.row_file_reserved()  # the format's own columns (table_schemas)
    needed = {n: declared[n] for n in m.get("exact_columns", [])}
    needed.update({n: declared[n] for n, t in reserved.items() if t is None})  # source-typed basis
    for first, count, name, starts in reader.parts:
        if int(starts[-1]) != count:
            raise damaged(path / name, f"holds {int(starts[-1])} rows where the manifest records {count}")
        schema = reader.row_file_schema(name)
        check_row_schema(schema, reserved, path / name)
        # codes may be any unsigned width, but one for all files (DuckDB reads them as one table)
        reserved.update({n: schema.field(n).type for n, t in reserved.items() if isinstance(t, tuple)})
        for column, type_name in needed.items():
            if column not in schema.names:
                raise damaged(path / name, f"lacks the column {column!r} the manifest implies")
            if type_name is not None and not _types_match(schema.field(column).type, type_name):
                raise damaged(path / name, f"stores {column!r} as {schema.field(column).type}, "
                                           f"where the manifest declares {type_name}")


class RowFileSeal:
    """SHA-256 checks of every file an archive's SQL reads (row files and small tables) for
    readers that do not verify Parquet page checksums, such as DuckDB. Each check is done once
    and again only when a file's (size, mtime, inode) changes.

    * :meth:`check`: whole files, every row file and small table.
    * :meth:`check_before_scan` then :meth:`check_rows`: small tables whole, the row files'
      ``columns`` (their column chunks in every row group) before the query, and each row group
      when rows of it are read (``by_groups``: only for row files whose manifest entry has
      row-group digests, :func:`part_digests`, matching their verified footers).

    ``metadata``: the row files' footers as verified on open (``verified_metadata``)."""

    def __init__(self, directory: Path, manifest: dict[str, Any],
                 metadata: dict[str, pq.FileMetaData] | None = None):
        self.directory = directory
        self.entries = [_entry(manifest, name) for name in files_used(manifest)]
        self._checked: dict[Any, tuple] = {}
        self._lock = threading.Lock()
        parts = manifest["row_parts"]
        self._row_files = {p["name"] for p in parts}
        # per row part: (name, first row of each of its row groups, absolute) and byte ranges
        self._groups: dict[str, list] = {}
        self._group_first: list[tuple[int, str, np.ndarray]] = []
        self._rows_of: dict[str, int] = {}
        self._columns: dict[str, list[str]] = {}
        self._by_name = {entry["name"]: entry for entry in self.entries}
        self._parts, self._metadata, self._by_groups = parts, metadata, None
        self.token = hashlib.sha256(
            f"{Path(directory).resolve()}\0{manifest.get(DIGEST_FIELD, '')}".encode()).hexdigest()[:32]

    @property
    def by_groups(self) -> bool:
        """Whether every row file can be checked by row group (planned on first use: opening
        an archive in Python does not pay for it)."""
        with self._lock:
            if self._by_groups is None:
                self._by_groups = self._metadata is not None and all(
                    self._plan(self._by_name[p["name"]], p, self._metadata.get(p["name"])) for p in self._parts)
            return self._by_groups

    def _plan(self, entry: dict[str, Any], part: dict[str, Any], metadata) -> bool:
        if metadata is None or not sealed_by_groups(entry):
            return False
        spans = row_group_spans(metadata, entry["bytes"])
        if spans is None or len(spans) != len(entry["group_sha256"]):
            return False
        self._groups[part["name"]] = spans
        self._columns[part["name"]] = [metadata.schema.column(j).path for j in range(metadata.num_columns)]
        self._rows_of[part["name"]] = int(part["rows"])
        counts = [metadata.row_group(g).num_rows for g in range(metadata.num_row_groups)]
        first = part["first_row"] + np.cumsum([0] + counts[:-1], dtype=np.int64)
        self._group_first.append((part["first_row"], part["name"], first))
        return True

    def check(self, names: list[str] | None = None) -> None:
        """Whole-file SHA-256 of every file SQL reads (or of the files ``names`` only)."""
        for entry in self.entries:
            if names is None or entry["name"] in names:
                self._check_whole(entry)

    def check_before_scan(self, columns: list[str]) -> None:
        """Before a query that reads the row files through :func:`sealed_rows_sql`: the small
        tables whole, and in every row file the column chunks of ``columns`` (those DuckDB may
        filter on before :meth:`check_rows` sees a row); registers this seal for
        :func:`seal_for_token`."""
        if not self.by_groups:
            raise ValueError("check_before_scan needs row-group digests (by_groups)")
        for entry in self.entries:
            if entry["name"] not in self._row_files:
                self._check_whole(entry)
                continue
            path, signature = self._stat(entry)
            wanted = [c for c in columns if c in self._columns[entry["name"]]]
            missing = [c for c in wanted if c not in entry["column_sha256"]]
            if missing:
                raise damaged(self.directory / layout.MANIFEST,
                              f"gives no column_sha256 for {missing[0]!r} of {entry['name']}")
            key = (entry["name"], "columns", tuple(wanted))
            with self._lock:
                if self._checked.get(key) == signature:
                    continue
            # DuckDB reads the footer again (row groups, offsets, statistics for pruning)
            if footer_sha256(path) != entry["footer_sha256"]:
                raise damaged(path, "has a Parquet footer that does not match its digest in the manifest")
            spans = self._groups[entry["name"]]
            names = self._columns[entry["name"]]  # schema order, as the spans' chunks
            for column in wanted:
                j = names.index(column)
                digest = _hash_ranges(path, [chunks[j] for _, _, chunks in spans])
                if digest != entry["column_sha256"][column]:
                    raise damaged(path, f"has {column!r} column chunks that do not match their SHA-256 "
                                        "in the manifest")
            with self._lock:
                self._checked[key] = signature
        with _SEALS_LOCK:
            _SEALS[self.token] = self
            _SEALS.move_to_end(self.token)
            while len(_SEALS) > _SEALS_KEPT:
                _SEALS.popitem(last=False)

    def check_rows(self, rows: np.ndarray) -> None:
        """Check the row groups holding the rows at positions ``rows`` (int64, any order)
        against their SHA-256 in the manifest; raises :class:`CorruptArchiveError` if one
        differs or a position is outside the archive."""
        if rows.size == 0:
            return
        low, high = int(rows.min()), int(rows.max())
        for first_row, name, first in self._group_first:
            if high < first_row or low >= first_row + self._rows_of[name]:
                continue
            g_low, g_high = np.searchsorted(first, [low, high], side="right") - 1
            if g_low == g_high and low >= first_row and high < first_row + self._rows_of[name]:
                self._check_group(name, int(g_low))  # the usual call: rows of one row group
                continue
            top = first_row + self._rows_of[name]
            inside = rows[(rows >= first_row) & (rows < top)]
            if inside.size == 0:
                continue
            for g in np.unique(np.searchsorted(first, inside, side="right") - 1).tolist():
                self._check_group(name, g)
        total = sum(self._rows_of.values())
        if low < 0 or high >= total:
            raise damaged(self.directory, f"serves a row position outside 0..{total - 1}")

    def _check_group(self, name: str, g: int) -> None:
        entry = self._by_name[name]
        path, signature = self._stat(entry)
        key = (name, "group", g)
        with self._lock:
            if self._checked.get(key) == signature:
                return
        start, stop, _ = self._groups[name][g]
        if _hash_ranges(path, [(start, stop)]) != entry["group_sha256"][g]:
            raise damaged(path, f"has a row group ({g}) that does not match its SHA-256 in the manifest")
        with self._lock:
            self._checked[key] = signature

    def _stat(self, entry: dict[str, Any]) -> tuple[Path, tuple]:
        path = self.directory / entry["name"]
        try:
            info = path.stat()
        except OSError:
            raise CorruptArchiveError(f"{self.directory} is missing {entry['name']}; the archive "
                                      "is damaged.") from None
        if info.st_size != entry["bytes"]:
            raise damaged(path, "does not have the size recorded in the manifest")
        return path, (info.st_size, info.st_mtime_ns, info.st_ino)

    def _check_whole(self, entry: dict[str, Any]) -> None:
        path, signature = self._stat(entry)
        with self._lock:
            if self._checked.get(entry["name"]) == signature:
                return
        if sha256_of(path) != entry["sha256"]:
            raise damaged(path, "does not match its SHA-256 in the manifest")
        with self._lock:
            self._checked[entry["name"]] = signature


# The seals that SQL filters may name (by token), most recently used last: a query's SQL is
# made and its seal registered just before DuckDB runs it.
_SEALS: OrderedDict[str, RowFileSeal] = OrderedDict()
_SEALS_LOCK = threading.Lock()
_SEALS_KEPT = 256


def seal_for_token(token: str) -> RowFileSeal:
    with _SEALS_LOCK:
        seal = _SEALS.get(token)
    if seal is None:
        raise CorruptArchiveError(
            f"No checked archive version is registered under {token!r}: the query's SQL names an "
            "archive version this process has not checked. Run the query again.")
    return seal


def sealed_rows_sql(paths: list[Path], function: str, token: str, file_row_number: bool = False) -> str:
    """The rows of these row files, each passing the SQL function ``function(token, _rf_row)``
    (a Python UDF with side effects that calls :meth:`RowFileSeal.check_rows` and returns
    true) before anything above reads it. DuckDB keeps a filter with side effects below every
    filter it cannot push into the Parquet scan (measured with DuckDB 2.0.1); filters it pushes
    into the scan (a column compared with constants) run before it, which is why
    :meth:`RowFileSeal.check_before_scan` checks the columns they may name."""
    return (f"(SELECT * FROM {read_parquet_sql(paths, file_row_number)} "
            f"WHERE {function}({sql_literal(token)}, {layout.ROW_ID}))")


def _hash_ranges(path: Path, ranges: list[tuple[int, int]], chunk: int = 1 << 22) -> str:
    """SHA-256 of the bytes of ``path`` in the given [start, stop) ranges, concatenated."""
    digest = hashlib.sha256()
    with open(path, "rb", buffering=0) as handle:
        buffer = bytearray(chunk)
        view = memoryview(buffer)
        for start, stop in ranges:
            handle.seek(start)
            left = stop - start
            while left > 0:
                got = handle.readinto(view[:min(chunk, left)])
                if not got:
                    raise damaged(path, "is shorter than its Parquet footer says")
                digest.update(view[:got])
                left -= got
    return digest.hexdigest()


# -- row-group digests, written with the archive ---------------------------------------------------
def _chunk_span(column) -> tuple[int, int]:
    """Byte range [start, stop) of one column chunk: from its dictionary page (when it has
    one) or its first data page, ``total_compressed_size`` bytes (Parquet format spec)."""
    start = column.data_page_offset
    dictionary = column.dictionary_page_offset
    if column.has_dictionary_page and dictionary is not None and 0 < dictionary < start:
        start = dictionary
    return start, start + column.total_compressed_size


def row_group_spans(metadata: pq.FileMetaData, size: int) -> list[tuple[int, int, list]] | None:
    """Per row group of a Parquet file of ``size`` bytes: its byte range (start, stop) and its
    column chunks' ranges (schema order), when the column chunks tile the file from the leading
    magic to the footer with no gap or overlap, so that every byte outside the footer belongs to
    exactly one row group and one column chunk. None otherwise (e.g. a page index or bloom
    filter between the row groups and the footer): such a file is checked whole."""
    expected = 4  # b"PAR1"
    groups = []
    for g in range(metadata.num_row_groups):
        group = metadata.row_group(g)
        chunks = [_chunk_span(group.column(j)) for j in range(group.num_columns)]
        start = expected
        for lo, hi in sorted(chunks):
            if lo != expected or hi < lo:
                return None
            expected = hi
        groups.append((start, expected, chunks))
    if expected != size - metadata.serialized_size - FOOTER_TRAILER_BYTES:
        return None
    return groups


def part_digests(path: Path, columns: list[str] | None = None) -> dict[str, Any]:
    """Digests of the row file ``path`` for its manifest entry: ``group_sha256``, the SHA-256
    of each row group's byte range, and ``column_sha256``, for each of ``columns`` (default:
    every column; writers pass ``_rf_row`` and the exact columns, the only ones SQL checks
    before a scan, which keeps 64 bytes per other column out of the manifest) the SHA-256 of
    its column chunks in row-group order. Empty when the row groups do not tile the file
    (:func:`row_group_spans`): SQL then checks the file whole."""
    metadata = pq.read_metadata(path)
    spans = row_group_spans(metadata, path.stat().st_size)
    names = [metadata.schema.column(j).path for j in range(metadata.num_columns)]
    if spans is None or len(set(names)) != len(names):
        return {}
    digests = [hashlib.sha256() for _ in names]
    groups = []
    with open(path, "rb") as handle:
        for _, _, chunks in spans:  # one column chunk in memory at a time
            group = hashlib.sha256()
            for j in sorted(range(len(chunks)), key=lambda j: chunks[j][0]):
                handle.seek(chunks[j][0])
                piece = handle.read(chunks[j][1] - chunks[j][0])
                group.update(piece)
                digests[j].update(piece)
            groups.append(group.hexdigest())
    keyed = set(names if columns is None else columns)
    return {"group_sha256": groups,
            "column_sha256": {n: d.hexdigest() for n, d in zip(names, digests) if n in keyed}}


def sha256_of(path: Path, chunk: int = 1 << 22) -> str:
    """The SHA-256 of the whole file ``path`` (hex), read in ``chunk``-byte pieces into one
    reused buffer: the one whole-file digest of the archive code (manifest entries, checks)."""
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


def read_parquet_sql(paths: list[Path], file_row_number: bool = False) -> str:
    """``read_parquet([...])`` over exactly these files. DuckDB expands glob patterns in every
    file name it is given (``*``, ``?``, ``[...]``), so each absolute path is escaped
    (``glob.escape``: a metacharacter becomes a one-character class) and matches only itself:
    an archive under a folder named ``a[ab]`` must not read ``aa`` or ``ab``. With
    ``file_row_number``, each row also carries its 0-based position in its file
    (``file_row_number``, which difference-coded codes need: ``row_differences``)."""
    literals = [sql_literal(glob.escape(str(Path(p).resolve()))) for p in paths]
    extra = ", file_row_number = true" if file_row_number else ""
    return f"read_parquet([{', '.join(literals)}]{extra})"
