"""The pieces the encode pass's sub-blocks are built on, each against an outside reference:

* ``BlockSums.add`` and ``BlockSums.partial`` / ``add_partials`` over uneven sub-ranges give
  the sums of a direct numpy computation over the whole range;
* ``arithmetic.approximate`` into a buffer of any layout has the bits of numpy's own
  ``filled @ weights + offset``;
* ``arithmetic.slack_limit`` is at least every entry of the slack, whose definition
  (Higham, "Accuracy and Stability of Numerical Algorithms", 2nd ed., eq. 3.4-3.5) is
  evaluated here in exact rational arithmetic (``fractions.Fraction``).
"""

from __future__ import annotations

from fractions import Fraction

import numpy as np
import pytest

from rankfold.udfs.errors import InvalidInputError
from rankfold.udfs.store import arithmetic
from rankfold.udfs.store.aggregate import BlockSums


def _block_sums_reference(shift, filled, codes, xhat, block, mask, overridden):
    """Every field of a BlockSums record by direct numpy sums over one row range."""
    d = filled - shift
    null = mask & overridden
    delta = np.where(overridden & ~mask, block - xhat, 0.0)
    corr = np.where(null, -xhat, delta)
    mag = np.where(overridden, np.where(mask, 0.0, np.abs(block)) + np.abs(xhat), 0.0)
    return {
        "rows": filled.shape[0],
        "f_sum": filled.sum(axis=0), "f_abs": np.abs(filled).sum(axis=0), "d_sum": d.sum(axis=0),
        "gram": np.einsum("ik,il->kl", d, d).ravel(),
        "gram_abs": np.einsum("ik,il->kl", np.abs(d), np.abs(d)).ravel(),
        "q_sum": codes.sum(axis=0), "q_abs": np.abs(codes).sum(axis=0), "q_sq": (codes**2).sum(axis=0),
        "ov_cells": overridden.sum(axis=0), "ov_nulls": null.sum(axis=0),
        "ov_corr": np.where(overridden, corr, 0.0).sum(axis=0),
        "ov_abs": mag.sum(axis=0), "ov_sq": np.where(overridden, delta**2, 0.0).sum(axis=0),
    }


def _assert_record(record, reference):
    for name, value in reference.items():
        np.testing.assert_allclose(np.asarray(record[name], np.float64), np.asarray(value, np.float64),
                                   rtol=1e-12, atol=1e-12, err_msg=name)


def test_block_sums_partials_match_numpy_sums():
    rng = np.random.default_rng(5)
    b, n, c = 90, 6, 2
    shift = rng.normal(size=c)
    filled, xhat = rng.normal(size=(b, c)), rng.normal(size=(b, n))
    block = xhat + 0.1 * rng.normal(size=(b, n))
    mask = rng.random((b, n)) < 0.1
    block[mask] = np.nan
    codes = np.zeros((b, n))
    coded = np.array([1, 4])
    codes[:, coded] = rng.integers(-5, 6, size=(b, coded.size))
    exact = np.array([0, 3])                     # whole columns stored exactly
    scattered = rng.random((b, n)) < 0.15        # other cells stored exactly
    scattered[:, exact] = False
    overridden = scattered.copy()
    overridden[:, exact] = True
    reference = _block_sums_reference(shift, filled, codes, xhat, block, mask, overridden)

    # the public add: one record per row group, from the approximated mask
    sums = BlockSums(n, c, shift)
    sums.add(100, filled, codes, xhat, block, mask, ~overridden, np.ones(b))
    assert [r["first_row"] for r in sums.records] == [100]
    _assert_record(sums.records[0], reference)

    # partials over uneven sub-ranges, exact columns summed per column, codes of two columns
    sums = BlockSums(n, c, shift)
    cuts = [0, 1, 8, 40, 90]
    partials = []
    for lo, hi in zip(cuts[:-1], cuts[1:]):
        rows, cols = np.nonzero(scattered[lo:hi])
        partials.append(sums.partial(filled[lo:hi], codes[lo:hi][:, coded], xhat[lo:hi], block[lo:hi],
                                     mask[lo:hi], code_columns=coded, exact_columns=exact,
                                     cells=(rows, cols)))
    sums.add_partials(100, partials, np.ones(b))
    _assert_record(sums.records[0], reference)
    with pytest.raises(InvalidInputError, match="cover 89 rows, but 90 row figures"):
        sums.add_partials(100, partials[1:], np.ones(b))


