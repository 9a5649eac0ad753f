"""Read an archive and rebuild any subset of it with per-cell bounds.

The reader holds the small parts in memory (column table, anchor rows, exact cells: O((c + r) n)
plus the exceptional cells) and reads row files by row group, only for the rows asked for.
"""

from __future__ import annotations

from collections.abc import Iterable
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from ..errors import (ArchiveNotFoundError, CorruptArchiveError, InvalidInputError, RowOutOfRangeError,
                      UnknownColumnError)
from . import arithmetic, layout, row_differences
from .integrity import (RowFileSeal, check_tables, damaged, open_row_file, read_small_table,
                        verified_metadata)
from .manifest import DIGEST_FIELD, check_files, read_manifest
from .manifest_schema import holds_table, older_row_file_rules
from .model import FittedModel
from .table_schemas import CELLS_SCHEMA, anchors_schema, check_schema, is_packed, unpack_columns_table

__all__ = ["ArchiveReader", "Rebuilt"]


@dataclass
class Rebuilt:
    """A rebuilt block: ``values`` and ``bounds`` (b, q) float64, ``exact`` (b, q) bool,
    ``nulls`` (b, q) bool (source NULLs), for ``positions`` (b,) and ``columns`` (q names),
    plus ``rows``: the row-file table of those rows (keys, basis, ledger), and ``slack`` (b, q)
    (the floating-point part of the bounds; only from ``rebuild(serve=False)``)."""

    positions: np.ndarray
    columns: list[str]
    values: np.ndarray
    bounds: np.ndarray
    exact: np.ndarray
    nulls: np.ndarray
    rows: pa.Table
    slack: np.ndarray | None = None


