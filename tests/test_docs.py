"""Docs that are tested: the README names every CLI subcommand and every SQL function, every
SQL function is used in an example file that tests/test_sql.py executes, and the README's
command-line tour uses only commands and options that exist."""

from __future__ import annotations

import re
import shlex
from pathlib import Path

import duckdb
import pytest

import rankfold.udfs
from rankfold.cli import EXIT_CODES, build_parser

ROOT = Path(__file__).resolve().parents[1]
README = (ROOT / "README.md").read_text(encoding="utf-8")
EXAMPLES = ROOT / "sql_examples"


def _subcommands() -> list[str]:
    parser = build_parser()
    return list(parser._subparsers._group_actions[0].choices)


def _sql_functions() -> list[str]:
    con = duckdb.connect()
    try:
        return rankfold.udfs.register(con)
    finally:
        con.close()


def test_there_is_something_to_check():
    assert len(_subcommands()) >= 7 and len(_sql_functions()) >= 6


@pytest.mark.parametrize("name", _subcommands())
def test_every_subcommand_is_in_the_readme(name):
    assert re.search(rf"`rankfold {name}\b", README), f"README.md does not show `rankfold {name}`"


@pytest.mark.parametrize("name", _sql_functions())
def test_every_sql_function_is_in_the_readme(name):
    assert re.search(rf"`{name}\b", README), f"README.md does not name the SQL function {name}"


@pytest.mark.parametrize("name", _sql_functions())
def test_every_sql_function_is_used_in_an_executed_example(name, sql_examples):
    call = re.compile(rf"\b{name}\s*\(")
    users = [p.name for p in sorted(EXAMPLES.glob("*.sql")) if call.search(p.read_text(encoding="utf-8"))]
    assert users, f"no file in sql_examples/ calls {name}(...)"
    # every example file is run and checked: by tests/test_sql.py ("scalar" share) or
    # tests/test_sql_tables.py ("table" share), each insisting it checks exactly its share
    assert set(users) <= set(sql_examples["scalar"]) | set(sql_examples["table"])


def test_exit_codes_and_the_caution_are_documented():
    for code in ("0", "1", "2", "3", "130"):
        assert f"`{code}`" in README.split("## Command line", 1)[1]
        assert f"  {code} " in EXIT_CODES
    assert "Caution: lossy storage" in README and "record-keeping law" in README


def test_the_tour_uses_only_real_commands_and_options():
    tour = README.split("### Tour: the demo scenario end to end", 1)[1].split("```console", 1)[1].split("```", 1)[0]
    commands = [line[2:] for line in tour.splitlines() if line.startswith("$ ")]
    assert [shlex.split(c)[1] for c in commands] == ["demo", "compress", "inspect", "report", "query",
                                                     "rebuild", "view"]
    parser = build_parser()
    for command in commands:
        argv = shlex.split(command, comments=True)
        assert argv[0] == "rankfold"
        parser.parse_args(argv[1:])  # exits with code 2 on an unknown command or option
    assert "invented" in README.split("### Tour", 1)[1][:400]


# -- the tours run as written, top to bottom, in an empty folder ------------------------------------
def _blocks(section: str, fence: str) -> list[str]:
    text = README.split(section, 1)[1].split("\n## ", 1)[0]
    return [part.split("```", 1)[0] for part in text.split(fence)[1:]]


def test_the_python_tour_runs_as_written(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    (code,) = _blocks("## Python tour", "```python\n")[:1]
    namespace: dict = {}
    exec(compile(code, "README.md (Python tour)", "exec"), namespace)
    archive = namespace["archive"]
    assert archive.shape == (20_000, 120) and "0.05 x its column's standard deviation" in archive.guarantee
    assert (tmp_path / "panel.rankfold").is_dir()


def test_the_sql_tour_creates_what_it_queries(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    python, sql = _blocks("## SQL tour (DuckDB)", "```python\n")[0], _blocks("## SQL tour (DuckDB)", "```sql\n")[0]
    namespace: dict = {}
    exec(compile(python, "README.md (SQL tour)", "exec"), namespace)
    con = namespace["con"]
    results = []
    for statement in [s for s in sql.split(";") if s.strip()]:
        body = "\n".join(line for line in statement.splitlines() if not line.strip().startswith("--"))
        if body.strip():
            results.append(con.sql(body).fetchall() if body.strip().upper().startswith("SELECT") else con.execute(body))
    assert results[1] == [(10_000, 8, 2)]  # rows, columns, rank of the archive it created
    assert len(results) == 6 and all(len(r) > 0 for r in results[1:])


def test_the_command_line_tour_runs_as_written(tmp_path, monkeypatch, capsys):
    import re

    from rankfold.cli import main

    monkeypatch.chdir(tmp_path)
    tour = README.split("### Tour: the demo scenario end to end", 1)[1].split("```console", 1)[1].split("```", 1)[0]
    lines = tour.strip("\n").splitlines()
    starts = [i for i, line in enumerate(lines) if line.startswith("$ ")]
    for n, i in enumerate(starts):
        argv = shlex.split(lines[i][2:], comments=True)
        shown = lines[i + 1:starts[n + 1] if n + 1 < len(starts) else len(lines)]
        assert main(argv[1:]) == 0, lines[i]
        printed = capsys.readouterr().out.splitlines()
        assert len(printed) == len(shown), lines[i]
        # the same output up to the figures (timings and last digits vary by machine)
        first = lambda text: re.sub(r"[0-9][0-9.,e+-]*", "#", text)  # noqa: E731
        assert first(printed[0]) == first(shown[0]) if shown else printed == [], lines[i]


def _layout_block() -> str:
    text = (ROOT / "DEVELOPERS.md").read_text(encoding="utf-8")
    return text[text.index("## Layout"):text.index("## Layers and imports")]


def _layout_entries() -> tuple[set[str], set[str]]:
    """(every module path named on a line of the layout, the paths a line starts with), each
    as folder/name under the folder heading the line sits under."""
    named, leading, folder = set(), set(), None
    for line in _layout_block().splitlines():
        heading = re.match(r"^(client|udfs)/\s|^  (store|factor|passes|sql)/\s", line)
        if heading:
            folder = heading.group(1) or f"udfs/{heading.group(2)}"
            continue
        if folder is None:
            continue
        named.update(f"{folder}/{name}" for name in re.findall(r"(?<![/\w])(\w+\.py)\b", line))
        first = re.match(r"^\s+(\w+\.py)\b", line)
        if first:
            leading.add(f"{folder}/{first.group(1)}")
    return named, leading


def test_the_developers_layout_matches_the_tree():
    # every module of the two import roots is named in DEVELOPERS.md's layout under its own
    # folder, and every module a layout line starts with exists: a newcomer can trust the map
    named, leading = _layout_entries()
    modules = {p.relative_to(ROOT).as_posix() for root in ("client", "udfs") for p in (ROOT / root).rglob("*.py")
               if p.name != "__init__.py"}
    assert sorted(modules - named) == []
    assert sorted(leading - modules) == []
