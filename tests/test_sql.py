"""The DuckDB SQL functions (rankfold.udfs.register) against numpy ground truth.

Every answer is checked against the invented source table: a rebuilt value must be within its
reported bound of the true value (and NULL exactly where the source was NULL), and bounds must
not be uselessly loose. Each function is tried on one value, NULL input, more than three
vectors of rows, a column mixing NULLs and values, and each error path.
"""

from __future__ import annotations

import json
import logging
import math
from pathlib import Path

import duckdb
import numpy as np
import pyarrow as pa
import pytest

import rankfold
import rankfold.udfs
from rankfold.udfs.sql import FUNCTIONS, register

EXAMPLES = Path(__file__).resolve().parent.parent / "sql_examples"
ROWS, COLS, RANK = 5000, 30, 6
NAMES = [f"c{j:02d}" for j in range(COLS)]
NULL_COLUMN, NAN_COLUMN = 16, 19
NAN_ROWS = (10, 500, 4321)
MANY = 7000  # > 3 DuckDB vectors of 2048 rows


# -- invented data -----------------------------------------------------------------------------
def _make_data():
    """Rank-6 table plus 1e-3 relative noise, columns in different units, seed 0; c16 has
    NULLs (every 37th row), c19 has three NaNs."""
    rng = np.random.default_rng(0)
    scales = np.geomspace(1.0, 300.0, COLS)
    x = rng.standard_normal((ROWS, RANK)) @ rng.standard_normal((RANK, COLS))
    x = (x + 1e-3 * rng.standard_normal((ROWS, COLS))) * scales + 10.0 * rng.standard_normal(COLS)
    nulls = np.zeros((ROWS, COLS), bool)
    nulls[::37, NULL_COLUMN] = True
    x[list(NAN_ROWS), NAN_COLUMN] = np.nan
    return x, nulls


X, NULLS = _make_data()
STD = np.nanstd(np.where(NULLS, np.nan, X), axis=0)


def _table() -> pa.Table:
    columns = {"id": pa.array(np.arange(ROWS, dtype=np.int64))}
    for j, name in enumerate(NAMES):
        columns[name] = pa.array(X[:, j], pa.float64(), mask=NULLS[:, j], from_pandas=False)
    return pa.table(columns)


@pytest.fixture(scope="module")
def archive(tmp_path_factory) -> str:
    path = tmp_path_factory.mktemp("sql") / "panel.rankfold"
    rankfold.compress(_table(), path, rank=8, key="id")
    return str(path)


SQL_TABLE = (_table, "panel")  # the conftest fixtures `database` and `con` hold it


# -- checking answers --------------------------------------------------------------------------
def check_cells(rows, cols, values, bounds) -> int:
    """|true - value| <= bound for every cell; NULL exactly where the source is NULL; NaN where
    it is NaN; bounds finite, >= 0 and below 0.5% of the column's spread (measured: at most
    0.35%, on the rank-8 archive of this rank-6 table with 1e-3 noise). Returns cells checked."""
    assert len(rows) == len(cols) == len(values) == len(bounds) > 0
    for r, c, v, b in zip(rows, cols, values, bounds):
        j = NAMES.index(c)
        assert b is not None and math.isfinite(b) and 0.0 <= b <= 0.005 * STD[j], (r, c, b)
        if NULLS[r, j]:
            assert v is None, (r, c, v)
            assert b == 0.0
        elif math.isnan(X[r, j]):
            assert v is not None and math.isnan(v), (r, c, v)  # NaN stays NaN, not NULL
        else:
            assert v is not None and abs(X[r, j] - v) <= b, (r, c, v, X[r, j], b)
    return len(rows)


def fetch(con, sql: str) -> dict[str, list]:
    result = con.execute(sql)
    names = [d[0] for d in result.description]
    rows = result.fetchall()
    return {name: [r[k] for r in rows] for k, name in enumerate(names)}


def lit(text) -> str:
    """A SQL string literal."""
    return "'" + str(text).replace("'", "''") + "'"


