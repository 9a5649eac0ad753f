"""Error and size targets: turn "keep every value within 0.05 kPa", "1% relative error" or
"make it 20 MB" into a rank, a number of basis columns and a residual coding per column.

The size model predicts, from the sketch alone (no pass over the rows), the residual of every
column for every number of basis columns c, and from it the bytes each choice costs:

* The residual of column j after the least-squares fit on the first c pivoted-QR columns is
  the norm of R[c:, j] in the pivoted QR of the sketch factor F (F^T F = Z^T Z), for all c at
  once (Businger-Golub column pivoting). For synthetic SVD factors it is
  sqrt(sum_{l >= k} s_l^2 V[j, l]^2) (Eckart-Young).
* A residual coded as integers with step 2t (t = tolerance) costs the entropy of a quantized
  Gaussian of standard deviation sigma: about log2(sigma / step) + log2(sqrt(2 pi e)) bits per
  cell when sigma >> step (Cover, Thomas, "Elements of Information Theory", 2nd ed., 2006,
  Theorem 8.3.1), computed exactly from the normal distribution below that.
* Cells whose residual exceeds t can instead be stored one by one (about 14 bytes each
  after compression, measured on cells.parquet); the expected share is 2 Phi(-t / sigma).

The encode pass then measures what was actually achieved; the bound never rests on the model.
"""

from __future__ import annotations

import io
from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import scipy.linalg
from scipy.special import ndtr  # standard normal CDF, as scipy.stats.norm.cdf (lighter import)

__all__ = ["column_bytes", "Plan", "PredictedResiduals", "quantized_entropy_bits", "cur_residuals",
           "svd_residuals", "plan_for_tolerance", "plan_for_bytes", "plan_for_rel_error"]

# bytes per exactly stored cell in cells.parquet (row int64 + column int32 + value, zstd),
# measured on archives of the demo scenario: 11-16 bytes per cell
CELL_BYTES = 14.0
# zstd and Parquet's dictionary/bit-packing reach the entropy of small integer codes within
# this factor (measured 1.05-1.25 on quantized Gaussian residuals)
CODING_OVERHEAD = 1.15
_LOG2_SQRT_2PI_E = 0.5 * np.log2(2 * np.pi * np.e)


def column_bytes(batch: pa.RecordBatch) -> dict[str, float]:
    """Measured bytes per value of each column of a sample batch, as Parquet zstd (the
    smaller of dictionary/plain and byte-stream-split for floats)."""
    out = {}
    for name in batch.schema.names:
        column = batch.column(name)
        sizes = []
        for bss in ((False, True) if pa.types.is_floating(column.type) else (False,)):
            sink = io.BytesIO()
            pq.write_table(pa.table({"v": column}), sink, compression="zstd",
                           use_dictionary=not bss,
                           column_encoding={"v": "BYTE_STREAM_SPLIT"} if bss else None)
            sizes.append(sink.tell())
        out[name] = min(sizes) / max(batch.num_rows, 1)
    return out


def quantized_entropy_bits(ratio: np.ndarray) -> np.ndarray:
    """Entropy in bits of round(N(0, sigma^2) / step) for ratio = sigma / step (any shape)."""
    ratio = np.asarray(ratio, dtype=np.float64)
    out = np.where(ratio > 0, np.log2(np.maximum(ratio, 1e-300)) + _LOG2_SQRT_2PI_E, 0.0)
    small = (ratio > 0) & (ratio < 4)
    if small.any():
        r = ratio[small][:, None]
        edges = np.arange(-40.5, 41.5, 1.0)[None, :]
        cdf = ndtr(edges / r)
        p = np.diff(cdf, axis=1)
        with np.errstate(divide="ignore", invalid="ignore"):
            h = -np.sum(np.where(p > 0, p * np.log2(p), 0.0), axis=1)
        out[small] = h
    return np.maximum(out, 0.0)


