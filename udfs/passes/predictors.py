"""Which prediction each coded column keeps, chosen by measured trial on a sample of rows.

Under a tolerance t_j a column is stored as integer codes of step s_j (about 2 t_j) of what its
prediction leaves over (``encode`` pass). Two predictions are on offer per column:

* ``lowrank``: the CUR (or SVD) prediction from the basis, offset_j + basis @ weights[:, j];
* ``none``: the column's shift alone (weights[:, j] = 0, offset_j = the transform's shift):
  the codes are then the column rounded on its own, as per-column rounding by hand does.

And for the whole archive, with the basis or without it (no basis columns: every column
rounded alone, nothing kept exactly). A low-rank residual can cost more than the column it
came from: it breaks runs of equal values and slowly changing values that zstd and Parquet's
encodings feed on, and a basis column kept exactly costs full float64. No model predicts
that well on real tables (issue 14: the Gaussian size model chose rank 13 where rank 0 was
half the size), so it is measured: the codes of a sample of rows under each choice are written
with the real Parquet writer (``store.code_layout.choose_sample_layouts``: every encoding and
zstd level the row writer tries), and each column keeps the smaller.

The sample (:class:`SampleRuns`) is a seeded uniform sample of whole runs of consecutive rows,
so that what zstd sees inside a run is what it sees in the table: a bottom-k sample of runs by
a counter-based uniform key per (seed, run) (``select.row_uniforms``), mergeable across
partitions and independent of how the rows are split into blocks.

References: bottom-k sampling: E. Cohen, H. Kaplan, "Summarizing data using bottom-k
sketches", PODC 2007. Per-column rounding as the bar: issue 14 (common practice).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa

from ..store import arithmetic
from ..store.code_layout import ColumnLayout, choose_sample_layouts, trial_sizes
from ..store.model import Coding, Mixing
from .commit import ZSTD_LEVEL
from .select import row_uniforms

__all__ = ["SampleRuns", "PredictorChoice", "choose_predictors", "choose_differences", "values_bytes", "RUNS",
           "coded_columns", "residual_codes", "run_differences",
           "RUN_ROWS",
           "SAMPLE_CELLS", "DIFFERENCE_GAIN"]

#: Runs of consecutive rows in the sample, and rows per run (fewer for wide tables, see
#: :func:`run_rows`): 8 runs of 2,048 rows, 16,384 rows in all.
RUNS = 8
RUN_ROWS = 2048
#: Cells kept at most (8 MB of float64): a wide table gets shorter runs.
SAMPLE_CELLS = 1 << 20
_STREAM = 23  # keys the sample's uniforms apart from other uses of row_uniforms


def run_rows(width: int) -> int:
    """Rows per run for ``width`` numeric columns: RUN_ROWS, fewer so that RUNS runs stay
    within SAMPLE_CELLS cells, at least 16."""
    return int(max(16, min(RUN_ROWS, SAMPLE_CELLS // max(RUNS * width, 1))))


@dataclass
class SampleRuns:
    """A bottom-``RUNS`` sample of runs of ``length`` consecutive rows (run r holds rows
    [r length, (r + 1) length)), keyed by ``row_uniforms(seed, _STREAM, r)``.

    ``pieces`` maps a kept run to the (first row, values (b, n) with NaN where NULL) pieces of
    it seen so far; a run split between blocks or partitions is joined in row order."""

    seed: int
    length: int
    pieces: dict[int, list[tuple[int, np.ndarray]]] = field(default_factory=dict)
    _keys: dict[int, float] = field(default_factory=dict, repr=False)

    def _key(self, run: int) -> float:
        key = self._keys.get(run)
        if key is None:
            key = self._keys[run] = float(row_uniforms(self.seed, _STREAM, np.array([run]))[0])
            if len(self._keys) > 4 * RUNS:  # keep the keys of kept runs only
                self._keys = {r: self._keys[r] for r in (*self.pieces, run) if r in self._keys}
        return key

    def _trim(self) -> None:
        if len(self.pieces) > RUNS:
            kept = sorted(self.pieces, key=lambda r: (self._key(r), r))[:RUNS]
            self.pieces = {r: self.pieces[r] for r in kept}

    def add(self, first: int, block: np.ndarray, mask: np.ndarray | None) -> None:
        """Offer the rows first .. first + b - 1 (block (b, n); mask (b, n) True at NULL)."""
        b = block.shape[0]
        if b == 0:
            return
        for run in range(first // self.length, (first + b - 1) // self.length + 1):
            if run not in self.pieces and len(self.pieces) >= RUNS:
                worst = max(self.pieces, key=lambda r: (self._key(r), r))
                if (self._key(run), run) > (self._key(worst), worst):
                    continue
            lo = max(run * self.length, first) - first
            hi = min((run + 1) * self.length, first + b) - first
            values = np.array(block[lo:hi], dtype=np.float64)
            if mask is not None:
                values[mask[lo:hi]] = np.nan
            self.pieces.setdefault(run, []).append((first + lo, values))
            self._trim()

    def merge(self, other: "SampleRuns") -> "SampleRuns":
        merged = SampleRuns(self.seed, self.length, {r: list(p) for r, p in self.pieces.items()},
                            {**self._keys, **other._keys})
        for run, pieces in other.pieces.items():
            merged.pieces.setdefault(run, []).extend(pieces)
        merged._trim()
        return merged

    def run_starts(self) -> np.ndarray:
        """(r,) the first position of each run within :meth:`rows` (int64)."""
        lengths = [sum(values.shape[0] for _, values in self.pieces[run]) for run in sorted(self.pieces)]
        return np.concatenate([[0], np.cumsum(lengths)[:-1]]).astype(np.int64) if lengths else np.zeros(0, np.int64)

    def rows(self, width: int) -> np.ndarray:
        """The sampled rows (m, n), runs in row order, NaN where NULL."""
        blocks = [values for run in sorted(self.pieces)
                  for _, values in sorted(self.pieces[run], key=lambda piece: piece[0])]
        return np.vstack(blocks) if blocks else np.zeros((0, width))


@dataclass(frozen=True)
class PredictorChoice:
    """What the trial chose: ``lowrank`` (n,) True where a coded column keeps the low-rank
    prediction (False: ``none``); ``basis_bytes`` the sample's bytes with the basis (basis
    columns as stored plus each coded column under its choice), ``alone_bytes`` without any
    basis (every column rounded alone; None when that is not on offer)."""

    lowrank: np.ndarray
    basis_bytes: int
    alone_bytes: int | None
    sampled_rows: int = 0
    #: the layout under which each coded column's low-rank codes measured smallest, by column
    layouts: dict[int, ColumnLayout] = field(default_factory=dict)
    #: of ``basis_bytes``, the coded columns' (the rest: the basis columns as stored)
    coded_bytes: int = 0

    def drop_basis(self, rows: int, fixed_bytes: float) -> bool:
        """Whether the archive without a basis is the smaller for a table of ``rows`` rows: the
        sample's bytes scaled to the table, the basis charged ``fixed_bytes`` besides (what a
        basis adds whatever the rows: weights, anchor rows)."""
        if self.alone_bytes is None:
            return False
        scale = rows / max(self.sampled_rows, 1)
        return self.alone_bytes * scale < self.basis_bytes * scale + fixed_bytes


def _stored_codes(values: np.ndarray, step: np.ndarray) -> np.ndarray:
    """Residual codes (m, q) as the encode pass stores them: quantized, 0 where not finite or
    beyond 32 bits (such cells are stored exactly), zigzag uint32."""
    with np.errstate(invalid="ignore", over="ignore"):
        codes = arithmetic.quantize(values, step[None, :])
        codes = np.where(np.isfinite(codes) & (np.abs(codes) <= 2.0**31 - 1), codes, 0.0)
    return arithmetic.encode_codes(codes)


def coded_columns(mixing: Mixing, coding: Coding) -> np.ndarray:
    """(n,) True where a numeric column has residual codes: a finite residual step, and not a
    basis column (basis columns are stored as they are, or rounded on their own step)."""
    coded = np.isfinite(coding.residual_step)
    if mixing.basis_columns is not None:
        coded[mixing.basis_columns] = False
    return coded


def residual_codes(sample: np.ndarray, mixing: Mixing, coding: Coding, stored_basis: np.ndarray,
                   columns: np.ndarray, limit: float = 2.0**31 - 1) -> np.ndarray:
    """Residual codes (m, q) of ``sample``'s (m, n) ``columns`` (q indices) under the low-rank
    prediction from ``stored_basis`` (m, c), before zigzag: quantized at each column's residual
    step, 0 where not finite or beyond ``limit`` in magnitude (such cells are stored exactly)."""
    filled = arithmetic.fill_missing(stored_basis, mixing.fill)
    predicted = arithmetic.approximate(filled, mixing.weights[:, columns], mixing.offset[columns])
    with np.errstate(invalid="ignore", over="ignore"):
        codes = arithmetic.quantize(sample[:, columns] - predicted, coding.residual_step[columns][None, :])
    return np.where(np.isfinite(codes) & (np.abs(codes) <= limit), codes, 0.0)


def run_differences(codes: np.ndarray, run_starts: np.ndarray | None) -> np.ndarray:
    """Each row of ``codes`` (m, q) minus the previous row, restarting (the codes as they are)
    at the first row and at each of ``run_starts`` (r,): the row-difference form
    (``store.row_differences``) on a sample of runs of rows."""
    m = codes.shape[0]
    differences = codes.copy()
    differences[1:] -= codes[:-1]
    first = np.zeros(m, bool)
    if run_starts is not None:
        first[run_starts[run_starts < m]] = True
    first[:1] = True
    differences[first] = codes[first]
    return differences


def _code_bytes(arrays: dict[str, pa.Array]) -> dict[str, int]:
    """Compressed bytes of each sampled code column under its best Parquet encoding at the row
    writer's zstd level (the level itself is chosen later, per column, by the row writer:
    ``commit.code_layouts``; trying every level here tripled the trial's time)."""
    return {name: bytes_ for name, (bytes_, _) in _code_choices(arrays).items()}


