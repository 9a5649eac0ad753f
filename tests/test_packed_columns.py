"""The columns table stored packed (``table_schemas.pack_columns_table``), read in both forms.

Every number of a column is stored in one float64 list; ``position`` and, where derived,
``rel_rms`` and ``residual_step`` are left out. The decoder gives back what the table of one
field per number (archives written before) gives: checked here field for field, for the
model, for SQL's ``rankfold_column_errors`` and for an archive rewritten in the older form.
"""

from __future__ import annotations

import json

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import rankfold
import rankfold.udfs
from rankfold.udfs.passes.commit import write_small_table
from rankfold.udfs.store import layout
from rankfold.udfs.store.manifest import file_entry, write_manifest
from rankfold.udfs.store.model import STATISTICS, FittedModel
from rankfold.udfs.store.reader import ArchiveReader
from rankfold.udfs.store.table_schemas import (
    COLUMNS_SCHEMA,
    PACKED_NUMBERS,
    check_schema,
    _filled,
    columns_schema,
    is_packed,
    pack_columns_table,
    relative_rms,
    unpack_columns_table,
)


def _low_rank(rows: int, cols: int, seed: int) -> np.ndarray:
    # invented data (seeded): rank 3 plus a little noise
    rng = np.random.default_rng(seed)
    return rng.normal(size=(rows, 3)) @ rng.normal(size=(3, cols)) + 0.01 * rng.normal(size=(rows, cols))


def _table(x: np.ndarray) -> pa.Table:
    return pa.table({f"x{j}": x[:, j] for j in range(x.shape[1])})


def _cells(table: pa.Table) -> dict[str, list]:
    """Every field as a list, NaN spelled out (NaN != NaN in Arrow's and Python's equality)."""
    def one(v):
        if isinstance(v, list):
            return [one(e) for e in v]
        return "NaN" if isinstance(v, float) and np.isnan(v) else v
    return {name: one(table.column(name).to_pylist()) for name in table.column_names}


# -- the packer and the unpacker are inverse -----------------------------------------------------
_float = st.one_of(st.none(), st.just(float("nan")), st.floats(-1e6, 1e6, allow_nan=False),
                   st.floats(allow_nan=False))


@st.composite
def wide_tables(draw):
    """Columns tables of one field per number, as ``FittedModel.to_tables`` builds them before
    packing: any widths (0 columns, 0 basis entries included), NULL transform fields and
    tolerances, NaN statistics, residual steps equal to twice the tolerance or not."""
    n = draw(st.integers(0, 5))
    c = draw(st.integers(0, 3))
    data = {"name": [f"c{j}" for j in range(n)], "position": list(range(n)),
            "type": [draw(st.sampled_from(["double", "int64", "float"])) for _ in range(n)],
            "role": [draw(st.sampled_from(["basis", "derived"])) for _ in range(n)],
            "weights": [[draw(st.floats(allow_nan=False)) for _ in range(c)] for _ in range(n)]}
    for name in ("valid", "nulls", "nans", "infinities", "err_cells"):
        data[name] = [draw(st.integers(0, 2**40)) for _ in range(n)]
    for name in ("shift", "scale", "ledger_scale", "offset", "mean", "std", "min", "max",
                 "err_max", "err_l2", "err_sum"):
        data[name] = [draw(_float) for _ in range(n)]
    ratio = draw(st.floats(1e-6, 10.0))  # tolerances of max_std_error: ratio * std, most of them
    data["tolerance"] = [draw(st.one_of(st.none(), st.floats(0, 1e300),
                                        st.just(ratio * data["std"][j] if data["std"][j] is not None else None)))
                         for j in range(n)]
    # as written: NULL where not finite (FittedModel.to_tables)
    data["tolerance"] = [t if t is not None and np.isfinite(t) else None for t in data["tolerance"]]
    steps, rel = [], []
    for j in range(n):
        tol = data["tolerance"][j]
        kind = draw(st.sampled_from(["twice", "none", "other"]))
        steps.append(2.0 * tol if kind == "twice" and tol is not None and np.isfinite(2.0 * tol)
                     else None if kind != "other" else draw(st.floats(1e-9, 1e9)))
        derived = relative_rms(np.array([data["err_l2"][j] if data["err_l2"][j] is not None else np.nan]),
                               np.array([data["err_cells"][j]]),
                               np.array([data["std"][j] if data["std"][j] is not None else np.nan]))[0]
        rel.append(float(derived) if draw(st.booleans()) else draw(st.floats(allow_nan=True)))
    data["residual_step"], data["rel_rms"] = steps, rel
    return pa.table({f.name: pa.array(data[f.name], f.type) for f in COLUMNS_SCHEMA}, schema=COLUMNS_SCHEMA)


