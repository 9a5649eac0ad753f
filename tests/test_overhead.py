"""Fixed overhead of an archive (issue 14, item 3): how the small tables are written, and
which files an archive holds.

The outside measures are pyarrow's own Parquet writer (``pyarrow.parquet.write_table`` with
uniform settings, the yardstick each small table must not exceed) and the file system.
"""

from __future__ import annotations

import io
import json

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
import pytest

import rankfold
import rankfold.udfs
from rankfold.udfs.passes.commit import write_small_table
from rankfold.udfs.store import layout
from rankfold.udfs.store.aggregate import BLOCKS, pack_blocks, unpack_blocks
from rankfold.udfs.store.manifest import file_entry, read_manifest, write_manifest
from rankfold.udfs.store.table_schemas import (
    CELLS_SCHEMA,
    PACKED_NUMBERS,
    anchors_schema,
    packed_columns_schema,
    unpack_columns_table,
)


def _low_rank(m: int, n: int, seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)  # invented data
    return rng.standard_normal((m, 3)) @ rng.standard_normal((3, n)) + 0.01 * rng.standard_normal((m, n))


@pytest.fixture(scope="module")
def small_archive(tmp_path_factory):
    return rankfold.compress(_low_rank(300, 24), tmp_path_factory.mktemp("o") / "a.rankfold")


def _uniform_size(table: pa.Table, dictionary: bool) -> int:
    sink = io.BytesIO()  # pyarrow.parquet.write_table, one setting for every column
    pq.write_table(table, sink, compression="zstd", compression_level=3, use_dictionary=dictionary,
                   store_schema=False, write_statistics=False, write_page_checksum=True)
    return sink.tell()


@pytest.mark.parametrize("name", [layout.COLUMNS, BLOCKS])
def test_small_tables_are_no_larger_than_any_uniform_setting(small_archive, tmp_path, name):
    path = small_archive.path / layout.table_file(small_archive.manifest, name)
    table = pq.read_table(path)
    write_small_table(tmp_path / "t.parquet", table)
    written = (tmp_path / "t.parquet").stat().st_size
    # the per-column trial beats zstd 3 with or without dictionaries for every column
    assert written <= min(_uniform_size(table, True), _uniform_size(table, False))
    metadata = pq.ParquetFile(tmp_path / "t.parquet").metadata
    assert b"ARROW:schema" not in (metadata.metadata or {})  # no Arrow schema stored
    assert all(metadata.row_group(0).column(i).statistics is None for i in range(metadata.num_columns))
    assert path.stat().st_size == written  # the archive's own file was written that way


def test_small_tables_read_back_with_their_declared_types(small_archive, tmp_path):
    # the declared schema (table_schemas.packed_columns_schema) survives without the Arrow schema
    # in the footer: list<element> reads back equal to the declared list type
    table = pq.read_table(small_archive.path / layout.table_file(small_archive.manifest, layout.COLUMNS))
    assert table.schema.equals(packed_columns_schema())
    write_small_table(tmp_path / "c.parquet", table.cast(packed_columns_schema()))
    # (unpacked to compare: a packed NaN, a tolerance without residual codes, is a NULL there)
    assert unpack_columns_table(pq.read_table(tmp_path / "c.parquet"), "c").equals(unpack_columns_table(table, "t"))
    # and the archive reads with every page checksum checked
    reopened = rankfold.open(small_archive.path, checksums=True)
    np.testing.assert_array_equal(reopened.to_numpy(), small_archive.to_numpy())


def _stored_field(raw: pa.Table, name: str) -> pa.ChunkedArray:
    # one field's entries of a stored columns table: its place in the packed numbers list
    return pc.list_element(raw.column("numbers"), PACKED_NUMBERS.index(name))


def test_manifest_does_not_repeat_the_tolerances_the_columns_table_holds(tmp_path):
    x = _low_rank(200, 12, seed=4)
    archive = rankfold.compress(x, tmp_path / "a.rankfold", max_std_error=0.02)
    # the targets as asked: no per-column absolute tolerances derived from max_std_error
    assert archive.manifest["targets"]["max_abs_error"] is None
    assert archive.manifest["targets"]["max_std_error"] == 0.02
    # those live in columns.parquet, once: 0.02 x each column's std (numpy.std, ddof=0)
    columns = pq.read_table(archive.path / layout.table_file(archive.manifest, layout.COLUMNS))
    # (stored as the ratio 0.02 to each std: table_schemas.pack_columns_table; read back unpacked)
    tolerance = unpack_columns_table(columns, "columns.parquet").column("tolerance").to_numpy()
    np.testing.assert_allclose(tolerance, 0.02 * np.std(x, axis=0), rtol=1e-9)
    assert _stored_field(columns, "tolerance").null_count == columns.num_rows
    assert set(_stored_field(columns, "tolerance_over_std").to_pylist()) == {0.02}
    # and a max_abs_error the user gives per column is recorded as given
    named = rankfold.compress(x, tmp_path / "b.rankfold", max_abs_error={"x1": 0.5}, max_std_error=None)
    assert named.manifest["targets"]["max_abs_error"] == {"x1": 0.5}