def cell_sql(path: str, kind: str, row: str, col: str) -> str:
    """SELECT items 'value' and 'bound' for SQL expressions path, row, col, through either
    rankfold_cell + rankfold_cell_bound or rankfold_cell_with_bound."""
    if kind == "cell":
        return (f"rankfold_cell({path}, {row}, {col}) AS value, "
                f"rankfold_cell_bound({path}, {row}, {col}) AS bound")
    return (f"rankfold_cell_with_bound({path}, {row}, {col}).value AS value, "
            f"rankfold_cell_with_bound({path}, {row}, {col}).bound AS bound")


CELL_KINDS = ["cell", "cell_with_bound"]


# -- the example files -------------------------------------------------------------------------
def _fill(text: str, archive: str, workdir: Path) -> str:
    return text.replace("{archive}", archive).replace("{workdir}", str(workdir))


def _statements(text: str) -> list[str]:
    body = "\n".join(line for line in text.splitlines() if not line.lstrip().startswith("--"))
    return [s.strip() for s in body.split(";") if s.strip()]


def _check_compress(result, workdir, con):
    assert result["rows"] == [ROWS] and result["columns"] == [COLS] and result["rank"] == [8]
    assert result["anchor_rows"][0] == 0  # the default cx link keeps no anchor rows
    assert 8 <= len(result["basis_columns"][0]) <= COLS
    assert 0 < result["largest_error"][0] < 0.0025 * STD.max()  # measured 0.0018
    written = rankfold.open(result["path"][0])
    rows = list(range(0, ROWS, 111))
    values, bounds = written.to_numpy(rows=rows, columns=NAMES), written.cell_bounds(rows=rows, columns=NAMES)
    for t, r in enumerate(rows):
        for j, c in enumerate(NAMES):
            v = None if NULLS[r, j] else float(values[t, j])
            check_cells([r], [c], [v], [float(bounds[t, j])])


def _check_compress_query(result, workdir, con):
    subset = ["c00", "c01", "c02", "c03", "c05", "c06", "c07", "c08", "c10", "c11", "c12", "c13"]
    assert result["rows"] == [3000] and result["columns"] == [12] and result["rank"] == [4]
    assert result["numeric_columns"] == [subset] and result["method"] == ["cur"]
    out = fetch(con, f"SELECT i AS row, 'c07' AS col, {cell_sql(lit(workdir / 'panel_subset'), 'cell', 'i', lit('c07'))} "
                     "FROM range(0, 3000, 7) t(i)")
    check_cells(out["row"], out["col"], out["value"], out["bound"])


def _check_info(result, workdir, con):
    assert result["rows"] == [ROWS] and result["columns"] == [COLS]
    assert result["method"] == ["cur"] and result["rank"] == [8]


def _check_cells_result(result, workdir, con):
    assert check_cells(result["row"], result["col"], result["value"], result["bound"]) >= 10


def _check_row(result, workdir, con):
    assert result["col"] == NAMES  # every numeric column, in archive order
    _check_cells_result(result, workdir, con)


def _check_verify(result, workdir, con):
    finite = int(np.sum(~NULLS[:, 7] & ~np.isnan(X[:, 7])))
    assert result["checked"] == [finite] and result["violations"] == [0]
    assert 0 < result["largest_bound"][0] < 0.003 * STD[7]  # measured 0.0023


OWN_CHECKERS = {
    "compress.sql": _check_compress,
    "compress_query.sql": _check_compress_query,
    "info.sql": _check_info,
    "cell_and_bound.sql": _check_cells_result,
    "cell_with_bound.sql": _check_cells_result,
    "row.sql": _check_row,
    "row_columns.sql": _check_cells_result,
    "verify_against_source.sql": _check_verify,
}


def test_every_scalar_example_has_a_checker(sql_examples):
    # the table functions' examples run in tests/test_sql_tables.py, on an archive with a group key
    assert sorted(OWN_CHECKERS) == sql_examples["scalar"]
    for path in EXAMPLES.glob("*.sql"):
        assert path.read_text().startswith("--"), f"{path.name} needs a header comment"


