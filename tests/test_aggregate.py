"""Archive.aggregate / covariance / correlation against numpy and DuckDB on the original table.

Outside references: numpy.nanmean/nansum/count over the invented source (NULLs skipped, as SQL
does), DuckDB's own avg/sum/count on the original table, numpy.cov and numpy.corrcoef. Every
answer must lie within its reported hard bound of the reference.
"""

from __future__ import annotations

import duckdb
import numpy as np
import pyarrow as pa
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import rankfold
from rankfold.udfs.errors import InvalidInputError, UnknownColumnError
from rankfold.udfs.store.reader import ArchiveReader

ROWS, COLS = 6000, 16
NAMES = [f"x{j}" for j in range(COLS)]


def _data(seed: int = 3):
    """Rank-4 table with noise, three sites, an integer column and a column with NULLs (seed 3)."""
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((ROWS, 4)) @ rng.standard_normal((4, COLS)) * np.geomspace(1, 50, COLS)
    x += 0.02 * rng.standard_normal(x.shape) + 5.0
    nulls = np.zeros(x.shape, bool)
    nulls[rng.random(ROWS) < 0.05, 9] = True
    site = np.array(["north", "south", "east"])[rng.integers(0, 3, ROWS)]
    return x, nulls, site


X, NULLS, SITE = _data()


def _table() -> pa.Table:
    cols = {"id": pa.array(np.arange(ROWS)), "site": pa.array(SITE)}
    for j, n in enumerate(NAMES):
        cols[n] = pa.array(X[:, j], mask=NULLS[:, j])
    return pa.table(cols)


@pytest.fixture(scope="module", params=["cur", "svd", "quantized"])
def archive(request, tmp_path_factory):
    options = {"cur": dict(rank=4), "svd": dict(rank=4, method="svd"),
               "quantized": dict(rank=2, max_abs_error=0.05)}[request.param]
    path = tmp_path_factory.mktemp("agg") / "t.rankfold"
    return rankfold.compress(_table(), path, key="id", batch_rows=2500, **options)


@pytest.fixture(scope="module")
def con():
    connection = duckdb.connect()
    connection.from_arrow(_table()).create_view("t")
    yield connection
    connection.close()


def _within(result: pa.Table, truth: list[tuple], names: list[str], offset: int) -> None:
    assert result.num_rows == len(truth)
    for g, row in enumerate(truth):
        for s, name in enumerate(names):
            value, bound = result.column(name)[g].as_py(), result.column(f"{name}_bound")[g].as_py()
            expected = row[offset + s]
            assert bound >= 0
            assert abs(value - expected) <= bound, (name, g, value, expected, bound)


@pytest.mark.parametrize("func", ["avg", "sum", "count"])
def test_grouped_with_predicate_matches_duckdb(archive, con, func):
    result = archive.aggregate(NAMES, func, by="site", where="site <> 'east' OR id < 100")
    truth = con.execute(f"SELECT site, {', '.join(f'{func}({n})' for n in NAMES)} FROM t "
                        "WHERE site <> 'east' OR id < 100 GROUP BY site ORDER BY site").fetchall()
    assert result.column_names[:3] == ["site", NAMES[0], f"{NAMES[0]}_bound"]
    assert result.column("site").to_pylist() == [r[0] for r in truth]
    _within(result, truth, NAMES, 1)


@pytest.mark.parametrize("rows", [None, slice(1000, 5500), slice(2500, 5000), slice(10, 20)])
def test_blocks_and_row_ranges_match_numpy(archive, rows):
    sl = rows or slice(0, ROWS)
    masked = np.where(NULLS[sl], np.nan, X[sl])
    result = archive.aggregate(NAMES, "avg", rows=rows, estimates=True)
    # reference: numpy.nanmean (NULLs skipped, as SQL avg does)
    _within(result, [tuple(np.nanmean(masked, axis=0))], NAMES, 0)
    assert all(result.column(f"{n}_estimate")[0].as_py() <= result.column(f"{n}_bound")[0].as_py()
               for n in NAMES)
    counts = archive.aggregate(NAMES, "count", rows=rows)
    assert [counts.column(n)[0].as_py() for n in NAMES] == list((~NULLS[sl]).sum(axis=0))


