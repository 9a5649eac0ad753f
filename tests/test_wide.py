"""Wide tables (columns far outnumbering rows): the sketch works on the m x m side
(``factor.sketch.RowSketch`` / ``RowGram``) and never forms an n x n matrix.

References checked here:
* ``numpy.linalg.svd`` of the transformed table: singular values, right singular vectors and
  the Gram matrix Z^T Z that the sketch stands for;
* the Eckart-Young-Mirsky theorem (Eckart, Young, Psychometrika 1, 1936): no matrix of rank
  <= k is closer to A in the Frobenius norm than sqrt(sum_{j>k} s_j^2). The rebuilt table
  (basis columns kept, the others derived from them, plus per-column offsets) has rank at
  most c + 1 for c basis columns, so its error cannot beat the rank-(c + 1) optimum;
* pivoted QR of any F with F^T F = Z^T Z selects the columns pivoted QR of Z selects
  (Businger, Golub, Numer. Math. 7, 1965): the wide path and the n x n path must agree.
Tables are invented by seeded code; nothing here is real data.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import distributed  # in the test extra (pyproject.toml): imported, never skipped
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import rankfold
from rankfold.udfs.passes import executors, profile, sources
from rankfold.udfs.passes.profile import ColumnProfile, Fingerprint, Transform, new_sketch, profile_rows
from rankfold.udfs.passes.select import sketch_of
from rankfold.udfs.factor.sketch import RowGram, RowSketch


def _wide(seed: int, rows: int, width: int, rank: int = 5, noise: float = 0.01) -> np.ndarray:
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((rows, rank)) @ rng.standard_normal((rank, width))
    return x * np.linspace(0.5, 3.0, width) + 10.0 + noise * rng.standard_normal((rows, width))


def _sketch_of_rows(x: np.ndarray, cuts: list[int], limit: int | None = None):
    """The profile pass's route on a wide table: blocks at ``cuts``, then the transform."""
    width = x.shape[1]
    stats, fingerprint = ColumnProfile.empty(width), Fingerprint()
    state = RowSketch(width, limit) if limit else new_sketch(width)
    bounds = [0, *cuts, x.shape[0]]
    for lo, hi in zip(bounds[:-1], bounds[1:]):
        stats, state = profile_rows(lo, x[lo:hi], None, stats, fingerprint, state)
    transform = Transform.fit("standardize", stats)
    return state, transform


def test_wide_tables_get_the_row_sketch_and_narrow_ones_the_gram():
    assert isinstance(new_sketch(profile.WIDE_COLUMNS + 1), RowSketch)
    assert not isinstance(new_sketch(profile.WIDE_COLUMNS), RowSketch)


def test_row_sketch_spectrum_matches_numpy_svd():
    x = _wide(1, 40, 2500)
    x[3, 7] = np.nan  # a missing cell: set to the column mean (0 after the transform)
    state, transform = _sketch_of_rows(x, [1, 17, 30])
    assert isinstance(state, RowSketch) and not state.sampled
    sketch = sketch_of(state.gram(transform.shift, transform.scale))
    z = np.where(np.isfinite(x), (x - transform.shift) / transform.scale, 0.0)
    _, s, vt = np.linalg.svd(z, full_matrices=False)  # reference: numpy.linalg.svd
    assert sketch.r.shape == (40, 2500)  # p = min(m, n) rows: no n x n matrix
    # measured: within 5.5e-12 absolute (3e-14 of s[0]); allowed 1e-12 of s[0] (was 1e-9)
    np.testing.assert_allclose(sketch.spectrum.values, s, rtol=0, atol=1e-12 * s[0])
    # F^T F = Z^T Z, checked on a block of columns (the full n x n product is what we avoid)
    cols = np.arange(0, 2500, 97)
    np.testing.assert_allclose(sketch.r[:, cols].T @ sketch.r[:, cols], z[:, cols].T @ z[:, cols],
                               rtol=0, atol=1e-13 * s[0] ** 2)  # measured: equal (was 1e-10)
    # the top right singular vectors agree up to sign (distinct singular values)
    right = sketch.spectrum.right[:, :5]
    np.testing.assert_allclose(np.abs(np.sum(right * vt[:5].T, axis=0)), 1.0, rtol=0, atol=1e-12)  # measured 2.9e-15


