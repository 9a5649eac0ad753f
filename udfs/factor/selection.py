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
import scipy.linalg.blas

__all__ = ["pivoted_qr_order", "qdeim", "top_up"]


# Residual norms within this relative distance of the largest count as a tie, which goes to
# the smallest column index. Without it, ties (every column of a standardized table has the
# same norm) are broken by rounding, and the same table summed in another order (another
# partitioning, another executor) could pick other columns.
TIE = 1e-8


def pivoted_qr_order(matrix: np.ndarray, count: int) -> np.ndarray:
    """First ``count`` pivots of the column-pivoted QR of ``matrix`` (shape (p, n)).

    Applied to the R factor of a tall-skinny QR of A, it selects the same columns as pivoted
    QR of A itself (A = QR with Q orthonormal leaves every column-norm update unchanged), at
    the cost of a QR of an n x n matrix instead of an m x n one.

    Businger-Golub pivoting (the column with the largest residual norm next), with residual
    norms recomputed at each step and near-ties (``TIE``) going to the smallest index, so
    the order does not depend on rounding noise.
    """
    a = np.array(matrix, dtype=np.float64, order="F")  # updated in place by BLAS (dger)
    p, n = a.shape
    count = min(int(count), n)
    chosen: list[int] = []
    active = np.ones(n, dtype=bool)
    norms = np.einsum("ij,ij->j", a, a)
    for _ in range(count):
        candidates = np.where(active, norms, -1.0)
        top = candidates.max()
        j = int(np.flatnonzero(candidates >= top * (1.0 - TIE))[0]) if top > 0 else int(np.flatnonzero(active)[0])
        chosen.append(j)
        active[j] = False
        length = np.sqrt(norms[j]) if len(chosen) <= p else 0.0
        if length > 0:
            q = a[:, j] / length
            for _ in range(2):  # Gram-Schmidt twice: orthogonal to working precision
                a = _rank_one_update(a, q, q @ a)
        a[:, j] = 0.0
        norms = np.einsum("ij,ij->j", a, a)
    return np.asarray(chosen, dtype=np.int64)


def _rank_one_update(a: np.ndarray, x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """a - x y^T, in place for a Fortran-ordered float64 ``a`` (BLAS dger): no p x n
    temporary per step, so each pivot costs O(p n) time and no new memory."""
    if a.size == 0:
        return a
    return scipy.linalg.blas.dger(-1.0, x, y, a=a, overwrite_a=True)


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
