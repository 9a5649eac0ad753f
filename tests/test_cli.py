"""The ``rankfold`` command line: every subcommand's success and its main error paths.

All data is invented by code with fixed seeds (a low-rank table plus noise, with an integer key
and a text column). Commands run through ``main([...])`` in-process; one test runs the
installed module in a subprocess to check the real exit code.
"""

from __future__ import annotations

import io
import json
import re
import subprocess
import sys
from pathlib import Path

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest

import rankfold
from rankfold.cli import CAUTION, EXIT_CODES, build_parser, main
from rankfold.sql_view import connect
from rankfold.terminal import ProgressBar, format_seconds

ROWS, COLS, RANK = 600, 14, 3
NAMES = [f"m{j:02d}" for j in range(COLS)]
SUBCOMMANDS = ["compress", "append", "inspect", "rebuild", "query", "view", "verify", "report", "demo",
               "sweep"]


def _table(seed: int = 11) -> pa.Table:
    """Rank-3 table plus 1e-3 noise, columns in different units; id key, a text column."""
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((ROWS, RANK)) @ rng.standard_normal((RANK, COLS))
    x = (x + 1e-3 * rng.standard_normal((ROWS, COLS))) * np.geomspace(1, 50, COLS) + 7.0
    columns = {"id": pa.array(np.arange(1000, 1000 + ROWS, dtype=np.int64)),
               "site": pa.array(["north" if i % 3 else "south" for i in range(ROWS)])}
    columns.update({n: pa.array(x[:, j]) for j, n in enumerate(NAMES)})
    return pa.table(columns)


@pytest.fixture(scope="module")
def files(tmp_path_factory) -> dict[str, Path]:
    folder = tmp_path_factory.mktemp("cli")
    table = _table()
    source = folder / "panel.parquet"
    pq.write_table(table, source)
    archive = folder / "panel.rankfold"
    rankfold.compress(table, archive, rank=RANK, key="id")
    return {"folder": folder, "source": source, "archive": archive}


@pytest.fixture()
def archive(files) -> str:
    return str(files["archive"])


def run(capsys, *argv) -> tuple[int, str, str]:
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def one_line_error(err: str) -> str:
    assert err.startswith("rankfold: error: ") and err.endswith("\n") and err.count("\n") == 1, err
    return err[len("rankfold: error: "):-1]


# -- help and usage ----------------------------------------------------------------------------
def test_main_help_lists_every_subcommand_exit_codes_and_the_caution(capsys):
    with pytest.raises(SystemExit) as stop:
        main(["--help"])
    assert stop.value.code == 0
    out = capsys.readouterr().out
    for name in SUBCOMMANDS:
        assert re.search(rf"^    {name} ", out, re.M), name
    assert EXIT_CODES in out
    assert "lossy" in out and "record-keeping law" in out


@pytest.mark.parametrize("name", SUBCOMMANDS)
def test_every_subcommand_help_carries_the_caution_and_json_quiet(name, capsys):
    with pytest.raises(SystemExit) as stop:
        main([name, "--help"])
    assert stop.value.code == 0
    out = capsys.readouterr().out
    assert "rankfold archives are lossy" in out and "record-keeping law" in out
    assert "--json" in out and "--quiet" in out


def test_the_parser_has_exactly_the_pinned_subcommands():
    parser = build_parser()
    assert list(parser._subparsers._group_actions[0].choices) == SUBCOMMANDS
    assert "record-keeping law" in CAUTION


@pytest.mark.parametrize("argv", [[], ["inspect"], ["frobnicate"], ["rebuild", "x.rankfold", "--format", "xml"],
                                  ["compress", "a.parquet", "b.rankfold", "--rank", "three"]])
def test_usage_errors_exit_2(argv, capsys):
    with pytest.raises(SystemExit) as stop:
        main(argv)
    assert stop.value.code == 2
    assert "usage: rankfold" in capsys.readouterr().err


