"""Deterministic selection of columns and rows by column-pivoted QR.

References
----------
Businger, Golub, "Linear least squares solutions by Householder transformations",
Numer. Math. 7, 1965 (column pivoting).
Drmac, Gugercin, "A new selection operator for the discrete empirical interpolation method",
SIAM J. Sci. Comput. 38(2), 2016 (Q-DEIM: the first k pivots of pivoted QR of V_k^T).
Sorensen, Embree, "A DEIM induced CUR factorization", SIAM J. Sci. Comput. 38(3), 2016.
"""

from __future__ import annotations

import numpy as np
import scipy.linalg

__all__ = ["pivoted_qr_order", "qdeim", "top_up"]


def pivoted_qr_order(matrix: np.ndarray, count: int) -> np.ndarray:
    """First ``count`` pivots of the column-pivoted QR of ``matrix`` (shape (p, n)).

    Applied to the R factor of a tall-skinny QR of A, it selects the same columns as pivoted
    QR of A itself (A = QR with Q orthonormal leaves every column-norm update unchanged), at
    the cost of a QR of an n x n matrix instead of an m x n one.
    """
    _, piv = scipy.linalg.qr(np.asarray(matrix, dtype=np.float64), mode="r", pivoting=True)
    return np.asarray(piv[:count], dtype=np.int64)


def qdeim(basis: np.ndarray) -> np.ndarray:
    """Q-DEIM indices: the first k pivots of pivoted QR of ``basis.T`` for basis of shape (m, k).

    Returns k distinct row indices (fewer if m < k).
    """
    b = np.asarray(basis, dtype=np.float64)
    k = min(b.shape)
    return pivoted_qr_order(b.T, k)


def top_up(chosen: np.ndarray, scores: np.ndarray, count: int) -> np.ndarray:
    """Extend ``chosen`` to ``count`` distinct indices with the highest remaining ``scores``."""
    chosen = np.asarray(chosen, dtype=np.int64)
    if chosen.size >= count:
        return chosen[:count]
    order = np.argsort(-np.asarray(scores), kind="stable")
    rest = order[~np.isin(order, chosen)][: count - chosen.size]
    return np.concatenate([chosen, rest])
