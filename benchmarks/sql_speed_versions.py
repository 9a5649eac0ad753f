"""SQL read speed of the default archive: this checkout against an earlier rankfold (issue 14:
a full SQL scan no more than 1.5x slower than before, point lookups no more than 2x).

The same invented table (fixed seed: ROWS x COLS of rank-8 structure plus 1% noise, an ``id``
key) is compressed with the default options (``max_std_error=0.05``) by each rankfold, each
in its own interpreter, and each then times its own archive in DuckDB, in fresh subprocesses
that alternate between the two versions (best of ``--repeats``):

* full scan: ``SELECT sum(<every column>) FROM rankfold_scan(path)``;
* lookup by predicate: ``rankfold_scan(path, predicate := 'id = K')`` (filtered in the scan);
* lookup by an outer WHERE: ``SELECT * FROM rankfold_scan(path) WHERE id = K``.

    python benchmarks/sql_speed_versions.py --before /work/venvs/old/bin/python --rows 1000000 --cols 100

``--before`` is the interpreter of the earlier rankfold (installed from its own checkout); the
later one is this interpreter. Ratios are later / before (above 1: slower now). Data deleted at the end.
"""

from __future__ import annotations

import argparse
import json
import shutil
import subprocess
import sys
from pathlib import Path

MAKE = r"""
import sys
import numpy as np, pyarrow as pa, pyarrow.parquet as pq
rows, cols, out = int(sys.argv[1]), int(sys.argv[2]), sys.argv[3]
rng = np.random.default_rng(11)  # invented data
x = rng.standard_normal((rows, 8)) @ rng.standard_normal((8, cols))
x += 0.01 * rng.standard_normal(x.shape)
pq.write_table(pa.table({"id": np.arange(rows, dtype=np.int64), **{f"c{j:03d}": x[:, j] for j in range(cols)}}), out)
"""

COMPRESS = r"""
import sys, rankfold
archive = rankfold.compress(sys.argv[1], sys.argv[2], key="id", overwrite=True)
print(archive.nbytes)
"""

TIME = r"""
import json, sys, time
import duckdb, rankfold.udfs
path, what, key, cols = sys.argv[1], sys.argv[2], int(sys.argv[3]), int(sys.argv[4])
con = duckdb.connect()
rankfold.udfs.register(con)
if what == "scan":
    query = "SELECT " + ", ".join(f"sum(c{j:03d})" for j in range(cols)) + " FROM rankfold_scan(?)"
    params = [path]
elif what == "predicate":
    query, params = "SELECT * FROM rankfold_scan(?, predicate := ?)", [path, f"id = {key}"]
else:
    query, params = "SELECT * FROM rankfold_scan(?) WHERE id = ?", [path, key]
con.execute(query, params).fetchall()  # warm: the archive's checks and caches
t = time.perf_counter()
con.execute(query, params).fetchall()
print(json.dumps(time.perf_counter() - t))
"""


def _run(python: str, code: str, *args) -> str:
    done = subprocess.run([python, "-c", code, *map(str, args)], capture_output=True, text=True, check=True)
    lines = done.stdout.strip().splitlines()
    return lines[-1] if lines else ""


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--before", required=True, help="python of the earlier rankfold")
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--cols", type=int, default=100)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--out", type=Path, default=Path("/tmp/rf_sql_versions"))
    args = parser.parse_args()
    shutil.rmtree(args.out, ignore_errors=True)
    args.out.mkdir(parents=True)
    source = args.out / "source.parquet"
    _run(sys.executable, MAKE, args.rows, args.cols, source)
    pythons = {"before": args.before, "now": sys.executable}
    sizes = {name: int(_run(py, COMPRESS, source, args.out / f"{name}.rankfold")) for name, py in pythons.items()}
    key = args.rows // 2 + 1234
    best: dict[tuple[str, str], float] = {}
    for _ in range(args.repeats):
        for what in ("scan", "predicate", "outer"):
            for name, py in pythons.items():
                seconds = json.loads(_run(py, TIME, args.out / f"{name}.rankfold", what, key, args.cols))
                best[name, what] = min(best.get((name, what), seconds), seconds)
    print(f"{args.rows:,} x {args.cols} invented rows, default options; archive bytes: before "
          f"{sizes['before']:,}, now {sizes['now']:,}; best of {args.repeats}")
    print("| query | before s | now s | now / before |")
    print("|---|---|---|---|")
    for what, label in (("scan", "full scan (sum of every column)"), ("predicate", "lookup, predicate := 'id = K'"),
                        ("outer", "lookup, outer WHERE id = K")):
        a, b = best["before", what], best["now", what]
        print(f"| {label} | {a:.3f} | {b:.3f} | {b / a:.2f} |")
    shutil.rmtree(args.out, ignore_errors=True)


if __name__ == "__main__":
    main()