@pytest.mark.parametrize("name", sorted(OWN_CHECKERS))
def test_example(name, con, archive, tmp_path):
    statements = _statements(_fill((EXAMPLES / name).read_text(), archive, tmp_path))
    for sql in statements[:-1]:
        con.execute(sql).fetchall()
    result = fetch(con, statements[-1])
    assert len(next(iter(result.values()))) >= 1
    OWN_CHECKERS[name](result, tmp_path, con)


# -- register ----------------------------------------------------------------------------------
def test_register_returns_the_documented_names_and_twice_is_fine(con, archive):
    names = rankfold.udfs.register(con)
    assert names == [f"rankfold_{verb}" for verb in FUNCTIONS]
    assert rankfold.udfs.register(con) == names
    out = fetch(con, f"SELECT 3 AS row, 'c00' AS col, {cell_sql(lit(archive), 'cell', '3', lit('c00'))}")
    check_cells(out["row"], out["col"], out["value"], out["bound"])


def test_register_on_a_cursor_of_a_registered_connection(con, archive):
    cursor = con.cursor()
    rankfold.udfs.register(cursor)
    out = fetch(cursor, f"SELECT 17 AS row, 'c21' AS col, {cell_sql(lit(archive), 'cell', '17', lit('c21'))}")
    check_cells(out["row"], out["col"], out["value"], out["bound"])
    cursor.close()


def test_custom_prefix(archive):
    connection = duckdb.connect()
    rankfold.udfs.register(connection, prefix="rf")
    value, bound = connection.execute(
        f"SELECT rf_cell('{archive}', 8, 'c12'), rf_cell_bound('{archive}', 8, 'c12')").fetchone()
    check_cells([8], ["c12"], [value], [bound])
    with pytest.raises(duckdb.CatalogException):
        connection.execute(f"SELECT rankfold_cell('{archive}', 8, 'c12')")
    connection.close()


def test_bad_prefix():
    with pytest.raises(rankfold.InvalidInputError, match="'prefix' parameter of register"):
        rankfold.udfs.register(duckdb.connect(), prefix="bad prefix;")


# -- cell functions ----------------------------------------------------------------------------
@pytest.mark.parametrize("kind", CELL_KINDS)
def test_cell_one_value(con, archive, kind):
    out = fetch(con, f"SELECT {cell_sql(lit(archive), kind, '1234', lit('c17'))}")
    check_cells([1234], ["c17"], out["value"], out["bound"])
    assert out["bound"][0] > 0  # c17 is not a basis column of this archive ...
    assert "c17" not in rankfold.open(archive).basis_columns


@pytest.mark.parametrize("kind", CELL_KINDS)
@pytest.mark.parametrize("args", [("NULL", "5", "'c01'"), ("'{a}'", "NULL", "'c01'"), ("'{a}'", "5", "NULL")])
def test_cell_null_input_gives_null(con, archive, kind, args):
    path, row, col = (a.replace("{a}", archive) for a in args)
    for fn in ("cell", "cell_bound", "cell_with_bound"):
        assert con.execute(f"SELECT rankfold_{fn}({path}, {row}, {col})").fetchone() == (None,)


@pytest.mark.parametrize("kind", CELL_KINDS)
def test_cell_many_vectors(con, archive, kind):
    con.register("req", pa.table({"i": np.arange(MANY) % ROWS,
                                  "c": [NAMES[(3 * k) % COLS] for k in range(MANY)]}))
    out = fetch(con, f"SELECT i AS row, c AS col, {cell_sql(lit(archive), kind, 'i', 'c')} FROM req")
    assert check_cells(out["row"], out["col"], out["value"], out["bound"]) == MANY


@pytest.mark.parametrize("kind", CELL_KINDS)
def test_cell_column_with_nulls_nans_and_values(con, archive, kind):
    for j in (NULL_COLUMN, NAN_COLUMN):
        out = fetch(con, f"SELECT i AS row, '{NAMES[j]}' AS col, "
                         f"{cell_sql(lit(archive), kind, 'i', lit(NAMES[j]))} FROM range({ROWS}) t(i)")
        check_cells(out["row"], out["col"], out["value"], out["bound"])
        got_null = np.array([v is None for v in out["value"]])
        assert np.array_equal(got_null, NULLS[:, j]) and got_null.any() == (j == NULL_COLUMN)


