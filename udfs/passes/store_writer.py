"""Commit to object storage for a distributed compress: the partitions' files never touch
the client's disk.

The encode pass's partitions (Dask tasks) stream their row files and exact-cell files
straight to a private staging prefix inside the target (``remote.Staging``, a random token
under ``.rankfold-staging-``), measuring size, SHA-256 and the Parquet footer's SHA-256 as
the bytes go out (``remote.StagedUpload``). The client then assembles the archive:

1. checks that no manifest appeared at the target;
2. moves every staged row file to its final name ``rows-NNNNN.parquet`` in row order (a copy
   inside the store: S3 copies server-side, no bytes through the client), checking the size;
3. uploads the small tables (columns, anchors, blocks, and the exact cells, streamed from the
   staged cell files one row group at a time), written in a private local directory;
4. uploads ``manifest.json`` LAST (written by ``store.manifest.write_manifest``, with every
   file's size and SHA-256: the commit point; readers follow only the manifest).

On any failure before the manifest, it removes what it created and nothing else: the staged
objects (under its own token, with the names it writes) and the final-named objects it
copied or uploaded, each only while it still has the size and entity tag recorded when it
was written. An archive already at the target is never replaced (``RemoteTarget`` refuses
``overwrite=True`` on a store, and the prefix must be empty).

Memory: the staged files are streamed (one upload part of ``StagedUpload.BLOCK_SIZE`` per
open file); the client's local directory holds only the small tables and the exact cells.
"""

from __future__ import annotations

import shutil
import tempfile
from pathlib import Path
from typing import Any

import pyarrow as pa

from ..errors import ArchiveExistsError
from ..store import layout
from ..store.manifest import entry_of, file_entry, write_manifest
from ..store.remote import RemoteTarget, Staging
from ..store.table_schemas import CELLS_SCHEMA
from .commit import PART_ROWS, concat_parquet, write_small_table

__all__ = ["StoreArchiveWriter"]


class StoreArchiveWriter:
    """Writes one archive to a store URL for a distributed compress (module docstring); the
    same members as ``commit.ArchiveWriter`` that ``compress`` uses."""

    def __init__(self, store: RemoteTarget, part_rows: int = PART_ROWS):
        self.store = store
        self.part_rows = part_rows
        self.staging: Staging = store.new_staging()
        self.temp = Path(tempfile.mkdtemp(prefix="rankfold-tables-"))  # small tables only
        self._adopted: list[dict[str, Any]] = []
        self._staged: dict[str, tuple[str, dict[str, Any]]] = {}  # final name -> (staged, record)
        self._written: dict[str, dict[str, Any]] = {}  # final name -> identity on the store

    @property
    def worker_target(self) -> Staging:
        """Where the encode pass's partitions write their files: the staging prefix."""
        return self.staging

    @property
    def parts(self) -> list[dict[str, Any]]:
        return self._adopted

    def write_rows(self, table: pa.Table, first_row: int) -> None:  # pragma: no cover - guard
        raise TypeError("StoreArchiveWriter takes row files written by partitions only.")

    def adopt_parts(self, parts: list[dict[str, Any]]) -> None:
        """Take the row files staged by partitions (each with the ``record`` its upload
        measured): sorted by first row, to be named ``rows-NNNNN.parquet`` at commit."""
        adopted = []
        for k, part in enumerate(sorted(parts, key=lambda p: p["first_row"])):
            name = layout.ROWS_PATTERN.format(k)
            self._staged[name] = (part["name"], part["record"])
            adopted.append({"name": name, "first_row": part["first_row"], "rows": part["rows"]})
        self._adopted = adopted

    def close_rows(self) -> None:
        """Nothing to finish: partitions closed their uploads."""

    def row_files(self) -> tuple[list[str], Any]:
        """The staged row files (paths inside the store's file system) and that file system."""
        return [self.staging.path(self._staged[p["name"]][0]) for p in self._adopted], self.store.fs

    def size_of(self, name: str) -> int:
        if name in self._staged:
            return int(self._staged[name][1]["bytes"])
        return (self.temp / name).stat().st_size

    def concat_cells(self, sources: list[str], extra: list[pa.Table]) -> None:
        """``cells.parquet`` (local, uploaded at commit) from the staged cell files, streamed
        one row group at a time, then ``extra``."""
        concat_parquet(self.temp, sources, layout.CELLS, CELLS_SCHEMA, extra=extra, remove=False,
                       open_source=self.staging.open_parquet)

    def write_table(self, name: str, table: pa.Table) -> None:
        """A small table, as ``ArchiveWriter.write_table`` writes it (``write_small_table``)."""
        write_small_table(self.temp / name, table)

    def commit(self, manifest: dict[str, Any], file_names: list[str], *, at_most: int | None = None) -> str:
        """Move the row files into place, upload the small tables, then the manifest (the
        commit point); returns the URL. On failure, removes what this writer created. With
        ``at_most``, an archive larger than that (manifest included) is refused before the
        manifest is uploaded (``write_manifest`` raises ``SizeTargetMissedError``)."""
        try:
            self._refuse_if_committed()
            entries = []
            for name in file_names:
                if name in self._staged:
                    staged, record = self._staged[name]
                    self._written[name] = self.store.adopt(self.staging.path(staged), name,
                                                           int(record["bytes"]))
                    entries.append(entry_of(name, record["bytes"], record["sha256"],
                                            record["footer_sha256"]))
                else:
                    entries.append(file_entry(self.temp, name))
                    self._written[name] = self.store.put(self.temp / name, name)
            manifest["files"] = entries
            write_manifest(self.temp, manifest, at_most=at_most)
            self._refuse_if_committed()
            self.store.put(self.temp / layout.MANIFEST, layout.MANIFEST)  # the commit point
        except BaseException:
            self.abort()
            raise
        try:
            self.staging.remove()  # the staged cell files (the row files were moved)
        finally:
            shutil.rmtree(self.temp, ignore_errors=True)  # our own directory, made above
        return self.store.url

    def _refuse_if_committed(self) -> None:
        if self.store.has_manifest():
            raise ArchiveExistsError(
                f"{self.store.url} received an archive from another writer while rankfold was "
                "writing there; it was left untouched and the new archive discarded. Write to "
                "another prefix.")

    def abort(self) -> None:
        """Remove what this writer created: the final-named objects it wrote (while they are
        still the ones written), the staged objects, the local directory."""
        try:
            self.store.remove_own(self._written)
            self._written = {}
            self.staging.remove()
        finally:
            shutil.rmtree(self.temp, ignore_errors=True)
