"""Sources: anything rankfold can compress, read as a stream of Arrow record batches through
DuckDB (``to_arrow_reader``), so every pass sees the same rows in the same order with memory
bounded by the batch size.

Accepted: a 2-D numpy array; a pyarrow Table or RecordBatch; a pandas DataFrame; a path to a
Parquet file, directory or glob, or to a CSV/TSV file; a table name or a SELECT statement
together with ``connection=`` (a DuckDB connection).
"""

from __future__ import annotations

import queue
import re
import threading
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from ..errors import InvalidInputError
from ..store.sql_text import one_query, qualified_name, quote_identifier, sql_literal

__all__ = ["Source", "open_source", "block_from_batch"]

_PARQUET_SUFFIXES = (".parquet", ".pq", ".parq")
_CSV_SUFFIXES = (".csv", ".tsv", ".txt", ".csv.gz", ".tsv.gz", ".csv.zst")


@dataclass
class Source:
    """A relation on a DuckDB connection that can be streamed any number of times.

    ``relation`` is SQL usable after FROM; ``description`` names the source in messages;
    ``parquet_files`` lists the files of a Parquet path in the order DuckDB reads them
    (None for other sources).
    """

    connection: duckdb.DuckDBPyConnection
    relation: str
    schema: pa.Schema
    description: str
    owns_connection: bool = False
    parquet_files: list[str] | None = None
    storage_options: dict | None = None  # fsspec options of URL sources (credentials, endpoint)
    _file_types: list[dict[str, pa.DataType]] | None = None  # per file: its columns' own types

    def stream(self, columns: list[str], batch_rows: int, where: str | None = None) -> "ReadAhead":
        """Start streaming ``columns`` (all when empty) in source order, ``batch_rows`` rows
        at a time (only the rows meeting the SQL condition ``where``, when given). DuckDB
        plans the query and decodes the first batches on a helper thread from now on
        (measured 0.4 s to the first batch of 1e6 x 100 Parquet rows), so a stream opened
        early costs the caller nothing until it is read. Read it with :meth:`batches`; close
        it when it is not.

        Local Parquet files that hold every column with exactly its declared type, in row
        groups of at most ``DIRECT_GROUP_CELLS`` cells, are decoded by pyarrow instead, on the
        same helper thread, in the same batches (:func:`parquet_batches`)."""
        wanted = list(columns) if columns else list(self.schema.names)
        if where is None and self.reads_directly(wanted):
            target = pa.schema([self.schema.field(c) for c in wanted])
            return ReadAhead(lambda: parquet_batches(self.parquet_files, target, batch_rows))
        select = ", ".join(quote_identifier(c) for c in columns) if columns else "*"
        query = f"SELECT {select} FROM {self.relation}" + (f" WHERE {where}" if where else "")

        def duckdb_batches() -> Iterator[pa.RecordBatch]:
            cursor = self.connection.cursor()
            try:
                yield from cursor.sql(query).to_arrow_reader(batch_rows)
            finally:
                cursor.close()

        return ReadAhead(duckdb_batches)

    def batches(self, columns: list[str], batch_rows: int, stream: "ReadAhead | None" = None,
                where: str | None = None) -> Iterator[pa.RecordBatch]:
        """Stream ``columns`` (all when empty) in source order, ``batch_rows`` rows at a time
        (from ``stream``, when one was opened for them with :meth:`stream`; only the rows
        meeting ``where``, when given).

        Batches carry the source's own Arrow types: DuckDB maps some types onto its own
        (large_string comes back as string, for one), so they are cast back to ``schema``.
        """
        wanted = pa.schema([self.schema.field(c) for c in columns]) if columns else self.schema
        stream = stream if stream is not None else self.stream(columns, batch_rows, where)
        try:
            for batch in stream:
                if batch.num_rows:
                    yield batch if batch.schema.equals(wanted) else batch.cast(wanted)
        finally:
            stream.close()

    def reads_directly(self, columns: list[str]) -> bool:
        """Whether :meth:`stream` decodes ``columns`` with pyarrow: local Parquet files,
        each holding every one of them with the type the source declares (DuckDB's reading
        of the files; a column from the directory names of a partitioned dataset, or files
        whose types differ, fail this), in row groups of at most ``DIRECT_GROUP_CELLS``."""
        files = self.parquet_files
        if not files or self.storage_options is not None or any("://" in f for f in files):
            return False
        if self._file_types is None:
            types = []
            for path in files:
                with pq.ParquetFile(path) as meta:
                    too_big = any(meta.metadata.row_group(g).num_rows * len(self.schema) > DIRECT_GROUP_CELLS
                                  for g in range(meta.metadata.num_row_groups))
                    types.append({} if too_big else {f.name: f.type for f in meta.schema_arrow})
            self._file_types = types
        declared = {c: self.schema.field(c).type for c in columns}
        return all(all(c in found and found[c] == t for c, t in declared.items()) for found in self._file_types)

    def close(self) -> None:
        if self.owns_connection:
            self.connection.close()


