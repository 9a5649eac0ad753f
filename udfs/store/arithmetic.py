"""Rebuild arithmetic and its floating-point slack: the single place where a rebuilt value
and its bound are computed, used by the verify pass and by every reader.

A numeric column j is rebuilt from the c basis values of its row as

    xhat_ij = offset_j + sum_k weights[k, j] * f(x_i,J_k)

where f replaces a missing (NULL) or non-finite basis value by that basis column's fill.

Floating-point slack. Any evaluation order of a sum of c + 1 terms satisfies
|fl(s) - s| <= gamma_{c+1} * sum |terms| with gamma_n = n u / (1 - n u), u = 2^-53
(Higham, "Accuracy and Stability of Numerical Algorithms", 2nd ed., 2002, eq. 3.4-3.5).
The verify pass and a later reader may use different orders (different block sizes, BLAS
kernels), so the two results differ by at most 2 gamma_{c+1} (|offset_j| + sum_k |w_kj| |x_ik|),
which we bound cheaply by 2 gamma_{c+2} (|offset_j| + ||w_j||_1 * max_k |f(x_ik)|).
"""

from __future__ import annotations

import numpy as np

__all__ = ["UNIT_ROUNDOFF", "fill_missing", "approximate", "slack", "round_up"]

UNIT_ROUNDOFF = 2.0**-53


def fill_missing(basis: np.ndarray, fill: np.ndarray) -> np.ndarray:
    """Replace non-finite entries (NaN stands for NULL here) of ``basis`` (b, c) by ``fill`` (c,)."""
    bad = ~np.isfinite(basis)
    if bad.any():
        basis = np.where(bad, fill[None, :], basis)
    return basis


def approximate(filled_basis: np.ndarray, weights: np.ndarray, offset: np.ndarray) -> np.ndarray:
    """Rebuilt values (b, n) from filled basis values (b, c), weights (c, n) and offsets (n,)."""
    with np.errstate(over="ignore", invalid="ignore"):
        return filled_basis @ weights + offset[None, :]


def _gamma(terms: int) -> float:
    nu = terms * UNIT_ROUNDOFF
    return nu / (1.0 - nu)


def slack(filled_basis: np.ndarray, weights: np.ndarray, offset: np.ndarray) -> np.ndarray:
    """Upper limit (b, n) on how far two evaluations of ``approximate`` can differ."""
    c = weights.shape[0]
    amax = np.max(np.abs(filled_basis), axis=1) if c else np.zeros(filled_basis.shape[0])
    w1 = np.sum(np.abs(weights), axis=0)
    with np.errstate(over="ignore", invalid="ignore"):
        return 2.0 * _gamma(c + 2) * (np.abs(offset)[None, :] + amax[:, None] * w1[None, :])


def round_up(values: np.ndarray) -> np.ndarray:
    """Move measured error figures up past the rounding of their own computation (a relative
    4u) and one more ulp, so that a stored figure is never below the exact one."""
    with np.errstate(over="ignore"):
        return np.nextafter(np.asarray(values, dtype=np.float64) * (1.0 + 4.0 * UNIT_ROUNDOFF), np.inf)