@pytest.mark.parametrize("layout_of_out", ["C", "F", "F-view"])
def test_approximate_into_a_buffer_has_the_bits_of_numpys_product(layout_of_out):
    rng = np.random.default_rng(7)
    filled = np.asfortranarray(rng.normal(size=(300, 9)) * 10.0 ** rng.integers(-5, 6, 9))
    weights, offset = rng.normal(size=(9, 40)), rng.normal(size=40)
    expected = filled @ weights + offset  # numpy's own product and broadcast sum
    if layout_of_out == "C":
        out = np.empty((300, 40))
    elif layout_of_out == "F":
        out = np.empty((300, 40), order="F")
    else:  # the first rows of a larger column-major buffer, as the encode pass uses them
        out = np.empty((40, 512)).T[:300]
    result = arithmetic.approximate(filled, weights, offset, out=out)
    assert result is out
    assert np.array_equal(out, expected)


def test_slack_limit_bounds_every_slack_entry_in_exact_arithmetic():
    rng = np.random.default_rng(9)
    b, c, n = 40, 5, 7
    filled = rng.normal(size=(b, c)) * 10.0 ** rng.integers(-30, 31, size=c)
    weights = rng.normal(size=(c, n)) * 10.0 ** rng.integers(-20, 21, size=(c, n))
    offset = rng.normal(size=n) * 1e10
    term = rng.integers(-1000, 1000, size=(b, 2)) * 1e-3
    columns = np.array([2, 5])
    limit = arithmetic.slack_limit(filled, weights, offset, term, columns)
    computed = arithmetic.slack(filled, weights, offset, term, residual_columns=columns)
    assert np.all(computed <= limit[None, :])
    # the definition (module docstring of store/arithmetic.py; Higham 2002, eq. 3.4-3.5):
    # 2 gamma_{c+3} (|offset_j| + sum_k |w_kj| |f_ik| + |r_ij|), gamma_m = m u / (1 - m u)
    u = Fraction(1, 2**53)
    gamma = (c + 3) * u / (1 - (c + 3) * u)
    for j in range(n):
        largest = Fraction(0)
        for i in range(b):
            magnitude = abs(Fraction(offset[j])) + sum(abs(Fraction(weights[k, j])) * abs(Fraction(filled[i, k]))
                                                    for k in range(c))
            if j in columns:
                magnitude += abs(Fraction(term[i, list(columns).index(j)]))
            largest = max(largest, 2 * gamma * magnitude)
        assert Fraction(limit[j]) >= largest
        assert limit[j] <= float(largest) * (1 + 1e-12) * 1e30  # finite and of the right size


def test_slack_limit_is_not_finite_when_it_cannot_tell():
    filled = np.array([[1e200, 1.0]])
    weights = np.array([[1e200], [1.0]])
    assert not np.isfinite(arithmetic.slack_limit(filled, weights, np.zeros(1))).all()


def test_stored_column_norm_covers_the_rounding_of_its_sum():
    # One large residual and thousands of tiny ones: a float64 sum of squares drops most of
    # the tiny squares (here about 2e-15 of the total, five times the 4u that rounding up a
    # figure covers). The stored err_l2 must still be at least the exact norm, computed in
    # exact rational arithmetic (Python's fractions.Fraction).
    from fractions import Fraction

    from rankfold.udfs.passes.encode import ColumnLedger

    rng = np.random.default_rng(0)  # invented residuals
    for _ in range(20):
        rows = 4096
        e = 3.1622776601683794e-09 * rng.uniform(0.5, 1.5, (rows, 1))
        e[rng.integers(rows), 0] = 1.0
        ledger = ColumnLedger.empty(1)
        for lo in range(0, rows, 512):
            ledger.add(e[lo:lo + 512], np.ones((min(512, rows - lo), 1), bool))
        exact = sum(Fraction(float(v)) ** 2 for v in e[:, 0])
        stored = ledger.l2_upper(rows)[0]
        assert Fraction(float(stored)) ** 2 >= exact
        # and stays tight: stored to 24 significant bits, rounded up (arithmetic.COLUMN_FIGURE_BITS)
        assert stored <= float(np.sqrt(float(exact))) * (1 + 1e-11) * (1 + 2.0**-23)
