"""Property tests of the error model (design section 5): no rebuilt cell ever exceeds its bound.

Every example invents a table from a drawn seed: a few latent factors plus noise, then per
column a scale (spanning many decades, a huge mean with a small spread, or values up to
~1e150), a dtype (float64, float32, int64, int32) and a pattern of NULL, NaN and +-inf
cells. It is compressed with a drawn method, column and row choice, link, transform, rank,
seed and block size (so passes stream several blocks), and every cell is checked against
the archive's own bound:

* finite cells: |true - to_numpy| <= cell_bounds, and ``cell()`` gives the same value and bound;
* NULL cells: NaN in ``to_numpy``, NULL in ``rebuild()``; NaN cells: NaN; +-inf: the same inf;
* a rebuild of any subset (random, repeated and negative positions, any columns) is exactly
  the matching slice of the full rebuild.

The difference true - rebuilt is computed in float64. Rounding to nearest is monotonic and
every bound is a float64, so |true - rebuilt| <= bound exactly implies the computed check
passes: the check is never looser than the exact statement.
"""

from __future__ import annotations

import itertools

import numpy as np
import pyarrow as pa
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import rankfold
from rankfold.udfs.store.reader import ArchiveReader

CUR_COMBINATIONS = [
    {"method": "cur", "column_method": c, "row_method": r, "link": link}
    for c, r, link in itertools.product(("pivoted_qr", "leverage", "length_squared"),
                                        ("qdeim", "leverage", "length_squared"),
                                        ("optimal", "skeleton", "textbook"))
    if not (link == "textbook" and c == "pivoted_qr")  # textbook needs sampled columns
] + [{"method": "cur", "column_method": c, "link": "cx"}  # cx keeps no rows
     for c in ("pivoted_qr", "leverage", "length_squared")]
METHODS = CUR_COMBINATIONS + [{"method": "svd"}]
TRANSFORMS = ("standardize", "center", "none")
SCALES = ("unit", "decades", "huge_mean", "extreme")

SETTINGS = settings(max_examples=50, deadline=None, derandomize=True,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])


@st.composite
def cases(draw):
    m = draw(st.integers(1, 60))
    n = draw(st.integers(1, 12))
    scale = draw(st.sampled_from(SCALES))
    specials = draw(st.booleans())
    method = draw(st.sampled_from(METHODS))
    options = dict(method)
    options["transform"] = draw(st.sampled_from(TRANSFORMS))
    options["rank"] = draw(st.one_of(st.none(), st.integers(1, min(m, n))))
    options["seed"] = draw(st.integers(0, 2**32 - 1))
    batch_rows = draw(st.sampled_from([None, 1, 7, 16]))  # several blocks per pass
    if batch_rows is not None:
        options["batch_rows"] = batch_rows
    data_seed = draw(st.integers(0, 2**32 - 1))
    return (data_seed, m, n, scale, specials), options  # invented_table(*spec): see conftest


def _compress(factory, table: pa.Table, options: dict) -> rankfold.Archive:
    path = factory.mktemp("bounds") / "table.rankfold"
    return rankfold.compress(table, path, **options)


# -- properties ---------------------------------------------------------------------------------
@SETTINGS
@given(case=cases())
def test_no_cell_exceeds_its_bound(tmp_path_factory, invented_table, table_truth, assert_tight, case):
    spec, options = case
    table = invented_table(*spec)
    archive = _compress(tmp_path_factory, table, options)
    truth, nulls = table_truth(table)
    values = archive.to_numpy()
    bounds = archive.cell_bounds()
    assert values.shape == bounds.shape == truth.shape == archive.shape
    assert values.dtype == bounds.dtype == np.float64

    finite = np.isfinite(truth)
    assert np.all(np.isfinite(bounds)) and np.all(bounds >= 0)
    with np.errstate(invalid="ignore", over="ignore"):
        error = np.abs(truth - values)
    exceeded = finite & ~(error <= bounds)
    assert not exceeded.any(), (
        f"{int(exceeded.sum())} cells exceed their bound, first at {np.argwhere(exceeded)[0]}: "
        f"true {truth[exceeded][0]!r}, rebuilt {values[exceeded][0]!r}, bound {bounds[exceeded][0]!r}"
    )
    # NULL, NaN and +-inf cells come back exactly, with bound 0
    assert np.array_equal(np.isnan(values), np.isnan(truth))
    assert np.array_equal(values[np.isinf(truth)], truth[np.isinf(truth)])
    assert np.all(bounds[~finite] == 0.0)
    # and no bound is uselessly loose: each is within rounding of the errors it summarizes
    assert_tight(archive, table, truth, values, bounds)

    rebuilt = archive.rebuild()
    for j, name in enumerate(archive.numeric_columns):
        column = rebuilt.column(name)
        assert column.type == table.schema.field(name).type
        assert np.array_equal(column.is_null().to_numpy(zero_copy_only=False), nulls[:, j])
        # the typed value rebuild() returns (integers rounded, float32 narrowed) is the value
        # whose bound cell_bounds() reports, and it stays in the column's observed range
        typed = column.cast(pa.float64()).fill_null(np.nan).to_numpy()
        assert np.array_equal(typed, values[:, j], equal_nan=True)
        ok = finite[:, j]
        if ok.any():
            assert np.all(np.abs(truth[ok, j] - typed[ok]) <= bounds[ok, j])
            assert np.all((typed[ok] >= truth[ok, j].min()) & (typed[ok] <= truth[ok, j].max()))
        if pa.types.is_integer(column.type):
            assert np.array_equal(bounds[ok, j], np.rint(bounds[ok, j]))  # whole-number bounds

    rng = np.random.default_rng(options["seed"])
    for _ in range(3):
        i = int(rng.integers(truth.shape[0]))
        j = int(rng.integers(truth.shape[1]))
        cell = archive.cell(i, archive.numeric_columns[j])
        # one cell and the bulk rebuild may sum in different BLAS orders: both are within the
        # bound of the truth, and they agree to the last bits (the slack covers the difference)
        assert cell.bound == pytest.approx(bounds[i, j], rel=1e-12, abs=0)
        if nulls[i, j]:
            assert cell.value is None
        elif np.isfinite(truth[i, j]):
            assert abs(cell.value - truth[i, j]) <= cell.bound
            assert abs(cell.value - values[i, j]) <= cell.bound
        else:
            assert cell.value == values[i, j] or (np.isnan(cell.value) and np.isnan(values[i, j]))


