"""The predictor trial (udfs/passes/predictors.py): each coded column keeps the low-rank
prediction or is rounded alone, and the basis is kept only when it measures smaller.

Checks: the sample of runs is a bottom-k sample (E. Cohen, H. Kaplan, "Summarizing data using
bottom-k sketches", PODC 2007) that does not depend on how rows are split into blocks; a column
whose low-rank residual costs more than the column itself (a step function, runs of equal
values) is rounded alone; a table with no low-rank structure keeps no basis; a low-rank table
keeps it. Every rebuilt value is checked against the invented table with numpy, cell by cell,
within its tolerance (the guarantee does not rest on the trial).
"""

from __future__ import annotations

import numpy as np
import pytest

import rankfold
from rankfold.udfs.passes.predictors import RUNS, SampleRuns, run_rows
from rankfold.udfs.passes.select import row_uniforms
from rankfold.udfs.store.reader import ArchiveReader


def _within(archive, truth: np.ndarray, tolerance: np.ndarray) -> None:
    values, bounds = archive.to_numpy(), archive.cell_bounds()
    error = np.abs(values - truth)  # numpy, against the invented table itself
    assert np.all(error <= bounds) and np.all(bounds <= tolerance[None, :])


@pytest.mark.parametrize("split", [1, 37, 1000, 5000])
def test_the_sample_is_the_bottom_k_runs_whatever_the_blocks(split):
    rng = np.random.default_rng(0)  # invented rows
    x = rng.standard_normal((5000, 3))
    mask = rng.random(x.shape) < 0.1
    runs = SampleRuns(seed=3, length=100)
    for first in range(0, 5000, split):
        runs.add(first, x[first:first + split], mask[first:first + split])
    # bottom-k: the RUNS runs with the smallest keys, each key a uniform per (seed, run)
    keys = row_uniforms(3, 23, np.arange(50))
    expected = np.sort(np.argsort(keys, kind="stable")[:RUNS])
    assert sorted(runs.pieces) == expected.tolist()
    rows = np.concatenate([np.arange(r * 100, (r + 1) * 100) for r in expected])
    want = np.where(mask[rows], np.nan, x[rows])
    np.testing.assert_array_equal(runs.rows(3), want)


def test_samples_of_two_partitions_merge_into_the_sample_of_the_whole():
    x = np.arange(20_000, dtype=float).reshape(-1, 2)
    whole, left, right = (SampleRuns(seed=1, length=64) for _ in range(3))
    whole.add(0, x, None)
    left.add(0, x[:3333], None)
    right.add(3333, x[3333:], None)  # a run split across the two partitions is joined
    np.testing.assert_array_equal(left.merge(right).rows(2), whole.rows(2))


def test_wide_tables_get_shorter_runs():
    assert run_rows(10) == 2048 and run_rows(100_000) == 16
    assert RUNS * run_rows(1000) * 1000 <= 1 << 20


