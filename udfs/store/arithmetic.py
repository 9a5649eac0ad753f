"""Rebuild arithmetic and its floating-point slack: the single place where a rebuilt value
and its bound are computed, used by the encode pass and by every reader.

A numeric column j is rebuilt from the c basis values of its row as

    xhat_ij = offset_j + sum_k weights[k, j] * f(x_i,J_k)

where f replaces a missing (NULL) or non-finite basis value by that basis column's fill.

Floating-point slack. Any evaluation order of a sum of c + 1 terms satisfies
|fl(s) - s| <= gamma_{c+1} * sum |terms| with gamma_n = n u / (1 - n u), u = 2^-53
(Higham, "Accuracy and Stability of Numerical Algorithms", 2nd ed., 2002, eq. 3.4-3.5).
The encode pass and a later rebuild (another block shape, a SQL expression, another engine)
may sum in different orders, so they differ by at most
2 gamma_{c+1} S_ij with S_ij = |offset_j| + sum_k |w_kj| |f(x_ik)|. ``slack`` returns
2 gamma_{c+2} fl(S_ij): S_ij is a sum of non-negative terms, so its computed value is at least
S_ij (1 - gamma_{c+1}), and the step from gamma_{c+1} to gamma_{c+2} more than covers that
and the rounding of the final product. S_ij is summed term by term rather than bounded by
||w_j||_1 max_k |f(x_ik)|: when basis columns are in different units, that shortcut was
measured 10^5 times looser.
"""

from __future__ import annotations

import numpy as np

__all__ = ["UNIT_ROUNDOFF", "fill_missing", "approximate", "add_residual", "slack", "slack_factor", "slack_limit",
           "round_up", "round_up_short", "COLUMN_FIGURE_BITS", "round_up_compact", "quantize", "trim_mantissa", "encode_codes", "decode_codes",
           "serve"]

UNIT_ROUNDOFF = 2.0**-53


def fill_missing(basis: np.ndarray, fill: np.ndarray) -> np.ndarray:
    """Replace non-finite entries (NaN stands for NULL here) of ``basis`` (b, c) by ``fill`` (c,)."""
    bad = ~np.isfinite(basis)
    if bad.any():
        basis = np.where(bad, fill[None, :], basis)
    return basis


def approximate(filled_basis: np.ndarray, weights: np.ndarray, offset: np.ndarray,
                out: np.ndarray | None = None, product: np.ndarray | None = None) -> np.ndarray:
    """Rebuilt values (b, n) from filled basis values (b, c), weights (c, n) and offsets (n,).

    A BLAS matrix product: its summation order may change with the request's shape, so two
    requests can differ in the last bits; ``slack`` covers any order (module docstring).
    Measured 2-4x faster than a fixed-order elementwise sum at c = 100 (20,000 x 1,000).

    ``out``: an optional float64 array (b, n) that receives the result and is returned. The
    product is taken as filled_basis @ weights whatever the layout of ``out`` (BLAS may sum in
    another order when the operands are swapped), so the result has the same bits as without
    ``out``; a C-contiguous ``out`` also saves the temporaries of a new result.
    ``product``: an optional C-contiguous float64 array (b, n) that receives the matrix product
    when ``out`` is not C-contiguous (the same product, in place of a fresh temporary).
    """
    with np.errstate(over="ignore", invalid="ignore"):
        if out is None:
            return filled_basis @ weights + offset[None, :]
        if out.flags.c_contiguous:
            np.matmul(filled_basis, weights, out=out)
            out += offset[None, :]
        else:  # via the transposes: a ufunc over operands of mixed layouts ran 20x slower
            np.add(np.matmul(filled_basis, weights, out=product).T, offset[:, None], out=out.T)
        return out


def _gamma(terms: int) -> float:
    nu = terms * UNIT_ROUNDOFF
    return nu / (1.0 - nu)


def slack_factor(basis: int) -> float:
    """2 gamma_{c+3} for ``basis`` = c entries: the slack is this factor times the magnitude
    |offset_j| + sum_k |w_kj| |f(x_ik)| + |residual_ij| (``slack``; the SQL rebuild,
    ``sql_rebuild``, multiplies by the same number)."""
    return 2.0 * _gamma(basis + 3)


def add_residual(values: np.ndarray, codes: np.ndarray | None, step: np.ndarray | None) -> np.ndarray:
    """Add a quantized residual: values (b, n) + codes (b, n) * step (n,); NaN steps add nothing."""
    if codes is None or step is None:
        return values
    term = codes * np.where(np.isfinite(step), step, 0.0)[None, :]
    with np.errstate(over="ignore", invalid="ignore"):
        return values + term


