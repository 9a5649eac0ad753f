"""Writes that never destroy (issue 13): overwrite replaces only a verified rankfold archive,
one writer per path, readers see one version, crashes leave the previous version readable.

References: the atomicity of rename(2) and the RENAME_NOREPLACE flag of renameat2(2) (Linux
man-pages), flock(2) (a lock is released when its last descriptor closes, also when the
process is killed); fsync before rename for durability is common practice. Every value read
back is checked against the source it was compressed from: |source - rebuilt| <= bound.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import signal
import socket
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import duckdb
import numpy as np
import pyarrow as pa
import pytest

import rankfold
from rankfold import udfs
from rankfold.udfs.passes import commit as commit_module
from rankfold.udfs.sql.tables import sweep_spools
from rankfold.udfs.store import versions

WIDTH = 6


def _table(seed: int, rows: int) -> pa.Table:
    """Rank-2 plus noise, ``rows`` x WIDTH; the seed and the row count identify the table."""
    rng = np.random.default_rng(seed)
    block = rng.normal(size=(rows, 2)) @ rng.normal(size=(2, WIDTH)) + 0.01 * rng.normal(size=(rows, WIDTH))
    return pa.table({f"x{j}": block[:, j] for j in range(WIDTH)})


def _truth(table: pa.Table) -> np.ndarray:
    return np.column_stack([table.column(j).to_numpy() for j in range(table.num_columns)])


def _within(values: np.ndarray, bounds: np.ndarray, truth: np.ndarray) -> bool:
    return values.shape == truth.shape and bool(np.all(np.abs(values - truth) <= bounds))


def _snapshot(directory: Path) -> dict[str, str]:
    return {str(p.relative_to(directory)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(directory.rglob("*")) if p.is_file()}


def _beside(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if "rankfold-tmp" in p.name or "rankfold-lock" in p.name)


# -- overwrite replaces only a rankfold archive ---------------------------------------------------
def test_foreign_folder_with_a_manifest_is_never_replaced(tmp_path):
    target = tmp_path / "extension"
    target.mkdir()
    (target / "manifest.json").write_text(json.dumps({"manifest_version": 3, "name": "helper"}))
    (target / "background.js").write_text("// someone's code")
    before = _snapshot(tmp_path)
    with pytest.raises(rankfold.ArchiveExistsError, match=r"not a rankfold manifest \(format None"):
        rankfold.compress(_table(1, 50), target, rank=2, overwrite=True)
    assert _snapshot(tmp_path) == before


def test_user_files_inside_an_archive_block_overwrite(tmp_path):
    path = tmp_path / "a.rankfold"
    rankfold.compress(_table(1, 50), path, rank=2)
    (path / "my-notes.txt").write_text("keep me")
    before = _snapshot(tmp_path)
    with pytest.raises(rankfold.ArchiveExistsError, match=r"also holds my-notes.txt, which rankfold did not write"):
        rankfold.compress(_table(2, 50), path, rank=2, overwrite=True)
    assert _snapshot(tmp_path) == before
    # the same check at commit time: a file dropped in while the compress runs
    real = commit_module.ArchiveWriter._close_part

    def drop_file(self):
        real(self)
        (path / "late.csv").write_text("1,2,3")

    (path / "my-notes.txt").unlink()
    before = _snapshot(tmp_path)
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(commit_module.ArchiveWriter, "_close_part", drop_file)
        with pytest.raises(rankfold.ArchiveExistsError, match=r"also holds late.csv"):
            rankfold.compress(_table(2, 50), path, rank=2, overwrite=True)
    before["a.rankfold/late.csv"] = hashlib.sha256(b"1,2,3").hexdigest()
    assert _snapshot(tmp_path) == before
    assert _beside(tmp_path) == []


@pytest.mark.parametrize("overwrite", [False, True])
def test_folder_created_at_the_target_during_a_compress_survives(tmp_path, overwrite):
    target = tmp_path / "new.rankfold"
    real = commit_module.ArchiveWriter._close_part

    def someone_creates_it(self):
        real(self)
        if not target.exists():
            target.mkdir()
            (target / "theirs.txt").write_text("theirs")

    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(commit_module.ArchiveWriter, "_close_part", someone_creates_it)
        with pytest.raises(rankfold.ArchiveExistsError, match="theirs.txt"):
            rankfold.compress(_table(1, 50), target, rank=2, overwrite=overwrite)
    assert sorted(os.listdir(target)) == ["theirs.txt"]
    assert _beside(tmp_path) == []


def test_writes_through_a_symbolic_link_go_to_the_archive_it_names(tmp_path):
    real = tmp_path / "real.rankfold"
    rankfold.compress(_table(1, 300), real, rank=2)
    link = tmp_path / "link.rankfold"
    link.symlink_to(real)
    assert rankfold.open(link).append(_table(3, 20)).shape == (320, WIDTH)
    rankfold.compress(_table(2, 290), link, rank=2, overwrite=True)
    assert link.is_symlink() and rankfold.open(real).shape == (290, WIDTH)
    (tmp_path / "file").write_text("x")
    (tmp_path / "to-file").symlink_to(tmp_path / "file")
    with pytest.raises(rankfold.ArchiveExistsError, match="it is a symbolic link"):
        rankfold.compress(_table(1, 50), tmp_path / "to-file", rank=2, overwrite=True)
    assert (tmp_path / "file").read_text() == "x"


@pytest.mark.parametrize("syscall", ["renameat2", "fallback"])
def test_rename_onto_a_path_that_appeared_fails(tmp_path, monkeypatch, syscall):
    """renameat2(RENAME_NOREPLACE) (rename(2) man page): fails with EEXIST on any existing
    name, even an empty folder, which a plain rename would replace. The fallback (no
    renameat2) links files (link(2) fails on an existing name) and checks folders first."""
    if syscall == "fallback":
        monkeypatch.setattr(versions, "_renameat2", None)
    else:  # glibc 2.28+ has it; the writer relies on it on Linux
        assert versions._renameat2 is not None or sys.platform != "linux"
    src = tmp_path / "src"
    src.mkdir()
    (src / "f").write_text("x")
    (tmp_path / "empty").mkdir()
    (tmp_path / "file").write_text("y")
    for name in ("empty", "file"):
        with pytest.raises(FileExistsError):
            versions.rename_noreplace(src, tmp_path / name)
    assert (tmp_path / "empty").is_dir() and (tmp_path / "file").read_text() == "y"
    versions.rename_noreplace(src, tmp_path / "dst")
    assert (tmp_path / "dst" / "f").read_text() == "x"
    with pytest.raises(FileExistsError):
        versions.rename_noreplace(tmp_path / "dst" / "f", tmp_path / "file")
    versions.rename_noreplace(tmp_path / "dst" / "f", tmp_path / "g")
    assert (tmp_path / "g").read_text() == "x" and not (tmp_path / "dst" / "f").exists()


# -- one writer per path ---------------------------------------------------------------------------
def test_a_held_lock_refuses_every_other_writer(tmp_path):
    path = tmp_path / "a.rankfold"
    archive = rankfold.compress(_table(1, 60), path, rank=2)
    with versions.WriteLock(path):
        with pytest.raises(rankfold.ArchiveBusyError, match=rf"process {os.getpid()} on host"):
            rankfold.compress(_table(2, 60), path, rank=2, overwrite=True)
        with pytest.raises(rankfold.ArchiveBusyError, match="Another rankfold write"):
            archive.append(_table(3, 10))
    with versions.WriteLock(tmp_path / "new.rankfold"):  # an absent path is locked as well
        with pytest.raises(rankfold.ArchiveBusyError):
            rankfold.compress(_table(2, 60), tmp_path / "new.rankfold", rank=2)
    with versions.WriteLock(path):
        with pytest.raises(rankfold.ArchiveBusyError):
            versions.sweep(path)
    assert rankfold.open(path).shape == (60, WIDTH)
    assert _beside(tmp_path) == []


def test_a_dead_owners_lock_is_taken_over_and_logged(tmp_path, caplog):
    path = tmp_path / "a.rankfold"
    rankfold.compress(_table(1, 60), path, rank=2)
    child = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                           capture_output=True, text=True, check=True)
    dead = int(child.stdout)
    record = {"pid": dead, "host": socket.gethostname(), "since": time.time() - 60}
    versions.lock_path(path).write_text(json.dumps(record))
    with caplog.at_level(logging.WARNING, logger="rankfold.write"):
        appended = rankfold.open(path).append(_table(3, 10))
    assert appended.shape == (70, WIDTH)
    assert any(f"process {dead} on host" in r.getMessage() and "took over" in r.getMessage()
               for r in caplog.records)
    assert _beside(tmp_path) == []


_CHILD_PRELUDE = """
import sys, time
import numpy as np, pyarrow as pa
import rankfold
WIDTH = {width}
def table(seed, rows):
    rng = np.random.default_rng(seed)
    block = rng.normal(size=(rows, 2)) @ rng.normal(size=(2, WIDTH)) + 0.01 * rng.normal(size=(rows, WIDTH))
    return pa.table({{f"x{{j}}": block[:, j] for j in range(WIDTH)}})
