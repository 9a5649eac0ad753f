"""Scale benchmark (issue 5): peak memory and time of compress against the row count, the
ratio to one DuckDB scan, and in-process vs Dask LocalCluster. A script, not a test.

    python benchmarks/scale.py --rows 1000000 4000000 16000000 --width 100 --out /work/scale_tmp

(a) each compress runs in a subprocess, which reports its own time and peak RSS (VmHWM of
    /proc/self/status: getrusage's ru_maxrss also counts the parent's RSS at fork);
(b) a child of its own times one full DuckDB scan of the source (every column streamed as
    Arrow); after one untimed warm-up scan, scans and compresses alternate (--repeats) and
    the best of each is compared;
(c) for the smallest size, the same compress on a LocalCluster with 2 worker processes,
    checked for the same basis columns, anchor rows and values;
(d) how many rows the sketch read (a seeded sample of row groups by default, see
    sketch_rows) and the archive's measured error, and for the smallest size the error of
    the same compress with a sketch of every row (sketch_rows='all');
(e) with --duckdb-table, the same data loaded into a table of a DuckDB file database, and the
    ratio of compressing that table to one scan of it (scan and compress alternated); the
    compress opens the database with memory_limit (--table-memory-limit, default 250MB) and
    one thread (the caller's connection bounds DuckDB's buffer pool);
(f) with --memory-only, just the peak RSS of one compress per size: rank 8, an error target
    (max_abs_error=0.05: every row sketched, a refit pass, residual codes) and, with
    --duckdb-table, the table; targets: under 1 GB, growth under 1.2x.
Data: invented (rank 8 plus 1% noise, fixed seeds), written as Parquet files in chunks of
250,000 rows so generating it stays small. Generated data is deleted at the end.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

CHUNK = 250_000

CHILD = r"""
import json, sys, time
import duckdb, numpy as np
import rankfold
import rankfold.udfs.passes.compress  # imported before the clock starts, like duckdb for the scan
source, target, executor = sys.argv[1], sys.argv[2], sys.argv[3]
sketch_rows = sys.argv[4] if len(sys.argv) > 4 else "auto"
out = {}
if executor == "scan":
    con = duckdb.connect()
    t = time.perf_counter()
    rows = 0
    for batch in con.sql(f"SELECT * FROM read_parquet('{source}/*.parquet')").to_arrow_reader(131072):
        rows += batch.num_rows
    out["seconds"] = time.perf_counter() - t
elif executor == "table-scan":
    con = duckdb.connect(source, read_only=True)
    t = time.perf_counter()
    rows = 0
    for batch in con.sql("SELECT * FROM readings").to_arrow_reader(131072):
        rows += batch.num_rows
    out["seconds"] = time.perf_counter() - t
elif executor == "table":
    # the caller bounds DuckDB's buffer pool on its own connection (memory_limit, threads)
    con = duckdb.connect(source, read_only=True,
                         config={"memory_limit": sys.argv[5], "threads": 1})
    cap = sys.argv[6] if len(sys.argv) > 6 else "none"
    t = time.perf_counter()
    if cap != "none":  # the caller lowers the instance-wide limit around the call only
        con.execute("SET memory_limit = ?", [cap])
    try:
        archive = rankfold.compress("readings", target, connection=con, rank=8, sketch_rows=sketch_rows)
    finally:
        if cap != "none":
            con.execute("SET memory_limit = ?", [sys.argv[5]])
    out["seconds"] = time.perf_counter() - t
    out["relative_frobenius"] = archive.errors["relative_frobenius"]
    out["sketch_rows_read"] = archive.manifest["sketch"]["rows_read"]
elif executor == "dask":
    from distributed import Client, LocalCluster
    with LocalCluster(n_workers=2, threads_per_worker=1, dashboard_address=None) as cluster, Client(cluster) as client:
        t = time.perf_counter()
        rankfold.compress(source, target, rank=8, executor=client)
        out["seconds"] = time.perf_counter() - t
elif executor == "target":  # an error target: every row sketched, a refit pass, residual codes
    t = time.perf_counter()
    archive = rankfold.compress(source, target, max_abs_error=0.05)
    out["seconds"] = time.perf_counter() - t
    out["relative_frobenius"] = archive.errors["relative_frobenius"]
    out["sketch_rows_read"] = archive.manifest["sketch"]["rows_read"]
else:
    t = time.perf_counter()
    archive = rankfold.compress(source, target, rank=8, sketch_rows=sketch_rows)
    out["seconds"] = time.perf_counter() - t
    out["relative_frobenius"] = archive.errors["relative_frobenius"]
    out["sketch_rows_read"] = archive.manifest["sketch"]["rows_read"]
out["peak_rss_mb"] = next(int(line.split()[1]) / 1024 for line in open("/proc/self/status")
                         if line.startswith("VmHWM"))
