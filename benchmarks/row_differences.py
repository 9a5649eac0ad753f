"""Row-difference coding of residual codes (``store/row_differences.py``): bytes and read
times with and without it, side by side in one run.

Invented data (fixed seed): ROWS x COLS independent Gaussian random walks (a smooth series
table: low rank explains little, the previous row a lot) plus an ``id`` key, compressed twice
by the same run at ``max_std_error`` (every column within TOL of its standard deviation): once
as is, once with every coded column forced to row differences (``row_differences=[...]``).

Printed: bytes of the whole archive, of the row files and of the residual-code column chunks
(Parquet footers: compressed sizes), then times, best of N alternated runs (wall and CPU of
this process, DuckDB's threads included), and the ratio with / without:

  sql full scan        CREATE TEMP TABLE AS SELECT * FROM rankfold_scan(path) (checks cached)
  sql point lookup     SELECT * FROM rankfold_scan(path) WHERE id = K, a new K each run
                       (with differences: every chunk decoded, the filter cannot pass the window)
  sql lookup predicate SELECT * FROM rankfold_scan(path, predicate := 'id = K') (one chunk decoded)
  sql cell             SELECT rankfold_cell(path, K, 'w3'), a new K each run
  sql filtered scan    rankfold_scan(path, predicate := 'id % 100 = 7')
  python full scan     rankfold.open(path).to_numpy()
  python point lookup  archive.cell(K, 'w3') on an open archive, a new K each run

With ``--extra N``, N columns of rank-4 structure are added and only the walks are forced.

Usage: python benchmarks/row_differences.py [--rows 50000] [--cols 8] [--extra 0] [--tol 0.01]
       [--repeat 5] [--out /tmp/rf_rowdiff]

Results
-------
DEVELOPERS.md, "Row differences", holds the last run's figures (sizes at 50,000 x 8 for
--tol 0.1, 0.01, 0.001 and at 1,000,000 x 8; times at 1,000,000 x 8, --repeat 3).
"""

from __future__ import annotations

import argparse
import resource
import shutil
import time
from pathlib import Path

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

import rankfold
from rankfold.udfs.store import layout


def make_table(rows: int, cols: int, extra: int = 0, seed: int = 0) -> pa.Table:
    """``cols`` random walks w0.. and ``extra`` columns x0.. of rank-4 structure plus 1% noise
    (invented, numpy Generator)."""
    rng = np.random.default_rng(seed)
    walks = np.cumsum(rng.normal(size=(rows, cols)), axis=0)
    columns = {"id": pa.array(np.arange(rows, dtype=np.int64))}
    columns.update({f"w{j}": pa.array(walks[:, j]) for j in range(cols)})
    if extra:
        low = rng.normal(size=(rows, 4)) @ rng.normal(size=(4, extra)) + 0.01 * rng.normal(size=(rows, extra))
        columns.update({f"x{j}": pa.array(low[:, j]) for j in range(extra)})
    return pa.table(columns)


def sizes(path: Path) -> tuple[int, int, int]:
    """(whole archive, row files, residual-code column chunks) in bytes."""
    total = sum(f.stat().st_size for f in path.iterdir() if f.is_file() and not f.name.startswith("."))
    rows = codes = 0
    for f in sorted(path.glob("rows-*.parquet")):
        rows += f.stat().st_size
        meta = pq.ParquetFile(f).metadata
        for g in range(meta.num_row_groups):
            for c in range(meta.num_columns):
                column = meta.row_group(g).column(c)
                if column.path_in_schema.startswith(layout.CODE_PATTERN.format("")):
                    codes += column.total_compressed_size
    return total, rows, codes


def _cpu() -> float:
    usage = resource.getrusage(resource.RUSAGE_SELF)
    return usage.ru_utime + usage.ru_stime


