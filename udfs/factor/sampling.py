"""Sampling probabilities and draws for randomized CUR.

References
----------
Frieze, Kannan, Vempala, "Fast Monte-Carlo algorithms for finding low-rank approximations",
J. ACM 51(6), 2004 (length-squared sampling).
Drineas, Kannan, Mahoney, "Fast Monte Carlo algorithms for matrices I: approximating matrix
multiplication", SIAM J. Comput. 36(1):132-157, 2006 (the 1/sqrt(s p) rescaling).
Drineas, Mahoney, Muthukrishnan, "Relative-error CUR matrix decompositions", SIAM J. Matrix
Anal. Appl. 30(2):844-881, 2008 (leverage scores).
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "length_squared_probabilities",
    "leverage_scores",
    "draw",
    "rescaling",
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
