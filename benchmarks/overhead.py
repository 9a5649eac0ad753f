"""Fixed overhead of an archive (issue 14, item 3). A script, not a test.

    python benchmarks/overhead.py                       # 2,000 x 50, default options
    python benchmarks/overhead.py --rows 2000 --columns 50 --out /tmp/overhead.rankfold

Invented data (rank 6 plus 1% noise, fixed seed 14; not real data) is compressed with default
options. The script prints every file of the archive folder with its bytes, then the overhead:
all archive bytes (every file the manifest lists plus ``manifest.json``) minus the row files'
bytes, and the same with the row files' own Parquet footers counted (row-group and column-chunk
metadata, statistics, the Arrow schema when stored): they grow with the column count, not the
rows, so they are overhead too. Target of issue 14: at most 8 kB for a 50-column table, every
byte counted (row-file footers included).
"""

from __future__ import annotations

import argparse
import shutil
import struct
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

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


def footer_parts(path: Path) -> tuple[int, int]:
    """(bytes of the Arrow schema stored in the footer, column chunks with statistics)."""
    meta = pq.ParquetFile(path).metadata
    schema = (meta.metadata or {}).get(b"ARROW:schema", b"")
    chunks = sum(meta.row_group(g).column(i).is_stats_set
                 for g in range(meta.num_row_groups) for i in range(meta.num_columns))
    return len(schema), chunks


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
    total = rows_bytes = row_footers = schema_bytes = with_stats = 0
    print(f"{args.rows} x {args.columns}, default options; bytes per file:")
    for path in sorted(p for p in args.out.iterdir() if not p.name.startswith(".")):
        size = path.stat().st_size
        total += size
        kind = "row file" if path.name in row_files else "overhead"
        if path.name in row_files:
            rows_bytes += size
            row_footers += footer_bytes(path)
            schema, chunks = footer_parts(path)
            schema_bytes += schema
            with_stats += chunks
        print(f"  {path.name:<24} {size:>9,}  {kind}")
    print(f"archive bytes            {total:>9,}  (archive.nbytes = {archive.nbytes:,})")
    print(f"row files                {rows_bytes:>9,}  (of which their footers: {row_footers:,}; Arrow "
          f"schema {schema_bytes:,} bytes, {with_stats} column chunks with statistics)")
    print(f"overhead, small tables and manifest {total - rows_bytes:>9,}")
    print(f"overhead, row-file footers included {total - rows_bytes + row_footers:>9,}  "
          "(target of issue 14: <= 8,000 at 50 columns)")


if __name__ == "__main__":
    main()
