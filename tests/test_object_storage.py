"""Archives and sources on object storage (``store.remote``), against a local S3-compatible
server that these tests start themselves on 127.0.0.1 (``moto`` in server mode; s3fs as the
fsspec driver). No network beyond loopback.

References: values and bounds are checked against the invented table itself (numpy), and the
archive read from the store must equal the one built from the same table locally (same
seed, same options: the build is deterministic). Tables are invented by seeded code.
"""

from __future__ import annotations

import io
import json
import logging
import os
import pickle

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

# s3fs, moto and dask.distributed are in the test extra (pyproject.toml): imported, not
# skipped when missing, so a broken install fails instead of quietly testing less
import distributed
import moto.server  # noqa: F401  (the local S3-compatible server the fixtures start)
import s3fs

import rankfold
import rankfold.udfs
from rankfold.udfs.store import remote
from rankfold.udfs.store.manifest_schema import sealed_by_groups

BUCKET = "rankfold-tests"
KEY, SECRET = "test-key", "test-secret"  # the local server accepts any credentials


@pytest.fixture(scope="module")
def store():
    """A local S3-compatible server for this module: its endpoint, stopped at the end."""
    from moto.server import ThreadedMotoServer

    logging.getLogger("werkzeug").setLevel(logging.ERROR)  # one log line per request otherwise
    server = ThreadedMotoServer(ip_address="127.0.0.1", port=0, verbose=False)
    server.start()
    try:
        host, port = server.get_host_and_port()
        endpoint = f"http://{host}:{port}"
        import boto3

        boto3.client("s3", endpoint_url=endpoint, aws_access_key_id=KEY, aws_secret_access_key=SECRET,
                     region_name="us-east-1").create_bucket(Bucket=BUCKET)
        fs = s3fs.S3FileSystem(key=KEY, secret=SECRET, endpoint_url=endpoint, skip_instance_cache=True)
        yield {"endpoint": endpoint, "fs": fs,
               "options": {"key": KEY, "secret": SECRET, "endpoint_url": endpoint,
                           "skip_instance_cache": True}}
    finally:
        server.stop()


@pytest.fixture
def aws_env(store, monkeypatch):
    """The store's usual environment variables, for the paths without storage_options (CLI, SQL)."""
    monkeypatch.setenv("AWS_ACCESS_KEY_ID", KEY)
    monkeypatch.setenv("AWS_SECRET_ACCESS_KEY", SECRET)
    monkeypatch.setenv("AWS_ENDPOINT_URL", store["endpoint"])
    monkeypatch.setenv("AWS_DEFAULT_REGION", "us-east-1")


def _table(seed: int = 0, rows: int = 3000, width: int = 12) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return rng.standard_normal((rows, 3)) @ rng.standard_normal((3, width)) + 0.01 * rng.standard_normal((rows, width))


def _upload_parquet(store, x: np.ndarray, prefix: str, files: int = 2) -> str:
    for k, part in enumerate(np.array_split(x, files)):
        buffer = io.BytesIO()
        pq.write_table(pa.table({f"c{j:02d}": part[:, j] for j in range(x.shape[1])}), buffer,
                       row_group_size=500)
        store["fs"].pipe(f"{BUCKET}/{prefix}/part-{k}.parquet", buffer.getvalue())
    return f"s3://{BUCKET}/{prefix}"


def test_round_trip_through_the_store(store, tmp_path):
    x = _table()
    url = f"s3://{BUCKET}/round-trip.rfa"
    archive = rankfold.compress(x, url, rank=3, storage_options=store["options"])
    assert archive.url == url
    listed = sorted(p.rsplit("/", 1)[1] for p in store["fs"].find(f"{BUCKET}/round-trip.rfa"))
    manifest = json.loads(store["fs"].cat(f"{BUCKET}/round-trip.rfa/manifest.json"))
    assert listed == sorted([f["name"] for f in manifest["files"]] + ["manifest.json"])
    opened = rankfold.open(url, storage_options=store["options"], checksums=True)
    rebuilt, bounds = opened.to_numpy(), opened.cell_bounds()
    assert np.all(np.abs(rebuilt - x) <= bounds)  # the bound contract, on values read back
    local = rankfold.compress(x, tmp_path / "local.rfa", rank=3)
    np.testing.assert_array_equal(rebuilt, local.to_numpy())  # same build, local or stored
    # the private local copy goes away with the archive object
    copy_dir = opened._copy.directory
    del opened, archive
    import gc

    gc.collect()
    assert not copy_dir.exists()


