"""The user-facing surface: the safe default (max_std_error), one vocabulary across Python and
the command line, ``Archive.rebuild(bounds=True)`` / ``to_pandas``, the CLI's ``append``,
``rebuild --bounds`` and ``view`` (plain SQL run on a DuckDB connection WITHOUT rankfold), the
query layout and number precision, and messages in the CLI's own spelling.

Tables: ``sklearn.datasets.load_diabetes`` and ``load_breast_cancer`` (shipped inside
scikit-learn), and small tables invented by code with fixed seeds. Standard deviations are
``numpy.std`` (ddof 0), the spread the tolerance is defined against.
"""

from __future__ import annotations

import json
import math
import warnings
from dataclasses import fields

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import rankfold
from rankfold.cli import CLI_SPELLING, build_parser, cli_spelling, main
from rankfold.portable_view import view_sql
from rankfold.terminal import _display_step, format_bound, format_value, format_with_bound, render_table
from rankfold.udfs.passes.options import DEFAULT_MAX_STD_ERROR, CompressOptions

ROWS, COLS = 300, 10


def _table(seed: int = 3, rows: int = ROWS) -> pa.Table:
    """Rank 3 plus 1% noise, columns in different units, an int64 key, a text column, an
    integer count column, and two NULL cells."""
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((rows, 3)) @ rng.standard_normal((3, COLS))
    x = (x + 0.01 * rng.standard_normal((rows, COLS))) * np.geomspace(1, 300, COLS) + 5.0
    cols = {"id": pa.array(np.arange(rows, dtype=np.int64)),
            "site": pa.array(["a" if i % 2 else "b" for i in range(rows)])}
    for j in range(COLS):
        mask = np.zeros(rows, bool)
        if j == 4:
            mask[[7, 11]] = True
        cols[f"x{j}"] = pa.array(x[:, j], mask=mask)
    cols["count"] = pa.array(np.rint(np.abs(x[:, 2]) * 3).astype(np.int64))
    return pa.table(cols)


def _truth(table: pa.Table, names: list[str]) -> np.ndarray:
    return np.column_stack([table.column(n).to_numpy(zero_copy_only=False).astype(np.float64)
                            for n in names])


def _within(truth, rebuilt, bounds) -> bool:
    both = np.isfinite(truth)
    return bool(np.all(np.abs(truth[both] - rebuilt[both]) <= bounds[both]))


# -- the safe default ------------------------------------------------------------------------------
@pytest.mark.parametrize("loader", ["load_diabetes", "load_breast_cancer"])
def test_default_keeps_every_value_within_a_twentieth_of_its_columns_std(loader, tmp_path):
    from sklearn import datasets

    data = getattr(datasets, loader)().data  # sklearn.datasets, shipped with scikit-learn
    archive = rankfold.compress(data, tmp_path / "d.rankfold")
    rebuilt, bounds = archive.to_numpy(), archive.cell_bounds()
    std = np.std(data, axis=0)  # numpy.std, ddof 0
    assert DEFAULT_MAX_STD_ERROR == 0.05 and archive.manifest["targets"]["max_std_error"] == 0.05
    assert np.all(bounds <= 0.05 * std * (1 + 1e-12))
    assert np.all(np.abs(rebuilt - data) <= bounds)
    assert "within 0.05 x its column's standard deviation" in archive.guarantee and archive.warnings == []


def test_rank_alone_keeps_no_tolerance_and_warns_when_the_error_is_large(tmp_path):
    from sklearn.datasets import load_breast_cancer

    data = load_breast_cancer().data  # 30 instrument columns: rank 1 misses much of them
    archive = rankfold.compress(data, tmp_path / "r.rankfold", rank=1)
    assert archive.manifest["targets"]["max_std_error"] is None
    assert archive.guarantee.startswith("no tolerance was asked for")
    worst = np.max(np.abs(archive.to_numpy() - data) / np.std(data, axis=0))
    assert worst > 0.5 and archive.warnings and "standard deviations" in archive.warnings[0]