def test_cell_mixed_nulls_in_inputs(con, archive):
    con.register("req", pa.table({"i": pa.array([1, None, 3, 4, None], pa.int64()),
                                  "c": pa.array(["c02", "c02", None, "c05", "c06"])}))
    out = fetch(con, f"SELECT i, c, {cell_sql(lit(archive), 'cell', 'i', 'c')}, "
                     f"rankfold_cell_with_bound('{archive}', i, c) AS both FROM req")
    assert out["value"][1:3] == [None, None] and out["bound"][1:3] == [None, None]
    assert out["both"][1:3] == [None, None] and out["value"][4] is None
    check_cells([1, 4], ["c02", "c05"], [out["value"][0], out["value"][3]], [out["bound"][0], out["bound"][3]])
    assert out["both"][0] == {"value": out["value"][0], "bound": out["bound"][0]}


def test_cells_of_two_archives_in_one_vector(con, archive, tmp_path):
    other = tmp_path / "other.rankfold"
    rankfold.compress(_table(), other, rank=3, key="id")
    con.register("req", pa.table({"p": [archive, str(other)] * 3000, "i": np.arange(6000) % ROWS}))
    out = fetch(con, f"SELECT p, i AS row, 'c20' AS col, {cell_sql('p', 'cell', 'i', lit('c20'))} FROM req")
    check_cells(out["row"], out["col"], out["value"], out["bound"])
    rank3 = [b for p, b in zip(out["p"], out["bound"]) if p == str(other)]
    rank8 = [b for p, b in zip(out["p"], out["bound"]) if p == archive]
    assert max(rank3) > max(rank8)  # each path got its own archive's bounds


def test_cell_keeps_nan_and_integer_row_types(con, archive):
    row = NAN_ROWS[1]
    for cast in ("SMALLINT", "INTEGER", "UBIGINT", "HUGEINT"):
        value, bound = con.execute(f"SELECT rankfold_cell('{archive}', CAST({row} AS {cast}), '{NAMES[NAN_COLUMN]}'), "
                                   f"rankfold_cell_bound('{archive}', {row}::{cast}, '{NAMES[NAN_COLUMN]}')").fetchone()
        assert math.isnan(value) and bound == 0.0


CELL_ERRORS = [
    ("'{a}', 3, 'nope'", "UnknownColumnError: rankfold_{fn}\\(\\): The archive .* has no numeric column 'nope'"),
    ("'{a}', 5000, 'c01'", "RowOutOfRangeError: rankfold_{fn}\\(\\): Row position 5000 is out of range .* 5000 rows"),
    ("'{a}', -5001, 'c01'", "RowOutOfRangeError: .*out of range"),
    ("'{a}/missing', 3, 'c01'", "ArchiveNotFoundError: rankfold_{fn}\\(\\): No archive at .*missing"),
    ("'{d}', 3, 'c01'", "CorruptArchiveError: rankfold_{fn}\\(\\): .*has no manifest.json"),
    ("'{a}', 2.5, 'c01'", "InvalidInputError: rankfold_{fn}\\(\\): the argument 'row' must be an integer .*DECIMAL"),
    ("'{a}', 2::DOUBLE, 'c01'", "the argument 'row' must be an integer .*got a value of type DOUBLE"),
    ("'{a}', '2', 'c01'", "the argument 'row' must be an integer .*type VARCHAR"),
    ("'{a}', 3, 7", "the argument 'col' must be a VARCHAR; got a value of type INTEGER"),
    ("42, 3, 'c01'", "the argument 'path' must be a VARCHAR; got a value of type INTEGER"),
]


@pytest.mark.parametrize("fn", ["cell", "cell_bound", "cell_with_bound"])
@pytest.mark.parametrize("args,message", CELL_ERRORS)
def test_cell_errors(con, archive, tmp_path, fn, args, message):
    sql = f"SELECT rankfold_{fn}({args.replace('{a}', archive).replace('{d}', str(tmp_path))})"
    with pytest.raises(duckdb.InvalidInputException, match=message.replace("{fn}", fn)):
        con.execute(sql).fetchall()


