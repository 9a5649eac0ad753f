"""Residual codes packed into one list column per row file (``store/packed_codes.py``).

Packing is lossless on the codes, so an archive written packed must serve exactly what the
same compress run writes with one column per code (values, bounds, SQL scan, the plain-SQL
view, point lookups, aggregates, append), and every served value must lie within its bound
of the source (numpy on the invented table). The trial (``code_layout.choose_packing``) is
checked to pick packed on a short wide table and one column per code on a tall one; the
sizes it compares come from pyarrow's own writer (Apache Parquet format specification,
"Nested encoding": a list column costs one column chunk whatever its length).
"""

from __future__ import annotations

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import rankfold
from archive_checks import assert_reads_alike, source_values as _truth, with_specials
from rankfold.udfs.errors import CorruptArchiveError
from rankfold.udfs.passes import compress as compress_module
from rankfold.udfs.passes.coding import code_packing
from rankfold.udfs.passes.profile import Transform
from rankfold.udfs.store import layout, packed_codes, row_differences
from rankfold.udfs.store.code_layout import PackingChoice, choose_packing
from rankfold.udfs.store.model import Coding, Mixing
from rankfold.udfs.store.reader import ArchiveReader


def _wide(seed: int, m: int, n: int, specials: bool, first: int = 0) -> pa.Table:
    """An invented short wide table (numpy Generator, fixed seed): rank 3 plus noise, a key,
    an int32 and a float32 column, and with ``specials`` NULL, NaN and +-inf cells."""
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(m, 3)) @ rng.normal(size=(3, n)) + 0.3 * rng.normal(size=(m, n))
    columns = {"id": pa.array(np.arange(first, first + m, dtype=np.int64))}
    for j in range(n):
        values = x[:, j].copy()
        nulls = np.zeros(m, bool)
        if specials and j % 7 == 0:
            nulls = with_specials(values, rng.random(m), (0.03, 0.02, 0.02, 0.05))
        columns[f"c{j}"] = pa.array(values, mask=nulls)
    columns["count"] = pa.array(np.round(x[:, 0] * 40).astype(np.int32))
    columns["narrow"] = pa.array(x[:, 1].astype(np.float32))
    return pa.table(columns)


def _forced(monkeypatch, packed: bool) -> None:
    """Make compress write the given layout whatever its trial would say."""
    monkeypatch.setattr(compress_module, "code_packing",
                        lambda *args, **kwargs: PackingChoice(packed, 0, 0, 0))


