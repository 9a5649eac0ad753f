"""What the integrity checks cost (issue 12 item 2): each read path with and without them,
side by side in one run, best of N alternated runs.

Invented data (fixed seed): ROWS x COLS float64 of rank-8 structure plus 1% noise and an
``id`` key, compressed with rankfold.compress(rank=8). "Without" switches off, for the time of
one measurement only, exactly what the integrity work added: the manifest digest and schema,
the footer and small-table SHA-256, the cross-checks against the files, Parquet page checksum
verification, and the SHA-256 checks of what DuckDB reads (small tables and key-column
chunks before the query, each row group as it is read; or whole row files).

Read paths:
  open                 rankfold.open(path)
  row files decode     pyarrow read of every row file (with: page CRC-32 verified)
  open + SHA-256 ...   open, then the whole-file SHA-256 that SQL checks before DuckDB reads
  python full scan     rankfold.open(path).to_numpy()  (every row and column)
  python point lookup  archive.cell(row, 'c7') on an open archive, a new row each time
  sql full scan cold   first query of a process: CREATE TEMP TABLE AS SELECT * FROM
                       rankfold_scan(path) (materialized inside DuckDB; every row group
                       checked as DuckDB reads it, then cached for the archive version)
  ... whole files      the same, checking the whole row files' SHA-256 instead of each row
                       group as DuckDB reads it
  sql full scan warm   the same query again (checks cached; a stat per file and row group)
  sql point lookup     SELECT rankfold_cell(path, row, 'c7'), reader cached
  sql first lookup     first query of a process: SELECT c7 FROM rankfold_scan(path) WHERE
                       id = K (archive opened, SQL made, key-column chunks and the one row
                       group read checked by SHA-256)
  ... whole files      the same, checking the whole row files' SHA-256 instead (how SQL
                       checked before row-group digests, and still checks archives without them)

    python benchmarks/integrity.py --rows 1000000 --cols 100 --out /tmp/rf_integrity
    (--reuse keeps the archive of an earlier run; it must have been written by this version
    of rankfold to carry row-group digests)
"""

from __future__ import annotations

import argparse
import contextlib
import resource
import shutil
import time
from pathlib import Path

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

import rankfold
from rankfold.udfs.sql import functions as _functions
from rankfold.udfs.sql import register
from rankfold.udfs.store import integrity, manifest, reader


def make_table(rows: int, cols: int, seed: int = 11) -> pa.Table:
    rng = np.random.default_rng(seed)
    left = rng.standard_normal((rows, 8))
    right = rng.standard_normal((8, cols))
    columns = {"id": pa.array(np.arange(rows, dtype=np.int64))}
    for start in range(0, cols, 25):
        stop = min(cols, start + 25)
        block = left @ right[:, start:stop]
        block += 0.01 * rng.standard_normal(block.shape)
        for j in range(start, stop):
            columns[f"c{j}"] = pa.array(block[:, j - start])
    return pa.table(columns)


@contextlib.contextmanager
def checks_off():
    """The read path as it was before the integrity checks: sizes only, plain reads."""
    saved = (integrity.PAGE_CHECKSUMS, manifest.check_listed_files, manifest.validate,
             manifest.manifest_digest, reader.read_small_table, reader.check_tables,
             integrity.RowFileSeal.check, reader.verified_metadata, reader.ArchiveReader.check_for_scan)

    def sizes_only(directory, m):
        for entry in m["files"]:
            if (directory / entry["name"]).stat().st_size != entry["bytes"]:
                raise rankfold.CorruptArchiveError(entry["name"])

    integrity.PAGE_CHECKSUMS = False
    manifest.check_listed_files = sizes_only
    manifest.validate = lambda m, path: None
    manifest.manifest_digest = lambda m: m.get(manifest.DIGEST_FIELD)
    reader.read_small_table = lambda directory, m, name: pq.read_table(directory / name)
    reader.check_tables = lambda r: None
    integrity.RowFileSeal.check = lambda self: None
    reader.verified_metadata = lambda path, entry: pq.read_metadata(path)
    reader.ArchiveReader.check_for_scan = lambda self: False  # plain read_parquet, no row-group check
    try:
        yield
    finally:
        (integrity.PAGE_CHECKSUMS, manifest.check_listed_files, manifest.validate,
         manifest.manifest_digest, reader.read_small_table, reader.check_tables,
         integrity.RowFileSeal.check, reader.verified_metadata, reader.ArchiveReader.check_for_scan) = saved


@contextlib.contextmanager
def whole_files():
    """The SQL scan with the whole-file SHA-256 check instead of the row-group checks."""
    saved = reader.ArchiveReader.check_for_scan

    def whole(self):
        self.seal.check()
        return False

    reader.ArchiveReader.check_for_scan = whole
    try:
        yield
    finally:
        reader.ArchiveReader.check_for_scan = saved


def fresh_sql():
    _functions._CACHE.clear()
    _functions._RESULTS.clear()


def _cpu() -> float:
    """CPU seconds of this process, all threads (DuckDB's included): less sensitive than wall
    time to other programs sharing the cores."""
    usage = resource.getrusage(resource.RUSAGE_SELF)
    return usage.ru_utime + usage.ru_stime


