"""Bad input: every purposeful error has its class in rankfold's hierarchy (and the matching
built-in) and a message that says what was wrong, with which input, and what to do.

A compress that fails at any point leaves no archive and no temporary directory behind, and
never touches an archive that already exists.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import duckdb
import numpy as np
import pyarrow as pa
import pytest

import rankfold
from rankfold.udfs.passes import compress as compress_module


def _table(seed: int = 1, m: int = 30, n: int = 5) -> pa.Table:
    rng = np.random.default_rng(seed)
    block = rng.normal(size=(m, 2)) @ rng.normal(size=(2, n)) + 0.01 * rng.normal(size=(m, n))
    return pa.table({"id": pa.array([f"r{i}" for i in range(m)])} | {f"x{j}": block[:, j] for j in range(n)})


def _snapshot(directory: Path) -> dict[str, str]:
    """Every file below ``directory`` with its SHA-256: a byte-for-byte picture."""
    return {str(p.relative_to(directory)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(directory.rglob("*")) if p.is_file()}


def _leftovers(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if "rankfold-tmp" in p.name or "rankfold-old" in p.name)


@pytest.fixture
def archive(tmp_path):
    return rankfold.compress(_table(), tmp_path / "ok.rankfold", rank=2, key="id")


# -- the hierarchy ------------------------------------------------------------------------------
@pytest.mark.parametrize("error, builtin", [
    (rankfold.InvalidInputError, ValueError),
    (rankfold.EmptySourceError, ValueError),
    (rankfold.NoNumericColumnsError, ValueError),
    (rankfold.RankTooLargeError, ValueError),
    (rankfold.UnknownOptionError, TypeError),
    (rankfold.UnknownColumnError, LookupError),
    (rankfold.RowOutOfRangeError, IndexError),
    (rankfold.ArchiveExistsError, FileExistsError),
    (rankfold.ArchiveNotFoundError, FileNotFoundError),
    (rankfold.CorruptArchiveError, ValueError),
    (rankfold.UnsupportedVersionError, rankfold.CorruptArchiveError),
    (rankfold.SourceChangedError, RuntimeError),
])
def test_every_error_is_a_rankfold_error_and_a_builtin(error, builtin):
    assert issubclass(error, rankfold.RankfoldError)
    assert issubclass(error, builtin)


# -- sources ------------------------------------------------------------------------------------
def test_empty_table(tmp_path):
    empty = _table().slice(0, 0)
    with pytest.raises(rankfold.EmptySourceError, match=r"has no rows; there is nothing to compress"):
        rankfold.compress(empty, tmp_path / "empty.rankfold")
    assert not (tmp_path / "empty.rankfold").exists()


def test_no_numeric_columns(tmp_path):
    words = pa.table({"a": ["x", "y"], "b": [True, False]})
    with pytest.raises(rankfold.NoNumericColumnsError, match=r"no numeric column to compress \(columns: \['a', 'b'\]\)"):
        rankfold.compress(words, tmp_path / "words.rankfold")


def test_only_integers_beyond_two_to_the_53(tmp_path):
    big = pa.table({"a": pa.array([2**60, 3], pa.int64())})
    with pytest.raises(ValueError, match=r"holds integers beyond 2\^53"):
        rankfold.compress(big, tmp_path / "big.rankfold")


@pytest.mark.parametrize("bad, message", [
    (np.arange(5.0), r"must be 2-D .* got an array of shape \(5,\)"),
    (np.array([["a", "b"]]), r"must hold numbers; got dtype <U1"),
    ({"a": [1.0]}, r"Cannot compress a source of type dict"),
])
def test_unusable_sources(tmp_path, bad, message):
    with pytest.raises(rankfold.InvalidInputError, match=message):
        rankfold.compress(bad, tmp_path / "bad.rankfold")


def test_record_batch_reader_is_refused(tmp_path):
    reader = pa.RecordBatchReader.from_batches(_table().schema, _table().to_batches())
    with pytest.raises(ValueError, match=r"A RecordBatchReader can be read only once.*reader\.read_all\(\)"):
        rankfold.compress(reader, tmp_path / "reader.rankfold")


@pytest.mark.parametrize("name, message", [
    ("missing.parquet", r"No Parquet file at .*missing\.parquet\. Check the path\."),
    ("missing.csv", r"No CSV file at .*missing\.csv\. Check the path\."),
])
def test_missing_source_files(tmp_path, name, message):
    with pytest.raises(rankfold.InvalidInputError, match=message):
        rankfold.compress(str(tmp_path / name), tmp_path / "out.rankfold")
    assert list(tmp_path.iterdir()) == []


def test_table_name_without_connection(tmp_path):
    with pytest.raises(rankfold.InvalidInputError, match=r"pass connection=<the DuckDB connection"):
        rankfold.compress("panel", tmp_path / "out.rankfold")


def test_unknown_table_on_a_connection(tmp_path):
    con = duckdb.connect()
    try:
        with pytest.raises(rankfold.InvalidInputError, match=r"DuckDB cannot read the source 'no_such_table'"):
            rankfold.compress("no_such_table", tmp_path / "out.rankfold", connection=con)
    finally:
        con.close()


def test_reserved_and_missing_column_names(tmp_path):
    with pytest.raises(rankfold.InvalidInputError, match=r"reserved by rankfold; rename \['_rf_x'\]"):
        rankfold.compress(pa.table({"_rf_x": [1.0, 2.0], "y": [1.0, 3.0]}), tmp_path / "r.rankfold")
    with pytest.raises(rankfold.InvalidInputError, match=r"no column 'site' \(named in key/exact_columns\)"):
        rankfold.compress(_table(), tmp_path / "k.rankfold", key="site")


# -- options ------------------------------------------------------------------------------------
def test_rank_larger_than_the_matrix(tmp_path):
    with pytest.raises(rankfold.RankTooLargeError,
                       match=r"'rank' option of compress must be at most min\(rows, numeric columns\) = 5 .*Got 6"):
        rankfold.compress(_table(), tmp_path / "r.rankfold", rank=6)
    with pytest.raises(rankfold.RankTooLargeError, match=r"'n_rows' option .* at most the 30 source rows\. Got 31"):
        rankfold.compress(_table(), tmp_path / "r.rankfold", rank=2, n_rows=31, link="optimal")
    with pytest.raises(rankfold.RankTooLargeError, match=r"'n_columns' option .* at most the 5 numeric columns\. Got 9"):
        rankfold.compress(_table(), tmp_path / "r.rankfold", rank=2, n_columns=9)
    assert not (tmp_path / "r.rankfold").exists()


def test_unknown_option_suggests_the_closest(tmp_path):
    with pytest.raises(rankfold.UnknownOptionError, match=r"no option 'overwite'\. Did you mean 'overwrite'\?"):
        rankfold.compress(_table(), tmp_path / "o.rankfold", overwite=True)
    with pytest.raises(rankfold.UnknownOptionError, match=r"no option 'ranks'\. Did you mean 'rank'\?"):
        rankfold.compress(_table(), tmp_path / "o.rankfold", ranks=2)
    with pytest.raises(TypeError, match=r"no option 'zzz'\. Known options: rank, seed, basis_precision, batch_rows"):
        rankfold.compress(_table(), tmp_path / "o.rankfold", zzz=1)


@pytest.mark.parametrize("options, error, message", [
    ({"rank": 0}, rankfold.InvalidInputError, r"'rank' option of compress must be a positive integer or None\. Got 0"),
    ({"rank": 2.5}, rankfold.InvalidInputError, r"'rank' .* Got 2\.5"),
    ({"rank": True}, rankfold.InvalidInputError, r"'rank' .* Got True"),
    ({"seed": -1}, rankfold.InvalidInputError, r"'seed' option of compress must be a non-negative integer\. Got -1"),
    ({"batch_rows": 0}, rankfold.InvalidInputError, r"'batch_rows' option .* positive integer\. Got 0"),
    ({"method": "pca"}, rankfold.UnknownOptionError, r"'method' option of compress must be one of 'cur', 'svd'\. Got 'pca'"),
    ({"column_method": "random"}, rankfold.UnknownOptionError, r"'column_method' option .* Got 'random'"),
    ({"row_method": "first", "link": "optimal"}, rankfold.UnknownOptionError, r"'row_method' option .* Got 'first'"),
    ({"link": "best"}, rankfold.UnknownOptionError, r"'link' option .* Got 'best'"),
    ({"transform": "log"}, rankfold.UnknownOptionError, r"'transform' option .* 'standardize', 'center', 'none'\. Got 'log'"),
    ({"replace": "yes"}, rankfold.InvalidInputError, r"'replace' option of compress must be True, False or None\. Got 'yes'"),
    ({"key": 3}, rankfold.InvalidInputError, r"'key' option of compress must be one column name\. Got 3"),
    ({"link": "textbook"}, rankfold.InvalidInputError, r"'textbook' link needs sampled columns"),
])
def test_bad_option_values(tmp_path, options, error, message):
    with pytest.raises(error, match=message):
        rankfold.compress(_table(), tmp_path / "v.rankfold", **options)
    assert list(tmp_path.iterdir()) == []


def test_numpy_integers_are_integers(tmp_path):
    archive = rankfold.compress(_table(), tmp_path / "np.rankfold", rank=np.int64(2), seed=np.uint32(9),
                                n_columns=np.int32(3))
    assert archive.manifest["method"]["rank"] == 2
    assert archive.manifest["method"]["seed"] == 9
    assert archive.manifest["method"]["n_columns"] == 3
    with pytest.raises(rankfold.InvalidInputError, match=r"'seed' .* Got np\.True_"):
        rankfold.compress(_table(), tmp_path / "np2.rankfold", seed=np.True_)


def test_missing_parent_folder(tmp_path):
    with pytest.raises(rankfold.InvalidInputError, match=r"The folder .*nowhere does not exist; create it first"):
        rankfold.compress(_table(), tmp_path / "nowhere" / "a.rankfold")


# -- existing targets ---------------------------------------------------------------------------
def test_existing_archive_is_refused_and_untouched(tmp_path, archive):
    before = _snapshot(archive.path)
    with pytest.raises(rankfold.ArchiveExistsError, match=r"already exists; .*pass overwrite=True"):
        rankfold.compress(_table(seed=2), archive.path, rank=2)
    assert _snapshot(archive.path) == before
    assert _leftovers(tmp_path) == []


def test_overwrite_replaces_an_archive(tmp_path, archive):
    old_id = archive.manifest["archive_id"]
    replaced = rankfold.compress(_table(seed=2), archive.path, rank=3, overwrite=True)
    assert replaced.manifest["archive_id"] != old_id
    assert replaced.manifest["method"]["rank"] == 3
    assert _leftovers(tmp_path) == []


@pytest.mark.parametrize("kind", ["file", "folder"])
def test_overwrite_never_replaces_other_data(tmp_path, kind):
    target = tmp_path / "precious"
    if kind == "file":
        target.write_bytes(b"not an archive")
    else:
        target.mkdir()
        (target / "notes.txt").write_text("keep me")
    before = _snapshot(tmp_path)
    with pytest.raises(FileExistsError, match=r"exists and is not a rankfold archive; refusing to replace it"):
        rankfold.compress(_table(), target, overwrite=True)
    assert _snapshot(tmp_path) == before


def test_overwrite_fills_an_empty_folder(tmp_path):
    (tmp_path / "empty").mkdir()
    assert rankfold.compress(_table(), tmp_path / "empty", rank=2, overwrite=True).shape == (30, 5)


# -- failures midway ----------------------------------------------------------------------------
def _changing_source() -> tuple[duckdb.DuckDBPyConnection, str]:
    """A query whose values differ on every read: the passes see different tables."""
    con = duckdb.connect()
    query = "SELECT i, random() AS a, random() AS b, random() + i AS c FROM range(200) t(i) ORDER BY i"
    return con, query


@pytest.mark.parametrize("overwrite", [False, True])
def test_source_changing_between_passes(tmp_path, archive, overwrite):
    con, query = _changing_source()
    target = archive.path if overwrite else tmp_path / "new.rankfold"
    before = _snapshot(archive.path)
    try:
        with pytest.raises(rankfold.SourceChangedError, match=r"differ.* between two passes|gave different rows"):
            rankfold.compress(query, target, rank=1, connection=con, overwrite=overwrite)
    finally:
        con.close()
    assert _snapshot(archive.path) == before
    assert not (tmp_path / "new.rankfold").exists()
    assert _leftovers(tmp_path) == []


@pytest.mark.parametrize("stage", ["encode_pass", "_write_small_tables", "_manifest"])
def test_a_pass_that_fails_leaves_nothing_behind(tmp_path, archive, monkeypatch, stage):
    def broken(*args, **kwargs):
        raise OSError(f"disk full during {stage}")

    monkeypatch.setattr(compress_module, stage, broken)
    before = _snapshot(archive.path)
    with pytest.raises(OSError, match=f"disk full during {stage}"):
        rankfold.compress(_table(seed=4), tmp_path / "new.rankfold", rank=2)
    with pytest.raises(OSError, match=f"disk full during {stage}"):
        rankfold.compress(_table(seed=4), archive.path, rank=2, overwrite=True)
    assert not (tmp_path / "new.rankfold").exists()
    assert _snapshot(archive.path) == before
    assert _leftovers(tmp_path) == []


# -- reading ------------------------------------------------------------------------------------
def test_unknown_column(archive):
    with pytest.raises(rankfold.UnknownColumnError, match=r"has no numeric column 'x9'\. Its numeric columns are \['x0'"):
        archive.to_numpy(columns=["x0", "x9"])
    with pytest.raises(LookupError, match=r"no numeric column 'id'"):
        archive.cell(0, "id")  # a key column is not rebuilt


@pytest.mark.parametrize("rows, message", [
    (30, r"Row position 30 is out of range .* with 30 rows \(valid: 0 to 29, or -30 to -1 from the end\)"),
    ([0, -31], r"Row position -31 is out of range"),
])
def test_row_out_of_range(archive, rows, message):
    with pytest.raises(rankfold.RowOutOfRangeError, match=message):
        archive.to_numpy(rows=rows)
    with pytest.raises(IndexError, match=message):
        archive.cell_bounds(rows=rows)


def test_row_beyond_int64_is_reported_as_given(archive):
    with pytest.raises(rankfold.RowOutOfRangeError, match=r"Row position 9223372036854775808 is out of range"):
        archive.to_numpy(rows=np.array([2**63], dtype=np.uint64))


def test_rows_must_be_flat(archive):
    with pytest.raises(rankfold.RowOutOfRangeError, match=r"a flat sequence of positions; got an array of shape \(1, 2\)"):
        archive.to_numpy(rows=[[0, 1]])


def test_columns_must_be_names(archive):
    with pytest.raises(rankfold.UnknownColumnError, match=r"Columns are a numeric column name or a list of names; got 3"):
        archive.to_numpy(columns=3)


@pytest.mark.parametrize("rows", [1.5, [0.0, 1.0], ["r1"], [True]])
def test_non_integer_rows(archive, rows):
    with pytest.raises(rankfold.RowOutOfRangeError, match=r"Rows are 0-based integer positions; .*rankfold\.Keys"):
        archive.to_numpy(rows=rows)


def test_cell_takes_one_column_name(archive):
    with pytest.raises(rankfold.InvalidInputError, match=r"cell\(\) takes one column name; got \['x0'\]"):
        archive.cell(0, ["x0"])


def test_missing_archive(tmp_path):
    with pytest.raises(rankfold.ArchiveNotFoundError, match=r"No archive at .*nothing\.rankfold\. Check the path\."):
        rankfold.open(tmp_path / "nothing.rankfold")


def test_a_folder_that_is_not_an_archive(tmp_path):
    (tmp_path / "plain").mkdir()
    with pytest.raises(rankfold.CorruptArchiveError, match=r"has no manifest\.json: it is not a rankfold archive"):
        rankfold.open(tmp_path / "plain")
    (tmp_path / "file.rankfold").write_text("x")
    with pytest.raises(rankfold.CorruptArchiveError, match=r"is a file, not an archive directory"):
        rankfold.open(tmp_path / "file.rankfold")


def test_a_missing_archive_file(archive):
    (archive.path / "columns.parquet").unlink()
    with pytest.raises(rankfold.CorruptArchiveError, match=r"is missing columns\.parquet; the archive is damaged"):
        rankfold.open(archive.path)


def test_a_damaged_manifest(archive):
    (archive.path / "manifest.json").write_text("{ not json")
    with pytest.raises(rankfold.CorruptArchiveError, match=r"manifest\.json is not valid JSON"):
        rankfold.open(archive.path)


def test_values_too_large_to_square_are_refused_with_the_column_named(tmp_path):
    # float64 squares overflow beyond about 1.34e154 (IEEE 754 binary64 maximum 1.8e308)
    x = np.random.default_rng(0).standard_normal((50, 4))  # invented data
    x[:, 2] *= 1e200
    with pytest.raises(rankfold.InvalidInputError, match=r"columns \['x2'\] .* too large to square"):
        rankfold.compress(x, tmp_path / "big.rankfold", rank=1)
    assert not (tmp_path / "big.rankfold").exists()
    kept = rankfold.compress(pa.table({f"x{j}": x[:, j] for j in range(4)}), tmp_path / "ok.rankfold",
                             rank=1, exact_columns=["x2"])
    assert np.array_equal(kept.rebuild().column("x2").to_numpy(), x[:, 2])
