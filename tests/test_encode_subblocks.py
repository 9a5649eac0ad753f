"""The encode pass works through each batch in cache-sized sub-blocks (udfs/passes/encode.py).

Archives here are written with sub-blocks of 7 rows, row groups of 50 rows and batches of 230
rows, so one batch spans many sub-blocks and row groups, and batch ends fall inside row groups
of the row files' layout. Each archive is checked against references computed with numpy from
the source table and the stored files:

* every cell is within its bound; NULL, NaN and +-inf cells come back exactly;
* the column ledger is numpy's max, Euclidean norm, sum and count of the residual over the
  approximated cells (those outside basis columns, anchor rows and ``cells.parquet``);
* ``blocks.parquet`` holds one record per Parquet row group of the row files (pyarrow's file
  metadata), with numpy's counts of the cells stored exactly and sums of the residual codes;
* a compress of the same table in whole-row-group sub-blocks writes the same row files and
  exact cells, and the same ledger and block sums up to the order of floating-point summation.

The pieces these rest on are checked one by one in test_encode_pieces.py.
"""

from __future__ import annotations

import functools

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import rankfold
from rankfold.udfs.passes import compress as compress_module
from rankfold.udfs.passes import encode as encode_module
from rankfold.udfs.store import layout
from rankfold.udfs.store.aggregate import unpack_blocks
from rankfold.udfs.store.reader import ArchiveReader

ROWS, WIDTH, RANK = 600, 10, 3
SUB_ROWS, GROUP_ROWS, BATCH_ROWS = 7, 50, 230
SCALE = 10.0 ** np.array([-2, -1, 0, 1, 2, 0, 1, -1, 2, -2])  # column units over five decades
# about twice the noise of each column: codes, and corrections where a cell's slack tips it over
TOLERANCE = {f"c{j}": 0.02 * SCALE[j] for j in range(WIDTH)}

OPTIONS = {
    "cur_with_anchor_rows": {"rank": RANK, "link": "optimal", "row_method": "qdeim"},
    "cur_without_anchor_rows": {"rank": RANK},
    "svd_scores": {"rank": RANK, "method": "svd"},
    "tolerance_with_codes": {"rank": RANK, "max_abs_error": TOLERANCE},
    "tolerance_with_coded_basis": {"rank": RANK, "max_abs_error": TOLERANCE,
                                   "basis_precision": "tolerance"},
    "tolerance_with_corrections_only": {"rank": RANK, "max_abs_error": TOLERANCE,
                                        "residual": "corrections"},
}


def _table(seed: int = 11) -> pa.Table:
    """Near rank 3 plus noise, in the units ``SCALE``, with NULL, NaN, +-inf and 1e8 cells."""
    rng = np.random.default_rng(seed)
    values = rng.normal(size=(ROWS, RANK)) @ rng.normal(size=(RANK, WIDTH))
    values += 0.01 * rng.normal(size=(ROWS, WIDTH))
    values *= SCALE
    nulls = np.zeros((ROWS, WIDTH), bool)
    for special in (np.nan, np.inf, -np.inf, 1e8):
        values[rng.integers(0, ROWS, 6), rng.integers(0, WIDTH, 6)] = special
    nulls[rng.integers(0, ROWS, 6), rng.integers(0, WIDTH, 6)] = True
    return pa.table({f"c{j}": pa.array(values[:, j], mask=nulls[:, j]) for j in range(WIDTH)})


def _truth(table: pa.Table) -> tuple[np.ndarray, np.ndarray]:
    nulls = np.column_stack([c.is_null().to_numpy(zero_copy_only=False) for c in table.columns])
    values = np.column_stack([c.fill_null(0.0).to_numpy(zero_copy_only=False) for c in table.columns])
    return np.where(nulls, np.nan, values), nulls


def _compress(tmp_path, monkeypatch, options: dict, sub_rows: int | None, name: str) -> rankfold.Archive:
    monkeypatch.setattr(layout, "ROW_GROUP_ROWS", GROUP_ROWS)
    monkeypatch.setattr(compress_module, "encode_pass",
                        functools.partial(encode_module.encode_pass, sub_rows=sub_rows))
    return rankfold.compress(_table(), tmp_path / name, batch_rows=BATCH_ROWS, seed=3, **options)