# -- no file that holds nothing ------------------------------------------------------------------
def _columns(x: np.ndarray) -> pa.Table:
    return pa.table({f"x{j}": x[:, j] for j in range(x.shape[1])})


def _within_bounds(archive, truth: np.ndarray) -> None:
    # every rebuilt value within its reported bound of the invented source (NaN stays NaN)
    rebuilt, bounds = archive.to_numpy(), archive.cell_bounds()
    finite = np.isfinite(truth)
    assert np.array_equal(np.isnan(rebuilt), np.isnan(truth))
    assert np.all(np.abs(rebuilt[finite] - truth[finite]) <= bounds[finite])


def _sql_values(path) -> np.ndarray:
    con = duckdb.connect()
    rankfold.udfs.register(con)
    try:  # the archive's path is bound as a parameter, never pasted into the SQL text
        table = con.sql("SELECT * FROM rankfold_scan(?) ORDER BY _rf_row", params=[str(path)]).to_arrow_table()
    finally:
        con.close()
    names = [n for n in table.column_names if not n.startswith("_rf_")]
    return np.column_stack([table.column(n).to_numpy(zero_copy_only=False) for n in names]).astype(float)


def _files(archive) -> set[str]:
    return {f["name"] for f in archive.manifest["files"]}


def test_empty_anchors_and_cells_tables_are_not_written(tmp_path):
    x = _low_rank(400, 10, seed=5)
    archive = rankfold.compress(_columns(x), tmp_path / "a.rankfold", rank=2)
    assert archive.manifest["anchors"] == [] and archive.manifest["errors"]["cells_stored_exactly_outside_factors"] == 0
    on_disk = {p.name for p in archive.path.iterdir()}
    assert layout.ANCHORS not in on_disk | _files(archive) and layout.CELLS not in on_disk | _files(archive)
    _within_bounds(archive, x)
    np.testing.assert_array_equal(_sql_values(archive.path), archive.to_numpy())
    # append rows with a NaN: the first exact cell brings the cells table
    more = _low_rank(50, 10, seed=6)
    more[3, 4] = np.nan
    grown = archive.append(_columns(more))
    assert any(n.startswith("cells.") for n in _files(grown))
    _within_bounds(grown, np.vstack([x, more]))
    np.testing.assert_array_equal(_sql_values(grown.path), grown.to_numpy())
    # an append that adds no exact cell still writes no cells table
    plain = rankfold.compress(_columns(x), tmp_path / "b.rankfold", rank=2).append(_columns(_low_rank(30, 10, 7)))
    assert not any(n.startswith("cells.") for n in _files(plain))


def test_tables_with_rows_are_still_written(tmp_path):
    x = _low_rank(300, 8, seed=8)
    x[5, 2] = np.nan  # an exact cell
    archive = rankfold.compress(_columns(x), tmp_path / "a.rankfold", rank=2, link="optimal",
                                row_method="leverage", column_method="leverage")
    assert archive.manifest["anchors"] and {layout.ANCHORS, layout.CELLS} <= _files(archive)
    _within_bounds(archive, x)
    np.testing.assert_array_equal(_sql_values(archive.path), archive.to_numpy())


def _reseal(path, manifest) -> None:
    manifest = {k: v for k, v in manifest.items() if k != "manifest_sha256"}
    write_manifest(path, manifest)


