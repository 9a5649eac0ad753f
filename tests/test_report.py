"""The quality report: it renders, its images decode, and its numbers are the ledger's.

Data is invented by code with a fixed seed. Reference for the leverage: numpy's SVD of the
fully rebuilt (transformed) table, computed here independently of the report's small-matrix
route.
"""

from __future__ import annotations

import base64
import html
import io
import json
import re
import sys

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from matplotlib.image import imread

import rankfold
from rankfold.udfs.store.reader import ArchiveReader
from rankfold.report import _g, column_selection, report_data, summary, write_report  # _g: the report's number format

ROWS, COLS, RANK = 500, 12, 3


def _table() -> pa.Table:
    rng = np.random.default_rng(23)
    x = rng.standard_normal((ROWS, RANK)) @ rng.standard_normal((RANK, COLS))
    x = (x + 2e-3 * rng.standard_normal((ROWS, COLS))) * np.geomspace(1, 20, COLS) - 3.0
    nulls = np.zeros(ROWS, bool)
    nulls[::41] = True
    columns = {"key": pa.array(np.arange(ROWS, dtype=np.int64))}
    for j in range(COLS):
        columns[f"c{j}"] = pa.array(x[:, j], mask=nulls if j == 4 else None)
    return pa.table(columns)


@pytest.fixture(scope="module")
def archive(tmp_path_factory) -> rankfold.Archive:
    path = tmp_path_factory.mktemp("report") / "panel.rankfold"
    return rankfold.compress(_table(), path, rank=RANK, key="key")


@pytest.fixture(scope="module")
def rendered(archive, tmp_path_factory):
    out = tmp_path_factory.mktemp("html") / "panel.html"
    result = write_report(archive, out, sample_rows=20)
    return out, out.read_text(encoding="utf-8"), result


def _embedded(text: str) -> dict:
    blob = re.search(r'<script type="application/json" id="rankfold-report-data">(.*?)</script>', text, re.S)
    return json.loads(blob.group(1))


def test_the_report_is_one_self_contained_file_whose_images_decode(rendered):
    out, text, result = rendered
    assert out.is_file() and result["plots"] == 5 and result["bytes"] == out.stat().st_size
    assert text.startswith("<!DOCTYPE html>") and "rankfold archives are lossy" in text
    assert not re.search(r'(src|href)="(?!data:)', text)  # nothing loaded from elsewhere
    images = re.findall(r'src="data:image/png;base64,([A-Za-z0-9+/=]+)"', text)
    assert len(images) == 5
    for data in images:
        pixels = imread(io.BytesIO(base64.b64decode(data)), format="png")
        assert pixels.ndim == 3 and pixels.shape[0] >= 300 and pixels.shape[1] >= 900
        assert pixels[..., :3].std() > 0.05  # not a blank canvas
    for title in ("Singular values and the chosen rank", "Error per column", "Error on a sample of rows",
                  "Error per row", "Kept exactly, and why"):
        assert title in text


def test_numbers_match_the_ledger_and_the_manifest(archive, rendered):
    _, text, _ = rendered
    data = _embedded(text)
    manifest = archive.manifest
    e = manifest["errors"]
    assert data["spectrum"]["values"] == manifest["spectrum"]
    assert data["spectrum"]["rank"] == RANK
    assert data["spectrum"]["optimal_relative_frobenius"] == e["optimal_relative_frobenius"]
    assert data["spectrum"]["relative_frobenius"] == e["relative_frobenius"]
    # the best possible error at rank k is the tail of the spectrum (Eckart-Young)
    s = np.asarray(manifest["spectrum"])
    assert e["optimal_relative_frobenius"] == pytest.approx(np.sqrt((s[RANK:] ** 2).sum() / (s ** 2).sum()), rel=1e-12)
    ledger = archive.column_ledger().to_pydict()
    by_name = {n: j for j, n in enumerate(ledger["name"])}
    derived = data["columns"]["derived"]
    assert sorted(c["name"] for c in derived) == sorted(n for n, r in zip(ledger["name"], ledger["role"]) if r != "basis")
    assert [c["rel_rms"] for c in derived] == sorted((c["rel_rms"] for c in derived), reverse=True)
    for c in derived:
        j = by_name[c["name"]]
        assert c["rel_rms"] == ledger["rel_rms"][j] and c["err_max"] == ledger["err_max"][j]
        assert c["std"] == ledger["std"][j]
    worst = derived[0]
    assert worst["name"] == e["worst_column"]
    # the same numbers, as shown in the table beside the plot
    row = (f"<tr><td>{worst['name']}</td><td>{_g(worst['rel_rms'])}</td><td>{_g(worst['err_max'])}</td>"
           f"<td>{_g(worst['std'])}</td><td>{_g(worst['err_max_over_std'])}</td></tr>")
    assert row in text
    assert f"<td>this archive&#x27;s relative error</td><td>{_g(e['relative_frobenius'])}</td>" in text
    assert data["columns"]["tolerance"] is None and "written without a tolerance" in text
    # the row ledger, read straight from the row file
    row_max = pq.read_table(archive.path / "rows-00000.parquet").column("_rf_err_max").to_numpy()
    assert data["rows"]["max"] == row_max.max() and data["rows"]["count"] == ROWS
    assert f"<td>max</td><td>{_g(row_max.max())}</td>" in text
    assert data["summary"] == json.loads(json.dumps(summary(archive), default=str))
    assert html.escape(", ".join(str(a) for a in archive.anchor_rows[:40])) in text


