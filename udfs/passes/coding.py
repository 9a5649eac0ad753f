"""The coding of one compress attempt: residual and basis steps for a tolerance plan, factors
trimmed to what the tolerance needs, and what the trial on a sample of rows chooses (the
predictor of each coded column, the basis rounded or exact or none at all, row differences).

Every choice here only steers sizes: the encode pass measures the archive as written, and no
bound rests on a choice made here (``encode`` module docstring).
"""

from __future__ import annotations

import dataclasses

import numpy as np

from ..store import arithmetic, layout
from ..store.arithmetic import trim_mantissa
from ..store.code_layout import PackingChoice, choose_packing
from ..store.model import Coding, Mixing
from .encode import stored_basis
from .predictors import (choose_differences, choose_predictors, coded_columns, residual_codes, run_differences,
                         values_bytes)
from .profile import ColumnProfile, Transform
from .targets import CELL_BYTES

__all__ = ["coding_for_plan", "trim_factors", "sample_basis", "predictor_trial", "with_row_differences",
           "measured_bytes", "code_packing"]


def coding_for_plan(plan, mixing, build) -> Coding | None:
    """The encode pass's coding for a plan (None: plain factors, no tolerance)."""
    if plan is None:
        return None
    c = mixing.weights.shape[0]
    basis_step = np.full(c, np.nan)
    if build.method == "svd" and np.isfinite(plan.tolerance).any() and c:
        # scores rounded finely: their rounding error, spread over the columns by the weights,
        # stays a quarter of the finest residual step (the residual codes absorb it)
        finite = np.isfinite(plan.tolerance)
        weight_norm = np.sqrt(np.sum(mixing.weights**2, axis=0))
        finest = np.min(2.0 * plan.tolerance[finite] / np.maximum(weight_norm[finite], 1e-300))
        basis_step = np.full(c, 0.25 * finest / np.sqrt(c))
    elif build.method == "cur" and c and np.isfinite(plan.basis_step).any():
        # steps follow the basis as built (sorted source positions), not the plan's order.
        # Rounding the basis by up to step/2 also moves every derived value through the
        # weights; the steps are scaled down until that spread (uniform rounding, RMS
        # sqrt(sum_k w_kj^2 step_k^2 / 12)) stays below 30% of the column's own residual step.
        tolerance = plan.tolerance[mixing.basis_columns]
        basis_step = np.where(np.isfinite(tolerance) & (tolerance > 0), 2.0 * tolerance, np.nan)
        spread = np.sqrt(np.nansum((mixing.weights * basis_step[:, None]) ** 2, axis=0))
        derived = np.isfinite(plan.tolerance) & (spread > 0)
        derived[mixing.basis_columns] = False
        if derived.any():
            with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
                shrink = float(np.min(0.3 * 2.0 * plan.tolerance[derived] / spread[derived]))
            # a derived column with a zero tolerance, or weights so large that the spread
            # overflows, leaves no room to round the basis: it is kept exactly
            basis_step = basis_step * min(1.0, shrink) if np.isfinite(shrink) and shrink > 0 \
                else np.full(c, np.nan)
    # residual steps follow the basis as built too: a column the plan kept as basis that is
    # derived now (a refit may choose other columns) gets the residual coding of its tolerance
    steps = plan.residual_step.copy()
    if mixing.basis_columns is not None:
        moved = np.setdiff1d(plan.basis, mixing.basis_columns)
        if plan.residual != "corrections":
            steps[moved] = 2.0 * plan.tolerance[moved]
        steps[mixing.basis_columns] = np.nan
    return Coding(plan.tolerance, steps, basis_step,
                  float32_scores=build.method == "svd" and not np.isfinite(plan.tolerance).any())


def sample_basis(sample: np.ndarray, mixing: Mixing, coding: Coding, transform: Transform,
                  score_right: np.ndarray | None):
    """The sample's basis values as the encode pass stores them (m, c) and their Arrow arrays."""
    if mixing.basis_columns is not None:
        return stored_basis(sample[:, mixing.basis_columns], coding.basis_step, False)
    scores = np.nan_to_num(transform.apply(sample), nan=0.0) @ score_right
    return stored_basis(scores, coding.basis_step, coding.float32_scores)