def _same_table(a: pa.Table, b: pa.Table) -> bool:
    """Equal schemas, NULLs and values, NaN equal to NaN (Arrow's ``equals`` treats NaN as
    different from itself)."""
    if a.schema != b.schema:
        return False
    for x, y in zip(a.columns, b.columns):
        if not np.array_equal(x.is_null().to_numpy(zero_copy_only=False),
                              y.is_null().to_numpy(zero_copy_only=False)):
            return False
        if pa.types.is_floating(x.type):
            same = np.array_equal(x.to_numpy(zero_copy_only=False), y.to_numpy(zero_copy_only=False),
                                  equal_nan=True)
        else:
            same = x.equals(y)
        if not same:
            return False
    return True


def _row_files(archive: rankfold.Archive) -> list:
    return sorted(archive.path.glob("rows-*.parquet"))


def _read_rows(archive: rankfold.Archive, file) -> pa.Table:
    """A row file as stored, codes in the per-column view (packed ones unpacked:
    ``FittedModel.unpack_codes``)."""
    return ArchiveReader(archive.path).model.unpack_codes(pq.read_table(file))


def _overridden(archive: rankfold.Archive) -> np.ndarray:
    """Cells stored exactly, from the archive's files: basis columns stored under their own
    name in the row files (not as codes), anchor rows, cells.parquet, and NULL cells stored
    as NULL residual codes in the row files."""
    names = archive.numeric_columns
    stored = set(pq.read_schema(_row_files(archive)[0]).names)
    kept = np.zeros(archive.shape, bool)
    kept[:, [names.index(c) for c in archive.basis_columns if c in stored]] = True
    kept[archive.anchor_rows, :] = True
    cells = pq.read_table(archive.path / "cells.parquet")
    kept[cells.column(layout.ROW_ID).to_numpy(), cells.column(layout.COLUMN_ID).to_numpy()] = True
    prefix = layout.CODE_PATTERN.format("")
    for file in _row_files(archive):
        rows = _read_rows(archive, file)
        ids = rows.column(layout.ROW_ID).to_numpy()
        for name in rows.column_names:
            if name.startswith(prefix) and rows.column(name).null_count:
                null = rows.column(name).is_null().to_numpy(zero_copy_only=False)
                kept[ids[null], int(name[len(prefix):])] = True
    return kept


@pytest.fixture(params=sorted(OPTIONS))
def archives(request, tmp_path, monkeypatch):
    options = OPTIONS[request.param]
    small = _compress(tmp_path, monkeypatch, options, SUB_ROWS, "small.rankfold")
    whole = _compress(tmp_path, monkeypatch, options, 1 << 30, "whole.rankfold")
    return small, whole


def test_every_cell_within_its_bound(archives):
    archive, _ = archives
    truth, nulls = _truth(_table())
    values, bounds = archive.to_numpy(), archive.cell_bounds()
    finite = np.isfinite(truth)
    with np.errstate(invalid="ignore"):
        assert not (finite & ~(np.abs(truth - values) <= bounds)).any()
    assert np.array_equal(np.isnan(values), np.isnan(truth))
    assert np.array_equal(values[np.isinf(truth)], truth[np.isinf(truth)])
    assert np.all(bounds[~finite] == 0.0)


