"""The SQL rebuild against the numpy rebuild, cell by cell, on every coding an archive can use.

``rankfold_scan(path, bounds := 'cell')`` (SQL text generated in udfs/sql/tables.py, run by
DuckDB) and ``Archive.rebuild(bounds=True)`` (numpy, udfs/store/arithmetic.py) must serve the
same value and the same bound for every cell, and both bounds must hold against the source.
Each case below is a small invented table (numpy Generator, fixed seed) compressed with one
coding, and the case asserts that the archive really uses that coding (residual codes,
corrections, anchor rows, rank 0, ...), so a change of defaults cannot quietly empty a case.

What "the same" means, cell by cell (DEVELOPERS.md, "The bound contract" and "Served values"):

* NULL, NaN and +-inf cells, and every cell stored exactly (bound 0 in numpy): the same
  value bit for bit, bound 0 in both;
* integer columns: both round half to even onto the integers of the column's range, so the
  values are equal and the (whole-number) bounds are equal;
* float64 columns: both clamp into the column's observed range; the two sums may run in
  different orders (DuckDB's expression against BLAS), which the slack term of the bound
  covers: values agree within the slack, bounds within rounding (SQL multiplies by 1 + 16u);
* float32 columns: SQL serves DOUBLE and does not narrow (udfs/sql/tables.py ``_served``),
  numpy narrows to float32 and takes as bound the farthest float32 in [v - b, v + b]
  (arithmetic.serve): the values agree within half a float32 unit in the last place (plus
  the slack), and numpy's bound is at most that half unit above SQL's;
* NULL cells: NULL in both, with bound 0 in both (stored exactly).

Outside references: the invented source itself (every served value within its bound of the
true value), numpy.spacing (units in the last place of float32) and numpy.rint (integers).
"""

from __future__ import annotations

import duckdb
import numpy as np
import pyarrow as pa
import pytest

import rankfold
import rankfold.udfs

ROWS = 60


def _table(seed: int, *, outliers: bool = False, specials: bool = True, noise: float = 0.02,
           latent: int = 2) -> pa.Table:
    """Invented (seed): ROWS rows, a key, a label and eight numeric columns near rank
    ``latent`` in different units: five float64 (c0..c4), two float32 (g5, g6), one int64 (k7,
    three decimals kept) and one int32 (k8). With ``specials``: NULLs in c1 and k7, NaN and
    +-inf cells in c3 and g6. With ``outliers``: a few cells far off the low-rank part (stored
    exactly under a tolerance)."""
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((ROWS, latent)) @ rng.standard_normal((latent, 9))
    x += noise * rng.standard_normal(x.shape)
    x *= np.array([1.0, 30.0, 0.2, 5.0, 1e3, 2.0, 0.5, 1e3, 40.0])
    x[:, 4] += 5e4  # a large mean with a small spread
    if outliers:
        x[rng.integers(0, ROWS, 4), rng.integers(0, 5, 4)] += 50.0 * x[:, :5].std()
    nulls = np.zeros(x.shape, bool)
    if specials:
        nulls[rng.random(ROWS) < 0.1, 1] = True
        nulls[rng.random(ROWS) < 0.1, 7] = True
        x[[3, 17], 3] = np.nan
        x[[8], 3] = np.inf
        x[[11, 40], 6] = [-np.inf, np.nan]
    columns = {"id": pa.array(np.arange(ROWS) * 7 + 100), "site": pa.array(rng.choice(["aster", "birch"], ROWS))}
    for j in range(5):
        columns[f"c{j}"] = pa.array(x[:, j], mask=nulls[:, j])
    for j in (5, 6):
        columns[f"g{j}"] = pa.array(x[:, j].astype(np.float32), pa.float32())
    columns["k7"] = pa.array(np.rint(x[:, 7]).astype(np.int64), pa.int64(), mask=nulls[:, 7])
    columns["k8"] = pa.array(np.rint(x[:, 8]).astype(np.int32), pa.int32())
    return pa.table(columns)


