"""The fitted model (udfs/store/model.py): one encoder and one decoder of the archive's
columns and anchors tables, and the declared table schemas (udfs/store/table_schemas.py)."""

from __future__ import annotations

import dataclasses

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pytest

import rankfold
from rankfold.udfs.store import layout
from rankfold.udfs.store.integrity import read_small_table
from rankfold.udfs.store.manifest_schema import holds_table
from rankfold.udfs.store.model import FittedModel, mixing_for_columns
from rankfold.udfs.store.reader import ArchiveReader
from rankfold.udfs.store.table_schemas import packed_columns_schema


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
    stored = read_small_table(path, m, layout.table_file(m, layout.COLUMNS))
    # packed numbers: NaN marks a tolerance without residual codes (numpy's equality of NaN)
    assert tables[layout.COLUMNS].drop_columns(["numbers"]).equals(stored.drop_columns(["numbers"]))
    np.testing.assert_array_equal(pc.list_flatten(tables[layout.COLUMNS].column("numbers")).to_numpy(zero_copy_only=False),
                                  pc.list_flatten(stored.column("numbers")).to_numpy(zero_copy_only=False))
    assert pc.list_flatten(stored.column("numbers")).is_null().equals(
        pc.list_flatten(tables[layout.COLUMNS].column("numbers")).is_null())
    if holds_table(m, layout.ANCHORS):  # written only when it holds anchor rows
        assert tables[layout.ANCHORS].equals(read_small_table(path, m, layout.table_file(m, layout.ANCHORS)))
    else:
        assert tables[layout.ANCHORS].num_rows == 0 and not m["anchors"]
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
        FittedModel.from_tables(reader.manifest, narrowed, reader.model.to_tables()[layout.ANCHORS])
    dropped = columns.drop_columns(["err_sum"])
    with pytest.raises(rankfold.CorruptArchiveError, match=r"lacks \['err_sum'\]"):
        FittedModel.from_tables(reader.manifest, dropped, reader.model.to_tables()[layout.ANCHORS])


def test_the_encoder_refuses_to_write_a_table_without_its_statistics(tmp_path):
    path = tmp_path / "a"
    rankfold.compress(_table(), path, rank=2, seed=0)
    model = ArchiveReader(path).model
    partial = {k: v for k, v in model.statistics.items() if k != "err_l2"}
    with pytest.raises(rankfold.CorruptArchiveError, match=r"about to write columns.parquet .*lacks \['err_l2'\]"):
        dataclasses.replace(model, statistics=partial).to_tables()
    assert model.to_tables()[layout.COLUMNS].schema.equals(packed_columns_schema())


def _rewrite_row_file(path, change):
    """Rewrite the first row file with ``change(table)`` and record it in a resealed
    manifest (sizes and digests of the new file), as an editing program could."""
    import json

    import pyarrow.parquet as pq

    from rankfold.udfs.store.manifest import file_entry, write_manifest

    manifest = json.loads((path / "manifest.json").read_text())
    name = manifest["row_parts"][0]["name"]
    pq.write_table(change(pq.read_table(path / name)), path / name, write_page_checksum=True)
    entry = file_entry(path, name, [layout.ROW_ID] + list(manifest.get("exact_columns", [])))
    manifest["files"] = [entry if f["name"] == name else f for f in manifest["files"]]
    write_manifest(path, manifest)


def _cast_row_file_column(path, name: str, to: pa.DataType) -> None:
    """Rewrite the first row file with its column ``name`` cast to ``to`` (``_rewrite_row_file``)."""
    def cast(table):
        i = table.schema.get_field_index(name)
        return table.set_column(i, name, table.column(i).cast(to))

    _rewrite_row_file(path, cast)


def test_a_row_file_with_another_reserved_type_is_refused(tmp_path):
    # the row ledger is float32 by the format (arithmetic.round_up_compact): a float64 one,
    # though its values are the same, is not a file this format wrote (a fixed rank: no
    # tolerance, so the row files carry the row ledger)
    path = tmp_path / "a"
    rankfold.compress(_table(), path, key="id", rank=2, seed=0)
    assert ArchiveReader(path).model.row_ledger  # reads before the edit

    _cast_row_file_column(path, layout.ROW_ERR_L2, pa.float64())
    with pytest.raises(rankfold.CorruptArchiveError,
                       match=r"rows-00000.parquet stores '_rf_err_l2' as double, where the format declares float"):
        ArchiveReader(path)


@pytest.fixture()
def one_column_per_code(monkeypatch):
    """Compress writes one column per residual code (the layout these tests edit), whatever
    the packing trial (``code_layout.choose_packing``) would choose for the small table."""
    from rankfold.udfs.passes import compress as compress_module

    monkeypatch.setattr(compress_module, "code_packing", lambda *args, **kwargs: None)


