"""Local Parquet sources decoded by pyarrow (``sources.parquet_batches``) instead of DuckDB:
the batches are the ones DuckDB's own ``to_arrow_reader`` gives over the same files (the
reference), so compress writes the same archive whichever reader decoded them; sources that
pyarrow would not read as DuckDB declares them go through DuckDB.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import rankfold
from rankfold.udfs.passes import sources


def _write_dataset(folder: Path, seed: int = 0) -> pa.Table:
    """Three files with row groups of uneven sizes (invented values, NULLs, several types)."""
    rng = np.random.default_rng(seed)
    m = 2600
    latent = rng.normal(size=(m, 2))
    table = pa.table({
        "id": pa.array(np.arange(m), pa.int64()),
        "a": pa.array(latent @ [1.0, 0.5] + 0.01 * rng.normal(size=m), mask=rng.random(m) < 0.05),
        "b": pa.array((latent @ [0.2, -1.0]).astype(np.float32)),
        "c": pa.array(np.rint(100 * latent[:, 0]).astype(np.int32)),
        "d": pa.array(latent @ [2.0, 2.0] + rng.normal(size=m)),
        "label": pa.array([f"site-{i % 7}" for i in range(m)]),
    })
    folder.mkdir()
    cuts = [(0, 700, 300), (700, 750, 64), (750, m, 500)]  # (first, end, row group size)
    for k, (lo, hi, group) in enumerate(cuts):
        pq.write_table(table.slice(lo, hi - lo), folder / f"part-{k}.parquet", row_group_size=group)
    return table


def _duckdb_batches(folder: Path, batch_rows: int) -> list[pa.RecordBatch]:
    con = duckdb.connect(config={"threads": 1})
    try:
        query = f"SELECT * FROM read_parquet('{folder}/**/*.parquet')"
        return list(con.sql(query).to_arrow_reader(batch_rows))
    finally:
        con.close()


@pytest.mark.parametrize("batch_rows", [7, 300, 1000, 5000])
@pytest.mark.parametrize("read_cells", [None, 700], ids=["whole groups", "a few columns per read"])
def test_batches_are_the_ones_duckdb_reads(tmp_path, monkeypatch, batch_rows, read_cells):
    if read_cells is not None:  # row groups of 64-500 rows read 1-10 columns at a time
        monkeypatch.setattr(sources, "DIRECT_READ_CELLS", read_cells)
    folder = tmp_path / "data"
    _write_dataset(folder)
    source = sources.open_source(str(folder))
    try:
        assert source.reads_directly(source.schema.names)
        ours = list(sources.parquet_batches(source.parquet_files, source.schema, batch_rows))
    finally:
        source.close()
    theirs = _duckdb_batches(folder, batch_rows)
    assert [b.num_rows for b in ours] == [b.num_rows for b in theirs]
    for mine, reference in zip(ours, theirs):
        assert mine.schema.equals(source.schema)
        assert mine.equals(reference.cast(source.schema))


def _archive_digest(path: Path) -> dict[str, str]:
    out = {}
    for f in sorted(path.iterdir()):
        if f.name == "manifest.json":
            manifest = json.loads(f.read_text())
            for volatile in ("archive_id", "created_at", "manifest_sha256", "files", "row_parts", "tables"):
                manifest.pop(volatile, None)
            out[f.name] = json.dumps(manifest, sort_keys=True)
        elif f.is_file() and f.suffix == ".parquet" and f.name.count(".") == 1:
            out[f.name] = hashlib.sha256(f.read_bytes()).hexdigest()
    return out


@pytest.mark.parametrize("options", [{}, {"rank": 2}], ids=["default tolerance", "rank 2"])
def test_compress_writes_the_same_archive_through_either_reader(tmp_path, monkeypatch, options):
    folder = tmp_path / "data"
    _write_dataset(folder, seed=1)
    opts = dict(options, batch_rows=450, key="id")  # batches that cross row groups and files
    assert sources.open_source(str(folder)).reads_directly(["id", "label", "a", "b", "c", "d"])
    direct = rankfold.compress(str(folder), tmp_path / "direct.rankfold", **opts)
    monkeypatch.setattr(sources, "DIRECT_GROUP_CELLS", 0)  # every row group too large: DuckDB
    assert not sources.open_source(str(folder)).reads_directly(["a"])
    through_duckdb = rankfold.compress(str(folder), tmp_path / "duckdb.rankfold", **opts)
    assert _archive_digest(direct.path) == _archive_digest(through_duckdb.path)
    assert np.array_equal(direct.to_numpy(), through_duckdb.to_numpy(), equal_nan=True)


def test_sources_pyarrow_would_read_otherwise_go_through_duckdb(tmp_path):
    # a column from the directory names (hive partitioning): not in the files
    hive = tmp_path / "hive"
    for region in ("north", "south"):
        (hive / f"region={region}").mkdir(parents=True)
        pq.write_table(pa.table({"x": np.arange(50.0), "y": np.arange(50.0) ** 0.5}),
                       hive / f"region={region}" / "part.parquet")
    source = sources.open_source(str(hive))
    try:
        assert "region" in source.schema.names and not source.reads_directly(source.schema.names)
        assert source.reads_directly(["x", "y"])  # the files' own columns are read directly
    finally:
        source.close()
    # files whose types differ: DuckDB reads them as one type, pyarrow would not
    mixed = tmp_path / "mixed"
    mixed.mkdir()
    pq.write_table(pa.table({"x": pa.array([1, 2, 3], pa.int32())}), mixed / "a.parquet")
    pq.write_table(pa.table({"x": pa.array([4, 5, 6], pa.int64())}), mixed / "b.parquet")
    source = sources.open_source(str(mixed))
    try:
        assert not source.reads_directly(["x"])
        values = [v for b in source.batches(["x"], 2) for v in b.column(0).to_pylist()]
        assert values == [1, 2, 3, 4, 5, 6]
    finally:
        source.close()
