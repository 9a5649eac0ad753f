"""Covariance and correlation of any archive, from the values as stored (issue 12, item 7):
rank 0 (offsets plus quantized residual codes), quantized codings beside a low-rank part,
and the plain low-rank case, each against numpy.cov / numpy.corrcoef of the true table.

References: numpy.cov (divisor m - 1) and numpy.corrcoef on the invented source; the bound is
Cauchy-Schwarz for the covariance and the triangle inequality for angles for the correlation
(see ``store.aggregate.correlation``).
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import rankfold

OFF = ~np.eye(6, dtype=bool)


def _source(seed: int, rows: int = 1500, noise: float = 0.3) -> tuple[pa.Table, np.ndarray]:
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((rows, 3)) @ rng.standard_normal((3, 6)) + noise * rng.standard_normal((rows, 6))
    x *= np.geomspace(1.0, 50.0, 6)  # columns in different units
    return pa.table({f"c{j}": x[:, j] for j in range(6)}), x


def _matrix(table: pa.Table) -> tuple[np.ndarray, np.ndarray]:
    q = int(round(np.sqrt(table.num_rows)))
    return (np.array(table.column("value").to_pylist(), float).reshape(q, q),
            np.array(table.column("bound").to_pylist(), float).reshape(q, q))


@pytest.mark.parametrize("options", [dict(max_abs_error=0.1), dict(rank=3),
                                     dict(rank=2), dict(rank=2, max_abs_error=0.2)])
def test_covariance_and_correlation_hold_and_are_usable(tmp_path, options):
    table, x = _source(3, noise=0.03)
    archive = rankfold.compress(table, tmp_path / "c.rankfold", **options)
    cov, cov_bound = _matrix(archive.covariance())
    corr, corr_bound = _matrix(archive.correlation())
    true_cov, true_corr = np.cov(x, rowvar=False), np.corrcoef(x, rowvar=False)
    assert np.all(np.abs(cov - true_cov) <= cov_bound)
    assert np.all(np.abs(corr - true_corr)[OFF] <= corr_bound[OFF])  # (numpy's diagonal: 1 +- 1 ulp)
    # usable: the archives here keep every column within a fraction of its spread, so the
    # bounds are a fraction of the values (measured ratios in the report of issue 12)
    assert np.all(np.diag(cov_bound) < 0.5 * np.diag(true_cov))
    assert np.all(corr_bound[OFF] < 0.8)


def test_rank_zero_archive_has_real_values(tmp_path):
    """Rank 0: every value is an offset plus a quantized residual code. The factors' Gram
    matrix is empty, so the old answer was 0 (covariance) or NaN with bound 2 (correlation)."""
    table, x = _source(5)
    archive = rankfold.compress(table, tmp_path / "z.rankfold", max_abs_error=0.1)
    assert archive.manifest["method"]["rank"] == 0 and not archive.basis_columns
    cov, cov_bound = _matrix(archive.covariance())
    corr, corr_bound = _matrix(archive.correlation())
    true_cov, true_corr = np.cov(x, rowvar=False), np.corrcoef(x, rowvar=False)
    assert np.all(np.abs(cov - true_cov) <= cov_bound)
    scale = np.sqrt(np.outer(np.diag(true_cov), np.diag(true_cov)))
    assert np.all(np.abs(cov - true_cov) <= 0.01 * scale)  # the stored values carry the covariance
    assert np.all(np.isfinite(corr)) and np.all(np.abs(corr - true_corr)[OFF] <= corr_bound[OFF])
    assert np.all(corr_bound[OFF] < 0.2)


@settings(max_examples=15, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(seed=st.integers(0, 2**16), rows=st.integers(4, 300), noise=st.sampled_from([1e-3, 0.3, 3.0]),
       options=st.sampled_from([{}, {"rank": 1}, {"max_abs_error": 0.3}, {"rank": 2, "max_abs_error": 0.05},
                                {"rel_error": 0.1}]))
def test_bounds_hold_on_any_archive(tmp_path_factory, seed, rows, noise, options):
    table, x = _source(seed, rows, noise)
    archive = rankfold.compress(table, tmp_path_factory.mktemp("cov") / "p.rankfold", **options)
    cov, cov_bound = _matrix(archive.covariance())
    corr, corr_bound = _matrix(archive.correlation())
    assert np.all(np.abs(cov - np.cov(x, rowvar=False)) <= cov_bound)
    finite = np.isfinite(corr) & OFF
    assert np.all(np.abs(corr - np.corrcoef(x, rowvar=False))[finite] <= corr_bound[finite])
    assert np.all(corr_bound <= 2.0)
