"""The row-order fingerprint that proves two passes saw the same table: its value against a
numpy dot product, with and without the scale pass, and its verdict on changed rows."""

from __future__ import annotations

import numpy as np

from rankfold.udfs.passes.profile import Fingerprint, _row_weights  # private: the weights have no public path


def _table(seed: int = 0) -> np.ndarray:
    x = np.random.default_rng(seed).standard_normal((3000, 6)) * 1e3  # invented values
    x[5, 1], x[17, 1], x[40, 3], x[41, 4] = np.nan, np.inf, -np.inf, np.nan
    return x


def test_value_without_the_scale_pass_equals_numpy_with_missing_cells_at_zero():
    x = _table()
    quick = Fingerprint()
    for lo in range(0, 3000, 700):
        quick.update(lo, x[lo:lo + 700], with_scale=False)
    g = _row_weights(0, 3000)
    reference = g @ np.where(np.isfinite(x), x, 0.0)  # numpy.dot over the finite cells
    assert np.allclose(quick.value, reference, rtol=1e-13, atol=0)  # measured 4.6e-15 relative
    assert np.all(quick.scale == 0)


def test_two_passes_match_and_a_moved_row_does_not():
    x = _table(1)
    first, second, moved = Fingerprint(), Fingerprint(), Fingerprint()
    first.update(0, x)
    for lo in range(0, 3000, 512):  # other blocks, other summation order
        second.update(lo, x[lo:lo + 512], with_scale=False)
    swapped = x.copy()
    swapped[[10, 11]] = swapped[[11, 10]]
    moved.update(0, swapped, with_scale=False)
    assert first.matches(second) and second.matches(first)
    assert not first.matches(moved)
