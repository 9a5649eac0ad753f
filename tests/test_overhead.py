"""Fixed overhead of an archive (issue 14, item 3): how the small tables are written, and
which files an archive holds.

The outside measures are pyarrow's own Parquet writer (``pyarrow.parquet.write_table`` with
uniform settings, the yardstick each small table must not exceed) and the file system.
"""

from __future__ import annotations

import io

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import rankfold
from rankfold.udfs.passes.commit import write_small_table
from rankfold.udfs.store import layout
from rankfold.udfs.store.aggregate import BLOCKS
from rankfold.udfs.store.table_schemas import COLUMNS_SCHEMA


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
    # the declared schema (table_schemas.COLUMNS_SCHEMA) survives without the Arrow schema in
    # the footer: list<element> reads back equal to the declared list type
    table = pq.read_table(small_archive.path / layout.table_file(small_archive.manifest, layout.COLUMNS))
    assert table.schema.equals(COLUMNS_SCHEMA)
    write_small_table(tmp_path / "c.parquet", table.cast(COLUMNS_SCHEMA))
    assert pq.read_table(tmp_path / "c.parquet").equals(table)
    # and the archive reads with every page checksum checked
    reopened = rankfold.open(small_archive.path, checksums=True)
    np.testing.assert_array_equal(reopened.to_numpy(), small_archive.to_numpy())


def test_manifest_does_not_repeat_the_tolerances_the_columns_table_holds(tmp_path):
    x = _low_rank(200, 12, seed=4)
    archive = rankfold.compress(x, tmp_path / "a.rankfold", max_std_error=0.02)
    # the targets as asked: no per-column absolute tolerances derived from max_std_error
    assert archive.manifest["targets"]["max_abs_error"] is None
    assert archive.manifest["targets"]["max_std_error"] == 0.02
    # those live in columns.parquet, once: 0.02 x each column's std (numpy.std, ddof=0)
    columns = pq.read_table(archive.path / layout.table_file(archive.manifest, layout.COLUMNS))
    np.testing.assert_allclose(columns.column("tolerance").to_numpy(), 0.02 * np.std(x, axis=0), rtol=1e-9)
    # and a max_abs_error the user gives per column is recorded as given
    named = rankfold.compress(x, tmp_path / "b.rankfold", max_abs_error={"x1": 0.5}, max_std_error=None)
    assert named.manifest["targets"]["max_abs_error"] == {"x1": 0.5}