@settings(max_examples=60, deadline=None, derandomize=True)
@given(wide_tables())
def test_unpacking_gives_back_the_table_of_one_field_per_number(wide):
    # decode(encode(table)) == table, field for field and bit for bit (common practice for a codec pair)
    packed = pack_columns_table(wide)
    assert is_packed(packed.schema) and not is_packed(wide.schema)
    assert "position" not in packed.column_names
    back = unpack_columns_table(packed, "columns.parquet")
    check_schema(back.schema, columns_schema(), "columns.parquet")
    # a NULL shift, scale or ledger_scale means "the same as mean / std" (REPEATED): read filled
    assert _cells(back) == _cells(_filled(wide))
    assert np.array_equal(back.column("rel_rms").to_numpy(), wide.column("rel_rms").to_numpy(), equal_nan=True)


def test_derived_fields_are_stored_as_null_and_nothing_else_is(tmp_path):
    wide = pa.table({
        "name": ["a", "b", "c"], "position": [0, 1, 2], "type": ["double"] * 3, "role": ["derived"] * 3,
        "shift": [None, 1.0, None], "scale": [None, 2.0, None], "ledger_scale": [None, None, 3.0],
        "offset": [0.5, 0.25, 0.0], "weights": [[1.0], [2.0], [3.0]],
        "valid": [10, 10, 10], "nulls": [0, 0, 0], "nans": [0, 0, 0], "infinities": [0, 0, 0],
        "mean": [0.0, 1.0, 2.0], "std": [1.0, 2.0, 0.0], "min": [-1.0, -2.0, 2.0], "max": [1.0, 2.0, 2.0],
        "err_max": [0.1, 0.2, 0.0], "err_l2": [0.3, 0.4, 0.0], "err_sum": [0.0, 0.1, 0.0],
        "err_cells": [9, 10, 0], "rel_rms": [0.3 / 3.0 / 1.0, 0.123, float("nan")],
        "tolerance": [0.05, 0.1, None], "residual_step": [0.1, None, None]}, schema=COLUMNS_SCHEMA)
    numbers = pack_columns_table(wide).column("numbers").to_pylist()
    at = PACKED_NUMBERS.index
    # a: step twice the tolerance, rel_rms as relative_rms gives it -> both NULL
    assert numbers[0][at("residual_step")] is None and numbers[0][at("rel_rms")] is None
    # b: a tolerance without residual codes -> NaN; rel_rms of its own -> stored
    assert np.isnan(numbers[1][at("residual_step")]) and numbers[1][at("rel_rms")] == 0.123
    # c: no tolerance, no codes -> NULL; std 0 gives NaN both ways -> NULL
    assert numbers[2][at("residual_step")] is None and numbers[2][at("rel_rms")] is None
    # tolerances 0.05 x std: stored as that ratio, the tolerance itself NULL; no tolerance: both NULL
    assert [row[at("tolerance")] for row in numbers] == [None, None, None]
    assert [row[at("tolerance_over_std")] for row in numbers] == [0.05, 0.05, None]
    assert [row[len(PACKED_NUMBERS):] for row in numbers] == [[1.0], [2.0], [3.0]]
    # and the real writer writes it back as it was
    write_small_table(tmp_path / "c.parquet", pack_columns_table(wide))
    assert _cells(unpack_columns_table(pq.read_table(tmp_path / "c.parquet"), "c")) == _cells(_filled(wide))