def test_rank_with_a_tolerance_honours_both(tmp_path):
    table = _table()
    archive = rankfold.compress(table, tmp_path / "b.rankfold", rank=1, max_std_error=0.02, key="id")
    assert archive.manifest["method"]["rank"] == 1
    names = archive.numeric_columns
    truth = _truth(table, names)
    std = np.nanstd(truth, axis=0)
    bounds = archive.cell_bounds()
    assert np.all(np.nan_to_num(bounds) <= 0.02 * std * (1 + 1e-12))
    assert _within(truth, archive.to_numpy(), bounds)


def test_per_column_max_std_error_and_the_smaller_of_two_tolerances(tmp_path):
    table = _table()
    archive = rankfold.compress(table, tmp_path / "p.rankfold", key="id",
                                max_std_error={"x1": 0.001, "x3": 0.2}, max_abs_error={"x3": 0.01})
    names = archive.numeric_columns
    truth = _truth(table, names)
    std = np.nanstd(truth, axis=0)
    bounds = archive.cell_bounds()
    x1, x3 = names.index("x1"), names.index("x3")
    assert np.all(bounds[:, x1] <= 0.001 * std[x1] * (1 + 1e-12))
    assert np.all(bounds[:, x3] <= min(0.01, 0.2 * std[x3]) * (1 + 1e-12))
    assert _within(truth, archive.to_numpy(), bounds)
    with pytest.raises(rankfold.InvalidInputError, match="'max_std_error' option of compress must be a positive"):
        rankfold.compress(table, tmp_path / "q.rankfold", max_std_error=0)


@settings(max_examples=8, deadline=None)
@given(level=st.floats(0.002, 0.5), seed=st.integers(0, 2**16))
def test_no_value_exceeds_max_std_error_of_its_column(level, seed, tmp_path_factory, assert_tight):
    rng = np.random.default_rng(seed)
    a = rng.standard_normal((120, 3)) @ rng.standard_normal((3, 8)) * np.geomspace(1, 1e4, 8)
    a += rng.standard_normal(a.shape) * rng.uniform(0, 0.3) * a.std(axis=0)
    a[rng.integers(120), rng.integers(8)] += 50 * a.std()  # one spike
    archive = rankfold.compress(a, tmp_path_factory.mktemp("h") / "h.rankfold", max_std_error=level, seed=seed)
    rebuilt, bounds = archive.to_numpy(), archive.cell_bounds()
    std = np.std(a, axis=0)  # numpy.std
    assert np.all(np.abs(rebuilt - a) <= bounds)
    assert np.all(np.abs(rebuilt - a) <= level * std * (1 + 1e-12))
    # and not loose: each bound within rounding of the errors it summarizes (conftest.bounds_are_tight)
    table = pa.table({name: a[:, j] for j, name in enumerate(archive.numeric_columns)})
    assert_tight(archive, table, a, rebuilt, bounds)


# -- one vocabulary ----------------------------------------------------------------------------------
def test_method_options_have_names_that_are_not_lists_and_old_names_are_deprecated(tmp_path):
    table = _table()
    new = rankfold.compress(table, tmp_path / "n.rankfold", rank=2, column_method="leverage",
                            row_method="leverage", link="optimal", key="id")
    options = new.manifest["method"]["options"]
    assert options["column_method"] == "leverage" and options["row_method"] == "leverage"
    with pytest.warns(DeprecationWarning) as record:
        old = rankfold.compress(table, tmp_path / "o.rankfold", rank=2, columns="leverage",
                                rows="leverage", link="optimal", key="id")
    assert sorted(str(w.message).split(" (")[0] for w in record) == [
        "The compress option 'columns' is now called 'column_method'",
        "The compress option 'rows' is now called 'row_method'"]
    assert np.array_equal(old.to_numpy(), new.to_numpy(), equal_nan=True)
    with pytest.raises(rankfold.InvalidInputError, match="both 'columns' and 'column_method'"):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", DeprecationWarning)
            rankfold.compress(table, tmp_path / "x.rankfold", columns="leverage", column_method="leverage")


def _subparser(name: str):
    parser = build_parser()
    return parser._subparsers._group_actions[0].choices[name]