def test_an_archive_with_empty_tables_written_before_still_reads_and_appends(tmp_path):
    # the layout of earlier versions: empty anchors and cells tables, listed in the manifest
    x = _low_rank(400, 10, seed=9)
    path = rankfold.compress(_columns(x), tmp_path / "old.rankfold", rank=2).path
    manifest = json.loads((path / layout.MANIFEST).read_text())
    names = read_manifest(path)["numeric_columns"]
    pq.write_table(anchors_schema(names, False).empty_table(), path / layout.ANCHORS)
    pq.write_table(CELLS_SCHEMA.empty_table(), path / layout.CELLS)
    manifest["files"] += [file_entry(path, layout.ANCHORS), file_entry(path, layout.CELLS)]
    _reseal(path, manifest)
    old = rankfold.open(path, checksums=True)
    assert {layout.ANCHORS, layout.CELLS} <= _files(old)
    _within_bounds(old, x)
    np.testing.assert_array_equal(_sql_values(path), old.to_numpy())
    more = _low_rank(40, 10, seed=10)
    grown = old.append(_columns(more))
    _within_bounds(grown, np.vstack([x, more]))
    np.testing.assert_array_equal(_sql_values(path), grown.to_numpy())


def test_a_manifest_with_anchor_rows_but_no_anchors_table_is_refused(tmp_path):
    x = _low_rank(300, 8, seed=11)
    archive = rankfold.compress(_columns(x), tmp_path / "a.rankfold", rank=2, link="optimal",
                                row_method="leverage", column_method="leverage")
    manifest = dict(archive.manifest)
    manifest["files"] = [f for f in manifest["files"] if f["name"] != layout.ANCHORS]
    _reseal(archive.path, manifest)
    with pytest.raises(rankfold.CorruptArchiveError, match=r"lists no anchors table for the \d+ anchor rows"):
        rankfold.open(archive.path)
    # a table the manifest names in "tables" must be listed too
    manifest = dict(archive.manifest)
    manifest["tables"] = {layout.CELLS: "cells.v1.parquet"}
    _reseal(archive.path, manifest)
    with pytest.raises(rankfold.CorruptArchiveError, match=r"does not list cells.v1.parquet"):
        rankfold.open(archive.path)


# -- the blocks table, packed ---------------------------------------------------------------------
def _wide_blocks(blocks: int, basis: int, width: int, seed: int) -> pa.Table:
    """A blocks table in the layout of BlockSums.table (one list column per field), random."""
    rng = np.random.default_rng(seed)  # invented sums
    lengths = {"f_sum": basis, "f_abs": basis, "d_sum": basis, "gram": basis * basis,
               "gram_abs": basis * basis, **{n: width for n in ("q_sum", "q_abs", "q_sq", "ov_corr",
                                                                  "ov_abs", "ov_sq")}}
    columns = {"first_row": pa.array(np.arange(blocks) * 100, pa.int64()),
               "rows": pa.array(np.full(blocks, 100), pa.int64()),
               "rowmax_sum": pa.array(rng.random(blocks), pa.float64())}
    for name, length in lengths.items():
        columns[name] = pa.array(list(rng.standard_normal((blocks, length))), pa.list_(pa.float64()))
    for name in ("ov_cells", "ov_nulls"):
        columns[name] = pa.array(list(rng.integers(0, 2**40, (blocks, width))), pa.list_(pa.int64()))
    return pa.table(columns)


@pytest.mark.parametrize("blocks,basis,width", [(1, 0, 5), (3, 2, 7), (2, 4, 1)])
def test_packed_blocks_unpack_to_the_same_table(blocks, basis, width):
    # pack and unpack are inverse, cell for cell (common practice for a codec pair)
    wide = _wide_blocks(blocks, basis, width, seed=blocks + basis)
    packed = pack_blocks(wide, basis, width)
    assert packed.column_names == ["first_row", "rows", "rowmax_sum", "sums"]
    assert unpack_blocks(packed, basis, width, "blocks.parquet").equals(wide)
    assert unpack_blocks(wide, basis, width, "blocks.parquet") is wide  # the layout written before
    with pytest.raises(rankfold.CorruptArchiveError, match=r"blocks.parquet holds packed sums of other lengths"):
        unpack_blocks(packed, basis, width + 1, "blocks.parquet")


