"""The row-file writer, which encodes and compresses on a background thread: files, order and
errors, read back with pyarrow.parquet (the reference reader)."""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from rankfold.udfs.passes.commit import ArchiveWriter, RowPartWriter
from rankfold.udfs.store import layout
from rankfold.udfs.store.integrity import WRITE_OPTIONS


def _table(first: int, rows: int) -> pa.Table:
    ids = np.arange(first, first + rows, dtype=np.int64)
    return pa.table({layout.ROW_ID: ids, "x": np.sin(ids.astype(float))})  # invented values


def test_tables_land_in_order_in_parts_of_the_asked_size(tmp_path):
    writer = RowPartWriter(tmp_path, part_rows=300)
    for k in range(10):
        writer.write_rows(_table(100 * k, 100), 100 * k)
    writer.close()
    assert [(p["first_row"], p["rows"]) for p in writer.parts] == [(0, 300), (300, 300), (600, 300), (900, 100)]
    back = pa.concat_tables([pq.read_table(tmp_path / p["name"]) for p in writer.parts])
    assert back.equals(pa.concat_tables([_table(100 * k, 100) for k in range(10)]))
    # one row group per table written (layout: row groups never span two batches)
    assert [pq.ParquetFile(tmp_path / p["name"]).num_row_groups for p in writer.parts] == [3, 3, 3, 1]


def test_an_error_on_the_writer_thread_reaches_the_caller(tmp_path):
    writer = RowPartWriter(tmp_path)
    writer.write_rows(_table(0, 10), 0)
    wrong = pa.table({layout.ROW_ID: np.arange(10, 20), "x": np.array(["a"] * 10)})  # other schema
    with pytest.raises((pa.ArrowInvalid, ValueError)):
        writer.write_rows(wrong, 10)
        writer.write_rows(_table(20, 10), 20)
        writer.write_rows(_table(30, 10), 30)
        writer.close()


def test_abort_removes_the_temporary_directory_even_after_a_writer_error(tmp_path):
    target = tmp_path / "a.rankfold"
    writer = ArchiveWriter(target, overwrite=False)
    writer.write_rows(_table(0, 10), 0)
    writer.write_rows(pa.table({layout.ROW_ID: np.arange(10, 20), "x": np.array(["a"] * 10)}), 10)
    writer.abort()
    assert not writer.temp.exists() and not target.exists()


def _column_bytes(path, name: str) -> int:
    meta = pq.ParquetFile(path).metadata
    j = meta.schema.names.index(name)
    return sum(meta.row_group(g).column(j).total_compressed_size for g in range(meta.num_row_groups))


def test_residual_codes_get_the_layout_a_trial_with_the_real_writer_finds_smallest(tmp_path):
    # invented, seeded codes of three shapes: a slow ramp (delta coding wins), small zigzag
    # codes, and mostly zeros in runs
    rng = np.random.default_rng(14)
    rows = 20_000
    q = rng.normal(0.0, 3.0, rows).round().astype(np.int64)
    codes = {layout.CODE_PATTERN.format(0): (np.arange(rows) // 3).astype(np.uint32),
             layout.CODE_PATTERN.format(1): np.where(q >= 0, 2 * q, -2 * q - 1).astype(np.uint32),
             layout.CODE_PATTERN.format(2): np.repeat(rng.integers(0, 2, rows // 500) * 7, 500).astype(np.uint32)}
    table = pa.table({layout.ROW_ID: np.arange(rows, dtype=np.int64), **codes})
    writer = RowPartWriter(tmp_path)
    writer.write_rows(table, 0)
    writer.close()
    path = tmp_path / writer.parts[0]["name"]
    assert pq.read_table(path).equals(table)
    for name, values in codes.items():
        # the layouts used before the trial: BSS or dictionary at zstd level 3, each column
        # written alone by pyarrow.parquet.write_table (the reference writer), with the row
        # files' own page options
        before = []
        for bss in (True, False):
            alone = tmp_path / f"alone-{name}-{bss}.parquet"
            pq.write_table(pa.table({name: values}), alone, compression="zstd", compression_level=3,
                           use_dictionary=not bss, column_encoding={name: "BYTE_STREAM_SPLIT"} if bss else None,
                           **WRITE_OPTIONS)
            before.append(_column_bytes(alone, name))
        assert _column_bytes(path, name) <= min(before), name
    ramp = layout.CODE_PATTERN.format(0)
    assert _column_bytes(path, ramp) < 0.5 * min(
        _column_bytes(tmp_path / f"alone-{ramp}-{bss}.parquet", ramp) for bss in (True, False))
    assert "DELTA_BINARY_PACKED" in pq.ParquetFile(path).metadata.row_group(0).column(1).encodings
