"""Speed of compress under a tolerance against one DuckDB scan of the same Parquet source
(issue 14: at most 4x at 1e6 x 100). A script, not a test: the ratio is measured side by side
in one run, each side in a fresh subprocess, best of ``--repeats`` after one untimed warm-up
scan.

    python benchmarks/tolerance_speed.py --rows 1000000 --width 100 --out /tmp/speed

Data: invented (rank 8 plus 1% noise, fixed seeds; ``scale.generate``), deleted at the end
unless ``--keep``. Timed: the scan (every column streamed as Arrow), compress with the default
tolerance (max_std_error=0.05), with max_std_error=0.01, and with a fixed rank 8 for scale.

``--before DIR`` times an earlier rankfold in the same run, alternated with this one: DIR is
an import root holding that version laid out as installed (``rankfold/`` = its ``client/``,
``rankfold/udfs/`` = its ``udfs/``), e.g. from a checkout of the earlier commit:
``mkdir DIR && cp -r client DIR/rankfold && cp -r udfs DIR/rankfold/udfs``. Its children run
with ``PYTHONPATH=DIR`` (found before the editable install of this one).
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from scale import generate  # noqa: E402

CHILD = r"""
import json, sys, time
import duckdb
import rankfold
import rankfold.udfs.passes.compress  # imported before the clock starts, like duckdb for the scan
source, target, what = sys.argv[1], sys.argv[2], sys.argv[3]
out = {}
if what == "scan":
    con = duckdb.connect()
    t = time.perf_counter()
    for batch in con.read_parquet(source + "/*.parquet").to_arrow_reader(131072):
        pass
    out["seconds"] = time.perf_counter() - t
else:
    options = json.loads(what)
    t = time.perf_counter()
    archive = rankfold.compress(source, target, overwrite=True, **options)
    out["seconds"] = time.perf_counter() - t
    out["bytes"] = archive.nbytes
    out["reason"] = archive.manifest["method"]["rank_reason"]
print(json.dumps(out))
"""

RUNS = {"scan": "scan", "default tolerance (max_std_error=0.05)": "{}",
        "max_std_error=0.01": '{"max_std_error": 0.01}', "rank 8": '{"rank": 8}'}


def child(source: Path, target: Path, what: str, root: Path | None = None) -> dict:
    env = dict(os.environ, PYTHONPATH=str(root)) if root is not None else None
    done = subprocess.run([sys.executable, "-c", CHILD, str(source), str(target), what],
                          capture_output=True, text=True, check=True, env=env)
    return json.loads(done.stdout.strip().splitlines()[-1])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--width", type=int, default=100)
    parser.add_argument("--out", type=Path, default=Path("speed_tmp"))
    parser.add_argument("--repeats", type=int, default=2)
    parser.add_argument("--keep", action="store_true")
    parser.add_argument("--before", type=Path, default=None,
                        help="import root of an earlier rankfold, timed alternately (see above)")
    args = parser.parse_args()
    data = args.out / f"data-{args.rows}x{args.width}"
    if not data.exists():
        generate(data, args.rows, args.width)
    child(data, args.out / "warm", "scan")
    runs = [(name, what, None) for name, what in RUNS.items()]
    if args.before is not None:  # each compress run of the earlier version right before this one's
        runs = [r for name, what, _ in runs for r in
                ([(f"before: {name}", what, args.before)] if what != "scan" else []) + [(name, what, None)]]
    best = {}
    for _ in range(args.repeats):
        for name, what, root in runs:
            out = child(data, args.out / "archive", what, root)
            if name not in best or out["seconds"] < best[name]["seconds"]:
                best[name] = out
    scan = best["scan"]["seconds"]
    print(f"{args.rows:,} x {args.width} invented rows (rank 8 + 1% noise); best of {args.repeats}")
    print("| run | seconds | x one scan | bytes | rank reason |")
    print("|---|---|---|---|---|")
    for name, out in best.items():
        print(f"| {name} | {out['seconds']:.2f} | {out['seconds'] / scan:.2f} | "
              f"{out.get('bytes', ''):,} | {out.get('reason', '')} |" if "bytes" in out else
              f"| {name} | {out['seconds']:.2f} | 1.00 | | |")
    if not args.keep:
        shutil.rmtree(args.out, ignore_errors=True)


if __name__ == "__main__":
    main()