def _same_everywhere(plain, packed, table, con, rows: tuple[int, ...] = ()) -> None:
    """Python and SQL reads of ``packed`` equal those of ``plain``; every served value lies
    within its bound of the source (``archive_checks.assert_reads_alike``); then the other
    read paths over packed codes."""
    names = packed.numeric_columns
    m = table.num_rows
    # one row may be summed in another BLAS order than all of them (the slack covers it)
    a, b, sa, sb, truth = assert_reads_alike(plain, packed, table, con, {0, 1, m // 2, m - 1, *rows},
                                             cell_column=names[1], view="packed_view", single_rtol=1e-13)
    np.testing.assert_array_equal(b.nulls, a.nulls)
    np.testing.assert_array_equal(np.isnan(b.values), np.isnan(truth))  # NULL and NaN cells as they were
    from rankfold.sql_view import query, select_rows

    np.testing.assert_array_equal(select_rows(packed, "id % 7 = 3"), np.flatnonzero(sb["id"] % 7 == 3))
    queried = query(packed, f'SELECT "{names[2]}" FROM archive ORDER BY id')  # the Python SQL view
    np.testing.assert_array_equal(queried.column(0).to_numpy(zero_copy_only=False), sa[names[2]])
    errors = con.sql(f"SELECT * FROM rankfold_row_errors('{packed.path}') ORDER BY _rf_row").fetchnumpy()
    assert errors[layout.ROW_ID].size == m
    for where in (None, "id % 5 <> 1"):
        got = packed.aggregate(names[:40], "sum", where=where)
        want = plain.aggregate(names[:40], "sum", where=where)
        assert got.column_names == want.column_names
        for n in got.column_names:  # DuckDB's sums of doubles may add in another order
            np.testing.assert_allclose(got.column(n).to_numpy(), want.column(n).to_numpy(), rtol=1e-12, err_msg=n)


def test_packed_archive_reads_as_the_per_column_one(tmp_path, monkeypatch):
    """40 x 120 (short and wide): the trial packs; forced per-column gives the same reads."""
    table = _wide(4, 40, 120, specials=True)
    options = dict(key="id", max_abs_error=0.05)
    packed = rankfold.compress(table, tmp_path / "packed", **options)
    assert packed.manifest.get("packed_codes") is True
    _forced(monkeypatch, False)
    plain = rankfold.compress(table, tmp_path / "plain", **options)
    assert "packed_codes" not in plain.manifest  # the per-column form: as archives written before
    schema = pq.read_schema(packed.path / packed._reader.parts[0][2])
    assert layout.PACKED_CODES in schema.names and not any(n.startswith("_rf_q_") for n in schema.names)
    assert plain._reader.model.code_names == packed._reader.model.code_names
    assert layout.PACKED_CODES not in pq.read_schema(plain.path / plain._reader.parts[0][2]).names
    assert packed.manifest["method"]["rank"] == plain.manifest["method"]["rank"]
    assert packed.nbytes < plain.nbytes
    con = duckdb.connect()
    rankfold.udfs.register(con)
    _same_everywhere(plain, packed, table, con)
    # append: new row files in each archive's own layout
    more = _wide(5, 23, 120, specials=True, first=40)
    plain2, packed2 = plain.append(more), packed.append(more)
    assert layout.PACKED_CODES in pq.read_schema(packed2.path / packed2._reader.parts[-1][2]).names
    _same_everywhere(plain2, packed2, pa.concat_tables([table, more]), con)
    report = rankfold.verify(packed2.path, pa.concat_tables([table, more]))
    assert report["ok"], report["problems"]


def test_trial_packs_short_wide_codes_and_keeps_tall_ones_per_column():
    """The trial's verdict, on codes of invented columns of different spreads: 40 rows of 600
    columns pack (each column chunk would cost more in footer and headers than its codes);
    a sample of 4,096 rows of 40 columns from a 10^6-row table keeps one column per code."""
    rng = np.random.default_rng(1)
    spread = 2.0 ** rng.integers(0, 10, size=600)
    wide = np.round(rng.normal(size=(40, 600)) * spread)
    choice = choose_packing(np.where(wide >= 0, 2 * wide, -2 * wide - 1).astype(np.uint32), None, 40)
    assert choice.packed and choice.packed_bytes < choice.columns_bytes
    tall = np.round(np.cumsum(rng.normal(size=(4096, 40)), axis=0) * spread[:40])
    choice = choose_packing(np.where(tall >= 0, 2 * tall, -2 * tall - 1).astype(np.uint32), None, 1_000_000)
    assert not choice.packed and choice.columns_bytes < choice.packed_bytes


def test_a_tall_table_keeps_one_column_per_code(tmp_path):
    """Compress itself: 6,000 rows of 8 invented random walks keep one column per code."""
    rng = np.random.default_rng(2)
    x = np.cumsum(rng.normal(size=(6000, 8)), axis=0) * 2.0 ** np.arange(8)
    arch = rankfold.compress(pa.table({f"w{j}": x[:, j] for j in range(8)}), tmp_path / "tall", max_std_error=0.01)
    assert "packed_codes" not in arch.manifest
    assert any(n.startswith("_rf_q_") for n in pq.read_schema(arch.path / arch._reader.parts[0][2]).names)
    from rankfold.udfs.store.aggregate import rows_source_sql

    # the SQL source of its rows is the plain file list, as before packing existed
    assert layout.PACKED_CODES not in rows_source_sql(ArchiveReader(arch.path))


def test_codes_of_a_table_beyond_one_row_group_are_not_offered_packing():
    """Codes that are all zero pack far smaller (each column chunk is then all overhead), but a
    table of more than one row group keeps one column per code: the list's cost at every write
    and read is not worth the few per-chunk bytes (coding.code_packing)."""
    width = 30
    sample = np.zeros((200, width))  # invented: every column constant, so every code is 0
    mixing = Mixing(np.zeros((0, width)), np.zeros(width), np.zeros(0), np.zeros(0, np.int64))
    coding = Coding(np.full(width, 0.5), np.full(width, 1.0), np.zeros(0))
    transform = Transform("none", np.zeros(width), np.ones(width))
    short = code_packing(sample, mixing, coding, transform, None, layout.ROW_GROUP_ROWS)
    assert short is not None and short.packed
    assert code_packing(sample, mixing, coding, transform, None, layout.ROW_GROUP_ROWS + 1) is None


def test_pack_and_unpack_round_trip_in_numpy_and_sql(tmp_path):
    rng = np.random.default_rng(3)
    codes = rng.integers(0, 2**32, size=(9, 5), dtype=np.uint64).astype(np.uint32)
    nulls = rng.random((9, 5)) < 0.2
    names = [layout.CODE_PATTERN.format(j) for j in (0, 2, 3, 7, 11)]
    table = pa.table({layout.ROW_ID: np.arange(9), layout.PACKED_CODES: packed_codes.pack(codes, nulls)})
    back = packed_codes.unpack(table, names)
    for t, n in enumerate(names):
        column = back.column(n)
        np.testing.assert_array_equal(column.is_null().to_numpy(zero_copy_only=False), nulls[:, t])
        np.testing.assert_array_equal(column.fill_null(0).to_numpy()[~nulls[:, t]], codes[~nulls[:, t], t])
    only = packed_codes.unpack(table.slice(3, 4), names, wanted=[names[2]])
    assert only.column_names == [layout.ROW_ID, names[2]]
    np.testing.assert_array_equal(only.column(names[2]).to_pylist(),
                                  [None if nulls[i, 2] else int(codes[i, 2]) for i in range(3, 7)])
    path = tmp_path / "p.parquet"
    pq.write_table(table, path)
    sql = packed_codes.unpacked_sql(f"read_parquet('{path}')", names)  # DuckDB lists count from 1
    got = duckdb.sql(f"SELECT * FROM {sql} ORDER BY {layout.ROW_ID}").to_arrow_table()
    assert got.column_names == [layout.ROW_ID, *names]
    for n in names:
        assert got.column(n).to_pylist() == back.column(n).to_pylist()
    with pytest.raises(CorruptArchiveError, match="do not each list 6 codes"):
        packed_codes.unpack(table, names + ["_rf_q_12"])


def test_a_damaged_packed_row_file_is_refused(tmp_path):
    table = _wide(6, 40, 300, specials=False)
    arch = rankfold.compress(table, tmp_path / "a", key="id", max_abs_error=0.05)
    assert arch.manifest.get("packed_codes") is True
    path = arch.path / arch._reader.parts[0][2]
    meta = pq.ParquetFile(path).metadata.row_group(0)
    leaf = [meta.column(j) for j in range(meta.num_columns) if meta.column(j).path_in_schema == packed_codes.LEAF_PATH][0]
    middle = leaf.data_page_offset + leaf.total_compressed_size // 2
    data = bytearray(path.read_bytes())
    data[middle] ^= 0x10
    path.write_bytes(bytes(data))
    with pytest.raises(rankfold.CorruptArchiveError):
        rankfold.open(arch.path).to_numpy()
    con = duckdb.connect()
    rankfold.udfs.register(con)
    with pytest.raises(duckdb.Error, match="CorruptArchiveError"):
        con.sql(f"SELECT * FROM rankfold_scan('{arch.path}')").fetchall()


@settings(max_examples=6, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(seed=st.integers(0, 2**31), m=st.integers(2, 60), n=st.integers(2, 90), specials=st.booleans(),
       fraction=st.sampled_from([0.3, 0.01]), rank=st.sampled_from([None, 1, 2]))
def test_every_cell_of_a_packed_archive_is_within_its_tolerance(tmp_path_factory, monkeypatch, seed, m, n,
                                                              specials, fraction, rank):
    """Property (hypothesis): packed archives of invented tables, any shape, rank (None: the
    size model's), NULL/NaN/inf and integer columns: every served cell within its tolerance."""
    _forced(monkeypatch, True)
    table = _wide(seed, m, n, specials)
    names = [c for c in table.column_names if c != "id"]
    truth = _truth(table, names)
    spread = np.nanstd(np.where(np.isfinite(truth), truth, np.nan), axis=0)
    tolerance = {c: float(max(fraction * s, 1e-3)) if np.isfinite(s) else 1.0 for c, s in zip(names, spread)}
    options = {} if rank is None else {"rank": rank}
    arch = rankfold.compress(table, tmp_path_factory.mktemp("p") / "a", key="id", max_abs_error=tolerance,
                             **options)
    reader = ArchiveReader(arch.path)
    if reader.model.code_names:  # with fewer than two codes nothing is packed either way
        assert reader.model.packed_codes
    got = reader.rebuild()
    finite = np.isfinite(truth)
    limit = np.array([tolerance[c] for c in got.columns])[None, :]
    assert np.all(np.abs(got.values[finite] - truth[finite]) <= got.bounds[finite])
    assert np.all((got.bounds <= limit)[finite])
    special = ~finite & ~np.isnan(truth)  # +-inf cells served as they were
    np.testing.assert_array_equal(got.values[special], truth[special])
    np.testing.assert_array_equal(got.nulls, np.isnan(truth) & table_nulls(table, names))


def table_nulls(table: pa.Table, names: list[str]) -> np.ndarray:
    return np.column_stack([table.column(n).is_null().to_numpy(zero_copy_only=False) for n in names])


def test_a_packed_row_file_without_its_codes_or_with_other_types_is_refused(tmp_path):
    """The row-file schema check (``table_schemas.check_row_schema``) covers the packed column:
    dropped, or stored as a list of signed integers, the file is refused on open."""
    from rankfold.udfs.store.manifest import file_entry, read_manifest, write_manifest

    table = _wide(7, 30, 60, specials=False)
    for edit, message in ((lambda t: t.drop_columns([layout.PACKED_CODES]), "lacks the column '_rf_codes'"),
                          (lambda t: t.set_column(t.column_names.index(layout.PACKED_CODES), layout.PACKED_CODES,
                                                  t.column(layout.PACKED_CODES).cast(pa.list_(pa.int64()))),
                           "stores '_rf_codes' as list<element: int64>")):
        path = rankfold.compress(table, tmp_path / message[:6], key="id", max_abs_error=0.05).path
        assert read_manifest(path).get("packed_codes") is True
        name = read_manifest(path)["row_parts"][0]["name"]
        pq.write_table(edit(pq.read_table(path / name)), path / name)
        manifest = read_manifest(path)  # sealed again: only the row file's content is wrong
        manifest["files"] = [file_entry(path, name, [layout.ROW_ID, "id"]) if e["name"] == name else e
                             for e in manifest["files"]]
        write_manifest(path, manifest)
        with pytest.raises(CorruptArchiveError, match=message.replace("(", r"\(").replace(")", r"\)")):
            ArchiveReader(path)


def test_no_rows_asked_gives_empty_columns(tmp_path):
    arch = rankfold.compress(_wide(8, 30, 40, specials=False), tmp_path / "a", key="id", max_abs_error=0.05)
    assert arch.manifest.get("packed_codes") is True
    names = arch.numeric_columns[:3]
    assert arch.to_numpy([], names).shape == (0, 3)
    assert arch.cell_bounds([], names).shape == (0, 3)


def test_row_differences_read_alike_packed_and_per_column(tmp_path, monkeypatch):
    """Codes stored as row differences (``store/row_differences.py``) in the packed list: the
    same reads as one column per code, across a restart-chunk boundary and after an append
    (new row files start their own chunks); decoding runs on the unpacked per-column view."""
    k = row_differences.CHUNK_ROWS
    table = _wide(9, k + 700, 12, specials=True)
    options = dict(key="id", max_abs_error=0.05, row_differences="all")
    _forced(monkeypatch, False)
    plain = rankfold.compress(table, tmp_path / "plain", **options)
    _forced(monkeypatch, True)
    packed = rankfold.compress(table, tmp_path / "packed", **options)
    model = packed._reader.model
    assert model.packed_codes and model.difference.any()
    np.testing.assert_array_equal(model.difference, plain._reader.model.difference)
    con = duckdb.connect()
    rankfold.udfs.register(con)
    _same_everywhere(plain, packed, table, con, rows=(k - 1, k, k + 1))
    more = _wide(10, 900, 12, specials=True, first=table.num_rows)
    plain2, packed2 = plain.append(more), packed.append(more)
    assert layout.PACKED_CODES in pq.read_schema(packed2.path / packed2._reader.parts[-1][2]).names
    _same_everywhere(plain2, packed2, pa.concat_tables([table, more]), con, rows=(k, table.num_rows))