def test_an_archive_with_unpacked_blocks_written_before_still_aggregates(tmp_path):
    x = _low_rank(500, 6, seed=12)
    archive = rankfold.compress(_columns(x), tmp_path / "a.rankfold", rank=2)
    packed = pq.read_table(archive.path / BLOCKS)
    assert "sums" in packed.column_names
    expected = archive.aggregate(list(archive.numeric_columns), "sum")
    # rewrite blocks.parquet in the layout of earlier versions (one list column per field)
    wide = unpack_blocks(packed, len(archive.manifest["basis"]), 6, BLOCKS)
    pq.write_table(wide, archive.path / BLOCKS)
    manifest = dict(archive.manifest)
    manifest["files"] = [file_entry(archive.path, BLOCKS) if f["name"] == BLOCKS else f for f in manifest["files"]]
    _reseal(archive.path, manifest)
    old = rankfold.open(archive.path)
    result = old.aggregate(list(old.numeric_columns), "sum")
    assert result.equals(expected)
    # the sums against numpy.sum of the invented source, within the reported bounds
    for j, name in enumerate(old.numeric_columns):
        assert abs(result.column(name)[0].as_py() - np.sum(x[:, j])) <= result.column(f"{name}_bound")[0].as_py()
    # an append reads the old layout and writes the packed one
    grown = old.append(_columns(_low_rank(20, 6, seed=13)))
    blocks_name = layout.table_file(grown.manifest, BLOCKS)
    assert "sums" in pq.read_table(grown.path / blocks_name).column_names
    assert grown.aggregate(["x0"], "count").column("x0")[0].as_py() == 520


# -- row-file footers: statistics only where DuckDB filters, the Arrow schema only when needed --
def _row_footer(archive) -> pq.FileMetaData:
    return pq.ParquetFile(archive.path / archive.manifest["row_parts"][0]["name"]).metadata


def _with_key(m: int, n: int, **extra) -> pa.Table:
    x = _low_rank(m, n, seed=3)
    return pa.table({"id": pa.array(np.arange(m) * 3), **extra, **{f"x{j}": x[:, j] for j in range(n)}})


@pytest.mark.parametrize("options", [{"max_abs_error": 0.01}, {"rank": 3}])
def test_row_files_keep_statistics_only_on_row_ids_and_named_columns(tmp_path, options):
    archive = rankfold.compress(_with_key(400, 10), tmp_path / "a", key="id", seed=0, **options)
    meta = _row_footer(archive)
    group = meta.row_group(0)
    with_stats = {group.column(i).path_in_schema for i in range(meta.num_columns) if group.column(i).is_stats_set}
    names = {meta.schema.column(i).path for i in range(meta.num_columns)}  # packed codes: a nested path
    # the row ids and the key (DuckDB prunes row groups with them), and basis columns kept
    # under their own names; no residual codes, stored basis codes or row ledger
    assert {layout.ROW_ID, "id"} <= with_stats
    assert with_stats == {n for n in names if n == layout.ROW_ID or not n.startswith(layout.RESERVED_PREFIX)}
    assert any(n.startswith(layout.RESERVED_PREFIX) and n != layout.ROW_ID for n in names)
    assert b"ARROW:schema" not in (meta.metadata or {})  # plain types: Parquet's own suffice
    # the key's statistics are the true extremes (numpy), so DuckDB's pruning keeps the right groups
    stats = group.column(meta.schema.names.index("id")).statistics
    assert (stats.min, stats.max) == (0, 3 * 399)
    con = duckdb.connect()
    rankfold.udfs.register(con)
    got = con.sql("SELECT id, x4 FROM rankfold_scan(?) WHERE id = 27", params=[str(archive.path)]).fetchall()
    assert len(got) == 1 and got[0][0] == 27


@pytest.mark.parametrize("column", [
    pa.array(["fen", "moor"] * 150).dictionary_encode(),                        # dictionary
    pa.array(np.arange(300) * 10**9, pa.timestamp("ns", tz="Pacific/Chatham")),  # a time zone
    pa.array(["a", "bb", "ccc"] * 100, pa.large_string()),                       # large_string
])
def test_row_files_keep_the_arrow_schema_when_an_exact_column_needs_it(tmp_path, column):
    table = _with_key(300, 8, label=column)
    archive = rankfold.compress(table, tmp_path / "a", key="id", seed=0, max_abs_error=0.01)
    assert b"ARROW:schema" in (_row_footer(archive).metadata or {})
    rebuilt = archive.rebuild()
    assert rebuilt.column("label").type == column.type
    assert rebuilt.column("label").to_pylist() == column.to_pylist()


@pytest.mark.parametrize("kind, suffices", [
    # Parquet logical types (Apache Parquet LogicalTypes.md): INT(bits, signed) and the float
    # types carry these Arrow types back; dictionary encoding, time zones other than UTC and
    # 64-bit string offsets are Arrow's own (pyarrow.parquet.read_schema)
    (pa.uint8(), True), (pa.uint16(), True), (pa.uint32(), True), (pa.int64(), True),
    (pa.float32(), True), (pa.float64(), True), (pa.string(), True),
    (pa.dictionary(pa.int32(), pa.string()), False), (pa.timestamp("us", tz="Pacific/Chatham"), False),
    (pa.large_string(), False),
])
def test_parquet_types_suffice_is_pyarrows_round_trip(kind, suffices):
    from rankfold.udfs.passes.commit import parquet_types_suffice

    assert parquet_types_suffice(pa.schema([("_rf_row", pa.int64()), ("c", kind)])) is suffices