def test_a_row_file_without_its_residual_codes_is_refused(tmp_path, one_column_per_code):
    path = tmp_path / "a"
    rankfold.compress(_table(), path, key="id", max_abs_error=0.05, seed=0)
    codes = [n for n in ArchiveReader(path).model.row_file_reserved() if n.startswith("_rf_q_")]
    assert codes  # a tolerance this tight codes the residuals of the derived columns
    _rewrite_row_file(path, lambda table: table.drop_columns([codes[0]]))
    with pytest.raises(rankfold.CorruptArchiveError, match=f"lacks the column '{codes[0]}' the manifest implies"):
        ArchiveReader(path)


def test_the_row_writer_check_names_a_defect():
    from rankfold.udfs.store.table_schemas import check_row_schema

    schema = pa.schema([(layout.ROW_ID, pa.int64()), (layout.ROW_ERR_MAX, pa.float64())])
    with pytest.raises(rankfold.CorruptArchiveError, match=r"about to write a row file that stores "
                                                           r"'_rf_err_max' as double.*defect of rankfold"):
        check_row_schema(schema, {layout.ROW_ID: pa.int64(), layout.ROW_ERR_MAX: pa.float32()},
                         "rows from 0 on", writing=True)


def test_report_reads_a_quantized_basis_through_the_model(tmp_path):
    # basis columns stored as integer codes (_rf_basis_<k>) are decoded by the model, so the
    # report's leverage scores exist for them too; rank-k leverage scores sum to k (the
    # squared row norms of k orthonormal columns; Mahoney and Drineas, PNAS 106(3), 2009)
    from rankfold.report import column_selection

    rng = np.random.default_rng(0)  # invented data: rank 3 plus a little noise
    x = rng.normal(size=(2000, 3)) @ rng.normal(size=(3, 10)) + 0.001 * rng.normal(size=(2000, 10))
    path = tmp_path / "a"
    rankfold.compress(x, path, max_abs_error=0.01, basis_precision="tolerance", seed=0)
    archive = rankfold.open(path)
    assert any("stored_as" in b for b in archive.manifest["basis"])
    selection = column_selection(archive)
    leverage = np.array([c["leverage"] for c in selection["columns"]])
    assert leverage.sum() == pytest.approx(min(selection["rank"], len(archive.basis_columns)), abs=1e-9)
    assert {c["name"] for c in selection["columns"] if c["basis"]} == set(archive.basis_columns)


@pytest.mark.parametrize("options", [dict(rank=2, link="optimal"), dict(max_abs_error=0.02),
                                     dict(method="svd", max_abs_error=0.05)])
def test_readers_decode_the_model_the_encode_pass_measured_with(tmp_path, monkeypatch, options):
    # the bounds hold only if readers rebuild with the very numbers the encode pass used:
    # the decoded model must equal the encode pass's model bit for bit (common practice for
    # a codec pair: decode(encode(m)) == m)
    import rankfold.udfs.passes.compress as compress_module

    seen = []
    real = compress_module.encode_pass

    def spy(stream, model, *args, **kwargs):
        seen.append(model)
        return real(stream, model, *args, **kwargs)

    monkeypatch.setattr(compress_module, "encode_pass", spy)
    path = tmp_path / "a"
    rankfold.compress(_table(4), path, key="id", seed=2, **options)
    decoded, used = ArchiveReader(path).model, seen[-1]
    for name in ("weights", "offset", "fill", "shift", "scale", "ledger_scale", "tolerance",
                 "residual_step", "basis_step", "anchor_positions", "anchor_values"):
        np.testing.assert_array_equal(getattr(decoded, name), getattr(used, name), err_msg=name)
    assert (decoded.names, decoded.types, decoded.basis_names, decoded.basis_stored) == (
        used.names, used.types, used.basis_names, used.basis_stored)
    assert decoded.coding.float32_scores == used.coding.float32_scores


def test_a_manifest_that_moves_a_basis_entry_is_refused(tmp_path):
    import json

    from rankfold.udfs.store.manifest import write_manifest
    from rankfold.udfs.store.manifest_schema import derived_entries

    path = tmp_path / "a"
    rankfold.compress(_table(2), path, max_abs_error=0.01, basis_precision="tolerance", seed=0, n_columns=2)
    manifest = json.loads((path / "manifest.json").read_text())
    derived_entries(manifest)  # the basis is stored by field: one record per entry
    manifest.pop("numeric_columns")
    coded = [b for b in manifest["basis"] if "stored_as" in b]
    assert coded  # basis values stored as integer codes in _rf_basis_<k>
    coded[0]["stored_as"] = coded[0]["name"]  # the source column's name: not where codes live
    write_manifest(path, manifest)
    with pytest.raises(rankfold.CorruptArchiveError, match="stores the basis entries in the row-file columns"):
        ArchiveReader(path)


