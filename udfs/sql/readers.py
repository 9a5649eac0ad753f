"""Open archives once per process for the SQL functions.

DuckDB calls a vectorized (arrow) UDF once per vector of at most 2048 rows, so a query over
100,000 rows makes about 49 calls. Opening an :class:`ArchiveReader` costs a few milliseconds
(manifest, column table, anchors, exact cells), and the stock reader decodes a whole row group
(131,072 rows) to serve any row of it: 28 ms per 2048-row call on a 300,000 x 30 archive with
10 basis columns. So readers are cached per archive path, and they share a cache of decoded
row groups (one byte budget for the process, least recently used first out). Measured on a
300,000 x 60 archive (rank 10, 20 basis columns, 3 row groups), best of 3, shared 2-core machine:

    query                                          stock read_rows   cached groups
    sum(rankfold_cell(p, i, 'x7')), 300k rows          1.63 s           0.30 s
    rankfold_cell_with_bound, 60 columns, 300k rows    2.65 s           0.79 s
    rankfold_row (60 columns), 100k rows               1.12 s           0.49 s
    rankfold_cell at 100k random rows                  1.28 s           0.15 s

A cached reader is dropped when ``manifest.json`` changes: its inode, size or mtime, or the
``manifest_sha256`` written first in it (every append and overwrite writes a new one). Decoded
row groups are keyed by the row file's SHA-256 from the manifest, so no version serves
another's rows, and they are read with Parquet page checksum verification.
"""

from __future__ import annotations

import os
import re
import threading
from collections import OrderedDict
from pathlib import Path

import numpy as np
import pyarrow as pa

from ..errors import ArchiveNotFoundError
from ..store import layout, remote
from ..store.reader import ArchiveReader

__all__ = ["ReaderCache"]

# Decoded row groups kept for all archives together. One group of a 131,072-row file with 60
# basis columns is about 66 MB, so this holds two or three such groups, or many narrow ones.
ROW_GROUP_CACHE_BYTES = 192 * 1024 * 1024

_DIGEST = re.compile(rb'"manifest_sha256"\s*:\s*"([0-9a-f]{64})"')


class _GroupCache:
    """Least-recently-used decoded row groups, keyed by (archive path, file SHA-256, group),
    within one byte budget for the process."""

    def __init__(self, budget: int = ROW_GROUP_CACHE_BYTES):
        self._tables: OrderedDict[tuple, pa.Table] = OrderedDict()
        self._bytes = 0
        self.budget = budget
        self._lock = threading.Lock()

    def get(self, key: tuple, load) -> pa.Table:
        with self._lock:
            table = self._tables.get(key)
            if table is not None:
                self._tables.move_to_end(key)
                return table
        table = load()  # outside the lock: two threads may decode one group, both correct
        with self._lock:
            if key not in self._tables:
                self._tables[key] = table
                self._bytes += table.nbytes
                while self._bytes > self.budget and len(self._tables) > 1:
                    _, old = self._tables.popitem(last=False)
                    self._bytes -= old.nbytes
        return table


_GROUPS = _GroupCache()


class _ScanReader(ArchiveReader):
    """An :class:`ArchiveReader` whose ``read_rows`` serves rows from cached row groups.

    Same contract as the parent: row-file columns for ``positions``, in the order given.
    """

    def __init__(self, path: str | Path, groups: _GroupCache = _GROUPS):
        super().__init__(path)
        self._groups = groups
        self._sha = {f["name"]: f["sha256"] for f in self.manifest["files"]}
        self._part_of = {p[2]: k for k, p in enumerate(self.parts)}

    def _group(self, part: int, group: int) -> pa.Table:
        name = self.parts[part][2]
        return self._groups.get((str(self.path), name, self._sha[name], group),
                                lambda: self.model.unpack_codes(  # the per-column view of codes
                                    self._read(name, lambda f: f.read_row_group(group)), None, self.path / name))

    def _read_groups(self, name: str, groups: list[int], columns: list[str] | None) -> pa.Table:
        part = self._part_of[name]
        tables = [self._group(part, g) for g in groups]
        table = pa.concat_tables(tables) if len(tables) > 1 else tables[0]
        return table.select(columns) if columns is not None else table

    def read_rows(self, positions: np.ndarray, columns: list[str] | None = None) -> pa.Table:
        positions = np.asarray(positions, dtype=np.int64)
        if positions.size == 0 or self.reads_differences(columns):
            # difference-coded codes decode over whole chunks, which may span row groups: the
            # parent widens the read to them (through the cached groups, ``_read_groups``)
            return super().read_rows(positions, columns)
        order = np.argsort(positions, kind="stable")
        sorted_pos = positions[order]
        pieces = []
        for part, (first, count, _name, starts) in enumerate(self.parts):
            lo, hi = np.searchsorted(sorted_pos, [first, first + count])
            if lo == hi:
                continue
            local = sorted_pos[lo:hi] - first
            group_of = np.searchsorted(starts, local, side="right") - 1
            # sorted positions give sorted groups: split at the group boundaries
            cuts = np.flatnonzero(np.diff(group_of)) + 1
            for chunk, groups in zip(np.split(local, cuts), np.split(group_of, cuts)):
                group = int(groups[0])
                table = self._group(part, group)
                if columns is not None:
                    table = table.select(columns)
                pieces.append(table.take(pa.array(chunk - starts[group])))
        table = pa.concat_tables(pieces) if len(pieces) > 1 else pieces[0]
        inverse = np.empty_like(order)
        inverse[order] = np.arange(order.size)
        return table.take(pa.array(inverse))


