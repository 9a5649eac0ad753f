"""No user text reaches DuckDB as SQL: row conditions are parsed and allow-listed, table names
are quoted identifiers, a source query is one statement (issue 12, item 5).

One test per attack that once worked (each would write a file, create a database, read a file
or forge a row if the text were pasted into SQL), plus the conditions that must keep working.
The parse is DuckDB's own (``json_serialize_sql``); the checks name what was refused.
"""

from __future__ import annotations

import duckdb
import numpy as np
import pyarrow as pa
import pytest

import rankfold
import rankfold.udfs
from rankfold.cli import main
from rankfold.sql_view import select_rows
from rankfold.udfs.errors import ConditionRefusedError, InvalidInputError
from rankfold.udfs.store.sql_text import checked_condition, qualified_name, quote_identifier

ROWS = 300


@pytest.fixture(scope="module")
def archive(tmp_path_factory):
    rng = np.random.default_rng(5)
    x = rng.standard_normal((ROWS, 2)) @ rng.standard_normal((2, 6)) + 0.01 * rng.standard_normal((ROWS, 6))
    table = pa.table({"id": np.arange(ROWS, dtype=np.int64),
                      "site": np.array(["north", "south", "east"])[np.arange(ROWS) % 3],
                      **{f"x{j}": x[:, j] for j in range(6)}})
    return rankfold.compress(table, tmp_path_factory.mktemp("inj") / "a.rankfold", rank=2, key="id",
                             exact_columns=("site",))


@pytest.fixture()
def con():
    c = duckdb.connect()
    rankfold.udfs.register(c)
    yield c
    c.close()


def _copy_attack(target) -> str:
    return f"id < 3; COPY (SELECT 42 AS forged) TO '{target}' (FORMAT csv)"


# -- the attacks ------------------------------------------------------------------------------------
def test_cli_where_cannot_copy_to_a_file(archive, tmp_path, capsys):
    target = tmp_path / "written.csv"
    code = main(["rebuild", str(archive.path), "--where", _copy_attack(target),
                 "--output", str(tmp_path / "out.csv")])
    err = capsys.readouterr().err
    assert code == 1 and "more than one statement" in err
    assert not target.exists()


def test_python_row_selection_cannot_attach_a_database(archive, tmp_path):
    target = tmp_path / "made.duckdb"
    with pytest.raises(ConditionRefusedError, match="more than one statement"):
        select_rows(archive, f"true; ATTACH '{target}' AS other")
    assert not target.exists()


def test_predicate_cannot_read_a_file_through_a_subquery(archive, con, tmp_path):
    secret = tmp_path / "secret.csv"
    secret.write_text("id\n7\n")
    sql = (f"SELECT * FROM rankfold_scan('{archive.path}', predicate := "
           f"'id IN (SELECT id FROM read_csv(''{secret}''))')")
    with pytest.raises(duckdb.Error, match="ConditionRefusedError.*a subquery"):
        con.execute(sql).fetchall()
    with pytest.raises(ConditionRefusedError, match="a subquery"):
        archive.aggregate(["x0"], "sum", where=f"id IN (SELECT id FROM read_csv('{secret}'))")


def test_predicate_cannot_forge_a_row(archive, con):
    forged = "false UNION ALL BY NAME SELECT 0 AS _rf_row, -1 AS id"
    with pytest.raises(duckdb.Error, match="ConditionRefusedError"):
        con.execute(f"SELECT * FROM rankfold_scan('{archive.path}', predicate := '{forged}')").fetchall()
    with pytest.raises(ConditionRefusedError):
        select_rows(archive, forged)


@pytest.mark.parametrize("condition, refused", [
    ("id > 1 ORDER BY id", "ORDER BY"),
    ("row_number() OVER () < 3", "a window function"),
    ("getenv('HOME') = 'x'", "'getenv'"),
    ("x0 > 0", "'x0' is not one of the columns"),
    ("id = $1", "a parameter"),
    ("sum(id) > 0", "'sum'"),
    ("id > 1 AS flag", "names an expression"),
    ("1 FROM read_csv('/etc/hostname')", "a FROM clause"),
    ("main.id = 1", "'main.id' is not one of the columns"),
])
def test_other_refusals_say_what_was_refused(archive, condition, refused):
    with pytest.raises(ConditionRefusedError, match=refused.replace("(", r"\(").replace(")", r"\)")
                       .replace("$", r"\$")):
        checked_condition(condition, ["id", "site", "_rf_row"])


