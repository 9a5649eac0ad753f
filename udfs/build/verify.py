"""Pass 4, verify: rebuild every block from the factors exactly as they will be stored,
measure the residual, fill the error ledger, route cells that cannot be approximated to the
exact-cell table, and write the row files.

Guarantee established here: for every approximated cell (i, j),
|x_ij - xhat_ij| <= min(scale_j * err_max_row_i, err_max_col_j) + slack_ij, where scale_j is
the column's ledger scale (its standard deviation, 1 when that is 0), the row figures are in
those units, and xhat is computed by ``store.arithmetic`` in any evaluation order (see its
docstring for the slack). Cells of exactly stored basis columns, anchor rows and NULL, NaN,
+-inf or overflowing cells are stored exactly (error 0).

With a tolerance t_j (``Coding``), every approximated cell also satisfies
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

from ..errors import SourceChangedError
from ..store import arithmetic, layout
from .commit import CELLS_SCHEMA, ArchiveWriter
from .link import Mixing
from .profile import Fingerprint, Transform
from .select import AnchorRows

__all__ = ["ColumnLedger", "ExactCells", "verify_pass"]

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
        """Add a block: ``errors`` (b, n) holds the residual of approximated cells and 0 elsewhere."""
        e = errors
        block_max = np.abs(e).max(axis=0) if e.size else np.zeros(e.shape[1])
        block_l2 = _norms(e, block_max, axis=0)
        self.err_max = np.maximum(self.err_max, block_max)
        self.err_l2 = np.hypot(self.err_l2, block_l2)
        self.err_sum += e.sum(axis=0)
        self.cells += np.count_nonzero(approximated, axis=0)

    def merge(self, other: "ColumnLedger") -> "ColumnLedger":
        """The ledger of two disjoint row sets (associative: max, hypot, sums)."""
        return ColumnLedger(np.maximum(self.err_max, other.err_max), np.hypot(self.err_l2, other.err_l2),
                            self.err_sum + other.err_sum, self.cells + other.cells)


# Exact cells buffered in memory before they are written out (with ``spill_to``)
SPILL_CELLS = 1 << 18


@dataclass
class ExactCells:
    """Cells stored exactly outside basis columns and anchor rows.

    With ``spill_to`` (a file path), cells go to that Parquet file every ``SPILL_CELLS``
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

    def _buffered(self) -> int:
        return int(sum(r.size for r in self.rows))

    def _spill(self) -> None:
        if not self.rows:
            return
        table = self.table()
        if self._writer is None:
            self._writer = pq.ParquetWriter(self.spill_to, table.schema, compression="zstd")
        self._writer.write_table(table)
        self.spilled += table.num_rows
        self.written = True
        for parts in (self.rows, self.columns, self.values, self.nulls, self.reasons):
            parts.clear()

    def finish(self) -> "ExactCells":
        """Write what is buffered (with ``spill_to``) and close the file."""
        if self.spill_to is not None:
            self._spill()
            if self._writer is not None:
                self._writer.close()
                self._writer = None
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
        cat = (lambda parts, dtype: np.concatenate(parts) if parts else np.zeros(0, dtype))
        nulls = cat(self.nulls, bool)
        return pa.table({
            layout.ROW_ID: pa.array(cat(self.rows, np.int64), pa.int64()),
            layout.COLUMN_ID: pa.array(cat(self.columns, np.int32), pa.int32()),
            "value": pa.array(cat(self.values, np.float64), pa.float64(), mask=nulls),
            "reason": pa.array(cat(self.reasons, object), pa.string()).dictionary_encode(),
        }, schema=CELLS_SCHEMA)

    @property
    def count(self) -> int:
        return self.spilled + self._buffered()


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
class Coding:
    """How values are coded beyond the factors (arrays over the n numeric columns, or over the
    c basis entries for ``basis_step``).

    tolerance: guaranteed max abs error per column (inf: none); approximated cells whose
        error plus slack would exceed it are stored exactly as corrections.
    residual_step: step of the quantized residual per column (NaN: no residual stored).
    basis_step: step of stored basis values or scores (NaN: stored exactly / as float64).
    float32_scores: SVD scores stored as float32 (when no step is set).
    """

    tolerance: np.ndarray
    residual_step: np.ndarray
    basis_step: np.ndarray
    float32_scores: bool = False

    @classmethod
    def plain(cls, width: int, basis: int) -> "Coding":
        return cls(np.full(width, np.inf), np.full(width, np.nan), np.full(basis, np.nan))