def test_every_compress_option_of_the_library_has_a_cli_flag():
    """Introspection: CompressOptions' fields against the compress subcommand's flags."""
    compress = _subparser("compress")
    dests = {a.dest: a for a in compress._actions}
    flags = {s for a in compress._actions for s in a.option_strings}
    for f in fields(CompressOptions):
        flag = CLI_SPELLING.get(f.name, "--" + f.name.replace("_", "-"))
        assert flag in flags, f"compress option {f.name!r} has no CLI flag {flag}"
        if f.name not in CLI_SPELLING:
            assert f.name in dests
    # and nothing the other way round: every flag is an option, or plumbing of the command line
    plumbing = {"help", "json", "quiet", "database", "source", "archive", "overwrite"}
    option_names = {f.name for f in fields(CompressOptions)}
    assert set(dests) - plumbing <= option_names


def test_one_spelling_of_the_output_option():
    for name in ("rebuild", "query", "view", "report", "demo"):
        flags = {s for a in _subparser(name)._actions for s in a.option_strings}
        assert "--output" in flags and "--out" not in flags, name


# -- Archive.rebuild(bounds=True) and to_pandas ------------------------------------------------------
def test_rebuild_with_bounds_puts_each_bound_beside_its_column(tmp_path):
    table = _table()
    archive = rankfold.compress(table, tmp_path / "a.rankfold", rank=2, key="id")
    out = archive.rebuild(rows=slice(0, 50), columns=["x4", "count"], bounds=True)
    assert out.schema.names == ["id", "site", "x4", "x4_bound", "count", "count_bound"]
    assert out.column("count").type == pa.int64() and out.column("x4_bound").type == pa.float64()
    bounds = archive.cell_bounds(rows=slice(0, 50), columns=["x4", "count"])
    assert np.array_equal(out.column("x4_bound").to_numpy(zero_copy_only=False)[~np.isnan(bounds[:, 0]) & out.column("x4").is_valid().to_numpy(zero_copy_only=False)],
                          bounds[:, 0][out.column("x4").is_valid().to_numpy(zero_copy_only=False)])
    # NULL cells are stored exactly: NULL value, bound 0 (as cell_bounds and rankfold_scan give)
    assert out.column("x4").null_count == 2 and out.column("x4_bound").null_count == 0
    assert np.all(out.column("x4_bound").to_numpy()[out.column("x4").is_null().to_numpy(zero_copy_only=False)] == 0)
    # the bound holds on the value as returned: integers rounded, floats as they are
    for name in ("x4", "count"):
        truth = table.column(name).slice(0, 50).to_numpy(zero_copy_only=False).astype(float)
        got = out.column(name).to_numpy(zero_copy_only=False).astype(float)
        bound = out.column(f"{name}_bound").to_numpy(zero_copy_only=False).astype(float)
        assert _within(truth, got, bound)
    streamed = pa.concat_tables(archive.iter_batches(rows=slice(0, 50), columns=["x4", "count"],
                                                     batch_rows=16, bounds=True))
    assert streamed.equals(out)
    frame = archive.to_pandas(rows=slice(0, 50), columns=["x4", "count"], bounds=True)
    assert list(frame.columns) == out.schema.names and frame["count_bound"].tolist() == out.column("count_bound").to_pylist()


def test_bound_column_names_never_collide(tmp_path):
    table = _table().append_column("x1_bound", pa.array(np.zeros(ROWS)))
    archive = rankfold.compress(table, tmp_path / "c.rankfold", rank=2, key="id",
                                exact_columns=["x1_bound"])
    names = archive.rebuild(rows=[0], bounds=True).schema.names
    assert len(names) == len(set(names)) and "x1_bound_2" in names and names[names.index("x1") + 1] == "x1_bound_2"


# -- the command line --------------------------------------------------------------------------------
def run(capsys, *argv) -> tuple[int, str, str]:
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


@pytest.fixture(scope="module")
def source(tmp_path_factory):
    folder = tmp_path_factory.mktemp("surface")
    table = _table()
    pq.write_table(table, folder / "t.parquet")
    pq.write_table(table.slice(0, 200), folder / "first.parquet")
    pq.write_table(table.slice(200), folder / "rest.parquet")
    return folder, table


