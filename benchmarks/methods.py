"""Benchmark: selection methods side by side, on the demo scenario and a generated table.

For each table and method it prints, measured in one run:
* error ratio: the archive's relative Frobenius error (after the transform) divided by the
  Eckart-Young optimum at the same rank k (numpy.linalg.svd of the same transformed table);
* size ratio: archive bytes / the same table as lossless Parquet (pyarrow, zstd);
* time ratio: compress seconds / one DuckDB scan of the same Parquet file (streamed to Arrow).

Usage: python benchmarks/methods.py [--rows 20000] [--out bench_out]
Tables are invented by code with fixed seeds; nothing here is real data.
"""

from __future__ import annotations

import argparse
import shutil
import time
from pathlib import Path

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

import rankfold
from rankfold.demo import heat_network_readings

METHODS = [
    ("pivoted_qr + qdeim, optimal U", dict(column_method="pivoted_qr", row_method="qdeim", link="optimal")),
    ("leverage + leverage, optimal U", dict(column_method="leverage", row_method="leverage", link="optimal")),
    ("length_squared + length_squared, optimal U", dict(column_method="length_squared", row_method="length_squared", link="optimal")),
    ("pivoted_qr, CX (C^+ A) (default)", dict(column_method="pivoted_qr", link="cx")),
    ("pivoted_qr + qdeim, skeleton U", dict(column_method="pivoted_qr", row_method="qdeim", link="skeleton")),
    ("length_squared, textbook U", dict(column_method="length_squared", row_method="length_squared", link="textbook")),
    ("truncated SVD (reference)", dict(method="svd")),
]


def low_rank_table(rows: int, cols: int = 120, rank: int = 10, noise: float = 0.01, seed: int = 7) -> pa.Table:
    """Rank-``rank`` signal plus ``noise`` relative Gaussian noise, columns scaled over 4 decades."""
    rng = np.random.default_rng(seed)
    signal = rng.standard_normal((rows, rank)) @ rng.standard_normal((rank, cols))
    data = signal + noise * signal.std() * rng.standard_normal((rows, cols))
    data = data * np.logspace(-2, 2, cols)[None, :] + rng.normal(0, 100, cols)[None, :]
    return pa.table({f"ch{j:03d}": data[:, j] for j in range(cols)})


def transformed_optimum(table: pa.Table, archive: rankfold.Archive, rank: int) -> float:
    names = archive.numeric_columns
    x = np.column_stack([table.column(n).to_numpy(zero_copy_only=False).astype(float) for n in names])
    cols = archive.column_ledger()
    shift, scale = cols.column("shift").to_numpy(), cols.column("scale").to_numpy()
    z = np.nan_to_num((x - shift) / scale)
    s = np.linalg.svd(z, compute_uv=False)
    return float(np.sqrt(np.sum(s[rank:] ** 2)) / np.sqrt(np.sum(s**2)))


def scan_seconds(path: Path) -> float:
    con = duckdb.connect()
    best = np.inf
    for _ in range(3):
        started = time.perf_counter()
        for _ in con.sql(f"SELECT * FROM read_parquet('{path}')").to_arrow_reader(131_072):
            pass
        best = min(best, time.perf_counter() - started)
    return best


def bench(name: str, table: pa.Table, out: Path, rank: int, extra: dict) -> None:
    source = out / f"{name}.parquet"
    pq.write_table(table, source, compression="zstd")
    lossless = source.stat().st_size
    scan = scan_seconds(source)
    print(f"\n## {name}: {table.num_rows} rows x {table.num_columns} columns, rank {rank}; "
          f"lossless Parquet zstd {lossless:,} B; one DuckDB scan {scan * 1000:.0f} ms")
    print("| method | rel. error | optimum | error / optimum | archive bytes | size / lossless | "
          "compress s | time / scan |")
    print("|---|---|---|---|---|---|---|---|")
    optimum = None
    for label, opts in METHODS:
        path = out / f"{name}.rankfold"
        shutil.rmtree(path, ignore_errors=True)
        started = time.perf_counter()
        archive = rankfold.compress(str(source), path, rank=rank, seed=3, **opts, **extra)
        seconds = time.perf_counter() - started
        if optimum is None:
            optimum = transformed_optimum(table, archive, rank)
        size = sum(f["bytes"] for f in archive.manifest["files"])
        err = archive.errors["relative_frobenius"]
        print(f"| {label} | {err:.4f} | {optimum:.4f} | {err / optimum:.2f} | {size:,} | "
              f"{size / lossless:.3f} | {seconds:.2f} | {seconds / scan:.1f} |")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=20_000)
    parser.add_argument("--out", default="bench_out")
    args = parser.parse_args()
    out = Path(args.out)
    out.mkdir(exist_ok=True)
    bench("lowrank_1pct_noise", low_rank_table(args.rows), out, rank=10, extra={})
    bench("heat_network_demo", heat_network_readings(args.rows), out, rank=12, extra={"key": "reading_id"})


if __name__ == "__main__":
    main()
