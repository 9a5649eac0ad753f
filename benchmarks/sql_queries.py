"""SQL over an archive vs the original table as lossless Parquet (zstd), side by side in one run.

Invented data (fixed seed): ROWS x COLS numeric columns of rank-10 structure plus noise, an
``id`` key (0..ROWS-1) and a ``grp`` key with 50 groups. The original is written by DuckDB
(COPY ... zstd); the archive by rankfold.compress(rank=10, n_columns=20 basis columns).
Queries, each through DuckDB SQL:
  (a) avg of one column           original: avg(c123)           archive: rankfold_aggregate
  (b) avg of all columns by grp   original: GROUP BY grp        archive: rankfold_aggregate(group_by)
  (c) point lookup by key         original: WHERE id = K        archive: rankfold_scan WHERE id = K
  (d) export a 10% row subset     COPY (... WHERE id % 10 = 3) TO Parquet zstd, both sides
Prints best-of-N times, the ratio original / archive (> 1: the archive is faster), each
answer's bound, and checks every archive answer against the original within its bound.

    python benchmarks/sql_queries.py --rows 1000000 --cols 300 --out /tmp/rf_bench
"""

from __future__ import annotations

import argparse
import shutil
import time
from pathlib import Path

import duckdb
import numpy as np
import pyarrow as pa

import rankfold
import rankfold.udfs
from rankfold.udfs.sql import functions as _functions


def make_table(rows: int, cols: int, seed: int = 7) -> pa.Table:
    rng = np.random.default_rng(seed)
    rank = 10
    left = rng.standard_normal((rows, rank)).astype(np.float64)
    right = rng.standard_normal((rank, cols))
    units = np.geomspace(0.5, 200.0, cols)
    columns = {"id": pa.array(np.arange(rows, dtype=np.int64)),
               "grp": pa.array((rng.integers(0, 50, rows)).astype(np.int32))}
    for start in range(0, cols, 50):
        stop = min(cols, start + 50)
        block = left @ right[:, start:stop]
        block += 0.01 * rng.standard_normal(block.shape)
        block = block * units[start:stop] + 100.0
        for j in range(start, stop):
            columns[f"c{j}"] = pa.array(block[:, j - start])
    return pa.table(columns)


