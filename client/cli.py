"""The ``rankfold`` command line: thin wrappers of the Python API (one verb, three faces).

Every subcommand calls one library function and prints its result: ``compress`` ->
``rankfold.compress``, ``append`` -> ``Archive.append``, ``inspect`` ->
``rankfold.report.summary``, ``rebuild`` -> ``Archive.rebuild``, ``query`` -> ``rankfold.query``,
``view`` -> ``rankfold.portable_view.view_sql``, ``verify`` -> ``rankfold.verify``, ``report``
-> ``rankfold.write_report``, ``demo`` -> ``rankfold.demo.run_demo``. Error messages of the
library name Python options (``overwrite=True``); the CLI rewrites them into its own flags
(``--overwrite``) before printing. Results go to stdout (``--json`` for JSON); progress bars go to
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

__all__ = ["main", "build_parser", "cli_spelling", "CAUTION", "CLI_SPELLING", "EXIT_OK", "EXIT_ERROR",
           "EXIT_USAGE", "EXIT_FAILED"]

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
        f"size          {info['archive_bytes']:,} bytes in {len(info['files'])} files and the manifest "
        f"(numeric block as raw float64: {info['raw_float64_bytes']:,} bytes)",
        f"compared      {cli_spelling(info['size_comparison'])}",
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
        f"  largest error / std     {_fmt(e.get('largest_error_over_std'))}",
        f"guaranteed    {cli_spelling(info['guarantee'])}",
    ]
    lines += [f"warning       {cli_spelling(w)}" for w in info.get("warnings", [])]
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
# compress options the CLI spells differently: library name -> the flag that gives it
CLI_SPELLING = {"connection": "--database", "progress": "--quiet"}


def _per_column(option: str):
    """argparse type of --max-abs-error / --max-std-error / --rel-error: a number, NAME=NUMBER
    (repeat the flag for more columns), or a JSON object {"name": number, ...}."""
    flag = "--" + option.replace("_", "-")

    def parse(text: str) -> Any:
        text = text.strip()
        if text.startswith("{"):
            try:
                value = json.loads(text)
            except json.JSONDecodeError as exc:
                raise argparse.ArgumentTypeError(f"{flag}: not valid JSON ({exc.msg}): {text!r}") from None
            if not isinstance(value, dict):
                raise argparse.ArgumentTypeError(f"{flag}: expected a JSON object of column: number")
            return value
        name, sep, number = text.rpartition("=")
        try:
            parsed = float(number)
        except ValueError:
            raise argparse.ArgumentTypeError(
                f"{flag} takes a number, NAME=NUMBER (repeat the flag for more columns) or a JSON "
                f"object such as '{{\"flow\": 0.05}}'; got {text!r}") from None
        return {name.strip(): parsed} if sep else parsed

    return parse


def _merge_per_column(option: str, values: list[Any] | None) -> Any:
    """The repeated values of one per-column flag as the library's number or mapping."""
    if not values:
        return None
    numbers = [v for v in values if not isinstance(v, dict)]
    if numbers and len(values) > 1:
        raise rankfold.InvalidInputError(
            f"--{option.replace('_', '-')} takes one number for every column, or NAME=NUMBER "
            "pairs (and JSON objects), not both: columns not named get no tolerance of their own. "
            f"Got {len(values)} values.")
    if numbers:
        return numbers[0]
    merged: dict[str, Any] = {}
    for mapping in values:
        merged.update(mapping)
    return merged


def cmd_compress(args: argparse.Namespace) -> int:
    from .sql_view import open_database
    from .report import summary

    options: dict[str, Any] = {}
    for name in ("method", "column_method", "row_method", "link", "transform", "key", "n_columns",
                 "n_rows", "target_bytes", "sketch_rows", "residual", "basis_precision",
                 "refit_outliers", "replace", "batch_rows", "executor"):
        if getattr(args, name) is not None:
            options[name] = getattr(args, name)
    for name in ("max_abs_error", "max_std_error", "rel_error"):
        value = _merge_per_column(name, getattr(args, name))
        if value is not None:
            options[name] = value
    if args.exact_columns is not None:
        options["exact_columns"] = _split(args.exact_columns)
    if args.row_differences is not None:
        options["row_differences"] = (args.row_differences if args.row_differences in ("off", "auto", "all")
                                      else _split(args.row_differences))
    if args.storage_options is not None:
        try:
            options["storage_options"] = json.loads(args.storage_options)
        except json.JSONDecodeError as exc:
            raise rankfold.InvalidInputError(
                f"--storage-options must be a JSON object, e.g. '{{\"anon\": true}}' ({exc.msg}).") from None
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
    text = (f"compressed {info['shape'][0]} rows x {info['shape'][1]} numeric columns into "
            f"{info['archive']} in {elapsed:.2f} s: rank {info['rank']}, {info['archive_bytes']:,} bytes, "
            f"largest error {_fmt(e.get('largest_error_over_std'))} column standard deviations\n"
            f"size: {cli_spelling(info['size_comparison'])}\n"
            f"guaranteed: {cli_spelling(info['guarantee'])}\n"
            + "".join(f"warning: {cli_spelling(w)}\n" for w in info["warnings"])
            + f"details: rankfold inspect {info['archive']}")
    _emit(data, args.json, text)
    return EXIT_OK


