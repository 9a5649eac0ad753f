"""Streaming sketches of a tall matrix Z, one block of rows at a time: the R factor of a
tall-skinny QR (``StreamingQR``, accurate to the last digits) and the Gram matrix
(``GramSketch``, about 15x faster per block here: a matrix product instead of a QR); for
tables with far more columns than rows, the rows themselves (``RowSketch`` / ``RowGram``:
the m x m side, never an n x n matrix).

The R factor (n x n) determines the Gram matrix Z^T Z = R^T R, so it yields the singular
values and right singular vectors of Z, column norms, pivoted-QR column selection and the
least-squares link C^+ Z without another pass over the rows.

References
----------
Demmel, Grigori, Hoemmen, Langou, "Communication-optimal parallel and sequential QR and LU
factorizations", SIAM J. Sci. Comput. 34(1), 2012 (TSQR: merging R factors is associative).
"""

from __future__ import annotations

import numpy as np
import scipy.linalg
from threadpoolctl import threadpool_limits

__all__ = ["StreamingQR", "GramSketch", "ShiftedGram", "Spectrum", "RowSketch", "RowGram"]


class Spectrum:
    """Singular values ``values`` (descending, shape (p,)) and right singular vectors
    ``right`` (shape (n, p)) of the table summarised by an R factor."""

    def __init__(self, values: np.ndarray, right: np.ndarray):
        self.values = values
        self.right = right

    def optimal_error(self, rank: int) -> float:
        """Eckart-Young: min over rank-k B of ||Z - B||_F = sqrt(sum_{j>k} s_j^2)."""
        return float(np.sqrt(np.sum(self.values[rank:] ** 2)))

    def optimal_relative_error(self, rank: int) -> float:
        total = float(np.sqrt(np.sum(self.values**2)))
        return self.optimal_error(rank) / total if total > 0 else 0.0


class StreamingQR:
    """Accumulates the n x n R factor of [Z_1; Z_2; ...] over row blocks Z_b (shape (b, n)).

    Memory is O(n^2) whatever the number of rows. ``merge`` combines two accumulators built
    on disjoint row sets (the TSQR reduction step), so partitions can be processed apart.
    """

    def __init__(self, width: int):
        self.width = width
        self.r = np.zeros((0, width))

    def update(self, block: np.ndarray) -> None:
        if block.shape[0] == 0:
            return
        stacked = np.vstack([self.r, block])
        self.r = scipy.linalg.qr(stacked, mode="r", overwrite_a=True, check_finite=False)[0][
            : self.width
        ]

    def merge(self, other: "StreamingQR") -> "StreamingQR":
        merged = StreamingQR(self.width)
        merged.update(np.vstack([self.r, other.r]))
        return merged

    def factor(self) -> np.ndarray:
        """The square R factor (zero-padded when fewer rows than columns were seen)."""
        r = np.zeros((self.width, self.width))
        r[: self.r.shape[0]] = self.r
        return r

    def spectrum(self) -> Spectrum:
        _, values, vt = np.linalg.svd(self.factor(), full_matrices=False)
        return Spectrum(values, vt.T)


class GramSketch:
    """Accumulates the Gram matrix G = Z^T Z (n x n) over row blocks Z_b (shape (b, n)).

    ``factor()`` returns F = diag(s) V^T with G = V diag(s^2) V^T, so F^T F = Z^T Z: F stands
    in for the R factor wherever only the Gram matrix matters (pivoted-QR column choice,
    C^+ Z = F[:, J]^+ F, column norms, singular values and right singular vectors).

    Trade-off: forming G squares the condition number, so singular values below about
    sqrt(n * eps) * s_1 (~1e-7 s_1) are not resolved. Those directions lie far below the
    noise of the tables rankfold is for; the encode pass measures the real error anyway.
    Measured here on 131,072 x 120 blocks: 0.1 s per block against 1.3-1.8 s for the QR.
    ``merge`` adds two sketches of disjoint row sets (associative).
    """

    def __init__(self, width: int):
        self.width = width
        self.gram = np.zeros((width, width))

    def update(self, block: np.ndarray) -> None:
        if block.shape[0]:
            self.gram += block.T @ block

    def rescale(self, factor: float) -> None:
        """Multiply the Gram matrix by ``factor`` (e.g. rows / sampled rows)."""
        self.gram *= factor

    def diagonal(self) -> np.ndarray:
        """diag(Z^T Z) (n,): the column sums of squares."""
        return np.diag(self.gram).copy()

    def merge(self, other: "GramSketch") -> "GramSketch":
        merged = GramSketch(self.width)
        merged.gram = self.gram + other.gram
        return merged

    def eigen(self) -> tuple[np.ndarray, np.ndarray]:
        """(s, V): singular values of Z (descending) and right singular vectors (n, n)."""
        symmetric = (self.gram + self.gram.T) / 2.0
        eigenvalues, vectors = np.linalg.eigh(symmetric)
        order = np.argsort(eigenvalues)[::-1]
        values = np.sqrt(np.clip(eigenvalues[order], 0.0, None))
        return values, vectors[:, order]

    def factor(self) -> np.ndarray:
        values, vectors = self.eigen()
        return values[:, None] * vectors.T

    def spectrum(self) -> Spectrum:
        values, vectors = self.eigen()
        return Spectrum(values, vectors)


