"""Archive.append: new rows verified with the existing factors; bounds, drift, versions."""

from __future__ import annotations

import hashlib

import numpy as np
import pyarrow as pa
import pytest

import rankfold
from rankfold.udfs.store.reader import ArchiveReader

WIDTH = 12
MIX = np.random.default_rng(7).standard_normal((3, WIDTH))  # invented structure


def _rows(m: int, seed: int, drift: float = 0.0) -> pa.Table:
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((m, 3)) @ MIX + 0.01 * rng.standard_normal((m, WIDTH))
    x += drift * rng.standard_normal((m, WIDTH))
    columns = {"id": pa.array(np.arange(m) + 100_000 * seed)}
    columns |= {f"c{j}": x[:, j] for j in range(WIDTH)}
    return pa.table(columns)


def _values(table: pa.Table) -> np.ndarray:
    return np.column_stack([table.column(f"c{j}").to_numpy(zero_copy_only=False) for j in range(WIDTH)])


def _digest(path) -> dict:
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(path.iterdir())}


@pytest.mark.parametrize("options", [{"rank": 3}, {"max_abs_error": 0.01}, {"method": "svd", "rank": 3},
                                     {"max_abs_error": 0.02, "basis_precision": "tolerance"}])
def test_bounds_hold_for_appended_rows(tmp_path, assert_tight, options):
    first, more = _rows(3000, 1), _rows(800, 2)
    values = _values(more)
    values[5, 4] = np.nan  # exceptional cells are stored exactly, as in compress
    values[6, 7] = np.inf
    more = more.set_column(more.schema.get_field_index("c4"), "c4", pa.array(values[:, 4]))
    more = more.set_column(more.schema.get_field_index("c7"), "c7", pa.array(values[:, 7]))
    archive = rankfold.compress(first, tmp_path / "a.rankfold", key="id", seed=2, **options)
    events = []
    grown = archive.append(more, progress=events.append)
    assert grown.shape == (3800, WIDTH)
    truth = np.vstack([_values(first), values])
    rebuilt, bounds = grown.to_numpy(), grown.cell_bounds()
    finite = np.isfinite(truth)
    with np.errstate(invalid="ignore"):  # inf - inf in the cells compared exactly below
        error = np.abs(rebuilt - truth)
    assert np.all(error[finite] <= bounds[finite])
    assert np.array_equal(rebuilt[~finite], truth[~finite], equal_nan=True)
    if "max_abs_error" in options:  # the archive's tolerance holds for the new rows too
        assert np.all(error[finite] <= options["max_abs_error"])
    # the column ledger covers every row: its maxima are the measured maxima
    ledger = grown.column_ledger()
    err = np.where(finite, error, 0.0)
    assert np.all(ledger.column("err_max").to_numpy() >= err.max(axis=0))
    # and the merged ledger is tight: bounds within rounding of the errors (conftest.bounds_are_tight)
    assert_tight(grown, first, truth, rebuilt, bounds)
    assert grown.rebuild(rows=rankfold.Keys([200_005])).column("id").to_pylist() == [200_005]
    assert [e["stage"] for e in events if e["done"]] == ["append"]
    assert events[-1]["rows_done"] == 800


def test_drift_flags_a_refactor(tmp_path):
    archive = rankfold.compress(_rows(3000, 1), tmp_path / "a.rankfold", rank=3, key="id")
    same = archive.append(_rows(500, 2))
    assert not same.refactor_due and same.manifest["drift"]["refactor_due"] is False
    drifted = same.append(_rows(500, 3, drift=0.5))  # new structure the basis cannot explain
    drift = drifted.manifest["drift"]
    assert drifted.refactor_due and drift["appends"] == 2 and drift["rows_appended"] == 1000
    assert drift["relative_frobenius_appended"] > drift["relative_frobenius_limit"]
    assert "relative error" in drift["reason"]


