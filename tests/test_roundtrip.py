"""Round trips: every column type, every source kind, key lookup, the manifest and the rebuild log.

Tables are invented from fixed seeds. Key and non-numeric columns must come back exactly
(values and Arrow types); numeric columns come back in their source types, with NULLs where
the source had NULLs, and within their bounds.
"""

from __future__ import annotations

import base64
import datetime as dt
import decimal
import hashlib
import json
import logging

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest

import rankfold
from rankfold.udfs.store.manifest_schema import written_form
from rankfold.udfs.store.manifest import write_manifest

ROWS = 48
INTEGER_TYPES = [pa.int8(), pa.int16(), pa.int32(), pa.int64(),
                 pa.uint8(), pa.uint16(), pa.uint32(), pa.uint64()]


def _low_rank(rng: np.random.Generator, m: int, n: int) -> np.ndarray:
    """Rank-2 values in [0, 100) plus a little noise: fits every integer type once rounded."""
    block = rng.random((m, 2)) @ rng.random((2, n))
    block += 0.01 * rng.random((m, n))
    return 100.0 * block / block.max()


def _every_type_table(seed: int = 3) -> pa.Table:
    rng = np.random.default_rng(seed)
    numeric = _low_rank(rng, ROWS, len(INTEGER_TYPES) + 2)
    nulls = rng.random((ROWS, numeric.shape[1])) < 0.1
    columns = {"site": pa.array([f"S-{i:03d}" for i in range(ROWS)], pa.string())}
    for j, data_type in enumerate(INTEGER_TYPES):
        columns[f"n_{data_type}"] = pa.array(np.rint(numeric[:, j]).astype(data_type.to_pandas_dtype()),
                                             data_type, mask=nulls[:, j])
    columns["f32"] = pa.array(numeric[:, -2].astype(np.float32), pa.float32(), mask=nulls[:, -2])
    columns["f64"] = pa.array(numeric[:, -1], pa.float64(), mask=nulls[:, -1])
    columns["flag"] = pa.array(rng.random(ROWS) < 0.5, pa.bool_(), mask=rng.random(ROWS) < 0.1)
    columns["label"] = pa.array([f"label {i % 7}" if i % 5 else None for i in range(ROWS)], pa.large_string())
    columns["day"] = pa.array([dt.date(2024, 1, 1) + dt.timedelta(days=3 * i) for i in range(ROWS)], pa.date32())
    columns["at"] = pa.array([dt.datetime(2024, 1, 1, 6) + dt.timedelta(minutes=17 * i) for i in range(ROWS)],
                             pa.timestamp("us"))
    columns["price"] = pa.array([decimal.Decimal(int(v)) / 100 for v in rng.integers(0, 10**6, ROWS)],
                                pa.decimal128(12, 2))
    columns["huge"] = pa.array([2**53 + int(v) for v in rng.integers(1, 10**6, ROWS)], pa.int64())
    return pa.table(columns)


def _as_float(column: pa.ChunkedArray) -> np.ndarray:
    null = column.is_null().to_numpy(zero_copy_only=False)
    return np.where(null, np.nan, column.fill_null(0).to_numpy(zero_copy_only=False).astype(np.float64))


def _assert_within_bounds(archive: rankfold.Archive, table: pa.Table) -> None:
    values, bounds = archive.to_numpy(), archive.cell_bounds()
    for j, name in enumerate(archive.numeric_columns):
        truth = _as_float(table.column(name))
        finite = np.isfinite(truth)
        assert np.all(np.abs(truth[finite] - values[finite, j]) <= bounds[finite, j]), name
        assert np.array_equal(np.isnan(truth), np.isnan(values[:, j])), name