class ShiftedGram:
    """Second moments of a raw table X (shape (m, n), non-finite cells missing) about a
    shift chosen per block, so that the Gram matrix of the *centred and scaled* table can be
    had after the pass that learns the means, without a second pass over the rows.

    With v_ij = 1 where x_ij is finite (else 0) and z_ij = (x_ij - s_j) v_ij for the shift
    s (shape (n,)), the state is

        A = Z^T Z,   B = Z^T V,   C = V^T V       (each n x n),

    and for any other shift t, with d = s - t and y_ij = (x_ij - t_j) v_ij:

        Y^T Y = A + B diag(d) + diag(d) B^T + diag(d) C diag(d),    Y^T V = B + diag(d) C.

    So a partial can be moved to any shift exactly (in exact arithmetic), partials of
    disjoint row sets merge by moving both to a common shift and adding (associative),
    and ``gram(t, scale)`` gives Y^T Y / (scale scale^T): the Gram matrix of the table
    transformed as ``Transform.apply`` does it (missing cells set to the column mean, i.e.
    to 0 after the transform). Each block is taken about its own mean, which keeps A free
    of the cancellation that a raw X^T X suffers when means are large against the spread
    (the shifted-data idea of Chan, Golub, LeVeque, Am. Stat. 37(3), 1983, applied to
    co-moments). B and C cost two more products only for blocks with missing cells.
    """

    def __init__(self, width: int):
        self.width = width
        self.shift = np.zeros(width)
        self.a = np.zeros((width, width))
        self.b = np.zeros((width, width))
        self.c = np.zeros((width, width))

    @classmethod
    def of_block(cls, block: np.ndarray, shift: np.ndarray, valid: np.ndarray | None = None) -> "ShiftedGram":
        """The state of one raw block (b, n) about ``shift`` (n,); ``valid`` (b, n) marks
        the finite cells (None: every cell is finite)."""
        out = cls(block.shape[1])
        out.shift = np.array(shift, dtype=np.float64)
        if valid is None:
            z = block - out.shift
            return cls.of_products(out.shift, z.T @ z, z.sum(axis=0), block.shape[0])
        else:
            z = np.where(valid, block - out.shift, 0.0)
            v = valid.astype(np.float64)
            out.a, out.b, out.c = z.T @ z, z.T @ v, v.T @ v
        return out

    @classmethod
    def of_products(cls, shift: np.ndarray, gram: np.ndarray, sums: np.ndarray, rows: int) -> "ShiftedGram":
        """The state of a block of ``rows`` rows without missing cells, from Z^T Z (``gram``,
        n x n) and the column sums of Z (``sums``, n) for Z = X - ``shift``."""
        out = cls(gram.shape[0])
        out.shift = np.array(shift, dtype=np.float64)
        out.a = gram
        out.b = np.repeat(np.asarray(sums, dtype=np.float64)[:, None], gram.shape[0], axis=1)
        out.c = np.full(gram.shape, float(rows))
        return out

    def moved(self, shift: np.ndarray) -> "ShiftedGram":
        """The same state about another shift (see the class docstring)."""
        d = self.shift - np.asarray(shift, dtype=np.float64)
        out = ShiftedGram(self.width)
        out.shift = np.array(shift, dtype=np.float64)
        with np.errstate(over="ignore", invalid="ignore"):  # overflowing moments stay non-finite
            bd = self.b * d[None, :]
            out.a = self.a + bd + bd.T + self.c * np.outer(d, d)
            out.b = self.b + d[:, None] * self.c
        out.c = self.c.copy()
        return out

    def merge(self, other: "ShiftedGram") -> "ShiftedGram":
        """The state of two disjoint row sets, about the count-weighted mean of the two
        shifts (per column; a side without finite cells in a column does not pull it)."""
        mine, theirs = np.diag(self.c), np.diag(other.c)
        total = mine + theirs
        weight = np.divide(theirs, total, out=np.zeros_like(total), where=total > 0)
        shift = self.shift + (other.shift - self.shift) * weight
        merged = self.moved(shift)
        moved = other.moved(shift)
        merged.a += moved.a
        merged.b += moved.b
        merged.c += moved.c
        return merged

    def select(self, columns: list[int]) -> "ShiftedGram":
        """The state restricted to the given columns."""
        out = ShiftedGram(len(columns))
        index = np.ix_(columns, columns)
        out.shift = self.shift[columns]
        out.a, out.b, out.c = self.a[index], self.b[index], self.c[index]
        return out

    def gram(self, shift: np.ndarray, scale: np.ndarray) -> GramSketch:
        """The Gram sketch of (x - shift) / scale with missing cells set to 0."""
        moved = self.moved(shift)
        out = GramSketch(self.width)
        out.gram = moved.a / np.outer(scale, scale)
        return out