def _uses_residual_codes(archive) -> bool:
    steps = archive.column_ledger().column("residual_step").to_pylist()
    return any(s is not None and np.isfinite(s) for s in steps)


def _roles(archive) -> list[str]:
    return archive.column_ledger().column("role").to_pylist()


# name -> (table arguments, compress options, what the archive must show for the case to count)
CASES = {
    "fixed rank, no tolerance": (
        dict(seed=1), dict(rank=2),
        lambda a: a.manifest["targets"]["max_abs_error"] is None and not _uses_residual_codes(a)),
    "max_abs_error: residual codes and corrections": (
        dict(seed=2, outliers=True), dict(rank=2, max_abs_error=0.5),
        lambda a: _uses_residual_codes(a) and a.manifest["achieved"]["corrections"] > 0),
    "max_std_error": (
        dict(seed=3), dict(max_std_error=0.01),
        lambda a: a.manifest["targets"]["max_std_error"] == 0.01 and _uses_residual_codes(a)),
    "per-column tolerances": (
        dict(seed=4), dict(rank=2, max_abs_error={"c0": 0.001, "c4": 5.0, "g5": 0.01, "k7": 2.0}),
        lambda a: len({t for t in a.column_ledger().column("tolerance").to_pylist() if t is not None}) >= 3),
    "basis stored to the tolerance": (
        dict(seed=5), dict(rank=2, max_abs_error=0.05, basis_precision="tolerance"),
        lambda a: a.manifest["method"]["options"]["basis_precision"] == "tolerance" and _uses_residual_codes(a)),
    "svd scores": (
        dict(seed=6), dict(rank=2, method="svd"),
        lambda a: a.manifest["method"]["kind"] == "svd" and "derived" in _roles(a)),
    "optimal link, anchor rows": (
        dict(seed=7), dict(rank=2, link="optimal", row_method="leverage", column_method="leverage"),
        lambda a: len(a.manifest["anchors"]) > 0 and (a.path / "anchors.parquet").is_file()),
    "skeleton link, anchor rows, tolerance": (
        dict(seed=8), dict(rank=2, link="skeleton", max_abs_error=0.3),
        lambda a: len(a.manifest["anchors"]) > 0 and (a.path / "anchors.parquet").is_file()),
    "rank 0: offsets and residual codes": (
        dict(seed=9, noise=1.0, specials=False), dict(max_abs_error=0.5),
        lambda a: a.manifest["method"]["rank"] == 0 and not a.basis_columns),
    "every column basis": (
        dict(seed=10, latent=9), dict(rank=9),
        lambda a: set(_roles(a)) == {"basis"}),
}


def _sql_scan(path) -> pa.Table:
    con = duckdb.connect()
    try:
        rankfold.udfs.register(con)
        return con.sql("SELECT * FROM rankfold_scan(?, bounds := 'cell') ORDER BY _rf_row",
                       params=[str(path)]).to_arrow_table()
    finally:
        con.close()


def _as_float(column: pa.ChunkedArray) -> np.ndarray:
    return column.cast(pa.float64()).fill_null(np.nan).to_numpy()


@pytest.fixture(scope="module", params=sorted(CASES))
def case(request, tmp_path_factory):
    table_args, options, shows = CASES[request.param]
    table = _table(**table_args)
    archive = rankfold.compress(table, tmp_path_factory.mktemp("sqlnp") / "t.rankfold", key="id", **options)
    assert shows(archive), f"case {request.param!r} does not exercise its coding"
    return table, archive