def _chunk_spans(first: int, local: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """For sorted file positions ``local`` of a row file starting at row ``first``: the first
    position of each chunk they touch (``row_differences.chunk_starts``) and the last position
    asked for in it, each (k,) sorted."""
    heads = row_differences.chunk_starts(local + first, first) - first
    cut = np.flatnonzero(np.diff(heads)) + 1
    return heads[np.r_[0, cut]], local[np.r_[cut - 1, local.size - 1]]


def _short(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 200 else text[:200] + " ..."


class ArchiveReader:
    """Opens an archive directory: checks the manifest's own digest and declared schema, the
    files' sizes and Parquet footer digests, the small tables' SHA-256, and the manifest against
    the tables and footers (``integrity``); row-file pages are CRC-checked on every read.
    ``checksums=True`` also checks every file's whole SHA-256 on open."""

    def __init__(self, path: str | Path, *, checksums: bool = False):
        self.path = Path(path)
        if not self.path.exists():
            raise ArchiveNotFoundError(f"No archive at {self.path}. Check the path.")
        if not self.path.is_dir():
            raise CorruptArchiveError(f"{self.path} is a file, not an archive directory.")
        self.manifest = read_manifest(self.path)
        check_files(self.path, self.manifest, checksums=checksums)
        try:
            with self.version_files():
                self._load()
                check_tables(self)
        except (CorruptArchiveError, ArchiveNotFoundError):
            raise
        except (OSError, pa.ArrowException, KeyError, TypeError, ValueError, IndexError) as exc:
            raise CorruptArchiveError(f"{self.path} could not be read ({exc}); the archive is damaged.") from None
        self.seal = RowFileSeal(self.path, self.manifest, self._metadata)

    @property
    def version(self) -> str:
        """This archive version's identity: the SHA-256 of its manifest (an append or an
        overwrite gives a new one). Caches of answers are keyed by it."""
        return self.manifest[DIGEST_FIELD]

    def check_row_files(self) -> None:
        """Check the whole SHA-256 of every file SQL reads: row files and small tables (cached
        until a file's size, mtime or inode changes). For readers that do not check Parquet
        page checksums, such as DuckDB."""
        self.seal.check()

    def check_table(self, table: str) -> None:
        """Check the whole SHA-256 of the small table ``table`` (``layout.COLUMNS``, ...) alone,
        for SQL that reads that table and no row file (cached like :meth:`check_row_files`)."""
        self.seal.check([layout.table_file(self.manifest, table)])

    def check_for_scan(self) -> bool:
        """Before SQL reads the row files through ``integrity.sealed_rows_sql`` (row groups
        checked as DuckDB reads them): check the small tables whole and the column chunks of
        ``_rf_row`` and the key columns, which DuckDB may filter on before the row-group check
        (cached like :meth:`check_row_files`). Returns False, after checking the whole files,
        for an archive whose row files carry no row-group digests (older archives)."""
        if self.seal.by_groups:
            self.seal.check_before_scan([layout.ROW_ID] + list(self.manifest.get("exact_columns", [])))
            return True
        self.seal.check()
        return False

    def row_file(self, name: str) -> pq.ParquetFile:
        """A row file of this archive, opened with Parquet page checksum verification and the
        footer that was checked on open."""
        return open_row_file(self.path / name, self._metadata[name])

    def row_file_schema(self, name: str) -> pa.Schema:
        return self._row_schemas[name]

    def _load(self) -> None:
        m = self.manifest
        self.numeric_columns: list[str] = list(m["numeric_columns"])
        self.column_index = {n: j for j, n in enumerate(self.numeric_columns)}
        self.rows_count = int(m["shape"][0])
        stored = read_small_table(self.path, m, layout.table_file(m, layout.COLUMNS))
        #: whether columns.parquet is stored packed (``table_schemas.pack_columns_table``), as
        #: written since; the table below is in the form of one field per number either way
        self.columns_packed = is_packed(stored.schema)
        #: the stored fields of columns.parquet (packed: ``numbers``; by field: the entries of
        #: ``table_schemas.PACKED_NUMBERS`` it holds), for SQL that reads it
        self.columns_stored_fields = list(stored.schema.names)
        self.columns_table = unpack_columns_table(stored, self.path / layout.table_file(m, layout.COLUMNS))
        anchors = (read_small_table(self.path, m, layout.table_file(m, layout.ANCHORS))
                   if holds_table(m, layout.ANCHORS) else anchors_schema(self.numeric_columns, False).empty_table())
        cells = (read_small_table(self.path, m, layout.table_file(m, layout.CELLS))
                 if holds_table(m, layout.CELLS) else CELLS_SCHEMA.empty_table())
        check_schema(cells.schema, CELLS_SCHEMA, self.path / layout.table_file(m, layout.CELLS))
        self.cell_rows = cells.column(layout.ROW_ID).to_numpy()
        self.cell_cols = cells.column(layout.COLUMN_ID).to_numpy()
        self.cell_nulls = cells.column("value").is_null().to_numpy(zero_copy_only=False)
        self.cell_values = cells.column("value").fill_null(np.nan).to_numpy()
        self.parts = []
        self._row_schemas: dict[str, pa.Schema] = {}
        self._metadata: dict[str, pq.FileMetaData] = {}
        entries = {f["name"]: f for f in m["files"]}
        for part in m["row_parts"]:
            meta = verified_metadata(self.path / part["name"], entries[part["name"]])
            self._metadata[part["name"]] = meta
            self._row_schemas[part["name"]] = meta.schema.to_arrow_schema()
            starts = np.cumsum([0] + [meta.row_group(g).num_rows for g in range(meta.num_row_groups)])
            self.parts.append((part["first_row"], part["rows"], part["name"], starts))
        self.model = FittedModel.from_tables(
            m, self.columns_table, anchors, self.row_file_schema(self.parts[0][2]) if self.parts else None,
            directory=self.path)
        self.anchor_lookup = {int(p): i for i, p in enumerate(self.model.anchor_positions)}
        if self.parts:
            schema = self.row_file_schema(self.parts[0][2])
            older_row_file_rules({f.name: f.type for f in schema}, self.path)
        self.key = m.get("key")

    @contextmanager
    def version_files(self):
        """Reads of this version's files inside: a file gone (swept after a later write
        superseded this version, or removed by hand) raises ArchiveNotFoundError.

        Every file name comes from the manifest read at open, and a name is never reused
        inside an archive folder (``store.versions``), so a reader never mixes versions."""
        try:
            yield
        except FileNotFoundError as exc:
            name = Path(exc.filename).name if exc.filename else "A file"
            raise ArchiveNotFoundError(
                f"{name} of the archive version opened at {self.path} (version "
                f"{self.manifest.get('version', 0)}) is gone: a later write superseded that "
                "version and its files were swept, or they were removed by hand. Open the "
                "archive again to read its current version."
            ) from None

    # -- addressing -----------------------------------------------------------------------------
    def resolve_columns(self, columns: Any) -> list[str]:
        if columns is None:
            return list(self.numeric_columns)
        if isinstance(columns, str):
            columns = [columns]
        if not isinstance(columns, Iterable):
            raise UnknownColumnError(
                f"Columns are a numeric column name or a list of names; got {columns!r}. The "
                f"archive {self.path} has the numeric columns {self.numeric_columns[:20]}"
                f"{' ...' if len(self.numeric_columns) > 20 else ''}."
            )
        names = list(columns)
        for name in names:
            if name not in self.column_index:
                raise UnknownColumnError(
                    f"The archive {self.path} has no numeric column {name!r}. Its numeric "
                    f"columns are {self.numeric_columns[:20]}{' ...' if len(self.numeric_columns) > 20 else ''}."
                )
        return names

    def resolve_rows(self, rows: Any) -> np.ndarray:
        """Row positions (int64, shape (b,)) from None, an int, a slice, a range or a sequence
        of ints (negative positions count from the end). A request outside the archive is
        refused before anything of its size is allocated: a slice or range is checked by its
        ends, an array by its minimum and maximum (no temporary arrays)."""
        m = self.rows_count
        if rows is None:
            return np.arange(m, dtype=np.int64)
        if isinstance(rows, slice):  # no arange(m): a range of a large archive stays small
            return np.arange(*rows.indices(m), dtype=np.int64)
        if isinstance(rows, range):
            if len(rows):
                self._check_span(min(rows[0], rows[-1]), max(rows[0], rows[-1]))
            out = np.arange(rows.start, rows.stop, rows.step, dtype=np.int64)
            return np.where(out < 0, out + m, out) if len(rows) and min(rows[0], rows[-1]) < 0 else out
        array = np.atleast_1d(np.asarray(rows))
        if array.ndim > 1:
            raise RowOutOfRangeError(
                f"Rows are one position or a flat sequence of positions; got an array of shape "
                f"{array.shape}. Flatten it first."
            )
        if array.size == 0:
            return np.zeros(0, dtype=np.int64)
        if not np.issubdtype(array.dtype, np.integer):
            raise RowOutOfRangeError(
                f"Rows are 0-based integer positions; got {_short(rows)}. To address rows by key "
                "value, use rankfold.Keys([...])."
            )
        # checked before any cast, so that e.g. a uint64 beyond 2^63 is reported as given
        low, high = int(array.min()), int(array.max())
        self._check_span(low, high)
        out = array.astype(np.int64, copy=False)
        return np.where(out < 0, out + m, out) if low < 0 else out

    def _check_span(self, low: int, high: int) -> None:
        m = self.rows_count
        bad = low if low < -m else high if high >= m else None
        if bad is not None:
            raise RowOutOfRangeError(
                f"Row position {bad} is out of range for the archive {self.path} with "
                f"{m} rows (valid: 0 to {m - 1}, or -{m} to -1 from the end)."
            )

    def locate(self, key_values: Any) -> np.ndarray:
        """Positions of the rows whose key column equals each of ``key_values`` (in order)."""
        if not self.key:
            raise RowOutOfRangeError(
                f"The archive {self.path} has no key column; it was compressed without key=. "
                "Address rows by position instead."
            )
        wanted = list(key_values) if isinstance(key_values, (list, tuple, np.ndarray)) else [key_values]
        found: dict[Any, int] = {}
        for first, _, name, _ in self.parts:
            table = self._read(name, lambda f: f.read(columns=[layout.ROW_ID, self.key]))
            keys = table.column(self.key)
            mask = pc.is_in(keys, value_set=pa.array(wanted, type=keys.type))
            hits = table.filter(mask)
            for k, p in zip(hits.column(self.key).to_pylist(), hits.column(layout.ROW_ID).to_pylist()):
                if found.setdefault(k, p) != p:  # archives written before keys were checked
                    raise InvalidInputError(
                        f"The key {self.key} = {k!r} names more than one row of {self.path} "
                        f"(rows {found[k]} and {p}, at least); address these rows by position.")
        missing = [k for k in wanted if k not in found]
        if missing:
            raise RowOutOfRangeError(
                f"The archive {self.path} has no row with {self.key} = {missing[0]!r}."
            )
        return np.array([found[k] for k in wanted], dtype=np.int64)

    # -- reading -----------------------------------------------------------------------------
    def read_rows(self, positions: np.ndarray, columns: list[str] | None = None) -> pa.Table:
        """Row-file columns (default: all) for ``positions``, in the order given."""
        if positions.size == 0:
            schema = self.row_file_schema(self.parts[0][2])
            names = self.model.row_file_columns(columns or None) or schema.names  # packed codes: their list
            empty = pa.table({n: pa.array([], schema.field(n).type) for n in names})
            return self.model.unpack_codes(empty, columns or None, self.path / self.parts[0][2])
        order = np.argsort(positions, kind="stable")
        sorted_pos = positions[order]
        pieces = []
        differenced = self.reads_differences(columns)
        for first, count, name, starts in self.parts:
            lo, hi = np.searchsorted(sorted_pos, [first, first + count])
            if lo == hi:
                continue
            local = sorted_pos[lo:hi] - first
            groups = np.unique(np.searchsorted(starts, local, side="right") - 1)
            if differenced:  # whole chunks: a difference-coded code needs its chunk's rows before it
                groups = self._chunk_groups(first, local, starts)
            table = self._read_groups(name, groups.tolist(), columns)
            if differenced:
                pieces.append(self._undifferenced(table, first, local, starts, groups))
                continue
            group_first = starts[groups]
            offsets = np.cumsum([0] + [starts[g + 1] - starts[g] for g in groups])
            index_in_read = offsets[np.searchsorted(group_first, local, side="right") - 1] + (
                local - group_first[np.searchsorted(group_first, local, side="right") - 1])
            pieces.append(table.take(pa.array(index_in_read)))
        table = pa.concat_tables(pieces) if len(pieces) > 1 else pieces[0]
        inverse = np.empty_like(order)
        inverse[order] = np.arange(order.size)
        return table.take(pa.array(inverse))

    def _read_groups(self, name: str, groups: list[int], columns: list[str] | None) -> pa.Table:
        """The row groups ``groups`` (sorted) of the row file ``name``, columns ``columns``
        (None: all), in order; residual codes in the per-column view whatever the layout
        (``FittedModel.unpack_codes``)."""
        stored = self.model.row_file_columns(columns)
        table = self._read(name, lambda f: f.read_row_groups(groups, columns=stored))
        return self.model.unpack_codes(table, columns, self.path / name)

    def reads_differences(self, columns: list[str] | None) -> bool:
        """Whether reading the row-file columns ``columns`` (None: all) reads a residual-code
        column stored as row differences (``row_differences``)."""
        names = {layout.CODE_PATTERN.format(int(j)) for j in np.flatnonzero(self.model.difference)}
        return bool(names) and (columns is None or not names.isdisjoint(columns))

    def _undifferenced(self, table: pa.Table, first: int, local: np.ndarray, starts: np.ndarray,
                       groups: np.ndarray) -> pa.Table:
        """The rows at the sorted file positions ``local`` of ``table`` (the row groups
        ``groups`` of a file starting at row ``first``, ``starts`` its row-group starts), with
        difference-coded codes decoded: only each chunk's rows up to the last one asked for are
        decoded (a point read: at most one chunk, not the row groups)."""
        read = np.concatenate([np.arange(starts[g], starts[g + 1]) for g in groups])
        heads, lasts = _chunk_spans(first, local)
        needed = np.concatenate([np.arange(a, z + 1) for a, z in zip(heads, lasts)])
        if needed.size != read.size:  # else the same rows (needed is a sorted subset of read)
            table = table.take(pa.array(np.searchsorted(read, needed)))
        decoded = self.model.undifference(table, row_differences.chunk_starts(needed + first, first))
        return decoded.take(pa.array(np.searchsorted(needed, local)))

    @staticmethod
    def _chunk_groups(first: int, local: np.ndarray, starts: np.ndarray) -> np.ndarray:
        """Row groups (sorted) of a row file starting at row ``first`` with row-group starts
        ``starts`` that hold every row of the chunks of the file positions ``local`` up to
        them (a chunk of ``row_differences`` may span row groups)."""
        heads, lasts = _chunk_spans(first, local)
        lo = np.searchsorted(starts, heads, side="right") - 1
        hi = np.searchsorted(starts, lasts, side="right") - 1
        return np.unique(np.concatenate([np.arange(a, z + 1) for a, z in zip(lo, hi)]))

    def _read(self, name: str, how) -> pa.Table:
        """``how(row file)`` with a damaged page (checksum, encoding) refused as corruption and
        a file of this version that is gone refused as ArchiveNotFoundError."""
        with self.version_files():
            try:
                return how(self.row_file(name))
            except FileNotFoundError:
                raise
            except (OSError, pa.ArrowException) as exc:
                raise damaged(self.path / name, f"could not be read ({exc})") from None

    def basis_block(self, rows: pa.Table) -> np.ndarray:
        """Filled basis values (b, c) as float64 from a row-file table (``FittedModel.basis_values``)."""
        return self.model.basis_values(rows)

    def residual_codes(self, rows: pa.Table, col_idx: np.ndarray) -> np.ndarray | None:
        """Quantized residual codes (b, q) for the requested columns (None if the archive has
        none; ``FittedModel.residual_codes``)."""
        return self.model.residual_codes(rows, col_idx)

    def rebuild(self, rows: Any = None, columns: Any = None, *, positions: np.ndarray | None = None,
                serve: bool = True) -> Rebuilt:
        """Rebuild ``rows`` x ``columns`` with bounds (see :class:`Rebuilt`): the values served
        to users (clamped, rounded to the column's type, see ``arithmetic.serve``), or with
        ``serve=False`` the values as stored (the factors' arithmetic, exact cells applied)
        together with their floating-point ``slack``."""
        model = self.model
        names = self.resolve_columns(columns)
        pos = positions if positions is not None else self.resolve_rows(rows)
        col_idx = np.array([model.column_index[n] for n in names], dtype=np.int64)
        table = self.read_rows(pos, self._row_file_columns(col_idx))
        values, bounds, slack = model.rebuild_block(table, col_idx)
        b, q = values.shape
        exact = np.zeros((b, q), bool)
        nulls = np.zeros((b, q), bool)
        # basis columns: the stored values themselves
        for t, name in enumerate(names):
            if model.is_basis[model.column_index[name]]:
                column = table.column(name)
                values[:, t] = column.cast(pa.float64()).fill_null(np.nan).to_numpy()
                nulls[:, t] = column.is_null().to_numpy(zero_copy_only=False)
                exact[:, t] = True
        # NULL cells stored as NULL residual codes (FittedModel.null_codes): NULL, exact
        null_codes = model.null_codes(table, col_idx)
        if null_codes is not None:
            values[null_codes] = np.nan
            nulls |= null_codes
            exact |= null_codes
        # anchor rows
        if self.anchor_lookup and b:
            order = np.argsort(model.anchor_positions, kind="stable")
            slot = np.searchsorted(model.anchor_positions[order], pos)
            slot = np.minimum(slot, order.size - 1)
            hit = model.anchor_positions[order][slot] == pos
            if hit.any():
                a = order[slot[hit]]
                values[hit] = model.anchor_values[np.ix_(a, col_idx)]
                nulls[hit] = model.anchor_nulls[np.ix_(a, col_idx)]
                exact[hit] = True
        # exact cells
        if self.cell_rows.size and b:
            self._apply_cells(pos, col_idx, values, nulls, exact)
        bounds[exact] = 0.0
        if not serve:
            return Rebuilt(pos, names, values, bounds, exact, nulls, table, slack)
        # served values: clamped into the observed range, integer columns rounded and float32
        # columns narrowed, each bound for the value handed out (arithmetic.serve). An integer
        # cell whose bound becomes 0 holds its true value: it counts as exact.
        approximated = ~exact & ~nulls
        values, bounds = arithmetic.serve(values, bounds, approximated, model.lower[col_idx],
                                          model.upper[col_idx], model.kind[col_idx], model.special[col_idx])
        exact |= approximated & model.is_integer[col_idx][None, :] & (bounds == 0.0)
        return Rebuilt(pos, names, values, bounds, exact, nulls, table)

    def _row_file_columns(self, col_idx: np.ndarray) -> list[str]:
        """Row-file columns a rebuild of ``col_idx`` reads: the exact (key and non-numeric)
        columns, every stored basis column, the row ledger (when there is one) and only the requested columns'
        residual codes (a narrow request on a wide archive skips the other codes)."""
        model = self.model
        codes = [layout.CODE_PATTERN.format(int(j)) for j in col_idx
                 if np.isfinite(model.residual_step[j])]
        wanted = list(self.manifest.get("exact_columns", [])) + model.basis_stored + codes
        wanted += [layout.ROW_ERR_MAX] if model.row_ledger else []
        # a read of no column gives no rows: then the row ids (every row file has them)
        return list(dict.fromkeys(wanted)) or [layout.ROW_ID]

    def iter_rebuild(self, rows: Any = None, columns: Any = None, *,
                     batch_rows: int = layout.ROW_GROUP_ROWS):
        """Rebuild ``rows`` (None, a slice or positions) in chunks of ``batch_rows`` rows:
        yields :class:`Rebuilt` blocks in order, reading only the row groups of each chunk,
        so memory stays one chunk whatever the archive's size."""
        if rows is None or isinstance(rows, slice):
            start, stop, step = (rows or slice(None)).indices(self.rows_count)
            span = batch_rows * abs(step)
            for lo in range(start, stop, span) if step > 0 else range(start, stop, -span):
                hi = min(lo + span, stop) if step > 0 else max(lo - span, stop)
                yield self.rebuild(columns=columns, positions=np.arange(lo, hi, step, dtype=np.int64))
            return
        positions = self.resolve_rows(rows)
        for lo in range(0, positions.size, batch_rows):
            yield self.rebuild(columns=columns, positions=positions[lo:lo + batch_rows])

    def _apply_cells(self, pos, col_idx, values, nulls, exact) -> None:
        in_rows = np.isin(self.cell_rows, pos)
        in_cols = np.isin(self.cell_cols, col_idx)
        hit = np.flatnonzero(in_rows & in_cols)
        if hit.size == 0:
            return
        row_slot = {}
        for i, p in enumerate(pos):
            row_slot.setdefault(int(p), []).append(i)
        col_slot = {int(j): t for t, j in enumerate(col_idx)}
        for h in hit:
            t = col_slot.get(int(self.cell_cols[h]))
            for i in row_slot.get(int(self.cell_rows[h]), ()):
                values[i, t] = self.cell_values[h]
                nulls[i, t] = self.cell_nulls[h]
                exact[i, t] = True
