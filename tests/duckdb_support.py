"""Shared DuckDB set-up for the SQL tests: a database holding one invented table, and
cursors registered like any caller's connection."""

from __future__ import annotations

import duckdb
import pyarrow as pa

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
