"""The in-place forms of the compress passes' arithmetic (issue 14, compress speed) give the
numbers of the plain formulas they replace, bit for bit, or, for the column statistics, those
of numpy within a stated tolerance:

* the encode pass's residual codes (``_Kernel._codes``): the nearest integers to
  (x - xhat) / step (numpy's ``rint``), 0 where not finite or beyond the code limit, added to
  xhat as code * step, for every column coded or some of them;
* zigzag codes (``arithmetic.encode_codes``): their definition, 2q for q >= 0 and -2q - 1
  below, evaluated on Python integers;
* the work buffers lent to ``arithmetic.approximate`` (``product``), ``BlockSums.partial``
  (``scratch``), ``Fingerprint.update`` (``scratch``) and the largest term given to
  ``arithmetic.slack_limit`` (``residual_max``);
* the stored basis codes (``encode.stored_basis``) with and without bad cells;
* the profile pass's statistics over sub-blocks that use its buffer: numpy's mean, std
  (population), min and max, and the co-moments about the mean as numpy's centred product.
"""

from __future__ import annotations

import numpy as np
import pytest

from rankfold.udfs.passes import encode
from rankfold.udfs.passes.profile import SUB_BLOCK_ROWS, ColumnProfile, Fingerprint, new_sketch, profile_rows
from rankfold.udfs.store import arithmetic
from rankfold.udfs.store.aggregate import BlockSums
from rankfold.udfs.store.model import Mixing


def _bits(a: np.ndarray) -> np.ndarray:
    """The float64 bit patterns (signed zeros and NaN payloads told apart)."""
    return np.ascontiguousarray(a, dtype=np.float64).view(np.int64)


def _kernel(n: int, coded: np.ndarray, steps: np.ndarray, limit: np.ndarray) -> encode._Kernel:
    mixing = Mixing(np.zeros((1, n)), np.zeros(n), np.zeros(1), np.array([0]))
    return encode._Kernel(mixing, np.zeros(0, np.intp), np.arange(n), coded, steps, np.full(n, np.inf),
                          np.zeros(0, np.intp), np.ones(n), None, code_limit=limit)


@pytest.mark.parametrize("n, coded", [(7, np.arange(7)), (7, np.array([1, 2, 4, 6])), (70, np.arange(0, 70, 2))],
                         ids=["all", "runs", "gathered"])
def test_kernel_codes_are_the_quantized_residual_masked_as_before(n, coded):
    rng = np.random.default_rng(11)  # invented values
    s = 300
    x = rng.normal(size=(s, n)) * 10.0 ** rng.integers(-3, 4, n)
    x[5, :] = np.nan
    x[6, :] = np.inf
    x[7, :] = -np.inf
    x[8, :] = 1e300  # codes beyond every limit
    xhat = x + rng.normal(size=(s, n))
    xhat[9, :] = -0.0
    x[9, :] = 0.0
    steps = rng.uniform(0.01, 2.0, coded.size)
    limit = np.full(coded.size, 2.0**31 - 1)
    limit[0] = 3.0  # a narrow type: many codes beyond it
    # the reference: the formulas the in-place form replaced (encode.py before issue 14's speed work)
    with np.errstate(invalid="ignore", over="ignore"):
        raw = arithmetic.quantize(x[:, coded] - xhat[:, coded], steps)
        usable = np.isfinite(raw) & (np.abs(raw) <= limit)
        codes_ref = np.where(usable, raw, 0.0)
        term_ref = codes_ref * steps[None, :]
        xhat_ref = xhat.copy()
        xhat_ref[:, coded] += term_ref
    # the encode pass's layouts: column-major buffers, the first rows of larger ones
    xhat_work = np.empty((n, 512)).T[:s]
    xhat_work[...] = xhat
    work, term_out = np.empty((n, s)).T, np.empty((n, s)).T[:, :coded.size]
    codes_out = np.empty((coded.size, 1000)).T[100:100 + s]
    kernel = _kernel(n, coded, steps, limit)
    assert kernel.all_coded == (coded.size == n)
    assert (kernel.runs is None) == (n == 70)  # 35 runs of one column: gathered
    with np.errstate(invalid="ignore", over="ignore"):
        codes, term, largest = kernel._codes(np.asfortranarray(x), xhat_work, work, codes_out, term_out)
    assert codes is codes_out
    assert np.array_equal(_bits(codes), _bits(codes_ref))
    assert np.array_equal(_bits(term), _bits(term_ref))
    assert np.array_equal(_bits(xhat_work), _bits(xhat_ref))
    assert np.array_equal(largest, np.abs(term_ref).max(axis=0))
    assert (codes[:, 0] == 0).sum() > 100  # the narrow limit was exercised


def test_zigzag_codes_follow_their_definition():
    rng = np.random.default_rng(3)  # invented codes
    q = np.concatenate([rng.integers(-(2**31) + 1, 2**31, 2000), [0, 1, -1, 2**31 - 1, -(2**31) + 1]])
    expected = np.array([2 * v if v >= 0 else -2 * v - 1 for v in q.tolist()], dtype=np.uint64)
    for codes in (q.astype(np.float64), q.astype(np.int64), q[np.abs(q) < 2**31].astype(np.int32)):
        stored = arithmetic.encode_codes(codes)
        assert stored.dtype == np.uint32
        assert np.array_equal(stored.astype(np.uint64), expected[:stored.size])
        assert np.array_equal(arithmetic.decode_codes(stored), codes.astype(np.float64))
    column = np.empty((3, 5000)).T[:, 1]  # a strided column, as the row writer may pass
    column[...] = rng.integers(-1000, 1000, 5000)
    assert np.array_equal(arithmetic.encode_codes(column), arithmetic.encode_codes(column.copy()))


