"""The stored forms of the manifest and of the columns table (issue 14, item 3: small fixed
overhead, nothing stored twice): each compact form reads back exactly as it was written, forms
written before still read, and a damaged form is refused.

Outside references: Python's ``json`` (RFC 8259 text) and ``base64`` (RFC 4648) modules,
``struct`` for IEEE 754 binary64 bytes, and ``hashlib.sha256`` for the digests.
"""

from __future__ import annotations

import base64
import copy
import hashlib
import json
import math
import struct

import pyarrow.parquet  # noqa: F401  (pa.parquet)

import numpy as np
import pyarrow as pa
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import rankfold
from rankfold.udfs.store.manifest import DIGEST_FIELD, manifest_digest, read_manifest
from rankfold.udfs.store.manifest_schema import (
    COLUMN_TOLERANCES,
    ERROR_NOTES,
    STORED_OPTION_VALUES,
    derived_entries,
    written_form,
)

# names: awkward text (quotes, backslashes, unicode, digits at the end) and numbered runs
_TEXT = st.text(alphabet=st.characters(blacklist_categories=("Cs",)), min_size=1, max_size=8)
_RUN = st.tuples(st.sampled_from(["data.", "c", "x_", 'q"', "é", "7", ""]), st.integers(0, 120),
                 st.integers(1, 14), st.sampled_from([0, 0, 2, 3]))
_FLOATS = st.floats(allow_nan=False, allow_infinity=False)  # subnormals, -0.0, 1e308 included


def _names(pieces) -> list[str]:
    names: list[str] = []
    for piece in pieces:
        if isinstance(piece, str):
            names.append(piece)
        else:
            prefix, first, count, width = piece
            names.extend(f"{prefix}{k:0{width}d}" for k in range(first, first + count))
    seen: set[str] = set()
    return [n for n in names if not (n in seen or seen.add(n))]  # schema names are unique


def _hex() -> st.SearchStrategy[str]:
    return st.binary(min_size=32, max_size=32).map(lambda b: hashlib.sha256(b).hexdigest())


@settings(max_examples=150, deadline=None, derandomize=True)
@given(st.lists(st.one_of(_TEXT, _RUN), min_size=1, max_size=10), st.lists(_FLOATS, max_size=8),
       st.integers(0, 5), st.lists(_hex(), min_size=1, max_size=3), st.sampled_from([0, 1, 2, "own note"]),
       st.dictionaries(st.sampled_from(sorted(STORED_OPTION_VALUES) + ["new_option"]),
                       st.one_of(st.none(), st.integers(0, 3), st.sampled_from(["auto", "off", "cx"]),
                                 st.just([]), st.booleans())),
       st.booleans(),
       st.lists(st.tuples(_TEXT, _FLOATS, st.one_of(st.none(), st.floats(1e-300, 1e300)),
                          st.one_of(st.none(), st.sampled_from(["_rf_basis_", "_rf_score_"]))), max_size=5))