def cmd_append(args: argparse.Namespace) -> int:
    with _source_and_progress(args, "to append", required=True) as (connection, bar):
        archive = rankfold.open(args.archive)
        before = archive.shape[0]
        result = archive.append(args.source, connection=connection, batch_rows=args.batch_rows,
                                progress=bar)
    added = result.shape[0] - before
    data = {"archive": str(result.path), "rows_appended": added, "rows": result.shape[0],
            "version": result.manifest.get("version"), "refactor_due": result.refactor_due,
            "guarantee": result.guarantee, "drift": result.manifest.get("drift")}
    text = (f"appended {added} rows to {result.path} (now {result.shape[0]} rows); every new value "
            f"is verified like the original rows: {cli_spelling(result.guarantee)}")
    if result.refactor_due:
        text += ("\nwarning: the appended rows have drifted past the archive's error target; "
                 "compress the whole table again (rankfold compress ... --overwrite)")
    _emit(data, args.json, text)
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
    table = archive.rebuild(rows=rows, columns=_split(args.columns), bounds=args.bounds)
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
    from .export import csv_text, table_to_json, write_table
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
        from .terminal import render_table, terminal_width

        print(render_table(table, limit=args.limit, width=terminal_width(),
                           precision=_query_precision(args.archive, table)))
    return EXIT_OK


def _query_precision(archive_path: str, table) -> dict[str, Any]:
    """Per result column, the bound that sets how many digits are worth printing: its own
    ``<name>_bound`` column when the result has one, else the archive's largest error of the
    numeric column of that name (a precision hint only, not a printed bound)."""
    names = set(table.schema.names)
    hints: dict[str, Any] = {}
    try:
        ledger = rankfold.open(archive_path).column_ledger()
    except RankfoldError:
        return hints
    err = dict(zip(ledger.column("name").to_pylist(), ledger.column("err_max").to_pylist()))
    for name in names:
        if f"{name}_bound" in names:
            hints[name] = f"{name}_bound"
        elif name in err and err[name] is not None:
            hints[name] = float(err[name])
    return hints