def test_cell_error_in_a_later_vector(con, archive):
    con.register("req", pa.table({"i": np.r_[np.arange(MANY - 1) % ROWS, ROWS + 7]}))
    with pytest.raises(duckdb.InvalidInputException, match=f"Row position {ROWS + 7} is out of range"):
        con.execute(f"SELECT sum(rankfold_cell('{archive}', i, 'c00')) FROM req").fetchall()


# -- row function ------------------------------------------------------------------------------
def _unnest_rows(con, archive, rows_sql: str, cols: str = "") -> dict[str, list]:
    extra = f", cols := {cols}" if cols else ""
    return fetch(con, f"SELECT i AS row, e.column AS col, e.value AS value, e.bound AS bound FROM "
                      f"(SELECT i, unnest(rankfold_row('{archive}', i{extra})) AS e FROM ({rows_sql}))")


def test_row_one_value(con, archive):
    out = _unnest_rows(con, archive, "SELECT 37 AS i")  # row 37: c16 is NULL there
    assert out["col"] == NAMES
    check_cells(out["row"], out["col"], out["value"], out["bound"])
    assert out["value"][NULL_COLUMN] is None and out["bound"][NULL_COLUMN] == 0.0


def test_row_null_input(con, archive):
    assert con.execute(f"SELECT rankfold_row(NULL, 3), rankfold_row('{archive}', NULL), "
                       f"rankfold_row('{archive}', 3, cols := NULL::VARCHAR[])").fetchone() == (None, None, None)


def test_row_many_vectors_with_nulls_and_nans(con, archive):
    out = _unnest_rows(con, archive, f"SELECT i % {ROWS} AS i FROM range({MANY}) t(i)")
    assert len(out["row"]) == MANY * COLS
    check_cells(out["row"], out["col"], out["value"], out["bound"])
    assert sum(v is None for v in out["value"]) == sum(NULLS[r, NULL_COLUMN] for r in np.arange(MANY) % ROWS)


def test_row_chosen_columns(con, archive):
    out = _unnest_rows(con, archive, "SELECT unnest([0, 10, 37, 4999]) AS i", "['c29', 'c16', 'c29']")
    assert out["col"] == ["c29", "c16"] * 4  # asked order, duplicates once
    check_cells(out["row"], out["col"], out["value"], out["bound"])
    one = _unnest_rows(con, archive, "SELECT 500 AS i", "'c19'")
    assert one["col"] == ["c19"] and math.isnan(one["value"][0])


def test_row_column_lists_differ_per_row(con, archive):
    con.register("req", pa.table({"i": [1, 2, 3, 3], "cs": [["c01"], ["c02", "c03"], None, ["c28"]]}))
    out = fetch(con, f"SELECT i AS row, e.column AS col, e.value AS value, e.bound AS bound FROM "
                     f"(SELECT i, unnest(rankfold_row('{archive}', i, cols := cs)) AS e FROM req)")
    assert list(zip(out["row"], out["col"])) == [(1, "c01"), (2, "c02"), (2, "c03"), (3, "c28")]
    check_cells(out["row"], out["col"], out["value"], out["bound"])


@pytest.mark.parametrize("args,message", [
    ("'{a}', 5000", "RowOutOfRangeError: rankfold_row\\(\\): Row position 5000 is out of range"),
    ("'{a}/missing', 1", "ArchiveNotFoundError: rankfold_row\\(\\): No archive at"),
    ("'{a}', 1, cols := ['c01', 'zz']", "UnknownColumnError: rankfold_row\\(\\): .*no numeric column 'zz'"),
    ("'{a}', 1, cols := ['c01', NULL]", "InvalidInputError: rankfold_row\\(\\): the column list .* holds a NULL"),
    ("'{a}', 1.5", "the argument 'row' must be an integer"),
    ("'{a}', 1, cols := [1, 2]", "the argument 'cols' must be a VARCHAR or a VARCHAR\\[\\].*INTEGER\\[\\]"),
])
def test_row_errors(con, archive, args, message):
    with pytest.raises(duckdb.InvalidInputException, match=message):
        con.execute(f"SELECT rankfold_row({args.replace('{a}', archive)})").fetchall()


