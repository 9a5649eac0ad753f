"""Executors: every compress pass is a map over row partitions plus an associative merge.

A pass is a *task* ``task(blocks, partition, *args) -> partial`` run on each partition's
blocks ``(first row, batch, float64 block, NULL mask)``, whose partials the caller merges in
partition (row) order. Two executors run the same tasks:

* ``LocalExecutor`` (``executor='local'``): one partition, the whole source streamed in
  process through DuckDB (``sources.Source``); memory is one block plus the task's state.
* ``DaskExecutor`` (``executor='dask'`` or a ``dask.distributed.Client``): one partition per
  Parquet row-group range (local files or any fsspec URL, e.g. ``s3://bucket/data/``), or
  row slices of an in-memory table; tasks run on the cluster's workers, partials come back
  to the caller. Global row positions come from the Parquet footers, so every partition
  knows its first row without reading another one.

What crosses partitions is small: column statistics (n), the n x n Gram matrix, the anchor
candidates (r or a pool of 8r rows x n), the column ledger (n), per row-group sums for
aggregates, and the names of the files each partition wrote.
"""

from __future__ import annotations

import abc
import os
import uuid
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from ..errors import InvalidInputError
from .progress import Progress
from .row_groups import (RowGroup, is_url, open_parquet, parquet_row_groups, rowid_filter,
                         table_row_groups)
from . import sources as _sources
from .sources import Source, block_from_batch, open_source

__all__ = ["Partition", "Executor", "LocalExecutor", "DaskExecutor", "make_executor", "one_blas_thread",
           "release_arrow_memory",
           "PARTITION_ROWS"]

# Rows per partition of the distributed executor (row groups are never split).
PARTITION_ROWS = 1 << 20
# Cells per block (32 MB of float64): batches hold at most this many cells (41,943 rows at
# 100 columns), so a block, and each Arrow batch in flight, stays bounded however wide the
# table is. Each batch is held up to four times (DuckDB's result, the read-ahead slot, the
# batch being converted, the float64 block): at 131,072 x 100 that was 0.4 GB.
BLOCK_CELLS = 1 << 22