def cmd_view(args: argparse.Namespace) -> int:
    from .portable_view import view_sql

    text = view_sql(args.archive, args.name, bounds=args.bounds)
    if args.output:
        from .export import check_output_path

        out = check_output_path(args.output, overwrite=args.overwrite, suffixes=(".sql",))
        out.write_text(text, encoding="utf-8")
        _emit({"output": str(out), "view": args.name}, args.json, f"wrote the view {args.name!r} to {out}")
    elif args.json:
        print(json.dumps({"view": args.name, "sql": text}, indent=1))
    else:
        sys.stdout.write(text)
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
def _source_and_progress(args: argparse.Namespace, what: str, required: bool = False):
    """(DuckDB connection or None, progress bar) for commands that read a source, closed after."""
    from .sql_view import open_database

    if args.database and not args.source and not required:
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

    report = run_demo(args.output, rows=args.rows, quiet=args.json or args.quiet)
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
            "By default every rebuilt value is guaranteed within 0.05 standard deviations of its\n"
            "column (--max-std-error 0.05). --rank alone keeps no tolerance.\n"
            "Per-column tolerances: repeat NAME=NUMBER (--max-abs-error flow=0.05\n"
            "--max-abs-error temp=0.01) or give a JSON object ('{\"flow\": 0.05}'); columns not\n"
            "named get no tolerance of their own.\n\n"
            "examples:\n  rankfold compress readings.parquet readings.rankfold --key reading_id\n"
            "  rankfold compress readings readings.rankfold --database plant.duckdb --max-std-error 0.01\n"
            "  rankfold compress \"SELECT * FROM readings WHERE site = 'A'\" a.rankfold --database plant.duckdb --rank 12")
    p.add_argument("source", help="Parquet or CSV path; or a table name or SELECT with --database")
    p.add_argument("archive", help="archive directory to create (by convention NAME.rankfold)")
    p.add_argument("--database", metavar="FILE", help="DuckDB database file holding the table or query source (opened read-only)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing archive (never any other file)")
    g = p.add_argument_group("targets (default: --max-std-error 0.05)")
    g.add_argument("--max-std-error", type=_per_column("max_std_error"), action="append", dest="max_std_error",
                   metavar="E", help="every rebuilt value within E standard deviations of its column; "
                                     "a number, NAME=E (repeatable) or a JSON object")
    g.add_argument("--max-abs-error", type=_per_column("max_abs_error"), action="append", dest="max_abs_error",
                   metavar="E", help="every rebuilt value within E (column units); a number, NAME=E "
                                     "(repeatable) or a JSON object")
    g.add_argument("--rel-error", type=_per_column("rel_error"), action="append", dest="rel_error", metavar="E",
                   help="target relative error (whole table, or NAME=E per column); the rank is chosen to meet it")
    g.add_argument("--target-bytes", type=int, dest="target_bytes", metavar="B",
                   help="target archive size in bytes; the rank is chosen to meet it")
    g.add_argument("--rank", type=int, help="target rank k; alone, no tolerance is kept (with a "
                                            "tolerance: the rank is fixed and the residual coded to meet it)")
    g = p.add_argument_group("method")
    g.add_argument("--method", choices=["cur", "svd"], help="real columns and rows (cur, default) or synthetic factors (svd)")
    g.add_argument("--column-method", choices=["pivoted_qr", "leverage", "length_squared"], dest="column_method",
                   help="how basis columns are chosen (default pivoted_qr)")
    g.add_argument("--row-method", choices=["qdeim", "leverage", "length_squared"], dest="row_method",
                   help="how anchor rows are chosen (links other than cx; default qdeim)")
    g.add_argument("--link", choices=["cx", "optimal", "skeleton", "textbook"],
                   help="how other columns are built from the basis columns (default cx: least squares, no anchor rows)")
    g.add_argument("--transform", choices=["standardize", "center", "none"], help="per-column transform before factoring")
    g.add_argument("--n-columns", type=int, dest="n_columns", metavar="C", help="basis columns to keep (default 2k)")
    g.add_argument("--n-rows", type=int, dest="n_rows", metavar="R", help="anchor rows to keep (default 2c; links other than cx)")
    g.add_argument("--replace", action=argparse.BooleanOptionalAction, default=None,
                   help="sample columns and rows with replacement (default: only for the textbook link)")
    g.add_argument("--seed", type=int, default=0, help="seed of the random choices (default 0)")
    g = p.add_argument_group("coding under a tolerance")
    g.add_argument("--residual", choices=["auto", "quantized", "corrections"],
                   help="how the residual is kept: codes, exact corrections, or chosen per column (default auto)")
    g.add_argument("--basis-precision", choices=["auto", "exact", "tolerance"], dest="basis_precision",
                   help="keep the basis columns exactly, rounded to steps of twice the tolerance, or whichever "
                        "a trial on a sample of rows measures smaller (default auto; neither is smaller on "
                        "every table: see the README)")
    g.add_argument("--row-differences", metavar="off|auto|all|A,B", dest="row_differences",
                   help="store residual codes as differences from the previous row: off (default), auto (per "
                        "column, where a trial measures it 10%% smaller), all, or the named columns; SQL filters "
                        "outside rankfold_scan then decode whole chunks of 8,192 rows")
    g.add_argument("--refit-outliers", action=argparse.BooleanOptionalAction, default=None, dest="refit_outliers",
                   help="refit once without outlier rows (default: with a tolerance, when a sample of rows shows outliers)")
    g = p.add_argument_group("data")
    g.add_argument("--key", help="column to address rows by (kept exactly)")
    g.add_argument("--exact-columns", metavar="A,B", dest="exact_columns", help="numeric columns to keep exactly, comma separated")
    g = p.add_argument_group("running")
    g.add_argument("--executor", metavar="NAME",
                   help="local (default), dask (the default dask.distributed client, else a local "
                        "cluster), or a scheduler address tcp://host:port")
    g.add_argument("--storage-options", metavar="JSON", dest="storage_options",
                   help="options of the file system of a remote source, as a JSON object (e.g. credentials)")
    g.add_argument("--batch-rows", type=int, dest="batch_rows", metavar="N",
                   help="rows per batch read from the source (default 131072)")
    g.add_argument("--sketch-rows", type=_sketch_rows, dest="sketch_rows", metavar="N",
                   help="rows the sketch that chooses the columns reads (with --rank alone): auto "
                        "(default: a seeded sample of Parquet row groups when the table is large), "
                        "all, or a number; every error is still measured on every row")
    p.set_defaults(func=cmd_compress)

    p = add("append", "append the rows of a source to an archive, verified with its factors",
            "The new rows must have the archive's columns and types. They are rebuilt from their\n"
            "own basis values with the archive's mixing matrix and verified like the original\n"
            "rows, so every bound (and the archive's tolerance) holds for them too.\n\n"
            "examples:\n  rankfold append readings.rankfold new-readings.parquet\n"
            "  rankfold append readings.rankfold \"SELECT * FROM readings WHERE day = today()\" --database plant.duckdb")
    p.add_argument("archive")
    p.add_argument("source", help="Parquet or CSV path; or a table name or SELECT with --database")
    p.add_argument("--database", metavar="FILE", help="DuckDB database file holding the source (opened read-only)")
    p.add_argument("--batch-rows", type=int, default=131_072, dest="batch_rows", metavar="N",
                   help="rows per batch read from the source (default 131072)")
    p.set_defaults(func=cmd_append)

    p = add("inspect", "shape, method, ranks, sizes, error summary, columns and rows kept exactly")
    p.add_argument("archive")
    p.add_argument("--checksums", action="store_true", help="also verify every file's SHA-256")
    p.set_defaults(func=cmd_inspect)

    p = add("rebuild", "rebuild rows and columns to Parquet, CSV or stdout",
            "examples:\n  rankfold rebuild a.rankfold --rows 100:200 --columns s01_flow_m3_per_h\n"
            "  rankfold rebuild a.rankfold --keys 17,18 --json\n"
            "  rankfold rebuild a.rankfold --where \"shift = 'night'\" --output night.parquet")
    p.add_argument("archive")
    rows = p.add_argument_group("rows (choose one way; default: all)")
    rows.add_argument("--rows", metavar="SPEC", help="0-based positions: '0,5,9' or a range '100:200'")
    rows.add_argument("--keys", metavar="K1,K2", help="key values, comma separated (archives compressed with a key)")
    rows.add_argument("--where", metavar="SQL", help="a SQL condition on the columns kept exactly, e.g. \"id BETWEEN 10 AND 20\"")
    p.add_argument("--columns", metavar="A,B", help="numeric columns, comma separated (default: all)")
    p.add_argument("--output", metavar="FILE", help="file to write (.parquet or .csv); default: stdout")
    p.add_argument("--bounds", action="store_true",
                   help="add <column>_bound after each rebuilt column: a guaranteed limit on |true - value|")
    p.add_argument("--format", choices=["csv", "json"], default="csv", help="stdout format (default csv)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing output file")
    p.add_argument("--log", metavar="FILE", help="append the rebuild-log record to this JSON Lines file")
    p.set_defaults(func=cmd_rebuild)

    p = add("query", "run SQL with the archive available as a table",
            "The archive is the view 'archive' (rebuilt values, plus _rf_row: the 0-based row\n"
            "position); the SQL functions of rankfold.udfs.register are available, and\n"
            "getvariable('archive_path') is the archive's path. Rebuilt values are approximate:\n"
            "ask for their bounds.\n\n"
            "examples:\n  rankfold query a.rankfold \"SELECT shift, avg(s01_flow_m3_per_h) FROM archive GROUP BY 1\"\n"
            "  rankfold query a.rankfold \"SELECT _rf_row, rankfold_cell_with_bound(getvariable('archive_path'),\n"
            "      _rf_row, 's01_flow_m3_per_h') AS flow FROM archive LIMIT 3\"")
    p.add_argument("archive")
    p.add_argument("sql", help="a SQL statement over the view 'archive'")
    p.add_argument("--format", choices=["table", "csv", "json"], default="table", help="output format (default table)")
    p.add_argument("--limit", type=int, default=40, metavar="N", help="rows shown by --format table (default 40)")
    p.add_argument("--output", metavar="FILE", help="write the result to a .parquet or .csv file instead")
    p.add_argument("--overwrite", action="store_true", help="replace an existing output file")
    p.add_argument("--view", default="archive", help="name of the archive's view (default: archive)")
    p.set_defaults(func=cmd_query)

    p = add("view", "print SQL that creates a view of the archive in any DuckDB, without rankfold",
            "The view reads the archive's Parquet files (named one by one, with absolute paths)\n"
            "and rebuilds every numeric column with the mixing matrix written into the SQL as\n"
            "constants, so a DuckDB connection without rankfold can run it. Columns: the exact\n"
            "columns, the rebuilt numeric columns, _rf_bound (a bound for every rebuilt value of\n"
            "the row; --bounds cell: one <column>_bound per column) and _rf_row (0-based row).\n"
            "Move the archive and the view must be made again.\n\n"
            "examples:\n  rankfold view a.rankfold --name readings > readings_view.sql\n"
            "  rankfold view a.rankfold | duckdb plant.duckdb")
    p.add_argument("archive")
    p.add_argument("--name", default="archive", help="name of the view (default: archive)")
    p.add_argument("--bounds", choices=["row", "cell", "none"], default="row",
                   help="one bound per row (default), one per cell, or none")
    p.add_argument("--output", metavar="FILE.sql", help="write the SQL to this file instead of stdout")
    p.add_argument("--overwrite", action="store_true", help="replace an existing output file")
    p.set_defaults(func=cmd_view)

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
            "It needs matplotlib: python -m pip install matplotlib")
    p.add_argument("archive")
    p.add_argument("--output", metavar="FILE.html", help="report file (default: <archive name>-report.html)")
    p.add_argument("--source", help="the source table, to map true errors instead of bounds")
    p.add_argument("--database", metavar="FILE", help="DuckDB database file holding the source")
    p.add_argument("--sample-rows", type=int, default=48, metavar="N", help="rows in the heatmap (default 48)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing report file")
    p.set_defaults(func=cmd_report)

    p = add("demo", "generate the invented demo heat network, compress it with in-process DuckDB, "
                    "rebuild, print sizes and errors",
            "The demo heat network is invented: generated by code with a fixed seed, not real\n"
            "data, and named after no real place.")
    p.add_argument("--output", default="rankfold-demo", metavar="DIR",
                   help="working folder (default: ./rankfold-demo)")
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
            "examples:\n  rankfold sweep readings.rankfold\n  rankfold sweep readings.rankfold --grace 0")
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