def _signature(path: Path) -> tuple:
    """(inode, size, mtime, manifest digest) of the manifest; raises ArchiveNotFoundError."""
    manifest = path / layout.MANIFEST
    try:
        stat = manifest.stat()
    except (FileNotFoundError, NotADirectoryError):
        return ("missing",)
    except OSError as exc:
        raise ArchiveNotFoundError(f"Cannot read the archive at {path} ({exc}). Check the path.") from None
    # the writer puts the digest first, so the first 4 KB find it
    with open(manifest, "rb") as handle:
        head = handle.read(4096)
    found = _DIGEST.search(head)
    return (stat.st_ino, stat.st_size, stat.st_mtime_ns, found.group(1) if found else None)


class ReaderCache:
    """Open readers keyed by absolute archive path, reopened when the manifest changes."""

    def __init__(self) -> None:
        self._readers: dict[str, tuple[tuple, ArchiveReader]] = {}
        self._lock = threading.Lock()

    def get(self, path: str) -> ArchiveReader:
        if remote.is_url(path):
            return self._get_remote(path)
        key = os.path.abspath(os.path.expanduser(path))
        signature = _signature(Path(key))
        with self._lock:
            cached = self._readers.get(key)
        if cached is not None and cached[0] == signature and signature != ("missing",):
            return cached[1]
        reader = _ScanReader(key)  # raises ArchiveNotFoundError / CorruptArchiveError
        with self._lock:
            self._readers[key] = (_signature(Path(key)), reader)
        return reader

    def _get_remote(self, url: str) -> ArchiveReader:
        """A reader of an archive on object storage, from a private local copy fetched once
        per process (credentials from the store's environment variables, e.g. AWS_*).
        rankfold never replaces an archive on a store (``store.remote``), so the copy stays
        valid while the archive exists."""
        with self._lock:
            cached = self._readers.get(url)
        if cached is not None:
            return cached[1]
        copy = remote.fetch(url)
        reader = _ScanReader(str(copy.path))
        reader.local_copy = copy  # the copy lives as long as the reader
        with self._lock:
            self._readers[url] = (("url",), reader)
        return reader

    def clear(self) -> None:
        with self._lock:
            self._readers.clear()


# -- BLAS threads ------------------------------------------------------------------------------
# Not capped here, on purpose. The reader's rebuild is one BLAS product per call, of a block of
# at most 2048 rows by c basis columns: too small for OpenBLAS to start threads. The table above
# ran as fast with OPENBLAS_NUM_THREADS=1 (0.31 / 0.62 / 0.41 / 0.14 s) as with its default 2
# threads (0.26 / 0.54 / 0.42 / 0.13 s), and compress from SQL took 1.55 s vs 1.53 s
# (200,000 x 60, best of 3). The only dependency-free route, an optional threadpoolctl (3.8),
# is unsafe inside DuckDB: it lets one Python thread at a time control OpenBLAS, and a DuckDB
# worker thread is a threading._DummyThread that counts as alive forever. When a UDF first ran
# on a worker (1 run in 6 of one probe), every later threadpool_limits() in the main thread
# silently did nothing ([2, 2] threads after asking for 1); when the main thread controlled
# first, the UDF's cap did nothing. To run BLAS on one thread, set OPENBLAS_NUM_THREADS=1
# before starting Python.