def test_cli_compress_default_says_what_was_guaranteed(source, tmp_path, capsys):
    folder, table = source
    code, out, err = run(capsys, "compress", folder / "t.parquet", tmp_path / "d.rankfold", "--key", "id", "--quiet")
    assert code == 0 and err == ""
    assert "guaranteed: every rebuilt value is within 0.05 x its column's standard deviation of the true value (--max-std-error 0.05)" in out
    code, out, _ = run(capsys, "compress", folder / "t.parquet", tmp_path / "r.rankfold", "--rank", 1, "--quiet")
    assert "guaranteed: no tolerance was asked for" in out


def test_cli_per_column_tolerances_as_pairs_or_json(source, tmp_path, capsys):
    folder, table = source
    code, out, _ = run(capsys, "compress", folder / "t.parquet", tmp_path / "p.rankfold", "--key", "id",
                       "--max-abs-error", "x2=0.01", "--max-abs-error", "x5=0.5", "--max-std-error",
                       '{"x7": 0.001}', "--residual", "corrections", "--no-refit-outliers",
                       "--column-method", "pivoted_qr", "--json", "--quiet")
    data = json.loads(out)
    assert code == 0
    assert data["manifest"]["targets"]["max_abs_error"] == {"x2": 0.01, "x5": 0.5}
    assert data["manifest"]["targets"]["max_std_error"] == {"x7": 0.001}
    assert data["manifest"]["method"]["options"]["refit_outliers"] is False
    archive = rankfold.open(tmp_path / "p.rankfold")
    bounds = archive.cell_bounds()
    names = archive.numeric_columns
    assert np.nanmax(bounds[:, names.index("x2")]) <= 0.01
    assert np.nanmax(bounds[:, names.index("x5")]) <= 0.5
    std7 = np.std(table.column("x7").to_numpy())
    assert np.nanmax(bounds[:, names.index("x7")]) <= 0.001 * std7 * (1 + 1e-12)
    code, _, err = run(capsys, "compress", folder / "t.parquet", tmp_path / "m.rankfold", "--max-abs-error",
                       "0.1", "--max-abs-error", "x2=0.01")
    assert code == 1 and "--max-abs-error takes one number for every column, or NAME=NUMBER" in err
    with pytest.raises(SystemExit):
        main(["compress", str(folder / "t.parquet"), str(tmp_path / "e.rankfold"), "--max-abs-error", "mean area=one"])
    assert "--max-abs-error takes a number, NAME=NUMBER" in capsys.readouterr().err


def test_cli_append_then_every_value_within_its_bound(source, tmp_path, capsys):
    folder, table = source
    archive = tmp_path / "g.rankfold"
    assert run(capsys, "compress", folder / "first.parquet", archive, "--key", "id", "--quiet")[0] == 0
    code, out, err = run(capsys, "append", archive, folder / "rest.parquet", "--quiet")
    assert code == 0 and out.startswith(f"appended {ROWS - 200} rows to ") and err == ""
    opened = rankfold.open(archive)
    names = opened.numeric_columns
    assert opened.shape == (ROWS, len(names))
    truth = _truth(table, names)
    bounds = opened.cell_bounds()
    assert _within(truth, opened.to_numpy(), bounds)
    assert np.all(np.nan_to_num(bounds) <= 0.05 * np.nanstd(_truth(table.slice(0, 200), names), axis=0) * (1 + 1e-12))


@pytest.fixture(scope="module")
def small_archive(source, tmp_path_factory):
    folder, table = source
    path = tmp_path_factory.mktemp("arch") / "s.rankfold"
    rankfold.compress(table, path, rank=2, key="id", link="optimal", max_abs_error={"x6": 0.5})
    return path, table