# -- info --------------------------------------------------------------------------------------
def test_info(con, archive):
    info = con.execute(f"SELECT rankfold_info('{archive}')").fetchone()[0]
    opened = rankfold.open(archive)
    assert info["archive_id"] == opened.manifest["archive_id"] and info["rows"] == ROWS
    assert info["basis_columns"] == opened.basis_columns and info["numeric_columns"] == NAMES
    assert info["anchor_rows"] == len(opened.anchor_rows)
    assert con.execute("SELECT rankfold_info(NULL)").fetchone() == (None,)
    with pytest.raises(duckdb.InvalidInputException, match="rankfold_info\\(\\): No archive at"):
        con.execute(f"SELECT rankfold_info('{archive}-not-there')").fetchall()


# -- compress ----------------------------------------------------------------------------------
def test_compress_table_then_rebuild(con, tmp_path):
    info = con.execute(f"SELECT rankfold_compress('panel', '{tmp_path}/a', rank := 8)").fetchone()[0]
    assert (info["rows"], info["columns"], info["rank"]) == (ROWS, COLS + 1, 8)  # id is numeric here
    out = fetch(con, f"SELECT i AS row, 'c13' AS col, {cell_sql(lit(tmp_path / 'a'), 'cell', 'i', lit('c13'))} "
                     "FROM range(0, 5000, 3) t(i)")
    check_cells(out["row"], out["col"], out["value"], out["bound"])


def test_compress_default_rank_and_struct_options(con, tmp_path):
    info = con.execute(f"SELECT rankfold_compress('SELECT * FROM panel', '{tmp_path}/b', "
                       "options := {'key': 'id', 'exact_columns': ['c00']})").fetchone()[0]
    assert info["columns"] == COLS - 1
    archive = rankfold.open(info["path"])
    manifest = archive.manifest
    assert manifest["key"] == "id" and manifest["method"]["options"]["exact_columns"] == ["c00"]
    # the default is a tolerance: every bound within 0.05 standard deviations (numpy.std, ddof 0)
    cols = [int(n[1:]) for n in archive.numeric_columns]
    truth = np.where(NULLS, np.nan, X)[:, cols]
    assert manifest["targets"]["max_std_error"] == 0.05
    bounds = archive.cell_bounds()
    assert np.all(bounds <= 0.05 * STD[cols] * (1 + 1e-12))  # STD: numpy.nanstd of the source
    finite = np.isfinite(truth)
    assert np.all(np.abs(archive.to_numpy() - truth)[finite] <= bounds[finite])


def test_compress_null_source_or_path_gives_null(con, tmp_path):
    assert con.execute(f"SELECT rankfold_compress(NULL, '{tmp_path}/n')").fetchone() == (None,)
    assert con.execute("SELECT rankfold_compress('panel', NULL)").fetchone() == (None,)
    assert not (tmp_path / "n").exists()


def test_compress_overwrite_refreshes_cached_readers(con, tmp_path):
    path = tmp_path / "c"
    row_sql = f"SELECT rankfold_row('{path}', 11)"
    first = con.execute(f"SELECT rankfold_compress('panel', '{path}', rank := 2, options := {{'key': 'id'}})").fetchone()[0]
    before = con.execute(row_sql).fetchone()[0]
    second = con.execute(f"SELECT rankfold_compress('panel', '{path}', rank := 8, overwrite := true, "
                         f"options := {{'key': 'id'}})").fetchone()[0]
    assert second["archive_id"] != first["archive_id"] and second["rank"] == 8
    after = con.execute(row_sql).fetchone()[0]
    reopened = rankfold.open(path)
    assert [e["value"] for e in after] == reopened.to_numpy(rows=[11])[0].tolist()
    assert [e["bound"] for e in after] == reopened.cell_bounds(rows=[11])[0].tolist()
    assert max(e["bound"] for e in after) < max(e["bound"] for e in before)
    check_cells([11] * COLS, [e["column"] for e in after], [e["value"] for e in after],
                [e["bound"] for e in after])