def test_dotted_source_name_is_quoted(tmp_path):
    """A table name with a dot was pasted raw; now each part is a quoted identifier."""
    con = duckdb.connect()
    try:
        con.execute('CREATE SCHEMA "my schema"')
        x = np.random.default_rng(2).standard_normal((40, 4))
        source = pa.table({f"c{j}": x[:, j] for j in range(4)})  # noqa: F841  (read by name below)
        con.execute("CREATE TABLE plain AS SELECT * FROM source")
        con.execute('CREATE TABLE "my schema"."odd.name" AS SELECT * FROM plain')
        written = rankfold.compress('"my schema"."odd.name"', tmp_path / "q.rankfold", rank=2, connection=con)
        assert np.all(np.abs(written.to_numpy() - x) <= written.cell_bounds())  # each cell within its bound
        assert rankfold.compress("main.plain", tmp_path / "p.rankfold", rank=2, connection=con).shape == (40, 4)
        target = tmp_path / "hit.csv"
        with pytest.raises(InvalidInputError):
            rankfold.compress(f"main.plain; COPY (SELECT 1) TO '{target}'", tmp_path / "r.rankfold",
                              connection=con)
        with pytest.raises(ConditionRefusedError, match="exactly one SELECT"):
            rankfold.compress(f"SELECT * FROM plain; COPY (SELECT 1) TO '{target}'", tmp_path / "s.rankfold",
                              connection=con)
        assert not target.exists()
    finally:
        con.close()


# -- what keeps working ---------------------------------------------------------------------------
@pytest.mark.parametrize("condition, expected", [
    ("id BETWEEN 10 AND 12", [10, 11, 12]),
    ("site IN ('north') AND id < 7", [0, 3, 6]),
    ("CASE WHEN site = 'east' THEN id ELSE -1 END = 5", [5]),
    ("CAST(id AS VARCHAR) LIKE '29_'", list(range(290, 300))),
    ("id % 100 = 0 AND NOT (site <> 'north') OR id IS NULL", [0]),
    ("upper(site) = 'SOUTH' AND abs(id - 100) <= 1", [100]),
    ('"ID" = 4', [4]),  # DuckDB identifiers are case-insensitive
])
def test_plain_conditions_select_the_same_rows_as_numpy(archive, condition, expected):
    assert select_rows(archive, condition).tolist() == expected
    # the same condition in SQL and in aggregates (numpy count of the expected rows)
    assert archive.aggregate(["x0"], "count", where=condition).column("x0").to_pylist() == [len(expected)]


def test_quoting_helpers():
    # SQL standard: a double quote inside a quoted identifier is doubled
    assert quote_identifier('a"b') == '"a""b"'
    assert qualified_name('s.t') == '"s"."t"'
    assert qualified_name('"a.b"."c""d"') == '"a.b"."c""d"'
    with pytest.raises(InvalidInputError):
        qualified_name("a.b.c.d")
    with pytest.raises(InvalidInputError):
        qualified_name('"open')


def test_quantized_basis_column_is_not_a_row_condition_column(tmp_path):
    """A basis column stored as quantized codes is approximate: it cannot choose rows."""
    rng = np.random.default_rng(0)
    x = rng.standard_normal((300, 2)) @ rng.standard_normal((2, 6))
    table = pa.table({"id": np.arange(300), **{f"c{j}": x[:, j] for j in range(6)}})
    archive = rankfold.compress(table, tmp_path / "q.rankfold", max_abs_error=0.1,
                                basis_precision="tolerance", exact_columns=("id",))
    coded = [b["name"] for b in archive.manifest["basis"] if "step" in b]
    assert coded
    assert select_rows(archive, "id < 3").tolist() == [0, 1, 2]
    with pytest.raises(ConditionRefusedError, match=f"'{coded[0]}' is not one of the columns"):
        select_rows(archive, f"{coded[0]} > 0")