def with_row_differences(choice, coding: Coding, numeric: list[str], sample: np.ndarray | None,
                         run_starts: np.ndarray | None, mixing: Mixing, transform: Transform,
                         score_right: np.ndarray | None) -> Coding:
    """``coding`` with the columns whose residual codes are stored as row differences
    (``Coding.difference``): none ('off', the default), every coded column ('all'), the named
    ones, or ('auto') those a trial on the sample measures ``predictors.DIFFERENCE_GAIN``
    smaller (``predictors.choose_differences``). Columns without codes never are."""
    coded = coded_columns(mixing, coding)
    if choice == "off" or not coded.any():
        return coding
    if choice == "all":
        flags = coded
    elif choice == "auto":
        if sample is None or not sample.shape[0]:
            return coding
        stored, _ = sample_basis(sample, mixing, coding, transform, score_right)
        flags = choose_differences(sample, run_starts, mixing, coding, stored)
    else:
        flags = np.isin(np.array(numeric, dtype=object), np.array(list(choice), dtype=object)) & coded
    return dataclasses.replace(coding, difference=flags) if flags.any() else coding


def measured_bytes(sample: np.ndarray, mixing: Mixing, coding: Coding, transform: Transform,
                   anchor_values: np.ndarray, table_rows: int, alone_cache: dict | None = None,
                   layouts: dict | None = None, packing: bool = False) -> tuple[float, dict, bool]:
    """Bytes an archive of ``table_rows`` rows with this CUR ``mixing`` and ``coding`` is
    estimated to take, from ``sample`` (m, n) raw rows (NaN where NULL): the sample's basis
    values as stored and each coded column's codes under the predictor the trial would keep
    (``predictors.choose_predictors``, the real Parquet writer), plus ``targets.CELL_BYTES``
    per sampled cell stored exactly (a column without codes, beyond its tolerance), scaled by
    ``table_rows / m``; plus the measured bytes of the weights and ``anchor_values``, which no
    sample shows. Steers the number of basis columns (``basis_size``); bounds never rest on it.
    Returns the bytes, the layout of each coded column's codes and whether the codes would be
    packed into one list column; ``layouts`` (such layouts of an earlier call) are tried alone
    for the columns they name (``choose_predictors``). With ``packing``, the packing trial
    (:func:`code_packing`) runs too, and where it packs, the codes' bytes are scaled by the
    packed layout's measured share of one column per code."""
    m, n = sample.shape
    stored, arrays = sample_basis(sample, mixing, coding, transform, None)
    choice = choose_predictors(sample, mixing, coding, transform.shift, stored, arrays, alone_cache, layouts)
    uncoded = ~np.isfinite(coding.residual_step) & np.isfinite(coding.tolerance)
    uncoded[mixing.basis_columns] = False
    cells = 0
    if uncoded.any():
        predicted = arithmetic.approximate(arithmetic.fill_missing(stored, mixing.fill),
                                           mixing.weights[:, uncoded], mixing.offset[uncoded])
        with np.errstate(invalid="ignore"):
            cells = int(np.sum(np.abs(sample[:, uncoded] - predicted) > coding.tolerance[uncoded]))
    codes, packed = float(choice.coded_bytes), False
    if packing:
        shown = code_packing(sample, _rounded_alone(mixing, coding, choice.lowrank, transform.shift), coding,
                             transform, None, table_rows)
        if shown is not None and shown.packed:
            codes, packed = codes * shown.packed_bytes / max(shown.columns_bytes, 1), True
    total = (codes + choice.basis_bytes - choice.coded_bytes + cells * CELL_BYTES) * table_rows / max(m, 1) \
        + values_bytes(mixing.weights, anchor_values)
    return total, choice.layouts, packed


