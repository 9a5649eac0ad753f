"""Sizes: the archive's whole size, the source's size beside it, and target_bytes.

The outside measure is the file system: ``os.stat`` of every file of the archive folder and
of the source's Parquet files. The raw size of a numeric source is rows x the byte width of
each column's type (numpy's ``dtype.itemsize``).
"""

from __future__ import annotations

import os

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import rankfold
from rankfold.udfs.store.manifest import manifest_text, sealed_manifest_text, write_manifest


def _on_disk(folder) -> int:
    return sum(p.stat().st_size for p in folder.iterdir() if p.is_file())


def _low_rank(m: int, n: int, seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)  # invented data
    return rng.standard_normal((m, 3)) @ rng.standard_normal((3, n)) + 0.01 * rng.standard_normal((m, n))


# -- the whole archive, manifest included -----------------------------------------------------------
@settings(max_examples=60, deadline=None, derandomize=True)
@given(st.lists(st.integers(0, 10**9), min_size=1, max_size=4), st.integers(0, 300))
def test_recorded_size_is_the_manifest_text_plus_the_files(sizes, padding):
    # the fixed point: the figure written inside the text equals the files plus the text's own
    # length (len of the UTF-8 bytes), whatever the digits of the total
    manifest = {"format": "x" * padding, "achieved": {"bytes": 0},
                "files": [{"name": f"f{k}", "bytes": b} for k, b in enumerate(sizes)]}
    text = sealed_manifest_text(manifest)
    assert manifest["achieved"]["bytes"] == sum(sizes) + len(text.encode("utf-8"))
    assert f'"bytes":{sum(sizes) + len(text.encode("utf-8"))}' in text


def test_sealing_does_not_touch_a_shared_achieved_record():
    # an append copies the older manifest shallowly: its achieved record must stay as it was
    shared = {"bytes": 7, "attempts": 1}
    manifest = {"achieved": shared, "files": [{"name": "a", "bytes": 100}]}
    sealed_manifest_text(manifest)
    assert shared == {"bytes": 7, "attempts": 1} and manifest["achieved"]["bytes"] > 100


def test_write_manifest_refuses_beyond_at_most_before_writing(tmp_path):
    manifest = {"achieved": {"bytes": 0}, "files": [{"name": "a", "bytes": 5_000}]}
    total = 5_000 + len(sealed_manifest_text(dict(manifest)).encode("utf-8"))
    with pytest.raises(rankfold.SizeTargetMissedError, match=f"takes {total} bytes") as refused:
        write_manifest(tmp_path, manifest, at_most=total - 1)
    assert refused.value.total == total and not (tmp_path / "manifest.json").exists()
    write_manifest(tmp_path, manifest, at_most=total)
    assert 5_000 + (tmp_path / "manifest.json").stat().st_size == total


@pytest.mark.parametrize("options", [{"rank": 2}, {"max_std_error": 0.01}])
def test_achieved_bytes_and_nbytes_count_every_file(tmp_path, options):
    path = tmp_path / "a.rankfold"
    archive = rankfold.compress(_low_rank(600, 12), path, **options)
    assert archive.manifest["achieved"]["bytes"] == archive.nbytes == _on_disk(path)
    assert manifest_text(archive.manifest) == (path / "manifest.json").read_text()


def test_append_records_the_grown_size(tmp_path):
    path = tmp_path / "a.rankfold"
    x = _low_rank(800, 10)
    rankfold.compress(x[:500], path, max_std_error=0.02)
    grown = rankfold.open(path).append(x[500:])
    manifest = grown.manifest
    listed = sum((path / f["name"]).stat().st_size for f in manifest["files"])
    whole = listed + (path / "manifest.json").stat().st_size
    assert manifest["achieved"]["bytes"] == grown.nbytes == whole


# -- the source beside the archive ----------------------------------------------------------------
def test_parquet_source_size_is_its_file_bytes(tmp_path):
    x = _low_rank(3000, 20)
    source = tmp_path / "panel.parquet"
    pq.write_table(pa.table({f"c{j}": x[:, j] for j in range(20)}), source)
    archive = rankfold.compress(str(source), tmp_path / "a.rankfold", rank=3)
    assert archive.manifest["source_size"] == {"bytes": os.stat(source).st_size, "measure": "parquet_files"}
    assert archive.source_bytes == os.stat(source).st_size
    ratio = os.stat(source).st_size / archive.nbytes
    assert archive.nbytes < archive.source_bytes
    assert archive.size_comparison.endswith(f"the archive is {ratio:.3g}x smaller.")
    assert "its Parquet files as stored" in archive.size_comparison


def test_raw_source_size_counts_each_type_width(tmp_path):
    rng = np.random.default_rng(3)  # invented data
    table = pa.table({"a": rng.normal(size=400), "b": rng.normal(size=400).astype(np.float32),
                      "c": rng.integers(0, 9, 400).astype(np.int16), "key": np.arange(400)})
    archive = rankfold.compress(table, tmp_path / "a.rankfold", rank=1, key="key")
    widths = np.dtype(np.float64).itemsize + np.dtype(np.float32).itemsize + np.dtype(np.int16).itemsize
    assert archive.manifest["source_size"] == {"bytes": 400 * widths, "measure": "raw_numeric"}


def test_a_larger_archive_says_so_plainly(tmp_path, capsys):
    x = np.random.default_rng(1).normal(size=(30, 2))  # invented data: too small to gain anything
    archive = rankfold.compress(x, tmp_path / "a.rankfold", rank=1)
    assert archive.nbytes > archive.source_bytes == 30 * 2 * 8
    assert f"the archive is NOT smaller than its source ({archive.nbytes / 480:.3g}x larger)" in \
        archive.size_comparison
    from rankfold.cli import main

    assert main(["inspect", str(tmp_path / "a.rankfold")]) == 0
    out = capsys.readouterr().out
    assert f"size          {archive.nbytes:,} bytes" in out and "NOT smaller than its source" in out


# -- target_bytes ---------------------------------------------------------------------------------
def test_target_bytes_is_met_by_the_whole_archive_or_refused_with_a_size_that_fits(tmp_path):
    x = _low_rank(2000, 20)
    met = rankfold.compress(x, tmp_path / "met.rankfold", target_bytes=40_000)
    assert _on_disk(tmp_path / "met.rankfold") <= 40_000
    # (the smallest archive, rank 0, measured 9,889 bytes: row ids, offsets, codes, the manifest)
    with pytest.raises(rankfold.SizeTargetMissedError, match="is below the smallest archive") as refused:
        rankfold.compress(x, tmp_path / "tiny.rankfold", target_bytes=5_000)
    assert not (tmp_path / "tiny.rankfold").exists()
    least = refused.value.total
    assert 5_000 < least < met.nbytes and f"at least {least}" in str(refused.value)
    fits = rankfold.compress(x, tmp_path / "fits.rankfold", target_bytes=least)
    assert _on_disk(tmp_path / "fits.rankfold") <= least
    assert fits.manifest["method"]["rank"] == 0