def test_error_figures_cover_the_appended_rows(tmp_path):
    # After an append, every per-column figure of the errors record is restated over every row:
    # checked against numpy (max |x - xhat| over numpy.std, the population std the profile
    # uses) on the values as stored (ArchiveReader.rebuild(serve=False)), and a large error
    # in the new rows raises the archive's warning.
    first, bad = _rows(3000, 1), _rows(400, 3, drift=0.5)  # new structure the basis cannot explain
    archive = rankfold.compress(first, tmp_path / "a.rankfold", rank=3, key="id")
    assert archive.warnings == []
    grown = archive.append(bad)
    truth = np.vstack([_values(first), _values(bad)])
    stored = ArchiveReader(grown.path).rebuild(serve=False).values
    over_std = np.abs(stored - truth).max(axis=0) / truth.std(axis=0)
    errors = grown.manifest["errors"]
    # the ledger stores maxima rounded up, so the figure is at least numpy's and within 1e-6 of it
    assert over_std.max() <= errors["largest_error_over_std"] <= over_std.max() * (1 + 1e-6)
    assert errors["largest_error"] >= np.abs(stored - truth).max()
    assert errors["largest_error_over_std"] > archive.manifest["errors"]["largest_error_over_std"] * 10
    assert grown.warnings and "standard deviations" in grown.warnings[0]


def test_new_version_is_atomic_and_old_readers_keep_working(tmp_path):
    first = _rows(2000, 1)
    archive = rankfold.compress(first, tmp_path / "a.rankfold", rank=3, key="id")
    before = _digest(archive.path)
    old_values, old_bounds = archive.to_numpy(), archive.cell_bounds()
    old_stored = ArchiveReader(archive.path).rebuild(serve=False).values
    grown = archive.append(_rows(700, 2))
    after = _digest(archive.path)
    # no existing file changed except the manifest (replaced by one rename)
    assert {k: v for k, v in after.items() if k in before and k != "manifest.json"} == {
        k: v for k, v in before.items() if k != "manifest.json"}
    assert grown.manifest["version"] == 1 and archive.manifest.get("version", 0) == 0
    # the old reader still reads its version
    assert archive.shape == (2000, WIDTH)
    assert np.array_equal(archive.to_numpy(), old_values, equal_nan=True)
    assert np.array_equal(archive.cell_bounds(), old_bounds)
    # the old rows' stored values are unchanged; served values are clamped into the new
    # version's (wider) column range, so they may move, never out of their bounds
    stored = ArchiveReader(grown.path).rebuild(rows=slice(0, 2000), serve=False)
    assert np.array_equal(stored.values, old_stored, equal_nan=True)
    assert np.all(np.abs(grown.to_numpy(rows=slice(0, 2000)) - stored.values) <= old_bounds)
    # a fresh open sees the new version, checksums and all
    assert rankfold.open(archive.path, checksums=True).shape == (2700, WIDTH)
    # appending through the stale object is refused: it would fork the history
    with pytest.raises(rankfold.InvalidInputError, match=r"changed since it was opened \(now version 1\)"):
        archive.append(_rows(10, 3))


def test_schema_mismatch_is_refused(tmp_path):
    archive = rankfold.compress(_rows(500, 1), tmp_path / "a.rankfold", rank=3, key="id")
    before = _digest(archive.path)
    with pytest.raises(rankfold.InvalidInputError, match=r"has the columns .* holds .*missing \['c11'\]"):
        archive.append(_rows(10, 2).drop_columns(["c11"]))
    wrong = _rows(10, 2)
    wrong = wrong.set_column(1, "c0", wrong.column("c0").cast(pa.float32()))
    with pytest.raises(rankfold.InvalidInputError, match=r"Column 'c0' of the appended source .* is float, but the archive .* stores it as double"):
        archive.append(wrong)
    with pytest.raises(rankfold.EmptySourceError, match="has no rows"):
        archive.append(_rows(0, 2))
    assert _digest(archive.path) == before  # nothing left behind