def reader_pool() -> pa.MemoryPool:
    """The Arrow memory pool of :func:`parquet_batches`: jemalloc where pyarrow has it (Linux,
    macOS), else the system allocator. Not the default mimalloc, which returned each batch's
    pages to the system and faulted them in again: the first 1e6 x 100 read of a process
    measured 3.4-3.9 s of CPU with it against 0.64 s with jemalloc and 0.68 s with the
    system allocator (0.55-0.6 s for any of them on later reads)."""
    try:
        return pa.jemalloc_memory_pool()
    except NotImplementedError:  # a pyarrow built without jemalloc
        return pa.system_memory_pool()


# Row groups of at most this many cells (as the source's width counts them) are decoded by
# pyarrow (``Source.stream``): 2^24 cells, 128 MB of float64, about the batches in flight of
# the DuckDB reader it replaces. Sources with larger row groups are read through DuckDB.
DIRECT_GROUP_CELLS = 1 << 24
# Cells per read of a row group (a few columns at a time): pyarrow holds a read's compressed
# and decoded pages at once. Measured on the 125,000-row groups of 1e6 x 100 float64: the
# Arrow pool peaked at 429 MB reading whole row groups, 260 MB 25 columns at a time, 226 MB
# 10 at a time, in the same CPU time.
DIRECT_READ_CELLS = 1 << 21