def test_a_packed_table_with_lists_of_another_length_is_refused(tmp_path):
    x = _low_rank(200, 6, seed=1)
    archive = rankfold.compress(_table(x), tmp_path / "a", rank=2, seed=0)
    stored = pq.read_table(archive.path / layout.table_file(archive.manifest, layout.COLUMNS))
    rows = stored.column("numbers").to_pylist()
    rows[3] = rows[3][:-1]  # one weight short
    cut = stored.set_column(3, "numbers", pa.array(rows, pa.list_(pa.float64())))
    with pytest.raises(rankfold.CorruptArchiveError, match=r"columns.parquet holds lists of numbers of"):
        unpack_columns_table(cut, tmp_path / "a" / "columns.parquet")
    rows = stored.column("numbers").to_pylist()
    rows[1][0] = None  # a NULL count
    nulled = stored.set_column(3, "numbers", pa.array(rows, pa.list_(pa.float64())))
    with pytest.raises(rankfold.CorruptArchiveError, match=r"NULL count or weight"):
        unpack_columns_table(nulled, "columns.parquet")


# -- archives: the model, SQL and an archive of the older form -------------------------------------
# the last: independent columns, where a tolerance keeps no basis entry (0 weights per column)
OPTIONS = [dict(rank=2), dict(max_abs_error=0.02), dict(max_abs_error=0.02, rank=3), dict(method="svd", rank=3),
           dict(max_abs_error=0.5)]
MODEL_ARRAYS = ("weights", "offset", "fill", "shift", "scale", "ledger_scale", "residual_step", "tolerance",
                "basis_step", "difference", "lower", "upper", "anchor_values")


def _source(seed: int, independent: bool = False) -> tuple[np.ndarray, pa.Table]:
    x = np.random.default_rng(seed).normal(size=(300, 7)) if independent else _low_rank(300, 7, seed)
    x[::7, 4] = np.nan  # NULL cells: NULL statistics and exact cells
    table = _table(x)
    mask = np.isnan(x[:, 4])
    return x, table.set_column(4, "x4", pa.array(np.where(mask, 0, x[:, 4]), mask=mask))


def _assert_same_model(a: FittedModel, b: FittedModel) -> None:
    for name in MODEL_ARRAYS:
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name), err_msg=name)
    for name in STATISTICS:
        np.testing.assert_array_equal(a.statistics[name], b.statistics[name], err_msg=name)
    assert a.names == b.names and a.types == b.types and a.basis_names == b.basis_names


@pytest.mark.parametrize("options", OPTIONS)
def test_both_forms_give_the_same_model_and_sql_gives_python_s_ledger(tmp_path, options):
    independent = options == OPTIONS[-1]
    _, table = _source(2, independent)
    archive = rankfold.compress(table, tmp_path / "a", seed=0, **options)
    reader = ArchiveReader(archive.path)
    m = reader.manifest
    assert len(m["basis"]) == 0 or not independent  # 0 basis entries covered
    stored = pq.read_table(archive.path / layout.table_file(m, layout.COLUMNS))
    assert reader.columns_packed and is_packed(stored.schema)
    anchors = reader.model.to_tables()[layout.ANCHORS]
    wide = unpack_columns_table(stored, "columns.parquet")
    _assert_same_model(FittedModel.from_tables(m, stored, anchors), FittedModel.from_tables(m, wide, anchors))
    _assert_same_model(FittedModel.from_tables(m, stored, anchors), reader.model)
    # rankfold_column_errors unpacks in SQL: the same values, bit for bit, as the reader's table
    con = duckdb.connect()
    rankfold.udfs.register(con)
    sql = con.sql("SELECT * FROM rankfold_column_errors(?) ORDER BY position",
                  params=[str(archive.path)]).to_arrow_table()
    python = reader.columns_table.select(sql.column_names)
    for name in sql.column_names:
        if name == "ledger_scale":  # filled from std where stored once (table_schemas.REPEATED)
            python = python.set_column(python.schema.get_field_index(name), name,
                                       pc.coalesce(python.column(name), python.column("std")))
    assert _cells(sql.cast(python.schema)) == _cells(python)


