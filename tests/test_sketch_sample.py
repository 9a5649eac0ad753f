"""The sketch from a seeded sample of Parquet row groups (``sketch_rows``).

What must hold whatever the sample: every bound holds against the source on every row (the
encode pass reads them all), the column statistics the archive records are those of every
row (checked against numpy), the same seed gives the same archive on both executors, and a
source the sample misrepresents (rare rows of another shape, an integer beyond 2^53, values
too large to square) is either still bounded honestly or handled as with a full sketch.
The invented tables are near low rank (fixed seeds); Parquet files have small row groups so
that a sample is a real subset.
"""

from __future__ import annotations

import json

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy import stats

import rankfold
from rankfold.udfs.passes.row_groups import (RowGroup, choose_row_groups, parquet_row_groups,
                                            table_row_groups)
from rankfold.udfs.errors import InvalidInputError, SourceChangedError
from rankfold.udfs.store.reader import ArchiveReader

GROUP_ROWS = 500


def _low_rank(seed: int, rows: int, width: int, rank: int = 3, noise: float = 0.01) -> np.ndarray:
    rng = np.random.default_rng(seed)  # invented: rank `rank` plus Gaussian noise
    return (rng.standard_normal((rows, rank)) @ rng.standard_normal((rank, width))
            + noise * rng.standard_normal((rows, width)))


