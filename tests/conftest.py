"""Fixtures shared by the test modules (pytest finds them here; no test imports another).

SQL tests: a module that sets ``SQL_TABLE = (make_table, name)`` gets

* ``database`` (module scope): an in-memory DuckDB database holding ``make_table()`` (a
  pyarrow Table) as the table ``name``, with rankfold's SQL functions registered;
* ``con``: a fresh cursor of it per test, registered like any caller's connection.

SQL example files: ``sql_examples`` maps "scalar" and "table" to the example files (paths in
``sql_examples/``) that call, respectively, no table function and at least one. tests/test_sql.py
runs every "scalar" example and tests/test_sql_tables.py every "table" example, each asserting
that it has a checker for exactly its share, so every example file is executed and checked.
"""

from __future__ import annotations

import re
from pathlib import Path

import duckdb
import pytest

import rankfold.udfs
from rankfold.udfs.sql import FUNCTIONS

EXAMPLES = Path(__file__).resolve().parent.parent / "sql_examples"


def _registered(connection: duckdb.DuckDBPyConnection) -> duckdb.DuckDBPyConnection:
    rankfold.udfs.register(connection)
    return connection


@pytest.fixture(scope="module")
def database(request):
    make_table, name = request.module.SQL_TABLE
    connection = duckdb.connect()
    connection.from_arrow(make_table()).create_view(f"{name}_view")
    connection.execute(f"CREATE TABLE {name} AS SELECT * FROM {name}_view")
    yield _registered(connection)
    connection.close()


@pytest.fixture()
def con(database):
    cursor = _registered(database.cursor())
    yield cursor
    cursor.close()


def _table_functions() -> list[str]:
    """The SQL table functions: the entries of FUNCTIONS whose description starts 'table'."""
    return [f"rankfold_{verb}" for verb, (_, description) in FUNCTIONS.items()
            if description.startswith("table")]


@pytest.fixture(scope="session")
def sql_examples() -> dict[str, list[str]]:
    table_call = re.compile(r"\b(" + "|".join(_table_functions()) + r")\s*\(")
    shares: dict[str, list[str]] = {"scalar": [], "table": []}
    for path in sorted(EXAMPLES.glob("*.sql")):
        shares["table" if table_call.search(path.read_text(encoding="utf-8")) else "scalar"].append(path.name)
    assert shares["scalar"] and shares["table"], f"no SQL example found in {EXAMPLES}"
    return shares