def _code_choices(arrays: dict[str, pa.Array], layouts: dict[str, ColumnLayout] | None = None
                  ) -> dict[str, tuple[int, ColumnLayout]]:
    """(bytes, layout) of each sampled code column: under its best encoding as in
    :func:`_code_bytes`, or, for the columns ``layouts`` names, under that layout alone (one
    file for all of them: a quarter of the writes)."""
    if not arrays:
        return {}
    given = {name: lay for name, lay in (layouts or {}).items() if name in arrays}
    out = {}
    if given:
        for name, by in trial_sizes({n: arrays[n] for n in given}, given).items():
            out[name] = (by[given[name]], given[name])
    rest = {name: a for name, a in arrays.items() if name not in given}
    if rest:
        for name, choice in choose_sample_layouts(rest, levels=(ZSTD_LEVEL,)).items():
            out[name] = (choice.sampled_bytes, choice.layout)
    return out


def values_bytes(*blocks: np.ndarray) -> int:
    """Compressed bytes of float64 blocks (each flattened: weights, anchor rows) written as the
    small tables write numbers: the smaller of dictionary and byte-stream-split at zstd level 3
    (``commit.write_small_table`` also tries other levels; this is a close upper estimate)."""
    return sum(_value_bytes({"v": pa.array(np.ravel(b).astype(np.float64))}) for b in blocks if np.size(b))