# -- column types -------------------------------------------------------------------------------
def test_every_column_type_round_trips(tmp_path, assert_tight):
    table = _every_type_table()
    archive = rankfold.compress(table, tmp_path / "types.rankfold", rank=2, key="site")
    rebuilt = archive.rebuild()
    assert rebuilt.schema.names == table.schema.names
    for field in table.schema:
        got = rebuilt.column(field.name)
        assert got.type == field.type, field.name
        assert np.array_equal(got.is_null().to_numpy(zero_copy_only=False),
                              table.column(field.name).is_null().to_numpy(zero_copy_only=False)), field.name
    for name in ("site", "flag", "label", "day", "at", "price", "huge"):
        assert rebuilt.column(name).equals(table.column(name)), name
    assert "huge" not in archive.numeric_columns  # beyond 2^53: kept exactly, not factored
    assert archive.numeric_columns == [f"n_{t}" for t in INTEGER_TYPES] + ["f32", "f64"]
    _assert_within_bounds(archive, table)
    truth = np.column_stack([_as_float(table.column(n)) for n in archive.numeric_columns])
    assert_tight(archive, table, truth, archive.to_numpy(), archive.cell_bounds())  # conftest
    # integer columns come back as the nearest integer of the rebuilt value
    values = archive.to_numpy()
    for j, name in enumerate(archive.numeric_columns[:len(INTEGER_TYPES)]):
        got = _as_float(rebuilt.column(name))
        ok = ~np.isnan(got)
        assert np.array_equal(got[ok], np.rint(values[ok, j]))


def test_full_rank_rebuilds_integers_exactly(tmp_path):
    """With every column a basis column the numeric block is stored exactly."""
    table = _every_type_table(seed=5).select([f"n_{t}" for t in INTEGER_TYPES])
    archive = rankfold.compress(table, tmp_path / "exact.rankfold", rank=len(INTEGER_TYPES))
    assert archive.rebuild().equals(table)
    assert np.all(archive.cell_bounds() == 0.0)


def test_exact_columns_option_keeps_a_numeric_column_exactly(tmp_path):
    table = _every_type_table().select(["site", "n_int32", "n_uint16", "f32", "f64"])
    archive = rankfold.compress(table, tmp_path / "keep.rankfold", rank=1, exact_columns=["f64"])
    assert archive.numeric_columns == ["n_int32", "n_uint16", "f32"]
    assert archive.rebuild().column("f64").equals(table.column("f64"))


def test_rebuild_twice_writes_the_same_table(tmp_path):
    """Write, read, write again from the rebuilt table: the second archive rebuilds the same."""
    table = _every_type_table().drop_columns(["huge"])
    first = rankfold.compress(table, tmp_path / "one.rankfold", rank=3, key="site").rebuild()
    second = rankfold.compress(first, tmp_path / "two.rankfold", rank=3, key="site").rebuild()
    assert second.schema == first.schema
    for name in ("site", "flag", "label", "day", "at", "price"):
        assert second.column(name).equals(first.column(name))


# -- source kinds -------------------------------------------------------------------------------
def _float_table(seed: int = 11) -> pa.Table:
    rng = np.random.default_rng(seed)
    block = _low_rank(rng, 40, 6)
    columns = {"id": pa.array(np.arange(40, dtype=np.int64) * 3 + 1)}
    columns |= {f"x{j}": pa.array(block[:, j]) for j in range(6)}
    return pa.table(columns)


SOURCE_KINDS = ["numpy", "arrow", "record_batch", "pandas", "parquet", "csv", "duckdb_table", "duckdb_select"]


@pytest.fixture
def duck():
    con = duckdb.connect()
    yield con
    con.close()


