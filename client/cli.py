"""The ``rankfold`` command line: thin wrappers of the Python API (one verb, three faces).

Exit codes: 0 success; 1 a rankfold error (bad input, missing or damaged archive: one line on
stderr says what was wrong and what to do); 2 a usage error (argparse).
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path
from typing import Any

import rankfold
from rankfold.udfs.errors import RankfoldError

CAUTION = (
    "Caution: rankfold archives are lossy. Keep lossless originals wherever law, contract or "
    "safety rules require them (follow your local record-keeping law), and check a value's "
    "bound before it drives a safety, health or money decision."
)


def _emit(data: Any, as_json: bool, text: str) -> None:
    print(json.dumps(data, indent=1, default=str) if as_json else text)


def _parse_rows(spec: str | None) -> Any:
    if spec is None:
        return None
    if ":" in spec:
        parts = [int(p) if p else None for p in spec.split(":")]
        return slice(*parts)
    return [int(p) for p in spec.split(",") if p.strip()]


def _summary_text(archive: rankfold.Archive) -> str:
    m = archive.manifest
    e = archive.errors
    size = sum(f["bytes"] for f in m["files"])
    lines = [
        f"archive       {archive.path}",
        f"shape         {archive.shape[0]} rows x {archive.shape[1]} numeric columns"
        f" (+ {len(m['exact_columns'])} kept exactly: {', '.join(m['exact_columns'][:6])}"
        f"{' ...' if len(m['exact_columns']) > 6 else ''})",
        f"method        {m['method']['kind']}, rank {m['method']['rank']} ({m['method']['rank_reason']}),"
        f" transform {m['transform']}",
        f"kept exactly  {len(archive.basis_columns)} basis columns, {len(archive.anchor_rows)} anchor rows,"
        f" {e['cells_stored_exactly_outside_factors']} other cells",
        f"size          {size:,} bytes in {len(m['files'])} files",
        "error (measured on the archive as written):",
        f"  relative Frobenius      {_fmt(e['relative_frobenius'])} (optimum at this rank {_fmt(e['optimal_relative_frobenius'])})",
        f"  column relative RMS     mean {_fmt(e['mean_column_relative_rms'])}, worst {_fmt(e['worst_column_relative_rms'])} ({e['worst_column']})",
        f"  max abs error / std     {_fmt(e['max_abs_error_over_std'])}",
    ]
    return "\n".join(lines)


def _fmt(value: Any) -> str:
    return "n/a" if value is None else f"{value:.4g}"


def cmd_compress(args: argparse.Namespace) -> int:
    options: dict[str, Any] = {}
    for name in ("method", "columns", "link", "transform", "key", "n_columns", "n_rows"):
        if getattr(args, name) is not None:
            options[name] = getattr(args, name)
    if args.rows_method is not None:
        options["rows"] = args.rows_method
    source: Any = args.source
    if args.database:
        import duckdb

        options["connection"] = duckdb.connect(args.database, read_only=True)
    started = time.perf_counter()
    archive = rankfold.compress(source, args.archive, rank=args.rank, seed=args.seed,
                                overwrite=args.overwrite, **options)
    elapsed = time.perf_counter() - started
    data = {"archive": str(archive.path), "seconds": elapsed, "manifest": archive.manifest}
    _emit(data, args.json, _summary_text(archive) + f"\ncompressed in {elapsed:.2f} s")
    return 0


def cmd_inspect(args: argparse.Namespace) -> int:
    archive = rankfold.open(args.archive, checksums=args.checksums)
    m = archive.manifest
    data = {k: m[k] for k in ("archive_id", "created_at", "shape", "method", "transform", "errors",
                              "files", "numeric_columns", "exact_columns")}
    data["basis_columns"] = archive.basis_columns
    data["anchor_rows"] = archive.anchor_rows
    _emit(data, args.json, _summary_text(archive)
          + f"\nbasis columns {', '.join(archive.basis_columns[:12])}"
          + (" ..." if len(archive.basis_columns) > 12 else ""))
    return 0


def cmd_rebuild(args: argparse.Namespace) -> int:
    archive = rankfold.open(args.archive, log_path=args.log)
    rows: Any = _parse_rows(args.rows)
    if args.keys is not None:
        rows = rankfold.Keys(args.keys.split(","))
    columns = args.columns.split(",") if args.columns else None
    table = archive.rebuild(rows=rows, columns=columns)
    if args.output:
        out = Path(args.output)
        if out.suffix == ".csv":
            import pyarrow.csv as pacsv

            pacsv.write_csv(table, out)
        else:
            import pyarrow.parquet as pq

            pq.write_table(table, out, compression="zstd")
        _emit({"output": str(out), "rows": table.num_rows}, args.json,
              f"wrote {table.num_rows} rows to {out}")
    elif args.json:
        print(json.dumps(table.to_pylist(), default=str))
    else:
        import pyarrow.csv as pacsv

        pacsv.write_csv(table, sys.stdout.buffer)
    return 0


def cmd_demo(args: argparse.Namespace) -> int:
    from .demo import run_demo

    report = run_demo(args.out, rows=args.rows, quiet=args.json)
    if args.json:
        print(json.dumps(report, indent=1, default=str))
    return 0


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="rankfold",
        description="Archive wide numeric tables as exact column-row (CUR) factors in Parquet "
                    "and rebuild any value with a guaranteed error bound.",
        epilog=CAUTION,
    )
    parser.add_argument("--version", action="version", version=f"rankfold {rankfold.__version__}")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    p = sub.add_parser("demo", help="generate the invented Fernwald scenario, compress it with "
                                    "in-process DuckDB, rebuild, print sizes and errors",
                       epilog=CAUTION)
    p.add_argument("--out", default="rankfold-demo", help="working folder (default: ./rankfold-demo)")
    p.add_argument("--rows", type=int, default=20_000, help="rows to generate (default 20000)")
    p.add_argument("--json", action="store_true", help="print the report as JSON")
    p.set_defaults(func=cmd_demo)

    p = sub.add_parser("compress", help="compress a Parquet/CSV file, or a DuckDB table or query, "
                                        "into an archive", epilog=CAUTION)
    p.add_argument("source", help="Parquet or CSV path; or a table name or SELECT with --database")
    p.add_argument("archive", help="archive directory to create")
    p.add_argument("--database", help="DuckDB database file holding the table or query source")
    p.add_argument("--rank", type=int, help="target rank (default: chosen from the spectrum)")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--method", choices=["cur", "svd"])
    p.add_argument("--columns", choices=["pivoted_qr", "leverage", "length_squared"])
    p.add_argument("--rows-method", choices=["qdeim", "leverage", "length_squared"])
    p.add_argument("--link", choices=["optimal", "skeleton", "textbook", "cx"])
    p.add_argument("--transform", choices=["standardize", "center", "none"])
    p.add_argument("--n-columns", type=int, dest="n_columns")
    p.add_argument("--n-rows", type=int, dest="n_rows")
    p.add_argument("--key", help="column to address rows by")
    p.add_argument("--overwrite", action="store_true", help="replace an existing archive")
    p.add_argument("--json", action="store_true")
    p.set_defaults(func=cmd_compress)

    p = sub.add_parser("inspect", help="shape, method, sizes, error summary, kept columns and rows")
    p.add_argument("archive")
    p.add_argument("--checksums", action="store_true", help="also verify every file's SHA-256")
    p.add_argument("--json", action="store_true")
    p.set_defaults(func=cmd_inspect)

    p = sub.add_parser("rebuild", help="rebuild rows and columns to Parquet, CSV or stdout")
    p.add_argument("archive")
    p.add_argument("--rows", help="positions: '0,5,9' or a range '100:200'")
    p.add_argument("--keys", help="key values, comma separated (archives compressed with a key)")
    p.add_argument("--columns", help="numeric columns, comma separated (default: all)")
    p.add_argument("--output", help="file to write (.parquet or .csv); default: CSV on stdout")
    p.add_argument("--log", help="append the rebuild-log record to this JSON Lines file")
    p.add_argument("--json", action="store_true")
    p.set_defaults(func=cmd_rebuild)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return args.func(args)
    except RankfoldError as exc:
        print(f"rankfold: error: {exc}", file=sys.stderr)
        return 1


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
