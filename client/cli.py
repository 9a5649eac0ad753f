"""The ``rankfold`` command line: thin wrappers of the Python API (one verb, three faces).

Every subcommand calls one library function and prints its result: ``compress`` ->
``rankfold.compress``, ``inspect`` -> ``rankfold.report.summary``, ``rebuild`` ->
``Archive.rebuild``, ``query`` -> ``rankfold.query``, ``verify`` ->
``rankfold.verify``, ``report`` -> ``rankfold.write_report``, ``demo`` ->
``rankfold.demo.run_demo``. Results go to stdout (``--json`` for JSON); progress bars go to
stderr, only when stderr is a terminal and ``--quiet`` is not given.

Exit codes: 0 success; 1 a rankfold error (bad input, missing or damaged archive: one line on
stderr says what was wrong and what to do); 2 a usage error (argparse); 3 ``verify`` found a
file that does not match its checksum, or a value outside its bound; 130 interrupted.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import os
import sys
import textwrap
import time
from typing import Any

import rankfold
from rankfold.udfs.errors import RankfoldError

from .report import CAUTION

__all__ = ["main", "build_parser", "CAUTION", "EXIT_OK", "EXIT_ERROR", "EXIT_USAGE", "EXIT_FAILED"]

EXIT_OK, EXIT_ERROR, EXIT_USAGE, EXIT_FAILED, EXIT_INTERRUPTED = 0, 1, 2, 3, 130

EXIT_CODES = (
    "exit codes:\n"
    "  0    success\n"
    "  1    rankfold error: bad input, missing or damaged archive (one line on stderr says\n"
    "       what was wrong and what to do)\n"
    "  2    usage error (unknown command or option, missing argument)\n"
    "  3    verify found a file that does not match the manifest, or a value outside its bound\n"
    "  130  interrupted"
)


def _epilog(*extra: str) -> str:
    caution = textwrap.fill(CAUTION.replace("record-keeping law", "record-keeping\0law"), 90,
                            break_on_hyphens=False).replace("\0", " ")
    return "\n\n".join([*extra, caution])


# -- output helpers ----------------------------------------------------------------------------
def _emit(data: Any, as_json: bool, text: str) -> None:
    print(json.dumps(data, indent=1, default=str, allow_nan=False) if as_json else text)


def _progress(args: argparse.Namespace):
    from .terminal import ProgressBar

    return ProgressBar(sys.stderr, enabled=False if args.quiet else None)


def _fmt(value: Any) -> str:
    return "n/a" if value is None else f"{value:.4g}"


def _names(names: list[Any], limit: int = 12) -> str:
    shown = ", ".join(str(n) for n in names[:limit])
    return (shown + f" ... ({len(names)} in all)") if len(names) > limit else (shown or "none")


def _summary_text(info: dict[str, Any]) -> str:
    e = info["errors"]
    rows, width = info["shape"]
    lines = [
        f"archive       {info['archive']}",
        f"shape         {rows} rows x {width} numeric columns",
        f"method        {info['method']}, rank {info['rank']} ({info['rank_reason']}), "
        f"transform {info['transform']}",
        f"sketch        {_sketch_text(info['sketch'])}",
        f"size          {info['archive_bytes']:,} bytes in {len(info['files'])} files "
        f"(numeric block as raw float64: {info['raw_float64_bytes']:,} bytes)",
        "kept exactly:",
        f"  other columns      {_names(info['exact_columns'])}",
        f"  basis columns      {len(info['basis_columns'])}: {_names(info['basis_columns'])}",
        f"  anchor rows        {len(info['anchor_rows'])}: {_names(info['anchor_rows'])}",
        f"  other cells        {info['cells_stored_exactly_outside_factors']}",
        "error (measured on the archive as written):",
        f"  relative Frobenius      {_fmt(e.get('relative_frobenius'))} (optimum at this rank "
        f"{_fmt(e.get('optimal_relative_frobenius'))})",
        f"  column relative RMS     mean {_fmt(e.get('mean_column_relative_rms'))}, worst "
        f"{_fmt(e.get('worst_column_relative_rms'))} ({e.get('worst_column')})",
        f"  max abs error / std     {_fmt(e.get('max_abs_error_over_std'))}",
    ]
    return "\n".join(lines)


def _sketch_text(sketch: dict[str, Any]) -> str:
    if not sketch["sampled"]:
        return f"read every row ({sketch['rows_read']:,})"
    return (f"read {sketch['rows_read']:,} of {sketch['of_rows']:,} rows (a seeded sample of "
            f"{sketch['row_groups_read']} of {sketch['of_row_groups']} row groups); errors are "
            "measured on every row")


def _sketch_rows(text: str) -> str | int:
    if text in ("auto", "all"):
        return text
    try:
        return int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected 'auto', 'all' or a number of rows, got {text!r}") from None


def _parse_rows(spec: str | None) -> Any:
    """'0,5,9' -> [0, 5, 9]; '100:200' -> slice(100, 200); '::10' -> slice(None, None, 10)."""
    if spec is None:
        return None
    try:
        if ":" in spec:
            parts = [int(p) if p.strip() else None for p in spec.split(":")]
            if len(parts) > 3:
                raise ValueError
            return slice(*parts)
        return [int(p) for p in spec.split(",") if p.strip()]
    except ValueError:
        raise rankfold.InvalidInputError(
            f"--rows takes positions such as '0,5,9' or a range such as '100:200'; got {spec!r}."
        ) from None


def _split(text: str | None) -> list[str] | None:
    return None if text is None else [p.strip() for p in text.split(",") if p.strip()]


# -- commands ----------------------------------------------------------------------------------
def cmd_compress(args: argparse.Namespace) -> int:
    from .sql_view import open_database
    from .report import summary

    options: dict[str, Any] = {}
    for name in ("method", "columns", "link", "transform", "key", "n_columns", "n_rows",
                 "max_abs_error", "rel_error", "target_bytes", "sketch_rows"):
        if getattr(args, name) is not None:
            options[name] = getattr(args, name)
    if args.rows_method is not None:
        options["rows"] = args.rows_method
    if args.exact_columns is not None:
        options["exact_columns"] = _split(args.exact_columns)
    if args.database:
        options["connection"] = open_database(args.database)
    bar = _progress(args)
    started = time.perf_counter()
    try:
        archive = rankfold.compress(args.source, args.archive, rank=args.rank, seed=args.seed,
                                    overwrite=args.overwrite, progress=bar, **options)
    finally:
        bar.close()
        if "connection" in options:
            options["connection"].close()
    elapsed = time.perf_counter() - started
    info = summary(archive)
    data = {"archive": str(archive.path), "seconds": elapsed, "summary": info,
            "manifest": archive.manifest}
    e = info["errors"]
    _emit(data, args.json,
          f"compressed {info['shape'][0]} rows x {info['shape'][1]} numeric columns into "
          f"{info['archive']} in {elapsed:.2f} s: rank {info['rank']}, {info['archive_bytes']:,} bytes, "
          f"relative error {_fmt(e.get('relative_frobenius'))}\n"
          f"details: rankfold inspect {info['archive']}")
    return EXIT_OK


def cmd_inspect(args: argparse.Namespace) -> int:
    from .report import summary

    archive = rankfold.open(args.archive, checksums=args.checksums)
    info = summary(archive)
    text = _summary_text(info)
    if args.checksums:
        text += "\nchecksums     every file matches its SHA-256 in the manifest"
    _emit(info, args.json, text)
    return EXIT_OK


def cmd_rebuild(args: argparse.Namespace) -> int:
    from .export import csv_text, table_to_json, write_table
    from .sql_view import key_values, select_rows

    chosen = [flag for flag in ("rows", "keys", "where") if getattr(args, flag) is not None]
    if len(chosen) > 1:
        raise rankfold.InvalidInputError(
            f"Choose rows one way: give only one of --rows, --keys and --where (got "
            f"{' and '.join('--' + c for c in chosen)})."
        )
    archive = rankfold.open(args.archive, log_path=args.log)
    rows: Any = _parse_rows(args.rows)
    if args.keys is not None:
        rows = rankfold.Keys(key_values(archive, _split(args.keys) or []))
    elif args.where is not None:
        rows = select_rows(archive, args.where)
    table = archive.rebuild(rows=rows, columns=_split(args.columns))
    if args.output:
        out = write_table(table, args.output, overwrite=args.overwrite)
        _emit({"output": str(out), "rows": table.num_rows, "columns": table.schema.names},
              args.json, f"wrote {table.num_rows} rows x {table.num_columns} columns to {out}")
    elif args.json or args.format == "json":
        print(table_to_json(table))
    else:
        sys.stdout.write(csv_text(table))
    return EXIT_OK


def cmd_query(args: argparse.Namespace) -> int:
    from .export import csv_text, table_to_json, table_to_text, write_table
    from .sql_view import query

    table = query(args.archive, args.sql, view=args.view)
    fmt = "json" if args.json else args.format
    if args.output:
        out = write_table(table, args.output, overwrite=args.overwrite)
        _emit({"output": str(out), "rows": table.num_rows, "columns": table.schema.names},
              args.json, f"wrote {table.num_rows} rows x {table.num_columns} columns to {out}")
    elif fmt == "json":
        print(table_to_json(table))
    elif fmt == "csv":
        sys.stdout.write(csv_text(table))
    else:
        print(table_to_text(table, limit=args.limit))
    return EXIT_OK


def _verify_text(report: dict[str, Any]) -> str:
    lines = [f"archive       {report['archive']}"]
    for f in report["files"]:
        lines.append(f"  {'ok    ' if f['ok'] else 'FAILED'}  {f['name']}  {f['bytes']:,} bytes"
                     + ("" if f["ok"] else f"  ({f['problem']})"))
    src = report["source"]
    if src is not None:
        lines += [
            f"source        {src['description']}: {src['rows_source']} rows (archive {src['rows_archive']})",
            f"  cells checked           {src['cells_checked']:,} ({src['cells_exact']:,} stored exactly)",
            f"  outside their bound     {src['violations']:,}",
            f"  largest error / bound   {_fmt(src['largest_error_over_bound'])}",
        ]
        worst = max(src["columns"], key=lambda c: c["measured_err_max"], default=None)
        if worst is not None:
            lines.append(f"  largest error           {_fmt(worst['measured_err_max'])} in {worst['name']} "
                         f"(ledger {_fmt(worst['ledger_err_max'])})")
        for ex in src["examples"]:
            lines.append(f"  row {ex['row']}, {ex['column']}: source {ex['source']}, rebuilt "
                         f"{ex['rebuilt']}, bound {ex['bound']}")
    if report["ok"]:
        lines.append("verified      every file matches its checksum"
                     + ("; every value is within its bound" if src is not None else
                        " (give --source to check the bounds too)"))
    else:
        lines.append("FAILED        " + "; ".join(report["problems"]))
    return "\n".join(lines)


@contextlib.contextmanager
def _source_and_progress(args: argparse.Namespace, what: str):
    """(DuckDB connection or None, progress bar) for commands that read a --source, closed after."""
    from .sql_view import open_database

    if args.database and not args.source:
        raise rankfold.InvalidInputError(f"--database needs --source (the table name or SELECT {what}).")
    connection = open_database(args.database) if args.database else None
    bar = _progress(args)
    try:
        yield connection, bar
    finally:
        bar.close()
        if connection is not None:
            connection.close()


def cmd_verify(args: argparse.Namespace) -> int:
    from .verification import verify

    with _source_and_progress(args, "to compare with") as (connection, bar):
        report = verify(args.archive, args.source, connection=connection, progress=bar)
    _emit(report, args.json, _verify_text(report))
    return EXIT_OK if report["ok"] else EXIT_FAILED


def cmd_report(args: argparse.Namespace) -> int:
    from .report import write_report

    with _source_and_progress(args, "the archive was compressed from") as (connection, bar):
        result = write_report(args.archive, args.output, source=args.source, connection=connection,
                              sample_rows=args.sample_rows, overwrite=args.overwrite, progress=bar)
    s = result["spectrum"]
    text = (f"wrote {result['output']} ({result['bytes']:,} bytes, {result['plots']} plots): rank "
            f"{s['rank']}, relative error {_fmt(s['relative_frobenius'])} (best possible "
            f"{_fmt(s['optimal_relative_frobenius'])}), worst column "
            f"{result['columns']['worst_column']} ({_fmt(result['columns']['worst_column_relative_rms'])})")
    _emit({k: result[k] for k in ("output", "bytes", "plots", "spectrum", "columns", "heatmap",
                                  "rows")}, args.json, text)
    return EXIT_OK


def cmd_demo(args: argparse.Namespace) -> int:
    from .demo import run_demo

    report = run_demo(args.out, rows=args.rows, quiet=args.json or args.quiet)
    if args.json:
        print(json.dumps(report, indent=1, default=str))
    return EXIT_OK


# -- the parser --------------------------------------------------------------------------------
def build_parser() -> argparse.ArgumentParser:
    formatter = argparse.RawDescriptionHelpFormatter
    parser = argparse.ArgumentParser(
        prog="rankfold",
        description="Archive wide numeric tables as exact column-row (CUR) factors in Parquet\n"
                    "and rebuild any value with a guaranteed error bound.",
        epilog=_epilog(EXIT_CODES), formatter_class=formatter,
    )
    parser.add_argument("--version", action="version", version=f"rankfold {rankfold.__version__}")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("--json", action="store_true", help="print the result as JSON")
    common.add_argument("--quiet", action="store_true",
                        help="no progress bars; print only results and errors")

    def add(name: str, help_text: str, *extra: str) -> argparse.ArgumentParser:
        return sub.add_parser(name, help=help_text, description=help_text[0].upper() + help_text[1:] + ".",
                              parents=[common], epilog=_epilog(*extra), formatter_class=formatter)

    p = add("compress", "compress a Parquet/CSV file, or a DuckDB table or query, into an archive",
            "examples:\n  rankfold compress readings.parquet readings.rfa --key reading_id\n"
            "  rankfold compress readings readings.rfa --database plant.duckdb --rank 12\n"
            "  rankfold compress \"SELECT * FROM readings WHERE site = 'A'\" a.rfa --database plant.duckdb")
    p.add_argument("source", help="Parquet or CSV path; or a table name or SELECT with --database")
    p.add_argument("archive", help="archive directory to create")
    p.add_argument("--database", metavar="FILE", help="DuckDB database file holding the table or query source (opened read-only)")
    p.add_argument("--rank", type=int, help="target rank k (default: chosen from the singular values)")
    p.add_argument("--seed", type=int, default=0, help="seed of the random choices (default 0)")
    p.add_argument("--method", choices=["cur", "svd"], help="real columns and rows (cur, default) or synthetic factors (svd)")
    p.add_argument("--columns", choices=["pivoted_qr", "leverage", "length_squared"], help="how basis columns are chosen")
    p.add_argument("--rows-method", choices=["qdeim", "leverage", "length_squared"],
                   help="how anchor rows are chosen (links other than cx)")
    p.add_argument("--link", choices=["cx", "optimal", "skeleton", "textbook"],
                   help="how other columns are built from the basis columns (default cx: least squares, no anchor rows)")
    p.add_argument("--transform", choices=["standardize", "center", "none"], help="per-column transform before factoring")
    p.add_argument("--n-columns", type=int, dest="n_columns", metavar="C", help="basis columns to keep (default 2k)")
    p.add_argument("--n-rows", type=int, dest="n_rows", metavar="R", help="anchor rows to keep (default 2c; links other than cx)")
    p.add_argument("--max-abs-error", type=float, dest="max_abs_error", metavar="E",
                   help="largest absolute error allowed in any cell (the tolerance)")
    p.add_argument("--rel-error", type=float, dest="rel_error", metavar="E",
                   help="target relative error; the rank is chosen to meet it")
    p.add_argument("--target-bytes", type=int, dest="target_bytes", metavar="B",
                   help="target archive size in bytes; the rank is chosen to meet it")
    p.add_argument("--key", help="column to address rows by (kept exactly)")
    p.add_argument("--exact-columns", metavar="A,B", help="numeric columns to keep exactly, comma separated")
    p.add_argument("--sketch-rows", type=_sketch_rows, dest="sketch_rows", metavar="N",
                   help="rows the sketch that chooses the columns reads: auto (default: a seeded "
                        "sample of Parquet row groups when the table is large), all, or a number; "
                        "every error is still measured on every row")
    p.add_argument("--overwrite", action="store_true", help="replace an existing archive (never any other file)")
    p.set_defaults(func=cmd_compress)

    p = add("inspect", "shape, method, ranks, sizes, error summary, columns and rows kept exactly")
    p.add_argument("archive")
    p.add_argument("--checksums", action="store_true", help="also verify every file's SHA-256")
    p.set_defaults(func=cmd_inspect)

    p = add("rebuild", "rebuild rows and columns to Parquet, CSV or stdout",
            "examples:\n  rankfold rebuild a.rfa --rows 100:200 --columns s01_flow_m3_per_h\n"
            "  rankfold rebuild a.rfa --keys 17,18 --json\n"
            "  rankfold rebuild a.rfa --where \"shift = 'night'\" --output night.parquet")
    p.add_argument("archive")
    rows = p.add_argument_group("rows (choose one way; default: all)")
    rows.add_argument("--rows", metavar="SPEC", help="0-based positions: '0,5,9' or a range '100:200'")
    rows.add_argument("--keys", metavar="K1,K2", help="key values, comma separated (archives compressed with a key)")
    rows.add_argument("--where", metavar="SQL", help="a SQL condition on the columns kept exactly, e.g. \"id BETWEEN 10 AND 20\"")
    p.add_argument("--columns", metavar="A,B", help="numeric columns, comma separated (default: all)")
    p.add_argument("--output", metavar="FILE", help="file to write (.parquet or .csv); default: stdout")
    p.add_argument("--format", choices=["csv", "json"], default="csv", help="stdout format (default csv)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing output file")
    p.add_argument("--log", metavar="FILE", help="append the rebuild-log record to this JSON Lines file")
    p.set_defaults(func=cmd_rebuild)

    p = add("query", "run SQL with the archive available as a table",
            "The archive is the view 'archive' (rebuilt values, plus _rf_row: the 0-based row\n"
            "position); the SQL functions of rankfold.udfs.register are available, and\n"
            "getvariable('archive_path') is the archive's path. Rebuilt values are approximate:\n"
            "ask for their bounds.\n\n"
            "examples:\n  rankfold query a.rfa \"SELECT shift, avg(s01_flow_m3_per_h) FROM archive GROUP BY 1\"\n"
            "  rankfold query a.rfa \"SELECT _rf_row, rankfold_cell_with_bound(getvariable('archive_path'),\n"
            "      _rf_row, 's01_flow_m3_per_h') AS flow FROM archive LIMIT 3\"")
    p.add_argument("archive")
    p.add_argument("sql", help="a SQL statement over the view 'archive'")
    p.add_argument("--format", choices=["table", "csv", "json"], default="table", help="output format (default table)")
    p.add_argument("--limit", type=int, default=40, metavar="N", help="rows shown by --format table (default 40)")
    p.add_argument("--output", metavar="FILE", help="write the result to a .parquet or .csv file instead")
    p.add_argument("--overwrite", action="store_true", help="replace an existing output file")
    p.add_argument("--view", default="archive", help="name of the archive's view (default: archive)")
    p.set_defaults(func=cmd_query)

    p = add("verify", "check the archive's checksums and, given the source, every bound",
            "Without --source: every file must match its size and SHA-256 in the manifest.\n"
            "With --source: the source is read once and every rebuilt value must be within\n"
            "its bound of the source value (NULL, NaN and infinities exactly as they were).\n"
            "Exit code 3 when anything fails.")
    p.add_argument("archive")
    p.add_argument("--source", help="the table the archive was compressed from: Parquet/CSV path, "
                                    "or a table name or SELECT with --database")
    p.add_argument("--database", metavar="FILE", help="DuckDB database file holding the source")
    p.set_defaults(func=cmd_verify)

    p = add("report", "write the archive's quality report: one HTML file with plots",
            "The report shows the singular values with the chosen rank, the error of every\n"
            "column, a row-by-column map of bounds (or, with --source, of true errors) on a\n"
            "sample of rows, the row ledger, and which columns were kept exactly and why.\n"
            "It needs matplotlib: python -m pip install \"rankfold[report]\".")
    p.add_argument("archive")
    p.add_argument("--output", metavar="FILE.html", help="report file (default: <archive name>-report.html)")
    p.add_argument("--source", help="the source table, to map true errors instead of bounds")
    p.add_argument("--database", metavar="FILE", help="DuckDB database file holding the source")
    p.add_argument("--sample-rows", type=int, default=48, metavar="N", help="rows in the heatmap (default 48)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing report file")
    p.set_defaults(func=cmd_report)

    p = add("demo", "generate the invented Fernwald scenario, compress it with in-process DuckDB, "
                    "rebuild, print sizes and errors",
            "The Fernwald district-heating network is invented: generated by code with a fixed\n"
            "seed, not real data.")
    p.add_argument("--out", default="rankfold-demo", help="working folder (default: ./rankfold-demo)")
    p.add_argument("--rows", type=int, default=20_000, help="rows to generate (default 20000)")
    p.set_defaults(func=cmd_demo)
    _add_sweep_command(add)
    return parser


# -- housekeeping: rankfold sweep (a self-contained block) ---------------------------------------
def _add_sweep_command(add) -> None:
    p = add("sweep", "remove superseded archive versions, leftovers of crashed writes and "
                     "spooled SQL results",
            "A write (compress --overwrite, append) keeps the files of the version it replaces\n"
            "for a grace period, so that readers which opened that version keep reading it;\n"
            "a killed write leaves a temporary folder beside the archive. This command takes\n"
            "the archive's write lock and removes both (superseded files only once older than\n"
            "--grace), then the SQL result spools of processes that no longer run.\n\n"
            "examples:\n  rankfold sweep readings.rfa\n  rankfold sweep readings.rfa --grace 0")
    p.add_argument("archive", nargs="?", help="archive directory (omit to sweep only the SQL spools)")
    p.add_argument("--grace", type=float, default=None, metavar="SECONDS",
                   help="keep superseded versions younger than this (default 3600)")
    p.set_defaults(func=cmd_sweep)


def cmd_sweep(args: argparse.Namespace) -> int:
    from rankfold.udfs.sql.tables import sweep_spools
    from rankfold.udfs.store import versions

    grace = versions.GRACE_SECONDS if args.grace is None else args.grace
    removed = versions.sweep(args.archive, grace=grace) if args.archive else []
    spools = sweep_spools()
    if args.json:
        print(json.dumps({"archive": args.archive, "removed": removed, "spools_removed": spools}, indent=1))
    elif not args.quiet:
        print(f"removed {len(removed)} superseded or leftover entries"
              + (f" of {args.archive}" if args.archive else "")
              + f", and {len(spools)} SQL result spools of ended processes")
        for name in removed + spools:
            print(f"  {name}")
    return EXIT_OK


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return args.func(args)
    except RankfoldError as exc:
        message = " ".join(str(exc).split())  # one line, whatever the message holds
        print(f"rankfold: error: {message}", file=sys.stderr)
        return EXIT_ERROR
    except KeyboardInterrupt:
        print("rankfold: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
    except BrokenPipeError:  # e.g. `rankfold rebuild a.rfa | head`: the reader has enough
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return EXIT_OK


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
