"""Cost of the write protocol (issue 13): compress to a new path, overwrite, append, each
with the protocol's fsyncs and, side by side in the same run, with fsync turned into a no-op
(what the writes cost before they were flushed). Prints seconds (best of --repeat) and ratios.

    python benchmarks/writes.py --rows 200000 --cols 50
"""

from __future__ import annotations

import argparse
import shutil
import tempfile
import time
from pathlib import Path

import numpy as np
import pyarrow as pa

import rankfold
from rankfold.udfs.store import versions


def _table(rows: int, cols: int, seed: int) -> pa.Table:
    rng = np.random.default_rng(seed)
    block = rng.normal(size=(rows, 5)) @ rng.normal(size=(5, cols)) + 0.01 * rng.normal(size=(rows, cols))
    return pa.table({f"x{j}": block[:, j] for j in range(cols)})


def _run(folder: Path, first: pa.Table, second: pa.Table, extra: pa.Table) -> dict[str, float]:
    path = folder / "bench.rankfold"
    times = {}
    start = time.perf_counter()
    rankfold.compress(first, path, rank=5)
    times["compress"] = time.perf_counter() - start
    start = time.perf_counter()
    rankfold.compress(second, path, rank=5, overwrite=True)
    times["overwrite"] = time.perf_counter() - start
    start = time.perf_counter()
    rankfold.open(path).append(extra)
    times["append"] = time.perf_counter() - start
    shutil.rmtree(path)
    return times


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--rows", type=int, default=200_000)
    parser.add_argument("--cols", type=int, default=50)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--dir", default=None, help="folder to write in (default: a temporary folder)")
    args = parser.parse_args()
    first, second = _table(args.rows, args.cols, 1), _table(args.rows, args.cols, 2)
    extra = _table(args.rows // 10, args.cols, 3)
    real = (versions.fsync_file, versions.fsync_dir)
    best = {"flushed": {}, "no fsync": {}}
    with tempfile.TemporaryDirectory(dir=args.dir) as folder:
        for _ in range(args.repeat):
            for mode in best:
                if mode == "no fsync":
                    versions.fsync_file = lambda *a, **k: None
                    versions.fsync_dir = lambda *a, **k: None
                try:
                    for step, seconds in _run(Path(folder), first, second, extra).items():
                        best[mode][step] = min(seconds, best[mode].get(step, np.inf))
                finally:
                    versions.fsync_file, versions.fsync_dir = real
    print(f"{args.rows} x {args.cols}, best of {args.repeat}")
    print(f"{'step':<10} {'flushed s':>10} {'no fsync s':>11} {'ratio':>6}")
    for step in best["flushed"]:
        a, b = best["flushed"][step], best["no fsync"][step]
        print(f"{step:<10} {a:10.3f} {b:11.3f} {a / b:6.2f}")


if __name__ == "__main__":
    main()