@dataclass
class VerifyResult:
    ledger: ColumnLedger
    cells: ExactCells
    fingerprint: Fingerprint
    rows: int
    corrections: int = 0
    basis_fill: np.ndarray | None = None

    @staticmethod
    def merge(results: list["VerifyResult"], width: int) -> "VerifyResult":
        """One result from the results of disjoint partitions (cells stay in their files)."""
        ledger, fingerprint = ColumnLedger.empty(width), Fingerprint()
        cells = ExactCells()
        for r in results:
            ledger = ledger.merge(r.ledger)
            fingerprint = fingerprint.merge(r.fingerprint)
            cells.spilled += r.cells.count
        return VerifyResult(ledger, cells, fingerprint, sum(r.rows for r in results),
                            sum(r.corrections for r in results))


_CODE_LIMIT = 2.0**31 - 1  # residual codes are stored as int32


def _stored_basis(raw: np.ndarray, step: np.ndarray, float32: bool):
    """Basis values as stored, and the Arrow arrays that store them (NaN = NULL)."""
    coded = np.isfinite(step)
    values = raw.copy()
    arrays = []
    for k in range(raw.shape[1]):
        column = raw[:, k]
        if coded[k]:
            codes = arithmetic.quantize(column, step[k])
            bad = ~np.isfinite(codes) | (np.abs(codes) > _CODE_LIMIT)
            codes = np.where(bad, 0.0, codes)
            values[:, k] = np.where(bad, np.nan, codes * step[k])
            arrays.append(pa.array(codes.astype(np.int32), pa.int32(), mask=bad))
        elif float32:
            narrow = column.astype(np.float32)
            values[:, k] = narrow.astype(np.float64)
            arrays.append(pa.array(narrow, pa.float32(), mask=~np.isfinite(column)))
        else:
            arrays.append(pa.array(column, pa.float64(), mask=~np.isfinite(column)))
    return values, arrays


