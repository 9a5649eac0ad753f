"""Residual codes stored as previous-row differences (``store/row_differences.py``,
``Coding.difference``): the codec, then whole archives on every read path.

The reference for the codec is a plain Python loop over the rows (a running sum restarted
at each chunk, delta coding: D. Salomon, "Data Compression: The Complete Reference", 4th ed.,
2007, section 1.3.1). For archives, difference coding is lossless on the codes, so an archive
with it must serve exactly what the same compress run without it serves (values, bounds, SQL,
aggregates), and every served value must lie within its bound of the source (numpy on the
invented table).
"""

from __future__ import annotations

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st

import rankfold
from rankfold.udfs.errors import CorruptArchiveError, InvalidInputError
from rankfold.udfs.passes import commit
from rankfold.udfs.store import layout, row_differences
from rankfold.udfs.store.manifest import file_entry, read_manifest, write_manifest
from rankfold.udfs.store.reader import ArchiveReader
from archive_checks import assert_reads_alike, scan as _scan, source_values as _truth, with_specials

K = row_differences.CHUNK_ROWS


def _loop_decode(stored: np.ndarray, rows: np.ndarray, file_first: int) -> np.ndarray:
    """Reference decoder: one row at a time, restarting where the chunk rule says."""
    out, total = [], 0
    for d, r in zip(stored.tolist(), rows.tolist()):
        total = d if (r == file_first or r % K == 0) else total + d
        out.append(total)
    return np.array(out, dtype=np.int64)


@settings(max_examples=60, deadline=None)
@given(st.integers(0, 3 * K), st.integers(0, 2 * K + 50), st.integers(1, 5000), st.integers(0, 2**30 - 1),
       st.integers(0, 2**32 - 1))
