"""The fitted model (udfs/store/model.py): one encoder and one decoder of the archive's
columns and anchors tables, and the declared table schemas (udfs/store/table_schemas.py)."""

from __future__ import annotations

import dataclasses

import numpy as np
import pyarrow as pa
import pytest

import rankfold
from rankfold.udfs.store import layout
from rankfold.udfs.store.integrity import read_small_table
from rankfold.udfs.store.model import FittedModel, mixing_for_columns
from rankfold.udfs.store.reader import ArchiveReader
from rankfold.udfs.store.table_schemas import COLUMNS_SCHEMA


def _table(seed: int = 0, rows: int = 400) -> pa.Table:
    # invented low-rank data (seeded): 3 factors, 8 columns, a little noise
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(rows, 3)) @ rng.normal(size=(3, 8)) + 0.01 * rng.normal(size=(rows, 8))
    columns = {f"c{j}": x[:, j] for j in range(8)}
    columns["id"] = np.arange(rows)
    return pa.table(columns)


@pytest.mark.parametrize("options", [dict(rank=2, link="optimal"), dict(max_abs_error=0.02),
                                     dict(method="svd", rank=3)])
def test_decoder_and_encoder_are_inverse(tmp_path, options):
    # encode(decode(tables)) == tables, cell for cell (common practice for a codec pair)
    path = tmp_path / "a"
    rankfold.compress(_table(), path, key="id", seed=1, **options)
    reader = ArchiveReader(path)
    tables = reader.model.to_tables()
    m = reader.manifest
    assert tables[layout.COLUMNS].equals(read_small_table(path, m, layout.table_file(m, layout.COLUMNS)))
    assert tables[layout.ANCHORS].equals(read_small_table(path, m, layout.table_file(m, layout.ANCHORS)))
    assert reader.model.basis_entries() == m["basis"]
    again = FittedModel.from_tables(m, tables[layout.COLUMNS], tables[layout.ANCHORS])
    for name in ("weights", "offset", "fill", "ledger_scale", "err_max", "residual_step", "tolerance",
                 "lower", "upper", "anchor_values"):
        np.testing.assert_array_equal(getattr(again, name), getattr(reader.model, name), err_msg=name)
    assert again.basis_stored == reader.model.basis_stored


def test_model_arrays_rebuild_the_stored_values(tmp_path):
    # the rebuild formula on the model's arrays, written out with numpy.matmul as the
    # reference: xhat = offset + basis @ weights (+ code * step), for the approximated cells
    path = tmp_path / "a"
    rankfold.compress(_table(2), path, key="id", max_abs_error=0.05, seed=0)
    reader = ArchiveReader(path)
    model = reader.model
    block = reader.rebuild(rows=slice(0, 100), serve=False)
    basis = reader.basis_block(block.rows)
    expected = model.offset[None, :] + np.matmul(basis, model.weights)
    codes = reader.residual_codes(block.rows, np.arange(model.width))
    if codes is not None:
        expected = expected + codes * np.where(np.isfinite(model.residual_step), model.residual_step, 0.0)
    approximated = ~block.exact & ~block.nulls
    assert approximated.any()
    # both sums of c + 1 terms: they agree to the slack the bound already includes
    np.testing.assert_allclose(block.values[approximated], expected[approximated], rtol=0, atol=1e-12)


def test_raw_unit_mixing_matches_the_transformed_fit():
    # Z ~ Z[:, J] M in transformed units, rebuilt in raw units by offset + X[:, J] W: the
    # same numbers up to rounding (numpy reference computation of both sides)
    rng = np.random.default_rng(3)
    x = rng.normal(size=(50, 6)) * np.array([1, 10, 0.1, 5, 2, 3]) + np.arange(6)

    class Affine:  # shift and scale of the transform z = (x - shift) / scale
        shift = x.mean(axis=0)
        scale = x.std(axis=0)

    z = (x - Affine.shift) / Affine.scale
    basis = np.array([1, 4])
    m, *_ = np.linalg.lstsq(z[:, basis], z, rcond=None)
    mixing = mixing_for_columns(basis, m, Affine)
    raw = mixing.offset[None, :] + x[:, basis] @ mixing.weights
    transformed = Affine.shift + Affine.scale * (z[:, basis] @ m)
    np.testing.assert_allclose(raw, transformed, rtol=1e-12, atol=1e-9)
    np.testing.assert_array_equal(raw[:, basis], x[:, basis])  # basis columns: identity


def test_a_columns_table_of_another_schema_is_refused(tmp_path):
    path = tmp_path / "a"
    rankfold.compress(_table(), path, rank=2, seed=0)
    reader = ArchiveReader(path)
    columns = reader.columns_table
    narrowed = columns.set_column(columns.schema.get_field_index("err_max"), "err_max",
                                  columns.column("err_max").cast(pa.float32()))
    with pytest.raises(rankfold.CorruptArchiveError, match=r"columns.parquet does not have the declared "
                                                           r"table schema \(types \['err_max: float'\]\)"):
        FittedModel.from_tables(reader.manifest, narrowed, read_small_table(
            path, reader.manifest, layout.ANCHORS))
    dropped = columns.drop_columns(["err_sum"])
    with pytest.raises(rankfold.CorruptArchiveError, match=r"lacks \['err_sum'\]"):
        FittedModel.from_tables(reader.manifest, dropped, read_small_table(path, reader.manifest, layout.ANCHORS))


def test_the_encoder_refuses_to_write_a_table_without_its_statistics(tmp_path):
    path = tmp_path / "a"
    rankfold.compress(_table(), path, rank=2, seed=0)
    model = ArchiveReader(path).model
    partial = {k: v for k, v in model.statistics.items() if k != "err_l2"}
    with pytest.raises(rankfold.CorruptArchiveError, match=r"about to write columns.parquet .*lacks \['err_l2'\]"):
        dataclasses.replace(model, statistics=partial).to_tables()
    assert model.to_tables()[layout.COLUMNS].schema.equals(COLUMNS_SCHEMA)
