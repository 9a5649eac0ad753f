"""Integrity on every read path (issue 12, items 2-4): damaged or edited archives are refused.

Each failure mode of the issue is reproduced: a flipped bit in every archive file (Python and
SQL), ``columns.parquet`` swapped between two archives of one shape, one-word manifest edits
that keep valid JSON, crafted manifests that name files outside the archive, malformed fields,
glob characters in the archive path, and an append seen by the next SQL query. The reference
for "served correctly" is the pristine archive's own rebuild (numpy equality), and for the
digests hashlib.sha256 (FIPS 180-4).
"""

from __future__ import annotations

import hashlib
import json
import shutil
from pathlib import Path

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.parquet  # noqa: F401 - pa.parquet
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import rankfold
from rankfold.cli import main
from rankfold.udfs.sql import register
from rankfold.udfs.store.manifest import manifest_digest, read_manifest, write_manifest
from rankfold.udfs.store.manifest_schema import DERIVED_KEYS
from rankfold.udfs.store.reader import ArchiveReader

ROWS, COLS = 400, 6


def _table(seed: int) -> pa.Table:
    """Invented rank-2 data plus small noise (seed), an id key and a text column; a
    NaN in every column (one row each), so that the archive stores exact cells."""
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((ROWS, 2)) @ rng.standard_normal((2, COLS)) + 1e-3 * rng.standard_normal((ROWS, COLS))
    x[7 + np.arange(COLS), np.arange(COLS)] = np.nan
    cols = {"id": np.arange(ROWS, dtype=np.int64), "site": np.where(np.arange(ROWS) % 3, "east", "west")}
    cols.update({f"c{j}": x[:, j] for j in range(COLS)})
    return pa.table(cols)


def _compress(path: Path, seed: int = 0) -> Path:
    # link="optimal" keeps anchor rows, so every kind of file is present
    path.parent.mkdir(parents=True, exist_ok=True)
    rankfold.compress(_table(seed), path, rank=2, key="id", link="optimal", seed=0)
    return path


@pytest.fixture(scope="module")
def pristine(tmp_path_factory) -> Path:
    return _compress(tmp_path_factory.mktemp("integrity") / "base.rankfold")


@pytest.fixture
def archive(pristine, tmp_path) -> Path:
    copy = tmp_path / "copy.rankfold"
    shutil.copytree(pristine, copy)
    return copy


def _served(path: Path):
    arch = rankfold.open(path)
    values, bounds = arch.to_numpy(), arch.cell_bounds()
    return values, bounds, arch.aggregate(["c0", "c4"], "sum").to_pylist()


def _flip(path: Path, position: int, bit: int = 0) -> None:
    data = bytearray(path.read_bytes())
    data[position] ^= 1 << bit
    path.write_bytes(bytes(data))


def _con() -> duckdb.DuckDBPyConnection:
    con = duckdb.connect()
    register(con)
    return con


def _sql_served(con, path: Path):
    p = str(path)
    scan = con.execute("SELECT * FROM rankfold_scan(?, bounds := 'cell') ORDER BY _rf_row", [p]).fetchall()
    cells = con.execute("SELECT rankfold_cell_with_bound(?, r, 'c2') FROM range(?) t(r)", [p, ROWS]).fetchall()
    agg = con.execute("SELECT * FROM rankfold_aggregate(?, ['c0', 'c4'], func := 'sum')", [p]).fetchall()
    return scan, cells, agg


def _same(a, b) -> bool:
    """Equal, NaN equal to NaN (numpy.testing.assert_equal semantics)."""
    try:
        np.testing.assert_equal(a, b)
    except AssertionError:
        return False
    return True


def test_the_fixture_holds_every_kind_of_file(pristine):
    names = {f["name"] for f in read_manifest(pristine)["files"]}
    assert names == {"rows-00000.parquet", "columns.parquet", "anchors.parquet", "cells.parquet",
                     "blocks.parquet"}
    arch = rankfold.open(pristine)
    assert arch.anchor_rows and arch.manifest["errors"]["cells_stored_exactly_outside_factors"] > 0


# -- a flipped bit in any file ----------------------------------------------------------------
@pytest.mark.parametrize("name", ["rows-00000.parquet", "columns.parquet", "anchors.parquet",
                                  "cells.parquet", "blocks.parquet"])
def test_a_flipped_bit_in_any_file_is_refused_or_harmless_in_python(pristine, archive, name):
    truth = _served(pristine)
    size = (archive / name).stat().st_size
    refused = 0
    positions = np.unique(np.linspace(4, size - 9, 24).astype(int))
    for k, pos in enumerate(positions):
        _flip(archive / name, int(pos), k % 8)
        try:
            got = _served(archive)
        except rankfold.CorruptArchiveError:
            refused += 1
        else:
            # a flip the checks let through must not change a single value or bound
            assert _same(got[0], truth[0]) and _same(got[1], truth[1]) and _same(got[2], truth[2]), (name, pos)
        _flip(archive / name, int(pos), k % 8)
    # small tables are hashed whole: every flip is refused; row files: data pages carry CRCs
    assert refused == len(positions) if name != "rows-00000.parquet" else refused >= len(positions) * 3 // 4


