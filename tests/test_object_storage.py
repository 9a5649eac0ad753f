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

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

pytest.importorskip("moto.server")
s3fs = pytest.importorskip("s3fs")

import rankfold  # noqa: E402
import rankfold.udfs  # noqa: E402
from rankfold.udfs.store import remote  # noqa: E402

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
    distributed = pytest.importorskip("distributed")
    x = _table(4, rows=2000, width=8)
    source = _upload_parquet(store, x, "source-dask", files=3)
    url = f"s3://{BUCKET}/dask.rfa"
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                  dashboard_address=None) as cluster, distributed.Client(cluster) as client:
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
