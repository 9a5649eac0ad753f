"""The row-file writer, which encodes and compresses on a background thread: files, order and
errors, read back with pyarrow.parquet (the reference reader)."""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from rankfold.udfs.passes.commit import ArchiveWriter, RowPartWriter
from rankfold.udfs.store import layout


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