def parquet_batches(files: list[str], schema: pa.Schema, batch_rows: int) -> Iterator[pa.RecordBatch]:
    """The columns of ``schema`` of the Parquet ``files`` (in that order, each file's row
    groups in order) as record batches of exactly ``batch_rows`` rows, the last one shorter:
    the batches DuckDB's ``to_arrow_reader(batch_rows)`` gives for the same files, so that a
    pass sees the same blocks whichever reader decoded them.

    Decoded with pyarrow, one row group at a time (``DIRECT_READ_CELLS`` cells at a time
    within it) on the calling thread (the read-ahead thread): at 1e6 x 100 float64 in 4
    files of row groups of 125,000 rows (Snappy), 0.4-0.7 s of CPU against 1.4 s for DuckDB
    on one thread (the compress passes' setting), which left the profile pass waiting on its
    reader and took a core from the encode pass."""
    import pyarrow.dataset as ds
    import pyarrow.fs as pafs

    names, pool = schema.names, reader_pool()
    parquet, local = ds.ParquetFileFormat(), pafs.LocalFileSystem()
    held: list[pa.Table] = []
    count = 0
    for path in files:
        meta = pq.read_metadata(path)
        for g in range(meta.num_row_groups):
            rows = meta.row_group(g).num_rows
            if not rows:
                continue
            group = parquet.make_fragment(path, filesystem=local, row_groups=[g])
            step = max(1, DIRECT_READ_CELLS // rows)  # columns per read
            parts = [ds.Scanner.from_fragment(group, columns=names[lo:lo + step], use_threads=False,
                                              memory_pool=pool, batch_size=1 << 30).to_table()
                     for lo in range(0, len(names), step)]
            table = pa.Table.from_arrays([column for part in parts for column in part.columns], names=names)
            held.append(table.cast(schema))  # same types (checked): the fields' flags only
            count += table.num_rows
            while count >= batch_rows:
                whole = pa.concat_tables(held, memory_pool=pool)
                yield _one_batch(whole.slice(0, batch_rows), pool)
                held, count = [whole.slice(batch_rows)], count - batch_rows
    if count:
        yield _one_batch(pa.concat_tables(held, memory_pool=pool), pool)


def _one_batch(table: pa.Table, pool: pa.MemoryPool) -> pa.RecordBatch:
    """``table`` (at least one row) as one record batch, its chunks concatenated where it
    spans several."""
    return table.combine_chunks(memory_pool=pool).to_batches()[0]


_DONE = object()


class ReadAhead:
    """The batches of a reader, read by a helper thread up to ``depth`` batches ahead, so
    the reader (DuckDB decoding Parquet on its own threads) works while the caller computes
    on the previous batch.

    ``open_batches`` (called on the helper thread) gives the batches, e.g. a generator that
    opens a DuckDB cursor and closes it in its ``finally``. The thread starts at once. Errors
    of the reader are raised by ``next``; :meth:`close` (also at the end of the batches, or
    after an error) stops the thread and closes the batches (memory: at most depth + 2
    batches).
    """

    def __init__(self, open_batches: Callable[[], Iterator[pa.RecordBatch]], depth: int = 1):
        self._slots: queue.Queue = queue.Queue(maxsize=depth)
        self._stop = threading.Event()
        self._closed = False
        self._worker = threading.Thread(target=self._produce, args=(open_batches,),
                                        name="rankfold-read-ahead", daemon=True)
        self._worker.start()

    def _hand_over(self, item: Any) -> bool:
        while not self._stop.is_set():
            try:
                self._slots.put(item, timeout=0.05)
                return True
            except queue.Full:
                continue
        return False

    def _produce(self, open_batches) -> None:
        batches = None
        try:
            batches = open_batches()
            for batch in batches:
                if not self._hand_over(batch):
                    return
            self._hand_over(_DONE)
        except BaseException as exc:  # handed to the caller's thread
            self._hand_over(exc)
        finally:
            if hasattr(batches, "close"):
                batches.close()

    def __iter__(self) -> "ReadAhead":
        return self

    def __next__(self) -> pa.RecordBatch:
        if self._closed:
            raise StopIteration
        item = self._slots.get()
        if item is _DONE:
            self.close()
            raise StopIteration
        if isinstance(item, BaseException):
            self.close()
            raise item
        return item

    def close(self) -> None:
        """Stop the helper thread and close the batches (idempotent)."""
        if not self._closed:
            self._closed = True
            self._stop.set()
            self._worker.join()


# Beyond this many columns, Parquet files are read through pyarrow by row group (their schema
# too): DuckDB took 38 s to scan 200 x 100,000 Parquet values that pyarrow read in 4 s, and
# 40 s to bind the schema of 200 x 40,000 values that pyarrow read in 3 s.
WIDE_PARQUET_COLUMNS = 2048


def _wide_parquet_schema(files: list[str] | None) -> pa.Schema | None:
    """The Arrow schema of the first Parquet file when it has more than
    ``WIDE_PARQUET_COLUMNS`` columns (such a source is read through pyarrow), else None."""
    if not files:
        return None
    schema = pq.read_schema(files[0])
    if len(schema) <= WIDE_PARQUET_COLUMNS:
        return None
    return schema.remove_metadata()


# DuckDB threads of the connections rankfold opens for a source. One decoding thread beside
# the compress thread keeps both cores busy; with two, DuckDB's Parquet scan held twice the
# row groups in flight: a plain scan of 1e6 x 100 Parquet values (4 files) peaked at 1.05-1.2
# GB of RSS with 2 threads against 0.53 GB with 1, in about the same time (6.9 s against
# 7.6 s, 2 busy cores). A connection passed by the caller keeps its own settings.
SOURCE_THREADS = 1


def _source_connection() -> duckdb.DuckDBPyConnection:
    return duckdb.connect(config={"threads": SOURCE_THREADS})


def _schema_of(connection: duckdb.DuckDBPyConnection, relation: str) -> pa.Schema:
    return connection.sql(f"SELECT * FROM {relation} LIMIT 0").to_arrow_table().schema


def _from_arrow(table: pa.Table, description: str) -> Source:
    con = _source_connection()
    # a view over the Arrow table (unlike con.register) is visible from cursors
    con.from_arrow(table).create_view("rankfold_source")
    return Source(con, "rankfold_source", table.schema, description, owns_connection=True)


def _numpy_table(array: np.ndarray) -> pa.Table:
    if array.ndim != 2:
        raise InvalidInputError(
            f"A numpy source must be 2-D (rows x columns); got an array of shape {array.shape}. "
            "Reshape it, e.g. array.reshape(-1, 1) for a single column."
        )
    if not (np.issubdtype(array.dtype, np.number) or array.dtype == np.bool_):
        raise InvalidInputError(
            f"A numpy source must hold numbers; got dtype {array.dtype}. Convert it with "
            "array.astype(float), or pass a pyarrow Table to keep non-numeric columns."
        )
    return pa.table({f"x{j}": np.ascontiguousarray(array[:, j]) for j in range(array.shape[1])})


def open_source(source: Any, connection: duckdb.DuckDBPyConnection | None = None,
                storage_options: dict | None = None) -> Source:
    """Resolve ``source`` to a streamable :class:`Source` (Parquet at an fsspec URL, e.g.
    ``s3://bucket/data/``, with ``storage_options``)."""
    if isinstance(source, np.ndarray):
        return _from_arrow(_numpy_table(source), f"numpy array {source.shape}")
    if isinstance(source, pa.RecordBatch):
        source = pa.Table.from_batches([source])
    if isinstance(source, pa.Table):
        return _from_arrow(source, f"Arrow table ({source.num_rows} rows)")
    if isinstance(source, pa.RecordBatchReader):
        raise InvalidInputError(
            "A RecordBatchReader can be read only once, but compress reads its source several "
            "times. Pass reader.read_all(), a Parquet file, or a DuckDB table instead."
        )
    if type(source).__module__.split(".")[0] == "pandas" and hasattr(source, "columns"):
        return _from_arrow(pa.Table.from_pandas(source, preserve_index=False), "pandas DataFrame")
    if isinstance(source, str) and "://" in source and not source.startswith("file://"):
        return _open_remote_parquet(source, storage_options)
    if isinstance(source, (str, Path)):
        return _open_text_source(str(source), connection)
    raise InvalidInputError(
        f"Cannot compress a source of type {type(source).__name__}. Pass a 2-D numpy array, "
        "a pyarrow Table, a pandas DataFrame, a Parquet or CSV path, or a table name or SELECT "
        "statement with connection=<duckdb connection>."
    )


def _open_remote_parquet(url: str, storage_options: dict | None) -> Source:
    """Parquet files at an fsspec URL (a file, a prefix or a glob), read by DuckDB through the
    fsspec file system registered on the source's own connection (DuckDB's httpfs extension
    would need a download, which rankfold does not do)."""
    from ..store import remote

    fs, root = remote.filesystem(url, storage_options)
    protocol = url.split("://", 1)[0]
    if any(ch in root for ch in "*?["):
        found = fs.glob(root)
    elif fs.isdir(root):
        found = [p for p in fs.find(root) if p.lower().endswith(_PARQUET_SUFFIXES)]
    else:
        found = [root] if fs.exists(root) else []
    if not found:
        raise InvalidInputError(f"No Parquet file at {url}. Check the URL and the credentials.")
    files = [f"{protocol}://{p}" for p in sorted(found)]
    con = _source_connection()
    con.register_filesystem(fs)
    relation = "read_parquet([" + ", ".join(sql_literal(f) for f in files) + "])"
    try:
        schema = _schema_of(con, relation)
    except duckdb.Error as exc:
        con.close()
        raise InvalidInputError(f"DuckDB cannot read {url}: {exc}") from None
    return Source(con, relation, schema, url, owns_connection=True, parquet_files=files,
                  storage_options=storage_options)


def _open_text_source(text: str, connection: duckdb.DuckDBPyConnection | None) -> Source:
    lowered = text.lower().strip()
    is_query = re.match(r"^\s*(select|with|from|values|table)\b", lowered) is not None
    path = Path(text)
    looks_like_path = lowered.endswith(_PARQUET_SUFFIXES + _CSV_SUFFIXES) or path.is_dir() or any(
        ch in text for ch in "*?"
    )
    if not is_query and looks_like_path:
        con = _source_connection()
        if lowered.endswith(_CSV_SUFFIXES):
            if not path.exists():
                raise InvalidInputError(f"No CSV file at {text}. Check the path.")
            relation = f"read_csv({sql_literal(text)})"
        else:
            target = f"{text}/**/*.parquet" if path.is_dir() else text
            if not path.is_dir() and not any(ch in text for ch in "*?") and not path.exists():
                raise InvalidInputError(f"No Parquet file at {text}. Check the path.")
            relation = f"read_parquet({sql_literal(target)})"
        try:
            files = None if lowered.endswith(_CSV_SUFFIXES) else [
                row[0] for row in con.sql("SELECT file FROM glob(?) ORDER BY file",
                                          params=[target]).fetchall()]
            schema = _wide_parquet_schema(files) or _schema_of(con, relation)
        except duckdb.Error as exc:
            con.close()
            raise InvalidInputError(f"DuckDB cannot read {text}: {exc}") from None
        return Source(con, relation, schema, text, owns_connection=True, parquet_files=files)
    if connection is None:
        raise InvalidInputError(
            f"The source {text!r} is neither a Parquet nor a CSV path; to compress a table or a "
            "query, pass connection=<the DuckDB connection that holds it>."
        )
    # a table name, dotted or not, is quoted part by part (never pasted raw)
    relation = f"({one_query(text, connection)})" if is_query else qualified_name(text)
    try:
        schema = _schema_of(connection, relation)
    except duckdb.Error as exc:
        raise InvalidInputError(f"DuckDB cannot read the source {text!r}: {exc}") from None
    return Source(connection, relation, schema, text)


def block_from_batch(batch: pa.RecordBatch, names: list[str],
                     out: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray | None]:
    """Numeric columns of a batch as a float64 block (b, n) and a NULL mask (or None).

    NULL cells become NaN in the block; the mask tells them apart from NaN in the source.
    With ``out`` (a Fortran-ordered float64 array of at least b rows and exactly n columns),
    the block is written into its first b rows and is a view of it.
    """
    rows = batch.num_rows
    if out is not None and out.shape[0] >= rows and out.shape[1] == len(names):
        block = out[:rows]
    else:
        block = np.empty((rows, len(names)), dtype=np.float64, order="F")
    mask = None
    for j, name in enumerate(names):
        column = batch.column(name)
        if column.null_count:
            if mask is None:
                mask = np.zeros((rows, len(names)), dtype=bool, order="F")
            mask[:, j] = column.is_null().to_numpy(zero_copy_only=False)
            column = column.fill_null(0)
        values = column.to_numpy(zero_copy_only=False)
        block[:, j] = values
        if mask is not None and mask[:, j].any():
            block[mask[:, j], j] = np.nan
    return block, mask