@pytest.mark.parametrize("name", ["rows-00000.parquet", "columns.parquet", "anchors.parquet",
                                  "cells.parquet", "blocks.parquet"])
def test_a_flipped_bit_in_any_file_is_refused_in_sql(pristine, archive, name):
    con = _con()
    truth = _sql_served(con, pristine)
    size = (archive / name).stat().st_size
    _flip(archive / name, size // 2, 3)  # the middle: data pages (footers are checked on open)
    try:
        got = _sql_served(con, archive)
    except duckdb.Error as exc:
        assert "CorruptArchiveError" in str(exc)
    else:
        assert got == truth, name


def test_a_flipped_data_page_bit_is_refused_by_every_sql_function(archive):
    con = _con()
    p = str(archive)
    _flip(archive / "rows-00000.parquet", (archive / "rows-00000.parquet").stat().st_size // 3, 5)
    queries = ["SELECT count(*) FROM rankfold_scan(?)",
               "SELECT * FROM rankfold_row_errors(?)",
               "SELECT * FROM rankfold_aggregate(?, ['c1'], group_by := 'site')",
               "SELECT rankfold_cell(?, 11, 'c1')"]
    for sql in queries:
        with pytest.raises(duckdb.Error, match="CorruptArchiveError"):
            con.execute(sql, [p]).fetchall()


def test_a_row_file_corrupted_after_open_is_refused_at_read(archive):
    arch = rankfold.open(archive)
    name = "rows-00000.parquet"
    _flip(archive / name, (archive / name).stat().st_size // 2, 1)
    with pytest.raises(rankfold.CorruptArchiveError, match="rows-00000.parquet could not be read"):
        arch.to_numpy()


# -- columns.parquet swapped between two archives of one shape -------------------------------
def _same_size_parquet(data: bytes, size: int) -> bytes:
    """``data`` (a Parquet file) grown to ``size`` bytes and still valid: zero bytes inserted
    just before the footer, which addresses pages by absolute offsets (Parquet format spec)."""
    footer = int.from_bytes(data[-8:-4], "little") + 8
    assert size >= len(data)
    return data[:-footer] + bytes(size - len(data)) + data[-footer:]


def test_columns_swapped_between_two_same_shape_archives_is_refused(pristine, tmp_path):
    other = _compress(tmp_path / "other.rankfold", seed=1)
    victim, donor = tmp_path / "victim.rankfold", other
    shutil.copytree(pristine, victim)
    mine, theirs = (victim / "columns.parquet").read_bytes(), (donor / "columns.parquet").read_bytes()
    if len(theirs) > len(mine):  # swap roles so that the file moved in is the smaller one
        shutil.rmtree(victim)
        shutil.copytree(other, victim)
        mine, theirs = theirs, mine
    swapped = _same_size_parquet(theirs, len(mine))
    assert len(swapped) == len(mine) and swapped != mine
    assert pa.parquet.read_table(pa.BufferReader(swapped)).num_rows == COLS  # a valid table
    (victim / "columns.parquet").write_bytes(swapped)  # the manifest is untouched
    with pytest.raises(rankfold.CorruptArchiveError, match="columns.parquet does not match its SHA-256"):
        rankfold.open(victim)
    with pytest.raises(duckdb.Error, match="CorruptArchiveError"):
        _con().execute("SELECT count(*) FROM rankfold_scan(?)", [str(victim)]).fetchall()


# -- one-word edits of the manifest -----------------------------------------------------------
def _edit_text(path: Path, old: str, new: str, count: int = 1) -> None:
    text = (path / "manifest.json").read_text()
    assert text.count(old) >= count, old
    (path / "manifest.json").write_text(text.replace(old, new, count))


def _swap_names(path: Path) -> None:
    # the schema stores runs of numbered names as [prefix, first, count, width]: spelled out,
    # with c1 and c2 swapped
    manifest = json.loads((path / "manifest.json").read_text())
    names = [name for item in manifest["schema"]["names"] for name in (
        [f"{item[0]}{k:0{item[3]}d}" for k in range(item[1], item[1] + item[2])] if isinstance(item, list) else [item])]
    i, j = names.index("c1"), names.index("c2")
    names[i], names[j] = names[j], names[i]
    manifest["schema"]["names"] = names
    (path / "manifest.json").write_text(json.dumps(manifest))


EDITS = {
    "column type": lambda p: _edit_text(p, '["double",', '["float",'),  # the schema's types are runs
    "two names swapped": _swap_names,
    "shape": lambda p: _edit_text(p, f'"shape": [{ROWS},', f'"shape": [{ROWS - 1},'),
}


@pytest.mark.parametrize("edit", list(EDITS))
def test_a_one_word_manifest_edit_is_refused_everywhere(archive, capsys, edit):
    before = json.loads((archive / "manifest.json").read_text())
    EDITS[edit](archive)
    after = json.loads((archive / "manifest.json").read_text())  # still valid JSON
    assert after != before
    with pytest.raises(rankfold.CorruptArchiveError, match="does not match its own manifest_sha256"):
        rankfold.open(archive)
    with pytest.raises(duckdb.Error, match="CorruptArchiveError"):
        _con().execute("SELECT count(*) FROM rankfold_scan(?)", [str(archive)]).fetchall()
    code = main(["verify", str(archive)])  # without --source
    err = capsys.readouterr().err
    assert code == 1 and err.count("\n") == 1 and "manifest_sha256" in err


@pytest.mark.parametrize("edit", list(EDITS))
def test_a_resealed_manifest_edit_is_caught_by_the_files_own_schemas(archive, edit):
    # someone who edits the manifest and recomputes its digest: the cross-checks against the
    # columns table and the row files' footers still disagree
    EDITS[edit](archive)
    manifest = json.loads((archive / "manifest.json").read_text())
    write_manifest(archive, manifest)
    with pytest.raises(rankfold.CorruptArchiveError,
                       match="types than the manifest|names the numeric columns differently|where the shape says 399"):
        rankfold.open(archive)


def test_the_digest_is_sha256_of_the_canonical_manifest(pristine):
    manifest = json.loads((pristine / "manifest.json").read_text())
    body = {k: v for k, v in manifest.items() if k != "manifest_sha256"}
    canonical = json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=True)
    assert manifest["manifest_sha256"] == hashlib.sha256(canonical.encode()).hexdigest()  # hashlib
    assert manifest_digest(manifest) == manifest["manifest_sha256"]
    text = (pristine / "manifest.json").read_text()
    assert text.startswith('{\n"manifest_sha256": ')  # the digest first, then one line per field
    assert text.count("\n") == len(manifest) + 2  # "{", a line per field, "}"


# -- crafted manifests that reach outside the archive ----------------------------------------
def _crafted(folder: Path, victim: Path, rename) -> Path:
    """A folder holding only a sealed manifest whose file names point at ``victim``'s files."""
    folder.mkdir()
    manifest = read_manifest(victim)
    for f in manifest["files"]:
        f["name"] = rename(f["name"])
    for part in manifest["row_parts"]:
        part["name"] = rename(part["name"])
    manifest["tables"] = {t: rename(t) for t in ("columns.parquet", "anchors.parquet", "cells.parquet",
                                                 "blocks.parquet")}
    write_manifest(folder, manifest)
    return folder


@pytest.mark.parametrize("how", ["relative", "absolute"])
def test_a_manifest_naming_files_outside_the_archive_is_refused(pristine, tmp_path, capsys, how):
    rename = (lambda n: f"../{pristine.name}/{n}") if how == "relative" else (lambda n: str(pristine / n))
    folder = _crafted(tmp_path / pristine.name.replace("base", "evil"), pristine, rename)
    shutil.copytree(pristine, tmp_path / pristine.name)  # the victim beside it
    with pytest.raises(rankfold.CorruptArchiveError, match="cannot hold a path separator"):
        rankfold.open(folder)
    with pytest.raises(duckdb.Error, match="CorruptArchiveError"):
        _con().execute("SELECT count(*) FROM rankfold_scan(?)", [str(folder)]).fetchall()
    code = main(["verify", str(folder)])
    err = capsys.readouterr().err
    assert code == 1 and err.count("\n") == 1 and "cannot hold a path separator" in err


def test_a_symlink_leaving_the_archive_is_refused(pristine, tmp_path):
    folder = tmp_path / "linked.rankfold"
    shutil.copytree(pristine, folder)
    other = _compress(tmp_path / "other.rankfold", seed=1)
    (folder / "cells.parquet").unlink()
    (folder / "cells.parquet").symlink_to(other / "cells.parquet")
    with pytest.raises(rankfold.CorruptArchiveError, match="symbolic link that leaves the archive"):
        rankfold.open(folder)


# -- malformed fields --------------------------------------------------------------------------
MALFORMED = {
    "shape null": ("shape", None, "manifest.shape is null"),
    "shape negative": ("shape", [-5, COLS], r"manifest.shape\[0\] is -5, outside"),
    "shape 10^12": ("shape", [10**12, COLS], "hold 400 rows where the shape says 1000000000000"),
    "numeric_columns a number": ("numeric_columns", 5, "manifest.numeric_columns is a number"),
    "files empty": ("files", [], "manifest.files has 0 entries"),
    "row_parts empty": ("row_parts", [], "manifest.row_parts has 0 entries"),
    "rows of a part a string": ("row_parts", [{"name": "rows-00000.parquet", "first_row": 0, "rows": "400"}],
                                r"manifest.row_parts\[0\].rows is a string"),
    "fill not finite": ("basis", [{"name": "c0", "fill": "nan"}], r"manifest.basis\[0\].fill is a string"),
    "digest missing": ("manifest_sha256", "absent", "has no manifest_sha256"),
}


@pytest.mark.parametrize("case", list(MALFORMED))
def test_a_malformed_field_is_one_clear_error_in_python_sql_and_cli(archive, capsys, case):
    field, value, message = MALFORMED[case]
    manifest = read_manifest(archive)
    if value == "absent":
        del manifest[field]
        (archive / "manifest.json").write_text(json.dumps(manifest))
    elif field in DERIVED_KEYS:  # not written any more, but an older manifest holds it: sealed by hand
        manifest[field] = value
        manifest.pop("manifest_sha256")
        manifest = {"manifest_sha256": manifest_digest(manifest), **manifest}
        (archive / "manifest.json").write_text(json.dumps(manifest))
    else:
        manifest[field] = value
        write_manifest(archive, manifest)  # sealed: only the schema can refuse it
    with pytest.raises(rankfold.CorruptArchiveError, match=message):
        rankfold.open(archive)
    with pytest.raises(duckdb.Error, match="CorruptArchiveError"):
        _con().execute("SELECT rankfold_cell(?, 0, 'c0')", [str(archive)]).fetchall()
    for command in (["inspect", str(archive)], ["verify", str(archive)],
                    ["rebuild", str(archive), "--rows", "0:2"]):
        code = main(command)
        err = capsys.readouterr().err
        assert code == 1 and err.startswith("rankfold: error: ") and err.count("\n") == 1, (command, err)
        assert "Traceback" not in err


# -- SQL reads exactly this archive's files ---------------------------------------------------
@pytest.mark.parametrize("folder", ["a[ab]", "a*", "a?"])
def test_glob_characters_in_the_archive_path_read_only_that_archive(tmp_path, folder):
    target = _compress(tmp_path / folder / "t.rankfold", seed=0)
    for sibling, seed in (("aa", 1), ("ab", 2), ("a-x", 3)):  # would match the patterns above
        _compress(tmp_path / sibling / "t.rankfold", seed=seed)
    con = _con()
    scan = con.execute("SELECT c1, _rf_row FROM rankfold_scan(?) ORDER BY _rf_row", [str(target)]).fetchall()
    assert len(scan) == ROWS
    expected = rankfold.open(target).to_numpy(columns=["c1"])[:, 0]
    np.testing.assert_allclose([r[0] for r in scan], expected, rtol=0, atol=1e-12)
    errors = con.execute("SELECT count(*) FROM rankfold_row_errors(?)", [str(target)]).fetchone()
    assert errors == (ROWS,)
    agg = con.execute("SELECT * FROM rankfold_aggregate(?, ['c1'], func := 'avg', group_by := 'site')",
                      [str(target)]).fetchall()
    python = rankfold.open(target).aggregate(["c1"], "avg", by="site").to_pylist()
    assert _same(agg, [tuple(row.values()) for row in python])


def test_an_append_is_seen_by_the_next_query_in_the_same_process(tmp_path):
    path = tmp_path / "grow.rankfold"
    rankfold.compress(_table(0), path, rank=2, key="id", seed=0)
    con = _con()
    p = str(path)
    assert con.execute("SELECT count(*) FROM rankfold_scan(?)", [p]).fetchone() == (ROWS,)
    sums = "SELECT * FROM rankfold_aggregate(?, ['c0'], func := 'count')"
    first = con.execute(sums, [p]).fetchall()
    more = _table(5)
    more = more.set_column(0, "id", pa.array(np.arange(ROWS, 2 * ROWS, dtype=np.int64)))
    rankfold.open(path).append(more)
    assert con.execute("SELECT count(*) FROM rankfold_scan(?)", [p]).fetchone() == (2 * ROWS,)
    second = con.execute(sums, [p]).fetchall()
    assert first != second
    assert con.execute("SELECT count(*) FROM rankfold_row_errors(?)", [p]).fetchone() == (2 * ROWS,)
    assert con.execute("SELECT rankfold_cell(?, ?, 'c0') IS NOT NULL", [p, 2 * ROWS - 1]).fetchone() == (True,)


# -- any sealed manifest: refused in one line or served, never a raw exception -----------------
_JSON = st.recursive(st.none() | st.booleans() | st.integers(-2**70, 2**70) | st.floats(allow_nan=False, allow_infinity=False)
                     | st.text(max_size=12),
                     lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=6), inner, max_size=4),
                     max_leaves=8)