def test_the_stored_manifest_reads_back_exactly(pieces, spectrum, zeros, digests, note, options, same_figures,
                                                basis):
    names = _names(pieces)
    schema = [{"name": n, "type": "double", "role": "numeric" if k % 3 else "exact"} for k, n in enumerate(names)]
    numeric = [f["name"] for f in schema if f["role"] == "numeric"]
    errors = {"relative_frobenius": 0.125, "largest_error": 1e-300,
              "note": ERROR_NOTES[note] if isinstance(note, int) else note}
    achieved = {"bytes": 10, "relative_frobenius": 0.125 if same_figures else 0.25, "largest_error": 1e-300}
    manifest = {
        "schema": schema, "spectrum": spectrum + [0.0] * zeros, "errors": errors, "achieved": achieved,
        "method": {"kind": "cur", "options": dict(STORED_OPTION_VALUES, **options)},
        "files": [{"name": "rows-00000.parquet", "bytes": 1, "sha256": digests[0], "footer_sha256": digests[-1],
                   "group_sha256": digests, "column_sha256": {"_rf_row": digests[0]}}],
        "targets": {"max_abs_error": {n: 0.1 for n in numeric} or None, "max_std_error": None},
        # basis entries: step and stored_as present or not
        "basis": [{"name": name, "fill": fill, **({"step": step} if step is not None else {}),
                   **({"stored_as": f"{pattern}{k}"} if pattern is not None else {})}
                  for k, (name, fill, step, pattern) in enumerate(basis)],
    }
    stored = json.loads(json.dumps(written_form(manifest), allow_nan=False))  # through text, as on disk
    assert "numeric_columns" not in stored
    # every SHA-256 as 43 characters of base64url (RFC 4648, section 5), the same 32 bytes
    for value in [stored["files"][0]["sha256"], *stored["files"][0]["group_sha256"]]:
        assert len(value) == 43
    assert base64.urlsafe_b64decode(stored["files"][0]["sha256"] + "=").hex() == digests[0]
    # the spectrum's values as IEEE binary64 little-endian bytes (struct '<d'), zeros counted
    kept = base64.b64decode(stored["spectrum"]["float64_le_base64"])
    assert struct.unpack(f"<{len(kept) // 8}d", kept) == tuple(manifest["spectrum"][:len(kept) // 8])
    derived_entries(stored)
    expected = dict(manifest, numeric_columns=numeric)
    assert stored == expected
    # bit for bit: -0.0 and subnormals too (== alone would take -0.0 for 0.0)
    assert [math.copysign(1.0, v) for v in stored["spectrum"]] == [math.copysign(1.0, v) for v in expected["spectrum"]]


def test_a_run_of_numbered_names_is_stored_as_one_entry():
    schema = [{"name": f"data.{k}", "type": "double", "role": "numeric"} for k in range(1, 6831)]
    schema += [{"name": n, "type": "string", "role": "exact"} for n in ("ch007", "ch008", "ch009", "ch9", 'say "hi"')]
    stored = written_form({"schema": schema})["schema"]["names"]
    # zero-padded numbers keep their width; a run needs three names
    assert stored == [["data.", 1, 6830, 0], ["ch", 7, 3, 3], "ch9", 'say "hi"']


def _stored_text(path) -> dict:
    return json.loads((path / "manifest.json").read_text(encoding="utf-8"))


def _reseal(path, body: dict) -> None:
    """Write ``body`` as the stored manifest, sealed with its digest, without ``written_form``
    (as a rankfold of before wrote it)."""
    body = {k: v for k, v in body.items() if k != DIGEST_FIELD}
    (path / "manifest.json").write_text(json.dumps({DIGEST_FIELD: manifest_digest(body), **body}))


def _table(rows: int = 60, cols: int = 8, seed: int = 5) -> pa.Table:
    rng = np.random.default_rng(seed)  # invented data: rank 2 plus noise
    x = rng.standard_normal((rows, 2)) @ rng.standard_normal((2, cols)) + 0.01 * rng.standard_normal((rows, cols))
    return pa.table({f"v{j:02d}": x[:, j] for j in range(cols)})


def test_a_manifest_in_the_older_stored_form_reads_and_appends(tmp_path):
    # the form written before: hex digests, names listed, notes as text, every option, the
    # spectrum as decimal text ({"values", "zeros"}), achieved repeating errors
    table = _table()
    path = tmp_path / "old.rankfold"
    new = rankfold.compress(table.slice(0, 40), path, max_std_error=0.05)
    expected = copy.deepcopy(new.manifest)
    older = {k: v for k, v in copy.deepcopy(expected).items() if k != "numeric_columns"}
    older["schema"] = {"names": [f["name"] for f in expected["schema"]], "types": [["double", 8]],
                       "roles": [["numeric", 8]]}
    older["spectrum"] = {"values": expected["spectrum"][:3], "zeros": len(expected["spectrum"]) - 3}
    # and a footer digest for the small tables too (nothing reads it: they are hashed whole)
    from rankfold.udfs.store.integrity import footer_sha256

    for entry in older["files"]:
        if not entry["name"].startswith("rows-"):
            entry["footer_sha256"] = footer_sha256(path / entry["name"])
    _reseal(path, older)
    stored = _stored_text(path)
    assert len(stored["files"][0]["sha256"]) == 64 and isinstance(stored["errors"]["note"], str)
    assert "others_as_stored_values" not in stored["method"]["options"]
    opened = rankfold.open(path, checksums=True)
    assert opened.manifest["files"] == older["files"] and opened.errors == expected["errors"]
    assert [{k: v for k, v in f.items() if k != "footer_sha256" or f["name"].startswith("rows-")}
            for f in opened.manifest["files"]] == expected["files"]
    assert opened.manifest["method"] == expected["method"] and opened.manifest["achieved"]["relative_frobenius"] \
        == expected["achieved"]["relative_frobenius"]
    assert opened.manifest["spectrum"] == expected["spectrum"][:3] + [0.0] * (len(expected["spectrum"]) - 3)
    np.testing.assert_array_equal(opened.to_numpy(), new.to_numpy())
    # an append rewrites the manifest in the stored form of today
    appended = opened.append(table.slice(40))
    assert appended.shape == (60, 8)
    assert len(_stored_text(path)["files"][0]["sha256"]) == 43
    truth = np.column_stack([c.to_numpy() for c in table.columns])
    assert np.all(np.abs(appended.to_numpy() - truth) <= appended.cell_bounds())


@pytest.mark.parametrize("damage", ["run beyond the width", "digest not canonical", "spectrum not base64",
                                    "unknown note"])
def test_a_damaged_stored_form_is_refused(tmp_path, damage):
    path = tmp_path / "a.rankfold"
    rankfold.compress(_table(), path, rank=2)
    body = _stored_text(path)
    if damage == "run beyond the width":
        body["schema"]["names"] = [["v", 0, 9, 2]]  # nine names for eight types
    elif damage == "digest not canonical":  # the last character carries 2 unused bits: set them
        value = body["files"][0]["sha256"]
        body["files"][0]["sha256"] = value[:-1] + ("B" if value[-1] == "A" else "A")
    elif damage == "spectrum not base64":
        body["spectrum"]["float64_le_base64"] = "not base64!"
    else:
        body["errors"]["note"] = len(ERROR_NOTES)
    _reseal(path, body)  # sealed again: only the stored form's own checks can tell
    if damage == "unknown note":  # a note the reader does not know stays a number: read, not refused
        assert rankfold.open(path).errors["note"] == len(ERROR_NOTES)
        return
    with pytest.raises(rankfold.CorruptArchiveError):
        read_manifest(path)
        rankfold.open(path, checksums=True)


def test_per_column_tolerances_are_stored_once(tmp_path):
    table = _table(cols=40)
    std = np.array([np.std(c.to_numpy()) for c in table.columns])
    asked = {n: float(0.01 * s) for n, s in zip(table.column_names, std)}  # awkward floats
    archive = rankfold.compress(table, tmp_path / "t.rankfold", max_abs_error=asked, max_std_error=None)
    stored = _stored_text(archive.path)
    assert stored["targets"]["max_abs_error"] == COLUMN_TOLERANCES  # not 40 decimals again
    # columns.parquet holds every asked tolerance bit for bit
    assert archive.column_ledger().column("tolerance").to_pylist() == list(asked.values())
    assert "within its column's tolerance" in archive.guarantee
    truth = np.column_stack([c.to_numpy() for c in table.columns])
    assert np.all(np.abs(archive.to_numpy() - truth) <= np.array(list(asked.values())))
    # an integer column is stored within t - 1/2 (served rounded): its target is recorded as asked
    mixed = table.append_column("n", pa.array(np.arange(60, dtype=np.int64) * 3))
    asked_mixed = dict(asked, n=2.0)
    other = rankfold.compress(mixed, tmp_path / "m.rankfold", max_abs_error=asked_mixed, max_std_error=None)
    assert _stored_text(other.path)["targets"]["max_abs_error"] == list(asked_mixed.values())
    assert other.manifest["targets"]["max_abs_error"] == asked_mixed


# -- the column figures err_max and err_l2: 24 significant bits, rounded up -------------------------
@settings(max_examples=300, deadline=None, derandomize=True)
@given(st.lists(st.floats(min_value=0.0, max_value=1e300), min_size=1, max_size=20))
def test_column_figures_are_rounded_up_to_24_significant_bits(values):
    from fractions import Fraction

    from rankfold.udfs.store.arithmetic import round_up, round_up_short

    x = np.array(values)
    short, up = round_up_short(x), round_up(x)
    assert short.dtype == np.float64 and np.all(np.isfinite(short))  # no narrowing to float32
    assert np.all((short == 0) == (x == 0))
    # (exact rational comparisons: Python's fractions module)
    for s_, u, v in zip(short.tolist(), up.tolist(), values):
        assert Fraction(s_) >= Fraction(u) >= Fraction(v)  # never below the figure
        assert Fraction(s_) <= Fraction(u) * (1 + Fraction(1, 2**23))  # at most 2^-23 above it
    # on the 24-bit grid, where float64 can hold that (not below the normal range)
    mantissa, _ = np.frexp(short[up >= 2.0**-1000])
    assert np.all(mantissa * 2.0**24 == np.floor(mantissa * 2.0**24))


def test_a_column_figure_next_to_the_largest_float_stays_finite():
    from rankfold.udfs.store.arithmetic import round_up, round_up_short

    x = np.array([1.7976931e308, 5e-324, 0.0])  # ceil to 24 bits would overflow; a subnormal
    short = round_up_short(x)
    assert np.all(short >= x) and np.array_equal(short[:2], round_up(x)[:2]) and short[2] == 0.0


# -- the columns table stored by field ------------------------------------------------------------
from rankfold.udfs.passes.commit import _small_table_bytes, write_small_table  # noqa: E402
from rankfold.udfs.store import layout  # noqa: E402
from rankfold.udfs.store.manifest import file_entry, write_manifest  # noqa: E402
from rankfold.udfs.store.reader import ArchiveReader  # noqa: E402
from rankfold.udfs.store.table_schemas import (  # noqa: E402
    COLUMNS_SCHEMA,
    by_field_columns_table,
    is_by_field,
    pack_columns_table,
    unpack_columns_table,
)

_STAT = st.one_of(st.none(), st.just(float("nan")), st.floats(allow_nan=False),
                  st.floats(1e-300, 1e-290), st.just(0.1 + 0.2))


@st.composite
def _columns_tables(draw):
    """Columns tables of one field per number, as ``FittedModel.to_tables`` builds them: 0 and
    1 columns included, NULL statistics, tolerances that are awkward floats (a common ratio to
    std, their own, or none), residual steps twice the tolerance or not."""
    n = draw(st.sampled_from([0, 1, 1, 2, 5, 9]))
    c = draw(st.integers(0, 3))
    data = {"name": [f"c{j}" for j in range(n)], "position": list(range(n)),
            "type": ["double"] * n, "role": [draw(st.sampled_from(["basis", "derived"])) for _ in range(n)],
            "weights": [[draw(st.floats(allow_nan=False)) for _ in range(c)] for _ in range(n)]}
    for name in ("valid", "nulls", "nans", "infinities", "err_cells"):
        data[name] = [draw(st.integers(0, 2**53)) for _ in range(n)]
    for name in ("shift", "scale", "ledger_scale", "offset", "mean", "std", "min", "max",
                 "err_max", "err_l2", "err_sum", "rel_rms"):
        data[name] = [draw(_STAT) for _ in range(n)]
    ratio = draw(st.floats(1e-9, 10.0))
    tolerance = []
    for j in range(n):
        std = data["std"][j]
        t = draw(st.one_of(st.none(), st.floats(0, 1e300), st.just(ratio * std if std is not None else None)))
        tolerance.append(t if t is not None and math.isfinite(t) else None)
    data["tolerance"] = tolerance
    data["residual_step"] = [2.0 * t if t is not None and draw(st.booleans()) and math.isfinite(2.0 * t)
                             else draw(st.one_of(st.none(), st.floats(1e-9, 1e9))) for t in tolerance]
    return pa.table({f.name: pa.array(data[f.name], f.type) for f in COLUMNS_SCHEMA}, schema=COLUMNS_SCHEMA)


def _spelled(table: pa.Table) -> dict[str, list]:
    """Every field as a list, NaN spelled out and floats as their bits (-0.0 is not 0.0)."""
    def one(v):
        if isinstance(v, list):
            return [one(e) for e in v]
        return struct.pack("<d", v).hex() if isinstance(v, float) else v
    return {name: one(table.column(name).to_pylist()) for name in table.column_names}


@settings(max_examples=60, deadline=None, derandomize=True)
@given(_columns_tables())
def test_the_columns_table_by_field_reads_back_bit_for_bit(wide):
    packed = pack_columns_table(wide)
    by_field = by_field_columns_table(packed)
    assert is_by_field(by_field.schema) and not is_by_field(packed.schema)
    # through Parquet bytes, without the Arrow schema as the archive's writer stores them
    # (pyarrow.parquet writes and reads them; the writer's setting trial: the archive tests below)
    sink = pa.BufferOutputStream()
    pa.parquet.write_table(by_field, sink, store_schema=False, column_encoding={
        f: "BYTE_STREAM_SPLIT" for f in by_field.column_names if pa.types.is_floating(by_field.schema.field(f).type)},
        use_dictionary=False)
    stored = pa.parquet.read_table(pa.BufferReader(sink.getvalue()))
    assert _spelled(unpack_columns_table(stored, "columns.parquet")) == _spelled(
        unpack_columns_table(packed, "columns.parquet"))
    # an entry NULL in every row is left out (its field absent), the others kept
    assert all(by_field.column(f).null_count < by_field.num_rows for f in by_field.column_names) or wide.num_rows == 0


def _by_field_archive(tmp_path, options) -> tuple:
    rng = np.random.default_rng(8)  # invented data: rank 2 plus noise, NULL cells in one column
    x = rng.standard_normal((200, 2)) @ rng.standard_normal((2, 7)) + 0.01 * rng.standard_normal((200, 7))
    x[::9, 3] = np.nan
    table = pa.table({f"x{j}": pa.array(x[:, j], mask=np.isnan(x[:, j])) for j in range(7)})
    archive = rankfold.compress(table, tmp_path / "a.rankfold", seed=0, **options)
    before = ArchiveReader(archive.path)
    name = layout.table_file(archive.manifest, layout.COLUMNS)
    packed = pa.parquet.read_table(archive.path / name)
    assert not is_by_field(packed.schema)  # 7 columns: the packed form is the smaller
    (archive.path / name).write_bytes(_small_table_bytes(by_field_columns_table(packed)))
    manifest = json.loads((archive.path / layout.MANIFEST).read_text())
    derived_entries(manifest)
    manifest["files"] = [file_entry(archive.path, name) if f["name"] == name else f for f in manifest["files"]]
    write_manifest(archive.path, {k: v for k, v in manifest.items() if k not in (DIGEST_FIELD, "numeric_columns")})
    return x, table, archive, before


@pytest.mark.parametrize("options", [dict(rank=2), dict(max_abs_error=0.02), dict(method="svd", rank=2)])
def test_sql_column_errors_of_a_by_field_table_equal_python_s(tmp_path, options):
    import duckdb
    import pyarrow.compute as pc

    import rankfold.udfs

    x, table, archive, before = _by_field_archive(tmp_path, options)
    reader = ArchiveReader(archive.path)
    assert is_by_field(pa.parquet.read_schema(archive.path / layout.table_file(reader.manifest, layout.COLUMNS)))
    assert _spelled(reader.columns_table) == _spelled(before.columns_table)
    reopened = rankfold.open(archive.path, checksums=True)
    np.testing.assert_array_equal(reopened.cell_bounds(), rankfold.open(archive.path).cell_bounds())
    con = duckdb.connect()
    rankfold.udfs.register(con)
    sql = con.sql("SELECT * FROM rankfold_column_errors(?) ORDER BY position",
                  params=[str(archive.path)]).to_arrow_table()
    python = reader.columns_table.select(sql.column_names)
    i = python.schema.get_field_index("ledger_scale")  # stored once where it repeats std
    python = python.set_column(i, "ledger_scale", pc.coalesce(python.column("ledger_scale"), python.column("std")))
    assert _spelled(sql.cast(python.schema)) == _spelled(python)
    # an append reads the by-field table and writes the smaller form again; every bound holds
    more = table.slice(0, 40)
    grown = reopened.append(more)
    truth = np.vstack([x, x[:40]])
    got, bound = grown.to_numpy(), grown.cell_bounds()
    finite = np.isfinite(truth)
    assert np.all(np.abs(got[finite] - truth[finite]) <= bound[finite]) and np.all(np.isnan(got[~finite]))


@pytest.mark.parametrize("damage", ["a count left out", "a field of another type", "an unknown field",
                                    "weights of unequal lengths"])
def test_a_damaged_by_field_table_is_refused(tmp_path, damage):
    _, _, archive, _ = _by_field_archive(tmp_path, dict(rank=2))
    name = layout.table_file(archive.manifest, layout.COLUMNS)
    stored = pa.parquet.read_table(archive.path / name)
    if damage == "a count left out":
        stored = stored.drop_columns(["nans"])
    elif damage == "a field of another type":
        i = stored.schema.get_field_index("mean")
        stored = stored.set_column(i, "mean", stored.column("mean").cast(pa.float32()))
    elif damage == "an unknown field":
        stored = stored.append_column("colour", pa.array(["red"] * stored.num_rows))
    else:
        weights = stored.column("weights").to_pylist()
        weights[2] = weights[2][:-1]
        stored = stored.set_column(stored.schema.get_field_index("weights"), "weights",
                                   pa.array(weights, pa.list_(pa.float64())))
    with pytest.raises(rankfold.CorruptArchiveError, match="columns.parquet"):
        unpack_columns_table(stored, archive.path / name)
    # and through the archive: the file rewritten and the manifest sealed again
    write_small_table(archive.path / name, stored)
    manifest = read_manifest(archive.path)
    manifest["files"] = [file_entry(archive.path, name) if f["name"] == name else f for f in manifest["files"]]
    write_manifest(archive.path, {k: v for k, v in manifest.items() if k not in (DIGEST_FIELD, "numeric_columns")})
    with pytest.raises(rankfold.CorruptArchiveError):
        rankfold.open(archive.path)


def test_the_smaller_stored_form_is_written(tmp_path):
    # narrow: packed (one column chunk); wide: by field (runs of like numbers compress)
    rng = np.random.default_rng(9)  # invented data
    narrow = rankfold.compress(rng.standard_normal((40, 6)), tmp_path / "n.rankfold", max_std_error=0.05)
    wide = rankfold.compress(rng.standard_normal((40, 600)), tmp_path / "w.rankfold", max_std_error=0.05)
    for archive, by_field in ((narrow, False), (wide, True)):
        path = archive.path / layout.table_file(archive.manifest, layout.COLUMNS)
        stored = pa.parquet.read_table(path)
        assert is_by_field(stored.schema) == by_field
        other = by_field_columns_table(stored) if not by_field else pack_columns_table(
            unpack_columns_table(stored, path))
        assert path.stat().st_size <= len(_small_table_bytes(other))


def test_small_tables_are_checked_whole_without_a_footer_digest(tmp_path):
    import duckdb

    import rankfold.udfs

    archive = rankfold.compress(_table(), tmp_path / "a.rankfold", rank=2)
    entries = {f["name"]: f for f in archive.manifest["files"]}
    assert "footer_sha256" in entries["rows-00000.parquet"]  # row files: checked on every open
    assert not any("footer_sha256" in e for n, e in entries.items() if not n.startswith("rows-"))
    # a changed byte in the columns table's footer (same size): its whole-file SHA-256 refuses it
    path = archive.path / "columns.parquet"
    data = bytearray(path.read_bytes())
    data[-12] ^= 0x01
    path.write_bytes(bytes(data))
    with pytest.raises(rankfold.CorruptArchiveError, match="columns.parquet does not match its SHA-256"):
        rankfold.open(archive.path)
    con = duckdb.connect()
    rankfold.udfs.register(con)
    with pytest.raises(duckdb.Error, match="CorruptArchiveError"):
        con.execute("SELECT * FROM rankfold_column_errors(?)", [str(archive.path)]).fetchall()


def test_a_wide_table_records_no_singular_values_beyond_its_rows(tmp_path):
    # a table of m rows has rank at most m (Golub and Van Loan, "Matrix Computations", 2.4):
    # singular values beyond the m-th are recorded as 0 (the sketch gives rounding noise there)
    rng = np.random.default_rng(12)  # invented data: 12 rows, 40 columns
    x = rng.standard_normal((12, 3)) @ rng.standard_normal((3, 40)) + 0.1 * rng.standard_normal((12, 40))
    archive = rankfold.compress(x, tmp_path / "w.rankfold", max_std_error=0.05)
    spectrum = np.array(archive.manifest["spectrum"])
    assert spectrum.size == 40 and np.all(spectrum[12:] == 0.0)
    assert _stored_text(archive.path)["spectrum"]["zeros"] >= 28
    # the values kept are numpy's singular values of the standardized table (numpy.linalg.svd;
    # std with ddof=0), and their squares sum to its squared Frobenius norm
    z = (x - x.mean(axis=0)) / x.std(axis=0)
    np.testing.assert_allclose(spectrum[:11], np.linalg.svd(z, compute_uv=False)[:11], rtol=1e-6)
    np.testing.assert_allclose(np.sum(spectrum ** 2), np.sum(z ** 2), rtol=1e-9)