def test_sampled_row_sketch_does_not_depend_on_the_blocks_and_estimates_the_gram():
    x = _wide(2, 900, 300, noise=0.5)
    a, ta = _sketch_of_rows(x, [5, 400, 401], limit=256)
    b, tb = _sketch_of_rows(x, [300, 600], limit=256)
    assert a.sampled and a.seen == 900 and a.rows.shape[0] == 256
    np.testing.assert_array_equal(a.positions, b.positions)  # keys per global row position
    # merging partitions (Dask) keeps the same rows as one stream
    left, _ = _sketch_of_rows(x[:450], [100], limit=256)
    right = RowSketch(300, 256)
    _, right = profile_rows(450, x[450:], None, ColumnProfile.empty(300), Fingerprint(), right)
    np.testing.assert_array_equal(left.merge(right).positions, a.positions)
    # scaled by seen / kept: the sampled Gram estimates the whole one (diagonal within 25%;
    # 256 of 900 rows, standardized columns: the expected diagonal is 900 per column)
    diagonal = a.gram(ta.shift, ta.scale).diagonal()
    assert 0.75 * 900 < np.median(diagonal) < 1.25 * 900


@pytest.mark.parametrize("executor_wide", [False, True])
def test_wide_compress_holds_its_bounds_and_meets_eckart_young(tmp_path, executor_wide, monkeypatch):
    x = _wide(3, 40, 2100)
    path = tmp_path / "w.parquet"
    pq.write_table(pa.table({f"c{j:04d}": x[:, j] for j in range(x.shape[1])}), path)
    if not executor_wide:  # the same table read through DuckDB instead of pyarrow
        monkeypatch.setattr(sources, "WIDE_PARQUET_COLUMNS", 10**6)
    monkeypatch.setattr(executors, "COLUMN_GROUP", 500)  # several column groups per row group
    archive = rankfold.compress(str(path), tmp_path / "w.rfa", rank=5)
    rebuilt, bounds = archive.to_numpy(), archive.cell_bounds()
    assert np.all(np.abs(rebuilt - x) <= bounds)
    c = len(archive.basis_columns)
    assert c == 10
    s = np.linalg.svd(x, compute_uv=False)  # reference: numpy.linalg.svd
    error = np.linalg.norm(rebuilt - x)
    assert error >= np.sqrt(np.sum(s[c + 1:] ** 2)) * (1 - 1e-9)  # Eckart-Young, rank c + 1
    # and near the rank-5 optimum of the transformed table (measured 1.47x here; a regression
    # check, common practice for pivoted-QR columns with c = 2k, not a theorem)
    assert archive.errors["ratio_to_optimum"] < 2.0


def test_wide_path_chooses_the_columns_of_the_gram_path(tmp_path, monkeypatch):
    x = _wide(4, 60, 400)
    gram = rankfold.compress(x, tmp_path / "g.rfa", rank=4)
    monkeypatch.setattr(profile, "WIDE_COLUMNS", 100)
    rows = rankfold.compress(x, tmp_path / "r.rfa", rank=4)
    assert rows.basis_columns == gram.basis_columns
    np.testing.assert_allclose(rows.errors["relative_frobenius"], gram.errors["relative_frobenius"],
                               rtol=1e-12)  # measured 1.5e-15 (was 1e-6)
    # the Gram path squares the table: its small singular values carry an absolute error of
    # about u s_0^2 / s_j; measured at most 7.2e-9 s_0 here, allowed 2e-8 s_0 (was 1e-7)
    np.testing.assert_allclose(rows.manifest["spectrum"][:60], gram.manifest["spectrum"][:60],
                               rtol=0, atol=2e-8 * gram.manifest["spectrum"][0])


@pytest.mark.parametrize("options", [{"method": "svd"}, {"max_abs_error": 0.05},
                                     {"link": "optimal"}])