def verify_pass(
    stream: Stream,
    names: list[str],
    passthrough: list[str],
    mixing: Mixing,
    anchors: AnchorRows,
    transform: Transform,
    score_right: np.ndarray | None,
    writer: ArchiveWriter,
    ledger_scale: np.ndarray,
    coding: Coding | None = None,
    block_sums=None,
    cells_file: Path | None = None,
) -> VerifyResult:
    """Run the verify pass and write the row files (see the module docstring)."""
    width = len(names)
    basis = mixing.basis_columns
    coding = coding or Coding.plain(width, mixing.weights.shape[0])
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
    has_tolerance = bool(np.isfinite(tolerance).any())
    anchor_lookup = {int(p): i for i, p in enumerate(anchors.positions)}
    # When every column has a tolerance, the row ledger can only tighten bounds below it, so
    # it is kept coarser (4 mantissa bits: at most 12.5% loose, about half a byte per figure).
    ledger_bits = 4 if np.isfinite(tolerance).all() and width else 8
    rows = corrections_count = 0
    for first, batch, block, mask in stream:
        b = block.shape[0]
        if basis is not None:
            stored, basis_arrays = (_stored_basis(block[:, basis], coding.basis_step, False)
                                    if coded_basis.any() else (block[:, basis], None))
            filled = arithmetic.fill_missing(stored, mixing.fill)
        else:
            scores = transform.apply(block) @ score_right
            filled, basis_arrays = _stored_basis(scores, coding.basis_step, coding.float32_scores)
            filled = arithmetic.fill_missing(filled, mixing.fill)
        xhat = arithmetic.approximate(filled, mixing.weights, mixing.offset)
        codes = None
        if with_residual.size:
            with np.errstate(invalid="ignore", over="ignore"):
                codes = np.zeros((b, width))
                raw_codes = arithmetic.quantize(block[:, with_residual] - xhat[:, with_residual],
                                                steps[with_residual])
                usable = np.isfinite(raw_codes) & (np.abs(raw_codes) <= _CODE_LIMIT)
                codes[:, with_residual] = np.where(usable, raw_codes, 0.0)
            residual_term = codes * np.where(np.isfinite(steps), steps, 0.0)[None, :]
            xhat = arithmetic.add_residual(xhat, codes, steps)
        else:
            residual_term = None
        slack = arithmetic.slack(filled, mixing.weights, mixing.offset, residual_term)
        with np.errstate(invalid="ignore", over="ignore"):
            residual = block - xhat
        source_exceptional = ~np.isfinite(block)
        unstable = ~np.isfinite(residual) | ~np.isfinite(slack)
        kept_exact = np.zeros((b, width), dtype=bool)
        kept_exact[:, is_basis] = True
        local_anchors = [p - first for p in anchor_lookup if first <= p < first + b]
        for local in local_anchors:
            row = anchor_lookup[first + local]
            same_nulls = mask[local] if mask is not None else np.zeros(width, bool)
            if not (_same_row(block[local], anchors.values[row])
                    and np.array_equal(same_nulls, anchors.nulls[row])):
                raise SourceChangedError(
                    f"Row {first + local} of the source differs between two passes of one "
                    "compress run. The source must give the same rows in the same order each "
                    "time it is read: add an ORDER BY to the query, or compress a snapshot."
                )
            kept_exact[local] = True
        # a cell is approximated only if its error, measured here and moved up past its own
        # rounding, plus the slack of any later rebuild, stays within the column's tolerance
        with np.errstate(invalid="ignore", over="ignore"):
            over_tolerance = (~(arithmetic.round_up(np.abs(residual)) + slack <= tolerance[None, :])
                              if has_tolerance else np.zeros((b, width), dtype=bool))
        over_tolerance &= ~(kept_exact | source_exceptional | unstable)
        stored_cells = (source_exceptional | unstable | over_tolerance) & ~kept_exact
        cells.add(first, stored_cells, block, mask, over_tolerance)
        corrections_count += int(over_tolerance.sum())
        approximated = ~(kept_exact | stored_cells)
        errors = np.where(approximated, residual, 0.0)  # the residual of approximated cells only
        ledger.add(errors, approximated)
        # row figures are in units of each column's ledger scale (its standard deviation),
        # so one row figure bounds every column of the row, whatever the columns' units
        abs_e = np.abs(errors)
        abs_e /= ledger_scale[None, :]
        row_max = abs_e.max(axis=1) if width else np.zeros(b)
        row_l2 = _norms(abs_e, row_max, axis=1)
        fingerprint.update(first, block)
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
        for j in with_residual:
            columns[layout.CODE_PATTERN.format(j)] = pa.array(arithmetic.encode_codes(codes[:, j]))
        columns[layout.ROW_ERR_MAX] = pa.array(arithmetic.round_up_compact(row_max, ledger_bits))
        columns[layout.ROW_ERR_L2] = pa.array(arithmetic.round_up_compact(row_l2, ledger_bits))
        writer.write_rows(pa.table(columns), first)
        if block_sums is not None:  # per row-group sums for aggregates (store/aggregate.py)
            block_sums.add(first, filled, codes, xhat, block, mask, approximated, row_max)
        rows += b
    return VerifyResult(ledger, cells.finish(), fingerprint, rows, corrections_count)