def _value_bytes(arrays: dict[str, pa.Array]) -> int:
    """Compressed bytes of stored basis columns (float or integer values) as the row writer
    writes them: the smaller of dictionary and byte-stream-split at its zstd level."""
    if not arrays:
        return 0
    tried = trial_sizes(arrays, [ColumnLayout("dictionary", ZSTD_LEVEL), ColumnLayout("BYTE_STREAM_SPLIT", ZSTD_LEVEL)])
    return int(sum(min(by.values()) for by in tried.values()))


def _alone_bytes(sample: np.ndarray, shift: np.ndarray, wanted: set[tuple[int, float]],
                 cache: dict[tuple[int, float], int]) -> None:
    """Fill ``cache`` with the sample's bytes of column j rounded alone (its shift as the
    prediction) at step s, for every (j, s) of ``wanted`` not in it yet: one trial for all."""
    missing = sorted(wanted - set(cache))
    arrays = {f"a{k}": pa.array(_stored_codes(sample[:, [j]] - shift[j], np.array([step]))[:, 0])
              for k, (j, step) in enumerate(missing)}
    sizes = _code_bytes(arrays)
    for k, key in enumerate(missing):
        cache[key] = sizes[f"a{k}"]


def choose_predictors(sample: np.ndarray, mixing: Mixing, coding: Coding, shift: np.ndarray,
                      stored_basis: np.ndarray, basis_arrays: list[pa.Array],
                      alone_cache: dict[tuple[int, float], int] | None = None,
                      layouts: dict[int, ColumnLayout] | None = None) -> PredictorChoice:
    """The trial (module docstring) on ``sample`` (m, n) raw rows, NaN where NULL.

    ``mixing`` and ``coding`` are the fitted archive's (weights (c, n), residual steps (n,));
    ``shift`` (n,) the transform's shift, the ``none`` prediction; ``stored_basis`` (m, c) the
    sample's basis values as stored (NaN where missing) and ``basis_arrays`` the c Arrow arrays
    that store them. Only columns with residual codes (a finite step, not a basis column) are
    offered ``none``; dropping the basis is on offer only when every column has a finite step
    of its own (2 t_j) so that each can be rounded alone. ``alone_cache``: bytes of columns
    rounded alone, by (column, step), shared between trials of the same sample (they do not
    depend on the basis), filled here. ``layouts``: a column named there has its low-rank codes
    measured under that layout alone (the layouts of an earlier choice, ``PredictorChoice.layouts``:
    a cheaper trial for comparing sizes of the basis, ``basis_size``)."""
    m, n = sample.shape
    cache = {} if alone_cache is None else alone_cache
    steps = coding.residual_step
    coded = np.flatnonzero(coded_columns(mixing, coding))
    own_step = 2.0 * coding.tolerance
    offer_alone = bool(stored_basis.shape[1]) and np.isfinite(own_step).all() and np.all(own_step > 0)
    wanted = {(int(j), float(steps[j])) for j in coded}
    if offer_alone:
        wanted |= {(j, float(own_step[j])) for j in range(n)}
    _alone_bytes(sample, shift, wanted, cache)
    codes = arithmetic.encode_codes(residual_codes(sample, mixing, coding, stored_basis, coded))
    low = _code_choices({f"l{j}": pa.array(codes[:, t]) for t, j in enumerate(coded)},
                        {f"l{j}": lay for j, lay in (layouts or {}).items()})
    lowrank = np.ones(n, bool)
    coded_bytes = 0
    for j in coded:
        alone_j = cache[int(j), float(steps[j])]
        lowrank[j] = low[f"l{j}"][0] <= alone_j
        coded_bytes += min(low[f"l{j}"][0], alone_j)
    basis_bytes = coded_bytes + _value_bytes({f"b{k}": a for k, a in enumerate(basis_arrays)})
    alone = int(sum(cache[j, float(own_step[j])] for j in range(n))) if offer_alone else None
    return PredictorChoice(lowrank, int(basis_bytes), alone, m, {int(j): low[f"l{j}"][1] for j in coded},
                           int(coded_bytes))