def test_heatmap_without_source_shows_the_bounds(archive, rendered):
    data = _embedded(rendered[1])
    h = data["heatmap"]
    assert h["kind"] == "bound" and len(h["rows"]) == 20 and h["columns"] == archive.numeric_columns
    std = np.array(archive.column_ledger().column("std").to_pylist())
    bounds = archive.cell_bounds(rows=h["rows"]) / std
    for top in h["top"]:
        i, j = h["rows"].index(top["row"]), archive.numeric_columns.index(top["column"])
        assert top["value"] == pytest.approx(bounds[i, j], rel=1e-12)
    # the sample holds the row with the largest ledger error
    row_max = pq.read_table(archive.path / "rows-00000.parquet").column("_rf_err_max").to_numpy()
    assert int(np.argmax(row_max)) in h["rows"]


def test_heatmap_with_source_shows_true_errors_within_the_bounds(archive):
    with_source = report_data(archive, source=_table(), sample_rows=30)
    without = report_data(archive, sample_rows=30)
    h = with_source["heatmap"]
    assert h["kind"] == "error" and h["rows"] == without["heatmap"]["rows"]
    errors, bounds = with_source["_arrays"]["cells"], without["_arrays"]["cells"]
    shown = np.isfinite(errors)
    assert shown.sum() >= 0.4 * errors.size  # basis columns (half of them) are exact
    assert np.all(errors[shown] <= bounds[shown])
    truth = np.column_stack([_table().column(n).to_numpy(zero_copy_only=False) for n in archive.numeric_columns])
    std = np.array(archive.column_ledger().column("std").to_pylist())
    rebuilt = archive.to_numpy(rows=h["rows"])
    expected = np.abs(truth[h["rows"]] - rebuilt) / std
    np.testing.assert_allclose(errors[shown], expected[shown], rtol=1e-9)


def test_leverage_matches_numpy_svd_of_the_rebuilt_table(archive):
    selection = column_selection(archive)
    ledger = archive.column_ledger().to_pydict()
    # the table as stored (the factors' arithmetic, before serving clamps values into range)
    stored = ArchiveReader(archive.path).rebuild(serve=False).values
    z = (stored - np.array(ledger["shift"])) / np.array(ledger["scale"])
    fill = {b["name"]: b["fill"] for b in archive.manifest["basis"]}
    for j, name in enumerate(archive.numeric_columns):  # NULL basis cells are rebuilt from their fill value
        if name in fill:
            z[:, j] = np.where(np.isnan(z[:, j]), (fill[name] - ledger["shift"][j]) / ledger["scale"][j], z[:, j])
    z = np.nan_to_num(z)  # derived columns' NULLs: the rebuild uses filled basis values
    _, _, vt = np.linalg.svd(z, full_matrices=False)
    expected = (vt[:RANK] ** 2).sum(axis=0)
    got = np.array([c["leverage"] for c in selection["columns"]])
    assert got.sum() == pytest.approx(RANK, rel=1e-12)  # measured 3e-16
    # measured: agrees with numpy to 1e-15 (the rank-k leverage of the same matrix); 1e-12 leaves
    # room for another BLAS, and a leverage of the wrong matrix or rank is off by far more
    np.testing.assert_allclose(got, expected, rtol=0, atol=1e-12)
    basis = [c for c in selection["columns"] if c["basis"]]
    assert [c["name"] for c in basis] == archive.basis_columns
    # shares sum to 1 within rounding (measured 1.1e-16)
    assert sum(c["mixing_share"] for c in basis) == pytest.approx(1.0, rel=0, abs=1e-12)
    assert sum(c["squared_norm_share"] for c in selection["columns"]) == pytest.approx(1.0, rel=0, abs=1e-12)


def test_an_archive_with_a_tolerance_draws_the_line_and_lists_it(tmp_path):
    tolerance = 0.05
    arch = rankfold.compress(_table(), tmp_path / "tol.rankfold", rank=RANK, key="key", max_abs_error=tolerance)
    result = write_report(arch, tmp_path / "t.html", sample_rows=10)
    text = (tmp_path / "t.html").read_text()
    ledger = arch.column_ledger().to_pydict()
    assert result["columns"]["tolerance"] == "per column" and "<th>tolerance</th>" in text
    assert "The dashed line is the tolerance." in text
    for c in result["columns"]["derived"]:
        j = ledger["name"].index(c["name"])
        assert c["tolerance"] == ledger["tolerance"][j] == tolerance  # stored as given (measured: equal)
        assert c["err_max"] <= c["tolerance"]


def test_an_svd_archive_renders(tmp_path):
    arch = rankfold.compress(_table(), tmp_path / "svd.rankfold", rank=RANK, key="key", method="svd")
    result = write_report(arch, tmp_path / "svd.html", sample_rows=10)
    text = (tmp_path / "svd.html").read_text()
    assert result["plots"] == 5 and "no real numeric column is kept exactly" in text
    assert sum(c["leverage"] for c in result["selection"]["columns"]) == pytest.approx(RANK, rel=1e-12)  # measured 1.5e-16


def test_errors(archive, tmp_path, monkeypatch):
    with pytest.raises(rankfold.InvalidInputError, match=r"^sample_rows must be a positive integer; got 0\.$"):
        report_data(archive, sample_rows=0)
    short = _table().slice(0, 100)
    with pytest.raises(rankfold.InvalidInputError) as info:
        report_data(archive, source=short)
    assert str(info.value) == (f"The source Arrow table (100 rows) has 100 rows where the archive has {ROWS}; "
                               "pass the table this archive was compressed from.")
    monkeypatch.setitem(sys.modules, "matplotlib.figure", None)  # as if matplotlib were missing
    with pytest.raises(rankfold.RankfoldError) as info:
        write_report(archive, tmp_path / "m.html")
    # the hint names the package itself, which pip resolves whatever way rankfold was installed
    assert str(info.value) == ("The quality report needs matplotlib, which is not installed. Install it "
                               "with: python -m pip install matplotlib")
    assert not (tmp_path / "m.html").exists()
