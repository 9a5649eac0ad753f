"""Shared DuckDB set-up for the SQL tests: a database holding one invented table, and
cursors registered like any caller's connection."""

from __future__ import annotations

from collections.abc import Callable

import duckdb
import pyarrow as pa
import pytest

import rankfold.udfs


def database_holding(table: pa.Table, name: str) -> duckdb.DuckDBPyConnection:
    """An in-memory database with ``table`` copied into the DuckDB table ``name``, registered."""
    connection = duckdb.connect()
    connection.from_arrow(table).create_view(f"{name}_view")
    connection.execute(f"CREATE TABLE {name} AS SELECT * FROM {name}_view")
    rankfold.udfs.register(connection)
    return connection


def registered_cursor(database: duckdb.DuckDBPyConnection) -> duckdb.DuckDBPyConnection:
    """A fresh cursor of ``database`` with rankfold's SQL functions registered on it."""
    cursor = database.cursor()
    rankfold.udfs.register(cursor)
    return cursor


def database_fixtures(make_table: Callable[[], pa.Table], name: str):
    """The two fixtures of a SQL test module, as (database, con): ``database`` (module scope)
    holds ``make_table()`` as the table ``name``; ``con`` is a fresh registered cursor of it
    per test, like any caller's connection. Assign them at module level:
    ``database, con = database_fixtures(_table, "panel")``."""

    @pytest.fixture(scope="module")
    def database():
        connection = database_holding(make_table(), name)
        yield connection
        connection.close()

    @pytest.fixture()
    def con(database):
        cursor = registered_cursor(database)
        yield cursor
        cursor.close()

    return database, con