def test_column_ledger_is_numpys_residual_statistics(archives):
    archive, _ = archives
    truth, _ = _truth(_table())
    approximated = ~_overridden(archive)
    # non-finite source cells are always stored exactly (the bound contract, DEVELOPERS.md)
    assert np.all(np.isfinite(truth[approximated]))
    with np.errstate(invalid="ignore"):  # inf - inf at cells stored exactly
        # the ledger measures the values as stored (served ones are clamped into the range)
        residual = np.where(approximated, truth - ArchiveReader(archive.path).rebuild(serve=False).values, 0.0)
    ledger = archive.column_ledger()
    cells = approximated.sum(axis=0)
    assert np.array_equal(ledger.column("err_cells").to_numpy(), cells)
    # the reader may sum in another order than the encode pass: they differ by at most the
    # slack, a few units of the last place of the column's values
    scale = np.nanmax(np.where(approximated, np.abs(truth), 0.0), axis=0)
    tiny = 1e-13 * scale
    err_max = ledger.column("err_max").to_numpy()
    assert np.all(err_max >= np.abs(residual).max(axis=0) - tiny)
    # both figures are stored rounded up to 24 significant bits (arithmetic.COLUMN_FIGURE_BITS):
    # above the measured ones by at most 2^-23 of themselves
    np.testing.assert_allclose(err_max, np.abs(residual).max(axis=0), rtol=2.0**-23, atol=tiny.max())
    np.testing.assert_allclose(ledger.column("err_l2").to_numpy(), np.linalg.norm(residual, axis=0),
                               rtol=2.0**-23, atol=(tiny * np.sqrt(cells)).max())
    # err_sum: to 24 significant bits, rounded to nearest (within 2^-24 of itself)
    np.testing.assert_allclose(ledger.column("err_sum").to_numpy(), residual.sum(axis=0),
                               rtol=2.0**-24, atol=(1e-12 * cells * (err_max + tiny)).max())


def _zigzag_decode(stored: np.ndarray) -> np.ndarray:
    """ZigZag decoding as specified for Protocol Buffers varints (protobuf.dev, "Encoding",
    signed integers): n = (u >> 1) ^ -(u & 1)."""
    u = stored.astype(np.int64)
    return (u >> 1) ^ -(u & 1)


def _blocks(archive) -> pa.Table:
    """blocks.parquet with one list column per field (it is written packed: unpack_blocks)."""
    return unpack_blocks(pq.read_table(archive.path / "blocks.parquet"), len(archive.manifest["basis"]),
                         archive.shape[1], "blocks.parquet")


def test_blocks_have_one_record_per_row_group_with_numpy_sums(archives):
    archive, _ = archives
    truth, nulls = _truth(_table())
    overridden = _overridden(archive)
    blocks = _blocks(archive)
    # one record per Parquet row group of the row files, in row order
    groups = [f.metadata.row_group(g).num_rows for f in map(pq.ParquetFile, _row_files(archive))
              for g in range(f.metadata.num_row_groups)]
    assert blocks.column("rows").to_pylist() == groups
    assert blocks.column("first_row").to_pylist() == list(np.cumsum([0] + groups[:-1]))
    assert max(groups) == GROUP_ROWS and len(groups) > ROWS // GROUP_ROWS  # batch ends cut groups
    rows = pa.concat_tables(_read_rows(archive, p) for p in _row_files(archive))
    codes = np.zeros(archive.shape)
    for j in range(WIDTH):
        name = layout.CODE_PATTERN.format(j)
        if name in rows.column_names:
            codes[:, j] = _zigzag_decode(rows.column(name).fill_null(0).to_numpy())  # NULL code: 0
    if ArchiveReader(archive.path).model.row_ledger:
        stored_max = rows.column(layout.ROW_ERR_MAX).to_numpy().astype(np.float64)
    else:  # no row ledger (every column has a tolerance): the row figures from numpy's residual
        assert layout.ROW_ERR_MAX not in rows.column_names
        with np.errstate(invalid="ignore"):
            residual = np.where(~overridden, truth - ArchiveReader(archive.path).rebuild(serve=False).values, 0.0)
        scale = archive.column_ledger().column("ledger_scale").to_numpy()
        stored_max = (np.abs(residual) / scale[None, :]).max(axis=1)
    ov_cells = np.stack(blocks.column("ov_cells").to_numpy(zero_copy_only=False))
    ov_nulls = np.stack(blocks.column("ov_nulls").to_numpy(zero_copy_only=False))
    q_sum = np.stack(blocks.column("q_sum").to_numpy(zero_copy_only=False))
    q_sq = np.stack(blocks.column("q_sq").to_numpy(zero_copy_only=False))
    rowmax_sum = blocks.column("rowmax_sum").to_numpy()
    for g, (first, count) in enumerate(zip(blocks.column("first_row").to_pylist(), groups)):
        part = slice(first, first + count)
        assert np.array_equal(ov_cells[g], overridden[part].sum(axis=0))
        assert np.array_equal(ov_nulls[g], (overridden & nulls)[part].sum(axis=0))
        # integer codes: sums below 2^53 are exact in float64, in any order
        assert np.array_equal(q_sum[g], codes[part].sum(axis=0))
        np.testing.assert_allclose(q_sq[g], (codes[part] ** 2).sum(axis=0), rtol=1e-15)
        # stored row figures are the float64 figures rounded up to 4 or 8 mantissa bits (or,
        # without a row ledger, numpy's figures: equal up to the reader's order of summation)
        assert rowmax_sum[g] <= stored_max[part].sum() * (1 + 1e-12) + 1e-12
        assert stored_max[part].sum() <= rowmax_sum[g] * (1 + 2.0**-3) * (1 + 1e-12) + 1e-12