def test_lent_buffers_change_no_bit():
    rng = np.random.default_rng(5)  # invented values
    s, c, n = 257, 4, 9
    filled = rng.normal(size=(s, c)) * 10.0 ** rng.integers(-5, 6, c)
    weights, offset = rng.normal(size=(c, n)), rng.normal(size=n)
    out = np.empty((n, 400)).T[:s]
    expected = filled @ weights + offset  # numpy's own product and broadcast sum
    arithmetic.approximate(filled, weights, offset, out=out, product=np.empty((s, n)))
    assert np.array_equal(_bits(out), _bits(expected))

    codes = rng.integers(-50, 50, size=(s, 5)).astype(np.float64)
    xhat = rng.normal(size=(s, n))
    block = xhat + 0.1 * rng.normal(size=(s, n))
    sums = BlockSums(n, c, rng.normal(size=c))
    columns = np.array([0, 2, 3, 5, 8])
    plain = sums.partial(filled, codes, xhat, block, None, code_columns=columns)
    lent = sums.partial(filled, codes, xhat, block, None, code_columns=columns, scratch=np.empty((5, s)).T)
    for name in plain:
        assert np.array_equal(np.asarray(plain[name]), np.asarray(lent[name])), name

    a, b = Fingerprint(), Fingerprint()
    a.update(40, block, finite=True)
    b.update(40, block, finite=True, scratch=np.empty_like(block))
    assert np.array_equal(a.value, b.value) and np.array_equal(a.scale, b.scale)

    term = codes * 0.37
    assert np.array_equal(arithmetic.slack_limit(filled, weights, offset, term, columns),
                          arithmetic.slack_limit(filled, weights, offset, term, columns,
                                                 residual_max=np.abs(codes).max(axis=0) * 0.37))


def test_stored_basis_codes_with_and_without_bad_cells():
    rng = np.random.default_rng(8)  # invented values
    raw = rng.normal(size=(200, 3)) * 5.0
    raw[10, 1] = np.nan
    raw[11, 2] = 1e30  # beyond the int32 codes
    step = np.array([0.1, 0.2, np.nan])  # the third column kept as it is
    values, arrays = encode.stored_basis(raw, step, False)
    for k in range(3):
        if np.isfinite(step[k]):
            q = np.rint(raw[:, k] / step[k])  # arithmetic.quantize's definition
            bad = ~np.isfinite(q) | (np.abs(q) > 2.0**31 - 1)
            assert np.array_equal(_bits(values[:, k]), _bits(np.where(bad, np.nan, np.where(bad, 0.0, q) * step[k])))
            assert arrays[k].to_pylist() == [None if b else int(v) for b, v in zip(bad, q)]
        else:
            assert np.array_equal(_bits(values[:, k]), _bits(raw[:, k]))
    assert arrays[0].null_count == 0 and arrays[1].null_count == 1


@pytest.mark.parametrize("rows", [SUB_BLOCK_ROWS, 2 * SUB_BLOCK_ROWS + 123])
def test_profile_statistics_over_buffered_sub_blocks_are_numpys(rows):
    rng = np.random.default_rng(2)  # invented table, means far from zero
    width = 6
    x = np.asfortranarray(rng.normal(size=(rows, width)) * [1, 10, 0.1, 3, 1e-4, 7] + 1e4)
    profile, gram = profile_rows(0, x, None, ColumnProfile.empty(width), Fingerprint(), new_sketch(width))
    # numpy's mean and population std (np.mean, np.std with ddof=0); measured at most 2.2e-16
    # and 8.7e-12 relative apart here (the std of the column of spread 1e-4 about 1e4 is
    # ill-conditioned: about 1e8 times the unit roundoff either way)
    np.testing.assert_allclose(profile.mean, x.mean(axis=0), rtol=1e-15, atol=0)
    np.testing.assert_allclose(profile.std, x.std(axis=0), rtol=1e-10, atol=0)
    assert np.array_equal(profile.minimum, x.min(axis=0)) and np.array_equal(profile.maximum, x.max(axis=0))
    assert np.array_equal(profile.valid, np.full(width, rows))
    # the co-moments about the mean, against numpy's centred product (np.cov's numerator),
    # entrywise relative to sqrt(G_ii G_jj) as in test_sketch_shifted.py; measured <= 4.4e-16
    centred = x - x.mean(axis=0)
    ours = gram.gram(x.mean(axis=0), np.ones(width)).gram
    reference = centred.T @ centred
    scale = np.sqrt(np.outer(np.diag(reference), np.diag(reference)))
    assert np.all(np.abs(ours - reference) <= 1e-13 * scale)
    # the fingerprint of the buffered path is the plain one's (Fingerprint.update unbuffered)
    plain = Fingerprint()
    plain.update(0, x)
    buffered = Fingerprint()
    profile_rows(0, x, None, ColumnProfile.empty(width), buffered, new_sketch(width))
    assert buffered.matches(plain)