@SETTINGS
@given(case=cases(), picks=st.data())
def test_subset_rebuild_is_the_slice_of_the_full_rebuild(tmp_path_factory, invented_table, case, picks):
    spec, options = case
    table = invented_table(*spec)
    archive = _compress(tmp_path_factory, table, options)
    m, n = archive.shape
    full_values = archive.to_numpy()
    full_bounds = archive.cell_bounds()
    rows = picks.draw(st.lists(st.integers(-m, m - 1), min_size=0, max_size=2 * m), label="rows")
    cols = picks.draw(st.lists(st.integers(0, n - 1), min_size=1, max_size=n, unique=True), label="cols")
    names = [archive.numeric_columns[j] for j in cols]
    values = archive.to_numpy(rows, names)
    bounds = archive.cell_bounds(rows, names)
    expected = np.ix_(np.asarray(rows, dtype=np.int64) % m, cols)
    assert values.shape == bounds.shape == (len(rows), len(cols))
    # a subset may be summed in another BLAS order than the full rebuild: exact cells are
    # identical, approximated ones agree within the floating-point slack included in the bound
    _assert_same_rebuild(values, bounds, full_values[expected], full_bounds[expected])
    # slices address the same rows as the equivalent position lists
    window = slice(picks.draw(st.integers(-m, m), label="start"), None,
                   picks.draw(st.sampled_from([1, 2, -1, -3]), label="step"))
    _assert_same_rebuild(archive.to_numpy(window, names), archive.cell_bounds(window, names),
                         full_values[:, cols][window], full_bounds[:, cols][window])


def _assert_same_rebuild(values, bounds, ref_values, ref_bounds):
    exact = ref_bounds == 0
    assert np.array_equal(bounds == 0, exact)
    assert np.array_equal(values[exact], ref_values[exact], equal_nan=True)
    np.testing.assert_allclose(bounds, ref_bounds, rtol=1e-12, atol=0)
    with np.errstate(invalid="ignore", over="ignore"):
        assert np.all(np.abs(values[~exact] - ref_values[~exact]) <= ref_bounds[~exact])


# -- deterministic edges ------------------------------------------------------------------------
@pytest.mark.parametrize("m, n", [(1, 1), (1, 7), (7, 1), (3, 9), (60, 2)])
def test_degenerate_shapes_hold_their_bounds(tmp_path, invented_table, table_truth, assert_tight, m, n):
    table = invented_table(m * 100 + n, m, n, "decades", specials=True)
    archive = rankfold.compress(table, tmp_path / "edge.rankfold", rank=1)
    truth, _ = table_truth(table)
    values, bounds = archive.to_numpy(), archive.cell_bounds()
    finite = np.isfinite(truth)
    assert np.all(np.abs(truth - values)[finite] <= bounds[finite])
    assert_tight(archive, table, truth, values, bounds)
    assert np.array_equal(np.isnan(values), np.isnan(truth))


def test_bound_is_attained_in_every_row(tmp_path):
    """Not uselessly loose: every approximated row has a cell whose bound is its true error
    up to the ledger's storage precision: the row ledger keeps the row's largest error
    rounded up to 8 mantissa bits (at most 2^-7 relative, see arithmetic.round_up_compact)."""
    rng = np.random.default_rng(7)
    block = rng.normal(size=(200, 3)) @ rng.normal(size=(3, 20)) + 0.01 * rng.normal(size=(200, 20))
    block *= 10.0 ** rng.integers(-3, 4, size=20)  # columns in different units
    archive = rankfold.compress(block, tmp_path / "tight.rankfold", rank=3)
    values, bounds = archive.to_numpy(), archive.cell_bounds()
    error = np.abs(block - values)
    assert np.all(error <= bounds)
    # served values are clamped into each column's range, which can only shrink an error:
    # attainment is a property of the values as stored
    stored = ArchiveReader(archive.path).rebuild(serve=False)
    assert np.array_equal(stored.bounds, bounds)
    error = np.abs(block - stored.values)
    approximated = bounds.max(axis=1) > 0
    assert approximated.sum() > 100
    attained = (bounds > 0) & (bounds <= error * (1 + 2.0**-7) + 1e-13 * np.abs(block))
    assert np.all(attained.any(axis=1)[approximated])