def test_sql_and_numpy_serve_the_same_cells(case):
    table, archive = case
    numpy_side = archive.rebuild(bounds=True)
    sql_side = _sql_scan(archive.path)
    assert sql_side.num_rows == numpy_side.num_rows == table.num_rows
    assert sql_side.column("id").to_pylist() == numpy_side.column("id").to_pylist()
    assert sql_side.column("site").to_pylist() == numpy_side.column("site").to_pylist()
    for name in archive.numeric_columns:
        source = table.column(name)
        kind = source.type
        truth = _as_float(source)
        null = source.is_null().to_numpy(zero_copy_only=False)
        py, py_bound = _as_float(numpy_side.column(name)), _as_float(numpy_side.column(f"{name}_bound"))
        sq, sq_bound = _as_float(sql_side.column(name)), _as_float(sql_side.column(f"{name}_bound"))
        where = f"column {name} ({kind})"
        # NULLs in the same cells. Their bound: NULL from Archive.rebuild (its docstring), 0 from
        # SQL (README: "NULL/NaN/inf cells have bound 0"); two documented conventions, both pinned
        assert np.array_equal(sql_side.column(name).is_null().to_numpy(zero_copy_only=False), null), where
        assert np.all(py_bound[null] == 0) and np.all(sq_bound[null] == 0), where
        # NaN, +-inf and every cell numpy serves exactly: bit for bit, bound 0 in both
        exact = ~null & ((py_bound == 0) | ~np.isfinite(truth))
        assert np.array_equal(py[exact], sq[exact], equal_nan=True), where
        assert np.all(py_bound[exact] == 0) and np.all(sq_bound[exact] == 0), where
        assert np.array_equal(py[exact & np.isfinite(truth)], truth[exact & np.isfinite(truth)]), where
        # both bounds hold against the source (the invented table)
        ok = ~null & np.isfinite(truth)
        assert np.all(np.abs(truth[ok] - py[ok]) <= py_bound[ok]), where
        assert np.all(np.abs(truth[ok] - sq[ok]) <= sq_bound[ok]), where
        approx = ok & ~exact
        if pa.types.is_integer(kind):
            # whole numbers (numpy.rint leaves them unchanged), the same in both
            assert np.array_equal(sq[approx], np.rint(sq[approx])), where
            assert np.array_equal(py[approx], sq[approx]) and np.array_equal(py_bound[approx], sq_bound[approx]), where
            continue
        reach = np.abs(truth[ok]).max()
        if pa.types.is_float32(kind):
            # numpy rounds the clamped value to the nearest float32: at most half a unit in the
            # last place of the result (numpy.spacing) away from SQL's DOUBLE, and its bound is
            # the farthest float32 in [v - b, v + b] within the range: at most b plus that half
            # unit, possibly less (measured: from 0.47 units above SQL's down to 0)
            half_ulp = 0.5 * np.spacing(np.abs(py[approx]).astype(np.float32)).astype(np.float64)
            assert np.all(np.abs(py[approx] - sq[approx]) <= half_ulp + SLACK * reach), where
            assert np.all(py_bound[approx] <= sq_bound[approx] + half_ulp), where
            continue
        assert np.all(np.abs(py[approx] - sq[approx]) <= SLACK * reach), where
        assert np.all(np.abs(py_bound[approx] - sq_bound[approx]) <= BOUND_ROUNDING * py_bound[approx]), where


# Values: the two rebuilds may sum in different orders; the slack term of the bound, 2
# gamma_{c+3} (|offset| + sum_k |w_kj| |basis_ik| + |code step|) (Higham 2002, eq. 3.4-3.5),
# covers that. With c <= 9 basis columns that is 2 gamma_12 ~ 2.7e-15 times a sum of the
# order of the column's reach for these tables; 1e-14 of the reach leaves 4x. Measured: the
# float64 values are equal bit for bit (the same sums in the same order).
SLACK = 1e-14
# Bounds: SQL multiplies by 1 + 16u (u = 2^-53, 1.8e-15) to cover its own expression's
# rounding (udfs/sql/tables.py); measured at most 1.8e-15 relative; allowed 4e-15.
BOUND_ROUNDING = 4e-15
