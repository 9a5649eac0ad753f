"""CUR decomposition: column choice, row weights and link, shared by the streaming builder
and by an in-memory reference used in tests.

Method names (options of ``rankfold.compress``):

============== ====================================================================
columns=       ``pivoted_qr`` (deterministic; default), ``leverage``, ``length_squared``
link=          ``cx`` (C^+ A; default, keeps no rows), ``optimal`` (C^+ A R^+),
               ``skeleton`` (pinv(A[I, J])), ``textbook`` (through P = R^+ R, with
               1/sqrt(s p) rescaling)
rows=          for the links that keep anchor rows: ``qdeim`` (deterministic; default),
               ``leverage``, ``length_squared``
============== ====================================================================

Why ``cx`` is the default: among all approximations C X whose columns lie in the span of
the chosen columns C, X = C^+ A has the smallest Frobenius error (least squares), so for the
same columns no link that ends in C U R can do better; it needs no anchor rows, hence no
pass over the table to choose them; and it stores the same c x n weights. Measured
(benchmarks/methods.py, 20,000 x 120, rank 10): 1.18x the rank-k optimum against 1.22x for
the optimal U on the same columns.

References
----------
Drineas, Mahoney, Muthukrishnan, SIAM J. Matrix Anal. Appl. 30(2), 2008 (leverage CUR);
Sorensen, Embree, SIAM J. Sci. Comput. 38(3), 2016 (DEIM-CUR); Blum, Hopcroft, Kannan,
"Foundations of Data Science", 2020 (length-squared CUR); see the modules ``sampling``,
``selection`` and ``link`` for each piece.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import link as _link
from . import sampling, selection
from .sketch import Spectrum, StreamingQR

__all__ = [
    "COLUMN_METHODS",
    "ROW_METHODS",
    "LINKS",
    "ColumnChoice",
    "choose_columns",
    "row_weights",
    "build_mixing",
    "CURMethods",
    "CURResult",
    "cur",
]

COLUMN_METHODS = ("pivoted_qr", "leverage", "length_squared")
ROW_METHODS = ("qdeim", "leverage", "length_squared")
LINKS = ("optimal", "skeleton", "textbook", "cx")


@dataclass(frozen=True)
class ColumnChoice:
    """Chosen columns. ``draws`` may repeat (i.i.d. sampling); ``probabilities`` are the
    sampling probabilities over all n columns (None for deterministic selection)."""

    draws: np.ndarray
    probabilities: np.ndarray | None

    @property
    def distinct(self) -> np.ndarray:
        return np.unique(self.draws)


def choose_columns(
    method: str,
    sketch_r: np.ndarray,
    spectrum: Spectrum,
    rank: int,
    count: int,
    rng: np.random.Generator,
    *,
    replace: bool,
) -> ColumnChoice:
    """Choose ``count`` columns of Z from its R factor (shape (n, n)) and spectrum."""
    if method == "pivoted_qr":
        return ColumnChoice(selection.pivoted_qr_order(sketch_r, count), None)
    if method == "leverage":
        p = sampling.leverage_scores(spectrum.right[:, :rank])
    elif method == "length_squared":
        p = sampling.length_squared_probabilities(np.einsum("ij,ij->j", sketch_r, sketch_r))
    else:  # validated by the caller
        raise AssertionError(method)
    return ColumnChoice(sampling.draw(p, count, rng, replace=replace), p)


def row_weights(method: str, block: np.ndarray, spectrum: Spectrum, rank: int) -> np.ndarray:
    """Per-row weights of a transformed row block (shape (b, n)) -> (b,).

    ``length_squared``: |z_i|^2. ``leverage`` and ``qdeim``: the rank-k leverage
    ||U_k[i, :]||^2 with U_k = Z V_k S_k^{-1}, computed row by row from the right factor.
    """
    if method == "length_squared":
        return np.einsum("ij,ij->i", block, block)
    left = left_singular_rows(block, spectrum, rank)
    return np.einsum("ij,ij->i", left, left)


def left_singular_rows(block: np.ndarray, spectrum: Spectrum, rank: int) -> np.ndarray:
    """Rows of U_k = Z V_k S_k^{-1} for a block of Z (zero singular values give zeros)."""
    s = spectrum.values[:rank]
    inv = np.divide(1.0, s, out=np.zeros_like(s), where=s > s[0] * 1e-14 if s.size else None)
    return (block @ spectrum.right[:, :rank]) * inv


def build_mixing(
    link: str,
    choice: ColumnChoice,
    sketch_r: np.ndarray,
    anchor_rows: np.ndarray,
) -> tuple[np.ndarray, np.ndarray]:
    """(J, M): distinct basis columns and the (c, n) mixing matrix, Z ~ Z[:, J] @ M."""
    if link == "textbook":
        return _link.textbook_mixing(choice.draws, choice.probabilities, anchor_rows)
    columns = choice.distinct
    if link == "optimal":
        return columns, _link.optimal_mixing(sketch_r, columns, anchor_rows)
    if link == "skeleton":
        return columns, _link.skeleton_mixing(columns, anchor_rows)
    if link == "cx":
        return columns, _link.cx_mixing(sketch_r, columns)
    raise AssertionError(link)


@dataclass(frozen=True)
class CURResult:
    """In-memory CUR of a matrix A (m x n): ``A ~ A[:, columns] @ mixing``."""

    columns: np.ndarray
    rows: np.ndarray
    mixing: np.ndarray

    def approximation(self, a: np.ndarray) -> np.ndarray:
        return a[:, self.columns] @ self.mixing


@dataclass(frozen=True)
class CURMethods:
    """The method names of one CUR (table in the module docstring): how ``columns`` and
    ``rows`` are chosen, the ``link``, and whether draws are i.i.d. (``replace``; None: only
    for the textbook link, as in the published estimator)."""

    columns: str = "pivoted_qr"
    rows: str = "qdeim"
    link: str = "cx"
    replace: bool | None = None


def cur(
    a: np.ndarray,
    rank: int,
    *,
    n_columns: int | None = None,
    n_rows: int | None = None,
    methods: CURMethods = CURMethods(),
    rng: np.random.Generator | None = None,
) -> CURResult:
    """In-memory CUR of ``a`` (shape (m, n)) with the same choices as the streaming builder.

    Defaults: c = 2k columns and, for the links that keep rows, r = 2c rows (clipped to the
    table; given counts are clipped too unless ``replace`` draws i.i.d. samples, which may
    repeat); ``cx`` keeps no rows. Used as a reference in
    tests and for small tables; archives are built by ``rankfold.udfs.passes``.
    """
    a = np.asarray(a, dtype=np.float64)
    m, n = a.shape
    rng = rng if rng is not None else np.random.default_rng(0)
    columns, rows, link = methods.columns, methods.rows, methods.link
    replace = (link == "textbook") if methods.replace is None else methods.replace
    # i.i.d. draws (replace=True) may outnumber the columns or rows: the published estimators
    # take s draws whatever n is. Distinct choices are clipped to the table.
    c = n_columns or min(2 * rank, n)
    r = n_rows or min(2 * c, m)
    if not replace:
        c, r = min(c, n), min(r, m)
    qr = StreamingQR(n)
    qr.update(a)
    sketch_r = qr.factor()
    spectrum = qr.spectrum()
    choice = choose_columns(columns, sketch_r, spectrum, rank, c, rng, replace=replace)
    weights = row_weights(rows, a, spectrum, rank)
    if rows == "qdeim":
        first = selection.qdeim(left_singular_rows(a, spectrum, rank))
        row_idx = selection.top_up(first, weights, r)
    else:
        p = sampling.length_squared_probabilities(weights)
        row_idx = sampling.draw(p, r, rng, replace=replace)
    if link == "cx":  # C^+ A keeps no rows, as in the streaming builder
        row_idx = np.zeros(0, dtype=np.int64)
    cols, mixing = build_mixing(link, choice, sketch_r, a[row_idx])
    return CURResult(cols, np.asarray(row_idx), mixing)