def test_wide_path_other_options_hold_their_bounds(tmp_path, monkeypatch, options):
    """SVD scores (right singular vectors from the row side), a refit with a tolerance, and a
    link with anchor rows, on the wide path; beyond the row limit the sketch is sampled."""
    monkeypatch.setattr(profile, "WIDE_COLUMNS", 100)
    monkeypatch.setattr(profile, "WIDE_SKETCH_CELLS", 1)  # keep 256 of the 400 rows
    x = _wide(5, 400, 150, noise=0.05)
    archive = rankfold.compress(x, tmp_path / "o.rfa", rank=4, **options)
    rebuilt, bounds = archive.to_numpy(), archive.cell_bounds()
    assert np.all(np.abs(rebuilt - x) <= bounds)
    if "max_abs_error" in options:
        assert np.abs(rebuilt - x).max() <= 0.05


def test_row_gram_of_a_zero_table():
    f, spectrum = RowGram(np.zeros((3, 2500))).factor_and_spectrum()
    assert f.shape == (3, 2500)
    np.testing.assert_array_equal(spectrum.values, 0.0)
    np.testing.assert_array_equal(spectrum.right, 0.0)


def test_wide_path_on_dask_gives_the_local_archive(tmp_path, monkeypatch):
    """Partitions of a wide Parquet source read by column groups on Dask workers; their row
    sketches merge to the rows a single stream keeps (keys per global row)."""
    monkeypatch.setattr(profile, "WIDE_COLUMNS", 100)
    monkeypatch.setattr(sources, "WIDE_PARQUET_COLUMNS", 100)
    monkeypatch.setattr(executors, "COLUMN_GROUP", 64)
    x = _wide(6, 90, 300)
    folder = tmp_path / "src"
    folder.mkdir()
    for k, part in enumerate(np.array_split(x, 3)):
        pq.write_table(pa.table({f"c{j:03d}": part[:, j] for j in range(300)}), folder / f"p{k}.parquet")
    local = rankfold.compress(str(folder), tmp_path / "l.rfa", rank=3)
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                  dashboard_address=":0") as cluster, distributed.Client(cluster) as client:
        spread = rankfold.compress(str(folder), tmp_path / "d.rfa", rank=3, executor=client)
    assert spread.basis_columns == local.basis_columns
    # measured: equal bit for bit; the workers may merge partitions in another order, so
    # allow the rounding of such a sum: 1e-13 of the table's reach (was 1e-9 absolute)
    np.testing.assert_allclose(spread.to_numpy(), local.to_numpy(), rtol=0, atol=1e-13 * np.abs(x).max())
    assert np.all(np.abs(spread.to_numpy() - x) <= spread.cell_bounds())


@settings(max_examples=6, deadline=None)
@given(rows=st.integers(3, 40), width=st.integers(30, 80), rank=st.integers(1, 3),
       missing=st.sampled_from([0.0, 0.05]), seed=st.integers(0, 2**16))
def test_wide_path_bounds_hold_on_random_tables(tmp_path_factory, assert_tight, rows, width, rank, missing, seed):
    """Hypothesis tries shapes, ranks and missing cells on the wide path (thresholds lowered
    so that small tables take it); every finite cell must lie within its reported bound."""
    x = _wide(seed, rows, width, rank=min(rank, rows), noise=0.1)
    x[np.random.default_rng(seed).random(x.shape) < missing] = np.nan
    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(profile, "WIDE_COLUMNS", 10)
        patch.setattr(profile, "WIDE_SKETCH_CELLS", 1)  # sampled beyond 256 rows: never here
        archive = rankfold.compress(x, tmp_path_factory.mktemp("h") / "a.rfa", rank=min(rank, rows))
    rebuilt, bounds = archive.to_numpy(), archive.cell_bounds()
    finite = np.isfinite(x)
    assert np.all(np.abs(rebuilt[finite] - x[finite]) <= bounds[finite])
    assert np.array_equal(np.isnan(rebuilt), np.isnan(x))  # missing cells come back missing
    # and not loose: each bound within rounding of the errors it summarizes (conftest.bounds_are_tight)
    table = pa.table({name: x[:, j] for j, name in enumerate(archive.numeric_columns)})
    assert_tight(archive, table, x, rebuilt, bounds)