@pytest.mark.parametrize("func", ["avg", "sum"])
def test_whole_table_bounds_are_tight(archive, func):
    # |sum_i e_ij| <= sqrt(n_j) ||e_j||_2 (Cauchy-Schwarz), the ledger term the code takes for a
    # whole column; the reference is the same with the stored values' true errors (numpy;
    # aggregates are computed from the values as stored, before serving clamps them).
    # Measured: within 1 + 4e-8 of it where it exceeds the float noise (cur, svd, quantized;
    # svd is below it where the row figures give less), and at most 4e-12 of the column's
    # largest |value| on basis columns, whose error is 0. Pinned at 1 + 1e-6 and 1e-9.
    masked = np.where(NULLS, np.nan, X)
    stored = ArchiveReader(archive.path).rebuild(columns=NAMES, serve=False).values
    error = np.where(NULLS, 0.0, X - stored)
    count = (~NULLS).sum(axis=0)
    reference = np.sqrt(count) * np.linalg.norm(error, axis=0)
    scale = np.nanmax(np.abs(masked), axis=0) * count
    if func == "avg":
        reference, scale = reference / count, scale / count
    result = archive.aggregate(NAMES, func)
    bound = np.array([result.column(f"{n}_bound")[0].as_py() for n in NAMES])
    assert np.all(bound <= (1 + 1e-6) * reference + 1e-9 * scale)


def test_unfiltered_aggregate_reads_no_row_file(archive, monkeypatch):
    from rankfold.udfs.store import aggregate as engine

    def refuse(*args, **kwargs):
        raise AssertionError("scanned the row files")

    monkeypatch.setattr(engine, "_scan_partials", refuse)
    result = archive.aggregate(NAMES, "sum", rows=slice(0, 5000))  # 5000 = 2 verify batches
    _within(result, [tuple(np.nansum(np.where(NULLS, np.nan, X)[:5000], axis=0))], NAMES, 0)


def test_empty_selection_gives_null_and_zero_count(archive):
    result = archive.aggregate(["x1", "x9"], "avg", where="id < 0")
    assert result.column("x1").to_pylist() == [None] and result.column("x1_bound").to_pylist() == [0.0]
    grouped = archive.aggregate(["x1"], "sum", by="site", where="id < 0")
    assert grouped.num_rows == 0 and grouped.column_names == ["site", "x1", "x1_bound"]
    assert archive.aggregate(["x1"], "count", where="id < 0").column("x1").to_pylist() == [0]


@pytest.mark.parametrize("call, error, message", [
    (dict(columns=["nope"]), UnknownColumnError, "no numeric column 'nope'"),
    (dict(columns=["x1"], func="median"), InvalidInputError, "func must be one of"),
    (dict(columns=["x1"], by="x2"), UnknownColumnError, "no key (exact) column 'x2'"),
    (dict(columns=["x1"], where="x2 > 0"), InvalidInputError, "is not one of the columns it may use"),
    (dict(columns=["x1"], where="id > 0; DROP TABLE t"), InvalidInputError, "more than one statement"),
    (dict(columns=["x1"], rows=[1, 2]), InvalidInputError, "rows must be a slice"),
    (dict(columns=None), InvalidInputError, "needs the numeric columns"),
])
def test_aggregate_errors(archive, call, error, message):
    with pytest.raises(error, match=message.replace("(", r"\(").replace(")", r"\)")):
        archive.aggregate(**call)


