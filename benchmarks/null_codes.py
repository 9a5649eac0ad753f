"""Bytes of NULL cells: NULL residual codes against exact cells (issue 14). A script, not a test.

    python benchmarks/null_codes.py                          # 20,000 x 12, 20% NULL runs in 3 columns
    python benchmarks/null_codes.py --rows 20000 --columns 12 --null-columns 3 --null-share 0.2

Invented smooth series (two cycles and a slow random walk per column, seed 14; not real
data), with runs of NULLs (lengths 1 to 400 rows, seed 15) covering ``--null-share`` of the
rows in each of the first ``--null-columns`` columns. Each case is compressed twice in one run
with the same options: as archives were written before (every NULL cell a row of
cells.parquet, ``encode.NULL_CODES = False``) and as now (NULL in the column's residual-code
column). Prints both archives' bytes (every file plus the manifest), cells.parquet's and the
row files' bytes, for ``max_std_error`` 0.1, 0.01, 0.001 and row differences off and all.
"""

from __future__ import annotations

import argparse
import shutil
from pathlib import Path

import numpy as np
import pyarrow as pa

import rankfold
from rankfold.udfs.passes import encode
from rankfold.udfs.store import layout


def series_with_null_runs(rows: int, columns: int, null_columns: int, share: float) -> pa.Table:
    """Invented hourly series (seed 14) with runs of NULLs (seed 15) in the first columns."""
    rng = np.random.default_rng(14)
    t = np.arange(rows) / 24.0
    gaps = np.random.default_rng(15)
    out = {}
    for j in range(columns):
        values = (np.sin(2 * np.pi * t * (1 + 0.1 * j) + j) + 0.5 * np.sin(2 * np.pi * t / 7 + 0.3 * j)
                  + 0.05 * np.cumsum(rng.standard_normal(rows)) / np.sqrt(rows / 100))
        null = np.zeros(rows, bool)
        while j < null_columns and null.mean() < share:
            start = int(gaps.integers(0, rows))
            null[start:start + int(gaps.integers(1, 401))] = True
        out[f"s{j:02d}"] = pa.array(values, mask=null if null.any() else None)
    return pa.table(out)


def _bytes(archive, path: Path) -> tuple[int, int, int]:
    rows = sum((path / p["name"]).stat().st_size for p in archive.manifest["row_parts"])
    cells = path / layout.table_file(archive.manifest, layout.CELLS)
    return archive.nbytes, cells.stat().st_size if cells.is_file() else 0, rows


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=20_000)
    parser.add_argument("--columns", type=int, default=12)
    parser.add_argument("--null-columns", type=int, default=3)
    parser.add_argument("--null-share", type=float, default=0.2)
    parser.add_argument("--out", type=Path, default=Path("/tmp/rankfold-null-codes"))
    args = parser.parse_args()
    table = series_with_null_runs(args.rows, args.columns, args.null_columns, args.null_share)
    nulls = sum(c.null_count for c in table.columns)
    print(f"{args.rows:,} x {args.columns}, {nulls:,} NULL cells in {args.null_columns} columns")
    print(f"{'max_std_error':>13} {'row_diff':>8} | {'archive before':>14} {'archive now':>12} {'ratio':>6} | "
          f"{'cells before':>12} {'cells now':>9} | {'rows before':>11} {'rows now':>9}")
    for tolerance in (0.1, 0.01, 0.001):
        for differences in ("off", "all"):
            sizes = []
            for null_codes in (False, True):
                path = args.out / f"{tolerance}-{differences}-{null_codes}"
                shutil.rmtree(path, ignore_errors=True)
                path.parent.mkdir(parents=True, exist_ok=True)
                encode.NULL_CODES = null_codes
                try:
                    archive = rankfold.compress(table, path, max_std_error=tolerance, seed=0,
                                                row_differences=differences)
                finally:
                    encode.NULL_CODES = True
                sizes.append(_bytes(archive, path))
            (a0, c0, r0), (a1, c1, r1) = sizes
            print(f"{tolerance:>13} {differences:>8} | {a0:>14,} {a1:>12,} {a1 / a0:>6.3f} | "
                  f"{c0:>12,} {c1:>9,} | {r0:>11,} {r1:>9,}")


if __name__ == "__main__":
    main()
