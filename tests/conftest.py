"""Fixtures shared by the test modules (pytest finds them here; no test imports another).

SQL tests: a module that sets ``SQL_TABLE = (make_table, name)`` gets

* ``database`` (module scope): an in-memory DuckDB database holding ``make_table()`` (a
  pyarrow Table) as the table ``name``, with rankfold's SQL functions registered;
* ``con``: a fresh cursor of it per test, registered like any caller's connection.

Invented tables: ``invented_table(seed, m, n, scale, specials)`` (a pyarrow Table near low rank)
and ``truth_of(table)`` (float64 values with NaN where NULL, and the NULL mask), shared by the
property tests of bounds and targets.

Bound tightness: ``assert_tight(archive, table, truth, values, bounds)`` fails when a bound is
looser than the code's own contract allows (see ``bounds_are_tight``).

SQL example files: ``sql_examples`` maps "scalar" and "table" to the example files (paths in
``sql_examples/``) that call, respectively, no table function and at least one. tests/test_sql.py
runs every "scalar" example and tests/test_sql_tables.py every "table" example, each asserting
that it has a checker for exactly its share, so every example file is executed and checked.
"""

from __future__ import annotations

import math
import re
from pathlib import Path

import duckdb
import numpy as np
import pyarrow as pa
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


# -- invented tables ----------------------------------------------------------------------------
DTYPES = (pa.float64(), pa.float32(), pa.int64(), pa.int32())


def invent(seed: int, m: int, n: int, scale: str, specials: bool) -> pa.Table:
    """A table of m rows and n numeric columns, near low rank, from ``seed``: a few latent
    factors plus noise, then per column a scale (``scale``: 'unit', 'decades', 'huge_mean' with a
    small spread, or 'extreme' up to ~1e150), a dtype (float64, float32, int64, int32) and, with
    ``specials``, a pattern of NULL, NaN and +-inf cells. Invented data (numpy Generator)."""
    rng = np.random.default_rng(seed)
    k = int(rng.integers(1, 4))
    noise = 10.0 ** rng.uniform(-8, -1)
    block = rng.normal(size=(m, k)) @ rng.normal(size=(k, n)) + noise * rng.normal(size=(m, n))
    if scale == "decades":
        block *= 10.0 ** rng.integers(-8, 9, size=n)
    elif scale == "huge_mean":
        block = 1e9 * np.sign(rng.normal(size=n)) + block * 10.0 ** rng.uniform(-3, 1)
    elif scale == "extreme":
        block *= 10.0 ** rng.integers(-150, 151, size=n)
    columns = {}
    for j in range(n):
        values = block[:, j].copy()
        data_type = DTYPES[int(rng.integers(len(DTYPES)))]
        nulls = (rng.random(m) < 0.08) if specials else np.zeros(m, bool)
        if pa.types.is_integer(data_type):
            # integers: a few decimal digits kept, clipped into the type (and below 2^53)
            limit = min(float(np.iinfo(data_type.to_pandas_dtype()).max) / 2, 2.0**52)
            values = np.clip(np.rint(values * 10.0 ** rng.integers(0, 4)), -limit, limit)
            columns[f"c{j}"] = pa.array(values.astype(data_type.to_pandas_dtype()), data_type, mask=nulls)
            continue
        if pa.types.is_float32(data_type):
            values = np.clip(values, -1e37, 1e37)
        if specials:
            u = rng.random(m)
            values[u < 0.04] = np.nan
            values[(u >= 0.04) & (u < 0.06)] = np.inf
            values[(u >= 0.06) & (u < 0.08)] = -np.inf
        columns[f"c{j}"] = pa.array(values.astype(data_type.to_pandas_dtype()), data_type, mask=nulls)
    return pa.table(columns)


def truth_of(table: pa.Table) -> tuple[np.ndarray, np.ndarray]:
    """The source as float64 (m, n) with NaN where NULL, and the NULL mask."""
    values, nulls = [], []
    for column in table.columns:
        null = column.is_null().to_numpy(zero_copy_only=False)
        filled = column.fill_null(0).to_numpy(zero_copy_only=False).astype(np.float64)
        values.append(np.where(null, np.nan, filled))
        nulls.append(null)
    return np.column_stack(values), np.column_stack(nulls)


@pytest.fixture(scope="session")
def invented_table():
    """``invent`` (a function: hypothesis draws its arguments inside the tests)."""
    return invent


@pytest.fixture(scope="session")
def table_truth():
    """``truth_of`` (a function)."""
    return truth_of