def test_integer_beyond_two_to_the_53_is_not_factored(tmp_path):
    """2^53 + 1 reads as 2^53 in float64: such a column must be kept exactly, not rebuilt."""
    table = pa.table({"big": pa.array([2**53 + 1, 5, 7, 9], pa.int64()),
                      "a": [1.0, 2.0, 3.5, 4.0], "b": [2.0, 1.0, 0.0, -1.5]})
    archive = rankfold.compress(table, tmp_path / "big.rankfold", rank=1)
    assert archive.numeric_columns == ["a", "b"]
    assert archive.rebuild().column("big").to_pylist() == [2**53 + 1, 5, 7, 9]


def test_all_null_integer_column_stays_numeric(tmp_path):
    """An all-NULL column has no range; it is still a numeric column, rebuilt as NULLs."""
    table = pa.table({"empty": pa.array([None, None, None], pa.int32()),
                      "a": [1.0, 2.0, 3.5], "b": [2.0, 1.0, 0.0]})
    archive = rankfold.compress(table, tmp_path / "nulls.rankfold", rank=1)
    assert archive.numeric_columns == ["empty", "a", "b"]
    assert archive.rebuild().column("empty").null_count == 3
    assert np.all(np.isnan(archive.to_numpy(columns="empty")))


def test_rows_with_zero_weight_give_an_archive_without_anchor_rows(tmp_path):
    """A single standardized row has all-zero weights: sampling picks no anchor row."""
    table = pa.table({f"c{j}": [float(j)] for j in range(5)})
    archive = rankfold.compress(table, tmp_path / "one.rankfold", rank=1, column_method="leverage",
                                row_method="leverage", link="textbook")
    assert np.array_equal(archive.to_numpy(), np.arange(5.0)[None, :])


@st.composite
def integer_cases(draw):
    """Small-integer tables (counts, grades: few distinct values) at low rank, where bounds
    are often above 1/2 and rounding decides the served value."""
    m = draw(st.integers(2, 50))
    n = draw(st.integers(2, 8))
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    latent = rng.normal(size=(m, 1)) @ rng.normal(size=(1, n)) * draw(st.sampled_from([1.0, 3.0, 30.0]))
    block = np.rint(latent + rng.normal(size=(m, n)) * draw(st.sampled_from([0.3, 2.0])))
    if draw(st.booleans()):
        block = np.abs(block)  # non-negative counts: the range clamps at 0
    types = [draw(st.sampled_from([pa.int64(), pa.int32(), pa.int16()])) for _ in range(n)]
    table = pa.table({f"k{j}": pa.array(block[:, j].astype(t.to_pandas_dtype()), t)
                      for j, t in enumerate(types)})
    options = {"rank": draw(st.integers(1, min(2, m, n))), "seed": draw(st.integers(0, 2**16))}
    if draw(st.booleans()):
        options["max_abs_error"] = draw(st.sampled_from([0.4, 1.0, 2.5]))
    return table, options


@settings(max_examples=25, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(case=integer_cases())
def test_integer_columns_rounded_within_their_bounds(tmp_path_factory, table_truth, assert_tight, case):
    """Python and SQL serve the same kind of value: a whole number in the column's range,
    whose (whole-number) bound holds for it."""
    import duckdb

    import rankfold.udfs

    table, options = case
    archive = _compress(tmp_path_factory, table, options)
    truth, _ = table_truth(table)
    values, bounds = archive.to_numpy(), archive.cell_bounds()
    assert np.array_equal(values, np.rint(values)) and np.array_equal(bounds, np.rint(bounds))
    assert np.all(np.abs(truth - values) <= bounds)
    assert np.all((values >= truth.min(axis=0)) & (values <= truth.max(axis=0)))
    assert_tight(archive, table, truth, values, bounds)  # rounding widens a bound by 1/2 at most
    con = duckdb.connect()
    try:
        rankfold.udfs.register(con)
        scan = con.sql(f"SELECT * FROM rankfold_scan('{archive.path}', bounds := 'cell') "
                       "ORDER BY _rf_row").to_arrow_table()
    finally:
        con.close()
    names = archive.numeric_columns
    sql_values = np.column_stack([scan.column(n).to_numpy() for n in names])
    sql_bounds = np.column_stack([scan.column(f"{n}_bound").to_numpy() for n in names])
    assert np.array_equal(sql_values, np.rint(sql_values))
    assert np.all(np.abs(truth - sql_values) <= sql_bounds)
    assert np.all((sql_values >= truth.min(axis=0)) & (sql_values <= truth.max(axis=0)))