def slack(filled_basis: np.ndarray, weights: np.ndarray, offset: np.ndarray,
          residual_term: np.ndarray | None = None, *, residual_columns: np.ndarray | None = None,
          out: np.ndarray | None = None) -> np.ndarray:
    """Upper limit (b, n) on how far two evaluations of ``approximate`` (plus an optional
    quantized residual term, shape (b, n)) in any summation order can differ:
    2 gamma_{c+3} (|offset_j| + sum_k |w_kj| |f(x_ik)| + |residual_ij|), see the module
    docstring. The sum of non-negative terms is itself a matrix product; its rounding is
    covered by the step from gamma_{c+2} to gamma_{c+3}.

    ``residual_columns`` (q,): the residual term has shape (b, q) and belongs to these columns
    only (the same values as a (b, n) term that is 0 in the other columns).
    ``out``: an optional (b, n) buffer for the result, as in ``approximate``.
    """
    magnitude = approximate(np.abs(filled_basis), np.abs(weights), np.abs(offset), out=out)
    with np.errstate(over="ignore", invalid="ignore"):  # magnitude is ours: update in place
        if residual_term is not None:
            where = slice(None) if residual_columns is None else residual_columns
            magnitude[:, where] += np.abs(residual_term)
        magnitude *= slack_factor(weights.shape[0])
    return magnitude


def slack_limit(filled_basis: np.ndarray, weights: np.ndarray, offset: np.ndarray,
                residual_term: np.ndarray | None = None,
                residual_columns: np.ndarray | None = None, *,
                residual_max: np.ndarray | None = None) -> np.ndarray:
    """Per column j, shape (n,): a number at least as large as every computed entry of column
    j of ``slack`` with the same arguments, in O(b c + c n + b q) instead of a (b, n) product.
    Not finite when an entry may not be (overflow, or a NaN among the inputs).

    With F_k = max_i |f_ik|, each magnitude in ``slack`` is at most
    L_j = |offset_j| + sum_k |w_kj| F_k + max_i |residual_ij|. Both are sums of c + 2
    non-negative terms, computed within a relative gamma_{c+2} (module docstring), and three
    more roundings follow (the products by 2 gamma_{c+3} and by the factor below); while
    (c + 3) u < 2^-10 they all fit in the factor 1 + 8 (c + 3) u:
    (1 + gamma_{c+2}) (1 + u) / ((1 - gamma_{c+2}) (1 - u)^3) < 1 + (2.01 (c + 2) + 4) u.

    ``residual_max`` (q,): max_i |residual_ij| per column of the residual term, when the
    caller has it (the encode pass, from its codes' range); the term is then not scanned.
    """
    c = weights.shape[0]
    with np.errstate(over="ignore", invalid="ignore"):
        largest = np.abs(filled_basis).max(axis=0) if filled_basis.shape[0] else np.zeros(c)
        magnitude = largest @ np.abs(weights) + np.abs(offset)
        if residual_term is not None and residual_term.size:
            where = slice(None) if residual_columns is None else residual_columns
            magnitude[where] += (np.abs(residual_term).max(axis=0) if residual_max is None
                                 else residual_max)
        return (2.0 * _gamma(c + 3)) * magnitude * (1.0 + 8.0 * (c + 3) * UNIT_ROUNDOFF)


def quantize(values: np.ndarray, step: float | np.ndarray) -> np.ndarray:
    """Nearest integer codes of values / step as float64 (non-finite values give NaN).

    With code q, q * step is within step / 2 of the value (up to the rounding of the
    product, which the encode pass measures)."""
    with np.errstate(over="ignore", invalid="ignore"):
        return np.rint(values / step)


def trim_mantissa(values: np.ndarray, bits: np.ndarray | int) -> np.ndarray:
    """Round float64 ``values`` to ``bits`` mantissa bits (per column when an array of shape
    (n,) is given for values of shape (c, n)); the trailing zero bits compress to nothing.
    The relative change of each value is at most 2^-bits."""
    bits = np.broadcast_to(np.asarray(bits, dtype=np.int64), values.shape[-1:])
    mantissa, exponent = np.frexp(values)
    scale = np.ldexp(1.0, bits)[None, :] if values.ndim == 2 else np.ldexp(1.0, bits)
    return np.ldexp(np.rint(mantissa * scale) / scale, exponent)


def round_up(values: np.ndarray) -> np.ndarray:
    """Move measured error figures up past the rounding of their own computation (a relative
    4u) and one more ulp, so that a stored figure is never below the exact one. A measured 0
    stays 0: a floating-point difference is 0 only when both operands are equal (Sterbenz),
    and sums and maxima of zeros are exactly 0."""
    values = np.asarray(values, dtype=np.float64)
    with np.errstate(over="ignore"):
        up = np.nextafter(values * (1.0 + 4.0 * UNIT_ROUNDOFF), np.inf)
    return np.where(values == 0.0, 0.0, up)