# -- shift, scale and ledger_scale stored once where they repeat mean and std -----------------
def test_transform_fields_equal_to_the_statistics_are_stored_once(tmp_path):
    x = _low_rank(300, 8, seed=6)
    archive = rankfold.compress(_columns(x), tmp_path / "a", seed=0, rank=2)
    raw = pq.read_table(archive.path / layout.table_file(archive.manifest, layout.COLUMNS))
    for name in ("shift", "scale", "ledger_scale"):  # the standardize transform: all repeat
        assert _stored_field(raw, name).null_count == raw.num_rows, name
    ledger = archive.column_ledger()  # as read: filled in, bit for bit
    assert ledger.column("shift").equals(ledger.column("mean"))
    assert ledger.column("scale").equals(ledger.column("std"))
    assert ledger.column("ledger_scale").equals(ledger.column("std"))
    # the mean the reader gives back is numpy's mean of the source (numpy.mean)
    np.testing.assert_allclose(ledger.column("shift").to_numpy(), x.mean(axis=0), rtol=1e-12, atol=1e-15)
    con = duckdb.connect()
    rankfold.udfs.register(con)
    sql = con.sql("SELECT name, ledger_scale FROM rankfold_column_errors(?) ORDER BY position",
                  params=[str(archive.path)]).to_arrow_table()
    assert sql.column("ledger_scale").equals(ledger.column("std"))
    # an append moves the statistics, not the transform: the fields are then stored as they are
    shift = ledger.column("shift").to_numpy().copy()
    grown = archive.append(_columns(_low_rank(60, 8, seed=7) + 3.0))
    raw = pq.read_table(grown.path / layout.table_file(grown.manifest, layout.COLUMNS))
    assert _stored_field(raw, "shift").null_count == 0
    np.testing.assert_array_equal(grown.column_ledger().column("shift").to_numpy(), shift)
    assert not np.array_equal(grown.column_ledger().column("mean").to_numpy(), shift)


def test_a_columns_table_holding_every_value_reads_as_it_is(small_archive):
    from rankfold.udfs.store.table_schemas import unpack_columns_table

    table = small_archive.column_ledger()  # filled: every value present, as written before
    assert all(table.column(n).null_count == 0 for n in ("shift", "scale", "ledger_scale"))
    assert unpack_columns_table(table, "columns.parquet").equals(table)


@pytest.mark.parametrize("runs_in", ["rows", "columns"])
def test_exact_cells_are_written_in_the_smaller_order(tmp_path, runs_in):
    # NULL cells in runs down one column, or across whole rows: the cells file is whichever of
    # the two orders (row-major, column-major) pyarrow writes smaller, and reads back whole
    from rankfold.udfs.passes.encode import ExactCells, _written_bytes

    rng = np.random.default_rng(3)  # invented data
    x = rng.standard_normal((3000, 8))
    mask = np.zeros(x.shape, bool)
    if runs_in == "columns":
        mask[500:2500, 2] = True
        mask[1000:3000, 5] = True
        mask[rng.random(3000) < 0.5, 7] = True
    else:
        mask[rng.random(3000) < 0.3, :] = True
    cells = ExactCells()
    cells.add(0, mask, x, mask)
    written = cells.table()
    rows, cols = np.nonzero(mask)
    orders = {"rows": np.lexsort((cols, rows)), "columns": np.lexsort((rows, cols))}
    sizes = {}
    for name, order in orders.items():
        table = pa.table({"_rf_row": pa.array(rows[order].astype(np.int64)),
                          "_rf_column": pa.array(cols[order].astype(np.int32)),
                          "value": pa.array(np.zeros(order.size), mask=np.ones(order.size, bool)),
                          "reason": pa.array(["null"] * order.size).dictionary_encode()},
                         schema=written.schema)
        sizes[name] = _written_bytes(table)
    assert _written_bytes(written) == min(sizes.values())
    assert sizes[runs_in] < max(sizes.values())  # the order that follows the runs wins
    got = set(zip(written.column("_rf_row").to_pylist(), written.column("_rf_column").to_pylist()))
    assert got == set(zip(rows.tolist(), cols.tolist()))