def _rounded_alone(mixing: Mixing, coding: Coding, lowrank: np.ndarray, shift: np.ndarray) -> Mixing:
    """``mixing`` with the coded columns the trial rounds alone (``lowrank`` False) predicted by
    their ``shift`` only: zero weights, the shift as offset."""
    coded = coded_columns(mixing, coding)
    alone = coded & ~lowrank
    if not alone.any():
        return mixing
    weights, offset = mixing.weights.copy(), mixing.offset.copy()
    weights[:, alone] = 0.0
    offset[alone] = shift[alone]
    return Mixing(weights, offset, mixing.fill, mixing.basis_columns)


def predictor_trial(sample: np.ndarray, mixing: Mixing, coding: Coding, transform: Transform,
                     score_right: np.ndarray | None, plan, build, table_rows: int,
                     anchor_values: np.ndarray, *, keep_basis: bool = False,
                     exact_basis: Coding | None = None):
    """The predictor of each coded column, whether the basis is rounded or kept exactly, and
    whether to keep the basis at all, by measured trial on the profile pass's sample of runs of
    rows (``predictors.choose_predictors``). Returns the mixing, coding and build to write, or
    None when the trial changes nothing.

    ``coding`` is the plan's; ``exact_basis`` (basis_precision 'auto'), the same coding with the
    basis kept exactly, tried beside it. A column that keeps ``none`` gets zero weights and its
    shift as offset (its codes are the column rounded alone). Without the basis (every column
    rounded alone measured smaller on the sample, scaled to the table's ``table_rows``, than
    with it plus the measured bytes of its weights and ``anchor_values``), the archive has no basis columns, no anchor rows and a step
    of twice its tolerance per column; never with ``keep_basis`` (the user gave the basis size).
    The encode pass measures whatever is chosen: no bound rests on the trial."""
    c = mixing.weights.shape[0]
    if c == 0:
        return None
    tried, alone_cache = [], {}  # columns rounded alone measure the same under either basis
    for candidate in (coding,) if exact_basis is None else (coding, exact_basis):
        stored, arrays = sample_basis(sample, mixing, candidate, transform, score_right)
        tried.append((choose_predictors(sample, mixing, candidate, transform.shift, stored, arrays,
                                        alone_cache), candidate))
    choice, chosen = min(tried, key=lambda pair: pair[0].basis_bytes)
    rows = sample.shape[0]
    notes = []
    if len(tried) == 2:
        rounded, exact = (t[0].basis_bytes for t in tried)
        notes.append(f"basis {'kept exactly' if chosen is exact_basis else 'rounded to the tolerance'} "
                     f"({min(rounded, exact)} against {max(rounded, exact)} bytes on a sample of {rows} rows)")
    width = mixing.weights.shape[1]
    # a basis also costs what no sample shows: its weights and its anchor rows, measured
    fixed = values_bytes(mixing.weights, anchor_values)
    if choice.drop_basis(table_rows, fixed) and plan.residual != "corrections" and not keep_basis:
        alone = Mixing(np.zeros((0, width)), transform.shift.copy(), np.zeros(0),
                       None if mixing.basis_columns is None else np.zeros(0, np.int64))
        tolerance = coding.tolerance
        alone_coding = Coding(tolerance, 2.0 * tolerance, np.zeros(0))
        reason = (f"{build.reason}; no basis: every column rounded alone measured smaller on a sample of "
                  f"{rows} rows ({choice.alone_bytes} against {choice.basis_bytes} bytes, and "
                  f"{int(fixed)} bytes of weights and anchor rows)")
        return alone, alone_coding, dataclasses.replace(build, rank=0, n_columns=0, n_rows=0, reason=reason)
    coded = coded_columns(mixing, chosen)
    alone_columns = coded & ~choice.lowrank
    if alone_columns.any():
        mixing = _rounded_alone(mixing, chosen, choice.lowrank, transform.shift)
        if mixing.basis_columns is not None and np.isfinite(chosen.basis_step).any():
            chosen = coding_for_plan(plan, mixing, build)  # the basis steps follow the remaining weights
        notes.append(f"{int(alone_columns.sum())} of {int(coded.sum())} coded columns rounded alone "
                     f"(smaller than their low-rank residual on a sample of {rows} rows)")
    if not notes:
        return None
    return mixing, chosen, dataclasses.replace(build, reason="; ".join([build.reason, *notes]))