class RowSketch:
    """The raw rows themselves (shape (m, n), NaN for missing cells), for tables whose
    columns far outnumber their rows: there the sketch works on the m x m side (the row
    Gram matrix Z Z^T) and never forms an n x n matrix.

    At most ``limit`` rows are kept. Beyond that, the kept rows are a uniform sample without
    replacement: the ``limit`` rows with the largest ``keys`` (one key per global row, given
    by the caller from a counter-based generator, so the sample does not depend on how the
    rows were split into blocks or partitions), and ``gram`` scales the second moments by
    seen / kept, an unbiased estimate of Z^T Z. Memory: limit x n values (8 bytes each) plus
    the keys, whatever the row count. ``merge`` of two disjoint row sets is associative.
    """

    def __init__(self, width: int, limit: int):
        self.width, self.limit = int(width), max(int(limit), 1)
        self.rows = np.zeros((0, width))
        self.keys = np.zeros(0)
        self.positions = np.zeros(0, np.int64)
        self.seen = 0
        self._pending: list[tuple[np.ndarray, np.ndarray, np.ndarray]] = []  # added, not yet kept
        self._pending_rows = 0

    def __getstate__(self) -> dict:  # pickled (to or from a worker) with every row in place
        self._flush()
        return self.__dict__

    @property
    def sampled(self) -> bool:
        self._flush()
        return self.seen > self.rows.shape[0]

    def add(self, first: int, block: np.ndarray, keys: np.ndarray) -> None:
        """Rows first .. first + b - 1 of the raw table (``block`` (b, n)), with their keys (b,)."""
        if block.shape[0] == 0:
            return
        self.seen += block.shape[0]
        positions = first + np.arange(block.shape[0], dtype=np.int64)
        self._pending.append((np.array(block, dtype=np.float64), np.asarray(keys, dtype=np.float64),
                              positions))
        self._pending_rows += block.shape[0]
        if self._pending_rows >= max(self.limit, self.rows.shape[0]):  # amortised: O(1) copies per row
            self._flush()

    def _flush(self) -> None:
        if self._pending:
            parts = [(self.rows, self.keys, self.positions)] + self._pending
            self._pending, self._pending_rows = [], 0
            self._keep(np.vstack([p[0] for p in parts]), np.concatenate([p[1] for p in parts]),
                       np.concatenate([p[2] for p in parts]))

    def _keep(self, rows: np.ndarray, keys: np.ndarray, positions: np.ndarray) -> None:
        if rows.shape[0] > self.limit:
            top = np.lexsort((positions, -keys))[: self.limit]
            top = top[np.argsort(positions[top])]  # kept rows in row order
            rows, keys, positions = rows[top], keys[top], positions[top]
        self.rows, self.keys, self.positions = rows, keys, positions

    def merge(self, other: "RowSketch") -> "RowSketch":
        self._flush()
        other._flush()
        if self.seen == 0 or other.seen == 0:  # nothing to combine: no copy of the rows
            return other if self.seen == 0 else self
        out = RowSketch(self.width, min(self.limit, other.limit))
        out.seen = self.seen + other.seen
        out._keep(np.vstack([self.rows, other.rows]), np.concatenate([self.keys, other.keys]),
                  np.concatenate([self.positions, other.positions]))
        return out

    def select(self, columns: list[int]) -> "RowSketch":
        """The rows restricted to the given columns."""
        self._flush()
        out = RowSketch(len(columns), self.limit)
        out.rows, out.keys, out.positions, out.seen = (self.rows[:, columns], self.keys,
                                                       self.positions, self.seen)
        return out

    def gram(self, shift: np.ndarray, scale: np.ndarray) -> "RowGram":
        """The rows of (x - shift) / scale with missing cells set to 0, weighted by
        sqrt(seen / kept) when the rows are a sample. The kept rows are transformed in place
        (no second m x n copy): the state is spent afterwards."""
        self._flush()
        z, self.rows = self.rows, None
        with np.errstate(invalid="ignore", over="ignore"):
            z -= shift
            z /= scale
        z[~np.isfinite(z)] = 0.0
        kept = z.shape[0]
        if self.seen > kept and kept:
            z *= np.sqrt(self.seen / kept)
        return RowGram(z)


