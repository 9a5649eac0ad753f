"""NULL cells stored as NULL residual codes (issue 14): every surface serves them as before.

The encode pass stores a NULL source cell of a column with residual codes as a NULL in that
column's code column (``_rf_q_<j>``) instead of a row of cells.parquet; NaN, +-inf and
overflowing cells stay exact cells. Every reader must serve exactly what it served when the
NULL cell was an exact cell: NULL, bound 0, not counted by aggregates, in Python, in SQL
(``rankfold_scan``, cell and row bounds) and from the block sums; row-difference coding
(``row_differences='all'``) must decode around NULLs; archives written before (NULL cells in
cells.parquet, ``encode.NULL_CODES = False`` writes them) keep reading the same, and an
append to them may add NULL codes.

Outside references: the invented sources themselves (numpy Generator, fixed seeds), numpy's
``nansum`` / ``count_nonzero`` for the aggregates, and the bound-tightness check of
tests/conftest.py.
"""

from __future__ import annotations

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import rankfold
import rankfold.udfs
from rankfold.udfs.passes import encode
from rankfold.udfs.store import layout
from rankfold.portable_view import view_sql

SETTINGS = settings(max_examples=25, deadline=None, derandomize=True,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])


@pytest.fixture(scope="module")
def con():
    connection = duckdb.connect()
    rankfold.udfs.register(connection)
    yield connection
    connection.close()


def _coded(archive) -> np.ndarray:
    """(n,) bool: columns with residual codes in their own code column."""
    model = archive._reader.model
    return np.isfinite(model.residual_step) & ~model.is_basis


def _sql_cells(con, archive) -> dict:
    return con.sql(f"SELECT * FROM rankfold_scan('{archive.path}', bounds := 'cell') "
                   "ORDER BY _rf_row").fetchnumpy()


def _check_surfaces(con, archive, table: pa.Table, truth: np.ndarray, nulls: np.ndarray) -> None:
    """Python rebuild, SQL scan (cell and row bounds) and aggregates against the source."""
    names = archive.numeric_columns
    rebuilt = archive.rebuild(bounds=True)
    scan = _sql_cells(con, archive)
    rows = con.sql(f"SELECT _rf_bound FROM rankfold_scan('{archive.path}') ORDER BY _rf_row").fetchnumpy()
    for j, name in enumerate(names):
        column = rebuilt.column(name)
        bound = rebuilt.column(f"{name}_bound").to_numpy()
        np.testing.assert_array_equal(column.is_null().to_numpy(zero_copy_only=False), nulls[:, j])
        assert np.all(bound[nulls[:, j]] == 0.0)
        values = column.cast(pa.float64()).fill_null(np.nan).to_numpy()
        finite = np.isfinite(truth[:, j])
        # the bound holds on the value served (DEVELOPERS.md, "The bound contract")
        assert np.all(np.abs(values[finite] - truth[finite, j]) <= bound[finite])
        # SQL: NULL where the source is NULL, bound 0 there; its own bound holds elsewhere
        sql_values = np.ma.getdata(scan[name]).astype(np.float64)
        sql_null = np.ma.getmaskarray(scan[name])
        sql_bound = np.ma.getdata(scan[f"{name}_bound"]).astype(np.float64)
        assert not np.ma.getmaskarray(scan[f"{name}_bound"]).any()
        np.testing.assert_array_equal(sql_null, nulls[:, j])
        assert np.all(sql_bound[nulls[:, j]] == 0.0)
        assert np.all(np.abs(sql_values[finite] - truth[finite, j]) <= sql_bound[finite])
        row_bound = np.ma.getdata(rows["_rf_bound"])
        assert not np.ma.getmaskarray(rows["_rf_bound"]).any()
        assert np.all(row_bound * (1 + 1e-12) >= sql_bound)
    # aggregates: NULL cells are not counted, from the block sums and from a scan (where=)
    expected_count = np.count_nonzero(~nulls, axis=0)
    with np.errstate(invalid="ignore", over="ignore"):  # columns with +-inf: not compared
        sums = np.nansum(np.where(nulls, 0.0, truth), axis=0)
    usable = np.all(np.isfinite(truth) | nulls, axis=0)  # no NaN or inf: a finite sum
    picked = [name for j, name in enumerate(names) if usable[j]]  # sums of +-inf: not compared
    for where in (None, f"{layout.ROW_ID} >= 0") if picked else ():
        count = archive.aggregate(picked, "count", where=where)
        total = archive.aggregate(picked, "sum", where=where)
        for j, name in enumerate(names):
            if name not in picked:
                continue
            assert count.column(name)[0].as_py() == expected_count[j]
            if expected_count[j]:
                value = total.column(name)[0].as_py()
                assert abs(value - sums[j]) <= total.column(f"{name}_bound")[0].as_py() * (1 + 1e-9) + 1e-300