def _write(folder, columns: dict, files: int = 3, group_rows: int = GROUP_ROWS):
    """``columns`` (name -> Arrow array of equal length) as ``files`` Parquet files."""
    folder.mkdir(parents=True, exist_ok=True)
    table = pa.table(columns)
    step = -(-table.num_rows // files)
    for k, lo in enumerate(range(0, table.num_rows, step)):
        pq.write_table(table.slice(lo, step), folder / f"part-{k:02d}.parquet", row_group_size=group_rows)
    return folder


def _floats(x: np.ndarray) -> dict:
    return {f"v{j:02d}": pa.array(x[:, j]) for j in range(x.shape[1])}


def _truth(archive: rankfold.Archive, table: pa.Table) -> np.ndarray:
    return np.column_stack([table.column(n).to_numpy(zero_copy_only=False).astype(np.float64)
                            for n in archive.numeric_columns])


def _assert_bounds_hold(archive: rankfold.Archive, truth: np.ndarray) -> None:
    values, bounds = archive.to_numpy(), archive.cell_bounds()
    finite = np.isfinite(truth)
    with np.errstate(invalid="ignore", over="ignore"):
        error = np.abs(values - truth)
    assert not (finite & ~(error <= bounds)).any()
    assert np.array_equal(np.isnan(values[~finite]), np.isnan(truth[~finite]))


# -- choosing row groups --------------------------------------------------------------------------
def _groups(sizes) -> list[RowGroup]:
    first, out = 0, []
    for k, rows in enumerate(sizes):
        out.append(RowGroup(f"f{k // 4}.parquet", k % 4, first, rows))
        first += rows
    return out


def test_sample_holds_enough_rows_in_source_order_and_is_seeded():
    groups = _groups([100, 250, 80, 300, 120, 90, 60, 400, 50, 70])
    sample = choose_row_groups(groups, 500, seed=3)
    assert sum(g.rows for g in sample) >= 500
    assert [g.first_row for g in sample] == sorted(g.first_row for g in sample)
    assert choose_row_groups(groups, 500, seed=3) == sample
    assert len({tuple(g.first_row for g in choose_row_groups(groups, 500, seed=s)) for s in range(20)}) > 1
    assert choose_row_groups(groups, 10_000, seed=3) == groups  # more than there is: all


def test_every_row_group_is_equally_likely():
    """Uniform sampling without replacement: each of G groups is drawn with probability k/G
    (common practice); a chi-square goodness-of-fit test (scipy.stats.chisquare) over 4000
    seeds does not reject uniformity."""
    groups = _groups([100] * 20)
    counts = np.zeros(20)
    for seed in range(4000):
        for g in choose_row_groups(groups, 500, seed):
            counts[g.first_row // 100] += 1
    assert counts.sum() == 4000 * 5
    assert stats.chisquare(counts).pvalue > 0.001


def test_row_groups_number_the_rows_like_the_footers(tmp_path):
    x = _low_rank(1, 2300, 4)
    folder = _write(tmp_path / "d", _floats(x), files=3, group_rows=300)
    files = sorted(str(p) for p in folder.glob("*.parquet"))
    groups = parquet_row_groups(files, ["v00", "v03"])
    expected, first = [], 0
    for path in files:  # pyarrow's own metadata, file after file
        meta = pq.ParquetFile(path).metadata
        for g in range(meta.num_row_groups):
            expected.append((path, g, first, meta.row_group(g).num_rows))
            first += meta.row_group(g).num_rows
    assert [(g.path, g.index, g.first_row, g.rows) for g in groups] == expected
    assert first == 2300
    # a column some file lacks (one that would come from the directory names): no groups
    assert parquet_row_groups(files, ["v00", "year"]) is None


# -- compress with a sampled sketch ---------------------------------------------------------------
@pytest.fixture(scope="module")
def dataset(tmp_path_factory):
    x = _low_rank(7, 30_000, 12)
    rng = np.random.default_rng(8)
    columns = _floats(x)
    # NULLs, NaN and infinities in some columns, an integer column
    nulls = rng.random(x.shape[0]) < 0.02
    columns["v01"] = pa.array(x[:, 1], mask=nulls)
    special = x[:, 2].copy()
    special[rng.integers(0, x.shape[0], 40)] = np.nan
    special[rng.integers(0, x.shape[0], 5)] = np.inf
    columns["v02"] = pa.array(special)
    columns["count"] = pa.array(np.rint(1000 * x[:, 4]).astype(np.int64))
    folder = _write(tmp_path_factory.mktemp("sample") / "data", columns)
    return folder, pa.table(columns)


def test_sampled_sketch_keeps_bounds_and_records_every_rows_statistics(dataset, tmp_path):
    folder, table = dataset
    archive = rankfold.compress(str(folder), tmp_path / "s.rankfold", rank=3, sketch_rows=3000, seed=4)
    sketch = archive.manifest["sketch"]
    assert sketch["sampled"] and 3000 <= sketch["rows_read"] < 30_000
    assert sketch["of_rows"] == 30_000 and sketch["row_groups_read"] < sketch["of_row_groups"]
    truth = _truth(archive, table)
    _assert_bounds_hold(archive, truth)
    # the recorded statistics are of every row: numpy over the whole table
    ledger = archive.column_ledger()
    for j, name in enumerate(archive.numeric_columns):
        column = truth[:, j]
        finite = column[np.isfinite(column)]
        assert ledger.column("valid")[j].as_py() == finite.size
        assert ledger.column("nulls")[j].as_py() == table.column(name).null_count
        np.testing.assert_allclose(ledger.column("mean")[j].as_py(), np.mean(finite), rtol=1e-12, atol=1e-15)
        np.testing.assert_allclose(ledger.column("std")[j].as_py(), np.std(finite), rtol=1e-10)
        assert ledger.column("min")[j].as_py() == finite.min()
        assert ledger.column("max")[j].as_py() == finite.max()
    assert ledger.column("infinities")[archive.numeric_columns.index("v02")].as_py() == 5
    # the relative error is of the whole table too: numpy, in the archive's transformed units
    shift, scale = ledger.column("shift").to_numpy(), ledger.column("scale").to_numpy()
    finite = np.isfinite(truth)
    with np.errstate(invalid="ignore"):  # inf - inf where the cell is not finite
        z = np.where(finite, (truth - shift) / scale, 0.0)
        # (of the values as stored: served ones are also clamped into each column's range)
        stored = ArchiveReader(archive.path).rebuild(serve=False).values
        e = np.where(finite, (truth - stored) / scale, 0.0)
    np.testing.assert_allclose(archive.errors["relative_frobenius"],
                               np.linalg.norm(e) / np.linalg.norm(z), rtol=1e-12)


def test_sampled_sketch_is_as_good_as_the_full_one_on_a_uniform_table(dataset, tmp_path):
    """On rows of one shape, a sample of 10% chooses as well as every row: the measured
    error stays within 1% of the full sketch's, and within 1.3x the SVD optimum of rank 3
    (Eckart-Young: numpy.linalg.svd of the standardized table)."""
    folder, table = dataset
    sampled = rankfold.compress(str(folder), tmp_path / "s.rankfold", rank=3, sketch_rows=3000, seed=4)
    full = rankfold.compress(str(folder), tmp_path / "f.rankfold", rank=3, sketch_rows="all", seed=4)
    assert not full.manifest["sketch"]["sampled"]
    a, b = sampled.errors["relative_frobenius"], full.errors["relative_frobenius"]
    assert a <= 1.01 * b  # measured 1.0012 (seed 4)
    truth = _truth(full, table)
    keep = np.isfinite(truth).all(axis=1)
    z = truth[keep] - truth[keep].mean(axis=0)
    z /= z.std(axis=0)
    s = np.linalg.svd(z, compute_uv=False)
    optimum = np.sqrt(np.sum(s[3:] ** 2) / np.sum(s**2))
    assert a <= 1.3 * optimum  # measured 1.20


@pytest.mark.parametrize("options", [
    {"link": "optimal", "row_method": "leverage", "column_method": "leverage"},  # anchor rows: a full select pass
    {"method": "svd"},
    {"transform": "none"},
])
def test_sampled_sketch_with_other_methods_keeps_its_bounds(dataset, tmp_path, options):
    folder, table = dataset
    archive = rankfold.compress(str(folder), tmp_path / "m.rankfold", rank=3, sketch_rows=3000, seed=6,
                                **options)
    assert archive.manifest["sketch"]["sampled"]
    _assert_bounds_hold(archive, _truth(archive, table))
    if "link" in options:  # anchor rows come from every row, and are kept exactly
        rows = archive.anchor_rows
        assert rows and np.array_equal(archive.to_numpy(rows=rows), _truth(archive, table)[rows],
                                       equal_nan=True)


def test_same_seed_same_sample_and_archive(dataset, tmp_path):
    folder, _ = dataset
    one = rankfold.compress(str(folder), tmp_path / "1.rankfold", rank=3, sketch_rows=3000, seed=9)
    two = rankfold.compress(str(folder), tmp_path / "2.rankfold", rank=3, sketch_rows=3000, seed=9)
    other = rankfold.compress(str(folder), tmp_path / "3.rankfold", rank=3, sketch_rows=3000, seed=10)
    assert one.manifest["sketch"] == two.manifest["sketch"]
    assert one.manifest["sketch"]["first_rows"] != other.manifest["sketch"]["first_rows"]
    assert one.basis_columns == two.basis_columns
    assert np.array_equal(one.to_numpy(), two.to_numpy(), equal_nan=True)


def test_auto_reads_every_row_of_a_small_table(dataset, tmp_path):
    folder, _ = dataset
    archive = rankfold.compress(str(folder), tmp_path / "a.rankfold", rank=3)
    assert archive.manifest["sketch"] == {"rows_read": 30_000, "of_rows": 30_000, "sampled": False}


def test_rare_rows_outside_the_sample_are_still_bounded(tmp_path):
    """Rows of another shape in row groups the sample skips: the columns chosen from the
    sample rebuild them badly, and the archive says so (its bounds hold and its ledger
    carries the error, checked against numpy)."""
    x = _low_rank(11, 20_000, 10, rank=2)
    seed, wanted = 3, 2000
    groups = [RowGroup("", k, k * GROUP_ROWS, GROUP_ROWS) for k in range(40)]
    skipped = sorted(set(range(40)) - {g.index for g in choose_row_groups(groups, wanted, seed)})
    rare = slice(skipped[0] * GROUP_ROWS, skipped[0] * GROUP_ROWS + 200)
    rng = np.random.default_rng(12)  # off the rank-2 shape: a third direction, in 200 rows only
    x[rare] += 50.0 * np.outer(rng.standard_normal(200), rng.standard_normal(10))
    folder = _write(tmp_path / "d", _floats(x), files=1)
    archive = rankfold.compress(str(folder), tmp_path / "r.rankfold", rank=2, sketch_rows=wanted, seed=seed)
    assert rare.start not in archive.manifest["sketch"]["first_rows"]  # the sample missed them
    _assert_bounds_hold(archive, x)
    error = np.abs(archive.to_numpy() - x)
    assert error[rare].max() > 10.0 > 100 * np.delete(error, np.arange(rare.start, rare.stop), axis=0).max()
    err_max = archive.column_ledger().column("err_max").to_numpy()
    assert np.all(err_max >= error.max(axis=0))


@settings(max_examples=20, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(rows=st.integers(40, 900), width=st.integers(1, 8), group=st.integers(5, 120),
       fraction=st.floats(0.01, 0.6), data_seed=st.integers(0, 2**31), seed=st.integers(0, 2**31),
       spikes=st.integers(0, 5), nulls=st.booleans())
def test_bounds_hold_whatever_the_sample(tmp_path_factory, assert_tight, rows, width, group, fraction,
                                         data_seed, seed, spikes, nulls):
    wanted = max(1, int(fraction * rows))
    x = _low_rank(data_seed, rows, width, rank=min(2, width), noise=1e-3)
    rng = np.random.default_rng(data_seed + 1)
    x[rng.integers(0, rows, spikes), rng.integers(0, width, spikes)] *= 1e4
    columns = _floats(x)
    if nulls:
        columns["v00"] = pa.array(x[:, 0], mask=rng.random(rows) < 0.1)
    folder = _write(tmp_path_factory.mktemp("prop") / "d", columns, files=2, group_rows=group)
    archive = rankfold.compress(str(folder), folder.parent / "p.rankfold", rank=1, sketch_rows=wanted,
                                seed=seed)
    truth = _truth(archive, pa.table(columns))
    _assert_bounds_hold(archive, truth)
    # and tight, whatever the sample (the contract in tests/conftest.py, bounds_are_tight)
    assert_tight(archive, pa.table(columns), truth, archive.to_numpy(), archive.cell_bounds())
    sketch = archive.manifest["sketch"]
    assert sketch["of_rows"] == rows
    chosen = choose_row_groups(parquet_row_groups(sorted(str(p) for p in folder.glob("*.parquet"))),
                               wanted, seed)
    assert sketch["sampled"] == (sum(g.rows for g in chosen) < rows)
    if sketch["sampled"]:
        assert sketch["first_rows"] == [g.first_row for g in chosen]


def test_integer_beyond_two_to_the_53_outside_the_sample_is_kept_exactly(tmp_path):
    """The sample cannot see it; the encode pass does, and compress starts again with a
    sketch of every row, which keeps the column exactly (as without sampling)."""
    x = _low_rank(13, 10_000, 6)
    groups = [RowGroup("", k, k * GROUP_ROWS, GROUP_ROWS) for k in range(20)]
    skipped = sorted(set(range(20)) - {g.index for g in choose_row_groups(groups, 1000, 0)})
    big = np.arange(10_000, dtype=np.int64)
    big[skipped[-1] * GROUP_ROWS + 3] = 2**60 + 1
    columns = _floats(x) | {"big": pa.array(big)}
    folder = _write(tmp_path / "d", columns, files=1)
    archive = rankfold.compress(str(folder), tmp_path / "b.rankfold", rank=2, sketch_rows=1000)
    assert "big" not in archive.numeric_columns
    assert not archive.manifest["sketch"]["sampled"]
    assert archive.rebuild().column("big").to_numpy().tolist() == big.tolist()


def test_values_too_large_to_square_outside_the_sample_are_refused_and_keep_the_old_archive(tmp_path):
    x = _low_rank(14, 10_000, 5)
    groups = [RowGroup("", k, k * GROUP_ROWS, GROUP_ROWS) for k in range(20)]
    skipped = sorted(set(range(20)) - {g.index for g in choose_row_groups(groups, 1000, 0)})
    x[skipped[0] * GROUP_ROWS, 3] = 1e300
    folder = _write(tmp_path / "d", _floats(x), files=1)
    target = tmp_path / "keep.rankfold"
    old = rankfold.compress(np.ones((5, 2)), target)
    before = json.loads((target / "manifest.json").read_text())
    with pytest.raises(InvalidInputError, match="too large to square"):
        rankfold.compress(str(folder), target, rank=2, sketch_rows=1000, overwrite=True)
    assert json.loads((target / "manifest.json").read_text()) == before
    assert np.array_equal(rankfold.open(target).to_numpy(), old.to_numpy())


def test_rows_counted_by_the_footers_must_be_the_rows_read(dataset, tmp_path, monkeypatch):
    from rankfold.udfs.passes import executors

    folder, _ = dataset
    real = executors.LocalExecutor.row_groups

    def one_group_short(self, numeric):  # as if a file had grown after its footer was read
        return real(self, numeric)[:-1]

    monkeypatch.setattr(executors.LocalExecutor, "row_groups", one_group_short)
    with pytest.raises(SourceChangedError, match="held 29500 rows"):
        rankfold.compress(str(folder), tmp_path / "c.rankfold", rank=3, sketch_rows=3000)
    assert not (tmp_path / "c.rankfold").exists()


@pytest.mark.parametrize("value, message", [
    (0, "positive number of rows"), (-5, "positive number of rows"), ("some", "'auto', 'all'"),
    (2.5, "positive number of rows"), (True, "positive number of rows"),
])
def test_bad_sketch_rows_are_refused(tmp_path, value, message):
    with pytest.raises(InvalidInputError, match=message):
        rankfold.compress(np.ones((4, 2)), tmp_path / "x.rankfold", sketch_rows=value)


def test_sketch_rows_needs_a_parquet_source_and_no_targets(dataset, tmp_path):
    folder, _ = dataset
    with pytest.raises(InvalidInputError, match="neither a Parquet dataset"):
        rankfold.compress(np.ones((40, 3)), tmp_path / "x.rankfold", rank=1, sketch_rows=10)
    with pytest.raises(InvalidInputError, match="error or size target"):
        rankfold.compress(str(folder), tmp_path / "y.rankfold", rel_error=0.1, sketch_rows=3000)
    # with neither rank nor target, the default tolerance (max_std_error) needs every row too
    with pytest.raises(InvalidInputError, match="default max_std_error"):
        rankfold.compress(str(folder), tmp_path / "z.rankfold", sketch_rows=3000)


def test_command_line_takes_sketch_rows_and_inspect_says_what_the_sketch_read(dataset, tmp_path, capsys):
    from rankfold.cli import main

    folder, _ = dataset
    target = tmp_path / "cli.rankfold"
    assert main(["compress", str(folder), str(target), "--rank", "3", "--sketch-rows", "3000",
                 "--quiet"]) == 0
    sketch = rankfold.open(target).manifest["sketch"]
    capsys.readouterr()
    assert main(["inspect", str(target)]) == 0
    out = capsys.readouterr().out
    assert (f"sketch        read {sketch['rows_read']:,} of 30,000 rows (a seeded sample of "
            f"{sketch['row_groups_read']} of {sketch['of_row_groups']} row groups)") in out
    with pytest.raises(SystemExit):
        main(["compress", str(folder), str(tmp_path / "bad.rankfold"), "--sketch-rows", "many"])
    assert "expected 'auto', 'all' or a number of rows" in capsys.readouterr().err


def test_sampled_archive_passes_verify_against_its_source_and_takes_appended_rows(dataset, tmp_path):
    """The independent check (rankfold.verify re-reads the source and compares every cell
    with its bound) passes, and appended rows are verified with the sampled factors."""
    folder, table = dataset
    archive = rankfold.compress(str(folder), tmp_path / "v.rankfold", rank=3, sketch_rows=3000, seed=2)
    report = rankfold.verify(archive.path, str(folder))
    assert report["ok"], report["problems"]
    assert report["source"]["cells_checked"] == 30_000 * len(archive.numeric_columns)
    more = table.slice(0, 2000)
    grown = archive.append(more)
    assert grown.shape == (32_000, archive.shape[1])
    truth = np.vstack([_truth(archive, table), _truth(archive, more)])
    _assert_bounds_hold(grown, truth)


# -- DuckDB tables: ranges of row ids ---------------------------------------------------------
def _database(path, columns: dict, delete_every: int | None = None):
    con = duckdb.connect(str(path))
    con.from_arrow(pa.table(columns)).create("readings")
    if delete_every:
        con.sql(f"DELETE FROM readings WHERE rowid % {delete_every} = 0")
    return con


def test_table_row_groups_count_the_rows_of_each_rowid_range(tmp_path):
    x = _low_rank(15, 20_000, 3)
    con = _database(tmp_path / "t.duckdb", _floats(x), delete_every=7)
    groups = table_row_groups(con, "readings", ["v00", "v01", "v02"])
    assert len(groups) >= 8
    first = 0
    for g in groups:  # each range's count, asked of DuckDB directly
        lo, hi = g.rowids
        assert g.rows == con.sql(f"SELECT count(*) FROM readings WHERE rowid BETWEEN {lo} AND {hi}").fetchall()[0][0]
        assert g.first_row == first and g.path is None
        first += g.rows
    assert first == con.sql("SELECT count(*) FROM readings").fetchall()[0][0] == 20_000 - 2858
    con.sql("CREATE VIEW recent AS SELECT * FROM readings")
    assert table_row_groups(con, "recent", ["v00"]) is None  # a view has no row ids
    assert table_row_groups(con, "readings", ["v00", "RowId"]) is None  # shadowed row ids


def test_sampled_sketch_of_a_duckdb_table(tmp_path):
    x = _low_rank(16, 30_000, 8)
    rng = np.random.default_rng(17)
    columns = _floats(x)
    columns["v03"] = pa.array(x[:, 3], mask=rng.random(30_000) < 0.05)
    con = _database(tmp_path / "t.duckdb", columns, delete_every=11)
    kept = con.sql("SELECT * FROM readings").to_arrow_table()
    one = rankfold.compress("readings", tmp_path / "1.rankfold", connection=con, rank=2, sketch_rows=3000, seed=3)
    two = rankfold.compress("readings", tmp_path / "2.rankfold", connection=con, rank=2, sketch_rows=3000, seed=3)
    sketch = one.manifest["sketch"]
    assert sketch["sampled"] and 3000 <= sketch["rows_read"] < kept.num_rows == sketch["of_rows"]
    assert sketch == two.manifest["sketch"] and one.basis_columns == two.basis_columns
    assert np.array_equal(one.to_numpy(), two.to_numpy(), equal_nan=True)
    truth = _truth(one, kept)
    _assert_bounds_hold(one, truth)
    ledger = one.column_ledger()
    for j in range(truth.shape[1]):  # statistics of every row (numpy)
        finite = truth[:, j][np.isfinite(truth[:, j])]
        assert ledger.column("valid")[j].as_py() == finite.size
        np.testing.assert_allclose(ledger.column("mean")[j].as_py(), finite.mean(), rtol=1e-12, atol=1e-15)
    with pytest.raises(InvalidInputError, match="neither a Parquet dataset"):
        rankfold.compress("SELECT * FROM readings", tmp_path / "q.rankfold", connection=con, rank=3, sketch_rows=3000)


def test_a_failing_sample_pass_closes_the_stream_opened_ahead(dataset, tmp_path, monkeypatch):
    """The encode pass's DuckDB stream is opened before the sample is read; when compress
    stops on an error before the encode pass, that stream and its thread are closed too."""
    import threading

    from rankfold.udfs.passes import compress as build

    folder, _ = dataset

    def broken(*args):
        raise InvalidInputError("a failure inside the sample pass")

    monkeypatch.setattr(build, "_profile_task", broken)
    with pytest.raises(InvalidInputError, match="inside the sample pass"):
        rankfold.compress(str(folder), tmp_path / "f.rankfold", rank=3, sketch_rows=3000)
    assert not [t for t in threading.enumerate() if t.name == "rankfold-read-ahead"]
    assert not (tmp_path / "f.rankfold").exists()
