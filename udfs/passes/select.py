"""Select: the sketch of the transformed table (its Gram matrix, from the profile pass or
from a refit's own pass) and its spectrum, from which basis columns are chosen; then, for
the links that keep anchor rows (not the default cx), one more pass to choose them.

Row choices:
* ``qdeim``: Q-DEIM on the top-k left singular vectors, topped up by leverage. The rows
  with the largest leverage form a bounded candidate pool (pivoted QR takes large-norm rows
  first, so the pool, eight times the row count, holds the rows it would pick); greedy pivoting
  on raw rows is avoided because it takes spike rows first (measured 8-15x the optimum).
* ``leverage`` / ``length_squared``: weighted sampling in one pass with reservoirs
  (with replacement for the published estimators, distinct rows otherwise).

Every random number belongs to a global row position (``row_uniforms``: a counter-based
generator keyed by seed and position), and candidates are ranked by (key, position), so
partitions can be scanned apart and merged (``anchor_partial`` / ``merge_anchor_partials``)
with the same result whatever the partitioning or executor.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..factor import cur as _cur
from ..factor import selection
from ..factor.sketch import GramSketch, RowGram, Spectrum
from .profile import Transform

__all__ = ["Sketch", "sketch_of", "AnchorRows", "AnchorPartial",
           "AnchorScan", "anchor_partial", "merge_anchor_partials", "row_uniforms"]


@dataclass
class Sketch:
    """A factor F (p x n, p = n, or p = min(m, n) for a wide table) with F^T F = Z^T Z of
    the transformed table Z, and its spectrum."""

    r: np.ndarray
    spectrum: Spectrum


def sketch_of(gram: GramSketch | RowGram) -> Sketch:
    """The sketch of an accumulated (possibly merged) Gram matrix, or of the rows of a wide
    table (``RowGram``: through the m x m side, no n x n matrix)."""
    if isinstance(gram, RowGram):
        return Sketch(*gram.factor_and_spectrum())
    values, right = gram.eigen()
    return Sketch(values[:, None] * right.T, Spectrum(values, right))


@dataclass
class AnchorRows:
    """Chosen anchor rows: sorted positions (r,), raw values (r, n) and NULL mask (r, n)."""

    positions: np.ndarray
    values: np.ndarray
    nulls: np.ndarray


class _RowKeeper:
    """Keeps raw copies of the rows that are currently selected, dropping the others."""

    def __init__(self) -> None:
        self.rows: dict[int, tuple[np.ndarray, np.ndarray]] = {}

    def keep(self, positions: np.ndarray, first: int, block: np.ndarray, mask: np.ndarray | None) -> None:
        wanted = set(int(p) for p in positions)
        self.rows = {p: v for p, v in self.rows.items() if p in wanted}
        for p in wanted:
            if first <= p < first + block.shape[0] and p not in self.rows:
                local = p - first
                nulls = mask[local].copy() if mask is not None else np.zeros(block.shape[1], bool)
                self.rows[p] = (block[local].copy(), nulls)

    def anchors(self, positions: np.ndarray, width: int) -> AnchorRows:
        positions = np.unique(np.asarray(positions, dtype=np.int64))
        # explicit dtypes: with no rows chosen (all weights zero) the arrays are still typed
        values = np.array([self.rows[int(p)][0] for p in positions], dtype=np.float64).reshape(-1, width)
        nulls = np.array([self.rows[int(p)][1] for p in positions], dtype=bool).reshape(-1, width)
        return AnchorRows(positions, values, nulls)


# -- map and merge: partition-independent row choice --------------------------------------------
_GOLDEN = np.uint64(0x9E3779B97F4A7C15)


def _splitmix64(x: np.ndarray) -> np.ndarray:
    """The SplitMix64 finalizer (Steele, Lea, Flood, "Fast splittable pseudorandom number
    generators", OOPSLA 2014), applied elementwise to uint64 counters."""
    with np.errstate(over="ignore"):
        z = x + _GOLDEN
        z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
        z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
        return z ^ (z >> np.uint64(31))


def row_uniforms(seed: int, stream: int, positions: np.ndarray) -> np.ndarray:
    """Uniforms in (0, 1), one per (seed, stream, global row position): a counter-based
    generator, so a row's number does not depend on how the rows are split into blocks or
    partitions. ``stream`` separates independent uses (draws, reservoir slots)."""
    with np.errstate(over="ignore"):
        key = _splitmix64(np.uint64(seed) * np.uint64(0x100000001B3) + np.uint64(stream) * _GOLDEN)
        bits = _splitmix64(np.asarray(positions, dtype=np.uint64) ^ key)
    return ((bits >> np.uint64(11)).astype(np.float64) + 0.5) * 2.0**-53


@dataclass
class AnchorPartial:
    """The anchor pass over one partition: candidates with their global positions and
    sort keys (larger wins; ties go to the smaller position), plus their raw rows.

    ``slots`` (with replacement only): per slot, the winning position and its key."""

    positions: np.ndarray
    keys: np.ndarray
    left: np.ndarray | None
    rows: dict
    slot_items: np.ndarray | None = None
    slot_keys: np.ndarray | None = None


def _top(keys: np.ndarray, positions: np.ndarray, size: int) -> np.ndarray:
    """Indices of the ``size`` largest keys, ties to the smaller position, in that order."""
    order = np.lexsort((positions, -keys))
    return order[:size]


def _race_keys(seed: int, draw: int, slots: int, positions: np.ndarray, weights: np.ndarray) -> np.ndarray:
    """Exponential-race keys log(u_si) / w_i (slots, b): per slot, the row with the largest key
    is drawn with probability w_i / sum(w), independently across slots (i.i.d. draws with
    replacement, Efraimidis-Spirakis keys with one race per draw)."""
    keys = np.full((slots, positions.size), -np.inf)
    positive = weights > 0
    if positive.any():
        for s in range(slots):
            u = row_uniforms(seed, (draw << 20) + s + 1, positions[positive])
            keys[s, positive] = np.log(u) / weights[positive]
    return keys


class AnchorScan:
    """Map step of the anchor choice, fed one raw block at a time (``add``), so that it can
    run on its own pass or ride along another one (the encode pass, when the link does not
    depend on the anchor rows). ``partial()`` gives what ``merge_anchor_partials`` merges.

    ``screen`` is the transform the rows are read through (a ``Transform`` or an outlier
    screen); blocks are raw (b, n) with NaN for NULL and the NULL mask beside them.
    """

    def __init__(self, screen, sketch: Sketch, method: str, rank: int, count: int, seed: int,
                 *, replace: bool, draw: int = 0):
        self.screen, self.sketch, self.method = screen, sketch, method
        self.rank, self.count, self.seed = rank, count, seed
        self.replace, self.draw = replace, draw
        self.keeper = _RowKeeper()
        self.positions = np.zeros(0, dtype=np.int64)
        self.keys = np.zeros(0)
        self.left = np.zeros((0, rank)) if method == "qdeim" else None
        if method != "qdeim" and replace:
            self.slot_items = np.full(count, -1, dtype=np.int64)
            self.slot_keys = np.full(count, -np.inf)

    def _left_rows(self, block: np.ndarray) -> np.ndarray:
        """Rows of U_k for a raw block. With a plain transform and finite cells,
        Z V_k = X (V_k / scale) - (shift / scale) V_k: one product, no transformed copy. The
        subtraction loses about |mean| / std * 1e-16 of each entry, which can only reorder
        rows whose scores are that close."""
        spectrum = self.sketch.spectrum
        screen = self.screen
        if isinstance(screen, Transform) and np.isfinite(block).all():
            right = spectrum.right[:, :self.rank] / screen.scale[:, None]
            s = spectrum.values[:self.rank]
            inv = np.divide(1.0, s, out=np.zeros_like(s), where=s > s[0] * 1e-14 if s.size else None)
            return (block @ right - screen.shift @ right) * inv
        return _cur.left_singular_rows(screen.apply(block), spectrum, self.rank)

    def add(self, first: int, block: np.ndarray, mask: np.ndarray | None) -> None:
        """Take in rows first .. first + b - 1 (raw block (b, n), NULL mask or None)."""
        positions = first + np.arange(block.shape[0], dtype=np.int64)
        if self.method == "qdeim":
            pool_size = max(8 * self.count, 256)
            left = self._left_rows(block)
            self.positions = np.concatenate([self.positions, positions])
            self.left = np.vstack([self.left, left])
            self.keys = np.concatenate([self.keys, np.einsum("ij,ij->i", left, left)])
            if self.positions.size > pool_size:
                keep = _top(self.keys, self.positions, pool_size)
                self.positions, self.left, self.keys = self.positions[keep], self.left[keep], self.keys[keep]
            self.keeper.keep(self.positions, first, block, mask)
            return
        weights = _cur.row_weights(self.method, self.screen.apply(block), self.sketch.spectrum, self.rank)
        if self.replace:
            keys = _race_keys(self.seed, self.draw, self.count, positions, weights)
            if keys.shape[1]:
                best = np.argmax(keys, axis=1)  # first maximum: the smaller position on ties
                won = keys[np.arange(self.count), best]
                better = won > self.slot_keys
                self.slot_items[better] = positions[best[better]]
                self.slot_keys[better] = won[better]
            self.keeper.keep(self.slot_items[self.slot_items >= 0], first, block, mask)
            return
        u = row_uniforms(self.seed, self.draw << 20, positions)
        with np.errstate(divide="ignore"):
            keys = np.where(weights > 0, np.log(u) / np.where(weights > 0, weights, 1.0), -np.inf)
        # zero-weight rows: after every positive one, randomly among themselves
        keys = np.where(np.isneginf(keys), -1e300 - u, keys)
        self.positions = np.concatenate([self.positions, positions])
        self.keys = np.concatenate([self.keys, keys])
        if self.positions.size > self.count:
            keep = _top(self.keys, self.positions, self.count)
            self.positions, self.keys = self.positions[keep], self.keys[keep]
        self.keeper.keep(self.positions, first, block, mask)

    def partial(self) -> AnchorPartial:
        if self.method != "qdeim" and self.replace:
            return AnchorPartial(np.zeros(0, np.int64), np.zeros(0), None, self.keeper.rows,
                                 self.slot_items, self.slot_keys)
        return AnchorPartial(self.positions, self.keys, self.left, self.keeper.rows)


def anchor_partial(blocks, scan: AnchorScan) -> AnchorPartial:
    """Map step of the anchor pass: one partition's blocks (first, raw block, mask) fed to a
    new ``scan``, and what it kept."""
    for first, block, mask in blocks:
        scan.add(first, block, mask)
    return scan.partial()


def merge_anchor_partials(partials: list[AnchorPartial], width: int, method: str, count: int,
                          *, replace: bool) -> AnchorRows:
    """Merge step: the same choice whatever the partitioning (keys are per global row)."""
    rows: dict = {}
    for p in partials:
        rows.update(p.rows)
    keeper = _RowKeeper()
    keeper.rows = rows
    if method != "qdeim" and replace:
        items = np.full(count, -1, dtype=np.int64)
        keys = np.full(count, -np.inf)
        for p in partials:  # partitions in row order: ties keep the earlier (smaller) position
            better = p.slot_keys > keys
            items[better], keys[better] = p.slot_items[better], p.slot_keys[better]
        return keeper.anchors(items[items >= 0], width)
    positions = np.concatenate([p.positions for p in partials]).astype(np.int64)
    keys = np.concatenate([p.keys for p in partials])
    if method == "qdeim":
        pool_size = max(8 * count, 256)
        keep = _top(keys, positions, pool_size)
        left = np.vstack([p.left for p in partials])[keep]
        pool_pos, pool_score = positions[keep], keys[keep]
        first_k = selection.qdeim(left)
        chosen = selection.top_up(first_k, pool_score, count)
        return keeper.anchors(pool_pos[chosen], width)
    keep = _top(keys, positions, count)
    return keeper.anchors(np.sort(positions[keep]), width)
