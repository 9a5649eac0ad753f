"""Wide-table benchmark (issue 16): compress tables whose columns far outnumber their rows,
and check the archive against numpy truth. A script, not a test.

    python benchmarks/wide.py --shapes 1000x20000 200x100000 --out /work/wide_tmp

For each shape, invented data (rank 8 plus 1% noise, fixed seed) is written as one Parquet
file; a child process compresses it (rank 8) and reports its own time and peak RSS (VmHWM of
/proc/self/status, read right after compress returns). The same child then rebuilds the
archive and checks that every cell lies within its reported bound, and compares the error
with the Eckart-Young optimum at rank 8 (numpy.linalg.svd of the data). Targets (issue 16):
1,000 x 20,000 under 30 s and 2 GB; 200 x 100,000 under 2 minutes and 4 GB.
"""

from __future__ import annotations

import argparse
import json
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

CHILD = r"""
import json, sys, time
import numpy as np, pyarrow.parquet as pq
import rankfold
import rankfold.udfs.passes.compress  # imported before the clock starts
source, target = sys.argv[1], sys.argv[2]
t = time.perf_counter()
archive = rankfold.compress(source, target, rank=8)
out = {"seconds": time.perf_counter() - t}
out["peak_rss_mb"] = next(int(line.split()[1]) / 1024 for line in open("/proc/self/status")
                         if line.startswith("VmHWM"))
truth = pq.read_table(source).to_pandas().to_numpy()
rebuilt, bounds = archive.to_numpy(), archive.cell_bounds()
err = np.abs(rebuilt - truth)
out["bounds_hold"] = bool(np.all(err <= bounds))
out["max_error"] = float(err.max())
out["max_bound"] = float(bounds.max())
z = (truth - truth.mean(axis=0)) / np.where(truth.std(axis=0) > 0, truth.std(axis=0), 1.0)
s = np.linalg.svd(z, compute_uv=False)  # Eckart-Young optimum at rank 8 (transformed units)
out["optimal_relative"] = float(np.sqrt(np.sum(s[8:] ** 2) / np.sum(s ** 2)))
out["relative_frobenius"] = archive.errors["relative_frobenius"]
out["basis_columns"] = len(archive.basis_columns)
print(json.dumps(out))
"""


def generate(path: Path, rows: int, width: int) -> None:
    rng = np.random.default_rng(16)
    x = rng.standard_normal((rows, 8)) @ rng.standard_normal((8, width))
    x += 0.01 * rng.standard_normal(x.shape)
    pq.write_table(pa.table({f"c{j:06d}": x[:, j] for j in range(width)}), path)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--shapes", nargs="+", default=["1000x20000", "200x100000"])
    parser.add_argument("--out", type=Path, default=Path("wide_tmp"))
    args = parser.parse_args()
    args.out.mkdir(parents=True, exist_ok=True)
    print(f"{'shape':>12} {'compress s':>10} {'peak RSS MB':>11} {'bounds':>7} {'rel. error':>10} "
          f"{'optimum':>9} {'ratio':>6}")
    try:
        for shape in args.shapes:
            rows, width = (int(v) for v in shape.lower().split("x"))
            data = args.out / f"wide-{rows}x{width}.parquet"
            generate(data, rows, width)
            target = args.out / f"wide-{rows}x{width}.rfa"
            shutil.rmtree(target, ignore_errors=True)
            done = subprocess.run([sys.executable, "-c", CHILD, str(data), str(target)],
                                  capture_output=True, text=True)
            if done.returncode:
                print(done.stderr[-3000:])
                raise SystemExit(f"compress of {shape} failed")
            out = json.loads(done.stdout.strip().splitlines()[-1])
            print(f"{shape:>12} {out['seconds']:10.1f} {out['peak_rss_mb']:11.0f} "
                  f"{'hold' if out['bounds_hold'] else 'BROKEN':>7} {out['relative_frobenius']:10.5f} "
                  f"{out['optimal_relative']:9.5f} {out['relative_frobenius'] / out['optimal_relative']:6.3f}",
                  flush=True)
            shutil.rmtree(target, ignore_errors=True)
            data.unlink()
    finally:
        if not any(args.out.iterdir()):
            args.out.rmdir()


if __name__ == "__main__":
    main()
