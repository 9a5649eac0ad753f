"""The same passes in process and on dask.distributed: same seed, same archive.

A LocalCluster with two in-process workers (no network); the source is an invented Parquet
dataset of several files, so the distributed passes really run over several partitions.
"""

from __future__ import annotations

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from distributed import Client, LocalCluster

import rankfold
from rankfold.udfs.passes import select

ROWS, WIDTH = 6000, 16


def _data() -> np.ndarray:
    rng = np.random.default_rng(21)  # invented: rank 3 plus noise
    x = rng.standard_normal((ROWS, 3)) @ rng.standard_normal((3, WIDTH)) + 0.02 * rng.standard_normal((ROWS, WIDTH))
    x[17, 5] = np.nan
    return x


@pytest.fixture(scope="module")
def dataset(tmp_path_factory):
    folder = tmp_path_factory.mktemp("dataset")
    x = _data()
    for k, lo in enumerate(range(0, ROWS, 1700)):  # uneven files, several row groups each
        part = x[lo:lo + 1700]
        pq.write_table(pa.table({f"v{j}": part[:, j] for j in range(WIDTH)}),
                       folder / f"part-{k:03d}.parquet", row_group_size=500)
    return folder, x


@pytest.fixture(scope="module")
def client():
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                      dashboard_address=":0") as cluster, Client(cluster) as c:
        yield c


@pytest.mark.parametrize("options", [
    {"rank": 3},
    {"rank": 3, "max_abs_error": 0.05},
    {"rank": 3, "row_method": "leverage", "column_method": "leverage", "link": "optimal"},
    {"rank": 3, "link": "textbook", "column_method": "length_squared", "row_method": "length_squared"},
    {"rank": 3, "method": "svd"},
    {"rank": 3, "sketch_rows": 1500},  # the sketch from a seeded sample of row groups
])
def test_same_seed_same_archive_on_both_executors(dataset, client, tmp_path, options):
    folder, x = dataset
    local = rankfold.compress(str(folder), tmp_path / "local.rankfold", seed=5, **options)
    events = []
    dask = rankfold.compress(str(folder), tmp_path / "dask.rankfold", seed=5, executor=client,
                             progress=events.append, **options)
    assert dask.basis_columns == local.basis_columns
    assert dask.anchor_rows == local.anchor_rows
    a, b = local.to_numpy(), dask.to_numpy()
    assert np.array_equal(np.isnan(a), np.isnan(b))
    assert np.nanmax(np.abs(a - b)) <= 1e-11 * np.nanmax(np.abs(x))  # measured <= 6e-13
    # every bound holds against the numpy truth on the distributed archive
    bounds = dask.cell_bounds()
    finite = np.isfinite(x)
    assert np.all(np.abs(b - x)[finite] <= bounds[finite]) and np.isnan(b[~finite]).all()
    assert len(dask.manifest["row_parts"]) >= 4  # one file (at least) per partition
    assert [p["first_row"] for p in dask.manifest["row_parts"]] == sorted(
        p["first_row"] for p in dask.manifest["row_parts"])
    # progress through the same callback: every pass, ending at every row
    finished = [e for e in events if e["done"]]
    sketch = dask.manifest["sketch"]
    assert sketch == local.manifest["sketch"]
    first = "sketch-sample" if sketch["sampled"] else "profile"
    assert {e["stage"] for e in finished} >= {first, "encode"}
    assert all(e["rows_done"] == (sketch["rows_read"] if e["stage"] == first else ROWS)
               for e in finished)
    assert sketch["sampled"] == ("sketch_rows" in options)


def test_dask_reads_in_memory_tables_in_slices(client, tmp_path, monkeypatch):
    from rankfold.udfs.passes import executors

    monkeypatch.setattr(executors, "PARTITION_ROWS", 4 * 1000)  # slices of 1000 rows
    x = _data()
    local = rankfold.compress(x, tmp_path / "l.rankfold", rank=3, batch_rows=1000)
    dask = rankfold.compress(x, tmp_path / "d.rankfold", rank=3, batch_rows=1000, executor=client)
    assert dask.basis_columns == local.basis_columns and dask.anchor_rows == local.anchor_rows
    assert len(dask.manifest["row_parts"]) == ROWS // 1000


def test_dask_refuses_a_duckdb_table(client, tmp_path):
    con = duckdb.connect()
    con.execute("CREATE TABLE t AS SELECT range::DOUBLE AS a, range * 2.0 AS b FROM range(10)")
    with pytest.raises(rankfold.InvalidInputError, match=r"executor='dask' reads Parquet .*Export it to Parquet"):
        rankfold.compress("t", tmp_path / "t.rankfold", connection=con, executor=client)


def test_unknown_executor(tmp_path):
    with pytest.raises(rankfold.InvalidInputError, match=r"'executor' option of compress must be 'local', 'dask'"):
        rankfold.compress(np.ones((5, 3)), tmp_path / "x.rankfold", executor="spark")


