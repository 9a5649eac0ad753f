"""Reading the source one batch ahead on a helper thread: the same batches in the same order
as pyarrow's own RecordBatchReader gives them, errors passed on, and no thread left behind."""

from __future__ import annotations

import threading

import numpy as np
import pyarrow as pa
import pytest

from rankfold.udfs.passes.sources import ReadAhead


def _reader(batches: int, rows: int = 50) -> pa.RecordBatchReader:
    schema = pa.schema([("x", pa.float64())])
    made = [pa.record_batch([pa.array(np.arange(k * rows, (k + 1) * rows, dtype=float))], schema=schema)
            for k in range(batches)]  # invented values
    return pa.RecordBatchReader.from_batches(schema, made)


def read_ahead(reader: pa.RecordBatchReader, depth: int = 1) -> ReadAhead:
    """The reader's batches through ReadAhead, as Source.stream uses it."""
    return ReadAhead(lambda: iter(reader), depth)


def _helpers() -> int:
    return sum(t.name == "rankfold-read-ahead" for t in threading.enumerate())


def test_same_batches_in_the_same_order_as_the_reader_itself():
    expected = list(_reader(20))  # pyarrow.RecordBatchReader iterated directly
    got = list(read_ahead(_reader(20), depth=2))
    assert len(got) == 20 and all(a.equals(b) for a, b in zip(got, expected))
    assert _helpers() == 0


def test_a_reader_error_reaches_the_caller():
    def failing():
        yield pa.record_batch([pa.array([1.0])], names=["x"])
        raise OSError("disk gone")

    reader = pa.RecordBatchReader.from_batches(pa.schema([("x", pa.float64())]), failing())
    stream = read_ahead(reader)
    assert next(stream).num_rows == 1
    with pytest.raises(OSError, match="disk gone"):
        next(stream)
    assert _helpers() == 0


def test_stopping_early_stops_the_helper_thread():
    stream = read_ahead(_reader(1000))
    assert next(stream).num_rows == 50
    stream.close()  # what happens when a pass stops on an error of its own
    assert _helpers() == 0