def test_an_archive_on_the_store_is_never_replaced(store):
    x = _table(1, rows=500, width=6)
    url = f"s3://{BUCKET}/kept.rfa"
    rankfold.compress(x, url, rank=2, storage_options=store["options"])
    before = store["fs"].cat(f"{BUCKET}/kept.rfa/manifest.json")
    with pytest.raises(rankfold.ArchiveExistsError, match="already holds an archive"):
        rankfold.compress(x, url, rank=2, storage_options=store["options"])
    with pytest.raises(rankfold.InvalidInputError, match="no atomic"):
        rankfold.compress(x, url, rank=2, overwrite=True, storage_options=store["options"])
    assert store["fs"].cat(f"{BUCKET}/kept.rfa/manifest.json") == before
    with pytest.raises(rankfold.ArchiveNotFoundError):
        rankfold.open(f"s3://{BUCKET}/absent.rfa", storage_options=store["options"])


def test_a_failed_upload_leaves_no_archive(store, monkeypatch):
    """The manifest is the commit point: it is written last, so an upload that fails leaves
    data files that nothing opens, and compress refuses to write over them."""
    url = f"s3://{BUCKET}/failed.rfa"
    calls = []
    real_put = s3fs.S3FileSystem.put_file

    def failing_put(self, lpath, rpath, *args, **kwargs):
        calls.append(rpath)
        if len(calls) == 2:
            raise OSError("connection lost (simulated)")
        return real_put(self, lpath, rpath, *args, **kwargs)

    monkeypatch.setattr(s3fs.S3FileSystem, "put_file", failing_put)
    with pytest.raises(OSError, match="simulated"):
        rankfold.compress(_table(2, rows=400, width=5), url, rank=2, storage_options=store["options"])
    monkeypatch.undo()
    assert not store["fs"].exists(f"{BUCKET}/failed.rfa/manifest.json")
    assert not any(c.endswith("manifest.json") for c in calls)
    with pytest.raises(rankfold.ArchiveNotFoundError):
        rankfold.open(url, storage_options=store["options"])
    with pytest.raises(rankfold.ArchiveExistsError, match="without a manifest"):
        rankfold.compress(_table(2, rows=400, width=5), url, rank=2, storage_options=store["options"])


def test_source_on_the_store_with_the_local_executor(store, tmp_path):
    x = _table(3, rows=2000, width=8)
    source = _upload_parquet(store, x, "source-local")
    archive = rankfold.compress(source, f"s3://{BUCKET}/from-store.rfa", rank=3,
                                storage_options=store["options"])
    assert archive.shape == (2000, 8)
    rebuilt, bounds = archive.to_numpy(), archive.cell_bounds()
    assert np.all(np.abs(rebuilt - x) <= bounds)


def test_dask_compress_writes_to_the_store(store):
    """Workers in processes of their own (what they send back must pickle: no open upload)."""
    x = _table(4, rows=2000, width=8)
    source = _upload_parquet(store, x, "source-dask", files=3)
    url = f"s3://{BUCKET}/dask.rfa"
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=":0") as cluster, distributed.Client(cluster) as client:
        archive = rankfold.compress(source, url, rank=3, executor=client, storage_options=store["options"])
    assert store["fs"].exists(f"{BUCKET}/dask.rfa/manifest.json")
    local = rankfold.compress(source, f"s3://{BUCKET}/dask-local.rfa", rank=3,
                              storage_options=store["options"])
    assert archive.basis_columns == local.basis_columns
    rebuilt, bounds = archive.to_numpy(), archive.cell_bounds()
    assert np.all(np.abs(rebuilt - x) <= bounds)


