"""Benchmark: archive size against the default tolerance level ``max_std_error``.

For each table and each level t it compresses with ``max_std_error=t`` (every rebuilt value
within t standard deviations of its column) and prints, measured side by side in one run:
the archive's bytes, the ratio to the numeric block as raw float64 and to the table as
lossless Parquet zstd, the rank chosen, the largest measured error over its column's standard
deviation (from ``Archive.to_numpy()`` against the truth, never assumed) and whether every
bound (``Archive.cell_bounds()``) is within the tolerance.

Tables: the invented demo scenario (``rankfold.demo.heat_network_readings``, fixed seed) and
three tables shipped inside scikit-learn (``sklearn.datasets.load_diabetes``,
``load_breast_cancer``, ``load_digits``). The README's choice of the default level
(``DEFAULT_MAX_STD_ERROR``) quotes this table.

Usage: python benchmarks/default_level.py [--levels 0.01,0.02,0.05,0.1,0.2] [--demo-rows 20000]
"""

from __future__ import annotations

import argparse
import io
import tempfile
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

import rankfold
from rankfold.demo import heat_network_readings


def _tables(demo_rows: int) -> dict[str, pa.Table]:
    from sklearn import datasets

    demo = heat_network_readings(demo_rows)
    numeric = [n for n in demo.schema.names if n not in ("reading_id", "hour", "shift")]
    out = {"demo": demo.select(numeric)}
    for name in ("diabetes", "breast_cancer", "digits"):
        data = getattr(datasets, f"load_{name}")().data.astype(np.float64)
        out[name] = pa.table({f"c{j:03d}": data[:, j] for j in range(data.shape[1])})
    return out


def _parquet_bytes(table: pa.Table) -> int:
    sink = io.BytesIO()
    pq.write_table(table, sink, compression="zstd")
    return sink.tell()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--levels", default="0.01,0.02,0.05,0.1,0.2")
    parser.add_argument("--demo-rows", type=int, default=20_000)
    args = parser.parse_args()
    levels = [float(v) for v in args.levels.split(",")]
    print(f"{'table':<14} {'shape':>12} {'level':>6} {'rank':>5} {'bytes':>10} {'/float64':>9} "
          f"{'/parquet':>9} {'max err/std':>12} {'bounds ok':>9}")
    with tempfile.TemporaryDirectory() as tmp:
        for name, table in _tables(args.demo_rows).items():
            truth = np.column_stack([table.column(j).to_numpy(zero_copy_only=False).astype(np.float64)
                                     for j in range(table.num_columns)])
            std = np.nanstd(truth, axis=0)
            raw, lossless = truth.size * 8, _parquet_bytes(table)
            for level in levels:
                archive = rankfold.compress(table, Path(tmp) / f"{name}-{level}", max_std_error=level)
                rebuilt, bounds = archive.to_numpy(), archive.cell_bounds()
                with np.errstate(invalid="ignore", divide="ignore"):
                    err = np.where(std > 0, np.nanmax(np.abs(rebuilt - truth), axis=0) / std, 0.0)
                ok = bool(np.all(np.nan_to_num(bounds) <= level * std + 0.0))
                print(f"{name:<14} {str(truth.shape):>12} {level:>6g} {archive.manifest['method']['rank']:>5} "
                      f"{archive.nbytes:>10,} {archive.nbytes / raw:>9.3f} {archive.nbytes / lossless:>9.3f} "
                      f"{np.nanmax(err):>12.4f} {str(ok):>9}")


if __name__ == "__main__":
    main()