def best(fn, repeat: int):
    times, out = [], None
    for _ in range(repeat):
        _functions._RESULTS.clear()  # no answer carried over from an earlier run
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return min(times), out


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--cols", type=int, default=300)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--out", default="/tmp/rf_sql_bench")
    args = ap.parse_args()
    out = Path(args.out)
    shutil.rmtree(out, ignore_errors=True)
    out.mkdir(parents=True)
    t0 = time.perf_counter()
    table = make_table(args.rows, args.cols)
    print(f"invented table {args.rows} x {args.cols} (+ id, grp) in {time.perf_counter() - t0:.1f} s")
    con = duckdb.connect()
    rankfold.udfs.register(con)
    original = out / "original.parquet"
    con.register("src", table)
    t0 = time.perf_counter()
    con.execute(f"COPY src TO '{original}' (FORMAT parquet, COMPRESSION zstd)")
    print(f"original Parquet zstd: {original.stat().st_size / 1e6:.0f} MB in {time.perf_counter() - t0:.1f} s")
    con.unregister("src")
    archive_path = out / "table.rankfold"
    t0 = time.perf_counter()
    archive = rankfold.compress(table, archive_path, rank=10, n_columns=20, key="id",
                                exact_columns=("grp",))
    size = sum(p.stat().st_size for p in archive_path.iterdir())
    print(f"archive: {size / 1e6:.0f} MB in {time.perf_counter() - t0:.1f} s "
          f"({len(archive.basis_columns)} basis columns, {len(archive.anchor_rows)} anchor rows)")
    del table
    p, o = str(archive_path), f"read_parquet('{original}')"
    names = [f"c{j}" for j in range(args.cols)]
    key = args.rows * 7 // 9
    rows = []

    # (a)
    t_o, a_o = best(lambda: con.execute(f"SELECT avg(c123) FROM {o}").fetchall(), args.repeat)
    t_a, a_a = best(lambda: con.execute(f"SELECT c123, c123_bound FROM rankfold_aggregate('{p}', ['c123'])").fetchall(), args.repeat)
    assert abs(a_a[0][0] - a_o[0][0]) <= a_a[0][1], (a_a, a_o)
    rows.append(("(a) avg of one column", t_o, t_a, f"{a_a[0][1]:.3g} (avg ~{a_o[0][0]:.4g})"))

    # (b)
    avgs = ", ".join(f"avg({n})" for n in names)
    q_o = f"SELECT grp, {avgs} FROM {o} GROUP BY grp ORDER BY grp"
    q_a = f"SELECT * FROM rankfold_aggregate('{p}', {names!r}, group_by := 'grp') ORDER BY grp"
    t_o, b_o = best(lambda: con.execute(q_o).fetchall(), args.repeat)
    t_a, b_a = best(lambda: con.execute(q_a).fetchall(), args.repeat)
    assert len(b_o) == len(b_a)
    worst, largest = 0.0, 0.0
    for ro, ra in zip(b_o, b_a):
        assert ro[0] == ra[0]
        for j in range(args.cols):
            v, bound = ra[1 + 2 * j], ra[2 + 2 * j]
            assert abs(v - ro[1 + j]) <= bound, (j, v, ro[1 + j], bound)
            worst, largest = max(worst, abs(v - ro[1 + j]) / bound), max(largest, bound)
    rows.append((f"(b) avg of {args.cols} columns by grp ({len(b_o)} groups)", t_o, t_a,
                 f"max {largest:.3g} (max error/bound {worst:.2g})"))

    # (c)
    t_o, c_o = best(lambda: con.execute(f"SELECT * FROM {o} WHERE id = {key}").fetchall(), args.repeat)
    t_a, c_a = best(lambda: con.execute(f"SELECT * FROM rankfold_scan('{p}') WHERE id = {key}").fetchall(), args.repeat)
    bound = c_a[0][-2]
    err = max(abs(x - y) for x, y in zip(c_o[0][2:], c_a[0][2:2 + args.cols]))
    assert err <= bound, (err, bound)
    rows.append(("(c) point lookup by key", t_o, t_a, f"{bound:.3g} (row's largest cell bound)"))

    # (d)
    d_o, d_a = out / "subset_original.parquet", out / "subset_archive.parquet"
    t_o, _ = best(lambda: con.execute(f"COPY (SELECT * FROM {o} WHERE id % 10 = 3) TO '{d_o}' "
                                      "(FORMAT parquet, COMPRESSION zstd)").fetchall(), args.repeat)
    t_a, _ = best(lambda: con.execute(f"COPY (SELECT * FROM rankfold_scan('{p}', predicate := 'id % 10 = 3')) TO '{d_a}' "
                                      "(FORMAT parquet, COMPRESSION zstd)").fetchall(), args.repeat)
    n_o = con.execute(f"SELECT count(*) FROM '{d_o}'").fetchone()[0]
    check = con.execute(
        f"SELECT count(*), max(a._rf_bound), "
        f"sum(CASE WHEN abs(a.c200 - o.c200) <= a._rf_bound THEN 0 ELSE 1 END) "
        f"FROM '{d_a}' a JOIN '{d_o}' o USING (id)").fetchone()
    assert check[0] == n_o and check[2] == 0, check
    rows.append((f"(d) export 10% ({n_o} rows) to Parquet zstd", t_o, t_a, f"max row bound {check[1]:.3g}"))

    print("\n| query | original Parquet (s) | archive (s) | original / archive | bound |")
    print("|---|---|---|---|---|")
    for name, t_orig, t_arch, bound in rows:
        print(f"| {name} | {t_orig:.3f} | {t_arch:.3f} | {t_orig / t_arch:.2f}x | {bound} |")


if __name__ == "__main__":
    main()
