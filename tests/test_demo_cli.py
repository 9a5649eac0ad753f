"""The demo scenario, the command line and the README's Python tour."""

from __future__ import annotations

import json
import re
import subprocess
import sys
from pathlib import Path

import numpy as np

import rankfold
from rankfold.cli import CAUTION, main
from rankfold.demo import DEMO_ARCHIVE, heat_network_readings, run_demo

ROOT = Path(__file__).resolve().parents[1]


def test_demo_scenario_is_deterministic_and_wide():
    a, b = heat_network_readings(500), heat_network_readings(500)
    assert a.equals(b)  # fixed seed: same table every time
    assert a.num_rows == 500 and a.num_columns == 3 + 120
    assert a.column("s01_pump_starts_count").type == "int64"
    assert any(a.column(n).null_count for n in a.schema.names[3:])  # dropouts exist


def test_run_demo_reports_sizes_errors_and_sound_bounds(tmp_path):
    report = run_demo(str(tmp_path / "demo"), rows=3000, quiet=True)
    assert report["all_cells_within_bounds"] is True
    assert report["archive_bytes"] < report["lossless_parquet_bytes"]
    ex = report["example"]
    assert abs(ex["true"] - ex["rebuilt"]) <= ex["bound"]
    # rerunning replaces the demo's own archive (it is an archive, so overwrite is allowed):
    # the same data files again; the whole size (os.stat of the listed files and manifest.json)
    # grows only by the new version's longer file names in the manifest
    folder = tmp_path / "demo" / DEMO_ARCHIVE
    first = rankfold.open(folder).manifest["files"]
    again = run_demo(str(tmp_path / "demo"), rows=3000, quiet=True)
    files = rankfold.open(folder).manifest["files"]
    assert [f["bytes"] for f in files] == [f["bytes"] for f in first]
    listed = sum((folder / f["name"]).stat().st_size for f in files)
    assert again["archive_bytes"] == listed + (folder / "manifest.json").stat().st_size


def _archive(tmp_path) -> Path:
    rng = np.random.default_rng(5)  # invented data
    x = rng.standard_normal((400, 4)) @ rng.standard_normal((4, 16))
    path = tmp_path / "cli.rankfold"
    rankfold.compress(x, path, rank=4)
    return path


def test_cli_inspect_json_matches_manifest(tmp_path, capsys):
    path = _archive(tmp_path)
    assert main(["inspect", str(path), "--json", "--checksums"]) == 0
    data = json.loads(capsys.readouterr().out)
    manifest = json.loads((path / "manifest.json").read_text())
    assert data["shape"] == manifest["shape"] == [400, 16]
    # the errors as read (stored, rankfold's note is its index in manifest_schema.ERROR_NOTES)
    assert data["errors"] == rankfold.open(path).errors
    assert {k: v for k, v in data["errors"].items() if k != "note"} == {
        k: v for k, v in manifest["errors"].items() if k != "note"}


def test_cli_rebuild_to_parquet_equals_python(tmp_path, capsys):
    import pyarrow.parquet as pq

    path = _archive(tmp_path)
    out = tmp_path / "part.parquet"
    assert main(["rebuild", str(path), "--rows", "10:20", "--columns", "x1,x2", "--output", str(out)]) == 0
    table = pq.read_table(out)
    expected = rankfold.open(path).to_numpy(rows=slice(10, 20), columns=["x1", "x2"])
    np.testing.assert_array_equal(np.column_stack([table.column(n).to_numpy() for n in ("x1", "x2")]), expected)


def test_cli_compress_from_parquet_and_refuses_existing(tmp_path, capsys):
    import pyarrow as pa
    import pyarrow.parquet as pq

    rng = np.random.default_rng(9)
    src = tmp_path / "src.parquet"
    pq.write_table(pa.table({f"c{j}": rng.standard_normal(300) for j in range(10)}), src)
    target = tmp_path / "out.rankfold"
    assert main(["compress", str(src), str(target), "--rank", "2", "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["manifest"]["shape"] == [300, 10]
    before = (target / "manifest.json").read_bytes()
    assert main(["compress", str(src), str(target), "--rank", "2"]) == 1
    err = capsys.readouterr().err
    assert err.startswith("rankfold: error: ") and "already exists" in err and err.count("\n") == 1
    assert (target / "manifest.json").read_bytes() == before


def test_cli_missing_archive_is_one_line_error(tmp_path, capsys):
    assert main(["inspect", str(tmp_path / "nope.rankfold")]) == 1
    err = capsys.readouterr().err
    assert re.fullmatch(r"rankfold: error: No archive at .*nope\.rankfold\. Check the path\.\n", err)


def test_cli_help_carries_the_caution():
    result = subprocess.run([sys.executable, "-m", "rankfold.cli", "--help"], capture_output=True,
                            text=True, check=True)
    assert "lossy" in result.stdout and "record-keeping law" in result.stdout
    assert "record-keeping law" in CAUTION


def test_readme_python_tour_runs(tmp_path, monkeypatch):
    """Execute the README's Python tour verbatim (in a scratch folder)."""
    text = (ROOT / "README.md").read_text()
    block = text.split("## Python tour", 1)[1].split("```python", 1)[1].split("```", 1)[0]
    monkeypatch.chdir(tmp_path)
    namespace: dict = {}
    exec(compile(block, "README.md", "exec"), namespace)
    archive = namespace["archive"]
    assert archive.shape == (20000, 120)
    assert (tmp_path / "rebuilds.jsonl").exists() is False  # opened with a log path, nothing rebuilt yet
    archive.cell(0, "x0")
    assert len((tmp_path / "rebuilds.jsonl").read_text().splitlines()) == 1


def test_readme_quick_start_matches_ci():
    readme = (ROOT / "README.md").read_text()
    ci = (ROOT / ".ci" / "run").read_text()
    # the linter (ruff, from the test extra) runs before the tests
    command = 'python -m pip install -e ".[test]" && python -m ruff check . && python -m pytest -q'
    assert command in readme and command in ci.splitlines()
    assert command in (ROOT / "DEVELOPERS.md").read_text()