@SETTINGS
@given(seed=st.integers(0, 2**31), m=st.integers(8, 120), n=st.integers(1, 6),
       scale=st.sampled_from(["unit", "decades", "huge_mean"]), tolerance=st.sampled_from([0.1, 0.01]),
       differences=st.sampled_from(["off", "all"]), batch_rows=st.sampled_from([None, 7]))
def test_null_cells_round_trip_on_every_surface(tmp_path_factory, invented_table, table_truth, assert_tight,
                                                con, seed, m, n, scale, tolerance, differences, batch_rows):
    table = invented_table(seed, m, n, scale, True)
    path = tmp_path_factory.mktemp("nulls") / "a.rankfold"
    options = {"batch_rows": batch_rows} if batch_rows else {}
    archive = rankfold.compress(table, path, max_std_error=tolerance, row_differences=differences, **options)
    truth, nulls = table_truth(table)
    reader = archive._reader
    coded = _coded(archive)
    # no NULL cell of a coded column in cells.parquet; every other NULL cell still there
    in_cells = reader.cell_nulls
    assert not coded[reader.cell_cols[in_cells]].any()
    off_anchor = np.ones(m, bool)
    off_anchor[reader.model.anchor_positions] = False
    as_codes = nulls[off_anchor][:, coded]
    assert archive.manifest.get("null_codes", False) == bool(as_codes.any())
    assert in_cells.sum() == nulls[off_anchor][:, ~coded & ~reader.model.is_basis].sum()
    _check_surfaces(con, archive, table, truth, nulls)
    assert_tight(archive, table, truth, archive.to_numpy(), archive.cell_bounds())
    assert rankfold.verify(archive.path, table)["ok"]


def _series(seed: int, m: int, first: int = 0) -> pa.Table:
    """Invented (seed): a key and 6 random walks; runs of NULLs (20% of rows) in w0..w2,
    one of them across the first restart chunk's end (row 8,192) and one at the first row,
    and a few NaN / inf cells in w3."""
    rng = np.random.default_rng(seed)
    x = np.cumsum(rng.normal(size=(m, 6)), axis=0) + rng.normal(size=6) * 10
    columns = {"id": pa.array(np.arange(first, first + m, dtype=np.int64))}
    for j in range(6):
        null = np.zeros(m, bool)
        if j < 3:
            while null.mean() < 0.2:
                start = int(rng.integers(0, m))
                null[start:start + int(rng.integers(5, 200))] = True
            null[:3] = True
            null[max(0, 8190 - first):max(0, 8195 - first)] = True
        values = x[:, j].copy()
        if j == 3:
            values[rng.integers(0, m, 5)] = np.nan
            values[rng.integers(0, m, 3)] = np.inf
        columns[f"w{j}"] = pa.array(values, mask=null)
    return pa.table(columns)


@pytest.mark.parametrize("differences", ["off", "all"])
def test_older_form_reads_alike_and_appends(tmp_path, monkeypatch, table_truth, con, differences):
    """The same source written with NULL codes and in the older form (NULL cells in
    cells.parquet): the same values and bounds in Python and SQL, the same aggregates; an
    append of rows with NULLs keeps both alike and verifies."""
    table = _series(5, 9000)
    options = dict(key="id", max_std_error=0.01, row_differences=differences)
    new = rankfold.compress(table, tmp_path / "new", **options)
    monkeypatch.setattr(encode, "NULL_CODES", False)
    old = rankfold.compress(table, tmp_path / "old", **options)
    monkeypatch.setattr(encode, "NULL_CODES", True)
    truth, nulls = table_truth(table.drop_columns(["id"]))
    coded = _coded(new)
    assert coded[:3].all() and new.manifest["null_codes"] and "null_codes" not in old.manifest
    assert old._reader.cell_rows.size - new._reader.cell_rows.size == nulls[:, coded].sum()
    if differences == "all":
        assert new._reader.model.difference[:3].all()
    for table_now, truth_now, nulls_now in ((table, truth, nulls),):
        _same(con, new, old)
        _check_surfaces(con, new, table_now, truth_now, nulls_now)
    more = _series(6, 4000, first=9000)
    new2, old2 = new.append(more), old.append(more)
    both = pa.concat_tables([table, more])
    truth2, nulls2 = table_truth(both.drop_columns(["id"]))
    assert old2.manifest["null_codes"]  # the appended rows hold NULL codes
    _same(con, new2, old2)
    _check_surfaces(con, new2, both, truth2, nulls2)
    for archive in (new2, old2):
        report = rankfold.verify(archive.path, both)
        assert report["ok"], report["problems"]


