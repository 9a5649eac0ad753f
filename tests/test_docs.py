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
    assert [shlex.split(c)[1] for c in commands] == ["demo", "compress", "inspect", "report", "query", "rebuild"]
    parser = build_parser()
    for command in commands:
        argv = shlex.split(command, comments=True)
        assert argv[0] == "rankfold"
        parser.parse_args(argv[1:])  # exits with code 2 on an unknown command or option
    assert "invented" in README.split("### Tour", 1)[1][:400]