def measure(label, fn, repeat, results, checks=contextlib.nullcontext, setup=None):
    """Best of ``repeat`` runs with (``checks()``) and without the checks, alternated: wall
    and CPU time (of ``fn(setup())`` when ``setup`` is given, not timing ``setup()``)."""
    on, off = [], []
    for _ in range(repeat):
        for mode, times in (("on", on), ("off", off)):
            ctx = checks_off() if mode == "off" else checks()
            with ctx:
                prepared = setup() if setup else None
                w0, c0 = time.perf_counter(), _cpu()
                fn(prepared) if setup else fn()
                times.append((time.perf_counter() - w0, _cpu() - c0))
    wall = (min(t[0] for t in on), min(t[0] for t in off))
    cpu = (min(t[1] for t in on), min(t[1] for t in off))
    results.append((label, wall, cpu))
    print(f"{label:<26} wall {wall[0]:8.4f} / {wall[1]:8.4f} s = {wall[0] / wall[1]:6.3f}   "
          f"cpu {cpu[0]:8.4f} / {cpu[1]:8.4f} s = {cpu[0] / max(cpu[1], 1e-9):6.3f}", flush=True)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--cols", type=int, default=100)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--lookups", type=int, default=20, help="point lookups per timed run")
    parser.add_argument("--out", type=Path, default=Path("/tmp/rf_integrity"))
    parser.add_argument("--reuse", action="store_true", help="keep the archive of an earlier run")
    args = parser.parse_args()
    path = args.out / "bench.rankfold"
    t0 = time.perf_counter()
    if not (args.reuse and path.is_dir()):
        shutil.rmtree(args.out, ignore_errors=True)
        args.out.mkdir(parents=True)
        rankfold.compress(make_table(args.rows, args.cols), path, rank=8, key="id")
    files = sorted(path.iterdir())
    m, n = rankfold.open(path).shape
    print(f"archive {m} x {n}: {sum(f.stat().st_size for f in files) / 1e6:.1f} MB in "
          f"{len(files)} files, ready in {time.perf_counter() - t0:.1f} s", flush=True)
    rng = np.random.default_rng(0)
    results: list = []

    measure("open", lambda: rankfold.open(path), args.repeat, results)
    names = [p["name"] for p in rankfold.open(path).manifest["row_parts"]]
    # the parts of a scan the checks touch: decoding the row files (page CRC-32), and the
    # whole-file SHA-256 that the first SQL query of an archive version pays
    measure("row files decode", lambda: [rankfold.open(path)._reader.row_file(n).read() for n in names],
            args.repeat, results)
    measure("open + SHA-256 for SQL", lambda: rankfold.open(path)._reader.check_row_files(),
            args.repeat, results)
    measure("python full scan", lambda: rankfold.open(path).to_numpy(), args.repeat, results)
    arch = rankfold.open(path)

    def lookups():
        for row in rng.integers(0, args.rows, args.lookups):
            arch.cell(int(row), "c7")

    measure(f"python point lookup x{args.lookups}", lookups, args.repeat, results)

    con = duckdb.connect()
    register(con)
    scan = "CREATE OR REPLACE TEMP TABLE scanned AS SELECT * FROM rankfold_scan(?)"

    def sql_cold():
        fresh_sql()
        con.execute(scan, [str(path)])

    def sql_warm():
        con.execute(scan, [str(path)])

    measure("sql full scan cold", sql_cold, args.repeat, results)
    measure("... whole files", sql_cold, args.repeat, results, checks=whole_files)
    sql_warm()
    measure("sql full scan warm", sql_warm, args.repeat, results)

    def sql_lookups():
        for row in rng.integers(0, args.rows, args.lookups):
            con.execute("SELECT rankfold_cell(?, ?, 'c7')", [str(path), int(row)]).fetchone()

    sql_lookups()
    measure(f"sql point lookup x{args.lookups}", sql_lookups, args.repeat, results)

    def new_process():
        """A connection with the functions registered, and the state of a new process: no
        reader, no SQL text, no check done yet (not timed)."""
        fresh_sql()
        first = duckdb.connect()
        register(first)
        return first

    def sql_first_lookup(first):
        key = int(rng.integers(0, args.rows))
        got = first.execute("SELECT c7 FROM rankfold_scan(?) WHERE id = ?", [str(path), key]).fetchall()
        first.close()
        assert len(got) == 1

    # more runs: one lookup is tens of milliseconds, and the machine is shared
    measure("sql first lookup", sql_first_lookup, 3 * args.repeat, results, setup=new_process)
    measure("... whole files", sql_first_lookup, 3 * args.repeat, results, checks=whole_files,
            setup=new_process)
    print("\npath | wall with / without s | ratio | cpu with / without s | ratio")
    for label, wall, cpu in results:
        print(f"{label} | {wall[0]:.4f} / {wall[1]:.4f} | {wall[0] / wall[1]:.3f} | "
              f"{cpu[0]:.4f} / {cpu[1]:.4f} | {cpu[0] / max(cpu[1], 1e-9):.3f}")


if __name__ == "__main__":
    main()
