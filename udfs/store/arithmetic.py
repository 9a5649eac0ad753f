"""Rebuild arithmetic and its floating-point slack: the single place where a rebuilt value
and its bound are computed, used by the verify pass and by every reader.

A numeric column j is rebuilt from the c basis values of its row as

    xhat_ij = offset_j + sum_k weights[k, j] * f(x_i,J_k)

where f replaces a missing (NULL) or non-finite basis value by that basis column's fill.

Floating-point slack. Any evaluation order of a sum of c + 1 terms satisfies
|fl(s) - s| <= gamma_{c+1} * sum |terms| with gamma_n = n u / (1 - n u), u = 2^-53
(Higham, "Accuracy and Stability of Numerical Algorithms", 2nd ed., 2002, eq. 3.4-3.5).
``approximate`` fixes one order, but another rebuilder (a SQL expression, another engine) may
use a different one, so the verify pass and that rebuilder differ by at most
2 gamma_{c+1} S_ij with S_ij = |offset_j| + sum_k |w_kj| |f(x_ik)|. ``slack`` returns
2 gamma_{c+2} fl(S_ij): S_ij is a sum of non-negative terms, so its computed value is at least
S_ij (1 - gamma_{c+1}), and the step from gamma_{c+1} to gamma_{c+2} more than covers that
and the rounding of the final product. S_ij is summed term by term rather than bounded by
||w_j||_1 max_k |f(x_ik)|: when basis columns are in different units, that shortcut was
measured 10^5 times looser.
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
    """Rebuilt values (b, n) from filled basis values (b, c), weights (c, n) and offsets (n,).

    The sum is accumulated element by element in one fixed order (the offset, then basis
    k = 0, 1, ..., c - 1), so a cell's value is bit-identical whatever block, shape or request
    it is computed in: the verify pass, ``cell()`` and a bulk ``to_numpy`` agree exactly. A
    matrix product would not (BLAS picks kernels, and so summation orders, by shape). The
    slack still covers any other order, e.g. a rebuild in SQL.
    """
    out = np.empty((filled_basis.shape[0], weights.shape[1]), dtype=np.float64)
    out[...] = offset[None, :]
    term = np.empty_like(out)
    with np.errstate(over="ignore", invalid="ignore"):
        for k in range(weights.shape[0]):
            np.multiply(filled_basis[:, k, None], weights[None, k, :], out=term)
            out += term
    return out


def _gamma(terms: int) -> float:
    nu = terms * UNIT_ROUNDOFF
    return nu / (1.0 - nu)


def slack(filled_basis: np.ndarray, weights: np.ndarray, offset: np.ndarray) -> np.ndarray:
    """Upper limit (b, n) on how far two evaluations of ``approximate`` (in any summation
    order) can differ: 2 gamma_{c+2} (|offset_j| + sum_k |w_kj| |f(x_ik)|), see the module
    docstring. Summed in the same fixed order as ``approximate``, so it is bit-identical
    whatever the request too."""
    magnitude = approximate(np.abs(filled_basis), np.abs(weights), np.abs(offset))
    with np.errstate(over="ignore", invalid="ignore"):
        return 2.0 * _gamma(weights.shape[0] + 2) * magnitude


def round_up(values: np.ndarray) -> np.ndarray:
    """Move measured error figures up past the rounding of their own computation (a relative
    4u) and one more ulp, so that a stored figure is never below the exact one."""
    with np.errstate(over="ignore"):
        return np.nextafter(np.asarray(values, dtype=np.float64) * (1.0 + 4.0 * UNIT_ROUNDOFF), np.inf)