def _steps_and_low_rank(seed=0, m=6000):
    """Eight rank-2 columns with noise far below the tolerance, and one step function (runs of
    equal values) unrelated to them: its least-squares weights are small but not zero, so its
    low-rank residual carries a little noise that breaks the runs."""
    rng = np.random.default_rng(seed)  # invented data
    x = rng.standard_normal((m, 2)) @ rng.standard_normal((2, 8)) + 1e-4 * rng.standard_normal((m, 8))
    steps = np.repeat(rng.integers(0, 5, m // 500 + 1), 500)[:m].astype(float)
    return np.column_stack([x, steps])


def test_a_column_of_runs_is_rounded_alone_and_stays_within_its_tolerance(tmp_path):
    x = _steps_and_low_rank()
    x[:, :8] *= 10
    tolerance = 0.01 * x.std(axis=0)
    # centred, not standardized: the step column's small spread keeps it out of the basis
    archive = rankfold.compress(x, tmp_path / "a.rankfold", max_std_error=0.01, seed=0,
                                transform="center", n_columns=2)
    model = ArchiveReader(archive.path).model
    alone = [j for j in range(x.shape[1]) if not model.in_basis[j] and not np.any(model.weights[:, j])]
    assert archive.manifest["method"]["n_columns"] > 0
    assert 8 in alone, archive.manifest["method"]["rank_reason"]
    assert "rounded alone" in archive.manifest["method"]["rank_reason"]
    assert model.offset[8] == pytest.approx(x[:, 8].mean())  # the column's shift
    _within(archive, x, tolerance * (1 + 1e-9))


def test_a_table_without_low_rank_structure_keeps_no_basis(tmp_path):
    rng = np.random.default_rng(5)  # invented data: independent columns of small integers
    x = rng.integers(0, 6, size=(8000, 10)).astype(float)
    archive = rankfold.compress(x, tmp_path / "a.rankfold", max_std_error=0.01)
    assert archive.manifest["method"]["n_columns"] == 0
    reason = archive.manifest["method"]["rank_reason"]
    # dropped by measurement: by the number of basis columns (basis_size) or by the trial
    assert "0 basis columns by measured trial" in reason or "rounded alone measured smaller" in reason
    _within(archive, x, 0.01 * x.std(axis=0) * (1 + 1e-9))


def test_a_low_rank_table_keeps_its_basis_and_predictions(tmp_path):
    rng = np.random.default_rng(2)  # invented data: rank 3 plus noise far below the tolerance
    x = rng.standard_normal((6000, 3)) @ rng.standard_normal((3, 30)) + 1e-4 * rng.standard_normal((6000, 30))
    archive = rankfold.compress(x, tmp_path / "a.rankfold", max_std_error=0.01)
    model = ArchiveReader(archive.path).model
    derived = ~model.in_basis
    assert archive.manifest["method"]["n_columns"] > 0
    assert np.all(np.any(model.weights[:, derived] != 0, axis=0))
    _within(archive, x, 0.01 * x.std(axis=0) * (1 + 1e-9))


def test_a_basis_of_a_size_the_user_gave_is_kept(tmp_path):
    rng = np.random.default_rng(5)
    x = rng.integers(0, 6, size=(8000, 10)).astype(float)
    archive = rankfold.compress(x, tmp_path / "a.rankfold", max_std_error=0.01, n_columns=3)
    assert archive.manifest["method"]["n_columns"] == 3
    _within(archive, x, 0.01 * x.std(axis=0) * (1 + 1e-9))


def test_the_default_refit_runs_only_when_the_sample_shows_an_outlier(tmp_path):
    # the spiky panel of tests/test_targets.py (invented): rank 6, 1% noise, 150 spikes of 30 std
    rng = np.random.default_rng(5)
    x = rng.standard_normal((8000, 6)) @ rng.standard_normal((6, 60))
    x = (x + 0.01 * x.std() * rng.standard_normal(x.shape)) * np.logspace(-3, 3, 60)[None, :]
    spiky = x.copy()
    for _ in range(150):
        i, j = rng.integers(8000), rng.integers(60)
        spiky[i, j] += 30 * spiky[:, j].std()
    options = dict(rank=6, max_std_error=0.1, basis_precision="exact")
    calm = rankfold.compress(x, tmp_path / "calm.rankfold", **options)
    assert "skipped" in calm.manifest["refit"] and calm.manifest["refit"]["cells_screened"] == 0
    refitted = rankfold.compress(spiky, tmp_path / "spiky.rankfold", **options)
    assert "skipped" not in refitted.manifest["refit"] and refitted.manifest["refit"]["cells_screened"] >= 100
    asked = rankfold.compress(x, tmp_path / "asked.rankfold", refit_outliers=True, **options)
    assert "skipped" not in asked.manifest["refit"]  # asked for: always runs
    for archive, truth in ((calm, x), (refitted, spiky), (asked, x)):
        _within(archive, truth, 0.1 * truth.std(axis=0) * (1 + 1e-9))


def test_dropping_the_basis_weighs_the_sample_scaled_to_the_table_and_the_fixed_costs():
    from rankfold.udfs.passes.predictors import PredictorChoice, values_bytes

    choice = PredictorChoice(np.ones(3, bool), basis_bytes=1000, alone_bytes=1100, sampled_rows=100)
    assert not choice.drop_basis(rows=100, fixed_bytes=0)
    assert choice.drop_basis(rows=100, fixed_bytes=200)        # the weights tip it
    assert not choice.drop_basis(rows=10_000, fixed_bytes=200)  # not over a long table
    assert not PredictorChoice(np.ones(3, bool), 1000, None, 100).drop_basis(100, 1e9)  # not on offer
    # fixed costs are measured with the writer: trimmed weights compress, random ones do not
    rng = np.random.default_rng(0)  # invented weights
    assert values_bytes(np.round(rng.standard_normal((4, 50)), 1)) < values_bytes(rng.standard_normal((4, 50)))
    assert values_bytes(np.zeros((0, 5))) == 0
    two = values_bytes(np.ones((2, 3)), np.ones((7, 3)))  # blocks of different sizes, measured apart
    assert two == values_bytes(np.ones((2, 3))) + values_bytes(np.ones((7, 3)))