def test_sql_scan_and_cli_read_the_store(store, aws_env, tmp_path, capsys):
    import duckdb

    from rankfold.cli import main

    x = _table(5, rows=300, width=4)
    source = _upload_parquet(store, x, "source-cli", files=1)
    url = f"s3://{BUCKET}/cli.rfa"
    assert main(["compress", source, url, "--rank", "2"]) == 0
    capsys.readouterr()
    out = tmp_path / "rebuilt.parquet"
    assert main(["rebuild", url, "--output", str(out)]) == 0
    rebuilt = pq.read_table(out).to_pandas().to_numpy()
    archive = rankfold.open(url)
    np.testing.assert_array_equal(rebuilt, archive.to_numpy())
    con = duckdb.connect()
    rankfold.udfs.register(con)
    scanned = con.execute(f"SELECT c00, c03 FROM rankfold_scan('{url}') ORDER BY _rf_row").fetchnumpy()
    np.testing.assert_allclose(scanned["c00"], archive.to_numpy(columns=["c00"])[:, 0], rtol=0, atol=1e-12)
    assert remote.is_url(url) and not remote.is_url(str(tmp_path))


# -- a Dask compress writes its partitions straight to the store (store_writer) ---------------
def _spy_parquet_writers(monkeypatch) -> list:
    """Record where every Parquet file of the call is written (a local path or a file object)."""
    targets = []
    real = pq.ParquetWriter

    class Spy(real):
        def __init__(self, where, *args, **kwargs):
            targets.append(where)
            super().__init__(where, *args, **kwargs)

    monkeypatch.setattr(pq, "ParquetWriter", Spy)
    return targets


def _dask_client():
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                       dashboard_address=":0")
    return cluster, distributed.Client(cluster)


def test_dask_partitions_go_straight_to_the_store(store, tmp_path, monkeypatch):
    """No row file or exact-cell file of a Dask compress to a URL is written on the client's
    disk: the workers stream them to a staging prefix, the client moves them into place.
    The streamed sizes and SHA-256s must equal those the local commit computes from files
    (``store.manifest.file_entry``) for the same Dask build, and the bounds must hold."""
    x = _table(6, rows=2400, width=8)
    x[::97] = np.nan  # NaN cells outside the basis are stored exactly: each partition writes cells
    source = _upload_parquet(store, x, "source-straight", files=3)
    url = f"s3://{BUCKET}/straight.rfa"
    cluster, client = _dask_client()
    try:
        reference = rankfold.compress(source, tmp_path / "dask-local.rfa", rank=3, executor=client,
                                      storage_options=store["options"])
        targets = _spy_parquet_writers(monkeypatch)
        archive = rankfold.compress(source, url, rank=3, executor=client,
                                    storage_options=store["options"])
        monkeypatch.undo()
    finally:
        client.close()
        cluster.close()
    local_files = [str(t) for t in targets if isinstance(t, (str, bytes, os.PathLike))]
    streamed = [t for t in targets if isinstance(t, remote.StagedUpload)]
    assert not [f for f in local_files if f.rsplit("/", 1)[-1].startswith(("rows-", ".part-", ".cells-"))]
    assert sorted(u.path.rsplit("/", 1)[1] for u in streamed) == [
        ".cells-00000.parquet", ".cells-00001.parquet", ".cells-00002.parquet",
        ".part-00000-0000.parquet", ".part-00001-0000.parquet", ".part-00002-0000.parquet"]
    assert all(".rankfold-staging-" in u.path for u in streamed)
    # the prefix holds exactly the manifest's files: the staging objects are gone
    manifest = json.loads(store["fs"].cat(f"{BUCKET}/straight.rfa/manifest.json"))
    listed = sorted(p.split("straight.rfa/", 1)[1] for p in store["fs"].find(f"{BUCKET}/straight.rfa"))
    assert listed == sorted([f["name"] for f in manifest["files"]] + ["manifest.json"])
    # streamed records == file_entry of the same files written locally (same build)
    local_manifest = json.loads((tmp_path / "dask-local.rfa" / "manifest.json").read_text())
    # streamed row files carry size, SHA-256 and footer digest, as a local build measures them
    # (hashlib over the file); not the per-row-group digests, which need the finished file:
    # SQL checks such a row file whole (manifest_schema.sealed_by_groups)
    whole = ("name", "bytes", "sha256", "footer_sha256")
    rows_of = lambda m: [{k: f[k] for k in whole if k in f}  # noqa: E731
                         for f in m["files"] if f["name"].startswith("rows-")]
    assert len(rows_of(manifest)) == 3 and rows_of(manifest) == rows_of(local_manifest)
    assert not any(sealed_by_groups(f) for f in manifest["files"] if f["name"].startswith("rows-"))
    opened = rankfold.open(url, storage_options=store["options"], checksums=True)  # every SHA-256
    rebuilt, bounds = opened.to_numpy(), opened.cell_bounds()
    np.testing.assert_array_equal(rebuilt, reference.to_numpy())
    finite = np.isfinite(x)
    assert np.all(np.abs(rebuilt[finite] - x[finite]) <= bounds[finite])  # the bound contract
    assert np.all(np.isnan(rebuilt[~finite]))
    assert archive.shape == (2400, 8)