#: Row differences are kept for a column only when they measure at least this much smaller
#: than its plain codes: they make SQL filters outside rankfold_scan decode whole chunks
#: (DEVELOPERS.md, "Row differences"), which a few percent do not pay for.
DIFFERENCE_GAIN = 0.10


def choose_differences(sample: np.ndarray, run_starts: np.ndarray, mixing: Mixing, coding: Coding,
                       stored_basis: np.ndarray) -> np.ndarray:
    """(n,) True where a coded column's residual codes measure at least ``DIFFERENCE_GAIN``
    smaller stored as differences from the previous row's code (``store.row_differences``)
    than as they are, on ``sample`` (m, n) raw rows (NaN where NULL) under the archive's final
    ``mixing`` and ``coding``; differences restart at each run of the sample (``run_starts``
    (r,)), as the archive's restart chunks make them restart (every 8,192 rows and at each row
    file's start). Both forms are written with the real writer (``_code_bytes``)."""
    m, n = sample.shape
    coded = np.flatnonzero(coded_columns(mixing, coding))
    flags = np.zeros(n, bool)
    if not coded.size or m < 2:
        return flags
    # at most 2^30 - 1: a difference of two such codes still fits the zigzag uint32
    codes = residual_codes(sample, mixing, coding, stored_basis, coded, limit=2.0**30 - 1)
    differences = run_differences(codes, run_starts)
    arrays = {}
    for t, j in enumerate(coded):
        arrays[f"p{j}"] = pa.array(arithmetic.encode_codes(codes[:, t]))
        arrays[f"d{j}"] = pa.array(arithmetic.encode_codes(differences[:, t]))
    sizes = _code_bytes(arrays)
    for j in coded:
        flags[j] = sizes[f"d{j}"] <= (1.0 - DIFFERENCE_GAIN) * sizes[f"p{j}"]
    return flags