def block_rows(batch_rows: int, width: int) -> int:
    """Rows per batch for ``width`` columns: ``batch_rows``, or fewer so that a block holds
    at most ``BLOCK_CELLS`` cells."""
    return max(1, min(int(batch_rows), BLOCK_CELLS // max(width, 1)))

Task = Callable[..., Any]


@dataclass
class Partition:
    """Rows ``first_row`` .. ``first_row + rows - 1`` of the source.

    Exactly one of: ``source`` (a DuckDB source, in process only; ``where``: only the rows
    meeting that SQL condition), ``url`` + ``row_groups`` (Parquet, local or through fsspec),
    ``table`` (an Arrow table slice)."""

    index: int
    first_row: int
    rows: int | None
    schema: pa.Schema
    source: Source | None = field(default=None, repr=False)
    url: str | None = None
    row_groups: list[int] | None = None
    storage_options: dict | None = None
    table: pa.Table | None = field(default=None, repr=False)
    where: str | None = None

    def batches(self, columns: list[str], batch_rows: int, stream=None) -> Iterator[pa.RecordBatch]:
        """The partition's batches; ``stream``: a DuckDB stream already opened for them
        (``Source.stream``, in process only)."""
        if self.source is not None:
            yield from self.source.batches(columns, batch_rows, stream, self.where)
            return
        wanted = pa.schema([self.schema.field(c) for c in columns]) if columns else self.schema
        if self.table is not None:
            for batch in self.table.select(wanted.names).to_batches(max_chunksize=batch_rows):
                if batch.num_rows:
                    yield batch if batch.schema.equals(wanted) else batch.cast(wanted)
            return
        with open_parquet(self.url, self.storage_options) as handle:
            # pre_buffer (coalesced reads) pays off against object-storage latency; on local
            # files it made reads erratic (0.1-0.8 s against 0.06-0.09 s for 250,000 x 100)
            reader = pq.ParquetFile(handle, pre_buffer=is_url(self.url))
            if len(wanted) > _sources.WIDE_PARQUET_COLUMNS:
                batches = wide_parquet_batches(reader, self.row_groups, wanted.names, batch_rows)
            else:
                batches = _row_group_batches(reader, self.row_groups, wanted.names, batch_rows)
            for batch in batches:
                if batch.num_rows:
                    yield batch if batch.schema.equals(wanted) else batch.cast(wanted)


# Largest row group read whole (cells): 128 MB of float64.
GROUP_CELLS = 1 << 24


def _row_group_batches(reader: pq.ParquetFile, row_groups: list[int] | None, names: list[str],
                       batch_rows: int) -> Iterator[pa.RecordBatch]:
    """Batches of a Parquet file, one row group read whole at a time (sliced into batches),
    or through pyarrow's batch reader for row groups beyond ``GROUP_CELLS`` cells. Reading two
    125,000 x 100 row groups peaked at 0.27 GB of RSS this way against 0.53 GB through the
    batch reader (which keeps more of each row group's buffers in flight)."""
    meta = reader.metadata
    for g in row_groups if row_groups is not None else range(meta.num_row_groups):
        if meta.row_group(g).num_rows * len(names) > GROUP_CELLS:
            yield from reader.iter_batches(batch_size=batch_rows, row_groups=[g], columns=names)
        else:
            yield from reader.read_row_group(g, columns=names).to_batches(max_chunksize=batch_rows)


# Columns per read of a wide row group, and the largest row group read that way (cells).
COLUMN_GROUP = 2048
WIDE_GROUP_CELLS = 1 << 26


def wide_parquet_batches(reader: pq.ParquetFile, row_groups: list[int] | None, names: list[str],
                         batch_rows: int) -> Iterator[pa.RecordBatch]:
    """Batches of a Parquet file with very many columns, row group by row group.

    A row group of at most ``WIDE_GROUP_CELLS`` cells is read ``COLUMN_GROUP`` columns at a
    time and joined: pyarrow's batch reader keeps a reader per column alive, measured at 1.05
    GB for 1,000 x 20,000 values (160 MB of data) against 0.22 GB read by column groups.
    Larger row groups fall back to that batch reader. One thread: a thread per column chunk
    does not pay here (1.5 s on one thread against 4.9 s with Arrow's pool, 2 busy cores).
    """
    meta = reader.metadata
    position = {name: i for i, name in enumerate(reader.schema_arrow.names)}
    wanted = [position[name] for name in names]  # indices: 1.5x faster than names at 40,000
    for g in row_groups if row_groups is not None else range(meta.num_row_groups):
        if meta.row_group(g).num_rows * len(names) > WIDE_GROUP_CELLS:
            yield from reader.iter_batches(batch_size=batch_rows, row_groups=[g], columns=names,
                                           use_threads=False)
            continue
        pieces = [reader.reader.read_row_group(g, column_indices=wanted[lo:lo + COLUMN_GROUP],
                                               use_threads=False)
                  for lo in range(0, len(names), COLUMN_GROUP)]
        table = pa.Table.from_arrays([c for t in pieces for c in t.columns],
                                     schema=pa.schema([f for t in pieces for f in t.schema]))
        del pieces
        yield from table.to_batches(max_chunksize=batch_rows)


@dataclass
class _Chain:
    """The whole source as one partition made of consecutive ``parts`` (the in-process
    executor reading a wide Parquet source through pyarrow: its tasks expect one partition)."""

    parts: list[Partition]
    index: int = 0
    first_row: int = 0
    rows: int | None = None

    def batches(self, columns: list[str], batch_rows: int, stream=None) -> Iterator[pa.RecordBatch]:
        for part in self.parts:
            yield from part.batches(columns, batch_rows)


class BlockBuffer:
    """The float64 buffer that a partition's blocks are converted into, kept from one pass to
    the next (the in-process executor keeps one for all its passes)."""

    def __init__(self) -> None:
        self.array: np.ndarray | None = None

    def at_least(self, rows: int, width: int) -> np.ndarray:
        if self.array is None or self.array.shape[0] < rows or self.array.shape[1] != width:
            self.array = np.empty((rows, width), dtype=np.float64, order="F")
        return self.array


def partition_blocks(partition: Partition, names: list[str], extra: list[str], batch_rows: int,
                     report: Progress | None = None, buffer: BlockBuffer | None = None,
                     stream=None) -> Iterator[tuple]:
    """Blocks (global first row, batch, float64 block, NULL mask) of one partition.

    Every block is a view of one buffer that the next block overwrites: a task must copy
    what it keeps beyond the current block. A fresh 100 MB block per batch was measured at
    55-140 ms of page faults against 5 ms for refilling the buffer, and the first fill of a
    new buffer at 0.24-0.32 s (1e6 x 100, 2 cores): hence one ``buffer`` across passes.
    """
    first = partition.first_row
    buffer = buffer if buffer is not None else BlockBuffer()
    for batch in partition.batches(_columns(names, extra), batch_rows, stream):
        block, mask = block_from_batch(batch, names, out=buffer.at_least(batch.num_rows, len(names)))
        yield first, batch, block, mask
        first += batch.num_rows
        if report is not None:
            report.advance(batch.num_rows)


def _columns(names: list[str], extra: list[str]) -> list[str]:
    """The columns a pass reads: ``extra`` then the numeric ``names``, each once."""
    return list(dict.fromkeys(list(extra) + list(names)))


def release_arrow_memory() -> None:
    """Hand the memory that Arrow's allocator keeps after a pass back to the system. Without
    it, the 0.5 GB that pyarrow held after reading the sketch's sample of 1e6 x 100 Parquet
    values stayed in the process through the encode pass (peak RSS 1.40 GB against 1.10 GB).
    The pool of the Parquet batches pyarrow decodes (``sources.reader_pool``) too."""
    pa.default_memory_pool().release_unused()
    _sources.reader_pool().release_unused()


def one_blas_thread():
    """Context: BLAS runs on one thread while a pass streams its source.

    A pass interleaves the reader's own threads (DuckDB, Arrow) with many short matrix
    products on cache-sized sub-blocks. With a multi-threaded BLAS beside them, each product
    waits for worker threads that the reader keeps busy: measured on 2 cores, 8192 x 100
    Gram products took 116 ms each against 4 ms alone, and the profile pass of 1e6 x 100
    rows 24 s against 3 s with one thread. ``threadpoolctl`` (the standard tool for this,
    used by scikit-learn) sets the limit for every BLAS library loaded, then restores it.
    """
    from threadpoolctl import threadpool_limits

    return threadpool_limits(limits=1, user_api="blas")


def _run(partition: Partition, task: Task, names: list[str], extra: list[str], batch_rows: int,
         args: tuple) -> Any:
    """What a worker runs: one task over one partition."""
    with one_blas_thread():
        return task(partition_blocks(partition, names, extra, block_rows(batch_rows, len(names))),
                    partition, *args)


class Executor(abc.ABC):
    """What the compress passes use of an executor: these eight members, nothing else.

    ``schema`` (pyarrow.Schema of the source), ``description`` (the source, for messages),
    ``distributed`` (True when tasks run in other processes: each partition then writes its
    own row files instead of sharing the caller's writer), and the methods below.
    """

    schema: pa.Schema
    description: str
    distributed: bool

    @abc.abstractmethod
    def run(self, stage: str, task: Task, names: list[str], extra: list[str] = (),
            total: int | None = None, args: tuple = (),
            partitions: list[Partition] | None = None) -> list[Any]:
        """``task(blocks, partition, *args)`` over every partition of the source (or over the
        given ``partitions``), reading the columns ``extra`` + ``names``; the partials in
        partition order. ``stage`` and ``total`` (rows) feed the progress reports."""

    @abc.abstractmethod
    def row_groups(self, numeric: list[str]) -> list[RowGroup] | None:
        """The source's row groups in row order, or None when it has none to sample."""

    @abc.abstractmethod
    def sample_partitions(self, groups: list[RowGroup]) -> list[Partition]:
        """Partitions that read only ``groups`` (some of ``row_groups()``), for ``run``."""

    @abc.abstractmethod
    def open_ahead(self, names: list[str], extra: list[str] = ()) -> None:
        """A hint: the next full pass reads these columns; start reading if that helps."""

    @abc.abstractmethod
    def close(self) -> None:
        """Release the source, streams and anything the executor started."""


class LocalExecutor(Executor):
    """In process: the source is one partition streamed through DuckDB."""

    distributed = False

    def __init__(self, source: Source, batch_rows: int, progress: Callable | None):
        self.source = source
        self.schema = source.schema
        self.description = source.description
        self.batch_rows = batch_rows
        self.progress = progress
        self.partitions = [Partition(0, 0, None, source.schema, source=source)]
        self.buffer = BlockBuffer()
        self.opened: tuple[list[str], Any] | None = None  # (columns, stream) opened ahead

    def open_ahead(self, names: list[str], extra: list[str] = ()) -> None:
        """Start reading the whole source for the next full pass over these columns, so that
        DuckDB's start-up (planning, first batches) overlaps what runs before it. A pass
        over other columns closes the stream unread."""
        self._close_ahead()
        if self._wide_parquet(names):
            return  # read through pyarrow: nothing to start
        columns = _columns(names, extra)
        if self.source.reads_directly(columns):
            # decoded by pyarrow (sources.parquet_batches): no start-up to hide, and a stream
            # opened early holds its row groups beside the passes before it (rank 8 at
            # 1e6 x 100, sampled sketch: peak RSS 1.10-1.15 GB against 0.87-0.89 GB)
            return
        self.opened = (columns, self.source.stream(columns, block_rows(self.batch_rows, len(names))))

    def _wide_parquet(self, names: list[str]) -> bool:
        return bool(self.source.parquet_files) and len(names) > _sources.WIDE_PARQUET_COLUMNS

    def _close_ahead(self) -> None:
        if self.opened is not None:
            self.opened[1].close()
            self.opened = None

    def run(self, stage: str, task: Task, names: list[str], extra: list[str] = (),
            total: int | None = None, args: tuple = (),
            partitions: list[Partition] | None = None) -> list[Any]:
        """``task`` over the whole source (one partition), or over the given ``partitions``
        one after the other; the partials in partition order."""
        report = Progress(self.progress, stage, total)
        out = []
        batch_rows = block_rows(self.batch_rows, len(names))
        if partitions is None and self._wide_parquet(names):
            options = self.source.storage_options
            partitions = [_Chain(group_partitions(
                parquet_row_groups(self.source.parquet_files, storage_options=options), self.schema, options))]
        if total is not None and total >= batch_rows:
            # full batches will come: size the buffer for them now, so that a first, shorter
            # batch (a Parquet row group) does not leave a buffer that the next one outgrows
            self.buffer.at_least(batch_rows, len(names))
        stream = None
        if partitions is None and self.opened is not None:
            stream = self.opened[1] if self.opened[0] == _columns(names, extra) else None
            if stream is None:
                self._close_ahead()
            self.opened = None
        try:
            with one_blas_thread():
                for part in partitions if partitions is not None else self.partitions:
                    out.append(task(partition_blocks(part, names, list(extra), batch_rows,
                                                     report, self.buffer, stream), part, *args))
        finally:
            if stream is not None:  # a task that stopped early, or never read it
                stream.close()
            release_arrow_memory()
        report.finish()
        return out

    def row_groups(self, numeric: list[str]) -> list[RowGroup] | None:
        """The row groups of the source: of its Parquet files (``parquet_row_groups``), or
        row-id ranges of a DuckDB base table (``table_row_groups``); None for other sources
        or when some file lacks a numeric column."""
        files = self.source.parquet_files
        if files:
            return parquet_row_groups(files, numeric, self.source.storage_options)
        return table_row_groups(self.source.connection, self.source.relation, self.schema.names)

    def sample_partitions(self, groups: list[RowGroup]) -> list[Partition]:
        """Partitions reading only ``groups`` (row groups of this source): through pyarrow
        for Parquet files, through DuckDB with a row-id filter for a table."""
        if groups and groups[0].path is None:
            return [Partition(0, groups[0].first_row, sum(g.rows for g in groups), self.schema,
                              source=self.source, where=rowid_filter(groups))]
        return group_partitions(groups, self.schema, self.source.storage_options)

    def close(self) -> None:
        self._close_ahead()
        self.buffer.array = None
        self.source.close()


class DaskExecutor(Executor):
    """On a ``dask.distributed`` cluster: tasks per partition, partials merged by the caller.

    Progress is reported as partitions finish (rows of the finished partitions)."""

    distributed = True

    def __init__(self, client, partitions: list[Partition], description: str, batch_rows: int,
                 progress: Callable | None, owns_client: bool = False,
                 groups: list[RowGroup] | None = None):
        self.client = client
        self.partitions = partitions
        self.groups = groups
        self.schema = partitions[0].schema
        self.description = description
        self.batch_rows = batch_rows
        self.progress = progress
        self.owns_client = owns_client

    def run(self, stage: str, task: Task, names: list[str], extra: list[str] = (),
            total: int | None = None, args: tuple = (),
            partitions: list[Partition] | None = None) -> list[Any]:
        """``task`` over every partition of the source, or over the given ``partitions``;
        the partials in partition order."""
        from distributed import as_completed

        report = Progress(self.progress, stage, total)
        token = uuid.uuid4().hex[:12]
        partitions = partitions if partitions is not None else self.partitions
        futures = [self.client.submit(_run, part, task, list(names), list(extra), self.batch_rows,
                                      args, key=f"rankfold-{stage}-{token}-{part.index}", pure=False)
                   for part in partitions]
        index = {f.key: i for i, f in enumerate(futures)}
        results: list[Any] = [None] * len(futures)
        try:
            for future in as_completed(futures):
                i = index[future.key]
                results[i] = future.result()
                report.advance(partitions[i].rows or 0)
        except Exception:
            # let every task settle before the caller cleans up: a task still running could
            # write a file (e.g. to a store's staging prefix) after its files were removed
            from distributed import wait

            wait(futures)
            raise
        except BaseException:
            for future in futures:
                future.cancel()
            raise
        report.finish()
        return results

    def row_groups(self, numeric: list[str]) -> list[RowGroup] | None:
        """The Parquet row groups of the source, None for an in-memory source. (Every pass
        here reads the files through pyarrow, so a file without a numeric column fails the
        sample pass as it would fail every other.)"""
        return self.groups

    def open_ahead(self, names: list[str], extra: list[str] = ()) -> None:
        """Nothing to start ahead: the workers open their own partitions."""

    def sample_partitions(self, groups: list[RowGroup]) -> list[Partition]:
        """Partitions reading only ``groups`` (row groups of this source)."""
        options = self.partitions[0].storage_options if self.partitions else None
        return group_partitions(groups, self.schema, options)

    def close(self) -> None:
        if self.owns_client:
            cluster = getattr(self.client, "cluster", None)
            self.client.close()
            if cluster is not None:
                cluster.close()


# -- building an executor ------------------------------------------------------------------------
_SCHEDULER_PREFIXES = ("tcp://", "tls://", "inproc://", "ucx://", "ws://", "wss://")


def _dask_client(executor: Any):
    try:
        import distributed
    except ImportError:
        raise InvalidInputError(
            "executor='dask' needs dask.distributed, which is not installed. Install it with "
            "pip install 'rankfold[dask]', or use executor='local'."
        ) from None
    if isinstance(executor, distributed.Client):
        return executor, False
    if isinstance(executor, str) and executor.startswith(_SCHEDULER_PREFIXES):
        return distributed.Client(executor), True
    try:
        return distributed.default_client(), False
    except ValueError:  # no client yet: a local cluster for this call, one worker per core
        # dashboard on a free port: None means the configured 8787, and a second cluster on
        # the machine (another process's) would make this one warn or fail to start
        cluster = distributed.LocalCluster(n_workers=os.cpu_count() or 1, threads_per_worker=1,
                                           dashboard_address=":0")
        return distributed.Client(cluster), True


def _parquet_files(text: str, storage_options: dict | None) -> tuple[list[str], Source | None]:
    """The files of a Parquet source in DuckDB's order (sorted full paths), and for local
    files the DuckDB source (for its schema: the same types as the in-process executor)."""
    if is_url(text):
        import fsspec.core

        fs, root = fsspec.core.url_to_fs(text, **(storage_options or {}))
        if fs.isdir(root):
            found = [p for p in fs.find(root) if p.lower().endswith((".parquet", ".pq", ".parq"))]
        elif any(ch in root for ch in "*?["):
            found = fs.glob(root)
        else:
            found = [root]
        protocol = text.split("://", 1)[0]
        return [f"{protocol}://{p}" for p in sorted(found)], None
    source = open_source(text)
    return source.parquet_files or [], source


def group_partitions(groups: list[RowGroup], schema: pa.Schema, storage_options: dict | None,
                     max_rows: int = PARTITION_ROWS) -> list[Partition]:
    """Partitions over ``groups`` (in source order): runs of consecutive row groups of one
    file, cut once they hold ``max_rows`` rows. Row groups are never split."""
    partitions: list[Partition] = []
    run: list[RowGroup] = []

    def close_run() -> None:
        if run:
            partitions.append(Partition(len(partitions), run[0].first_row, sum(g.rows for g in run),
                                        schema, url=run[0].path, row_groups=[g.index for g in run],
                                        storage_options=storage_options))
            run.clear()

    for group in groups:
        if run and (group.path != run[-1].path or group.index != run[-1].index + 1
                    or sum(g.rows for g in run) >= max_rows):
            close_run()
        run.append(group)
    close_run()
    return partitions


def make_executor(executor: Any, source: Any, connection, batch_rows: int, progress,
                  storage_options: dict | None = None) -> Executor:
    """The executor for ``compress(..., executor=...)``."""
    if executor is None or (isinstance(executor, str) and executor == "local"):
        src = open_source(source, connection, storage_options)
        return LocalExecutor(src, batch_rows, progress)
    is_client = type(executor).__name__ == "Client" and type(executor).__module__.startswith("distributed")
    if not (is_client or executor == "dask" or (isinstance(executor, str)
                                                and executor.startswith(_SCHEDULER_PREFIXES))):
        raise InvalidInputError(
            f"The 'executor' option of compress must be 'local', 'dask', a dask.distributed "
            f"Client or a scheduler address (tcp://host:port). Got {executor!r} instead."
        )
    partitions, description, opened, groups = _distributed_partitions(source, connection, batch_rows,
                                                                      storage_options)
    client, owns = _dask_client(executor)
    if opened is not None:
        opened.close()
    return DaskExecutor(client, partitions, description, batch_rows, progress, owns_client=owns,
                        groups=groups)


def _distributed_partitions(source: Any, connection, batch_rows: int, storage_options):
    if isinstance(source, (str, Path)):
        text = str(source)
        lowered = text.lower()
        if connection is not None or lowered.strip().startswith(("select", "with", "from")) \
                or lowered.endswith((".csv", ".tsv", ".txt", ".csv.gz", ".tsv.gz", ".csv.zst")):
            raise InvalidInputError(
                f"executor='dask' reads Parquet datasets (local paths or fsspec URLs) and "
                f"in-memory tables; {text!r} is a CSV file or a DuckDB table/query. Export it to "
                "Parquet first (COPY ... TO 'dir' (FORMAT parquet)), or use executor='local'."
            )
        files, local = _parquet_files(text, storage_options)
        if not files:
            if local is not None:
                local.close()
            raise InvalidInputError(f"No Parquet file matches {text}. Check the path.")
        if local is not None:
            schema = local.schema
        else:
            import fsspec

            with fsspec.open(files[0], "rb", **(storage_options or {})) as handle:
                schema = pq.read_schema(handle)
        groups = parquet_row_groups(files, storage_options=storage_options)
        partitions = group_partitions(groups, schema, storage_options)
        if not partitions:  # every file empty: one empty partition, so the passes see 0 rows
            partitions = [Partition(0, 0, 0, schema, table=schema.empty_table())]
        return partitions, text, local, groups
    # in-memory sources: slices of one Arrow table (the schema DuckDB would give them)
    src = open_source(source, connection)
    try:
        table = src.connection.sql(f"SELECT * FROM {src.relation}").to_arrow_table()
        if not table.schema.equals(src.schema):
            table = table.cast(src.schema)
        step = max(batch_rows, PARTITION_ROWS // 4)
        partitions = [Partition(k, lo, min(step, table.num_rows - lo), src.schema,
                                table=table.slice(lo, step))
                      for k, lo in enumerate(range(0, table.num_rows, step))]
        if not partitions:
            partitions = [Partition(0, 0, 0, src.schema, table=table)]
        return partitions, src.description, None, None
    finally:
        src.close()