# -- bound tightness ----------------------------------------------------------------------------
# Tightness: what the code guarantees beyond soundness (DEVELOPERS.md, "The bound contract").
# A bound is min(s_j * rowmax_i, colmax_j) + slack_ij, where colmax_j is the column's largest
# measured |error| rounded up (4u and one ulp), rowmax_i the row's largest |error| / s_j
# (s_j: the column's ledger_scale) rounded up to 8 mantissa bits (2^-7 relative; 4 bits, 2^-3,
# when every column has a tolerance: verify.encode_pass, ledger_bits), and
# slack_ij = 2 gamma_{c+3} S_ij the floating-point slack (Higham 2002, eq. 3.4-3.5). So against
# the errors of the values as stored (below):
#   column: max_i bound_ij <= (1 + 2^-23) max_i |e_ij| + ALLOWANCE scale_j (colmax_j is stored
#           rounded up to 24 significant bits: arithmetic.COLUMN_FIGURE_BITS)
#   cell:   bound_ij <= (1 + 2^-7) min(s_j max_j' |e_ij'| / s_j', max_i |e_ij|) + ALLOWANCE scale_j
#           (1 + 2^-3 when every column has a tolerance)
#           bound_ij <= max_i |e_ij| + ALLOWANCE scale_j without a row ledger (manifest row_ledger false)
# with scale_j the column's largest finite |value| (true, served or stored: a stored value may lie
# far outside the column's range, e.g. a spike in a basis column carried by the weights into a
# derived one, and the slack grows with it; serving clamps it back). ALLOWANCE covers the slack:
# measured at most 3.1e-14 over 300 drawn cases (tests/test_bounds_property.py, max_examples=300), so
# 1e-12 leaves 30x. The contract is about the values as STORED (``rebuild(serve=False)``), which
# the ledger measured: that is where tightness is checked. The values SERVED are clamped into
# the column's observed range (the bound stays), then rounded onto the column's type: an integer
# column's bound grows by at most 1/2 (arithmetic.serve), a float32/float16 column's by at most
# half a unit in the last place; a float64 column's bound is the stored one.
ALLOWANCE = 1e-12
ROW_FIGURE_ROUNDING = {8: 1.0 + 2.0**-7, 4: 1.0 + 2.0**-3}  # mantissa bits -> largest factor
COLUMN_FIGURE_ROUNDING = 1.0 + 2.0**-23  # colmax to 24 significant bits, rounded up


def bounds_are_tight(archive, table: pa.Table, truth: np.ndarray,
                     values: np.ndarray, bounds: np.ndarray) -> None:
    """Asserts the stored values' bounds are within rounding and slack of their true errors, and
    the served ``bounds`` (of the served ``values``) exceed the stored ones by no more than the
    rounding onto the column's type."""
    from rankfold.udfs.store.reader import ArchiveReader

    if truth.size == 0:
        return
    stored = ArchiveReader(archive.path).rebuild(serve=False)
    ledger = archive.column_ledger()
    position = {name: j for j, name in enumerate(ledger.column("name").to_pylist())}
    order = [position[name] for name in archive.numeric_columns]
    s = ledger.column("ledger_scale").to_numpy()[order]
    every_tolerance = ledger.column("tolerance").null_count == 0 and all(
        math.isfinite(v) for v in ledger.column("tolerance").to_pylist())
    rounding = ROW_FIGURE_ROUNDING[4 if every_tolerance and ledger.num_rows else 8]
    types = [table.schema.field(name).type for name in archive.numeric_columns]
    finite = np.isfinite(truth)
    approximated = finite & (stored.bounds > 0)
    with np.errstate(invalid="ignore", over="ignore"):
        error = np.where(finite, np.abs(truth - stored.values), 0.0)
        reach = np.maximum(np.where(finite, np.abs(truth), 0.0).max(axis=0),
                           np.where(finite, np.abs(values), 0.0).max(axis=0))
        scale = np.maximum(reach, np.where(finite, np.abs(stored.values), 0.0).max(axis=0))
    allowed = ALLOWANCE * scale
    # served against stored: the rounding onto the column's type only
    grid = np.array([0.5 if pa.types.is_integer(t)
                     else float(np.spacing(np.float32(c))) if pa.types.is_float32(t)
                     else float(np.spacing(np.float16(min(c, 65504.0)))) if pa.types.is_float16(t)
                     else 0.0 for t, c in zip(types, reach)])
    widened = finite & (bounds > stored.bounds + grid[None, :] + allowed[None, :])
    assert not widened.any(), (
        f"served bound {bounds[widened][0]!r} at {np.argwhere(widened)[0]} exceeds the stored "
        f"{stored.bounds[widened][0]!r} by more than the rounding onto the column's type")
    column_bound = np.where(approximated, stored.bounds, 0.0).max(axis=0)
    loose = column_bound > COLUMN_FIGURE_ROUNDING * error.max(axis=0) + allowed
    assert not loose.any(), (
        f"column bounds not tight: column {np.argmax(loose)} has max bound "
        f"{column_bound[loose][0]!r} against a max error {error.max(axis=0)[loose][0]!r}")
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        per_scale = np.where(finite, error / s[None, :], 0.0)
        row_figure = np.where(np.isfinite(per_scale), per_scale, np.inf).max(axis=1)
        reference = np.minimum(s[None, :] * row_figure[:, None], error.max(axis=0)[None, :])
    if not archive.manifest.get("row_ledger", True):
        # no row ledger (every column has a tolerance): a cell's bound is its column's
        # (DEVELOPERS.md, "The bound contract"), tight against the column's largest error
        reference = np.broadcast_to(error.max(axis=0)[None, :], reference.shape)
    loose = approximated & (stored.bounds > rounding * reference + allowed[None, :])
    assert not loose.any(), (
        f"cell bounds not tight: cell {np.argwhere(loose)[0]} has bound {stored.bounds[loose][0]!r} "
        f"against {reference[loose][0]!r} from its row's and column's largest errors")


@pytest.fixture(scope="session")
def assert_tight():
    """``bounds_are_tight(archive, table, truth, values, bounds)``: asserts every bound is within
    rounding and slack of the errors it summarizes (a function)."""
    return bounds_are_tight
