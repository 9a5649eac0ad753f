"""Out of core: compressing a table larger than the memory the process may use.

A subprocess caps its address space (``resource.setrlimit(RLIMIT_AS)``) at what it already
uses plus 300 MB, then compresses an invented 1.6e6 x 40 float64 table (512 MB of values in
a Parquet file written in chunks): it must succeed, and the rebuilt rows must meet their bounds.
"""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

import rankfold

ROWS, WIDTH, CHUNK = 1_600_000, 40, 200_000
MIX = np.random.default_rng(11).standard_normal((4, WIDTH))  # invented low-rank structure


def _chunk(k: int) -> np.ndarray:
    rng = np.random.default_rng(100 + k)
    return rng.standard_normal((CHUNK, 4)) @ MIX + 0.01 * rng.standard_normal((CHUNK, WIDTH))


CHILD = textwrap.dedent("""
    import resource, sys
    import duckdb, numpy as np, rankfold
    def address_space():
        for line in open("/proc/self/status"):
            if line.startswith("VmSize"):
                return int(line.split()[1]) * 1024
    con = duckdb.connect(config={"threads": 1, "memory_limit": "64MB"})
    # warm up every library first, so the cap measures what the compress itself needs
    rankfold.compress(np.random.default_rng(0).standard_normal((5000, 40)), sys.argv[2] + ".warm",
                      rank=2, batch_rows=16384)
    cap = address_space() + 300 * 2**20
    resource.setrlimit(resource.RLIMIT_AS, (cap, cap))
    rankfold.compress(f"SELECT * FROM read_parquet('{sys.argv[1]}')", sys.argv[2], connection=con,
                      rank=4, batch_rows=16384)
    print("compressed")
""")


def test_compress_under_a_memory_cap_below_the_table_size(tmp_path):
    data = tmp_path / "big.parquet"
    schema = pa.schema([(f"c{j}", pa.float64()) for j in range(WIDTH)])
    with pq.ParquetWriter(data, schema) as writer:
        for k in range(ROWS // CHUNK):
            x = _chunk(k)
            writer.write_table(pa.table({f"c{j}": x[:, j] for j in range(WIDTH)}, schema=schema),
                               row_group_size=65_536)
    assert ROWS * WIDTH * 8 > 1.5 * 300 * 2**20  # the values alone exceed the cap by half
    env = dict(os.environ, MALLOC_ARENA_MAX="1", OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1")
    out = tmp_path / "big.rankfold"
    done = subprocess.run([sys.executable, "-c", CHILD, str(data), str(out)], env=env,
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 0 and "compressed" in done.stdout, done.stderr[-2000:]
    archive = rankfold.open(out)
    assert archive.shape == (ROWS, WIDTH)
    assert len(archive.manifest["row_parts"]) >= 2  # row data partitioned by row ranges
    # a row range from the middle: read from its own row groups, bounds hold against the truth
    k = 5
    truth = _chunk(k)[:1000]
    rows = slice(k * CHUNK, k * CHUNK + 1000)
    assert np.all(np.abs(archive.to_numpy(rows=rows) - truth) <= archive.cell_bounds(rows=rows))
    # streamed export of the same range, in batches
    batches = list(archive.iter_batches(rows=rows, batch_rows=300))
    assert [b.num_rows for b in batches] == [300, 300, 300, 100]
    stacked = np.column_stack([pa.concat_tables(batches).column(j).to_numpy() for j in range(WIDTH)])
    assert np.array_equal(stacked, archive.to_numpy(rows=rows))