def test_codec_round_trip_against_a_loop(file_first, rows, batch, reach, seed):
    rng = np.random.default_rng(seed)
    codes = rng.integers(-reach, reach + 1, size=rows)
    ids = np.arange(file_first, file_first + rows)
    restart = row_differences.chunk_starts(ids, file_first) == ids
    # encoded batch by batch with the carry, as the encode pass does
    stored, previous = [], np.zeros(1)
    for lo in range(0, rows, batch):
        part = codes[lo:lo + batch, None]
        stored.append(row_differences.difference(part, restart[lo:lo + batch], previous)[:, 0])
        previous = part[-1]
    stored = np.concatenate(stored) if stored else np.zeros(0, np.int64)
    np.testing.assert_array_equal(_loop_decode(stored, ids, file_first), codes)
    decoded = row_differences.undifference(stored, row_differences.chunk_starts(ids, file_first))
    np.testing.assert_array_equal(decoded, codes)
    # every stored difference of codes within half the limit fits the limit
    assert np.abs(stored).max(initial=0) <= 2 * reach
    # chunks hold at most K rows and never cross a multiple of K
    starts = row_differences.chunk_starts(ids, file_first)
    assert np.all(ids - starts < K) and np.all(starts // K == ids // K)


def test_chunk_sql_matches_numpy(tmp_path):
    """DuckDB's chunk key from ``_rf_row`` and ``file_row_number`` over two files, the second
    starting at a row that is a multiple of nothing (as after an append)."""
    firsts, sizes = [0, 12_345], [12_345, 20_000]
    paths = []
    for k, (f, m) in enumerate(zip(firsts, sizes)):
        paths.append(tmp_path / f"p{k}.parquet")
        pq.write_table(pa.table({layout.ROW_ID: np.arange(f, f + m)}), paths[-1], row_group_size=3000)
    listed = ", ".join(f"'{p}'" for p in paths)
    got = duckdb.sql(f"SELECT {layout.ROW_ID}, {row_differences.chunk_sql()} AS c FROM "
                     f"read_parquet([{listed}], file_row_number = true) ORDER BY 1").fetchnumpy()
    ids = got[layout.ROW_ID]
    expected = np.where(ids >= firsts[1], row_differences.chunk_starts(ids, firsts[1]),
                        row_differences.chunk_starts(ids, 0))
    np.testing.assert_array_equal(got["c"], expected)


# -- whole archives ------------------------------------------------------------------------------

def _walks(seed: int, m: int, n: int, specials: bool, first: int = 0) -> pa.Table:
    """Invented random walks (numpy Generator), an int32 and a float32 walk, a key, and with
    ``specials`` NULL, NaN and +-inf cells in the float64 walks."""
    rng = np.random.default_rng(seed)
    x = np.cumsum(rng.normal(size=(m, n)), axis=0) + rng.normal(size=n) * 10
    columns = {"id": pa.array(np.arange(first, first + m, dtype=np.int64))}
    for j in range(n):
        values = x[:, j].copy()
        nulls = np.zeros(m, bool)
        if specials:
            nulls = with_specials(values, rng.random(m), (0.01, 0.01, 0.01, 0.01))
        columns[f"w{j}"] = pa.array(values, mask=nulls)
    columns["steps"] = pa.array(np.cumsum(rng.integers(-3, 4, m)).astype(np.int32))
    columns["narrow"] = pa.array((np.cumsum(rng.normal(size=m)) * 0.1).astype(np.float32))
    return pa.table(columns)


def _compress_pair(tmp_path, table, part_rows, batch_rows, tolerance):
    """The same compress run without and with every coded column difference-coded."""
    options = dict(key="id", max_abs_error=tolerance, batch_rows=batch_rows, overwrite=True)
    plain = rankfold.compress(table, tmp_path / "plain", **options)
    coded = rankfold.compress(table, tmp_path / "coded", row_differences="all", **options)
    return rankfold.open(getattr(plain, "path", plain)), rankfold.open(getattr(coded, "path", coded))


def _same_everywhere(plain, coded, table, con) -> None:
    """Python and SQL reads of ``coded`` equal those of ``plain``, and every served value is
    within its bound of the source (``archive_checks.assert_reads_alike``), rows past a
    chunk boundary included; then what only row differences need checked."""
    names = coded.numeric_columns
    m = table.num_rows
    lookups = {0, K - 1, K, min(K + 1, m - 1), m - 1, m // 2}
    a, b, sa, sb, truth = assert_reads_alike(plain, coded, table, con, lookups, cell_column=names[0],
                                             view="coded_view")
    for row in sorted(lookups):  # a named predicate decodes one chunk
        named = _scan(con, coded.path, predicate=f"'id = {int(sb['id'][row])}'")
        for n in names:
            np.testing.assert_array_equal(named[n], sb[n][row:row + 1])
    # covariance of the stored values (one pass over them when residuals are coded)
    clean = [n for n in names if np.isfinite(truth[:, names.index(n)]).all()]  # the others are refused
    got_cov, want_cov = coded.covariance(clean), plain.covariance(clean)
    np.testing.assert_array_equal(got_cov.column("value").to_numpy(), want_cov.column("value").to_numpy())
    # aggregates: as the plain archive's, over every row, a predicate and a row range
    for where, rows in ((None, None), ("id % 5 <> 1", None), (None, slice(K - 10, min(m, K + 700)))):
        got = coded.aggregate(names, "sum", where=where, rows=rows)
        want = plain.aggregate(names, "sum", where=where, rows=rows)
        assert got.column_names == want.column_names
        for n in got.column_names:  # NaN where a column holds NaN cells, in both; DuckDB's sums
            # of doubles may add in another order (measured: 4e-16 relative)
            np.testing.assert_allclose(got.column(n).to_numpy(), want.column(n).to_numpy(), rtol=1e-12,
                                       err_msg=n)
    sql_sum = con.sql(f"SELECT * FROM rankfold_aggregate('{coded.path}', {names!r}, func := 'sum', "
                      "predicate := 'id % 3 = 0')").fetchnumpy()
    stored = ArchiveReader(coded.path).rebuild(serve=False)
    keep = (np.arange(m) % 3 == 0)[:, None] & ~stored.nulls
    for t, n in enumerate(names):
        column = np.where(keep[:, t], stored.values[:, t], 0.0)
        if np.isfinite(column).all():  # numpy's sum of the stored values (columns without inf/NaN)
            assert abs(sql_sum[n][0] - column.sum()) <= sql_sum[n + "_bound"][0] + 1e-9 * np.abs(column).sum()


@pytest.fixture()
def small_parts(monkeypatch):
    """Row files of a given number of rows (several per archive)."""
    def use(rows: int) -> None:
        monkeypatch.setattr(commit.ArchiveWriter.__init__, "__defaults__", (rows,))
    return use


@settings(max_examples=5, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture],
          phases=[Phase.explicit, Phase.reuse, Phase.generate])
@given(seed=st.integers(0, 2**31), m=st.integers(K + 1, 2 * K + 300), part_rows=st.integers(2000, 12_000),
       batch_rows=st.sampled_from([1000, 3001, 8192, 20_000]), specials=st.booleans(),
       tolerance=st.sampled_from([0.3, 0.05]))
def test_archive_reads_equal_without_differences(tmp_path_factory, small_parts, seed, m, part_rows,
                                                 batch_rows, specials, tolerance):
    tmp_path = tmp_path_factory.mktemp("pair")
    small_parts(part_rows)
    table = _walks(seed, m, 3, specials)
    plain, coded = _compress_pair(tmp_path, table, part_rows, batch_rows, tolerance)
    model = coded._reader.model
    assert model.difference.any() and not plain._reader.model.difference.any()
    np.testing.assert_array_equal(model.difference, np.isfinite(model.residual_step))
    con = duckdb.connect()
    rankfold.udfs.register(con)
    _same_everywhere(plain, coded, table, con)
    # append: new row files start at a row that is a multiple of nothing
    more = _walks(seed + 1, 3000 + seed % 5000, 3, specials, first=m)
    plain2, coded2 = plain.append(more), coded.append(more)
    both = pa.concat_tables([table, more])
    assert coded2._reader.parts[-1][0] == m
    _same_everywhere(plain2, coded2, both, con)
    report = rankfold.verify(coded2.path, both)  # verification: files and every bound
    assert report["ok"], report["problems"]


def test_stored_differences_fit_and_start_each_chunk(tmp_path, small_parts):
    """What the row files hold: the code at each chunk's first row (a row file's first row or
    a multiple of K), the difference elsewhere; decoding by hand gives the plain archive's codes."""
    small_parts(10_000)
    table = _walks(3, 2 * K + 100, 2, True)
    plain, coded = _compress_pair(tmp_path, table, 10_000, 3001, 0.05)
    name = layout.CODE_PATTERN.format(1)
    for (first, rows, file, _), (_, _, plain_file, _) in zip(coded._reader.parts, plain._reader.parts):
        stored = pq.read_table(coded.path / file, columns=[name]).column(name)
        codes = pq.read_table(plain.path / plain_file, columns=[name]).column(name)
        # NULL cells are NULL in both (a NULL difference is 0: row_differences.carry_forward)
        assert codes.null_count > 0
        np.testing.assert_array_equal(stored.is_null().to_numpy(zero_copy_only=False),
                                      codes.is_null().to_numpy(zero_copy_only=False))
        known = ~codes.is_null().to_numpy(zero_copy_only=False)
        stored, codes = stored.fill_null(0).to_numpy(), codes.fill_null(0).to_numpy()
        signed = lambda u: np.where(u % 2 == 0, u // 2, -((u.astype(np.int64) + 1) // 2))  # noqa: E731
        ids = np.arange(first, first + rows)
        np.testing.assert_array_equal(_loop_decode(signed(stored.astype(np.int64)), ids, first)[known],
                                      signed(codes.astype(np.int64))[known])


def test_codes_beyond_half_the_type_go_to_exact_cells(tmp_path):
    """A difference-coded column keeps |code| within half the type's zigzag limit (2^30 - 1 for
    uint32): residual codes between that and 2^31 - 1 become exact cells, the served values
    stay within the tolerance."""
    rng = np.random.default_rng(5)
    m = 3000
    base = rng.normal(size=m)
    columns = {"id": np.arange(m)}
    for name in "abc":  # spikes of about 1.5e9 steps (step 0.02) in a few rows of each column
        spikes = np.where(rng.random(m) < 0.02, 1.5e9 * 0.02, 0.0) * np.sign(rng.normal(size=m))
        columns[name] = base + 0.01 * rng.normal(size=m) + spikes
    table = pa.table(columns)
    options = dict(key="id", max_abs_error=0.01, rank=1, overwrite=True)
    plain = rankfold.compress(table, tmp_path / "plain", **options)
    coded = rankfold.compress(table, tmp_path / "coded", row_differences="all", **options)
    assert coded._reader.model.difference.any()
    assert coded._reader.cell_rows.size > plain._reader.cell_rows.size
    values = coded._reader.rebuild()
    truth = _truth(table, coded.numeric_columns)
    finite = np.isfinite(truth)
    assert np.all(np.abs(values.values[finite] - truth[finite]) <= values.bounds[finite])
    assert np.all(values.bounds <= 0.01)


def test_flag_on_a_column_without_codes_is_refused(tmp_path):
    table = _walks(1, 2000, 2, False)
    # a basis of a given size is kept (no trial drops it): its column has no residual codes
    path = rankfold.compress(table, tmp_path / "a", key="id", max_abs_error=0.05, rank=1, n_columns=1).path
    reader = ArchiveReader(path)
    name = layout.table_file(reader.manifest, layout.COLUMNS)
    columns = pq.read_table(path / name)
    flags = ~np.isfinite(reader.model.residual_step)  # exactly the columns without codes
    assert flags.any()
    edited = columns.append_column("difference", pa.array(flags))
    pq.write_table(edited, path / name)
    manifest = read_manifest(path)
    manifest["files"] = [file_entry(path, name) if e["name"] == name else e for e in manifest["files"]]
    write_manifest(path, manifest)  # sealed again: only the flag is wrong
    with pytest.raises(CorruptArchiveError, match="row differences"):
        ArchiveReader(path)


def test_row_differences_option_is_checked(tmp_path):
    table = _walks(1, 500, 2, False)
    with pytest.raises(InvalidInputError, match="not numeric columns"):
        rankfold.compress(table, tmp_path / "a", key="id", max_abs_error=0.05, row_differences=["nope"])
    with pytest.raises(InvalidInputError, match="non-empty list of numeric column names"):
        rankfold.compress(table, tmp_path / "b", key="id", max_abs_error=0.05, row_differences=[1])
    with pytest.raises(rankfold.UnknownOptionError, match="'row_differences' option of compress must be one of"):
        rankfold.compress(table, tmp_path / "c", key="id", max_abs_error=0.05, row_differences="w0")
    with pytest.raises(InvalidInputError, match="needs max_abs_error or max_std_error"):
        rankfold.compress(table, tmp_path / "d", key="id", rank=1, row_differences="all")
    named = rankfold.compress(table, tmp_path / "e", key="id", max_abs_error=0.05, row_differences=["w0"])
    model = named._reader.model
    assert model.difference.tolist() == [n == "w0" and np.isfinite(model.residual_step[j])
                                         for j, n in enumerate(model.names)]


def test_filtered_reads_decode_only_their_chunks(tmp_path, small_parts):
    """A predicate touching few chunks reads and decodes only those (row ranges named in the
    SQL), and serves what the archive without differences serves."""
    from rankfold.udfs.sql.tables import scan_sql

    small_parts(3 * K - 1000)  # row files starting at rows that are multiples of nothing
    m = 5 * K + 123
    table = _walks(8, m, 2, True)
    plain, coded = _compress_pair(tmp_path, table, 3 * K - 1000, 4000, 0.05)
    con = duckdb.connect()
    rankfold.udfs.register(con)
    names = coded.numeric_columns
    cursor = con.cursor()
    for predicate in (f"id = {K + 5}", f"id BETWEEN {3 * K - 2} AND {3 * K + 2}", f"id % 9 = 0 AND id < {2 * K}",
                      f"id = {m - 1} OR id = {3 * K - 1000}"):
        sql = scan_sql(coded._reader, None, "cell", predicate, cursor)
        assert f"{layout.ROW_ID} >= " in sql  # only the chunks of the rows kept are decoded
        got = _scan(con, coded.path, predicate=repr(predicate))
        want = _scan(con, plain.path, predicate=repr(predicate))
        assert got["id"].size and np.array_equal(got["id"], want["id"])
        for n in names:
            np.testing.assert_array_equal(got[n], want[n])
            np.testing.assert_array_equal(got[n + "_bound"] if n + "_bound" in got else got["_rf_bound"],
                                          want[n + "_bound"] if n + "_bound" in want else want["_rf_bound"])
        a = coded.aggregate(names, "sum", where=predicate)
        b = plain.aggregate(names, "sum", where=predicate)
        for n in a.column_names:
            np.testing.assert_allclose(a.column(n).to_numpy(), b.column(n).to_numpy(), rtol=1e-12, err_msg=n)


@settings(max_examples=12, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large,
                                 HealthCheck.function_scoped_fixture])
@given(seed=st.integers(0, 2**32 - 1), m=st.integers(1, 400), n=st.integers(1, 6),
       scale=st.sampled_from(["unit", "decades", "huge_mean", "extreme"]), specials=st.booleans(),
       tolerance=st.sampled_from([0.1, 0.01]), batch_rows=st.sampled_from([7, 64, 1000]))
def test_every_bound_holds_on_invented_tables(tmp_path_factory, invented_table, table_truth, assert_tight,
                                              seed, m, n, scale, specials, tolerance, batch_rows):
    """The shared invented tables (conftest: float64, float32, int64 and int32 columns, scales up
    to 1e150, NULL/NaN/inf cells) under ``max_std_error`` with every coded column difference-coded
    (a chunk crossing many batches): every served value is within its bound of the source, the
    bounds are tight, and SQL serves what the archive without differences serves."""
    table = invented_table(seed, m, n, scale, specials)
    tmp_path = tmp_path_factory.mktemp("invented")
    options = dict(max_std_error=tolerance, batch_rows=batch_rows)
    plain = rankfold.compress(table, tmp_path / "plain", **options)
    coded = rankfold.compress(table, tmp_path / "coded", row_differences="all", **options)
    model = coded._reader.model
    assert np.array_equal(model.difference, np.isfinite(model.residual_step))
    truth, _ = table_truth(table)
    values, bounds = coded.to_numpy(), coded.cell_bounds()
    finite = np.isfinite(truth)
    with np.errstate(invalid="ignore", over="ignore"):
        assert np.all(np.abs(truth - values)[finite] <= bounds[finite])
    assert np.array_equal(values, plain.to_numpy(), equal_nan=True)
    assert np.array_equal(bounds, plain.cell_bounds())
    assert_tight(coded, table, truth, values, bounds)
    con = duckdb.connect()
    rankfold.udfs.register(con)
    a = con.sql(f"SELECT * FROM rankfold_scan('{plain.path}') ORDER BY _rf_row").fetchnumpy()
    b = con.sql(f"SELECT * FROM rankfold_scan('{coded.path}') ORDER BY _rf_row").fetchnumpy()
    for name in coded.numeric_columns + ["_rf_bound"]:
        np.testing.assert_array_equal(b[name], a[name])


def test_auto_keeps_row_differences_where_the_trial_measures_them_smaller(tmp_path):
    # random walks change slowly from row to row: their codes' differences are small (delta
    # coding of series: D. Salomon, "Data Compression: The Complete Reference", section 1.3.1);
    # independent draws gain nothing from them
    walks = _walks(3, 20_000, 3, False)
    rng = np.random.default_rng(4)  # invented, independent draws
    noise = pa.table({"id": np.arange(20_000), **{f"u{j}": rng.normal(size=20_000) for j in range(3)}})
    table = pa.table({**{n: walks.column(n) for n in walks.column_names},
                      **{n: noise.column(n) for n in noise.column_names if n != "id"}})
    archive = rankfold.compress(table, tmp_path / "a", key="id", max_std_error=0.001, row_differences="auto")
    model = archive._reader.model
    flagged = {n for n, f in zip(model.names, model.difference) if f}
    assert {"w0", "w1", "w2"} <= flagged and not flagged & {"u0", "u1", "u2"}, flagged
    off = rankfold.compress(table, tmp_path / "b", key="id", max_std_error=0.001)
    assert not off._reader.model.difference.any()  # off by default
    assert archive.nbytes < off.nbytes
    truth = _truth(table, archive.numeric_columns)
    rebuilt = archive._reader.rebuild()
    assert np.all(np.abs(rebuilt.values - truth) <= rebuilt.bounds)
    np.testing.assert_array_equal(rebuilt.values, archive.to_numpy())
