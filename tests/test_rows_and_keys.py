"""Row requests and key lookups name rows exactly (issue 12, item 7): a non-unique key is
refused at compress and at append, and an out-of-range row request is refused before
anything of its size is allocated.

References: numpy (positions, ``numpy.broadcast_to`` for a huge request that itself takes
8 bytes), Python's ``tracemalloc`` (numpy reports its allocations to it) for the memory used.
"""

from __future__ import annotations

import tracemalloc

import numpy as np
import pyarrow as pa
import pytest

import rankfold
from rankfold.udfs.errors import InvalidInputError, RowOutOfRangeError

ROWS = 3000


def _table(keys) -> pa.Table:
    rng = np.random.default_rng(1)
    x = rng.standard_normal((len(keys), 2)) @ rng.standard_normal((2, 5))
    return pa.table({"station": pa.array(keys), **{f"x{j}": x[:, j] for j in range(5)}})


@pytest.fixture(scope="module")
def archive(tmp_path_factory):
    return rankfold.compress(_table(np.arange(ROWS)), tmp_path_factory.mktemp("rows") / "a.rankfold",
                             rank=2, key="station")


def test_non_unique_key_is_refused_at_compress(tmp_path):
    keys = np.arange(ROWS) % 14  # 212 or 215 rows per key value, as in the issue
    with pytest.raises(InvalidInputError, match=r"key column 'station' .* is not unique: \d+ is in 21\d rows"):
        rankfold.compress(_table(keys), tmp_path / "dup.rankfold", rank=2, key="station")
    assert not (tmp_path / "dup.rankfold").exists()
    # kept as an exact column, the same table compresses; rows are chosen by condition
    kept = rankfold.compress(_table(keys), tmp_path / "ok.rankfold", rank=2, exact_columns=("station",))
    assert kept.aggregate(["x0"], "count", where="station = 3").column("x0").to_pylist() == [
        int((keys == 3).sum())]


def test_append_that_repeats_a_key_is_refused(archive, tmp_path):
    copy = rankfold.compress(_table(np.arange(ROWS)), tmp_path / "c.rankfold", rank=2, key="station")
    with pytest.raises(InvalidInputError, match="is not unique: 2999 is in 2 rows"):
        copy.append(_table(np.arange(2999, 3010)))
    assert rankfold.open(copy.path).shape == (ROWS, 5)  # nothing was committed
    grown = copy.append(_table(np.arange(3000, 3010)))
    assert grown.rebuild(rows=rankfold.Keys([3005])).column("station").to_pylist() == [3005]


def test_huge_out_of_range_request_fails_fast_in_little_memory(archive):
    huge = np.broadcast_to(np.int64(ROWS), (10**9,))  # 10^9 positions held in 8 bytes
    tracemalloc.start()
    try:
        with pytest.raises(RowOutOfRangeError, match=f"Row position {ROWS} is out of range"):
            archive.to_numpy(rows=huge)
        with pytest.raises(RowOutOfRangeError, match="Row position 999999999999 is out of range"):
            archive.cell_bounds(rows=range(10**12))
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 16 * 1024 * 1024  # the old check made three 10^9-byte masks


def test_ranges_and_arrays_address_the_same_rows(archive):
    full = archive.to_numpy()
    assert np.array_equal(archive.to_numpy(rows=range(5, 50, 7)), full[5:50:7])
    assert np.array_equal(archive.to_numpy(rows=range(-3, 0)), full[-3:])
    assert np.array_equal(archive.to_numpy(rows=np.array([-1, 0], np.int32)), full[[-1, 0]])
    with pytest.raises(RowOutOfRangeError, match=f"Row position -{ROWS + 1} is out of range"):
        archive.to_numpy(rows=[0, -(ROWS + 1), ROWS + 5])