def test_staged_upload_measures_what_file_entry_measures(store, tmp_path, monkeypatch):
    """Size, SHA-256 and footer SHA-256 of a streamed Parquet file equal
    ``store.manifest.file_entry`` of the same bytes, whether the footer is in the kept tail
    or must be read back from the store."""
    from rankfold.udfs.store.manifest import file_entry

    table = pa.table({"a": np.arange(50_000, dtype=np.float64), "b": np.arange(50_000) % 7})
    for tail in (1 << 20, 64):
        monkeypatch.setattr(remote, "_TAIL_BYTES", tail)
        staging = remote.Staging(store["fs"], f"{BUCKET}/upload-check-{tail}")
        upload = staging.open("f.parquet")
        with pq.ParquetWriter(upload, table.schema) as writer:
            writer.write_table(table, row_group_size=10_000)
        upload.close()
        store["fs"].get_file(staging.path("f.parquet"), str(tmp_path / "f.parquet"))
        expected = file_entry(tmp_path, "f.parquet")
        assert upload.record == {k: expected[k] for k in ("bytes", "sha256", "footer_sha256")}
        assert pickle.loads(pickle.dumps(upload)).record == upload.record  # sent back by workers


def _staged_and_final_objects(store, prefix: str) -> list[str]:
    store["fs"].invalidate_cache(f"{BUCKET}/{prefix}")
    return store["fs"].find(f"{BUCKET}/{prefix}")


def test_a_failed_dask_compress_leaves_nothing_on_the_store(store, monkeypatch):
    """A worker that fails after its files reached the staging prefix, and a copy that fails
    while the client assembles: no manifest, no staged object and no copied object is left,
    and the prefix takes a new compress."""
    from rankfold.udfs.passes import compress as compress_module

    x = _table(7, rows=1800, width=6)
    source = _upload_parquet(store, x, "source-failing", files=3)
    url = f"s3://{BUCKET}/failing.rfa"
    staged = []
    real_open = remote.Staging.open

    def counting_open(self, name):
        staged.append(name)
        return real_open(self, name)

    real_task = compress_module._encode_task

    def failing_task(blocks, part, *args):
        out = real_task(blocks, part, *args)  # its files are on the store now
        if part.index == 1:
            raise OSError("worker lost (simulated)")
        return out

    real_adopt = remote.RemoteTarget.adopt
    adopted = []

    def failing_adopt(self, staged_path, name, size):
        adopted.append(name)
        if len(adopted) == 2:
            raise OSError("copy failed (simulated)")
        return real_adopt(self, staged_path, name, size)

    cluster, client = _dask_client()
    try:
        monkeypatch.setattr(remote.Staging, "open", counting_open)
        with monkeypatch.context() as patch:
            patch.setattr(compress_module, "_encode_task", failing_task)
            with pytest.raises(OSError, match="worker lost"):
                rankfold.compress(source, url, rank=2, executor=client, storage_options=store["options"])
        assert staged  # files did reach the staging prefix
        assert _staged_and_final_objects(store, "failing.rfa") == []
        staged.clear()
        with monkeypatch.context() as patch:
            patch.setattr(remote.RemoteTarget, "adopt", failing_adopt)
            with pytest.raises(OSError, match="copy failed"):
                rankfold.compress(source, url, rank=2, executor=client, storage_options=store["options"])
        assert staged and adopted == ["rows-00000.parquet", "rows-00001.parquet"]
        assert _staged_and_final_objects(store, "failing.rfa") == []
        archive = rankfold.compress(source, url, rank=2, executor=client, storage_options=store["options"])
    finally:
        client.close()
        cluster.close()
    rebuilt, bounds = archive.to_numpy(), archive.cell_bounds()
    assert np.all(np.abs(rebuilt - x) <= bounds)