def _narrowest_codes(table: pa.Table) -> pa.Table:
    """Every residual-code column cast to the narrowest unsigned type holding its values."""
    for i, name in enumerate(table.column_names):
        if name.startswith(layout.CODE_PATTERN.format("")):
            top = int(pa.compute.max(table.column(i)).as_py() or 0)
            kind = pa.uint8() if top < 2**8 else pa.uint16() if top < 2**16 else pa.uint32()
            table = table.set_column(i, name, table.column(i).cast(kind))
    return table


def _served(path) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    from rankfold.sql_view import query

    arch = rankfold.open(path)
    names = arch.numeric_columns
    sql = query(arch, "SELECT " + ", ".join(f'"{n}"' for n in names) + " FROM archive ORDER BY id")
    return (arch.to_numpy(), arch.cell_bounds(),
            np.column_stack([sql.column(n).to_numpy(zero_copy_only=False) for n in names]).astype(float))


def test_residual_codes_of_every_unsigned_width_read_alike_in_numpy_and_sql(tmp_path, one_column_per_code):
    # zigzag codes (common practice) hold the same integers in uint8, uint16 and uint32; the
    # numpy decoder and the SQL text (layout.code_sql) must give the same values from each
    path = tmp_path / "a"
    rankfold.compress(_table(), path, key="id", max_abs_error=0.05, seed=0)
    values, bounds, sql = _served(path)
    np.testing.assert_allclose(sql, values, rtol=1e-12, atol=1e-12)  # numpy and SQL agree
    _rewrite_row_file(path, _narrowest_codes)
    import pyarrow.parquet as pq

    name = ArchiveReader(path).manifest["row_parts"][0]["name"]
    kinds = {f.type for f in pq.read_schema(path / name) if f.name.startswith("_rf_q_")}
    assert pa.uint8() in kinds or pa.uint16() in kinds  # the edit did narrow them
    after_values, after_bounds, after_sql = _served(path)
    np.testing.assert_array_equal(after_values, values)
    np.testing.assert_array_equal(after_bounds, bounds)
    np.testing.assert_array_equal(after_sql, sql)


def test_residual_codes_wider_than_32_bits_are_refused(tmp_path, one_column_per_code):
    path = tmp_path / "a"
    rankfold.compress(_table(), path, key="id", max_abs_error=0.05, seed=0)
    codes = [n for n in ArchiveReader(path).model.row_file_reserved() if n.startswith("_rf_q_")]
    _cast_row_file_column(path, codes[0], pa.uint64())
    with pytest.raises(rankfold.CorruptArchiveError,
                       match=f"stores '{codes[0]}' as uint64, where the format declares uint8 or uint16 or uint32"):
        ArchiveReader(path)


def test_an_append_writes_the_archives_code_types_and_keeps_every_bound(tmp_path, one_column_per_code):
    # codes narrowed to uint8 by an edit: an append must write uint8 too (DuckDB reads all row
    # files with the first one's types), storing a code that uint8 cannot hold as an exact cell
    import pyarrow.parquet as pq

    path = tmp_path / "a"
    rankfold.compress(_table(), path, key="id", max_abs_error=0.05, seed=0)

    def to_uint8(table):
        table = _narrowest_codes(table)
        for i, name in enumerate(table.column_names):
            if name.startswith("_rf_q_"):
                assert table.schema.field(i).type == pa.uint8()  # the residuals here are small
        return table

    _rewrite_row_file(path, to_uint8)
    more = _table(seed=1, rows=300)
    x = np.column_stack([more.column(f"c{j}").to_numpy() for j in range(8)])
    coded = [int(n.removeprefix("_rf_q_")) for n in ArchiveReader(path).model.row_file_reserved()
             if n.startswith("_rf_q_")]
    x[::7, coded[0]] += 100.0  # invented shifts: codes near 1000, beyond uint8
    more = pa.table({**{f"c{j}": x[:, j] for j in range(8)}, "id": np.arange(400, 700)})
    appended = rankfold.open(path).append(more)
    new_file = appended.manifest["row_parts"][-1]["name"]
    kinds = {f.type for f in pq.read_schema(path / new_file) if f.name.startswith("_rf_q_")}
    assert kinds == {pa.uint8()}
    assert appended.manifest["errors"]["cells_stored_exactly_outside_factors"] >= 300 // 7  # the shifted cells
    values, bounds, sql = _served(path)
    truth = np.vstack([np.column_stack([_table().column(f"c{j}").to_numpy() for j in range(8)]), x])
    assert np.all(np.abs(values - truth) <= bounds)
    assert np.all(np.abs(values - truth) <= 0.05)
    np.testing.assert_allclose(sql, values, rtol=1e-12, atol=1e-12)