@pytest.mark.parametrize("call,error,message", [
    ("'no_such_table', '{d}/x'", "InvalidInputError",
     "rankfold_compress\\(\\): DuckDB cannot read the source 'no_such_table'.*COMMIT"),
    ("'panel', '{d}/x', rank := 40", "RankTooLargeError", "The 'rank' option of compress must be at most"),
    ("'panel', '{d}/x', rank := 0", "InvalidInputError", "The 'rank' option of compress must be a positive integer"),
    ("'panel', '{d}/x', rank := 2.0", "InvalidInputError", "the argument 'rank' must be an integer; got a value of type DECIMAL"),
    ("'panel', '{d}/x', overwrite := 1", "InvalidInputError", "the argument 'overwrite' must be a BOOLEAN"),
    ("'panel', '{d}/x', options := 'rank=3'", "InvalidInputError", "options must be a JSON object .* not valid JSON"),
    ("'panel', '{d}/x', options := '[1]'", "InvalidInputError", "options must be a JSON object"),
    ("'panel', '{d}/x', options := {'rank': 3}", "InvalidInputError", "\\['rank'\\] cannot be given in options; pass them as named"),
    ("'panel', '{d}/x', options := {'n_column': 3}", "UnknownOptionError", "compress has no option 'n_column'. Did you mean 'n_columns'"),
    ("'panel', '{d}/x', options := 7", "InvalidInputError", "the argument 'options' must be JSON text or a STRUCT"),
    ("'SELECT * FROM panel WHERE id < 0', '{d}/x'", "EmptySourceError", "has no rows"),
    ("'panel', '{d}/exists'", "ArchiveExistsError", "already exists.*overwrite := true"),
])
def test_compress_errors(con, tmp_path, call, error, message):
    (tmp_path / "exists").mkdir()
    with pytest.raises(duckdb.InvalidInputException, match=f"(?s){error}: .*{message}"):
        con.execute(f"SELECT rankfold_compress({call.replace('{d}', str(tmp_path))})").fetchall()
    assert not (tmp_path / "x").exists()


def test_compress_sees_committed_data_only(con, tmp_path):
    con.execute("BEGIN")
    con.execute("CREATE TABLE fresh AS SELECT * FROM panel")
    with pytest.raises(duckdb.InvalidInputException, match="(?s)cannot read the source .fresh..*COMMIT"):
        con.execute(f"SELECT rankfold_compress('fresh', '{tmp_path}/f')").fetchall()
    con.execute("ROLLBACK")


# -- rebuild log -------------------------------------------------------------------------------
def test_one_log_record_per_request_and_path(archive, tmp_path, caplog):
    log = tmp_path / "rebuilds.jsonl"
    connection = duckdb.connect()
    register(connection, log_path=str(log))  # the engine-level register takes log_path
    caplog.set_level(logging.INFO, logger="rankfold.rebuild")
    connection.execute(f"SELECT rankfold_cell('{archive}', 12, 'c03')").fetchall()
    connection.execute(f"SELECT rankfold_row('{archive}', 37)").fetchall()
    connection.execute(f"SELECT count(rankfold_cell_bound('{archive}', i % {ROWS}, 'c07')) "
                       f"FROM range({MANY}) t(i)").fetchall()
    records = [json.loads(line) for line in log.read_text().splitlines()]
    assert len(records) == len([r for r in caplog.records if r.name == "rankfold.rebuild"])
    cell, row, *scan = records
    archive_id = rankfold.open(archive).manifest["archive_id"]
    assert {r["archive_id"] for r in records} == {archive_id}
    assert cell["request"] == "sql:rankfold_cell" and cell["rows"] == [12] and cell["columns"] == ["c03"]
    assert cell["cells_rebuilt"] + cell["cells_exact"] == 1
    assert row["request"] == "sql:rankfold_row" and row["columns"] is None
    assert row["cells_rebuilt"] + row["cells_exact"] == COLS
    assert len(scan) == math.ceil(MANY / 2048)  # one per vector of rows
    assert sum(r["cells_rebuilt"] + r["cells_exact"] for r in scan) == MANY
    assert all(r["request"] == "sql:rankfold_cell_bound" and r["largest_bound"] > 0 for r in scan)
    connection.close()