def test_real_process_exit_codes(files, tmp_path):
    ok = subprocess.run([sys.executable, "-m", "rankfold.cli", "inspect", str(files["archive"]), "--json"],
                        capture_output=True, text=True)
    assert ok.returncode == 0 and json.loads(ok.stdout)["shape"] == [ROWS, COLS] and ok.stderr == ""
    missing = subprocess.run([sys.executable, "-m", "rankfold.cli", "inspect", str(tmp_path / "no.rankfold")],
                             capture_output=True, text=True)
    assert missing.returncode == 1 and missing.stdout == ""
    assert missing.stderr == f"rankfold: error: No archive at {tmp_path / 'no.rankfold'}. Check the path.\n"


# -- compress ----------------------------------------------------------------------------------
def test_compress_parquet_text_and_json(files, tmp_path, capsys):
    code, out, err = run(capsys, "compress", files["source"], tmp_path / "a.rankfold", "--rank", RANK, "--key", "id")
    assert code == 0 and err == ""
    # sizes as the file system reports them (os.stat): every file of the archive folder,
    # manifest included, and the source Parquet file
    size = sum(p.stat().st_size for p in (tmp_path / "a.rankfold").iterdir())
    source = Path(files["source"]).stat().st_size
    smaller = f"the archive is {source / size:.3g}x smaller" if size < source else "the archive is NOT smaller"
    assert re.fullmatch(rf"compressed {ROWS} rows x {COLS} numeric columns into {tmp_path / 'a.rankfold'} in "
                        rf"\d+\.\d\d s: rank {RANK}, {size:,} bytes, largest "
                        rf"error \d\.\d+(e-\d+)? column standard deviations\n"
                        rf"size: The archive takes {size:,} bytes \(every file and the manifest counted\); the "
                        rf"source takes {source:,} bytes \(its Parquet files as stored\): {re.escape(smaller)}.*\n"
                        rf"guaranteed: no tolerance was "
                        rf"asked for .*\n(warning: .*\n)?details: rankfold inspect {tmp_path / 'a.rankfold'}\n", out), out
    code, out, _ = run(capsys, "compress", files["source"], tmp_path / "b.rankfold", "--rank", RANK, "--json",
                       "--exact-columns", "m03", "--seed", 4)
    data = json.loads(out)
    assert code == 0 and data["summary"]["shape"] == [ROWS, COLS]
    assert data["manifest"]["method"]["seed"] == 4 and "m03" in data["manifest"]["method"]["options"]["exact_columns"]
    assert "m03" in data["summary"]["exact_columns"] and "m03" not in data["summary"]["numeric_columns"]
    assert rankfold.open(tmp_path / "b.rankfold").rebuild(rows=[5]).column("m03").to_pylist() == [
        _table().column("m03")[5].as_py()]


def test_compress_csv(files, tmp_path, capsys):
    csv = tmp_path / "panel.csv"
    pacsv.write_csv(_table(), csv)
    code, out, _ = run(capsys, "compress", csv, tmp_path / "c.rankfold", "--rank", RANK, "--json", "--key", "id")
    assert code == 0 and json.loads(out)["summary"]["shape"] == [ROWS, COLS]


