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
DTYPES = (pa.float64(), pa.float32(), pa.int64(), pa.int32())

SETTINGS = settings(max_examples=50, deadline=None, derandomize=True,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])


# -- invented tables ----------------------------------------------------------------------------
def _invent(seed: int, m: int, n: int, scale: str, specials: bool) -> pa.Table:
    """A table of m rows and n numeric columns, near low rank, from ``seed`` (see module doc)."""
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


def _truth(table: pa.Table) -> tuple[np.ndarray, np.ndarray]:
    """The source as float64 (m, n) with NaN where NULL, and the NULL mask."""
    values, nulls = [], []
    for column in table.columns:
        null = column.is_null().to_numpy(zero_copy_only=False)
        filled = column.fill_null(0).to_numpy(zero_copy_only=False).astype(np.float64)
        values.append(np.where(null, np.nan, filled))
        nulls.append(null)
    return np.column_stack(values), np.column_stack(nulls)


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
    return _invent(data_seed, m, n, scale, specials), options


def _compress(factory, table: pa.Table, options: dict) -> rankfold.Archive:
    path = factory.mktemp("bounds") / "table.rankfold"
    return rankfold.compress(table, path, **options)


# -- properties ---------------------------------------------------------------------------------
@SETTINGS
@given(case=cases())
def test_no_cell_exceeds_its_bound(tmp_path_factory, case):
    table, options = case
    archive = _compress(tmp_path_factory, table, options)
    truth, nulls = _truth(table)
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

    rebuilt = archive.rebuild()
    for j, name in enumerate(archive.numeric_columns):
        column = rebuilt.column(name)
        assert column.type == table.schema.field(name).type
        assert np.array_equal(column.is_null().to_numpy(zero_copy_only=False), nulls[:, j])

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
def test_subset_rebuild_is_the_slice_of_the_full_rebuild(tmp_path_factory, case, picks):
    table, options = case
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
def test_degenerate_shapes_hold_their_bounds(tmp_path, m, n):
    table = _invent(m * 100 + n, m, n, "decades", specials=True)
    archive = rankfold.compress(table, tmp_path / "edge.rankfold", rank=1)
    truth, _ = _truth(table)
    values, bounds = archive.to_numpy(), archive.cell_bounds()
    finite = np.isfinite(truth)
    assert np.all(np.abs(truth - values)[finite] <= bounds[finite])
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