@pytest.mark.parametrize("fmt", ["csv", "json", "parquet"])
def test_cli_rebuild_bounds_in_every_format(small_archive, fmt, tmp_path, capsys):
    path, table = small_archive
    args = ["rebuild", path, "--rows", "0:40", "--columns", "x4,count", "--bounds"]
    if fmt == "json":
        code, out, _ = run(capsys, *args, "--json")
        got = pa.Table.from_pylist(json.loads(out))
    elif fmt == "csv":
        code, out, _ = run(capsys, *args)
        import pyarrow.csv as pacsv
        got = pacsv.read_csv(pa.py_buffer(out.encode()))
    else:
        code, _, _ = run(capsys, *args, "--output", tmp_path / "b.parquet")
        got = pq.read_table(tmp_path / "b.parquet")
    assert code == 0 and got.schema.names == ["id", "site", "x4", "x4_bound", "count", "count_bound"]
    expect = rankfold.open(path).rebuild(rows=slice(0, 40), columns=["x4", "count"], bounds=True)
    for name in ("x4", "x4_bound", "count", "count_bound"):
        a, b = got.column(name).to_pylist(), expect.column(name).to_pylist()
        assert [x is None for x in a] == [x is None for x in b]
        assert [x for x in a if x is not None] == pytest.approx([x for x in b if x is not None], rel=1e-15)


def test_view_sql_runs_on_duckdb_without_rankfold(small_archive):
    path, table = small_archive
    archive = rankfold.open(path)
    con = duckdb.connect()  # bare: no rankfold function registered
    assert con.execute("SELECT count(*) FROM duckdb_functions() WHERE function_name LIKE 'rankfold%'").fetchone()[0] == 0
    con.execute(view_sql(archive, "cells", bounds="cell"))
    con.execute(view_sql(archive, 'rows "view"'))
    cells = con.sql('SELECT * FROM cells ORDER BY _rf_row').to_arrow_table()
    rows = con.sql('SELECT * FROM "rows ""view""" ORDER BY _rf_row').to_arrow_table()
    expect = archive.rebuild(bounds=True)
    names = archive.numeric_columns
    truth = _truth(table, names)
    row_bound = rows.column("_rf_bound").to_numpy()
    for j, name in enumerate(names):
        value = cells.column(name).to_numpy(zero_copy_only=False).astype(float)
        bound = cells.column(f"{name}_bound").to_numpy(zero_copy_only=False).astype(float)
        ref = archive.to_numpy(columns=[name])[:, 0]
        ref_bound = expect.column(f"{name}_bound").to_numpy(zero_copy_only=False).astype(float)
        finite = np.isfinite(ref)
        assert np.allclose(value[finite], ref[finite], rtol=1e-12, atol=1e-12 * np.nanmax(np.abs(ref)))
        # measured: values within 2.3e-13 (of the column's reach: 1e-12 allowed), bounds within
        # 1.8e-15 relative (the view's factor 1 + 16u; allowed 1e-13, was 1e-9)
        assert np.allclose(bound[finite], ref_bound[finite], rtol=1e-13, atol=0) or name == "count"
        # the guarantee itself, outside rankfold: |true - view value| <= view bound
        assert _within(truth[:, j], value, bound) and _within(truth[:, j], value, row_bound)
    assert rows.column("id").to_pylist() == table.column("id").to_pylist()


def test_cli_view_prints_sql_for_a_bare_connection(small_archive, tmp_path, capsys):
    path, table = small_archive
    code, out, _ = run(capsys, "view", path, "--name", "readings")
    assert code == 0 and "CREATE OR REPLACE VIEW \"readings\" AS" in out and "*" not in out.split("read_parquet(")[1].split(")")[0]
    con = duckdb.connect()
    con.execute(out)
    got = con.sql("SELECT x3, _rf_bound FROM readings ORDER BY _rf_row").fetchnumpy()
    truth = table.column("x3").to_numpy()
    assert np.all(np.abs(got["x3"] - truth) <= got["_rf_bound"])
    code, _, _ = run(capsys, "view", path, "--output", tmp_path / "v.sql")
    assert code == 0 and (tmp_path / "v.sql").read_text().startswith("-- rankfold archive")
    code, _, err = run(capsys, "view", path, "--output", tmp_path / "v.sql")
    assert code == 1 and "pass --overwrite to replace it" in err


# -- query layout and precision -------------------------------------------------------------------------
def test_query_wide_results_print_one_row_per_block():
    table = pa.table({f"column_with_a_long_name_{j}": [float(j), j + 0.5] for j in range(8)})
    text = render_table(table, width=80)
    lines = text.splitlines()
    assert lines[0] == "row 1" and "row 2" in lines and lines[-1] == "2 rows"
    assert max(len(line) for line in lines) <= 80
    narrow = render_table(pa.table({"a": [1, 22], "b": ["x", "y"]}), width=80)
    assert narrow == " a  b\n 1  x\n22  y\n2 rows"