def _paths(value, prefix=()):
    """Every path to a value inside a parsed manifest (keys and list positions)."""
    yield prefix
    if isinstance(value, dict):
        for k, v in value.items():
            yield from _paths(v, prefix + (k,))
    elif isinstance(value, list):
        for i, v in enumerate(value[:3]):
            yield from _paths(v, prefix + (i,))


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_any_sealed_manifest_edit_is_refused_cleanly_or_served(archive, data):
    # property (common practice, fuzzing): replace one value anywhere in the manifest by any
    # JSON value, seal it with a correct digest; open and a full rebuild either succeed or
    # raise CorruptArchiveError, never TypeError/IndexError/KeyError/MemoryError
    original = read_manifest(archive)
    paths = [p for p in _paths(original) if p and p[0] != "manifest_sha256"]
    where = data.draw(st.sampled_from(paths))
    value = data.draw(_JSON)
    manifest = json.loads(json.dumps(original))
    node = manifest
    for step in where[:-1]:
        node = node[step]
    node[where[-1]] = value
    write_manifest(archive, manifest)
    try:
        arch = rankfold.open(archive)
        arch.to_numpy()
        arch.cell_bounds(rows=slice(0, 5))
    except rankfold.CorruptArchiveError:
        pass
    finally:
        write_manifest(archive, original)


