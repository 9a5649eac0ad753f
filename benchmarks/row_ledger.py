"""Bytes of the per-row ledger under a tolerance (issue 14, item 3). A script, not a test.

    python benchmarks/row_ledger.py                      # 20,000 x 12, max_std_error=0.01
    python benchmarks/row_ledger.py --rows 20000 --columns 12 --max-std-error 0.01

Invented smooth series (daily and weekly cycles plus a slow random walk per column, fixed
seed 14; not real data) compressed twice in one run with the same options: as archives were
written before (a row ledger ``_rf_err_max`` / ``_rf_err_l2`` in every row file, forced by
treating the tolerance as not bounding every cell) and as now (no row ledger when every
column has a tolerance, ``FittedModel.row_ledger``). Prints both archives' bytes (every file
plus the manifest) and the difference.
"""

from __future__ import annotations

import argparse
import shutil
from pathlib import Path

import numpy as np
import pyarrow as pa

import rankfold
from rankfold.udfs.store.model import FittedModel


def smooth_series(rows: int, columns: int) -> pa.Table:
    """Invented hourly series: two cycles and a slow random walk per column (seed 14)."""
    rng = np.random.default_rng(14)
    t = np.arange(rows) / 24.0
    return pa.table({f"s{j:02d}": np.sin(2 * np.pi * t * (1 + 0.1 * j) + j) + 0.5 * np.sin(2 * np.pi * t / 7 + 0.3 * j)
                     + 0.05 * np.cumsum(rng.standard_normal(rows)) / np.sqrt(rows / 100) for j in range(columns)})


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=20_000)
    parser.add_argument("--columns", type=int, default=12)
    parser.add_argument("--max-std-error", type=float, default=0.01)
    parser.add_argument("--out", type=Path, default=Path("/tmp/rankfold-row-ledger"))
    args = parser.parse_args()
    table = smooth_series(args.rows, args.columns)
    sizes = {}
    for label, with_ledger in (("with a row ledger (as before)", True), ("no row ledger (now)", False)):
        path = args.out / ("with" if with_ledger else "without")
        shutil.rmtree(path, ignore_errors=True)
        path.parent.mkdir(parents=True, exist_ok=True)
        saved = FittedModel.bounded_by_tolerance
        if with_ledger:  # a new model then decides for a ledger, as every model did before
            FittedModel.bounded_by_tolerance = property(lambda self: False)
        try:
            archive = rankfold.compress(table, path, max_std_error=args.max_std_error, seed=0)
        finally:
            FittedModel.bounded_by_tolerance = saved
        rows = sum((path / p["name"]).stat().st_size for p in archive.manifest["row_parts"])
        sizes[label] = archive.nbytes
        print(f"{label:<30} {archive.nbytes:>10,} bytes (row files {rows:,}; row_ledger "
              f"{archive.manifest['row_ledger']})")
    before, after = sizes.values()
    print(f"saved {before - after:,} bytes of {before:,} ({100 * (before - after) / before:.1f}%)")


if __name__ == "__main__":
    main()