def cur_residuals(sketch_factor: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(order, res): the pivoted-QR column order of F (n,) and res (n + 1, n), the predicted
    residual norm of every column (transformed units) when the first c columns of ``order``
    are the basis, for c = 0..n (least-squares fit on them)."""
    _, r, order = scipy.linalg.qr(sketch_factor, pivoting=True, mode="economic")
    n = sketch_factor.shape[1]
    rr = np.zeros((n, n))
    rr[: r.shape[0]] = r
    tail = np.cumsum((rr**2)[::-1], axis=0)[::-1]  # tail[c, p] = sum_{i >= c} R[i, p]^2
    res_by_position = np.sqrt(np.vstack([tail, np.zeros((1, n))]))
    res = np.empty_like(res_by_position)
    res[:, order] = res_by_position
    return np.asarray(order), res


def svd_residuals(values: np.ndarray, right: np.ndarray) -> np.ndarray:
    """res (p + 1, n): residual norm of every column at ranks 0..p (Eckart-Young)."""
    energy = (values[None, :] * right) ** 2  # (n, p)
    tail = np.cumsum(energy[:, ::-1], axis=1)[:, ::-1]
    return np.sqrt(np.hstack([tail, np.zeros((right.shape[0], 1))])).T


@dataclass
class Plan:
    """A chosen configuration: ``method`` ('cur' or 'svd'), ``rank`` k, ``columns`` c (basis
    columns or scores), per-column ``residual_step`` (NaN: none) and ``tolerance`` (inf: none),
    ``basis_step`` for stored basis values (NaN: exact), predicted ``bytes`` and ``error``."""

    method: str
    rank: int
    columns: int
    tolerance: np.ndarray
    residual_step: np.ndarray
    basis_step: np.ndarray = field(default_factory=lambda: np.zeros(0))
    basis: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))
    residual: str = "auto"
    predicted_bytes: float = 0.0
    predicted_error: float = 0.0
    reason: str = ""


def _coding_cost(sigma: np.ndarray, tolerance: np.ndarray, rows: int, residual: str):
    """Per-column bytes and residual steps for residual sigma (raw units) at ``tolerance``."""
    step = 2.0 * tolerance
    finite = np.isfinite(tolerance)
    # over: a huge tolerance over a tiny residual is +inf, whose tail share is 0 as it should be
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        ratio = np.where(finite, sigma / np.where(finite, step, 1.0), 0.0)
        share = np.where(finite & (sigma > 0),
                         2.0 * ndtr(-np.where(sigma > 0, tolerance / np.maximum(sigma, 1e-300), np.inf)), 0.0)
    quantized = rows * quantized_entropy_bits(ratio) / 8.0 * CODING_OVERHEAD
    corrections = rows * share * CELL_BYTES
    if residual == "quantized":
        use = finite
    elif residual == "corrections":
        use = np.zeros_like(finite)
    else:
        use = finite & (quantized < corrections)
    cost = np.where(use, quantized, corrections)
    return cost, np.where(use, step, np.nan)


@dataclass(frozen=True)
class PredictedResiduals:
    """What the sketch predicts for one method, before any pass: ``res`` (p + 1, n), the
    residual norm of every column (transformed units) with c = 0..p basis columns or scores
    (:func:`cur_residuals`: the first c of ``order``; :func:`svd_residuals`: ``order`` None);
    ``scale`` (n,) converts transformed units to raw units; the table has ``rows`` rows."""

    method: str
    res: np.ndarray
    order: np.ndarray | None
    scale: np.ndarray
    rows: int

    @classmethod
    def of_cur(cls, sketch_factor: np.ndarray, scale: np.ndarray, rows: int) -> "PredictedResiduals":
        order, res = cur_residuals(sketch_factor)
        return cls("cur", res, order, scale, rows)

    @classmethod
    def of_svd(cls, spectrum, scale: np.ndarray, rows: int) -> "PredictedResiduals":
        """From a spectrum with ``values`` (p,) and ``right`` (n, p)."""
        return cls("svd", svd_residuals(spectrum.values, spectrum.right), None, scale, rows)

    @property
    def width(self) -> int:
        return self.res.shape[1]

    def sigma(self, columns: int) -> np.ndarray:
        """Predicted per-cell residual RMS of every column (raw units) with ``columns`` basis
        columns or scores."""
        return self.res[columns] * self.scale / np.sqrt(max(self.rows, 1))


@dataclass(frozen=True)
class ToleranceCoding:
    """How the residual and the basis are coded under a tolerance: ``residual`` ('auto',
    'quantized', 'corrections') and ``basis_precision`` ('auto', 'exact', 'tolerance'); ``std`` (n,)
    the columns' standard deviations and ``exact_bytes`` (n,) the measured bytes per value of
    each column stored exactly."""

    residual: str
    basis_precision: str
    std: np.ndarray
    exact_bytes: np.ndarray


def plan_for_tolerance(predicted: PredictedResiduals, tolerance: np.ndarray, coding: ToleranceCoding,
                       sizes: list[tuple[int, int]], *, reason: str) -> Plan:
    """The configuration with the fewest predicted bytes that meets ``tolerance`` (n,)
    everywhere, among the candidate (rank, basis columns) ``sizes``; ``reason`` is recorded
    with it (the manifest's ``rank_reason``)."""
    rows, width = predicted.rows, predicted.width
    best: Plan | None = None
    for rank, c in sizes:
        # i.i.d. draws may ask for more columns than there are; repeats are merged, so the
        # basis holds at most every column (predicted like the first min(c, n) of the order)
        k = min(c, width)
        cost, step = _coding_cost(predicted.sigma(k), tolerance, rows, coding.residual)
        basis_step = np.full(c, np.nan)
        if predicted.method == "cur":
            basis = predicted.order[:c]
            cost[basis] = 0.0
            step[basis] = np.nan
            if coding.basis_precision in ("tolerance", "auto"):
                # a zero tolerance (a constant column under max_std_error) keeps it exactly
                finite = np.isfinite(tolerance[basis]) & (tolerance[basis] > 0)
                basis_step = np.where(finite, 2.0 * tolerance[basis], np.nan)
                ratio = np.where(finite, coding.std[basis] / np.where(finite, basis_step, 1.0), 0.0)
                basis_cost = np.where(finite, rows * quantized_entropy_bits(ratio) / 8.0 * CODING_OVERHEAD,
                                      rows * coding.exact_bytes[basis])
                if coding.basis_precision == "auto":  # the trial keeps the smaller (coding.predictor_trial)
                    basis_cost = np.minimum(basis_cost, rows * coding.exact_bytes[basis])
            else:
                basis_cost = rows * coding.exact_bytes[basis]
            anchors = 2 * c * width * 8.0
        else:
            # scores quantized finely enough that their rounding adds little to the residual
            basis_cost = np.array([rows * c * 2.0])
            anchors = 0.0
        total = float(cost.sum() + basis_cost.sum() + anchors + c * width * 8.0)
        plan = Plan(predicted.method, rank, c, tolerance, step, basis_step,
                    predicted.order[:c] if predicted.method == "cur" else np.zeros(0, np.int64),
                    coding.residual, total, float(np.sqrt(np.sum((predicted.res[k]) ** 2))), reason)
        if best is None or plan.predicted_bytes < best.predicted_bytes:
            best = plan
    return best


def plan_for_rel_error(target: np.ndarray, res: np.ndarray, column_norms: np.ndarray,
                       total_norm: float, per_column: bool, max_columns: int) -> int:
    """Fewest columns c whose predicted relative Frobenius error meets ``target``: the whole
    table (target[0]) or every named column (target finite), in transformed units."""
    for c in range(0, max_columns + 1):
        if per_column:
            named = np.isfinite(target)
            with np.errstate(divide="ignore", invalid="ignore"):
                rel = np.where(column_norms > 0, res[c] / column_norms, 0.0)
            if np.all(rel[named] <= target[named]):
                return c
        elif np.sqrt(np.sum(res[c] ** 2)) <= target[0] * total_norm:
            return c
    return max_columns


def plan_for_bytes(budget: float, candidates: list[PredictedResiduals], exact_bytes: np.ndarray,
                   fixed_bytes: float) -> Plan | None:
    """The configuration with the smallest predicted Frobenius error within ``budget`` bytes,
    over the methods of ``candidates``; ``exact_bytes`` (n,) are the measured bytes per value
    of each column stored exactly, ``fixed_bytes`` the bytes every choice pays (exactly kept
    columns, row ids)."""
    best: Plan | None = None
    for predicted in candidates:
        rows, width, res, order = predicted.rows, predicted.width, predicted.res, predicted.order
        none = np.full(width, np.inf)
        nan = np.full(width, np.nan)
        for c in range(1, res.shape[0]):
            if predicted.method == "cur":
                size = fixed_bytes + rows * exact_bytes[order[:c]].sum() + 3 * c * width * 8.0
            else:
                size = fixed_bytes + rows * c * 3.8 + c * width * 8.0  # float32 scores
            if size > budget:
                break
            error = float(np.sqrt(np.sum(res[c] ** 2)))
            if best is None or error < best.predicted_error:
                cur = predicted.method == "cur"
                best = Plan(predicted.method, (c + 1) // 2 if cur else c, c, none, nan,
                            np.full(c, np.nan), order[:c] if cur else np.zeros(0, np.int64),
                            "auto", size, error,
                            "smallest predicted error within target_bytes")
    return best
