"""The number of basis columns under a tolerance, by measured trial (udfs/passes/basis_size.py).

Checks: the climb measures each size once, follows doubling and halving, always measures "no
basis", and keeps the fewest columns among sizes measuring even; the search sample is whole
runs of the trial's sample; on an invented table of smooth spectra (a sum of twelve Gaussian
peaks with decaying amounts), with a size model made to pick one basis column, the archive
written is smaller than the one at that pick, and every rebuilt value is within its tolerance
(checked with numpy against the table itself; pivoted QR nests its orders: P. Businger,
G. H. Golub, Numer. Math. 7 (1965), which the search relies on).
"""

from __future__ import annotations

import re

import numpy as np
import pyarrow as pa

import rankfold
from rankfold.udfs.factor.selection import pivoted_qr_order
from rankfold.udfs.passes import targets
from rankfold.udfs.passes.basis_size import EVEN, SEARCH_CELLS, climb, search_sample


def _recorded(measure):
    calls = []

    def wrapped(c):
        calls.append(c)
        return measure(c)
    return wrapped, calls


def test_climb_doubles_while_smaller_and_measures_no_basis():
    measure, calls = _recorded(lambda c: (c - 13) ** 2 + 100.0)
    best, measured = climb(1, 50, measure)
    assert best == 16  # 1, 2, 4, 8, 16 fall; 32 rises
    assert sorted(calls) == [0, 1, 2, 4, 8, 16, 32] and len(calls) == len(set(calls))
    assert measured[16] == 109.0


def test_climb_halves_when_doubling_does_not_pay():
    measure, calls = _recorded(lambda c: abs(c - 3) + 10.0)
    best, _ = climb(12, 40, measure)
    assert best == 3
    assert calls == [12, 24, 6, 3, 1, 0]


def test_climb_stops_at_the_limit_and_keeps_no_basis_when_it_is_smallest():
    best, measured = climb(5, 7, lambda c: 100.0 + c)
    assert best == 0 and max(measured) <= 7
    best, measured = climb(2, 7, lambda c: 100.0 - c)
    assert best == 7 and 7 in measured


def test_sizes_measuring_even_keep_the_fewest_columns():
    # 4 columns measure 0.5% more than 8: even (EVEN = 1%), so 4 is kept
    sizes = {0: 200.0, 1: 150.0, 2: 120.0, 4: 100.5, 8: 100.0, 16: 130.0}
    best, _ = climb(4, 20, sizes.__getitem__)
    assert EVEN == 0.01 and best == 4


def test_the_search_sample_is_every_kth_whole_run():
    rows, width = 8 * 700, 100
    sample = np.arange(rows * width, dtype=float).reshape(rows, width)
    starts = np.arange(0, rows, 700)
    kept = search_sample(sample, starts)
    assert kept.size <= SEARCH_CELLS or kept.shape[0] == 700
    k = int(np.ceil(rows * width / SEARCH_CELLS))
    want = np.vstack([sample[s:s + 700] for s in starts[::k]])
    np.testing.assert_array_equal(kept, want)
    small = sample[:100, :10]
    assert search_sample(small, np.array([0, 50])) is small


def test_pivoted_qr_orders_nest():
    # the search slices one order for every size (Businger & Golub 1965: greedy, so nested)
    r = np.linalg.qr(np.random.default_rng(4).standard_normal((300, 40)), mode="r")
    long = pivoted_qr_order(r, 20)
    for c in (1, 5, 13):
        np.testing.assert_array_equal(pivoted_qr_order(r, c), long[:c])


def _spectra(rows=200, width=80, peaks=12, decay=0.5, seed=7) -> np.ndarray:
    """Invented spectra: each row a sum of Gaussian peaks on a grid, amounts decaying by peak."""
    rng = np.random.default_rng(seed)
    grid = np.linspace(0.0, 1.0, width)
    centers, widths = rng.uniform(0, 1, peaks), rng.uniform(0.05, 0.3, peaks)
    shapes = np.exp(-((grid[None, :] - centers[:, None]) / widths[:, None]) ** 2)
    return (rng.gamma(2.0, 1.0, size=(rows, peaks)) * decay ** np.arange(peaks)) @ shapes


def _bytes(path) -> int:
    return sum(f.stat().st_size for f in path.iterdir())


def test_measured_size_writes_a_smaller_archive_than_the_models_pick(tmp_path, monkeypatch):
    x = _spectra()
    tolerance = 0.01 * x.std(axis=0)
    names = [f"w{j}" for j in range(x.shape[1])]
    table = pa.table({n: x[:, j] for j, n in enumerate(names)})
    target = dict(zip(names, tolerance.tolist()))
    # a size model that picks one basis column, whatever the table: the climb starts there
    model_plan = targets.plan_for_tolerance

    def one_column(predicted, tolerance, coding, sizes, *, reason):
        return model_plan(predicted, tolerance, coding, [s for s in sizes if s[1] == 1] or sizes, reason=reason)
    monkeypatch.setattr(targets, "plan_for_tolerance", one_column)
    chosen = rankfold.compress(table, tmp_path / "chosen", max_abs_error=target)
    reason = chosen.manifest["method"]["rank_reason"]
    moved = re.search(r"(\d+) basis columns by measured trial, not the model's 1 ", reason)
    assert moved and int(moved.group(1)) > 1, reason  # twelve peaks: one column is far too few
    at_model = rankfold.compress(table, tmp_path / "model", max_abs_error=target, n_columns=1)
    assert _bytes(tmp_path / "chosen") < _bytes(tmp_path / "model")
    for archive in (chosen, at_model):
        values, bounds = archive.to_numpy(), archive.cell_bounds()
        error = np.abs(values - x)  # numpy, against the invented table itself
        assert np.all(error <= bounds) and np.all(bounds <= tolerance[None, :])