@pytest.mark.parametrize("kind", SOURCE_KINDS)
def test_every_source_kind_gives_the_same_archive(tmp_path, duck, kind):
    table = _float_table()
    numeric = table.drop_columns(["id"])
    options = {"exact_columns": ["id"]}
    if kind == "numpy":
        source = np.column_stack([c.to_numpy() for c in numeric.columns])
        options = {}
    elif kind == "arrow":
        source = table
    elif kind == "record_batch":
        source = table.to_batches()[0]
    elif kind == "pandas":
        source = table.to_pandas()
    elif kind == "parquet":
        source = tmp_path / "source.parquet"
        pq.write_table(table, source)
    elif kind == "csv":
        source = tmp_path / "source.csv"
        pacsv.write_csv(table, source)
    else:
        duck.from_arrow(table).create("panel")
        source = "panel" if kind == "duckdb_table" else "SELECT * FROM panel ORDER BY id"
        options["connection"] = duck
    archive = rankfold.compress(source, tmp_path / "kind.rankfold", rank=2, **options)
    assert archive.shape == (40, 6)
    reference = rankfold.compress(table, tmp_path / "reference.rankfold", rank=2, exact_columns=["id"])
    expected_values = reference.to_numpy()
    values = archive.to_numpy()
    # same numbers in, same archive out (CSV text reads back to the same doubles)
    assert np.array_equal(values, expected_values)
    assert np.array_equal(archive.cell_bounds(), reference.cell_bounds())
    if kind != "numpy":
        assert archive.rebuild().column("id").to_pylist() == table.column("id").to_pylist()
    assert archive.manifest["source"]


# -- keys ---------------------------------------------------------------------------------------
def test_key_lookup(tmp_path):
    table = _every_type_table()
    archive = rankfold.compress(table, tmp_path / "keyed.rankfold", rank=2, key="site")
    assert archive.manifest["key"] == "site"
    by_key = archive.to_numpy(rows=rankfold.Keys(["S-007", "S-002", "S-007"]))
    assert np.array_equal(by_key, archive.to_numpy(rows=[7, 2, 7]), equal_nan=True)
    assert np.array_equal(archive.cell_bounds(rows=rankfold.Keys("S-010"), columns="f64"),
                          archive.cell_bounds(rows=[10], columns=["f64"]))
    assert archive.cell(rankfold.Keys(["S-004"]), "f64") == archive.cell(4, "f64")
    assert archive.rebuild(rows=rankfold.Keys(["S-005"])).column("site").to_pylist() == ["S-005"]
    with pytest.raises(rankfold.RowOutOfRangeError, match=r"no row with site = 'S-999'"):
        archive.to_numpy(rows=rankfold.Keys(["S-999"]))


def test_keys_need_a_key_column(tmp_path):
    archive = rankfold.compress(_float_table(), tmp_path / "plain.rankfold", rank=2)
    with pytest.raises(IndexError, match="has no key column; it was compressed without key="):
        archive.to_numpy(rows=rankfold.Keys([1]))


# -- manifest -----------------------------------------------------------------------------------
def test_manifest_records_format_and_checksums(tmp_path):
    path = tmp_path / "manifest.rankfold"
    archive = rankfold.compress(_float_table(), path, rank=2, seed=42)
    manifest = json.loads((path / "manifest.json").read_text())
    assert manifest["format"] == "rankfold-archive"
    assert manifest["format_version"] == "1.0"
    assert manifest["writer"] == {"name": "rankfold", "version": rankfold.__version__}
    assert manifest["shape"] == [40, 7]
    assert manifest["method"]["seed"] == 42
    # stored by field; the numbered names x0 .. x5 as one run [prefix, first, count, width]
    assert manifest["schema"]["names"] == ["id", ["x", 0, 6, 0]]
    # the achieved size: every file of the archive folder as it is on disk (os.stat),
    # manifest.json included (the manifest records its own size: a fixed point)
    on_disk = sum(p.stat().st_size for p in path.iterdir())
    assert manifest["achieved"]["bytes"] == on_disk == archive.nbytes
    listed = {entry["name"] for entry in manifest["files"]}
    on_disk = {p.name for p in path.iterdir()} - {"manifest.json"}
    assert listed == on_disk
    for entry in manifest["files"]:
        data = (path / entry["name"]).read_bytes()
        assert entry["bytes"] == len(data)
        # stored as base64url (RFC 4648, section 5) without padding; read back as hex
        assert entry["sha256"] == base64.urlsafe_b64encode(hashlib.sha256(data).digest()).decode().rstrip("=")
    assert {e["name"]: e["sha256"] for e in archive.manifest["files"]} == {
        e["name"]: hashlib.sha256((path / e["name"]).read_bytes()).hexdigest() for e in manifest["files"]}
    # as read, the manifest is the stored one with what a reader derives (written_form undone)
    assert written_form(archive.manifest) == manifest
    assert [f["name"] for f in archive.manifest["schema"]] == _float_table().schema.names
    assert archive.manifest["numeric_columns"] == _float_table().schema.names