#: Mantissa bits of the column figures err_max and err_l2 as stored (columns.parquet): rounded up
#: to float32's precision, they loosen a column's bound by at most 2^-23 of itself, and their
#: 29 trailing zero bits compress away (columns.parquet of a real 6,830-column table at 0.01 std:
#: 324,158 -> 283,486 bytes; DEVELOPERS.md, "Sizes").
COLUMN_FIGURE_BITS = 24


def round_up_short(values: np.ndarray, bits: int = COLUMN_FIGURE_BITS) -> np.ndarray:
    """Non-negative error figures (float64) moved up past their own rounding (:func:`round_up`)
    and then up to ``bits`` significant bits, as float64 (no narrowing: any finite figure stays
    finite): never below the input, above it by at most 2^(1 - bits) relative. A figure the
    float64 grid cannot hold shorter (subnormal) or that would overflow stays as :func:`round_up`
    gives it; 0 stays 0."""
    values = round_up(values)
    mantissa, exponent = np.frexp(values)
    scale = 2.0**bits
    with np.errstate(over="ignore", invalid="ignore"):
        up = np.ldexp(np.ceil(mantissa * scale) / scale, exponent)
    return np.where((up >= values) & np.isfinite(up), up, values)


def round_up_compact(values: np.ndarray, bits: int = 8) -> np.ndarray:
    """Non-negative error figures as float32 with ``bits`` mantissa bits, never below the
    float64 input (rounded up, relative loosening at most 2^(1 - bits); inf stays inf).

    The row ledger is stored this way: the trailing zero bits compress away, so a per-row
    figure costs about one and a half bytes instead of eight.
    """
    values = round_up(values)
    mantissa, exponent = np.frexp(values)
    scale = 2.0**bits
    with np.errstate(over="ignore", invalid="ignore"):
        up = np.ldexp(np.ceil(mantissa * scale) / scale, exponent)
        narrow = up.astype(np.float32)
    low = narrow.astype(np.float64) < values
    if low.any():  # float32 underflow or rounding: step up to the next float32
        narrow[low] = np.nextafter(narrow[low], np.float32(np.inf))
    return narrow


def encode_codes(codes: np.ndarray) -> np.ndarray:
    """Signed integer codes (|q| < 2^31, any dtype) as zigzag uint32: 2q, or -2q - 1 below 0
    (see ``layout.code_sql`` for why).

    Always 32 bits: Parquet has no 8- or 16-bit physical type (uint8 and uint16 are INT32
    with a logical annotation), so a narrower type wrote byte-for-byte the same column chunks
    under every encoding and zstd level tried (measured on the codes of real tables, weather
    at 0.01 std and hfi at 0.1 std), and would have to be fixed for every row file of an
    archive before its first code is seen (DuckDB reads several files with the first one's
    type). Readers accept every width of ``table_schemas.CODE_TYPES``.

    Computed as (q << 1) ^ (q >> 63) in int64 (the arithmetic shift gives 0 or -1, so the
    exclusive or leaves 2q, or flips it to -2q - 1): the same numbers with fewer temporaries
    (measured 0.2 s against 1.5-2 s per 10^6 x 92 codes, column by column, on a loaded
    machine)."""
    q = np.asarray(codes).astype(np.int64)
    doubled = np.left_shift(q, 1)
    np.bitwise_xor(doubled, np.right_shift(q, 63, out=q), out=doubled)
    return doubled.astype(np.uint32)