class RowGram:
    """Stands for the Gram matrix Z^T Z (n x n) through the rows Z (shape (m, n)) when m < n,
    and gives the sketch of ``GramSketch`` without forming it. Z itself is a factor with
    F^T F = Z^T Z (so pivoted QR of F is pivoted QR of the table, and C^+ Z = F[:, J]^+ F
    exactly). The row Gram matrix K = Z Z^T = U diag(s^2) U^T (m x m) has the squared
    singular values of Z, and the right singular vectors are V = Z^T U diag(1/s) (the SVD
    from the eigen-decomposition of the cross-product matrix: common practice, e.g. the
    "snapshot" form of principal components). V is formed only when asked for (the default
    CUR path never needs it).

    Cost: one m x m x n product and an m x m eigen-decomposition (plus one more product if V
    is used); memory O(m n), no n x n matrix. Like ``GramSketch``, forming K squares the
    condition number (singular values below about 1e-7 s_1 are not resolved).
    """

    def __init__(self, rows: np.ndarray):
        self.rows = np.ascontiguousarray(rows, dtype=np.float64)
        self.width = self.rows.shape[1]

    def rescale(self, factor: float) -> None:
        """Multiply the Gram matrix by ``factor`` (the rows by its square root)."""
        self.rows *= np.sqrt(factor)

    def diagonal(self) -> np.ndarray:
        """diag(Z^T Z) (n,): the column sums of squares."""
        with np.errstate(over="ignore", invalid="ignore"):
            return np.einsum("ij,ij->j", self.rows, self.rows)

    def factor_and_spectrum(self) -> tuple[np.ndarray, Spectrum]:
        """F = Z (m, n), with F^T F = Z^T Z, and the spectrum (p = min(m, n) values)."""
        z = self.rows
        p = min(z.shape)
        if p == 0:
            return z, Spectrum(np.zeros(0), np.zeros((self.width, 0)))
        k = z @ z.T
        with threadpool_limits(limits=1, user_api="blas"):  # measured 5x faster at m = 1,000
            eigenvalues, u = np.linalg.eigh((k + k.T) / 2.0)  # on 2 busy cores
        del k
        order = np.argsort(eigenvalues)[::-1][:p]
        values = np.sqrt(np.clip(eigenvalues[order], 0.0, None))
        return z, _RowSpectrum(values, u[:, order], z)


class _RowSpectrum(Spectrum):
    """A spectrum whose right singular vectors V = Z^T U diag(1/s) (n, p) are formed on
    first use. Directions at rounding level (s below 1e-7 s_1, unresolved after squaring)
    get zero vectors."""

    def __init__(self, values: np.ndarray, left: np.ndarray, rows: np.ndarray):
        self.values = values
        self._left, self._rows, self._right = left, rows, None

    @property
    def right(self) -> np.ndarray:
        if self._right is None:
            s = self.values
            inv = np.divide(1.0, s, out=np.zeros_like(s), where=s > s[0] * 1e-7)
            self._right = (self._rows.T @ self._left) * inv
        return self._right