# -- reading rows from many row groups and files -----------------------------------------------
def test_row_groups_and_parts_match_the_stock_reader(con, tmp_path, monkeypatch):
    from rankfold.udfs.passes import commit
    from rankfold.udfs.sql.readers import _GroupCache, _ScanReader  # private: the cache has no public handle
    from rankfold.udfs.store.reader import ArchiveReader

    # 700-row batches give 700-row groups; a new rows file after each 1,500 rows
    monkeypatch.setattr(commit.ArchiveWriter.__init__, "__defaults__", (1500,))
    path = tmp_path / "groups.rankfold"
    rankfold.compress(_table(), path, rank=8, key="id", batch_rows=700)
    stock, cached = ArchiveReader(path), _ScanReader(path, _GroupCache(budget=200_000))
    assert len(stock.parts) >= 3 and all(len(p[3]) > 2 for p in stock.parts)
    positions = np.random.default_rng(1).integers(0, ROWS, 3000)  # unsorted, repeated
    for columns in (None, ["id", "c19"]):
        a, b = cached.read_rows(positions, columns), stock.read_rows(positions, columns)
        assert a.column_names == b.column_names and a.num_rows == positions.size
        for name in a.column_names:  # Table.equals would call NaN != NaN
            x, y = a.column(name), b.column(name)
            assert x.is_null().equals(y.is_null())
            assert np.array_equal(x.fill_null(0).to_numpy(), y.fill_null(0).to_numpy(), equal_nan=True)
    a, b = cached.rebuild(positions=positions), stock.rebuild(positions=positions)
    assert np.array_equal(a.values, b.values, equal_nan=True) and np.array_equal(a.bounds, b.bounds)
    con.register("req", pa.table({"i": positions, "c": [NAMES[k % COLS] for k in range(positions.size)]}))
    out = fetch(con, f"SELECT i AS row, c AS col, {cell_sql(lit(path), 'cell', 'i', 'c')} FROM req")
    assert check_cells(out["row"], out["col"], out["value"], out["bound"]) == positions.size


def test_negative_rows_count_from_the_end_like_the_client(con, archive):
    value, bound = con.execute(f"SELECT rankfold_cell('{archive}', -1, 'c02'), "
                               f"rankfold_cell_bound('{archive}', -1, 'c02')").fetchone()
    check_cells([ROWS - 1], ["c02"], [value], [bound])


def test_compress_a_parquet_file(con, tmp_path):
    con.execute(f"COPY panel TO '{tmp_path}/panel.parquet' (FORMAT parquet)")
    info = con.execute(f"SELECT rankfold_compress('{tmp_path}/panel.parquet', '{tmp_path}/pq', rank := 8, "
                       "options := {'key': 'id'})").fetchone()[0]
    assert (info["rows"], info["columns"]) == (ROWS, COLS)
    out = fetch(con, f"SELECT i AS row, 'c25' AS col, {cell_sql(lit(info['path']), 'cell', 'i', lit('c25'))} "
                     "FROM range(1, 5000, 13) t(i)")
    check_cells(out["row"], out["col"], out["value"], out["bound"])


def test_cells_rebuilt_column_by_column_past_the_block_limit(con, archive, monkeypatch):
    from rankfold.udfs.sql import functions

    monkeypatch.setattr(functions, "_BLOCK_CELLS", 64)
    con.register("req", pa.table({"i": (np.arange(MANY) * 7) % ROWS,
                                  "c": [NAMES[k % COLS] for k in range(MANY)]}))
    out = fetch(con, f"SELECT i AS row, c AS col, {cell_sql(lit(archive), 'cell_with_bound', 'i', 'c')} FROM req")
    assert check_cells(out["row"], out["col"], out["value"], out["bound"]) == MANY


def test_options_as_json_value(con, tmp_path):
    info = con.execute(f"SELECT rankfold_compress('panel', '{tmp_path}/j', rank := 8, "
                       "options := '{\"key\": \"id\"}'::JSON)").fetchone()[0]
    assert info["columns"] == COLS