path = sys.argv[1]
"""


def _child(body: str, *args: str) -> subprocess.Popen:
    code = _CHILD_PRELUDE.format(width=WIDTH) + textwrap.dedent(body)
    return subprocess.Popen([sys.executable, "-c", code, *map(str, args)], stdin=subprocess.PIPE,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            env=dict(os.environ, OPENBLAS_NUM_THREADS="1"))


def _ready(children: list[subprocess.Popen]) -> None:
    for child in children:
        assert child.stdout.readline().strip() == "ready", child.stderr.read()


def _go(children: list[subprocess.Popen]) -> None:
    for child in children:
        child.stdin.write("go\n")
        child.stdin.flush()


def test_racing_writers_one_wins(tmp_path):
    """Two compresses to one absent path, started together: exactly one succeeds; the
    others fail with ArchiveBusyError or ArchiveExistsError, never a second success."""
    path = tmp_path / "race.rankfold"
    body = """
    seed = int(sys.argv[2])
    source = table(seed, 400 + seed)
    print("ready", flush=True); sys.stdin.readline()
    try:
        rankfold.compress(source, path, rank=2)
        print("won", flush=True)
    except (rankfold.ArchiveBusyError, rankfold.ArchiveExistsError) as exc:
        print("refused", type(exc).__name__, flush=True)
    """
    children = [_child(body, path, seed) for seed in (1, 2)]
    _ready(children)
    _go(children)
    outcomes = [child.communicate(timeout=60)[0].split() for child in children]
    assert [o[0] for o in outcomes].count("won") == 1, outcomes
    winner = [seed for seed, o in zip((1, 2), outcomes) if o[0] == "won"][0]
    archive = rankfold.open(path, checksums=True)
    assert _within(archive.to_numpy(), archive.cell_bounds(), _truth(_table(winner, 400 + winner)))
    assert _beside(tmp_path) == []


def test_overwrite_racing_append_leaves_one_consistent_version(tmp_path):
    path = tmp_path / "a.rankfold"
    rankfold.compress(_table(1, 300), path, rank=2)
    overwrite = """
    source = table(2, 250)
    print("ready", flush=True); sys.stdin.readline()
    for _ in range(3):
        try:
            rankfold.compress(source, path, rank=2, overwrite=True)
            print("overwrote", flush=True)
        except rankfold.ArchiveBusyError:
            print("busy", flush=True)
    """
    append = """
    extra = table(3, 20)
    print("ready", flush=True); sys.stdin.readline()
    for _ in range(3):
        try:
            rankfold.open(path).append(extra)
            print("appended", flush=True)
        except (rankfold.ArchiveBusyError, rankfold.InvalidInputError) as exc:
            print(type(exc).__name__, flush=True)
    """
    children = [_child(overwrite, path), _child(append, path)]
    _ready(children)
    _go(children)
    for child in children:
        out, err = child.communicate(timeout=60)
        assert child.returncode == 0, err
    archive = rankfold.open(path, checksums=True)
    rows = archive.shape[0]
    base = _table(1, 300) if rows % 20 == 0 else _table(2, 250)  # 300 = 0, 250 = 10 (mod 20)
    extra, rest = divmod(rows - base.num_rows, 20)
    assert rest == 0 and extra >= 0
    truth = np.vstack([_truth(base)] + [_truth(_table(3, 20))] * extra)
    assert _within(archive.to_numpy(), archive.cell_bounds(), truth)


# -- readers see one version ------------------------------------------------------------------------
def test_an_open_archive_keeps_reading_its_version(tmp_path):
    path = tmp_path / "a.rankfold"
    first = _table(1, 300)
    held = rankfold.compress(first, path, rank=2)
    rankfold.compress(_table(2, 300), path, rank=2, overwrite=True)
    rankfold.open(path).append(_table(3, 40))
    rankfold.compress(_table(4, 300), path, rank=2, overwrite=True)
    assert _within(held.to_numpy(), held.cell_bounds(), _truth(first))
    assert _within(rankfold.open(path).to_numpy(), rankfold.open(path).cell_bounds(), _truth(_table(4, 300)))
    # once swept, the held version fails clearly instead of reading another version's files
    removed = versions.sweep(path, grace=0)
    assert "a.rankfold/rows-00000.parquet" in removed
    with pytest.raises(rankfold.ArchiveNotFoundError, match="is gone: a later write superseded"):
        held.to_numpy()
    assert rankfold.open(path, checksums=True).shape == (300, WIDTH)


def _versions_loop_child(path: Path, seconds: float) -> subprocess.Popen:
    body = f"""
    sources = [table(1, 300), table(2, 290)]
    print("ready", flush=True); sys.stdin.readline()
    end, k = time.time() + {seconds}, 0
    while time.time() < end or k < 4:  # at least an append and overwrites, on a slow machine too
        k += 1
        if k % 3 == 0:
            rankfold.open(path).append(table(3, 20))
        else:
            rankfold.compress(sources[k % 2], path, rank=2, overwrite=True)
    print("done", k, flush=True)
    """
    return _child(body, path)


def _expected(rows: int) -> np.ndarray | None:
    """The source of an archive of ``rows`` rows: table 1 (300 rows) or table 2 (290 rows)
    and then appends of table 3 (20 rows); the row count modulo 20 tells the base apart."""
    base = _table(1, 300) if rows % 20 == 0 else _table(2, 290)
    extra, rest = divmod(rows - base.num_rows, 20)
    if extra < 0 or rest:
        return None
    return np.vstack([_truth(base)] + [_truth(_table(3, 20))] * extra)


def test_fresh_readers_racing_overwrites_and_appends(tmp_path):
    """Python readers opened again and again while another process overwrites and appends:
    every read is one whole version (within its bounds of that version's source)."""
    path = tmp_path / "a.rankfold"
    rankfold.compress(_table(1, 300), path, rank=2)
    writer = _versions_loop_child(path, 2.0)
    _ready([writer])
    _go([writer])
    reads = 0
    while writer.poll() is None:
        archive = rankfold.open(path)
        truth = _expected(archive.shape[0])
        assert truth is not None, archive.shape
        assert _within(archive.to_numpy(), archive.cell_bounds(), truth)
        reads += 1
    out, err = writer.communicate()
    assert writer.returncode == 0, err
    assert reads >= 3 and int(out.split()[-1]) >= 3


def test_sql_readers_racing_overwrites_and_appends(tmp_path):
    """The same with SQL: rankfold_scan and rankfold_cell_with_bound in DuckDB queries."""
    path = tmp_path / "a.rankfold"
    rankfold.compress(_table(1, 300), path, rank=2)
    con = duckdb.connect()
    udfs.register(con)
    writer = _versions_loop_child(path, 2.0)
    _ready([writer])
    _go([writer])
    reads = 0
    columns = ", ".join(f"x{j}, x{j}_bound" for j in range(WIDTH))
    while writer.poll() is None:
        got = con.execute(f"SELECT {columns} FROM rankfold_scan(?, bounds := 'cell') ORDER BY _rf_row",
                          [str(path)]).fetchnumpy()
        values = np.column_stack([got[f"x{j}"] for j in range(WIDTH)])
        bounds = np.column_stack([got[f"x{j}_bound"] for j in range(WIDTH)])
        truth = _expected(values.shape[0])
        assert truth is not None and _within(values, bounds, truth)
        cells = con.execute("SELECT rankfold_cell_with_bound(?, 5, 'x3') AS c", [str(path)]).fetchone()[0]
        assert any(abs(cells["value"] - t[5, 3]) <= cells["bound"]
                   for t in (_truth(_table(1, 300)), _truth(_table(2, 290))))
        reads += 1
    out, err = writer.communicate()
    assert writer.returncode == 0, err
    assert reads >= 2
    con.close()


# -- crash safety --------------------------------------------------------------------------------------
def _assert_recovered(path: Path, expected_rows) -> None:
    archive = rankfold.open(path, checksums=True)
    truth = expected_rows(archive.shape[0])
    assert truth is not None, archive.shape
    assert _within(archive.to_numpy(), archive.cell_bounds(), truth)


@pytest.mark.parametrize("kind", ["compress", "append"])
def test_kill_9_at_random_points_leaves_the_previous_version(tmp_path, kind):
    """Children overwrite (or append to) their own archive in a loop and are killed with
    SIGKILL after a seeded random delay: each archive opens, passes its checksums and holds
    one whole version; the next write removes the leftovers and takes the lock over."""
    rng = np.random.default_rng(13 if kind == "compress" else 14)
    children, paths = [], []
    for k in range(3):
        path = tmp_path / f"a{k}.rankfold"
        rankfold.compress(_table(1, 300), path, rank=2)
        if kind == "compress":
            body = """
            sources = [table(1, 300), table(2, 290)]
            print("ready", flush=True); sys.stdin.readline()
            k = 0
            while True:
                k += 1
                rankfold.compress(sources[k % 2], path, rank=2, overwrite=True)
            """
        else:
            body = """
            extra = table(3, 20)
            print("ready", flush=True); sys.stdin.readline()
            while True:
                rankfold.open(path).append(extra)
            """
        children.append(_child(body, path))
        paths.append(path)
    _ready(children)
    _go(children)
    start = time.time()
    for child, delay in sorted(zip(children, rng.uniform(0.05, 1.5, size=len(children))),
                               key=lambda pair: pair[1]):
        time.sleep(max(0.0, start + delay - time.time()))
        child.send_signal(signal.SIGKILL)
        child.communicate(timeout=30)  # closes the pipes
        assert child.returncode == -signal.SIGKILL

    def expected(rows):
        if kind == "compress":
            return _expected(rows)
        extra, rest = divmod(rows - 300, 20)
        return np.vstack([_truth(_table(1, 300))] + [_truth(_table(3, 20))] * extra) if rest == 0 else None

    for path in paths:
        _assert_recovered(path, expected)
        rankfold.open(path).append(_table(3, 20))  # the next write: takes the lock over, recovers
        assert _beside(tmp_path).count(f".{path.name}.rankfold-lock") == 0
        assert not [n for n in _beside(tmp_path) if n.startswith(f".{path.name}.rankfold-tmp")]
        _assert_recovered(path, expected if kind == "append" else (lambda rows: None if _expected(rows - 20) is None
                          else np.vstack([_expected(rows - 20), _truth(_table(3, 20))])))
        journal = json.loads((path / versions.JOURNAL).read_text())["files"]
        assert not [n for n, e in journal.items() if e["state"] == "pending"]
        listed = {f["name"] for f in rankfold.open(path).manifest["files"]} | set(journal)
        assert set(os.listdir(path)) <= listed | {"manifest.json", versions.JOURNAL}


def test_a_write_stopped_before_its_commit_leaves_the_old_version(tmp_path):
    """Stopped between moving its files in and replacing the manifest: the old version stays,
    and the next write (or sweep) removes the uncommitted files."""
    path = tmp_path / "a.rankfold"
    rankfold.compress(_table(1, 300), path, rank=2)
    before = set(os.listdir(path))

    def stop(*args):
        raise KeyboardInterrupt

    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(versions, "_check_unchanged", stop)
        with pytest.raises(KeyboardInterrupt):
            rankfold.open(path).append(_table(3, 20))
    leftover = set(os.listdir(path)) - before - {versions.JOURNAL}
    journal = json.loads((path / versions.JOURNAL).read_text())["files"]
    assert leftover and all(journal[n]["state"] == "pending" for n in leftover)
    _assert_recovered(path, lambda rows: _truth(_table(1, 300)) if rows == 300 else None)
    removed = versions.sweep(path)  # default grace: pending files were never visible
    assert {n.split("/", 1)[1] for n in removed} == leftover
    assert set(os.listdir(path)) == before | {versions.JOURNAL}


# -- housekeeping ------------------------------------------------------------------------------------------
def test_sweep_keeps_young_versions_and_removes_old_ones(tmp_path):
    path = tmp_path / "a.rankfold"
    rankfold.compress(_table(1, 100), path, rank=2)
    rankfold.compress(_table(2, 100), path, rank=2, overwrite=True)
    assert versions.sweep(path) == []  # within the grace period: kept for readers
    assert "rows-00000.parquet" in os.listdir(path)
    assert versions.GRACE_SECONDS > 0
    removed = versions.sweep(path, grace=0)
    assert sorted(n.split("/")[1] for n in removed) == sorted(
        ["blocks.parquet", "columns.parquet", "rows-00000.parquet"])  # no anchor rows, no exact cells
    with pytest.raises(rankfold.InvalidInputError, match="grace"):
        versions.sweep(path, grace=-1)


def test_sweep_command_and_spools_of_ended_processes(tmp_path, capsys):
    from rankfold.cli import main

    child = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                           capture_output=True, text=True, check=True)
    dead_spool = tmp_path / f"rankfold-sql-{int(child.stdout)}-abc"
    live_spool = tmp_path / f"rankfold-sql-{os.getpid()}-def"
    for spool in (dead_spool, live_spool):
        spool.mkdir()
        (spool / "result-000001.parquet").write_bytes(b"x")
    assert sweep_spools(tmp_path) == [str(dead_spool)]
    assert live_spool.is_dir() and not dead_spool.exists()

    path = tmp_path / "a.rankfold"
    rankfold.compress(_table(1, 100), path, rank=2)
    rankfold.compress(_table(2, 100), path, rank=2, overwrite=True)
    (tmp_path / ".a.rankfold.rankfold-tmp-0123456789ab").mkdir()  # as a killed write leaves it
    assert main(["sweep", str(path), "--grace", "0", "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert ".a.rankfold.rankfold-tmp-0123456789ab" in report["removed"]
    assert "a.rankfold/rows-00000.parquet" in report["removed"]
    assert _beside(tmp_path) == []
    assert main(["sweep", str(tmp_path / "missing.rankfold")]) == 1


def test_sql_result_spool_is_named_after_its_process(tmp_path):
    from rankfold.udfs.sql.tables import table_sql

    sql = table_sql(pa.table({"a": [1]}))
    assert f"rankfold-sql-{os.getpid()}-" in sql


_CRASH_POINTS = {
    # after the journal lists the new files as pending, before any moves in
    "before-moves": "versions.rename_noreplace = lambda *a, **k: os._exit(9)",
    # after the new files moved in, before manifest.json is replaced
    "before-manifest": "versions._check_unchanged = lambda *a, **k: os._exit(9)",
    # after manifest.json was replaced, before the journal records the new state
    "before-journal": """
calls = []
real = versions._write_journal
def crash_second(*a, **k):
    calls.append(1)
    if len(calls) == 2:
        os._exit(9)
    return real(*a, **k)
versions._write_journal = crash_second
""",
}


def test_a_process_dying_at_each_step_of_the_commit(tmp_path):
    """A child process exits abruptly (os._exit, no cleanup: as kill -9) at each step of the
    commit of an overwrite and of an append: before the commit point the old version is read,
    after it the new one; the next write takes the lock over and removes the leftovers."""
    children, cases = [], []
    for kind in ("overwrite", "append"):
        for point, patch in _CRASH_POINTS.items():
            path = tmp_path / f"{kind}-{point}.rankfold"
            rankfold.compress(_table(1, 300), path, rank=2)
            write = ("rankfold.compress(table(2, 290), path, rank=2, overwrite=True)" if kind == "overwrite"
                     else "rankfold.open(path).append(table(3, 20))")
            body = "import os\nfrom rankfold.udfs.store import versions\n" + patch + f"""
print("ready", flush=True); sys.stdin.readline()
{write}
print("not stopped", flush=True)
"""
            children.append(_child(body, path))
            cases.append((kind, point, path))
    _ready(children)
    _go(children)
    for child in children:
        out, err = child.communicate(timeout=60)
        assert child.returncode == 9, (out, err)
    for kind, point, path in cases:
        committed = point == "before-journal"
        rows = (290 if kind == "overwrite" else 320) if committed else 300
        archive = rankfold.open(path, checksums=True)
        assert archive.shape[0] == rows, (kind, point)
        assert _within(archive.to_numpy(), archive.cell_bounds(), _expected(rows))
        assert versions.lock_path(path).exists()  # left by the dead writer
        rankfold.open(path).append(_table(3, 20))  # the next write recovers
        assert _within(rankfold.open(path, checksums=True).to_numpy(),
                       rankfold.open(path).cell_bounds(), _expected(rows + 20))
        journal = json.loads((path / versions.JOURNAL).read_text())["files"]
        live = {f["name"] for f in rankfold.open(path).manifest["files"]}
        assert {n for n, e in journal.items() if e["state"] == "live"} == live
        assert not [n for n, e in journal.items() if e["state"] == "pending"]
        assert set(os.listdir(path)) <= live | set(journal) | {"manifest.json", versions.JOURNAL}
    assert _beside(tmp_path) == []