def measure(label: str, runs: dict, repeat: int) -> None:
    """Best of ``repeat`` alternated runs of ``runs['with'](k)`` and ``runs['without'](k)``."""
    best = {name: [np.inf, np.inf] for name in runs}
    for k in range(repeat):
        for name, fn in runs.items():
            w0, c0 = time.perf_counter(), _cpu()
            fn(k)
            best[name][0] = min(best[name][0], time.perf_counter() - w0)
            best[name][1] = min(best[name][1], _cpu() - c0)
    (w1, c1), (w0, c0) = best["with"], best["without"]
    print(f"{label:<22} wall {w1:8.4f} / {w0:8.4f} s = {w1 / w0:6.2f}   "
          f"cpu {c1:8.4f} / {c0:8.4f} s = {c1 / max(c0, 1e-9):6.2f}", flush=True)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--rows", type=int, default=50_000)
    parser.add_argument("--cols", type=int, default=8)
    parser.add_argument("--extra", type=int, default=0,
                        help="also this many low-rank columns, not forced (only the walks are)")
    parser.add_argument("--tol", type=float, default=0.01)
    parser.add_argument("--repeat", type=int, default=5)
    parser.add_argument("--out", default="/tmp/rf_rowdiff")
    args = parser.parse_args()
    out = Path(args.out)
    shutil.rmtree(out, ignore_errors=True)
    out.mkdir(parents=True)
    table = make_table(args.rows, args.cols, args.extra)
    options = dict(key="id", max_std_error=args.tol)
    t0 = time.perf_counter()
    rankfold.compress(table, out / "without", **options)
    t1 = time.perf_counter()
    rankfold.compress(table, out / "with", row_differences=[f"w{j}" for j in range(args.cols)], **options)
    t2 = time.perf_counter()
    paths = {"with": out / "with", "without": out / "without"}
    print(f"{args.rows} x {args.cols} random walks (+ {args.extra} low-rank), max_std_error {args.tol}; compress "
          f"{t2 - t1:.2f} s with / {t1 - t0:.2f} s without")
    measured = {name: sizes(p) for name, p in paths.items()}
    for t, label in enumerate(("archive bytes", "row files bytes", "code chunks bytes")):
        a, b = measured["with"][t], measured["without"][t]
        print(f"{label:<22} {a:>12,} / {b:>12,} = {a / b:6.3f}")
    archive = {name: rankfold.open(p) for name, p in paths.items()}
    coded = archive["with"]._reader.model.difference
    print(f"difference-coded columns: {int(coded.sum())} of {coded.size}")
    assert np.array_equal(archive["with"].to_numpy(), archive["without"].to_numpy(), equal_nan=True)
    con = duckdb.connect()
    rankfold.udfs.register(con)
    rng = np.random.default_rng(1)
    keys = rng.integers(0, args.rows, size=args.repeat)

    def per_archive(make):
        return {name: make(name, p) for name, p in paths.items()}

    for name, p in paths.items():  # warm: checks cached, files in the page cache
        con.execute(f"CREATE OR REPLACE TEMP TABLE t_{name} AS SELECT * FROM rankfold_scan('{p}')")
    measure("sql full scan", per_archive(lambda name, p: lambda k: con.execute(
        f"CREATE OR REPLACE TEMP TABLE t_{name} AS SELECT * FROM rankfold_scan('{p}')")), args.repeat)
    measure("sql point lookup", per_archive(lambda name, p: lambda k: con.sql(
        f"SELECT * FROM rankfold_scan('{p}') WHERE id = {int(keys[k])}").fetchall()), args.repeat)
    measure("sql lookup predicate", per_archive(lambda name, p: lambda k: con.sql(
        f"SELECT * FROM rankfold_scan('{p}', predicate := 'id = {int(keys[k])}')").fetchall()), args.repeat)
    measure("sql cell", per_archive(lambda name, p: lambda k: con.sql(
        f"SELECT rankfold_cell('{p}', {int(keys[k])}, 'w3')").fetchall()), args.repeat)
    measure("sql filtered scan", per_archive(lambda name, p: lambda k: con.sql(
        f"SELECT count(*), sum(w3) FROM rankfold_scan('{p}', predicate := 'id % 100 = 7')").fetchall()),
        args.repeat)
    measure("python full scan", per_archive(lambda name, p: lambda k: rankfold.open(p).to_numpy()), args.repeat)
    measure("python point lookup", per_archive(lambda name, p: lambda k: archive[name].cell(int(keys[k]), "w3")),
            args.repeat)


if __name__ == "__main__":
    main()