print(json.dumps(out))
"""


def generate(folder: Path, rows: int, width: int) -> None:
    folder.mkdir(parents=True)
    mix = np.random.default_rng(1).standard_normal((8, width))
    for k, lo in enumerate(range(0, rows, CHUNK)):
        rng = np.random.default_rng(1000 + k)
        x = rng.standard_normal((min(CHUNK, rows - lo), 8)) @ mix
        x += 0.01 * rng.standard_normal(x.shape)
        pq.write_table(pa.table({f"c{j:03d}": x[:, j] for j in range(width)}),
                       folder / f"part-{k:05d}.parquet", row_group_size=125_000)


TABLE_MEMORY_LIMIT = "250MB"
TABLE_CAP = "none"  # --table-cap: memory_limit set on the open connection around compress only


def child(source: Path, target: Path, executor: str, sketch_rows: str = "auto") -> tuple[float, float, dict]:
    """(seconds, peak RSS in MB, everything the child printed) of one run in a fresh subprocess."""
    done = subprocess.run([sys.executable, "-c", CHILD, str(source), str(target), executor, sketch_rows,
                           TABLE_MEMORY_LIMIT, TABLE_CAP], capture_output=True, text=True, check=True)
    out = json.loads(done.stdout.strip().splitlines()[-1])
    return out["seconds"], out["peak_rss_mb"], out


def table_ratio(data: Path, out: Path, rows: int, repeats: int) -> None:
    """(e): the data as a DuckDB table; compress of the table against one scan of it."""
    database = out / f"table-{rows}.duckdb"
    database.unlink(missing_ok=True)
    load = ("import duckdb, sys; duckdb.connect(sys.argv[1]).sql("
            "f\"CREATE TABLE readings AS SELECT * FROM read_parquet('{sys.argv[2]}/*.parquet')\")")
    subprocess.run([sys.executable, "-c", load, str(database), str(data)], check=True,
                   capture_output=True)  # in a child: this process stays small for the others
    os.sync()
    child(database, out / "unused", "table-scan")  # warm-up, untimed
    scans, runs, peak = [], [], 0.0
    for _ in range(repeats):
        scans.append(child(database, out / "unused", "table-scan")[0])
        shutil.rmtree(out / f"t-{rows}.rankfold", ignore_errors=True)
        seconds, rss, result = child(database, out / f"t-{rows}.rankfold", "table")
        runs.append(seconds)
        peak = max(peak, rss)
    shutil.rmtree(out / f"t-{rows}.rankfold", ignore_errors=True)
    database.unlink()
    print(f"  DuckDB table: scan {min(scans):.1f} s, compress {min(runs):.1f} s, ratio "
          f"{min(runs) / min(scans):.2f} (scan {', '.join(f'{v:.1f}' for v in scans)}; compress "
          f"{', '.join(f'{v:.1f}' for v in runs)}); sketch read {result['sketch_rows_read']} rows; "
          f"peak RSS {peak:.0f} MB (DuckDB's buffer pool holds table pages up to its memory_limit)",
          flush=True)


def memory_only(args) -> None:
    """--memory-only: peak RSS of one compress per size and kind, side by side."""
    kinds = ["local", "target"] + (["table"] if args.duckdb_table else [])
    peaks: dict[str, list[float]] = {k: [] for k in kinds}
    print(f"{'rows':>10} " + " ".join(f"{k + ' MB':>12} {k + ' s':>9}" for k in kinds)
          + f"   (table: DuckDB file database, memory_limit {TABLE_MEMORY_LIMIT}, 1 thread"
          + (f"; {TABLE_CAP} set around compress)" if TABLE_CAP != "none" else ")"))
    for rows in sorted(args.rows):
        data = args.out / f"data-{rows}"
        generate(data, rows, args.width)
        os.sync()
        cells = []
        for kind in kinds:
            source = data
            if kind == "table":
                source = args.out / f"table-{rows}.duckdb"
                source.unlink(missing_ok=True)
                load = ("import duckdb, sys; duckdb.connect(sys.argv[1]).sql(f\"CREATE TABLE readings AS "
                        "SELECT * FROM read_parquet('{sys.argv[2]}/*.parquet')\")")
                subprocess.run([sys.executable, "-c", load, str(source), str(data)], check=True,
                               capture_output=True)
            target = args.out / f"m-{rows}-{kind}.rfa"
            shutil.rmtree(target, ignore_errors=True)
            seconds, rss, _ = child(source, target, kind)
            shutil.rmtree(target, ignore_errors=True)
            if kind == "table":
                source.unlink()
            peaks[kind].append(rss)
            cells.append(f"{rss:>12.0f} {seconds:>9.1f}")
        print(f"{rows:>10} " + " ".join(cells), flush=True)
        if not args.keep:
            shutil.rmtree(data)
    for kind in kinds:
        growth = peaks[kind][-1] / peaks[kind][0]
        print(f"{kind}: peak RSS {max(peaks[kind]):.0f} MB at most ({'under' if max(peaks[kind]) < 1024 else 'OVER'}"
              f" 1 GB); growth from {min(args.rows)} to {max(args.rows)} rows {growth:.2f}x "
              f"({'meets' if growth < 1.2 else 'misses'} the < 1.2x target)")


def main() -> None:
    global TABLE_MEMORY_LIMIT, TABLE_CAP  # the child's table connection reads them
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--rows", type=int, nargs="+", default=[1_000_000, 4_000_000, 16_000_000])
    parser.add_argument("--width", type=int, default=100)
    parser.add_argument("--out", type=Path, default=Path("scale_tmp"))
    parser.add_argument("--keep", action="store_true", help="keep the generated data")
    parser.add_argument("--duckdb-table", action="store_true",
                        help="also compress the data as a table of a DuckDB file database")
    parser.add_argument("--table-memory-limit", default=TABLE_MEMORY_LIMIT,
                        help="DuckDB memory_limit of the table's connection (default %(default)s)")
    parser.add_argument("--table-cap", default=TABLE_CAP,
                        help="memory_limit the caller sets on the open table connection just around "
                             "compress, restored after (default %(default)s: none)")
    parser.add_argument("--memory-only", action="store_true",
                        help="one compress per size (rank 8, an error target, and with --duckdb-table "
                             "the table), peak RSS only: no scans, no Dask, no full-sketch run")
    parser.add_argument("--repeats", type=int, default=2,
                        help="scan and compress runs per size, alternated (the best of each is compared)")
    args = parser.parse_args()
    TABLE_MEMORY_LIMIT = args.table_memory_limit
    TABLE_CAP = args.table_cap
    args.out.mkdir(parents=True, exist_ok=True)
    if args.memory_only:
        return memory_only(args)
    print(f"{'rows':>10} {'width':>5} {'scan s':>8} {'compress s':>10} {'ratio':>6} {'peak RSS MB':>11}"
          "   (best of each; every run in brackets)")
    peaks = []
    try:
        for rows in sorted(args.rows):
            data = args.out / f"data-{rows}"
            generate(data, rows, args.width)
            os.sync()  # the generated files are on disk before anything is timed
            child(data, args.out / "unused", "scan")  # warm-up, untimed: same cache state for both
            scans, runs, peak = [], [], 0.0
            for _ in range(args.repeats):  # alternated, so drifts of the machine hit both alike
                scans.append(child(data, args.out / "unused", "scan")[0])
                shutil.rmtree(args.out / f"a-{rows}.rankfold", ignore_errors=True)
                seconds, rss, out = child(data, args.out / f"a-{rows}.rankfold", "local")
                runs.append(seconds)
                peak = max(peak, rss)
            peaks.append(peak)
            scan, seconds = min(scans), min(runs)
            print(f"{rows:>10} {args.width:>5} {scan:>8.1f} {seconds:>10.1f} {seconds / scan:>6.2f} {peak:>11.0f}"
                  f"   (scan {', '.join(f'{v:.1f}' for v in scans)}; compress {', '.join(f'{v:.1f}' for v in runs)})",
                  flush=True)
            print(f"  sketch read {out['sketch_rows_read']} of {rows} rows; relative Frobenius error "
                  f"{out['relative_frobenius']:.5f}", flush=True)
            if rows == min(args.rows):
                import rankfold

                full_seconds, _, full = child(data, args.out / f"f-{rows}.rankfold", "local", "all")
                shutil.rmtree(args.out / f"f-{rows}.rankfold", ignore_errors=True)
                print(f"  with a sketch of every row (sketch_rows='all'): {full_seconds:.1f} s, relative "
                      f"Frobenius error {full['relative_frobenius']:.5f} (sampled / full: "
                      f"{out['relative_frobenius'] / full['relative_frobenius']:.4f})", flush=True)
                dask_seconds, _, _ = child(data, args.out / f"d-{rows}.rankfold", "dask")
                a, b = rankfold.open(args.out / f"a-{rows}.rankfold"), rankfold.open(args.out / f"d-{rows}.rankfold")
                same = a.basis_columns == b.basis_columns and a.anchor_rows == b.anchor_rows
                diff = float(np.nanmax(np.abs(a.to_numpy(rows=slice(0, 200_000)) - b.to_numpy(rows=slice(0, 200_000)))))
                print(f"  dask LocalCluster (2 workers): {dask_seconds:.1f} s, ratio to in-process "
                      f"{dask_seconds / seconds:.2f}; same basis and anchors: {same}; max value difference "
                      f"(first 200,000 rows) {diff:.2e}", flush=True)
            shutil.rmtree(args.out / f"a-{rows}.rankfold", ignore_errors=True)
            shutil.rmtree(args.out / f"d-{rows}.rankfold", ignore_errors=True)
            if args.duckdb_table:
                table_ratio(data, args.out, rows, args.repeats)
            if not args.keep:
                shutil.rmtree(data)
        growth = peaks[-1] / peaks[0]
        print(f"peak RSS growth from {min(args.rows)} to {max(args.rows)} rows: {growth:.2f}x "
              f"({'meets' if growth < 1.2 else 'misses'} the < 1.2x target)")
    finally:
        if not args.keep:
            for path in args.out.glob("data-*"):
                shutil.rmtree(path, ignore_errors=True)


if __name__ == "__main__":
    main()