def test_rel_rms_is_derived_from_the_stored_ledger_and_matches_numpy(tmp_path):
    # rel_rms is relative_rms of the stored err_l2 (an upper limit), err_cells and std, bit for
    # bit, and close to the RMS of the served values' errors over numpy.std (ddof=0); served
    # values are rounded (arithmetic.serve), hence the loose tolerance
    x = _low_rank(400, 6, seed=5)
    archive = rankfold.compress(_table(x), tmp_path / "a", rank=2, seed=0)
    ledger = archive.column_ledger()
    rel = ledger.column("rel_rms").to_numpy()
    np.testing.assert_array_equal(rel, relative_rms(*(ledger.column(n).to_numpy() for n in ("err_l2", "err_cells", "std"))))
    measured = np.sqrt(np.mean((archive.to_numpy() - x) ** 2, axis=0)) / np.std(x, axis=0)
    np.testing.assert_allclose(rel, measured, rtol=1e-2, atol=1e-12)


def test_an_archive_of_one_field_per_number_still_reads_and_appends(tmp_path):
    x, table = _source(3)
    archive = rankfold.compress(table, tmp_path / "old", max_abs_error=0.05, seed=0)
    path = archive.path
    before = ArchiveReader(path)
    values, bounds = archive.to_numpy(), archive.cell_bounds()
    # rewrite columns.parquet in the form written before (one field per number, position stored)
    name = layout.table_file(archive.manifest, layout.COLUMNS)
    stored = pq.read_table(path / name)
    old_rel = before.columns_table.column("rel_rms")  # as written before: its own rel_rms, stored
    wide = unpack_columns_table(stored, name)
    wide = wide.set_column(wide.schema.get_field_index("rel_rms"), "rel_rms", pc.multiply(old_rel, 1.0))
    write_small_table(path / name, wide)
    manifest = json.loads((path / layout.MANIFEST).read_text())
    manifest["files"] = [file_entry(path, name) if f["name"] == name else f for f in manifest["files"]]
    write_manifest(path, {k: v for k, v in manifest.items() if k != "manifest_sha256"})
    old = ArchiveReader(path)
    assert not old.columns_packed
    _assert_same_model(old.model, before.model)
    reopened = rankfold.open(path, checksums=True)
    np.testing.assert_array_equal(reopened.to_numpy(), values)
    np.testing.assert_array_equal(reopened.cell_bounds(), bounds)
    con = duckdb.connect()
    rankfold.udfs.register(con)
    sql = con.sql("SELECT name, residual_step, rel_rms FROM rankfold_column_errors(?) ORDER BY position",
                  params=[str(path)]).to_arrow_table()
    assert _cells(sql) == _cells(before.columns_table.select(["name", "residual_step", "rel_rms"]))
    # an append reads the older form and writes the packed one; every cell within its bound
    more = _low_rank(50, 7, seed=4)
    grown = reopened.append(_table(more))
    assert ArchiveReader(grown.path).columns_packed
    truth = np.vstack([np.where(np.isnan(x), np.nan, x), more])
    got, bound = grown.to_numpy(), grown.cell_bounds()
    finite = np.isfinite(truth)
    assert np.all(np.abs(got[finite] - truth[finite]) <= bound[finite])
    assert np.all(np.isnan(got[~finite]))