def decode_codes(stored: np.ndarray) -> np.ndarray:
    """Zigzag codes of any unsigned width (uint8, uint16, uint32) back to signed integers, as
    float64."""
    u = np.asarray(stored).astype(np.int64)
    return np.where(u % 2 == 0, u // 2, -((u + 1) // 2)).astype(np.float64)


def serve(values: np.ndarray, bounds: np.ndarray, approximated: np.ndarray, lower: np.ndarray,
          upper: np.ndarray, kind: np.ndarray, special: np.ndarray | None = None
          ) -> tuple[np.ndarray, np.ndarray]:
    """The values a reader hands out and bounds that hold for THEM, shape (b, q) each,
    computed IN PLACE in ``values`` and ``bounds`` (which are returned).

    ``values``/``bounds``: rebuilt values and their bounds (|true - value| <= bound);
    ``approximated`` (b, q): cells to serve (others, exact or NULL, keep their value);
    ``lower``/``upper`` (q,): each column's observed minimum and maximum (finite values;
    +-inf when unknown); ``kind`` (q,): 'i' integer column, 'f' float32, 'e' float16, 'd'
    float64; ``special`` (q,): columns that may hold NaN or infinite cells (None: any).

    * every approximated value is clamped into [lower_j, upper_j]. The true value lies in
      that interval, and clamping onto an interval that holds the true value never moves
      away from it (projection onto a convex set), so the bound stays valid as it is. Exact
      finite cells are true values, inside the interval: clamping leaves them as they are,
      so only columns with NaN or infinite cells need the mask;
    * integer columns: the clamped value c is rounded half to even to r, and the bound
      becomes the largest |t - r| over the integers t in [max(v - b, lower), min(v + b,
      upper)] -- the only values the true (integer) one can take. It is 0 when b < 0.5 (r is
      then the true value) and at most b + 1/2; the ends of the interval are widened to
      cover the rounding of v +- b;
    * float32 and float16 columns: the same on that type's grid -- the clamped value is
      rounded to the nearest number of the type (as the typed table holds it), and the bound
      becomes the farthest number of the type in [v - b, v + b] (within the range); 0 when
      only one is there, at most b plus half a unit in the last place.
    """
    special = np.ones(kind.shape, bool) if special is None else special
    plain = ~special
    # typed columns keep their stored values: v +- b (before clamping) is the tighter interval
    typed = {code: np.flatnonzero(kind == code) for code in ("i", "f", "e")}
    stored = {code: values[:, idx].copy() for code, idx in typed.items() if idx.size}
    with np.errstate(invalid="ignore", over="ignore"):
        if plain.all():  # the common case: one pass, in place
            np.clip(values, lower[None, :], upper[None, :], out=values)
        elif plain.any():
            idx = np.flatnonzero(plain)
            values[:, idx] = np.clip(values[:, idx], lower[idx][None, :], upper[idx][None, :])
        for j in np.flatnonzero(special):
            cells = approximated[:, j] & np.isfinite(values[:, j])
            values[cells, j] = np.clip(values[cells, j], lower[j], upper[j])
    for code, v in stored.items():
        idx = typed[code]
        c, b = values[:, idx], bounds[:, idx]
        a = approximated[:, idx] & np.isfinite(c)
        if not a.any():
            continue
        lo, hi = lower[idx][None, :], upper[idx][None, :]
        with np.errstate(invalid="ignore", over="ignore"):
            if code == "i":
                r, bound = _round_to_integers(c, v, b, lo, hi)
            else:
                r, bound = _narrow(c, v, b, np.float32 if code == "f" else np.float16, lo, hi)
        values[:, idx] = np.where(a, r, c)
        bounds[:, idx] = np.where(a, bound, b)
    return values, bounds


def _round_to_integers(c, v, b, lower, upper):
    """Served value and bound of integer cells (see ``serve``): c the clamped values, v the
    stored ones, b their bounds."""
    rounded = np.rint(c)
    # the interval v +- b, each end moved out by 4u (|v| + b): more than the rounding of
    # v - b, v + b and of this step itself
    margin = (np.abs(v) + b) * (4.0 * UNIT_ROUNDOFF)
    low = np.ceil(np.maximum(v - b - margin, lower))
    high = np.floor(np.minimum(v + b + margin, upper))
    bound = np.maximum(np.maximum(high - rounded, rounded - low), 0.0)
    empty = low > high
    if empty.any():  # breaks the bound's own premise: the triangle inequality, rounded up
        bound = np.where(empty, round_up(b + np.abs(rounded - v)), bound)
    return rounded, bound


def _narrow(c: np.ndarray, v: np.ndarray, b: np.ndarray, narrow: type, lower: np.ndarray,
            upper: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Served value and bound of float cells of a narrower type (see ``serve``): arrays of
    the clamped values, the stored values, their bounds and the column range (broadcast)."""
    with np.errstate(over="ignore", invalid="ignore"):
        served = c.astype(narrow)
        low = np.maximum(np.nextafter(v - b, -np.inf), lower)
        high = np.minimum(np.nextafter(v + b, np.inf), upper)
        first = low.astype(narrow)  # the smallest number of the type at or above low
        first = np.where(first.astype(np.float64) < low, np.nextafter(first, narrow(np.inf)), first)
        last = high.astype(narrow)  # the largest at or below high
        last = np.where(last.astype(np.float64) > high, np.nextafter(last, narrow(-np.inf)), last)
        r, a, z = served.astype(np.float64), first.astype(np.float64), last.astype(np.float64)
        within = round_up(np.maximum(np.maximum(z - r, r - a), 0.0))
        fallback = round_up(b + np.abs(r - v))
        ok = np.isfinite(r) & np.isfinite(a) & np.isfinite(z) & (a <= z)
    finite = np.isfinite(r)
    return np.where(finite, r, c), np.where(ok, within, np.where(finite, fallback, b))
