"""Fixed overhead of an archive (issue 14, item 3). A script, not a test.

    python benchmarks/overhead.py                       # 2,000 x 50, default options
    python benchmarks/overhead.py --rows 2000 --columns 50 --out /tmp/overhead.rankfold

Invented data (rank 6 plus 1% noise, fixed seed 14; not real data) is compressed with default
options. The script prints every file of the archive folder with its bytes, then the overhead:
all archive bytes (every file the manifest lists plus ``manifest.json``) minus the row files'
bytes. The row files' own Parquet footers (schema, row-group metadata) are printed on a line of
their own: they grow with the column count too, but belong to the row files.
Target of issue 14: an overhead of at most 8 kB for a 50-column table.
"""

from __future__ import annotations

import argparse
import shutil
import struct
from pathlib import Path

import numpy as np
import pyarrow as pa

import rankfold


def invented_table(rows: int, columns: int) -> pa.Table:
    """Invented panel: rank 6 plus 1% noise, fixed seed (not real data)."""
    rng = np.random.default_rng(14)
    x = rng.standard_normal((rows, 6)) @ rng.standard_normal((6, columns))
    x += 0.01 * rng.standard_normal(x.shape)
    return pa.table({f"ch{j:03d}": x[:, j] for j in range(columns)})


def footer_bytes(path: Path) -> int:
    """Bytes of a Parquet file's footer: the metadata length stored in its last 8 bytes, plus
    those 8 bytes (Parquet file layout: ``<metadata> <4-byte length> PAR1``)."""
    with open(path, "rb") as f:
        f.seek(-8, 2)
        length = struct.unpack("<i", f.read(4))[0]
    return length + 8


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=2000)
    parser.add_argument("--columns", type=int, default=50)
    parser.add_argument("--out", type=Path, default=Path("/tmp/rankfold-overhead.rankfold"))
    args = parser.parse_args()
    if args.out.exists():
        shutil.rmtree(args.out)
    archive = rankfold.compress(invented_table(args.rows, args.columns), args.out)
    row_files = set(archive.manifest.get("row_parts") and [p["name"] for p in archive.manifest["row_parts"]])
    total = rows_bytes = row_footers = 0
    print(f"{args.rows} x {args.columns}, default options; bytes per file:")
    for path in sorted(p for p in args.out.iterdir() if not p.name.startswith(".")):
        size = path.stat().st_size
        total += size
        kind = "row file" if path.name in row_files else "overhead"
        if path.name in row_files:
            rows_bytes += size
            row_footers += footer_bytes(path)
        print(f"  {path.name:<24} {size:>9,}  {kind}")
    print(f"archive bytes            {total:>9,}  (archive.nbytes = {archive.nbytes:,})")
    print(f"row files                {rows_bytes:>9,}  (of which their footers: {row_footers:,})")
    print(f"overhead                 {total - rows_bytes:>9,}  (target of issue 14: <= 8,000 at 50 columns)")


if __name__ == "__main__":
    main()
