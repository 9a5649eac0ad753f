"""Sampling probabilities and draws for randomized CUR.

References
----------
Frieze, Kannan, Vempala, "Fast Monte-Carlo algorithms for finding low-rank approximations",
J. ACM 51(6), 2004 (length-squared sampling).
Drineas, Kannan, Mahoney, "Fast Monte Carlo algorithms for matrices I: approximating matrix
multiplication", SIAM J. Comput. 36(1):132-157, 2006 (the 1/sqrt(s p) rescaling).
Drineas, Mahoney, Muthukrishnan, "Relative-error CUR matrix decompositions", SIAM J. Matrix
Anal. Appl. 30(2):844-881, 2008 (leverage scores).
Efraimidis, Spirakis, "Weighted random sampling with a reservoir", Inf. Process. Lett. 97(5),
2006 (one-pass weighted sampling without replacement, used for streamed rows).
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "length_squared_probabilities",
    "leverage_scores",
    "draw",
    "rescaling",
    "ReservoirWithReplacement",
    "ReservoirWithoutReplacement",
]


def length_squared_probabilities(squared_norms: np.ndarray) -> np.ndarray:
    """p_j = |a_j|^2 / ||A||_F^2 for a vector of squared column (or row) norms, shape (n,).

    A zero matrix gives uniform probabilities (every column is equally uninformative).
    """
    w = np.asarray(squared_norms, dtype=np.float64)
    total = w.sum()
    if not np.isfinite(total) or total <= 0:
        return np.full(w.shape, 1.0 / w.size)
    return w / total


def leverage_scores(singular_vectors: np.ndarray) -> np.ndarray:
    """Rank-k leverage probabilities pi_j = ||V_k[j, :]||^2 / k.

    Parameters
    ----------
    singular_vectors : (n, k) array with orthonormal columns (top-k right singular vectors
        for column leverage, top-k left singular vectors for row leverage).

    Returns
    -------
    (n,) probabilities summing to 1 (Drineas, Mahoney, Muthukrishnan 2008, eq. for pi_j).
    """
    v = np.asarray(singular_vectors, dtype=np.float64)
    scores = np.einsum("ij,ij->i", v, v)
    return length_squared_probabilities(scores)


def draw(p: np.ndarray, count: int, rng: np.random.Generator, *, replace: bool) -> np.ndarray:
    """Draw ``count`` indices from probabilities ``p``.

    With ``replace=True`` the draws are i.i.d. (the published estimators); the result keeps
    repeats and its order. Without replacement, numpy's sequential weighted draw is used; if
    fewer than ``count`` entries have positive weight, the rest are filled uniformly from the
    zero-weight entries so the result always has ``count`` distinct indices.
    """
    p = np.asarray(p, dtype=np.float64)
    if replace:
        return rng.choice(p.size, size=count, replace=True, p=p)
    positive = np.flatnonzero(p > 0)
    if positive.size >= count:
        return rng.choice(p.size, size=count, replace=False, p=p)
    zero = np.flatnonzero(p <= 0)
    extra = rng.choice(zero, size=count - positive.size, replace=False)
    return np.concatenate([positive, extra])


def rescaling(p: np.ndarray, indices: np.ndarray) -> np.ndarray:
    """The factors 1/sqrt(s p_k) of the sampled matrix-product estimator (DKM 2006).

    ``indices`` holds the s i.i.d. draws (with repeats); the result has the same shape.
    """
    s = len(indices)
    return 1.0 / np.sqrt(s * np.asarray(p, dtype=np.float64)[indices])


class ReservoirWithReplacement:
    """``size`` independent one-item weighted reservoirs over a stream: i.i.d. draws with
    replacement, probability w_i / sum(w), in one pass and O(size) memory.

    Each slot keeps its item; a new block of total weight w_b replaces it with probability
    w_b / (W_before + w_b), by an item drawn from the block in proportion to its weights.
    """

    def __init__(self, size: int, rng: np.random.Generator):
        self.size = size
        self.rng = rng
        self.total = 0.0
        self.items = np.full(size, -1, dtype=np.int64)
        self.weights = np.zeros(size)

    def offer(self, first_index: int, weights: np.ndarray) -> np.ndarray:
        """Offer items ``first_index + arange(len(weights))``; returns the slots that changed."""
        w = np.asarray(weights, dtype=np.float64)
        block_total = float(w.sum())
        if block_total <= 0:
            return np.zeros(0, dtype=np.int64)
        self.total += block_total
        take = self.rng.random(self.size) < block_total / self.total
        slots = np.flatnonzero(take)
        if slots.size:
            local = self.rng.choice(w.size, size=slots.size, replace=True, p=w / block_total)
            self.items[slots] = first_index + local
            self.weights[slots] = w[local]
        return slots

    def probabilities(self) -> np.ndarray:
        """Selection probability of each kept item: w_i / sum over the stream of w."""
        return self.weights / self.total if self.total > 0 else np.zeros(self.size)


class ReservoirWithoutReplacement:
    """Weighted sampling of ``size`` distinct items in one pass (Efraimidis-Spirakis A-Res).

    Item i gets the key log(u_i) / w_i with u_i uniform on (0, 1); the ``size`` largest keys
    win. Items of zero weight only enter when fewer than ``size`` items have positive weight.
    """

    def __init__(self, size: int, rng: np.random.Generator):
        self.size = size
        self.rng = rng
        self.items = np.zeros(0, dtype=np.int64)
        self.keys = np.zeros(0)

    def offer(self, first_index: int, weights: np.ndarray) -> None:
        w = np.asarray(weights, dtype=np.float64)
        u = self.rng.random(w.size)
        with np.errstate(divide="ignore"):
            keys = np.where(w > 0, np.log(u) / np.where(w > 0, w, 1.0), -np.inf)
        # zero-weight items: rank them after every positive one, randomly among themselves
        keys = np.where(np.isneginf(keys), -1e300 - u, keys)
        items = np.concatenate([self.items, first_index + np.arange(w.size, dtype=np.int64)])
        keys = np.concatenate([self.keys, keys])
        if items.size > self.size:
            keep = np.argpartition(-keys, self.size - 1)[: self.size]
            items, keys = items[keep], keys[keep]
        self.items, self.keys = items, keys

    def result(self) -> np.ndarray:
        return np.sort(self.items)