@settings(max_examples=200, deadline=None)
@given(value=st.floats(-1e9, 1e9), bound=st.floats(1e-9, 1e7))
def test_printed_bound_covers_the_printed_value(value, bound):
    text = format_value(value, bound)
    printed = float(format_bound(bound, _display_step(bound)))
    # the true value is within bound of value; the printed value is within the display step
    assert abs(float(text) - value) <= _display_step(bound) * (1 + 1e-9) + 1e-9 * abs(value)
    assert printed >= bound + abs(float(text) - value) - 1e-9 * abs(value)
    # and tight: bound plus display step, rounded up to two significant figures, is at most one
    # unit of the second figure above it (10%; arithmetic of rounding up, common practice)
    assert printed <= (bound + _display_step(bound)) * 1.1 * (1 + 1e-12)
    # no more digits than the bound makes meaningful: the last digit is at most bound / 2
    decimals = len(text.split(".")[1]) if "." in text else 0
    assert 10.0 ** (-decimals) <= bound or math.isclose(10.0 ** (-decimals), bound, rel_tol=1e-9)
    assert decimals == 0 or 10.0 ** (-decimals) > bound / 100  # and not more digits
    assert format_with_bound(value, bound) == (text, format_bound(bound, _display_step(bound)))


def test_cli_query_prints_values_to_the_precision_of_their_bound(small_archive, capsys):
    path, table = small_archive
    archive = rankfold.open(path)
    name = next(n for n in archive.numeric_columns if n not in archive.basis_columns and n != "count")
    sql = (f"SELECT id, {name}, rankfold_cell_bound(getvariable('archive_path'), _rf_row, '{name}') "
           f"AS {name}_bound FROM archive ORDER BY id LIMIT 5")
    code, out, _ = run(capsys, "query", path, sql)
    lines = out.splitlines()
    assert code == 0 and lines[0].split() == ["id", name, f"{name}_bound"] and lines[-1] == "5 rows"
    truth = table.column(name).to_numpy(zero_copy_only=False)
    for line in lines[1:-1]:
        ident, value, bound = line.split()
        if float(bound) == 0:  # stored exactly: every digit
            assert float(value) == truth[int(ident)]
        else:
            assert len(value.lstrip("-").split(".")[-1]) <= 3 - math.floor(math.log10(float(bound)))
        assert abs(truth[int(ident)] - float(value)) <= float(bound)


# -- messages in the CLI's words ----------------------------------------------------------------------
def test_library_messages_are_rewritten_in_cli_spelling(small_archive, source, tmp_path, capsys):
    path, _ = small_archive
    folder, _ = source
    code, _, err = run(capsys, "compress", folder / "t.parquet", path)
    assert code == 1 and "--overwrite" in err and "overwrite=True" not in err
    code, _, err = run(capsys, "compress", folder / "t.parquet", tmp_path / "b.rankfold", "--rank", 3,
                       "--basis-precision", "tolerance")
    assert code == 1 and "--basis-precision tolerance needs --max-abs-error or --max-std-error" in err
    assert cli_spelling("executor='dask' needs dask.distributed. Install it with pip install "
                        "'rankfold[dask]', or use executor='local'.") == (
        '--executor dask needs dask.distributed. Install it with python -m pip install '
        '"dask[distributed]", or use --executor local.')
    assert cli_spelling("refit_outliers=False") == "--no-refit-outliers"
    assert cli_spelling("The source has no column 'key'.") == "The source has no column 'key'."


def test_the_report_names_the_selection_methods_new_and_old(small_archive):
    from rankfold.report import _option, report_data

    path, _ = small_archive
    data = report_data(path, sample_rows=8)
    assert data["selection"]["selection"] == "pivoted_qr"
    # an archive written before the rename recorded the old option names
    assert _option({"columns": "leverage", "rows": "qdeim"}, "column_method") == "leverage"
    assert _option({"columns": "leverage", "rows": "qdeim"}, "row_method") == "qdeim"
