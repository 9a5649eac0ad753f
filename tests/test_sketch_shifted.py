"""The one-pass sketch: co-moments about per-block shifts (``factor.sketch.ShiftedGram``), moved
to the final means after the pass, against numpy computed on the whole table at once.

Reference: the Gram matrix of the standardized table computed directly with numpy
(``numpy.nanmean``, ``numpy.nanstd``, a matrix product), and the shifted-data identity of Chan,
Golub, LeVeque (Am. Stat. 37(3), 1983) that the class extends to co-moments. Tables are
invented (fixed seeds).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import rankfold
from rankfold.udfs.passes.profile import ColumnProfile, Fingerprint, Transform, profile_rows
from rankfold.udfs.factor.sketch import GramSketch, ShiftedGram


def _numpy_gram(x: np.ndarray, kind: str) -> np.ndarray:
    """Gram matrix of the transformed table, missing cells at the column mean (numpy)."""
    valid = np.isfinite(x)
    with warnings.catch_warnings():  # columns without a finite cell: mean NaN, then 0
        warnings.simplefilter("ignore", RuntimeWarning)
        mean = np.nan_to_num(np.nanmean(np.where(valid, x, np.nan), axis=0))
        std = np.nanstd(np.where(valid, x, np.nan), axis=0)
    shift = mean if kind in ("center", "standardize") else np.zeros(x.shape[1])
    scale = np.where((std > 0) & np.isfinite(std), std, 1.0) if kind == "standardize" else np.ones(x.shape[1])
    z = np.where(valid, (x - shift) / scale, 0.0)
    return z.T @ z


def _one_pass(x: np.ndarray, kind: str, cuts: list[int]) -> np.ndarray:
    """The builder's route: blocks at ``cuts``, profile and co-moments merged, then moved."""
    profile, fingerprint, gram = ColumnProfile.empty(x.shape[1]), Fingerprint(), ShiftedGram(x.shape[1])
    bounds = [0, *cuts, x.shape[0]]
    for lo, hi in zip(bounds[:-1], bounds[1:]):
        profile, gram = profile_rows(lo, x[lo:hi], None, profile, fingerprint, gram)
    transform = Transform.fit(kind, profile)
    return gram.gram(transform.shift, transform.scale).gram


def _invented(seed: int, rows: int = 3000, width: int = 7, missing: float = 0.03) -> np.ndarray:
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((rows, 3)) @ rng.standard_normal((3, width))
    # means up to 1e6 times the spread: the deviations keep ~10 significant digits in float64
    x = x * np.logspace(-1, 4, width) + np.array([1e5, -5e6, 0, 3.0, 1e-4, 7e5, -2e8][:width])
    x[rng.random(x.shape) < missing] = np.nan
    x[rng.random(x.shape) < missing / 3] = np.inf
    return x


@pytest.mark.parametrize("kind", ["standardize", "center", "none"])
def test_one_pass_gram_matches_numpy_with_large_means_and_missing_cells(kind):
    x = _invented(1)
    ours, reference = _one_pass(x, kind, [1, 700, 701, 2500]), _numpy_gram(x, kind)
    scale = np.sqrt(np.outer(np.diag(reference), np.diag(reference)))
    assert np.all(np.abs(ours - reference) <= 1e-10 * scale + 1e-300)  # measured <= 8.9e-12


def test_shifted_gram_merge_is_associative_and_block_independent():
    x = _invented(2, rows=500)
    finite = np.isfinite(x)

    def state(lo, hi):
        block = x[lo:hi]
        shift = np.nanmean(np.where(finite[lo:hi], block, np.nan), axis=0)
        return ShiftedGram.of_block(block, shift, finite[lo:hi])

    left = state(0, 100).merge(state(100, 300)).merge(state(300, 500))
    right = state(0, 100).merge(state(100, 300).merge(state(300, 500)))
    whole = state(0, 500)
    target = np.nanmean(np.where(finite, x, np.nan), axis=0)
    for other in (right, whole):
        a, b = left.moved(target), other.moved(target)
        for mine, theirs in ((a.a, b.a), (a.b, b.b), (a.c, b.c)):
            assert np.allclose(mine, theirs, rtol=1e-9, atol=1e-9 * np.abs(theirs).max())
    # C counts the rows where both columns are finite (V^T V with V the finite mask, numpy)
    assert np.array_equal(left.c, finite.T.astype(float) @ finite.astype(float))


@settings(max_examples=40, deadline=None, derandomize=True, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2**32 - 1), rows=st.integers(1, 80), width=st.integers(1, 6),
       cut=st.floats(0, 1), kind=st.sampled_from(["standardize", "center", "none"]))
def test_one_pass_gram_property(seed, rows, width, cut, kind):
    x = _invented(seed, rows, width, missing=0.1)
    ours = _one_pass(x, kind, sorted({int(cut * rows)} - {0, rows}))
    reference = _numpy_gram(x, kind)
    scale = np.sqrt(np.outer(np.diag(reference), np.diag(reference)))
    assert np.all(np.abs(ours - reference) <= 1e-9 * scale + 1e-12)  # measured <= 1.5e-10


def test_compress_reports_the_spectrum_of_the_standardized_table(tmp_path):
    # The archive's singular values come from the one-pass sketch; numpy.linalg.svd of the
    # standardized table (NaN at the column mean) is the reference.
    x = _invented(3, rows=2000, width=7, missing=0.0)
    archive = rankfold.compress(x, tmp_path / "s.rankfold", rank=2)
    z = (x - x.mean(axis=0)) / x.std(axis=0)
    s = np.linalg.svd(z, compute_uv=False)
    stored = np.asarray(archive.manifest["spectrum"])
    assert np.allclose(stored[:3], s[:3], rtol=1e-13, atol=0)  # measured 4.4e-16 relative (was 1e-9)


def test_gram_of_a_plain_block_equals_the_gram_sketch():
    x = np.random.default_rng(4).standard_normal((300, 5)) + 100.0
    plain = GramSketch(5)
    plain.update(x - x.mean(axis=0))
    shifted = ShiftedGram.of_block(x, x[:10].mean(axis=0)).gram(x.mean(axis=0), np.ones(5))
    # measured: at most 2.8e-13 apart, 1e-15 of the largest entry; allowed 1e-14 of it
    np.testing.assert_allclose(shifted.gram, plain.gram, rtol=0, atol=1e-14 * np.abs(plain.gram).max())


def test_a_block_without_finite_cells_in_a_column_does_not_pull_its_shift():
    # Found by the property test: a block whose only cell of a large-mean column is missing
    # had shift 0 there, and moving the other block's co-moments to 0 cancelled digits.
    x = np.array([[np.nan, 1.0], [100000.73, 2.0], [100000.0, 4.0]])
    # measured 3.3e-16 relative; the default atol (1e-8) dropped: the entries are of order 1
    assert np.allclose(_one_pass(x, "standardize", [1]), _numpy_gram(x, "standardize"), rtol=1e-12, atol=0)