def test_covariance_and_correlation_within_bounds(archive):
    cols = [n for j, n in enumerate(NAMES) if j != 9]
    keep = [j for j in range(COLS) if j != 9]
    cov = archive.covariance(cols)
    cor = archive.correlation(cols)
    q = len(cols)
    # references: numpy.cov (divisor n - 1) and numpy.corrcoef
    true_cov = np.cov(X[:, keep], rowvar=False)
    true_cor = np.corrcoef(X[:, keep], rowvar=False)
    np.fill_diagonal(true_cor, 1.0)  # corr(x, x) = 1 exactly; numpy's own rounding gives 1 - 2u
    value, bound = (cov.column("value").to_numpy().reshape(q, q), cov.column("bound").to_numpy().reshape(q, q))
    assert np.all(np.abs(value - true_cov) <= bound)
    # tight: the code bounds |cov(x) - cov(xhat)| by Cauchy-Schwarz, (s_j d_l + d_j s_l + d_j d_l)
    # / (m - 1) with s = ||xhat - mean||, d >= ||x - xhat||. The same formula from numpy with the
    # stored values' true errors is the reference. Measured: within 1 + 1e-8 of it (cur, svd);
    # 2.7-20.9x above it with a quantized residual, whose norm the bound adds (triangle
    # inequality: the factors' Gram matrix leaves the codes out). Pinned at 1 + 1e-6 and 25x;
    # plus the floating-point term (4 gamma_{m+2c+16} |w|' |G| |w|: measured <= 2.7e-12 of
    # sd_j sd_l on pairs of basis columns, whose error is 0) allowed up to 1e-9.
    quantized = bool(np.isfinite(archive.column_ledger().column("residual_step").to_numpy(zero_copy_only=False)).any())
    factor = 25.0 if quantized else 1.0 + 1e-6
    # (covariances are computed from the values as stored, before serving clamps them)
    stored = ArchiveReader(archive.path).rebuild(columns=cols, serve=False).values
    spread = np.linalg.norm(stored - stored.mean(axis=0), axis=0)
    distance = np.linalg.norm(X[:, keep] - stored, axis=0)
    reference = (np.outer(spread, distance) + np.outer(distance, spread) + np.outer(distance, distance)) / (ROWS - 1)
    scale = np.sqrt(np.outer(np.diag(true_cov), np.diag(true_cov)))
    assert np.all(bound <= factor * reference + 1e-9 * scale)
    assert np.all(bound <= 0.11 * scale)  # informative: measured at most 0.107 sd_j sd_l (svd)
    value, bound = (cor.column("value").to_numpy().reshape(q, q), cor.column("bound").to_numpy().reshape(q, q))
    assert np.all(np.abs(value - true_cor) <= bound)
    # tight (the code caps a correlation bound at 2, the range, so "<= 2" could never fail):
    # |cos(u, v) - cos(uh, vh)| <= 2 d_u / |uh| + 2 d_v / |vh| with the same reference
    # quantities; measured within 1 + 1e-8 (cur, svd) and 20.9x (quantized), like the covariance,
    # plus at most 8.7e-12 of floating-point terms; the largest bound is 0.18 (svd), far below 2
    relative = 2.0 * distance / spread
    reference = relative[:, None] + relative[None, :]
    np.fill_diagonal(reference, 0.0)
    assert np.all(bound <= factor * reference + 1e-9)
    assert np.all(bound < 0.2)
    assert cor.column_names == ["column_a", "column_b", "value", "bound"]


def test_covariance_refuses_columns_with_nulls(archive):
    with pytest.raises(InvalidInputError, match="'x9' .* has {'nulls'"):
        archive.covariance(["x1", "x9"])


# -- property: bounds hold on random tables -----------------------------------------------------
@settings(max_examples=8, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(seed=st.integers(0, 2**31 - 1), rows=st.integers(40, 600), cols=st.integers(3, 9),
       rank=st.integers(1, 3), method=st.sampled_from(["cur", "svd"]),
       func=st.sampled_from(["avg", "sum"]))
def test_property_aggregate_bounds_hold(tmp_path, seed, rows, cols, rank, method, func):
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((rows, rank)) @ rng.standard_normal((rank, cols))
    x = x * rng.uniform(0.1, 100, cols) + rng.normal(0, 10, cols) + rng.standard_normal(x.shape)
    group = rng.integers(0, 3, rows)
    names = [f"v{j}" for j in range(cols)]
    table = pa.table({"g": pa.array(group), **{n: x[:, j] for j, n in enumerate(names)}})
    path = tmp_path / f"p{seed}_{rows}_{cols}.rankfold"
    # overwrite: hypothesis may draw the same (seed, rows, cols) again within one tmp_path
    archive = rankfold.compress(table, path, rank=rank, method=method, exact_columns=("g",), overwrite=True,
                                batch_rows=max(16, rows // 3))
    result = archive.aggregate(names, func, by="g")
    for k, g in enumerate(result.column("g").to_pylist()):
        sel = x[group == g]
        truth = sel.mean(axis=0) if func == "avg" else sel.sum(axis=0)  # numpy mean / sum
        for j, n in enumerate(names):
            assert abs(result.column(n)[k].as_py() - truth[j]) <= result.column(f"{n}_bound")[k].as_py()
    start = rows // 4
    ranged = archive.aggregate(names, func, rows=slice(start, rows))
    truth = x[start:].mean(axis=0) if func == "avg" else x[start:].sum(axis=0)
    for j, n in enumerate(names):
        assert abs(ranged.column(n)[0].as_py() - truth[j]) <= ranged.column(f"{n}_bound")[0].as_py()
    # whole table: tight against sqrt(n) ||e_j|| of the stored values (see test_whole_table_bounds_are_tight)
    whole = archive.aggregate(names, func)
    stored = ArchiveReader(archive.path).rebuild(columns=names, serve=False).values
    reference = np.sqrt(rows) * np.linalg.norm(x - stored, axis=0)
    scale = np.abs(x).max(axis=0) * rows
    if func == "avg":
        reference, scale = reference / rows, scale / rows
    bound = np.array([whole.column(f"{n}_bound")[0].as_py() for n in names])
    assert np.all(bound <= (1 + 1e-6) * reference + 1e-9 * scale)