def _flag(name: str) -> str:
    return CLI_SPELLING.get(name) or "--" + name.replace("_", "-")


def _option_names() -> set[str]:
    from dataclasses import fields

    from rankfold.udfs.passes.options import CompressOptions

    return {f.name for f in fields(CompressOptions)} | {"overwrite", "bounds", "checksums"}


def cli_spelling(message: str) -> str:
    """A library message in the command line's words: ``overwrite=True`` -> ``--overwrite``,
    ``executor='dask'`` -> ``--executor dask``, ``max_abs_error=0.1`` -> ``--max-abs-error 0.1``,
    ``refit_outliers=False`` -> ``--no-refit-outliers``, ``the 'rank' option`` -> ``the --rank
    option``, ``'rank'`` -> ``--rank``; install hints that name an extra -> the plain package."""
    import re

    known = _option_names()

    def assignment(match: re.Match) -> str:
        name, value = match.group(1), match.group(2)
        if name not in known:
            return match.group(0)
        if value == "True":
            return _flag(name)
        if value == "False":
            return "--no-" + name.replace("_", "-")
        return f"{_flag(name)} {value.strip(chr(39))}"

    text = re.sub(r"\b([a-z_]+)=('[^']*'|True|False|[0-9][0-9.eE+-]*)", assignment, message)
    text = re.sub(r"(?<!column )(?<!\[)'([a-z_]+)'", lambda m: _flag(m.group(1)) if m.group(1) in known
                  else m.group(0), text)
    # bare option names with an underscore cannot be mistaken for prose: max_abs_error
    underscored = "|".join(sorted((n for n in known if "_" in n), key=len, reverse=True))
    text = re.sub(rf"(?<![\w'./-])({underscored})(?![\w=(])", lambda m: _flag(m.group(1)), text)
    text = text.replace("(--overwrite)", "").replace("pass --overwrite  to", "pass --overwrite to")
    text = re.sub(r"""pip install ['"]rankfold\[dask\]['"]""", 'python -m pip install "dask[distributed]"', text)
    text = re.sub(r"""pip install ['"]rankfold\[report\]['"]""", "python -m pip install matplotlib", text)
    return text


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return args.func(args)
    except RankfoldError as exc:
        message = cli_spelling(" ".join(str(exc).split()))  # one line, in the CLI's words
        print(f"rankfold: error: {message}", file=sys.stderr)
        return EXIT_ERROR
    except KeyboardInterrupt:
        print("rankfold: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
    except BrokenPipeError:  # e.g. `rankfold rebuild a.rankfold | head`: the reader has enough
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return EXIT_OK


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