def trim_factors(mixing: Mixing, tolerance: np.ndarray, profile: ColumnProfile) -> Mixing:
    """Trim the mantissas of offsets and weights so that their rounding moves no rebuilt value
    by more than 5% of its column's tolerance: |dw| <= |w| 2^-bits, so a value moves at most
    2^-bits (|offset_j| + sum_k |w_kj| max|x_k|). The encode pass measures with the trimmed
    factors, so bounds hold whatever the trimming did."""
    c = mixing.weights.shape[0]
    if mixing.basis_columns is not None and mixing.basis_columns.size == c:
        reach = np.maximum(np.abs(profile.minimum), np.abs(profile.maximum))[mixing.basis_columns]
        reach = np.where(np.isfinite(reach), reach, 0.0)
    else:
        return mixing  # synthetic scores: keep full precision
    magnitude = np.abs(mixing.offset) + reach @ np.abs(mixing.weights)
    with np.errstate(divide="ignore", invalid="ignore"):
        needed = np.ceil(np.log2(np.where(np.isfinite(tolerance) & (magnitude > 0),
                                          magnitude / (0.05 * tolerance), 2.0**52)))
    bits = np.clip(np.nan_to_num(needed, nan=52), 12, 52).astype(np.int64)
    weights = trim_mantissa(mixing.weights, bits) if c else mixing.weights
    offset = trim_mantissa(mixing.offset[None, :], bits)[0]
    if mixing.basis_columns is not None and c:
        weights[:, mixing.basis_columns] = np.eye(c)
        offset[mixing.basis_columns] = 0.0
    return Mixing(weights, offset, mixing.fill, mixing.basis_columns)


def code_packing(sample: np.ndarray | None, mixing: Mixing, coding: Coding, transform: Transform,
                 score_right: np.ndarray | None, table_rows: int,
                 run_starts: np.ndarray | None = None) -> PackingChoice | None:
    """Whether the row files hold the residual codes as one list column
    (``store/packed_codes.py``) or one column per coded column, by trial with the real writer
    on the sample's codes under this attempt's factors and coding, difference-coded columns as
    differences restarting at each run of the sample (``run_starts``, as
    ``predictors.choose_differences`` measures them) (``code_layout.choose_packing``). None
    (one column each) without a sample, with fewer than two coded columns, or for a table of
    more than one row group (``layout.ROW_GROUP_ROWS`` rows): there each column chunk holds
    131,072 codes and its fixed cost is small beside them unless the codes are all alike, while
    a list column costs at every write and read (measured on an invented 1e6 x 100 table at the
    default tolerance, codes nearly all zero: 5% fewer bytes packed, but compress 3.1-3.3 s ->
    4.1-5.1 s, and every SQL read unpacks all codes of its rows)."""
    coded = coded_columns(mixing, coding)
    if sample is None or not sample.shape[0] or coded.sum() < 2 or table_rows > layout.ROW_GROUP_ROWS:
        return None
    stored, _ = sample_basis(sample, mixing, coding, transform, score_right)
    codes = residual_codes(sample, mixing, coding, stored, np.flatnonzero(coded))  # as the encode pass stores them
    differenced = np.zeros(int(coded.sum()), bool) if coding.difference is None else \
        np.asarray(coding.difference, dtype=bool)[coded]
    if differenced.any():  # stored as differences within each run (restarting at its first row)
        codes[:, differenced] = run_differences(codes[:, differenced], run_starts)
    return choose_packing(arithmetic.encode_codes(codes), np.isnan(sample[:, coded]), table_rows)
