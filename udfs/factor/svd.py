"""Truncated SVD: the quality reference (Eckart-Young) and the ``method='svd'`` archive.

References
----------
Eckart, Young, "The approximation of one matrix by another of lower rank", Psychometrika 1,
1936; Mirsky, "Symmetric gauge functions and unitarily invariant norms", Q. J. Math. 11, 1960.
"""

from __future__ import annotations

import numpy as np

__all__ = ["truncated_svd", "svd_mixing"]


def truncated_svd(a: np.ndarray, rank: int) -> np.ndarray:
    """The best rank-k approximation A_k of ``a`` (shape (m, n)) in every unitarily invariant norm."""
    u, s, vt = np.linalg.svd(np.asarray(a, dtype=np.float64), full_matrices=False)
    return (u[:, :rank] * s[:rank]) @ vt[:rank]


def svd_mixing(right: np.ndarray, rank: int) -> np.ndarray:
    """Mixing matrix for synthetic basis columns T = Z V_k: Z_k = T @ V_k^T (shape (k, n))."""
    return np.ascontiguousarray(right[:, :rank].T)