def test_compress_from_a_duckdb_file_table_and_query(tmp_path, capsys):
    db = tmp_path / "plant.duckdb"
    con = duckdb.connect(str(db))
    con.register("v", _table())
    con.execute("CREATE TABLE panel AS SELECT * FROM v")
    con.close()
    code, out, _ = run(capsys, "compress", "panel", tmp_path / "t.rankfold", "--database", db, "--rank", RANK,
                       "--key", "id", "--json")
    assert code == 0 and json.loads(out)["summary"]["shape"] == [ROWS, COLS]
    code, out, _ = run(capsys, "compress", "SELECT id, m00, m01, m02, m03 FROM panel WHERE site = 'south'",
                       tmp_path / "q.rankfold", "--database", db, "--rank", 2, "--key", "id", "--json")
    assert code == 0 and json.loads(out)["summary"]["shape"] == [ROWS // 3, 4]
    # the database file was opened read-only and closed again: it can be opened for writing
    duckdb.connect(str(db)).close()


def test_compress_errors(files, tmp_path, capsys):
    code, _, err = run(capsys, "compress", tmp_path / "none.parquet", tmp_path / "x.rankfold")
    assert code == 1 and one_line_error(err) == f"No Parquet file at {tmp_path / 'none.parquet'}. Check the path."
    code, _, err = run(capsys, "compress", "panel", tmp_path / "x.rankfold", "--database", tmp_path / "none.duckdb")
    assert code == 1 and one_line_error(err) == f"No DuckDB database file at {tmp_path / 'none.duckdb'}. Check the path."
    code, _, err = run(capsys, "compress", files["source"], tmp_path / "x.rankfold", "--rank", 99)
    assert code == 1 and "rank" in one_line_error(err)
    assert not (tmp_path / "x.rankfold").exists()


def test_compress_refuses_an_existing_archive_and_keeps_it(files, capsys):
    before = (files["archive"] / "manifest.json").read_bytes()
    code, _, err = run(capsys, "compress", files["source"], files["archive"], "--rank", RANK)
    assert code == 1 and "already exists" in one_line_error(err)
    assert (files["archive"] / "manifest.json").read_bytes() == before


# -- progress bars -----------------------------------------------------------------------------
class _Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


def test_progress_bar_line_format():
    line = ProgressBar.line({"stage": "encode", "rows_done": 500, "rows_total": 2000,
                             "rows_per_second": 100.0, "seconds": 5.0, "done": False})
    assert line == "encode     [#####...............]  25%  500 / 2,000 rows  100 rows/s  0:15 left"
    line = ProgressBar.line({"stage": "profile", "rows_done": 1234567, "rows_total": None,
                             "rows_per_second": 2e6, "seconds": 3725.0, "done": True})
    assert line == "profile    1,234,567 rows  2,000,000 rows/s  done in 1:02:05"
    assert format_seconds(59.6) == "1:00"


def test_progress_bar_draws_only_on_a_terminal():
    report = {"stage": "sketch", "rows_done": 1, "rows_total": 2, "rows_per_second": 1.0,
              "seconds": 1.0, "done": True}
    pipe, tty = io.StringIO(), _Terminal()
    ProgressBar(pipe)(report)
    ProgressBar(tty)(report)
    ProgressBar(_Terminal(), enabled=False)(report)
    assert pipe.getvalue() == ""
    assert tty.getvalue().startswith("\rsketch") and tty.getvalue().endswith("\n")


def test_compress_shows_progress_on_a_terminal_unless_quiet(files, tmp_path, capsys, monkeypatch):
    tty = _Terminal()
    monkeypatch.setattr(sys, "stderr", tty)
    assert main(["compress", str(files["source"]), str(tmp_path / "p.rankfold"), "--rank", str(RANK)]) == 0
    drawn = tty.getvalue()
    for stage in ("profile", "encode"):  # the default cx link needs no select pass
        assert f"\r{stage}" in drawn
    assert "rows/s" in drawn and f"{ROWS} / {ROWS} rows" in drawn
    quiet = _Terminal()
    monkeypatch.setattr(sys, "stderr", quiet)
    assert main(["compress", str(files["source"]), str(tmp_path / "q.rankfold"), "--rank", str(RANK), "--quiet"]) == 0
    assert quiet.getvalue() == ""
    capsys.readouterr()


# -- inspect -----------------------------------------------------------------------------------
def test_inspect_text(archive, capsys):
    code, out, err = run(capsys, "inspect", archive, "--checksums")
    arch = rankfold.open(archive)
    assert code == 0 and err == ""
    assert f"shape         {ROWS} rows x {COLS} numeric columns" in out
    assert f"method        cur, rank {RANK} (given), transform standardize" in out
    assert f"  basis columns      {len(arch.basis_columns)}: {', '.join(arch.basis_columns)}" in out
    assert f"  anchor rows        {len(arch.anchor_rows)}: " in out
    assert "  other columns      id, site" in out
    assert out.strip().endswith("checksums     every file matches its SHA-256 in the manifest")


def test_inspect_json_matches_the_manifest(archive, capsys):
    code, out, _ = run(capsys, "inspect", archive, "--json")
    data = json.loads(out)
    manifest = json.loads((Path(archive) / "manifest.json").read_text())
    assert code == 0
    # the errors as read (the stored form keeps rankfold's notes as their index in ERROR_NOTES)
    assert data["shape"] == manifest["shape"] and data["errors"] == rankfold.open(archive).errors
    assert manifest["errors"]["note"] == 0
    assert data["basis_columns"] == [b["name"] for b in rankfold.open(archive).manifest["basis"]]
    assert "name" in manifest["basis"]  # stored by field (names as runs: manifest_schema._named_runs)
    assert data["anchor_rows"] == manifest["anchors"]
    # every file of the archive as the file system reports it (os.stat), manifest.json included
    on_disk = sum(p.stat().st_size for p in Path(archive).iterdir())
    assert data["archive_bytes"] == on_disk == manifest["achieved"]["bytes"]
    assert data["raw_float64_bytes"] == ROWS * COLS * 8
    assert data["source_bytes"] == manifest["source_size"]["bytes"] > 0
    assert data["source_measure"] == manifest["source_size"]["measure"]


def _damaged_copy(files, tmp_path) -> Path:
    import shutil

    copy = tmp_path / "damaged.rankfold"
    shutil.copytree(files["archive"], copy)
    target = copy / "columns.parquet"
    data = bytearray(target.read_bytes())
    data[len(data) // 2] ^= 0xFF  # same size, different content
    target.write_bytes(bytes(data))
    return copy


def test_inspect_errors(files, tmp_path, capsys):
    code, _, err = run(capsys, "inspect", tmp_path / "nope.rankfold")
    assert code == 1 and one_line_error(err) == f"No archive at {tmp_path / 'nope.rankfold'}. Check the path."
    damaged = _damaged_copy(files, tmp_path)
    code, _, err = run(capsys, "inspect", damaged, "--checksums")
    assert code == 1 and one_line_error(err) == (
        f"{damaged / 'columns.parquet'} does not match its SHA-256 in the manifest; the archive "
        "is damaged or was edited.")


# -- rebuild -----------------------------------------------------------------------------------
def test_rebuild_rows_to_parquet_equals_python(archive, tmp_path, capsys):
    out = tmp_path / "part.parquet"
    code, text, _ = run(capsys, "rebuild", archive, "--rows", "10:20", "--columns", "m01,m02", "--output", out)
    assert code == 0 and text == f"wrote 10 rows x 4 columns to {out}\n"
    table = pq.read_table(out)
    assert table.schema.names == ["id", "site", "m01", "m02"]
    expected = rankfold.open(archive).to_numpy(rows=slice(10, 20), columns=["m01", "m02"])
    np.testing.assert_array_equal(np.column_stack([table.column(n).to_numpy() for n in ("m01", "m02")]), expected)


def test_rebuild_by_key_to_stdout_csv_and_json(archive, capsys):
    code, out, _ = run(capsys, "rebuild", archive, "--keys", "1003,1001", "--columns", "m05")
    arch = rankfold.open(archive)
    values = arch.to_numpy(rows=rankfold.Keys([1003, 1001]), columns=["m05"])[:, 0]
    lines = out.splitlines()
    assert code == 0 and lines[0] == '"id","site","m05"' and len(lines) == 3
    assert lines[1].startswith('1003,"south",') and float(lines[1].split(",")[2]) == pytest.approx(values[0], rel=1e-12)
    code, out, _ = run(capsys, "rebuild", archive, "--keys", "1001", "--columns", "m05", "--json")
    # the same value up to the last bits (a BLAS product's order depends on the request's shape)
    assert code == 0 and json.loads(out) == [{"id": 1001, "site": "north", "m05": pytest.approx(values[1], rel=1e-12)}]


def test_rebuild_by_predicate_and_to_csv_file(archive, tmp_path, capsys):
    out = tmp_path / "south.csv"
    code, _, _ = run(capsys, "rebuild", archive, "--where", "site = 'south' AND id < 1010", "--output", out)
    table = pacsv.read_csv(out)
    assert code == 0 and table.column("id").to_pylist() == [1000, 1003, 1006, 1009]
    assert table.num_columns == 2 + COLS


def test_rebuild_errors(archive, tmp_path, capsys):
    existing = tmp_path / "there.csv"
    existing.write_text("keep me\n")
    cases = [
        (["--rows", "a:b"], "--rows takes positions such as '0,5,9' or a range such as '100:200'; got 'a:b'."),
        (["--rows", "1", "--keys", "1001"], "Choose rows one way: give only one of --rows, --keys and --where (got --rows and --keys)."),
        (["--keys", "x7"], "The key column id holds integers; 'x7' is not one."),
        (["--keys", "5"], f"The archive {archive} has no row with id = 5."),
        (["--rows", str(ROWS)], f"Row position {ROWS} is out of range for the archive {archive} with {ROWS} rows (valid: 0 to {ROWS - 1}, or -{ROWS} to -1 from the end)."),
        (["--columns", "nope"], f"The archive {archive} has no numeric column 'nope'. Its numeric columns are {NAMES}."),
        (["--output", str(existing)], f"The output file {existing} already exists; choose another name or pass --overwrite to replace it."),
        (["--output", str(tmp_path / "x.xlsx")], f"Cannot tell the format of the output file {tmp_path / 'x.xlsx'}: its name must end in .parquet or .pq or .csv."),
        (["--output", str(tmp_path / "no" / "x.csv")], f"The folder of the output file {tmp_path / 'no' / 'x.csv'} does not exist; create it first."),
    ]
    for extra, message in cases:
        code, _, err = run(capsys, "rebuild", archive, *extra)
        assert code == 1 and one_line_error(err) == message, extra
    assert existing.read_text() == "keep me\n"
    code, _, err = run(capsys, "rebuild", archive, "--where", "m99 > 1")
    assert code == 1 and one_line_error(err).startswith("The row condition 'm99 > 1' was refused: 'm99' is not one of the columns")
    allowed = ["id", "site", *rankfold.open(archive).basis_columns]
    assert all(f"'{name}'" in one_line_error(err) for name in allowed)  # the columns it may use


def test_rebuild_overwrite_replaces_an_output_file(archive, tmp_path, capsys):
    out = tmp_path / "o.csv"
    out.write_text("old\n")
    code, _, _ = run(capsys, "rebuild", archive, "--rows", "0", "--output", out, "--overwrite")
    assert code == 0 and out.read_text().startswith('"id","site"')


def test_rebuild_log(archive, tmp_path, capsys):
    log = tmp_path / "log.jsonl"
    run(capsys, "rebuild", archive, "--rows", "0,1", "--log", log)
    record = json.loads(log.read_text())
    assert record["request"] == "rebuild" and record["rows"] == [0, 1]


# -- query -------------------------------------------------------------------------------------
def test_query_table_csv_json_and_file(archive, tmp_path, capsys):
    sql = "SELECT site, count(*) AS n FROM archive GROUP BY site ORDER BY site"
    code, out, _ = run(capsys, "query", archive, sql)
    assert code == 0 and out == ("site     n\nnorth  400\nsouth  200\n2 rows\n")
    code, out, _ = run(capsys, "query", archive, sql, "--format", "csv")
    assert out == '"site","n"\n"north",400\n"south",200\n'
    code, out, _ = run(capsys, "query", archive, sql, "--json")
    assert json.loads(out) == [{"site": "north", "n": 400}, {"site": "south", "n": 200}]
    target = tmp_path / "q.parquet"
    code, out, _ = run(capsys, "query", archive, sql, "--output", target)
    assert code == 0 and pq.read_table(target).column("n").to_pylist() == [400, 200]
    code, out, _ = run(capsys, "query", archive, "SELECT * FROM range(50)", "--limit", "3")
    assert out.splitlines()[-1] == "showing 3 of 50 rows (--limit N shows more; --format csv or --output gives all)"


def test_query_values_equal_the_rebuild_and_bounds_are_one_call_away(archive, capsys):
    sql = ("SELECT _rf_row, id, m07, rankfold_cell_bound(getvariable('archive_path'), _rf_row, 'm07') AS bound "
           "FROM archive WHERE id IN (1002, 1500) ORDER BY id")
    code, out, _ = run(capsys, "query", archive, sql, "--json")
    rows = json.loads(out)
    arch = rankfold.open(archive)
    assert code == 0 and [r["_rf_row"] for r in rows] == [2, 500]
    for r in rows:
        cell = arch.cell(r["_rf_row"], "m07")
        assert r["m07"] == cell.value and r["bound"] == cell.bound


def test_query_errors(archive, capsys):
    code, _, err = run(capsys, "query", archive, "SELECT nope FROM archive")
    message = one_line_error(err)
    assert code == 1 and message.startswith("The query failed: Binder Error: Referenced column \"nope\" not found")
    con = connect(archive)
    names = con.sql("SELECT * FROM archive LIMIT 0").columns
    con.close()
    assert {"_rf_row", "id", "site", *NAMES} <= set(names)
    assert message.endswith(f"Fix the SQL; the archive {archive} is the view archive with the columns "
                            f"{', '.join(names[:12])} ... ({len(names)} in all).")
    code, _, err = run(capsys, "query", archive, "  ")
    assert code == 1 and one_line_error(err) == "The query is empty; give a SQL statement, e.g. 'SELECT count(*) FROM archive'."


# -- verify ------------------------------------------------------------------------------------
def test_verify_checksums_and_bounds_against_the_source(files, archive, capsys):
    code, out, err = run(capsys, "verify", archive)
    assert code == 0 and err == ""
    assert out.strip().endswith("verified      every file matches its checksum (give --source to check the bounds too)")
    code, out, _ = run(capsys, "verify", archive, "--source", files["source"])
    assert code == 0
    assert f"  cells checked           {ROWS * COLS:,}" in out and "  outside their bound     0" in out
    assert out.strip().endswith("every value is within its bound")
    code, out, _ = run(capsys, "verify", archive, "--source", files["source"], "--json")
    data = json.loads(out)
    assert data["ok"] and data["source"]["violations"] == 0 and data["source"]["cells_checked"] == ROWS * COLS
    ledger = rankfold.open(archive).column_ledger()
    for column, ledger_max in zip(data["source"]["columns"], ledger.column("err_max").to_pylist()):
        assert column["ledger_err_max"] == ledger_max
        assert column["measured_err_max"] <= ledger_max * (1 + 1e-9)  # re-measured on the same data


def test_verify_from_a_duckdb_database(files, archive, tmp_path, capsys):
    db = tmp_path / "src.duckdb"
    con = duckdb.connect(str(db))
    con.execute(f"CREATE TABLE panel AS SELECT * FROM read_parquet('{files['source']}')")
    con.close()
    code, out, _ = run(capsys, "verify", archive, "--source", "SELECT * FROM panel", "--database", db, "--json")
    assert code == 0 and json.loads(out)["ok"]


def test_verify_finds_a_value_outside_its_bound(files, archive, tmp_path, capsys):
    arch = rankfold.open(archive)
    table = _table()
    column = next(n for n in NAMES if n not in arch.basis_columns)
    row = next(i for i in range(ROWS) if i not in arch.anchor_rows)
    values = table.column(column).to_numpy().copy()
    values[row] += 100 * values.std()
    changed = tmp_path / "changed.parquet"
    pq.write_table(table.set_column(table.schema.get_field_index(column), column, pa.array(values)), changed)
    code, out, _ = run(capsys, "verify", archive, "--source", changed)
    assert code == 3
    assert "  outside their bound     1" in out
    assert f"  row {row}, {column}: source " in out
    assert out.strip().endswith(f"FAILED        1 cells are outside their bounds or changed their "
                                f"missing-value pattern, in the columns ['{column}']")


def test_verify_finds_a_damaged_file_and_a_wrong_source(files, archive, tmp_path, capsys):
    damaged = _damaged_copy(files, tmp_path)
    code, out, _ = run(capsys, "verify", damaged, "--json")
    data = json.loads(out)
    assert code == 3 and not data["ok"]
    assert data["problems"] == ["columns.parquet: SHA-256 differs from the manifest"]
    short = tmp_path / "short.parquet"
    pq.write_table(_table().slice(0, ROWS - 5), short)
    code, out, _ = run(capsys, "verify", archive, "--source", short, "--json")
    assert code == 3 and json.loads(out)["problems"][0] == (
        f"the source has {ROWS - 5} rows where the archive has {ROWS}; it is not the table this "
        "archive was compressed from, or it has changed since")
    code, _, err = run(capsys, "verify", archive, "--database", tmp_path / "x.duckdb")
    assert code == 1 and one_line_error(err) == "--database needs --source (the table name or SELECT to compare with)."
    code, _, err = run(capsys, "verify", tmp_path / "none.rankfold")
    assert code == 1 and one_line_error(err) == f"No archive at {tmp_path / 'none.rankfold'}. Check the path."


# -- report ------------------------------------------------------------------------------------
def test_report_writes_html_and_refuses_to_replace(archive, tmp_path, capsys, monkeypatch):
    monkeypatch.chdir(tmp_path)
    out = tmp_path / "panel-report.html"  # the default name: <archive name>-report.html
    code, text, _ = run(capsys, "report", archive, "--sample-rows", 12)
    assert code == 0 and out.is_file()
    assert text.startswith("wrote panel-report.html (") and " 5 plots): rank 3, relative error " in text
    code, _, err = run(capsys, "report", archive, "--output", out)
    assert code == 1 and one_line_error(err) == (
        f"The report file {out} already exists; choose another name or pass --overwrite "
        "to replace it.")
    code, text, _ = run(capsys, "report", archive, "--output", out, "--overwrite", "--json", "--quiet",
                        "--source", str(Path(archive).parent / "panel.parquet"))
    data = json.loads(text)
    assert code == 0 and data["output"] == str(out) and data["heatmap"]["kind"] == "error"
    code, _, err = run(capsys, "report", archive, "--output", tmp_path / "r.pdf")
    assert code == 1 and one_line_error(err) == (
        f"Cannot tell the format of the report file {tmp_path / 'r.pdf'}: its name must end in .html or .htm.")
    code, _, err = run(capsys, "report", archive, "--database", tmp_path / "x.duckdb")
    assert code == 1 and one_line_error(err) == (
        "--database needs --source (the table name or SELECT the archive was compressed from).")


# -- demo --------------------------------------------------------------------------------------
def test_demo_json_and_quiet(tmp_path, capsys):
    code, out, _ = run(capsys, "demo", "--rows", 600, "--output", tmp_path / "d", "--json")
    data = json.loads(out)
    assert code == 0 and data["rows"] == 600 and data["all_cells_within_bounds"] is True
    code, out, err = run(capsys, "demo", "--rows", 600, "--output", tmp_path / "d", "--quiet")
    assert code == 0 and out == "" and err == ""
    code, out, _ = run(capsys, "demo", "--rows", 600, "--output", tmp_path / "d")
    assert out.startswith("rankfold demo: the demo heat network (an invented district-heating scenario")