def test_sub_blocks_change_only_the_summation_order(archives):
    small, whole = archives
    assert [p.name for p in _row_files(small)] == [p.name for p in _row_files(whole)]
    for a, b in zip(_row_files(small), _row_files(whole)):
        assert _same_table(pq.read_table(a), pq.read_table(b))
        meta_a, meta_b = pq.ParquetFile(a).metadata, pq.ParquetFile(b).metadata
        assert ([meta_a.row_group(g).num_rows for g in range(meta_a.num_row_groups)]
                == [meta_b.row_group(g).num_rows for g in range(meta_b.num_row_groups)])
    assert _same_table(pq.read_table(small.path / "cells.parquet"), pq.read_table(whole.path / "cells.parquet"))
    la, lb = small.column_ledger(), whole.column_ledger()
    assert np.array_equal(la.column("err_cells").to_numpy(), lb.column("err_cells").to_numpy())
    for name in ("err_max", "err_l2"):  # 24 significant bits each, rounded up: one step apart at most
        np.testing.assert_allclose(la.column(name).to_numpy(), lb.column(name).to_numpy(), rtol=2.0**-23)
    cells, err_max = lb.column("err_cells").to_numpy(), lb.column("err_max").to_numpy()
    np.testing.assert_allclose(la.column("err_sum").to_numpy(), lb.column("err_sum").to_numpy(),  # 24 bits each
                               rtol=2.0**-23, atol=(1e-13 * cells * err_max).max())
    ba, bb = _blocks(small), _blocks(whole)
    assert ba.column_names == bb.column_names
    stack = (lambda t, n: np.stack(t.column(n).to_numpy(zero_copy_only=False)))
    for name in ("first_row", "rows", "ov_cells", "ov_nulls"):
        assert ba.column(name).equals(bb.column(name))
    # signed sums are compared at the scale of the matching sums of absolute values
    scale_of = {"f_sum": "f_abs", "d_sum": "f_abs", "gram": "gram_abs", "q_sum": "q_abs",
                "ov_corr": "ov_abs"}
    shift = np.abs(np.array([b["fill"] for b in small.manifest["basis"]], dtype=np.float64))  # the basis fills
    for name in ("f_sum", "f_abs", "d_sum", "gram", "gram_abs", "q_sum", "q_abs", "q_sq",
                 "ov_corr", "ov_abs", "ov_sq"):
        a, b = stack(ba, name), stack(bb, name)
        scale = np.abs(b) if name not in scale_of else stack(bb, scale_of[name])
        if name == "d_sum":  # sum of f - shift: at most sum |f| + rows |shift|
            scale = scale + bb.column("rows").to_numpy()[:, None] * shift[None, :]
        finite = np.isfinite(b)
        assert np.array_equal(finite, np.isfinite(a)), name
        assert np.all(np.abs(a[finite] - b[finite]) <= 1e-12 * scale[finite] + 1e-300), name
    np.testing.assert_allclose(ba.column("rowmax_sum").to_numpy(), bb.column("rowmax_sum").to_numpy(),
                               rtol=1e-12)
