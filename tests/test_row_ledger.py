"""No per-row ledger when a tolerance bounds every cell (issue 14, item 3).

When every approximated column has a finite tolerance, the row files carry no ``_rf_err_max`` /
``_rf_err_l2`` and every bound is min(err_max_j + slack, tolerance_j) (DEVELOPERS.md, "The bound
contract"); otherwise the row ledger stays. Each surface is checked on both kinds of archive
against the invented source itself: numpy rebuild, SQL scan (cell and row bounds), aggregates
(blocks and scan paths) against ``numpy.sum``, row errors, report, append, and archives written
before the manifest said (``row_ledger`` absent: the row files hold the ledger).
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

import rankfold
import rankfold.udfs
from rankfold.udfs.store import layout
from rankfold.udfs.store.manifest import write_manifest
from rankfold.udfs.store.model import FittedModel
from rankfold.udfs.store.reader import ArchiveReader

WIDTH = 6
LEDGER = {layout.ROW_ERR_MAX, layout.ROW_ERR_L2}


def _table(m: int, seed: int) -> pa.Table:
    """Invented (seed): a key, a site label and WIDTH columns near rank 2 plus 2% noise."""
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((m, 2)) @ np.random.default_rng(99).standard_normal((2, WIDTH))
    x += 0.02 * rng.standard_normal(x.shape)
    columns = {"id": pa.array(np.arange(m) + 10_000 * seed), "site": pa.array(np.where(np.arange(m) % 3, "fen", "moor"))}
    columns |= {f"c{j}": x[:, j] for j in range(WIDTH)}
    return pa.table(columns)


def _truth(table: pa.Table) -> np.ndarray:
    return np.column_stack([table.column(f"c{j}").to_numpy() for j in range(WIDTH)])


def _row_columns(archive) -> set[str]:
    return {n for p in archive.manifest["row_parts"] for n in pq.read_schema(archive.path / p["name"]).names}


def _sql(path, query: str) -> pa.Table:
    con = duckdb.connect()
    try:
        rankfold.udfs.register(con)
        return con.sql(query, params=[str(path)]).to_arrow_table()
    finally:
        con.close()


# every column has a tolerance (max_abs_error for all): no ledger; a fixed rank or a tolerance
# on some columns only: the ledger stays
KINDS = {"tolerance everywhere": (dict(max_abs_error=0.01), False),
         "fixed rank": (dict(rank=2), True),
         "tolerance on some columns": (dict(rank=2, max_abs_error={"c1": 0.01, "c4": 0.02}), True)}


@pytest.fixture(scope="module", params=sorted(KINDS))
def kind(request, tmp_path_factory):
    options, ledger = KINDS[request.param]
    table = _table(1500, 1)
    archive = rankfold.compress(table, tmp_path_factory.mktemp("ledger") / "a.rankfold", key="id",
                                seed=0, **options)
    return table, archive, ledger


def test_the_row_ledger_is_written_only_when_a_cell_may_need_it(kind):
    table, archive, ledger = kind
    assert archive.manifest["row_ledger"] is ledger
    assert ArchiveReader(archive.path).model.row_ledger is ledger
    assert (LEDGER <= _row_columns(archive)) is ledger
    assert bool(LEDGER & _row_columns(archive)) is ledger


def _within_and_tight(archive, table, assert_tight) -> np.ndarray:
    """Every rebuilt value within its bound of the invented source (numpy), and the bounds
    tight; returns the bounds (rows, WIDTH)."""
    truth = _truth(table)
    rebuilt = archive.rebuild(bounds=True)
    values = np.column_stack([rebuilt.column(f"c{j}").to_numpy() for j in range(WIDTH)])
    bounds = np.column_stack([rebuilt.column(f"c{j}_bound").to_numpy() for j in range(WIDTH)])
    assert np.all(np.abs(truth - values) <= bounds)
    assert_tight(archive, table, truth, values, bounds)
    return bounds


def test_bounds_hold_and_are_tight_on_both_kinds(kind, assert_tight):
    table, archive, ledger = kind
    bounds = _within_and_tight(archive, table, assert_tight)
    model = ArchiveReader(archive.path).model
    if not ledger:  # the column's bound: its largest error plus slack, capped at the tolerance
        assert np.all(bounds <= model.tolerance[None, :])
        assert np.allclose(bounds.max(axis=0), np.minimum(model.err_max, model.tolerance), rtol=1e-9)


def test_sql_scan_serves_the_numpy_cells_and_bounds(kind):
    table, archive, ledger = kind
    truth = _truth(table)
    numpy_side = archive.rebuild(bounds=True)
    cells = _sql(archive.path, "SELECT * FROM rankfold_scan(?, bounds := 'cell') ORDER BY _rf_row")
    rows = _sql(archive.path, "SELECT * FROM rankfold_scan(?, bounds := 'row') ORDER BY _rf_row")
    for j in range(WIDTH):
        name = f"c{j}"
        py, py_b = numpy_side.column(name).to_numpy(), numpy_side.column(f"{name}_bound").to_numpy()
        sq, sq_b = cells.column(name).to_numpy(), cells.column(f"{name}_bound").to_numpy()
        # same sums in the same order; SQL's bound carries a factor 1 + 16u (udfs/sql/tables.py)
        assert np.allclose(py, sq, rtol=0, atol=1e-12) and np.allclose(py_b, sq_b, rtol=1e-14, atol=0)
        assert np.all(np.abs(truth[:, j] - sq) <= sq_b)
        assert np.all(np.abs(truth[:, j] - rows.column(name).to_numpy()) <= rows.column("_rf_bound").to_numpy())


def test_row_errors_are_null_without_a_row_ledger(kind):
    table, archive, ledger = kind
    errors = _sql(archive.path, "SELECT * FROM rankfold_row_errors(?) ORDER BY _rf_row")
    assert errors.column_names == ["_rf_row", "id", "err_max_scaled", "err_l2_scaled"]
    assert errors.num_rows == table.num_rows
    figures = errors.column("err_max_scaled")
    assert figures.type == pa.float32()
    assert figures.null_count == (0 if ledger else table.num_rows)


def test_aggregates_bound_the_true_sums(kind):
    table, archive, ledger = kind
    truth = _truth(table)
    names = [f"c{j}" for j in range(WIDTH)]
    site = table.column("site").to_numpy(zero_copy_only=False)
    position = np.arange(truth.shape[0])
    for where, rows, picked in ((None, None, position >= 0),                      # blocks.parquet
                                ("site = 'moor'", None, site == "moor"),           # a scan
                                (None, slice(100, 900), (position >= 100) & (position < 900))):  # cut row group
        result = archive.aggregate(names, "sum", where=where, rows=rows)
        for j, name in enumerate(names):
            exact = float(np.sum(truth[picked, j]))  # numpy.sum of the invented source
            value, bound = result.column(name)[0].as_py(), result.column(f"{name}_bound")[0].as_py()
            assert abs(exact - value) <= bound, (where, rows, name)
            assert np.isfinite(bound)


def test_the_report_says_there_is_no_row_ledger(kind):
    from rankfold.report import report_data

    table, archive, ledger = kind
    data = report_data(archive, sample_rows=40)
    assert data["rows"]["row_ledger"] is ledger
    assert (len(data["rows"]["worst"]) > 0) is ledger
    assert (data["rows"]["max"] is not None) is ledger


@pytest.mark.parametrize("options, ledger", [(dict(max_abs_error=0.01), False), (dict(rank=2), True)])
def test_an_append_keeps_what_the_archive_has(tmp_path, assert_tight, options, ledger):
    first, more = _table(1200, 1), _table(500, 2)
    archive = rankfold.compress(first, tmp_path / "a", key="id", seed=0, **options)
    grown = archive.append(more)
    assert grown.manifest["row_ledger"] is ledger
    new_part = grown.manifest["row_parts"][-1]["name"]
    assert (LEDGER <= set(pq.read_schema(grown.path / new_part).names)) is ledger
    both = pa.concat_tables([first, more])
    _within_and_tight(grown, both, assert_tight)


def _older_archive(path, monkeypatch) -> None:
    """An archive as written before the manifest's ``row_ledger``: every column has a
    tolerance, yet the row files carry the row ledger and the manifest does not say."""
    with monkeypatch.context() as patch:
        patch.setattr(FittedModel, "bounded_by_tolerance", property(lambda self: False))
        rankfold.compress(_table(1200, 1), path, key="id", seed=0, max_abs_error=0.01)
    manifest = json.loads((path / layout.MANIFEST).read_text())
    assert manifest.pop("row_ledger") is True
    write_manifest(path, manifest)  # resealed as that writer sealed it


def test_an_older_archive_with_a_row_ledger_reads_and_appends_with_it(tmp_path, monkeypatch, assert_tight):
    path = tmp_path / "old"
    _older_archive(path, monkeypatch)
    archive = rankfold.open(path)
    assert "row_ledger" not in archive.manifest
    model = ArchiveReader(path).model
    assert model.row_ledger and model.bounded_by_tolerance
    table = _table(1200, 1)
    truth = _truth(table)
    rebuilt = archive.rebuild(bounds=True)
    bounds = np.column_stack([rebuilt.column(f"c{j}_bound").to_numpy() for j in range(WIDTH)])
    values = np.column_stack([rebuilt.column(f"c{j}").to_numpy() for j in range(WIDTH)])
    assert np.all(np.abs(truth - values) <= bounds)
    # the row figures are used: some bounds fall below their column's largest error
    assert np.any(bounds < 0.5 * model.err_max[None, :])
    sql = _sql(path, "SELECT * FROM rankfold_scan(?, bounds := 'cell') ORDER BY _rf_row")
    for j in range(WIDTH):
        assert np.allclose(sql.column(f"c{j}_bound").to_numpy(), bounds[:, j], rtol=1e-14, atol=0)
    grown = archive.append(_table(400, 3))
    assert "row_ledger" not in grown.manifest
    assert LEDGER <= set(pq.read_schema(grown.path / grown.manifest["row_parts"][-1]["name"]).names)
    both = pa.concat_tables([table, _table(400, 3)])
    rebuilt = grown.rebuild(bounds=True)
    values = np.column_stack([rebuilt.column(f"c{j}").to_numpy() for j in range(WIDTH)])
    bounds = np.column_stack([rebuilt.column(f"c{j}_bound").to_numpy() for j in range(WIDTH)])
    assert_tight(grown, both, _truth(both), values, bounds)


def test_a_manifest_with_a_row_ledger_flag_of_another_type_is_refused(tmp_path):
    path = tmp_path / "a"
    rankfold.compress(_table(300, 1), path, key="id", seed=0, max_abs_error=0.01)
    manifest = json.loads((path / layout.MANIFEST).read_text())
    manifest["row_ledger"] = "no"
    write_manifest(path, manifest)
    with pytest.raises(rankfold.CorruptArchiveError, match=r"manifest.row_ledger is a string .*not true or false"):
        rankfold.open(path)


def test_a_row_file_without_the_ledger_its_manifest_implies_is_refused(tmp_path, monkeypatch):
    path = tmp_path / "old"
    _older_archive(path, monkeypatch)
    manifest = json.loads((path / layout.MANIFEST).read_text())
    manifest["row_ledger"] = False  # the files hold a ledger: reads, the ledger unused
    write_manifest(path, manifest)
    assert not ArchiveReader(path).model.row_ledger
    manifest["row_ledger"] = True
    name = manifest["row_parts"][0]["name"]
    pq.write_table(pq.read_table(path / name).drop_columns([layout.ROW_ERR_MAX]), path / name,
                   write_page_checksum=True)
    from rankfold.udfs.store.manifest import file_entry
    entry = file_entry(path, name, [layout.ROW_ID, "id"])
    manifest["files"] = [entry if f["name"] == name else f for f in manifest["files"]]
    write_manifest(path, manifest)
    with pytest.raises(rankfold.CorruptArchiveError, match="lacks the column '_rf_err_max'"):
        ArchiveReader(path)


# -- property: bounds hold on both kinds of archive, in numpy and in SQL ----------------------
@st.composite
def _ledger_cases(draw):
    m, n = draw(st.integers(2, 50)), draw(st.integers(1, 7))
    spec = (draw(st.integers(0, 2**32 - 1)), m, n, draw(st.sampled_from(("unit", "decades", "huge_mean"))),
            draw(st.booleans()))  # conftest.invent: NULL, NaN, +-inf cells, integer and float32 columns
    kind = draw(st.sampled_from(("every column", "some columns", "none")))
    options = {"seed": draw(st.integers(0, 2**16)), "batch_rows": draw(st.sampled_from([None, 7]))}
    if kind == "every column":
        options["max_std_error"] = draw(st.sampled_from([0.3, 0.05, 0.01]))
    elif kind == "some columns":
        options["max_abs_error"] = {"c0": draw(st.sampled_from([0.5, 0.05]))}
        options["rank"] = draw(st.integers(1, min(m, n)))
    else:
        options["rank"] = draw(st.integers(1, min(m, n)))
    return spec, {k: v for k, v in options.items() if v is not None}


@settings(max_examples=25, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(case=_ledger_cases())
def test_bounds_hold_with_and_without_a_row_ledger(tmp_path_factory, invented_table, table_truth,
                                                   assert_tight, case):
    spec, options = case
    table = invented_table(*spec)
    archive = rankfold.compress(table, tmp_path_factory.mktemp("prop") / "a.rankfold", **options)
    model = ArchiveReader(archive.path).model
    assert model.row_ledger is not model.bounded_by_tolerance
    assert (LEDGER <= _row_columns(archive)) is model.row_ledger
    truth, nulls = table_truth(table)
    values, bounds = archive.to_numpy(), archive.cell_bounds()
    finite = np.isfinite(truth)
    assert np.all(np.abs(truth[finite] - values[finite]) <= bounds[finite])
    assert np.array_equal(np.isnan(values), np.isnan(truth) | nulls)
    assert_tight(archive, table, truth, values, bounds)
    sql = _sql(archive.path, "SELECT * FROM rankfold_scan(?, bounds := 'cell') ORDER BY _rf_row")
    for j, name in enumerate(archive.numeric_columns):
        v = sql.column(name).cast(pa.float64()).fill_null(np.nan).to_numpy()
        b = sql.column(f"{name}_bound").to_numpy()
        ok = finite[:, j]
        assert np.all(np.abs(truth[ok, j] - v[ok]) <= b[ok]), name
