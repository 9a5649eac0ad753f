"""Pass 4, encode: rebuild every block from the factors exactly as they will be stored,
measure the residual, fill the error ledger, route cells that cannot be approximated to the
exact-cell table, and write the row files. When the sketch came from a sample of the rows,
this pass also gathers every column's statistics (``profile_columns``), since it is then the
only pass that reads every row.

Guarantee established here: for every approximated cell (i, j),
|x_ij - xhat_ij| <= min(scale_j * err_max_row_i, err_max_col_j) + slack_ij, where scale_j is
the column's ledger scale (its standard deviation, 1 when that is 0), the row figures are in
those units, and xhat is computed by ``store.arithmetic`` in any evaluation order (see its
docstring for the slack). Cells of exactly stored basis columns, anchor rows and NULL, NaN,
+-inf or overflowing cells are stored exactly (error 0).

With a tolerance t_j (``store.model.Coding``), every approximated cell also satisfies
|x_ij - xhat_ij| <= t_j: the residual may be coded as integers with step 2 t_j (the rebuild
adds code * step), basis values may be stored quantized with such a step, and any cell that
would still exceed t_j after the slack is stored exactly as a correction.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from ..errors import CorruptArchiveError, InvalidInputError, SourceChangedError
from ..store import arithmetic, layout, packed_codes, row_differences
from ..store.model import FittedModel, Mixing
from ..store.table_schemas import CELLS_SCHEMA, check_row_schema, relative_rms
from .commit import ArchiveWriter, cell_encodings, close_parquet
from .profile import ColumnProfile, Fingerprint, Transform, profile_block

__all__ = ["ColumnLedger", "ExactCells", "encode_pass", "column_statistics", "stored_basis"]

Stream = Iterator[tuple[int, pa.RecordBatch, np.ndarray, "np.ndarray | None"]]


@dataclass
class ColumnLedger:
    """Residual statistics per numeric column over approximated cells (arrays (n,))."""

    err_max: np.ndarray
    err_l2: np.ndarray
    err_sum: np.ndarray
    cells: np.ndarray

    @classmethod
    def empty(cls, width: int) -> "ColumnLedger":
        return cls(np.zeros(width), np.zeros(width), np.zeros(width), np.zeros(width, np.int64))

    def add(self, errors: np.ndarray, approximated: np.ndarray) -> None:
        """Add a block: ``errors`` (b, n) holds the residual of approximated cells and 0
        elsewhere; ``approximated`` (b, n) is True at approximated cells."""
        e = errors
        block_max = np.abs(e).max(axis=0) if e.size else np.zeros(e.shape[1])
        self.add_stats(block_max, _norms(e, block_max, axis=0), e.sum(axis=0),
                       np.count_nonzero(approximated, axis=0))

    def add_stats(self, block_max: np.ndarray, block_l2: np.ndarray, block_sum: np.ndarray,
                  cells: np.ndarray) -> None:
        """Add a block given by its statistics per column (arrays (n,)): max |e|, Euclidean
        norm and sum of the residuals of its approximated cells, and their count."""
        self.err_max = np.maximum(self.err_max, block_max)
        self.err_l2 = np.hypot(self.err_l2, block_l2)
        self.err_sum += block_sum
        self.cells += cells

    def l2_upper(self, rows: int) -> np.ndarray:
        """``err_l2`` as stored: an upper limit of the exact Euclidean norm of each column's
        residual over a table of ``rows`` rows.

        A computed sum of s squares falls short of the exact one by at most gamma_s of it in
        any summation order (Higham, "Accuracy and Stability of Numerical Algorithms", 2nd
        ed., 2002, chapter 4), the square root and each of the k hypot merges of block norms
        add at most 2u more; s <= rows and k <= rows, so the norm is scaled by
        1 + (3 rows + 8) u (1 + 5e-9 at 1.6e7 rows) and then rounded up (to
        ``arithmetic.COLUMN_FIGURE_BITS`` significant bits: ``round_up_short``)."""
        return arithmetic.round_up_short(self.err_l2 * (1.0 + (3.0 * rows + 8.0) * arithmetic.UNIT_ROUNDOFF))

    def merge(self, other: "ColumnLedger") -> "ColumnLedger":
        """The ledger of two disjoint row sets (associative: max, hypot, sums)."""
        return ColumnLedger(np.maximum(self.err_max, other.err_max), np.hypot(self.err_l2, other.err_l2),
                            self.err_sum + other.err_sum, self.cells + other.cells)


def _finite_or_none(value: float) -> float | None:
    value = float(value)
    return value if np.isfinite(value) else None


def column_error_figures(names: list[str], std: np.ndarray, ledger: ColumnLedger) -> dict[str, Any]:
    """The per-column error figures of the manifest's ``errors`` record, from the column ledger
    and the columns' standard deviations (arrays (n,), over every row of the archive): the mean
    and worst relative RMS (RMS of the residual / std), the largest error and the largest error
    over std. One function for compress and append, so an append restates every figure."""
    rms = ledger.err_l2 / np.sqrt(np.maximum(ledger.cells, 1))
    with np.errstate(invalid="ignore", divide="ignore"):
        rel_rms = np.where(std > 0, rms / np.where(std > 0, std, 1), np.nan)
        max_over_std = np.where(std > 0, ledger.err_max / np.where(std > 0, std, 1), np.nan)
    worst = int(np.nanargmax(rel_rms)) if np.isfinite(rel_rms).any() else None
    return {
        "mean_column_relative_rms": _finite_or_none(np.nanmean(rel_rms)) if worst is not None else None,
        "worst_column": names[worst] if worst is not None else None,
        "worst_column_relative_rms": _finite_or_none(rel_rms[worst]) if worst is not None else None,
        "largest_error_over_std": (_finite_or_none(np.nanmax(max_over_std))
                                   if np.isfinite(max_over_std).any() else None),
        "largest_error": _finite_or_none(ledger.err_max.max()) if ledger.err_max.size else 0.0,
    }


def column_statistics(profile: ColumnProfile, ledger: ColumnLedger, rows: int) -> dict[str, np.ndarray]:
    """The measured fields of the columns table (``store.model.STATISTICS``) from the column
    statistics of every row and the column ledger of a table of ``rows`` rows."""
    std = profile.std
    err_l2 = ledger.l2_upper(rows)
    # from the stored err_l2 (an upper limit): the columns table then derives it, stores nothing
    rel_rms = relative_rms(err_l2, ledger.cells, std)
    return {"valid": profile.valid, "nulls": profile.nulls, "nans": profile.nans,
            "infinities": profile.infinities, "mean": profile.mean, "std": std,
            "min": profile.minimum, "max": profile.maximum, "err_max": arithmetic.round_up_short(ledger.err_max),
            # err_sum, a descriptive figure (no bound uses it), to the same 24 significant bits,
            # rounded to nearest: nci60 at 0.01 std, its field 49,413 -> about 25,000 bytes
            "err_l2": err_l2, "err_sum": arithmetic.trim_mantissa(np.asarray(ledger.err_sum, np.float64),
                                                                  arithmetic.COLUMN_FIGURE_BITS),
            "err_cells": ledger.cells,
            "rel_rms": rel_rms}


# Exact cells buffered in memory before they are written out (with ``spill_to``)
SPILL_CELLS = 1 << 18


@dataclass
class ExactCells:
    """Cells stored exactly outside basis columns and anchor rows.

    With ``spill_to`` (a file path, or a callable that opens a binary file object, such as
    an upload to object storage), cells go to that Parquet file every ``SPILL_CELLS``
    cells and at ``finish()``, so memory does not grow with the number of such cells."""

    rows: list[np.ndarray] = field(default_factory=list)
    columns: list[np.ndarray] = field(default_factory=list)
    values: list[np.ndarray] = field(default_factory=list)
    nulls: list[np.ndarray] = field(default_factory=list)
    reasons: list[np.ndarray] = field(default_factory=list)
    spill_to: Path | None = None
    spilled: int = 0
    written: bool = False
    _writer: Any = field(default=None, repr=False)
    _file: Any = field(default=None, repr=False)

    def _buffered(self) -> int:
        return int(sum(r.size for r in self.rows))

    def _spill(self) -> None:
        if not self.rows:
            return
        table = self.table()
        if self._writer is None:  # spill_to: a path, or a callable opening a file object
            where = self.spill_to() if callable(self.spill_to) else self.spill_to
            self._file = None if isinstance(where, (str, Path)) else where
            self._writer = pq.ParquetWriter(where, table.schema, compression="zstd",
                                            **cell_encodings(table.schema))
        self._writer.write_table(table)
        self.spilled += table.num_rows
        self.written = True
        for parts in (self.rows, self.columns, self.values, self.nulls, self.reasons):
            parts.clear()

    def finish(self) -> "ExactCells":
        """Write what is buffered (with ``spill_to``) and close the file."""
        if self.spill_to is not None:
            self._spill()
            self._writer = self._file = close_parquet(self._writer, self._file)
        return self

    def add(self, first: int, cells: np.ndarray, block: np.ndarray, mask: np.ndarray | None,
            corrections: np.ndarray | None = None) -> None:
        r, c = np.nonzero(cells)
        if r.size == 0:
            return
        values = block[r, c]
        nulls = mask[r, c] if mask is not None else np.zeros(r.size, bool)
        reason = np.full(r.size, "overflow", dtype=object)
        if corrections is not None:
            reason[corrections[r, c]] = "correction"
        reason[np.isinf(values)] = "inf"
        reason[np.isnan(values)] = "nan"
        reason[nulls] = "null"
        self.rows.append(first + r.astype(np.int64))
        self.columns.append(c.astype(np.int32))
        self.values.append(values)
        self.nulls.append(nulls)
        self.reasons.append(reason)
        if self.spill_to is not None and self._buffered() >= SPILL_CELLS:
            self._spill()

    def table(self) -> pa.Table:
        """The buffered cells, ordered by row then column or by column then row, whichever
        the real writer stores smaller (``cell_encodings``; the delta-coded row ids shrink to a
        few bits where a column's NULL or NaN cells come in runs of rows). Measured: the 23,974
        NULL cells of an hourly weather table 9.7 kB by row, 6.7 kB by column; a country panel's
        missing years 10.1 kB by row, 14.5 kB by column. Readers match cells by row and column,
        in any order."""
        cat = (lambda parts, dtype: np.concatenate(parts) if parts else np.zeros(0, dtype))
        rows, columns = cat(self.rows, np.int64), cat(self.columns, np.int32)
        values, nulls, reasons = cat(self.values, np.float64), cat(self.nulls, bool), cat(self.reasons, object)

        def ordered(order: np.ndarray) -> pa.Table:
            return pa.table({
                layout.ROW_ID: pa.array(rows[order], pa.int64()),
                layout.COLUMN_ID: pa.array(columns[order], pa.int32()),
                "value": pa.array(values[order], pa.float64(), mask=nulls[order]),
                "reason": pa.array(reasons[order], pa.string()).dictionary_encode(),
            }, schema=CELLS_SCHEMA)

        by_row = ordered(np.lexsort((columns, rows)))
        if rows.size < 2:
            return by_row
        by_column = ordered(np.lexsort((rows, columns)))
        return min((by_row, by_column), key=_written_bytes)

    @property
    def count(self) -> int:
        return self.spilled + self._buffered()


def _written_bytes(table: pa.Table) -> int:
    """Bytes of ``table`` written as the exact-cell files are (in memory)."""
    sink = pa.BufferOutputStream()
    pq.write_table(table, sink, compression="zstd", **cell_encodings(table.schema))
    return sink.tell()


def _norms(values: np.ndarray, largest: np.ndarray, axis: int) -> np.ndarray:
    """Euclidean norms along ``axis``; ``largest`` holds the largest |value| of each. Plain
    sums of squares when every largest value lies in [1e-100, 1e100] (or is 0): then nothing
    overflows and what underflows is below 1e-100 of the result, far inside the 4u that the
    ledger rounds up by. Otherwise scaled by the largest value."""
    safe = (largest == 0) | ((largest >= 1e-100) & (largest <= 1e100))
    if np.all(safe):
        return np.sqrt(np.einsum("ij,ij->j" if axis == 0 else "ij,ij->i", values, values))
    scale = np.where(largest > 0, largest, 1.0)
    scaled = values / (scale[None, :] if axis == 0 else scale[:, None])
    return scale * np.sqrt((scaled**2).sum(axis=axis))


def _same_row(a: np.ndarray, b: np.ndarray) -> bool:
    return bool(np.all((a == b) | (np.isnan(a) & np.isnan(b))))


@dataclass
class EncodeResult:
    ledger: ColumnLedger
    cells: ExactCells
    fingerprint: Fingerprint
    rows: int
    corrections: int = 0
    profile: ColumnProfile | None = None  # every column's statistics, when asked for
    null_codes: int = 0  # NULL cells stored as NULL residual codes (not in the exact cells)

    @staticmethod
    def merge(results: list["EncodeResult"], width: int) -> "EncodeResult":
        """One result from the results of disjoint partitions (cells stay in their files)."""
        ledger, fingerprint = ColumnLedger.empty(width), Fingerprint()
        cells = ExactCells()
        profile = ColumnProfile.empty(width) if results and results[0].profile is not None else None
        for r in results:
            ledger = ledger.merge(r.ledger)
            fingerprint = fingerprint.merge(r.fingerprint)
            cells.spilled += r.cells.count
            if profile is not None:
                profile = profile.merge(r.profile)
        return EncodeResult(ledger, cells, fingerprint, sum(r.rows for r in results),
                            sum(r.corrections for r in results), profile=profile,
                            null_codes=sum(r.null_codes for r in results))


_CODE_LIMIT = 2.0**31 - 1  # residual codes are stored as int32

# NULL cells of columns with residual codes are stored as NULL codes in the row files (a
# Parquet NULL costs a bit of the definition levels), not as exact cells; False writes the
# form of archives written before (every NULL cell in cells.parquet), which readers still
# read (tests of those archives set it).
NULL_CODES = True


def stored_basis(raw: np.ndarray, step: np.ndarray, float32: bool):
    """Basis values as stored, and the Arrow arrays that store them (NaN = NULL)."""
    coded = np.isfinite(step)
    values = raw.copy()
    arrays = []
    for k in range(raw.shape[1]):
        column = raw[:, k]
        if coded[k]:
            codes = arithmetic.quantize(column, step[k])
            # NaN propagates through min and max and fails both comparisons: when every code
            # is finite and within the limit, no cell is bad and the masking is skipped
            if codes.size and -_CODE_LIMIT <= codes.min() and codes.max() <= _CODE_LIMIT:
                bad = None
            else:
                bad = ~np.isfinite(codes) | (np.abs(codes) > _CODE_LIMIT)
                codes = np.where(bad, 0.0, codes)
            values[:, k] = codes * step[k] if bad is None else np.where(bad, np.nan, codes * step[k])
            arrays.append(pa.array(codes.astype(np.int32), pa.int32(), mask=bad))
        elif float32:
            narrow = column.astype(np.float32)
            values[:, k] = narrow.astype(np.float64)
            arrays.append(pa.array(narrow, pa.float32(), mask=~np.isfinite(column)))
        else:
            arrays.append(pa.array(column, pa.float64(), mask=~np.isfinite(column)))
    return values, arrays


# Cells per sub-block: the encode pass works through each batch in slices of about this many
# cells (4,096 rows at n = 100), so that its (rows, n) work arrays stay in cache and are reused,
# instead of page-faulting through fresh 100 MB temporaries per batch. Measured on 1e6 x 100
# float64, 2 cores: 5.8 s for the pass in whole batches, 1.2-1.4 s in sub-blocks; sub-blocks
# of 2,048 to 16,384 rows were within the noise of each other.
SUB_BLOCK_CELLS = 1 << 19


# Runs of consecutive coded columns up to which the encode pass works on slices of its blocks
# (beyond, on gathered columns): per run, two ufunc calls per sub-block.
_MAX_RUNS = 32


def sub_block_rows(width: int) -> int:
    """Rows per sub-block at ``width`` numeric columns: about ``SUB_BLOCK_CELLS`` cells, as a
    power of two in [16, layout.ROW_GROUP_ROWS] (it divides a full row group evenly; 16 rows
    keep the four work arrays at 10 MB each even at 100,000 columns)."""
    rows = SUB_BLOCK_CELLS // max(width, 1)
    return int(min(max(1 << max(rows.bit_length() - 1, 0), 16), layout.ROW_GROUP_ROWS))


class _CodeBuffer:
    """The encode pass's residual codes of one batch, (rows, q) column-major, kept across
    batches and grown to the largest batch asked for."""

    def __init__(self, width: int):
        self.width = width
        self.array = np.empty((width, 0)).T

    def at_least(self, rows: int) -> np.ndarray:
        if rows > self.array.shape[0]:
            self.array = np.empty((self.width, rows)).T
        return self.array


@dataclass
class _Piece:
    """What one sub-block of s rows adds to the pass (arrays over the n numeric columns)."""

    block_max: np.ndarray
    block_l2: np.ndarray
    block_sum: np.ndarray
    cells: np.ndarray
    fingerprint: Fingerprint | None
    corrections: int
    stored: np.ndarray | None        # (s, n) cells stored exactly outside kept rows/columns
    over_tolerance: np.ndarray | None  # (s, n) those of them that are corrections
    sums: dict[str, Any] | None      # BlockSums.partial of the sub-block


class _Buffers:
    """Work arrays of one sub-block: xhat, residual, |residual|, slack and the residual term
    (code * step), each (rows, n) column-major like the blocks, and the product of the
    rebuild (rows, n) row-major (``arithmetic.approximate``), kept across sub-blocks and
    batches (a fresh temporary per block page-faults) and grown to the largest sub-block
    asked for."""

    def __init__(self, width: int):
        self.width = width
        self.arrays: tuple[np.ndarray, ...] = self._new(0)

    def _new(self, rows: int) -> tuple[np.ndarray, ...]:
        return tuple(np.empty((self.width, rows)).T for _ in range(5)) + (np.empty((rows, self.width)),)

    def take(self, rows: int) -> tuple[np.ndarray, ...]:
        if rows > self.arrays[0].shape[0]:
            self.arrays = self._new(rows)
        return tuple(a[:rows] for a in self.arrays)


@dataclass
class _Kernel:
    """The per-cell work of the encode pass on one sub-block (constants of the pass)."""

    mixing: Mixing
    exact_columns: np.ndarray   # (e,) exactly stored basis columns
    other_columns: np.ndarray   # (n - e,) the rest
    with_residual: np.ndarray   # (q,) columns with residual codes
    steps: np.ndarray           # (q,) their steps
    tolerance: np.ndarray       # (n,)
    tolerance_columns: np.ndarray  # approximated columns with a finite tolerance
    ledger_scale: np.ndarray    # (n,)
    block_sums: Any
    with_fingerprint: bool = True  # False: the pass is not compared with another one
    code_limit: np.ndarray | float = _CODE_LIMIT  # (q,) largest |code| each column's type holds

    with_row_l2: bool = True  # False: the row norms are not stored (no row ledger)

    def __post_init__(self) -> None:
        # position of each column among the coded ones (-1: no residual code)
        self.code_index = np.full(self.tolerance.shape[0], -1, dtype=np.intp)
        self.code_index[self.with_residual] = np.arange(self.with_residual.size)
        # every column coded, in order: the coded columns are the block itself (no gathers)
        self.all_coded = bool(np.array_equal(self.with_residual, np.arange(self.tolerance.shape[0])))
        # the coded columns as runs of consecutive columns (a, b) = codes (c, d), worked on as
        # slices of the column-major blocks when there are few (the gaps are the exactly
        # stored basis columns), else gathered
        wr = self.with_residual
        cuts = np.flatnonzero(np.diff(wr) != 1) + 1 if wr.size else np.zeros(0, np.intp)
        starts, ends = np.concatenate([[0], cuts]).astype(int), np.concatenate([cuts, [wr.size]]).astype(int)
        self.runs = ([(int(wr[c]), int(wr[d - 1]) + 1, int(c), int(d)) for c, d in zip(starts, ends)]
                     if wr.size and starts.size <= _MAX_RUNS else None)
        self.code_limit = np.broadcast_to(np.asarray(self.code_limit, dtype=np.float64),
                                          self.with_residual.shape)

    def run(self, first: int, x: np.ndarray, mask: np.ndarray | None, filled: np.ndarray,
            anchors: np.ndarray, buffers: _Buffers, out: tuple) -> _Piece:
        """Verify rows first .. first + s - 1: x (s, n) source values (NaN where NULL), mask
        (s, n) or None, filled (s, c) basis values as stored and filled, anchors: positions
        of anchor rows within the sub-block. Writes into ``out`` = (residual codes (s, q) or
        None, row max (s,), row norm (s,)) and returns the rest as a ``_Piece``."""
        codes_out, row_max_out, row_l2_out = out
        s, n = x.shape
        mixing, wr, exact = self.mixing, self.with_residual, self.exact_columns
        xhat, residual, abs_e, slack_out, term_out, product = buffers.take(s)
        arithmetic.approximate(filled, mixing.weights, mixing.offset, out=xhat, product=product)
        codes = term = largest_term = None
        with np.errstate(invalid="ignore", over="ignore"):
            if wr.size:
                codes, term, largest_term = self._codes(x, xhat, residual, codes_out, term_out[:, :wr.size])
            np.subtract(x, xhat, out=residual)
        # cells kept exact (basis columns stored exactly, anchor rows) have no error
        residual[:, exact] = 0.0
        residual[anchors] = 0.0
        # an upper limit of the slack per column (O(s c + c n)); the (s, n) slack itself is
        # computed only where that limit cannot settle a cell: when it is not finite (then
        # every slack entry is checked) or too large for a column's tolerance
        limit = arithmetic.slack_limit(filled, mixing.weights, mixing.offset, term, wr,
                                       residual_max=largest_term)
        slack = None
        if not np.isfinite(limit).all():
            slack = arithmetic.slack(filled, mixing.weights, mixing.offset, term,
                                     residual_columns=wr, out=slack_out)
        np.abs(residual, out=abs_e)
        block_max = abs_e.max(axis=0) if s else np.zeros(n)
        # without a non-finite residual or slack, only the tolerance can send cells to the
        # exact-cell table (a non-finite source value always gives a non-finite residual)
        stored = over = None
        if not (np.isfinite(block_max).all() and (slack is None or np.isfinite(slack.max()))):
            with np.errstate(invalid="ignore"):
                stored = ~np.isfinite(residual)
            if slack is not None:
                stored |= ~np.isfinite(slack)
            self._clear_kept(stored, anchors)
        if self.tolerance_columns.size:
            over = self._over_tolerance(filled, term, abs_e, block_max, limit, slack, slack_out, anchors)
            if stored is not None and over is not None:
                over &= ~stored
                stored |= over
            elif over is not None:
                stored = over
        corrections = 0
        cells = np.full(n, s - anchors.size, dtype=np.int64)
        cells[exact] = 0
        if stored is not None and stored.any():
            np.copyto(residual, 0.0, where=stored)
            np.copyto(abs_e, 0.0, where=stored)
            block_max = abs_e.max(axis=0)
            cells -= np.count_nonzero(stored, axis=0)
            corrections = int(np.count_nonzero(over)) if over is not None else 0
        else:
            stored = over = None
        block_l2 = _norms(residual, block_max, axis=0)
        block_sum = residual.sum(axis=0)
        # row figures are in units of each column's ledger scale (its standard deviation),
        # so one row figure bounds every column of the row, whatever the columns' units
        abs_e /= self.ledger_scale[None, :]
        if n:
            np.max(abs_e, axis=1, out=row_max_out)
            if self.with_row_l2:
                row_l2_out[...] = _norms(abs_e, row_max_out, axis=1)
        else:
            row_max_out[...] = 0.0
            row_l2_out[...] = 0.0
        fingerprint = None
        if self.with_fingerprint:
            fingerprint = Fingerprint()
            fingerprint.update(first, x, with_scale=False)  # the profile pass's sets the tolerance
        sums = None
        if self.block_sums is not None:
            rows_i, cols_j = self._overridden(stored, anchors)
            sums = self.block_sums.partial(filled, codes, xhat, x, mask, code_columns=wr,
                                           exact_columns=exact, cells=(rows_i, cols_j),
                                           scratch=None if codes is None else slack_out[:, :wr.size])
        return _Piece(block_max, block_l2, block_sum, cells, fingerprint, corrections, stored, over, sums)

    def _codes(self, x: np.ndarray, xhat: np.ndarray, work: np.ndarray, codes_out: np.ndarray,
               term_out: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Residual codes of the coded columns, written into ``codes_out`` (s, q): the nearest
        integers to (x - xhat) / step (``arithmetic.quantize``), 0 where that is not finite or
        beyond the column's code limit; adds code * step to ``xhat`` (``arithmetic.add_residual``
        on those columns). Returns the codes, the term code * step (in ``term_out``, (s, q)) and
        its largest magnitude per column (q,). ``work`` (s, n) is scratch space.

        The same numbers as quantizing ``x[:, wr] - xhat[:, wr]`` and masking with
        ``np.where``: the difference, its quotient and its rounding are the same operations on
        the same operands, here in place, on slices of the blocks for each run of consecutive
        coded columns (or, with many runs, on the columns gathered as rows of the transposes:
        a gather of columns of these column-major blocks was measured 10-40x slower). Measured
        at 1e6 x 100, default tolerance: 0.63 s of the pass's 1.7 s in the lines this replaces."""
        wr, steps, code_limit = self.with_residual, self.steps, self.code_limit
        codes = codes_out
        np.subtract(x, xhat, out=work)
        if self.all_coded:
            np.divide(work, steps, out=codes)
        elif self.runs is not None:
            for a, b, c, d in self.runs:
                np.divide(work[:, a:b], steps[c:d], out=codes[:, c:d])
        else:  # gathered into term_out (free until the term is formed below)
            gathered = np.take(work.T, wr, axis=0, out=term_out.T if term_out.T.flags.c_contiguous else None,
                               mode="clip")  # wr holds valid indices: "clip" only skips a buffer
            np.divide(gathered, steps[:, None], out=codes.T)
        np.rint(codes, out=codes)
        if codes.shape[0]:
            # NaN propagates through min and max and fails both comparisons
            low, high = codes.min(axis=0), codes.max(axis=0)
            if not (np.all(high <= code_limit) and np.all(-code_limit <= low)):
                unusable = ~(np.isfinite(codes) & (np.abs(codes) <= code_limit))
                np.copyto(codes, 0.0, where=unusable)
                low, high = codes.min(axis=0), codes.max(axis=0)
            largest = np.maximum(np.abs(low), np.abs(high))
        else:
            largest = np.zeros(wr.size)
        term = np.multiply(codes, steps[None, :], out=term_out)
        if self.all_coded:
            xhat += term
        elif self.runs is not None:
            for a, b, c, d in self.runs:
                xhat[:, a:b] += term[:, c:d]
        else:
            xhat.T[wr] += term.T
        # max_i |q_ij step_j| = |step_j| max_i |q_ij|: rounding is monotone and symmetric
        return codes, term, largest * np.abs(steps)

    def _clear_kept(self, cells: np.ndarray, anchors: np.ndarray) -> None:
        cells[:, self.exact_columns] = False
        cells[anchors] = False

    def _over_tolerance(self, filled: np.ndarray, term: np.ndarray | None, abs_e: np.ndarray,
                        block_max: np.ndarray, limit: np.ndarray, slack: np.ndarray | None,
                        slack_out: np.ndarray, anchors: np.ndarray) -> np.ndarray | None:
        """Cells (s, n) whose error, moved up past its own rounding, plus the slack of any
        later rebuild exceeds the column's tolerance (or is NaN); None when there is none.

        A column j passes whole when round_up(max_i |e_ij|) + limit_j <= t_j: rounding up and
        floating-point addition are monotone, so every cell's own sum is at most that. The
        other columns are checked cell by cell with the slack itself (``slack`` when given,
        else computed for those columns only). Columns without a finite tolerance are never
        examined: x <= inf holds for every x but NaN, and a NaN residual or slack is caught as
        non-finite before."""
        cols = self.tolerance_columns
        with np.errstate(invalid="ignore", over="ignore"):
            settled = arithmetic.round_up(block_max[cols]) + limit[cols] <= self.tolerance[cols]
        cols = cols[~settled]
        if not cols.size:
            return None
        if slack is None:
            weights, offset = self.mixing.weights[:, cols], self.mixing.offset[cols]
            coded = self.code_index[cols]
            sl = arithmetic.slack(filled, weights, offset,
                                  None if term is None else term[:, coded[coded >= 0]],
                                  residual_columns=np.flatnonzero(coded >= 0),
                                  out=slack_out[:, :cols.size])
        else:
            sl = slack[:, cols]
        with np.errstate(invalid="ignore", over="ignore"):
            within = arithmetic.round_up(abs_e[:, cols])
            within += sl
            bad = ~(within <= self.tolerance[cols][None, :])
        if not bad.any():
            return None
        over = np.zeros(abs_e.shape, dtype=bool)
        over[:, cols] = bad
        over[anchors] = False
        return over if over.any() else None

    def _overridden(self, stored: np.ndarray | None, anchors: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Row and column indices of the cells stored exactly outside the exact columns:
        anchor rows, then the stored cells (any order: they are summed per column)."""
        others = self.other_columns
        rows = [np.repeat(anchors, others.size)]
        cols = [np.tile(others, anchors.size)]
        if stored is not None:
            r, c = np.nonzero(stored)
            rows.append(r)
            cols.append(c)
        return np.concatenate(rows).astype(np.intp), np.concatenate(cols).astype(np.intp)


class _DifferenceCarry:
    """The stored form of difference-coded residual codes across the batches of one encode
    pass (``store/row_differences.py``): remembers the last row's codes and the row file it
    went to, so that a chunk may continue across batches of one file."""

    def __init__(self, slots: np.ndarray):
        self.slots = slots          # positions among the coded columns of the differenced ones
        self.previous: np.ndarray | None = None
        self.file_first = -1        # first row of the row file being written
        self.next_row = -1          # the row after the last one coded

    def stored(self, codes: np.ndarray, first: int, writer, nulls: np.ndarray | None = None) -> np.ndarray:
        """``codes`` (b, q) of rows first .. first + b - 1, with the differenced columns'
        entries replaced by what is stored: the code at each chunk's first row, else the
        difference from the previous row. ``writer`` (``commit.RowPartWriter``) tells whether
        this batch starts a new row file (asked before the batch is handed to it).

        ``nulls`` (b, q) bool or None: cells stored as NULL codes. In a differenced column
        such a cell takes the previous row's code in its chunk (0 at a chunk's first row), so
        its difference is 0 and may be stored as NULL: a running sum that skips NULLs (SQL's
        ``sum``, ``row_differences.undifference`` with NULLs as 0) decodes every other row
        exactly. ``codes`` is updated in place at those cells."""
        b = codes.shape[0]
        if writer.starts_file():
            self.file_first = first
        elif first != self.next_row:
            raise CorruptArchiveError(  # as the writers' other self-checks (table_schemas)
                f"rankfold was about to write rows from {first} on into a row file whose previous rows "
                "this encode pass did not code (difference-coded codes need the previous row); nothing "
                "was committed. This is a defect of rankfold: please report it.")
        rows = np.arange(first, first + b, dtype=np.int64)
        restart = row_differences.chunk_starts(rows, self.file_first) == rows
        previous = self.previous if self.previous is not None else np.zeros(self.slots.size)
        if nulls is not None and b:
            codes[:, self.slots] = row_differences.carry_forward(
                codes[:, self.slots], nulls[:, self.slots], restart, previous)
        out = codes.copy()
        out[:, self.slots] = row_differences.difference(codes[:, self.slots], restart, previous)
        if b:
            self.previous = codes[-1, self.slots].copy()
        self.next_row = first + b
        return out


def encode_pass(stream: Stream, model: FittedModel, writer: ArchiveWriter, *, block_sums=None,
                cells_file: Path | None = None, sub_rows: int | None = None,
                profile_columns: bool = False, code_types: dict[str, pa.DataType] | None = None
                ) -> EncodeResult:
    """Run the encode pass with ``model`` (its numeric and exact columns, mixing, anchor rows,
    transform and scores' right factor, coding and ledger scale) and write the row files (see
    the module docstring).

    Each batch of the stream is written as one table (so its row groups are cut at
    ``layout.ROW_GROUP_ROWS`` from its first row) and gives one ``block_sums`` record per row
    group; the cell-by-cell work runs over sub-blocks of ``sub_rows`` rows (default
    ``sub_block_rows(n)``; any value gives the same results up to the order of floating-point
    summation in the ledger and the sums). With ``profile_columns``, the result also holds
    every column's statistics (``profile.ColumnProfile``) of the rows read.

    ``code_types``: the unsigned type of some residual-code columns (by row-file name; uint32
    for the others), as the archive's earlier row files hold them (an append must write the
    same types: DuckDB reads several files with the first one's types). A code that such a
    type cannot hold in zigzag form is not stored: its cell goes to the exact cells, as any
    code beyond 32 bits does."""
    names, passthrough, mixing = model.names, model.exact_columns, model.mixing
    transform = Transform(model.transform_kind, model.shift, model.scale)
    score_right, coding, ledger_scale = model.scores_right(), model.coding, model.ledger_scale
    width = len(names)
    profile = ColumnProfile.empty(width) if profile_columns else None
    basis = mixing.basis_columns
    ledger = ColumnLedger.empty(width)
    cells = ExactCells(spill_to=cells_file)
    fingerprint = Fingerprint()
    is_basis = np.zeros(width, dtype=bool)
    coded_basis = np.isfinite(coding.basis_step)
    if basis is not None:
        is_basis[basis[~coded_basis]] = True  # exactly stored basis columns
    steps = coding.residual_step
    with_residual = np.flatnonzero(np.isfinite(steps) & ~is_basis)
    tolerance = coding.tolerance
    stored_types = [(code_types or {}).get(layout.CODE_PATTERN.format(int(j)), pa.uint32()) for j in with_residual]
    # zigzag keeps q in [-2^(w-1), 2^(w-1) - 1] within w bits; the symmetric limit 2^(w-1) - 1
    code_limit = np.array([min(2.0 ** (t.bit_width - 1) - 1, _CODE_LIMIT) for t in stored_types])
    # difference-coded columns keep |code| within half the type's limit, so that every stored
    # difference of two codes fits the type too (store/row_differences.py)
    differenced = model.difference[with_residual]
    code_limit = np.where(differenced, [row_differences.code_limit(v) for v in code_limit], code_limit)
    carry = _DifferenceCarry(np.flatnonzero(differenced)) if differenced.any() else None
    if model.packed_codes and [layout.CODE_PATTERN.format(int(j)) for j in with_residual] != model.code_names:
        raise CorruptArchiveError(  # the list's order is the model's (store/packed_codes.py)
            "rankfold was about to pack residual codes of other columns than its model declares; "
            "nothing was committed. This is a defect of rankfold: please report it.")
    kernel = _Kernel(mixing, np.flatnonzero(is_basis), np.flatnonzero(~is_basis), with_residual,
                     steps[with_residual], tolerance, np.flatnonzero(np.isfinite(tolerance) & ~is_basis),
                     np.asarray(ledger_scale, dtype=np.float64), block_sums,
                     with_fingerprint=not profile_columns, code_limit=code_limit,
                     with_row_l2=model.row_ledger)
    step = int(sub_rows) if sub_rows is not None else sub_block_rows(width)
    if step < 1:
        raise InvalidInputError(f"sub_rows must be a positive number of rows; got {sub_rows}.")
    buffers = _Buffers(width)
    # residual codes of a batch (b, q), column-major, kept from one batch to the next: a fresh
    # array per batch page-faults on its first write (measured 0.6 s for 131,072 x 92 codes);
    # nothing refers to it past its batch (the row files store its zigzag form)
    code_buffer = _CodeBuffer(with_residual.size)
    score_rows = sub_block_rows(width)
    anchor_lookup = {int(p): i for i, p in enumerate(model.anchor_positions)}
    # When every column has a tolerance, the row ledger can only tighten bounds below it, so
    # it is kept coarser (4 mantissa bits: at most 12.5% loose, about half a byte per figure).
    ledger_bits = 4 if np.isfinite(tolerance).all() and width else 8
    rows = corrections_count = null_count = 0
    reserved = model.row_file_reserved()
    for first, batch, block, mask in stream:
        b = block.shape[0]
        local_anchors = np.array(sorted(p - first for p in anchor_lookup if first <= p < first + b),
                                 dtype=np.intp)
        for local in local_anchors:
            row = anchor_lookup[first + int(local)]
            same_nulls = mask[local] if mask is not None else np.zeros(width, bool)
            if not (_same_row(block[local], model.anchor_values[row])
                    and np.array_equal(same_nulls, model.anchor_nulls[row])):
                raise SourceChangedError(
                    f"Row {first + local} of the source differs between two passes of one "
                    "compress run. The source must give the same rows in the same order each "
                    "time it is read: add an ORDER BY to the query, or compress a snapshot."
                )
        if basis is not None:
            stored, basis_arrays = (stored_basis(block[:, basis], coding.basis_step, False)
                                    if coded_basis.any() else (block[:, basis], None))
        else:
            scores = np.empty((b, score_right.shape[1]))
            for lo in range(0, b, score_rows):  # stored values: independent of sub_rows
                scores[lo:lo + score_rows] = transform.apply(block[lo:lo + score_rows]) @ score_right
            stored, basis_arrays = stored_basis(scores, coding.basis_step, coding.float32_scores)
        filled = arithmetic.fill_missing(stored, mixing.fill)
        codes = code_buffer.at_least(b)[:b] if with_residual.size else None
        code_nulls = np.zeros((b, with_residual.size), bool)  # cells stored as NULL codes
        row_max, row_l2 = np.empty(b), np.empty(b)
        if b == 0:
            fingerprint.update(first, block)
        for group in range(0, b, layout.ROW_GROUP_ROWS):
            end = min(group + layout.ROW_GROUP_ROWS, b)
            partials = []
            for lo in range(group, end, step):  # sub-blocks tile the row group
                hi = min(lo + step, end)
                piece = kernel.run(first + lo, block[lo:hi], None if mask is None else mask[lo:hi],
                                   filled[lo:hi],
                                   local_anchors[(local_anchors >= lo) & (local_anchors < hi)] - lo,
                                   buffers, (None if codes is None else codes[lo:hi],
                                             row_max[lo:hi], row_l2[lo:hi]))
                ledger.add_stats(piece.block_max, piece.block_l2, piece.block_sum, piece.cells)
                if piece.fingerprint is not None:
                    fingerprint = fingerprint.merge(piece.fingerprint)
                if piece.stored is not None:
                    exact_cells = piece.stored
                    if NULL_CODES and mask is not None and with_residual.size:
                        # NULL cells of coded columns: NULL codes, not exact cells
                        as_null = piece.stored[:, with_residual] & mask[lo:hi][:, with_residual]
                        if as_null.any():
                            exact_cells = piece.stored.copy()
                            exact_cells[:, with_residual] &= ~as_null
                            code_nulls[lo:hi] |= as_null
                            null_count += int(np.count_nonzero(as_null))
                    cells.add(first + lo, exact_cells, block[lo:hi],
                              None if mask is None else mask[lo:hi], piece.over_tolerance)
                corrections_count += piece.corrections
                partials.append(piece.sums)
                if profile is not None:
                    with np.errstate(over="ignore", invalid="ignore"):  # squares beyond ~1e154
                        profile = profile.merge(profile_block(
                            block[lo:hi], None if mask is None else mask[lo:hi]))
            if block_sums is not None:  # per row-group sums for aggregates (store/aggregate.py)
                block_sums.add_partials(first + group, partials, row_max[group:end])
        columns = {layout.ROW_ID: pa.array(np.arange(first, first + b, dtype=np.int64))}
        for name in passthrough:
            columns[name] = batch.column(name)
        if basis is not None:
            for t, k in enumerate(basis):
                if coded_basis[t]:
                    columns[layout.BASIS_PATTERN.format(t)] = basis_arrays[t]
                else:
                    columns[names[k]] = batch.column(names[k])
        else:
            for k, array in enumerate(basis_arrays):
                columns[layout.SCORE_PATTERN.format(k)] = array
        stored_codes = codes
        if carry is not None:
            stored_codes = carry.stored(codes, first, writer, code_nulls if code_nulls.any() else None)
        if model.packed_codes and with_residual.size:  # one list column (store/packed_codes.py)
            columns[layout.PACKED_CODES] = packed_codes.pack(arithmetic.encode_codes(stored_codes),
                                                             code_nulls if code_nulls.any() else None)
        else:
            # NULL codes come only from NULL cells (``mask``)
            with_nulls = code_nulls.any(axis=0) if mask is not None else np.zeros(with_residual.size, bool)
            for t, j in enumerate(with_residual):  # column by column: cache-sized temporaries
                columns[layout.CODE_PATTERN.format(j)] = pa.array(
                    arithmetic.encode_codes(stored_codes[:, t]),
                    mask=code_nulls[:, t] if with_nulls[t] else None).cast(stored_types[t])
        if model.row_ledger:  # without: every bound is the column's (FittedModel.row_ledger)
            columns[layout.ROW_ERR_MAX] = pa.array(arithmetic.round_up_compact(row_max, ledger_bits))
            columns[layout.ROW_ERR_L2] = pa.array(arithmetic.round_up_compact(row_l2, ledger_bits))
        table = pa.table(columns)
        if reserved is not None:  # the format's columns, checked once per pass (table_schemas)
            check_row_schema(table.schema, reserved, f"rows from {first} on", writing=True)
            reserved = None
        writer.write_rows(table, first)
        rows += b
    return EncodeResult(ledger, cells.finish(), fingerprint, rows, corrections_count, profile=profile,
                        null_codes=null_count)
