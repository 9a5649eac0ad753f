"""Link step: turn the mixing matrix of the transformed table into raw units.

With z = (x - shift) / scale and Z ~ Z[:, J] @ M, each numeric column j is rebuilt as the
affine combination of raw basis values

    xhat_j = offset_j + sum_k W[k, j] x_{J_k},
    W[k, j] = scale_j M[k, j] / scale_{J_k},   offset_j = shift_j - sum_k W[k, j] shift_{J_k}.

Basis columns get the identity (W[:, J_k] = e_k, offset 0): they are stored exactly and the
plain-SQL rebuild formula then returns them unchanged.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .profile import Transform

__all__ = ["Mixing", "mixing_for_columns", "mixing_for_scores"]


@dataclass
class Mixing:
    """Raw-unit rebuild: ``weights`` (c, n), ``offset`` (n,), ``fill`` (c,) for missing
    basis values, ``basis_columns`` (c,) source positions (None for synthetic scores)."""

    weights: np.ndarray
    offset: np.ndarray
    fill: np.ndarray
    basis_columns: np.ndarray | None


def mixing_for_columns(columns: np.ndarray, mixing: np.ndarray, transform: Transform) -> Mixing:
    """Raw-unit mixing for real basis columns J (c,) and transformed mixing M (c, n)."""
    columns = np.asarray(columns, dtype=np.int64)
    weights = mixing * transform.scale[None, :] / transform.scale[columns][:, None]
    offset = transform.shift - transform.shift[columns] @ weights
    weights[:, columns] = np.eye(columns.size)
    offset[columns] = 0.0
    return Mixing(weights, offset, transform.shift[columns].copy(), columns)


def mixing_for_scores(right: np.ndarray, rank: int, transform: Transform) -> Mixing:
    """Raw-unit mixing for synthetic scores T = Z V_k (method 'svd'): x = shift + scale (T V_k^T)."""
    weights = right[:, :rank].T * transform.scale[None, :]
    return Mixing(np.ascontiguousarray(weights), transform.shift.copy(), np.zeros(rank), None)