def test_checksums_detect_a_tampered_file(tmp_path):
    path = tmp_path / "tamper.rankfold"
    rankfold.compress(_float_table(), path, rank=2)
    victim = path / "rows-00000.parquet"
    data = bytearray(victim.read_bytes())
    data[8] ^= 0xFF  # in the first data page, same size: only the SHA-256 can tell
    victim.write_bytes(bytes(data))
    rankfold.open(path)  # sizes alone match (row files are read lazily)
    with pytest.raises(rankfold.CorruptArchiveError, match=r"rows-00000.parquet does not match its SHA-256"):
        rankfold.open(path, checksums=True)


def test_a_truncated_file_is_refused_without_checksums(tmp_path):
    path = tmp_path / "short.rankfold"
    rankfold.compress(_float_table(), path, rank=2)
    victim = path / "columns.parquet"
    victim.write_bytes(victim.read_bytes()[:-10])
    with pytest.raises(ValueError, match=r"columns.parquet has \d+ bytes where the manifest records \d+"):
        rankfold.open(path)


def _archive_claiming_format(path, version: str):
    """An archive whose manifest names another format version."""
    rankfold.compress(_float_table(), path, rank=2)
    manifest = json.loads((path / "manifest.json").read_text())
    manifest["format_version"] = version
    write_manifest(path, manifest)  # as that version's writer would: with its own digest
    return path


def test_unknown_major_version_is_refused_naming_both_versions(tmp_path):
    path = _archive_claiming_format(tmp_path / "future.rankfold", "7.2")
    with pytest.raises(rankfold.UnsupportedVersionError, match=r"format 7\.2 .*reads format 1\.x"):
        rankfold.open(path)
    assert issubclass(rankfold.UnsupportedVersionError, rankfold.CorruptArchiveError)


def test_a_newer_minor_version_opens(tmp_path):
    path = _archive_claiming_format(tmp_path / "minor.rankfold", "1.9")
    assert rankfold.open(path).shape == (40, 7)


# -- rebuild log --------------------------------------------------------------------------------
def test_rebuild_log_has_one_record_per_request(tmp_path, caplog):
    path = tmp_path / "logged.rankfold"
    rankfold.compress(_every_type_table(), path, rank=2, key="site")
    log_path = tmp_path / "rebuilds.jsonl"
    archive = rankfold.open(path, log_path=log_path)
    with caplog.at_level(logging.INFO, logger="rankfold.rebuild"):
        archive.to_numpy(rows=[0, 1, 2], columns=["f64"])
        archive.cell_bounds(rows=slice(0, 10))
        archive.cell(rankfold.Keys(["S-003"]), "f32")
        archive.rebuild(rows=[5])
    records = [r for r in caplog.records if r.name == "rankfold.rebuild"]
    assert [r.rankfold["request"] for r in records] == ["to_numpy", "cell_bounds", "cell", "rebuild"]
    lines = [json.loads(line) for line in log_path.read_text().splitlines()]
    assert lines == [r.rankfold for r in records]
    first, second, third, fourth = lines
    assert first["archive_id"] == archive.manifest["archive_id"]
    assert first["rows"] == [0, 1, 2] and first["columns"] == ["f64"]
    assert first["cells_rebuilt"] + first["cells_exact"] == 3
    assert second["cells_rebuilt"] + second["cells_exact"] == 10 * archive.shape[1]
    assert third["rows"] == ["S-003"] and third["columns"] == ["f32"]
    assert fourth["largest_bound"] == float(archive.cell_bounds(rows=[5]).max())
    assert all(json.loads(r.getMessage()) == r.rankfold for r in records)