@pytest.mark.parametrize("method, replace", [("leverage", False), ("length_squared", True), ("qdeim", False)])
def test_row_choice_does_not_depend_on_partitioning(method, replace):
    # the merge of per-partition choices equals the choice over one stream
    rng = np.random.default_rng(3)
    z = rng.standard_normal((3000, 8)) @ np.diag([5, 4, 3, 1, 1, 0.5, 0.5, 0.1])
    from rankfold.udfs.passes.profile import Transform
    from rankfold.udfs.factor.sketch import GramSketch

    transform = Transform("none", np.zeros(8), np.ones(8))
    gram = GramSketch(8)
    gram.update(z)
    sketch = select.sketch_of(gram)

    def partial(lo, hi, step):
        blocks = ((f, z[f:min(f + step, hi)], None) for f in range(lo, hi, step))
        return select.anchor_partial(blocks, select.AnchorScan(transform, sketch, method, 3, 12, 9,
                                                               replace=replace))

    whole = select.merge_anchor_partials([partial(0, 3000, 3000)], 8, method, 12, replace=replace)
    split = select.merge_anchor_partials([partial(0, 1234, 500), partial(1234, 2000, 77),
                                          partial(2000, 3000, 1000)], 8, method, 12, replace=replace)
    assert np.array_equal(whole.positions, split.positions)
    assert np.array_equal(whole.values, z[whole.positions])


def test_passes_run_with_one_blas_thread_and_restore_the_setting(tmp_path):
    # threadpoolctl.threadpool_info reports every loaded BLAS library and its thread count
    from threadpoolctl import threadpool_info

    from rankfold.udfs.passes.executors import one_blas_thread

    before = [(i["filepath"], i["num_threads"]) for i in threadpool_info() if i["user_api"] == "blas"]
    with one_blas_thread():
        inside = [i["num_threads"] for i in threadpool_info() if i["user_api"] == "blas"]
    assert inside and set(inside) == {1}
    assert [(i["filepath"], i["num_threads"]) for i in threadpool_info() if i["user_api"] == "blas"] == before


def test_anchor_scan_left_rows_without_a_transformed_copy_match_the_transformed_product():
    # U_k = Z V_k S_k^-1 (numpy product on the transformed block) against the one-product form
    from rankfold.udfs.passes import select
    from rankfold.udfs.passes.profile import Transform
    from rankfold.udfs.factor import cur
    from rankfold.udfs.factor.sketch import GramSketch

    rng = np.random.default_rng(3)  # invented table, means far from zero
    x = rng.standard_normal((500, 6)) @ rng.standard_normal((6, 6)) * 5.0 + 1e3
    transform = Transform("standardize", x.mean(axis=0), x.std(axis=0))
    gram = GramSketch(6)
    gram.update(transform.apply(x))
    sketch = select.sketch_of(gram)
    scan = select.AnchorScan(transform, sketch, "qdeim", 3, 12, 0, replace=False)
    reference = cur.left_singular_rows(transform.apply(x), sketch.spectrum, 3)
    # private kernel (no public path): the anchor scan's left rows
    # measured: at most 1.3e-15 apart (entries of order 0.1); allowed 1e-14 (was 1e-10)
    np.testing.assert_allclose(scan._left_rows(x), reference, rtol=0, atol=1e-14)


# -- the executor interface ------------------------------------------------------------------------
INTERFACE = {"schema", "description", "distributed", "run", "row_groups", "sample_partitions",
             "open_ahead", "close"}


def test_both_executors_implement_the_one_declared_interface():
    from rankfold.udfs.passes import executors

    assert executors.Executor.__abstractmethods__ == INTERFACE - {"schema", "description", "distributed"}
    assert set(executors.Executor.__annotations__) == {"schema", "description", "distributed"}
    for cls in (executors.LocalExecutor, executors.DaskExecutor):
        assert issubclass(cls, executors.Executor) and not cls.__abstractmethods__


def test_compress_uses_only_the_declared_interface(dataset, tmp_path, monkeypatch):
    """A compress whose executor answers only the interface's members gives the same archive."""
    from rankfold.udfs.passes import compress as compress_module
    from rankfold.udfs.passes import executors

    used: set[str] = set()

    class OnlyTheInterface:
        def __init__(self, inner):
            self._inner = inner

        def __getattr__(self, name):
            if name not in INTERFACE:
                raise AttributeError(f"{name} is not part of the Executor interface")
            used.add(name)
            return getattr(self._inner, name)

    def make(*args, **kwargs):
        executor = executors.make_executor(*args, **kwargs)
        assert isinstance(executor, executors.Executor)
        return OnlyTheInterface(executor)

    folder, _ = dataset
    plain = rankfold.compress(str(folder), tmp_path / "plain.rankfold", rank=3, sketch_rows=1500)
    monkeypatch.setattr(compress_module, "make_executor", make)
    proxied = rankfold.compress(str(folder), tmp_path / "proxied.rankfold", rank=3, sketch_rows=1500)
    assert np.array_equal(proxied.to_numpy(), plain.to_numpy(), equal_nan=True)
    assert {"run", "close", "schema", "description", "distributed"} <= used
