"""Rank choice for truncated SVDs (Gavish-Donoho). The truncated SVD itself is
numpy.linalg.svd: Eckart-Young makes it the quality reference and the ``method='svd'`` archive.

References
----------
Eckart, Young, "The approximation of one matrix by another of lower rank", Psychometrika 1,
1936; Mirsky, "Symmetric gauge functions and unitarily invariant norms", Q. J. Math. 11, 1960.
Gavish, Donoho, "The optimal hard threshold for singular values is 4/sqrt(3)", IEEE Trans.
Inf. Theory 60(8), 2014 (rank choice under white noise of unknown level).
"""

from __future__ import annotations

import numpy as np

__all__ = ["gavish_donoho_rank"]


def gavish_donoho_rank(singular_values: np.ndarray, rows: int, columns: int) -> int:
    """Number of singular values above the Gavish-Donoho threshold omega(beta) * median(s).

    beta = min(m, n) / max(m, n); omega(beta) ~ 0.56 beta^3 - 0.95 beta^2 + 1.82 beta + 1.43
    is the published approximation for an unknown noise level (Gavish, Donoho 2014, eq. (5)).
    """
    s = np.asarray(singular_values, dtype=np.float64)
    s = s[: min(rows, columns)]
    if s.size == 0 or s[0] <= 0:
        return 0
    beta = min(rows, columns) / max(rows, columns)
    omega = 0.56 * beta**3 - 0.95 * beta**2 + 1.82 * beta + 1.43
    return int(np.sum(s > omega * np.median(s)))