def _same(con, a, b) -> None:
    """Two archives of one source serve the same values and bounds (Python and SQL) and
    aggregates that agree within rounding."""
    ra, rb = a.rebuild(bounds=True), b.rebuild(bounds=True)
    assert ra.schema == rb.schema
    for name in ra.column_names:  # NaN cells: equal (Table.equals holds NaN != NaN)
        np.testing.assert_array_equal(ra.column(name).is_null().to_numpy(zero_copy_only=False),
                                      rb.column(name).is_null().to_numpy(zero_copy_only=False))
        np.testing.assert_array_equal(ra.column(name).fill_null(0).to_numpy(),
                                      rb.column(name).fill_null(0).to_numpy())
    sa, sb = _sql_cells(con, a), _sql_cells(con, b)
    for name in sa:
        np.testing.assert_array_equal(np.ma.getmaskarray(sa[name]), np.ma.getmaskarray(sb[name]))
        np.testing.assert_array_equal(np.ma.filled(sa[name], 0), np.ma.filled(sb[name], 0))
    names = a.numeric_columns
    # the plain-SQL view on a bare connection (no UDFs), point lookups by predicate (one
    # restart chunk decoded) and the SQL cell function, at NULL cells and beside them
    bare = duckdb.connect()
    views = []
    for archive, view in ((a, "va"), (b, "vb")):
        bare.execute(view_sql(archive, view, bounds="cell"))
        views.append(bare.sql(f"SELECT * FROM {view} ORDER BY _rf_row").fetchnumpy())
    bare.close()
    for name in views[0]:
        np.testing.assert_array_equal(np.ma.getmaskarray(views[0][name]), np.ma.getmaskarray(views[1][name]))
        np.testing.assert_array_equal(np.ma.filled(views[0][name], 0), np.ma.filled(views[1][name], 0))
        np.testing.assert_array_equal(np.ma.getmaskarray(views[0][name]), np.ma.getmaskarray(sa[name]))
    null_rows = np.flatnonzero(np.ma.getmaskarray(sa[names[0]]))
    last = len(sa[names[0]]) - 1
    for row in sorted({int(null_rows[0]), int(null_rows[-1]), min(int(null_rows[-1]) + 1, last), 8192, last}):
        for archive in (a, b):
            one = con.sql(f"SELECT * FROM rankfold_scan('{archive.path}', bounds := 'cell', "
                          f"predicate := 'id = {row}')").fetchnumpy()
            cell = con.sql(f"SELECT rankfold_cell('{archive.path}', {row}, '{names[0]}')").fetchall()[0][0]
            for name in names:
                assert bool(np.ma.getmaskarray(one[name])[0]) == bool(np.ma.getmaskarray(sa[name])[row])
                assert np.ma.filled(one[f"{name}_bound"], -1)[0] == np.ma.filled(sa[f"{name}_bound"], -1)[row]
            assert (cell is None) == bool(np.ma.getmaskarray(sa[names[0]])[row])
    for where in (None, "id % 3 = 1"):
        ga, gb = a.aggregate(names, "avg", where=where), b.aggregate(names, "avg", where=where)
        for name in names:
            va, vb = ga.column(name)[0].as_py(), gb.column(name)[0].as_py()
            if va is None or not np.isfinite(va):
                assert (va is None) == (vb is None)
                continue
            assert va == pytest.approx(vb, rel=1e-12, abs=1e-12)


def test_null_codes_cost_fewer_bytes_than_null_cells(tmp_path, monkeypatch):
    """The point of the change, measured: a series with runs of NULLs in three columns is
    smaller with NULL codes than with its NULL cells in cells.parquet."""
    table = _series(7, 9000)
    new = rankfold.compress(table, tmp_path / "new", key="id", max_std_error=0.01)
    monkeypatch.setattr(encode, "NULL_CODES", False)
    old = rankfold.compress(table, tmp_path / "old", key="id", max_std_error=0.01)
    assert new.nbytes < old.nbytes
    name = layout.CODE_PATTERN.format(0)
    column = pq.read_table(new.path / new._reader.parts[0][2], columns=[name]).column(name)
    assert column.null_count == table.column("w0").null_count


def test_row_bound_of_a_row_whose_codes_are_all_null(tmp_path, con):
    """A row whose only coded cell is NULL: the SQL row bound is a number (0 or more), not
    NULL, and the cell bound is 0 (invented walk, seed 8)."""
    rng = np.random.default_rng(8)
    null = np.zeros(500, bool)
    null[100:140] = True
    table = pa.table({"w": pa.array(np.cumsum(rng.normal(size=500)), mask=null)})
    archive = rankfold.compress(table, tmp_path / "one", max_std_error=0.01)
    assert _coded(archive).all() and archive.manifest["null_codes"]
    rows = con.sql(f"SELECT w, _rf_bound FROM rankfold_scan('{archive.path}') ORDER BY _rf_row").fetchnumpy()
    assert not np.ma.getmaskarray(rows["_rf_bound"]).any()
    np.testing.assert_array_equal(np.ma.getmaskarray(rows["w"]), null)