def test_a_file_damaged_between_two_queries_is_refused_by_the_second(archive):
    con = _con()
    p = str(archive)
    query = "SELECT count(*) FROM rankfold_scan(?)"
    assert con.execute(query, [p]).fetchone() == (ROWS,)
    name = archive / "rows-00000.parquet"
    _flip(name, name.stat().st_size // 2, 2)  # same size, new mtime: hashed again
    with pytest.raises(duckdb.Error, match="CorruptArchiveError"):
        con.execute(query, [p]).fetchone()


# -- SQL checks the row groups a query reads (point lookups without hashing whole files) ------
GROUP_ROWS = 100  # compress(batch_rows=100): 4 row groups of 100 rows


@pytest.fixture(scope="module")
def grouped(tmp_path_factory) -> Path:
    path = tmp_path_factory.mktemp("grouped") / "base.rankfold"
    rankfold.compress(_table(0), path, rank=2, key="id", link="optimal", seed=0, batch_rows=GROUP_ROWS)
    return path


@pytest.fixture
def grouped_copy(grouped, tmp_path) -> Path:
    copy = tmp_path / "grouped.rankfold"
    shutil.copytree(grouped, copy)
    return copy


def _chunk(path: Path, group: int, column: str) -> tuple[int, int]:
    """Byte range of one column chunk, from pyarrow's metadata (Parquet format spec: the
    chunk starts at its dictionary page if any, else its first data page)."""
    meta = pa.parquet.read_metadata(path)
    names = [meta.schema.column(j).path for j in range(meta.num_columns)]
    chunk = meta.row_group(group).column(names.index(column))
    start = chunk.data_page_offset
    if chunk.has_dictionary_page and chunk.dictionary_page_offset:
        start = min(start, chunk.dictionary_page_offset)
    return start, start + chunk.total_compressed_size


def _watch_hashes(monkeypatch) -> dict:
    """Record which row groups SQL checks, and whether any row file is hashed whole."""
    from rankfold.udfs.store import integrity

    seen = {"groups": [], "whole": []}
    check_group, whole = integrity.RowFileSeal._check_group, integrity.sha256_of

    def spy_group(self, name, g):
        seen["groups"].append(g)
        return check_group(self, name, g)

    def spy_whole(path, *args):
        seen["whole"].append(Path(path).name)
        return whole(path, *args)

    monkeypatch.setattr(integrity.RowFileSeal, "_check_group", spy_group)
    monkeypatch.setattr(integrity, "sha256_of", spy_whole)
    return seen


def test_sql_column_errors_hash_the_columns_table_alone(grouped_copy, monkeypatch):
    """rankfold_column_errors reads columns.parquet and no row file: it checks that table and
    no other (hashing every row file first would be work on the wrong files); a damaged
    columns table is still refused."""
    seen = _watch_hashes(monkeypatch)
    con = _con()
    rows = con.execute("SELECT count(*) FROM rankfold_column_errors(?)", [str(grouped_copy)]).fetchone()
    assert rows == (COLS,)
    assert seen["whole"] == ["columns.parquet"] and seen["groups"] == []
    _flip(grouped_copy / "columns.parquet", (grouped_copy / "columns.parquet").stat().st_size // 2, 2)
    with pytest.raises(duckdb.Error, match="CorruptArchiveError"):
        con.execute("SELECT count(*) FROM rankfold_column_errors(?)", [str(grouped_copy)]).fetchall()


def test_row_files_carry_the_sha256_of_each_row_group_and_column(grouped):
    # reference: hashlib.sha256 (FIPS 180-4) over byte ranges taken from pyarrow's metadata
    entry = next(f for f in read_manifest(grouped)["files"] if f["name"] == "rows-00000.parquet")
    path = grouped / "rows-00000.parquet"
    data = path.read_bytes()
    meta = pa.parquet.read_metadata(path)
    assert len(entry["group_sha256"]) == meta.num_row_groups == ROWS // GROUP_ROWS
    every = [meta.schema.column(j).path for j in range(meta.num_columns)]
    # chunk digests for _rf_row and the exact columns only (what SQL checks before a scan)
    manifest = read_manifest(grouped)
    assert set(entry["column_sha256"]) == {"_rf_row", *manifest["exact_columns"]}
    for g, digest in enumerate(entry["group_sha256"]):
        spans = [_chunk(path, g, name) for name in every]
        start, stop = min(s for s, _ in spans), max(e for _, e in spans)
        assert hashlib.sha256(data[start:stop]).hexdigest() == digest
    for name, digest in entry["column_sha256"].items():
        joined = b"".join(data[slice(*_chunk(path, g, name))] for g in range(meta.num_row_groups))
        assert hashlib.sha256(joined).hexdigest() == digest


def test_a_sql_point_lookup_checks_the_key_columns_and_one_row_group(grouped, monkeypatch):
    seen = _watch_hashes(monkeypatch)
    con = _con()
    got = con.execute("SELECT c1, c0 FROM rankfold_scan(?) WHERE id = 250", [str(grouped)]).fetchall()
    arch = rankfold.open(grouped)
    # the Python reader's values (c0 stored as is; c1 rebuilt, up to floating-point rounding)
    assert got[0][1] == arch.cell(250, "c0").value and len(got) == 1
    assert got[0][0] == pytest.approx(arch.cell(250, "c1").value, rel=1e-12)
    assert seen["groups"] == [250 // GROUP_ROWS]
    assert "rows-00000.parquet" not in seen["whole"]
    # a filter on a basis column (served as stored) is not pushed below the check: every
    # row group is checked before any row is compared
    seen["groups"].clear()
    for where in ["c0 = ?", "c1 > ?"]:  # a basis column, a rebuilt one
        seen["groups"].clear()
        con.execute(f"SELECT count(*) FROM rankfold_scan(?) WHERE {where}",
                    [str(grouped), arch.cell(5, "c0").value]).fetchall()
        assert sorted(set(seen["groups"])) == list(range(ROWS // GROUP_ROWS)), where


@pytest.mark.parametrize("column", ["c0", "_rf_err_max"])
def test_a_flipped_byte_in_the_row_group_a_lookup_reads_is_refused_in_sql_and_python(grouped_copy, column):
    path = grouped_copy / "rows-00000.parquet"
    start, stop = _chunk(path, 2, column)
    _flip(path, (start + stop) // 2 + 8, 4)  # inside the data page of row group 2 (rows 200-299)
    con = _con()
    with pytest.raises(duckdb.Error, match="CorruptArchiveError.*row group \\(2\\)"):
        con.execute("SELECT c1 FROM rankfold_scan(?) WHERE id = 250", [str(grouped_copy)]).fetchall()
    with pytest.raises(rankfold.CorruptArchiveError):  # pyarrow: the page's CRC-32
        rankfold.open(grouped_copy).cell(250, "c1")


def test_a_flipped_byte_elsewhere_is_refused_by_the_next_query_that_reads_it(grouped, grouped_copy):
    path = grouped_copy / "rows-00000.parquet"
    start, stop = _chunk(path, 0, "c2")
    _flip(path, (start + stop) // 2 + 8, 1)  # row group 0 (rows 0-99)
    con = _con()
    p = str(grouped_copy)
    lookup = "SELECT * FROM rankfold_scan(?) WHERE id = ?"
    truth = con.execute(lookup, [str(grouped), 250]).fetchall()
    assert con.execute(lookup, [p, 250]).fetchall() == truth  # group 2 is intact
    for sql, args in [(lookup, [p, 42]), ("SELECT sum(c4) FROM rankfold_scan(?)", [p]),
                      ("SELECT * FROM rankfold_scan(?) ORDER BY id LIMIT 3", [p]),
                      ("SELECT c1 FROM rankfold_scan(?) WHERE c1 > 0", [p]),
                      ("SELECT count(*) FROM rankfold_scan(?, predicate := 'id < 10')", [p])]:
        with pytest.raises(duckdb.Error, match="CorruptArchiveError"):
            con.execute(sql, args).fetchall()


@pytest.mark.parametrize("column", ["id", "site", "_rf_row"])
def test_a_flipped_byte_in_a_key_column_is_refused_before_any_row_is_filtered(grouped_copy, column):
    # DuckDB filters key columns inside the Parquet scan, before the row-group check: their
    # chunks in every row group are checked before the query (a damaged key could otherwise
    # make a row vanish from WHERE id = K)
    path = grouped_copy / "rows-00000.parquet"
    start, stop = _chunk(path, 0, column)
    _flip(path, stop - 3, 2)
    with pytest.raises(duckdb.Error, match=f"CorruptArchiveError.*{column!r} column chunks"):
        _con().execute("SELECT c1 FROM rankfold_scan(?) WHERE id = 250", [str(grouped_copy)]).fetchall()


def test_an_archive_without_row_group_digests_is_checked_whole(grouped, grouped_copy, monkeypatch):
    # older archives: their row files' entries have no group_sha256 / column_sha256
    manifest = read_manifest(grouped_copy)
    for entry in manifest["files"]:
        entry.pop("group_sha256", None)
        entry.pop("column_sha256", None)
    write_manifest(grouped_copy, manifest)
    assert not ArchiveReader(grouped_copy).seal.by_groups
    seen = _watch_hashes(monkeypatch)
    con = _con()
    lookup = "SELECT * FROM rankfold_scan(?) WHERE id = 250"
    assert con.execute(lookup, [str(grouped_copy)]).fetchall() == con.execute(lookup, [str(grouped)]).fetchall()
    assert "rows-00000.parquet" in seen["whole"]
    path = grouped_copy / "rows-00000.parquet"
    start, stop = _chunk(path, 0, "c2")
    _flip(path, (start + stop) // 2 + 8, 1)
    with pytest.raises(duckdb.Error, match="CorruptArchiveError"):
        con.execute(lookup, [str(grouped_copy)]).fetchall()


def test_an_archive_with_the_older_error_names_reads_under_the_new_ones(pristine, archive, capsys):
    """Archives written when the achieved error was recorded as errors.max_abs_error (and
    _over_std) and achieved.max_abs_error -- the name of the option that asks for a tolerance
    -- keep reading: manifest_schema.older_format_rules renames them on read."""
    expected = rankfold.open(pristine).manifest
    manifest = read_manifest(archive)
    manifest["errors"]["max_abs_error"] = manifest["errors"].pop("largest_error")
    manifest["errors"]["max_abs_error_over_std"] = manifest["errors"].pop("largest_error_over_std")
    manifest["achieved"]["max_abs_error"] = manifest["achieved"].pop("largest_error")
    write_manifest(archive, manifest)  # sealed again, as such an archive was
    on_disk = json.loads((archive / "manifest.json").read_text(encoding="utf-8"))
    assert "max_abs_error" in on_disk["errors"] and "largest_error" not in on_disk["errors"]
    opened = rankfold.open(archive)
    # the size differs: the older names are stored as they are, where the new ones repeat errors
    assert opened.errors == expected["errors"]
    assert {k: v for k, v in opened.manifest["achieved"].items() if k != "bytes"} == {
        k: v for k, v in expected["achieved"].items() if k != "bytes"}
    assert opened.errors["largest_error"] > 0 and "max_abs_error" not in opened.errors
    info = _con().execute("SELECT rankfold_info(?)", [str(archive)]).fetchone()[0]
    assert info["largest_error"] == expected["errors"]["largest_error"]
    assert main(["inspect", str(archive)]) == 0
    assert "largest error / std" in capsys.readouterr().out


def test_a_resealed_manifest_without_a_key_column_digest_is_refused_in_sql(grouped_copy):
    manifest = read_manifest(grouped_copy)
    entry = next(f for f in manifest["files"] if f["name"] == "rows-00000.parquet")
    del entry["column_sha256"]["id"]
    write_manifest(grouped_copy, manifest)
    with pytest.raises(duckdb.Error, match="gives no column_sha256 for 'id'"):
        _con().execute("SELECT c1 FROM rankfold_scan(?) WHERE id = 250", [str(grouped_copy)]).fetchall()


def test_two_prefixes_in_one_process_each_get_their_own_row_group_check(grouped):
    # the SQL of a scan names the prefixed check function: a cached statement made for one
    # prefix must not be served to a database where only the other is registered
    first, second = duckdb.connect(), duckdb.connect()
    register(first, prefix="rfa")
    register(second, prefix="rfb")
    query = "SELECT count(*) FROM {}_scan(?) WHERE id < 150"
    assert first.execute(query.format("rfa"), [str(grouped)]).fetchone() == (150,)
    assert second.execute(query.format("rfb"), [str(grouped)]).fetchone() == (150,)


def test_row_groups_of_an_appended_part_are_checked_by_their_own_digests(grouped_copy, monkeypatch):
    more = _table(5).set_column(0, "id", pa.array(np.arange(ROWS, 2 * ROWS, dtype=np.int64)))
    rankfold.open(grouped_copy).append(more, batch_rows=GROUP_ROWS)
    parts = read_manifest(grouped_copy)["row_parts"]
    assert len(parts) == 2
    new = grouped_copy / parts[1]["name"]
    seen = _watch_hashes(monkeypatch)
    con = _con()
    lookup = "SELECT c1 FROM rankfold_scan(?) WHERE id = ?"
    arch = rankfold.open(grouped_copy)
    assert con.execute(lookup, [str(grouped_copy), ROWS + 150]).fetchone()[0] == pytest.approx(
        arch.cell(ROWS + 150, "c1").value, rel=1e-12)
    assert seen["groups"] == [1] and not {p["name"] for p in parts} & set(seen["whole"])
    start, stop = _chunk(new, 1, "c2")
    _flip(new, (start + stop) // 2 + 8, 6)
    with pytest.raises(duckdb.Error, match=f"CorruptArchiveError.*{parts[1]['name']} has a row group \\(1\\)"):
        con.execute(lookup, [str(grouped_copy), ROWS + 150]).fetchall()
    assert con.execute(lookup, [str(grouped_copy), 150]).fetchone()[0] == pytest.approx(
        arch.cell(150, "c1").value, rel=1e-12)


def test_a_footer_edited_after_open_is_refused_by_the_next_scan(grouped_copy):
    con = _con()
    p = str(grouped_copy)
    lookup = "SELECT c1 FROM rankfold_scan(?) WHERE id = 250"
    con.execute(lookup, [p]).fetchall()  # opened, checked and cached
    path = grouped_copy / "rows-00000.parquet"
    footer = int.from_bytes(path.read_bytes()[-8:-4], "little")
    _flip(path, path.stat().st_size - 8 - footer // 2, 0)  # same size, new mtime
    with pytest.raises(duckdb.Error, match="CorruptArchiveError.*Parquet footer"):
        con.execute(lookup, [p]).fetchall()


def test_the_manifest_stores_nothing_a_reader_derives(archive):
    """``numeric_columns`` is the schema's numeric names (``manifest_schema.DERIVED_KEYS``): a new
    manifest does not store it, the reader derives it, and the targets are not repeated among the
    recorded options (nothing stored twice; issue 14)."""
    text = (archive / "manifest.json").read_text()
    assert '"numeric_columns"' not in text
    manifest = read_manifest(archive)
    assert manifest["numeric_columns"] == [f["name"] for f in manifest["schema"] if f["role"] == "numeric"]
    assert not {"max_abs_error", "max_std_error", "rel_error", "target_bytes"} & set(manifest["method"]["options"])
    assert rankfold.open(archive).numeric_columns == manifest["numeric_columns"]


def test_an_older_manifest_that_stores_numeric_columns_still_reads(archive):
    # written before the entry was derived on read: its own copy, sealed with it, is accepted
    manifest = read_manifest(archive)
    manifest.pop("manifest_sha256")
    manifest = {"manifest_sha256": manifest_digest(manifest), **manifest}
    assert "numeric_columns" in manifest
    (archive / "manifest.json").write_text(json.dumps(manifest))
    assert rankfold.open(archive, checksums=True).numeric_columns == manifest["numeric_columns"]


@settings(max_examples=60, deadline=None, derandomize=True)
@given(st.lists(st.tuples(st.sampled_from(["double", "float", "int64", "string"]),
                          st.sampled_from(["numeric", "exact"])), min_size=1, max_size=12),
       st.booleans(), st.booleans())
def test_the_stored_form_of_a_manifest_reads_back_as_it_was(fields, every_column, with_numeric):
    # written_form (schema by field, types and roles as runs, per-column targets as lists) and
    # derived_entries are inverses: the manifest a reader gets is the one the writer had
    from rankfold.udfs.store.manifest_schema import derived_entries, written_form

    schema = [{"name": f"c{k}", "type": t, "role": r} for k, (t, r) in enumerate(fields)]
    numeric = [f["name"] for f in schema if f["role"] == "numeric"]
    named = numeric if every_column else numeric[:1]
    manifest = {"schema": schema, "targets": {"max_abs_error": {n: 0.5 + k for k, n in enumerate(named)},
                                              "max_std_error": 0.01, "rel_error": None},
                "spectrum": [3.0, 1.5] + [0.0] * len(fields)}
    if with_numeric:
        manifest["numeric_columns"] = numeric
    stored = json.loads(json.dumps(written_form(manifest)))  # through JSON text, as on disk
    assert "numeric_columns" not in stored
    # c0, c1, ... stored as one run [prefix, first, count, width] (manifest_schema._named_runs)
    assert stored["schema"]["names"] == ([["c", 0, len(schema), 0]] if len(schema) >= 3 else [f["name"] for f in schema])
    derived_entries(stored)
    assert stored == dict(manifest, numeric_columns=numeric)


def test_a_schema_whose_runs_do_not_add_up_is_refused(archive):
    text = (archive / "manifest.json").read_text()
    manifest = json.loads(text)
    runs = manifest["schema"]["types"]
    runs[-1][1] += 1  # one type more than there are names
    manifest.pop("manifest_sha256")
    manifest = {"manifest_sha256": manifest_digest(manifest), **manifest}
    (archive / "manifest.json").write_text(json.dumps(manifest))
    with pytest.raises(rankfold.CorruptArchiveError, match="manifest.schema"):
        rankfold.open(archive)
