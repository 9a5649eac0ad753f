"""The schemas of an archive's table files, declared once.

* ``columns.parquet``: one row per numeric column (:data:`COLUMNS_SCHEMA`), written by
  ``model.FittedModel.to_tables`` and read by ``model.FittedModel.from_tables``; stored packed
  (:func:`pack_columns_table`, :func:`packed_columns_schema`), read in either form
  (:func:`unpack_columns_table`).
* ``anchors.parquet``: ``_rf_row`` (int64), then one float64 column per numeric column when
  the archive keeps anchor rows (:func:`anchors_schema`).
* ``cells.parquet``: the cells stored exactly (:data:`CELLS_SCHEMA`).
* row files: the reserved columns (:func:`row_file_reserved`), beside the key and other
  exactly kept columns (typed as the manifest's schema says).

Every writer checks its table with :func:`check_schema` before it is written, and every
reader after it is read (``integrity.check_tables``), so a table that does not have the
declared fields and types is refused with the file's name. ``blocks.parquet`` (per row-group
sums for aggregates) is declared beside its writer and reader in ``store/aggregate.py``.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..errors import CorruptArchiveError
from . import layout

__all__ = ["COLUMNS_SCHEMA", "COLUMNS_OPTIONAL", "columns_schema", "PACKED_NUMBERS", "REPEATED", "relative_rms",
           "packed_columns_schema", "is_packed", "pack_columns_table", "by_field_columns_schema",
           "is_by_field", "by_field_columns_table", "unpack_columns_table", "CELLS_SCHEMA", "anchors_schema",
           "row_file_reserved", "check_schema", "check_row_schema", "CODE_TYPES"]

COLUMNS_SCHEMA = pa.schema([
    ("name", pa.string()), ("position", pa.int32()), ("type", pa.string()), ("role", pa.string()),
    # the transform z = (x - shift) / scale and the units of the row ledger
    ("shift", pa.float64()), ("scale", pa.float64()), ("ledger_scale", pa.float64()),
    # the rebuild: offset_j + sum_k weights[j][k] basis_k
    ("offset", pa.float64()), ("weights", pa.list_(pa.float64())),
    # column statistics of every row
    ("valid", pa.int64()), ("nulls", pa.int64()), ("nans", pa.int64()), ("infinities", pa.int64()),
    ("mean", pa.float64()), ("std", pa.float64()), ("min", pa.float64()), ("max", pa.float64()),
    # the column ledger of the approximated cells
    ("err_max", pa.float64()), ("err_l2", pa.float64()), ("err_sum", pa.float64()),
    ("err_cells", pa.int64()), ("rel_rms", pa.float64()),
    # coding under a tolerance (NULL: none)
    ("tolerance", pa.float64()), ("residual_step", pa.float64()),
])

# Every field is required: each was written before manifests carried their own digest, and
# archives from before then are refused (``manifest_schema.older_format_rules``).

#: Optional fields of the columns table, appended after :data:`COLUMNS_SCHEMA` only when a
#: column uses them (a table without them reads as their default): ``difference`` (bool),
#: the column's residual codes are stored as differences from the previous row's code
#: (``row_differences``; absent: all False).
COLUMNS_OPTIONAL = pa.schema([("difference", pa.bool_())])


def columns_schema(optional: list[str] | tuple[str, ...] = ()) -> pa.Schema:
    """The columns table's declared schema with the optional fields ``optional`` (names of
    :data:`COLUMNS_OPTIONAL`, in its order)."""
    return pa.schema(list(COLUMNS_SCHEMA) + [f for f in COLUMNS_OPTIONAL if f.name in optional])


# -- the columns table as stored: its numbers packed ------------------------------------------
# Every number of a column in one list (as ``blocks.parquet`` stores its sums): each Parquet
# column costs a column chunk, page headers and footer metadata, which for a few dozen rows
# outweigh the numbers. Nothing that can be derived exactly is stored: ``position`` is the
# row's index; ``rel_rms`` and ``residual_step`` are NULL where they equal what the other
# fields give, the tolerance where its ratio to ``std`` gives it (:func:`pack_columns_table`).
# Measured with the real writer (``passes.commit.write_small_table``), bytes of
# columns.parquet, one field per number -> packed: 7,346 -> 4,517 on benchmarks/overhead.py
# (2,000 x 50) and 59,657 -> 46,457 on a real 252 x 751 table at 0.01 std
# (benchmarks/README.md, "Fixed overhead").

#: The numbers of a column in the packed ``numbers`` list, in order (the counts as float64,
#: exact below 2**53), followed by its ``weights`` (one per basis entry). All but the last are
#: fields of :data:`COLUMNS_SCHEMA`; ``tolerance_over_std`` q stands for a tolerance of q * std.
PACKED_NUMBERS = ("valid", "nulls", "nans", "infinities", "err_cells", "shift", "scale", "ledger_scale",
                  "offset", "mean", "std", "min", "max", "err_max", "err_l2", "err_sum", "rel_rms",
                  "tolerance", "residual_step", "tolerance_over_std")
_COUNTS = ("valid", "nulls", "nans", "infinities", "err_cells")
_PACKED = pa.schema([("name", pa.string()), ("type", pa.string()), ("role", pa.string()),
                     ("numbers", pa.list_(pa.float64()))])


def packed_columns_schema(optional: list[str] | tuple[str, ...] = ()) -> pa.Schema:
    """The stored (packed) columns table's schema with the optional fields ``optional``."""
    return pa.schema(list(_PACKED) + [f for f in COLUMNS_OPTIONAL if f.name in optional])


def by_field_columns_schema(present: list[str] | tuple[str, ...],
                            optional: list[str] | tuple[str, ...] = ()) -> pa.Schema:
    """The schema of the columns table stored by field (:func:`by_field_columns_table`): name,
    type and role, the entries of :data:`PACKED_NUMBERS` named in ``present`` (in that order;
    counts int64, the others float64), ``weights``, and the optional fields ``optional``."""
    numbers = [(n, pa.int64() if n in _COUNTS else pa.float64()) for n in PACKED_NUMBERS if n in present]
    return pa.schema(list(_PACKED)[:3] + numbers + [("weights", pa.list_(pa.float64()))]
                     + [f for f in COLUMNS_OPTIONAL if f.name in optional])


def is_packed(schema: pa.Schema) -> bool:
    """Whether a columns table (as read) is in one of the stored forms written since the
    numbers were packed: one list (:func:`pack_columns_table`) or by field
    (:func:`by_field_columns_table`), rather than the one field per number of archives
    written before (which has ``position``)."""
    return "numbers" in schema.names or "position" not in schema.names


def is_by_field(schema: pa.Schema) -> bool:
    """Whether a stored columns table is in the form of :func:`by_field_columns_table`."""
    return "numbers" not in schema.names and "position" not in schema.names


def by_field_columns_table(packed: pa.Table) -> pa.Table:
    """The packed columns table (:func:`pack_columns_table`) stored by field instead: one
    Parquet column per entry of :data:`PACKED_NUMBERS`, holding the same entries (NULL where
    the packed list has NULL, the counts as int64), an entry NULL in every row left out
    altogether, and the weights as one list per column. The same numbers, bit for bit, in
    another layout: for a wide table each field is a run of like numbers (BYTE_STREAM_SPLIT and
    zstd work on it), where the packed list interleaves twenty kinds; for a narrow one the
    packed list's single column chunk costs less footer. ``passes.commit.write_small_table``
    writes both and keeps the smaller (measured: DEVELOPERS.md, "Sizes")."""
    n, k = packed.num_rows, len(PACKED_NUMBERS)
    flat = pc.list_flatten(packed.column("numbers"))
    width = len(flat) // n if n else k
    values = flat.fill_null(0.0).to_numpy().reshape(n, width)
    missing = flat.is_null().to_numpy(zero_copy_only=False).reshape(n, width)
    data: dict[str, Any] = {name: packed.column(name) for name in ("name", "type", "role")}
    for i, name in enumerate(PACKED_NUMBERS):
        if n and missing[:, i].all():
            continue
        data[name] = pa.array(values[:, i].astype(np.int64) if name in _COUNTS else values[:, i],
                              pa.int64() if name in _COUNTS else pa.float64(), mask=missing[:, i])
    data["weights"] = pa.ListArray.from_arrays(pa.array(np.arange(n + 1, dtype=np.int32) * (width - k)),
                                               pa.array(values[:, k:].ravel(), pa.float64()),
                                               pa.list_(pa.float64()))
    optional = _optional(packed.schema)
    data.update({o: packed.column(o) for o in optional})
    return pa.table(data, schema=by_field_columns_schema([f for f in PACKED_NUMBERS if f in data], optional))


def _optional(schema: pa.Schema) -> list[str]:
    return [n for n in COLUMNS_OPTIONAL.names if n in schema.names]


def relative_rms(err_l2: np.ndarray, err_cells: np.ndarray, std: np.ndarray) -> np.ndarray:
    """``rel_rms`` of the columns table: the RMS of the approximated cells' errors over the
    column's standard deviation, err_l2 / sqrt(max(err_cells, 1)) / std (all (n,)); NaN where
    std is not positive. With the stored (rounded up) ``err_l2`` it is an upper limit."""
    std = np.asarray(std, dtype=np.float64)
    rms = np.divide(np.asarray(err_l2, dtype=np.float64), np.sqrt(np.maximum(np.asarray(err_cells, np.float64), 1.0)))
    with np.errstate(over="ignore"):  # a huge error over a tiny std: inf, as it is
        return np.divide(rms, std, out=np.full(std.shape, np.nan), where=std > 0)


def _same(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    return (a == b) | (np.isnan(a) & np.isnan(b))


def _tolerance_ratio(tolerance: np.ndarray, std: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Ratios q (n,) with q * std == tolerance bit for bit, and where one is stored (n,) bool:
    the most frequent quotient tolerance / std where it serves (max_std_error makes one ratio
    for all), else the column's own quotient (a tolerance of about r x std given per column);
    a positive, finite tolerance and std only. None at all where the tolerances themselves
    repeat as often (one max_abs_error for every column): a repeated value compresses alike.
    Measured (benchmarks/README.md): own quotients where the common one fails, 50,943 ->
    46,457 bytes on a real 751-column table; a common max_abs_error stored as the tolerance,
    4,749 against 5,109 bytes as ratios at 50 columns."""
    with np.errstate(all="ignore"):
        own = tolerance / std
        usable = np.isfinite(tolerance) & (tolerance > 0) & np.isfinite(std) & (std > 0)
        values, counts = np.unique(own[usable], return_counts=True)
        common = values[np.argmax(counts)] if values.size else np.nan
        ratio = np.where(common * std == tolerance, common, own)
        serves = usable & (ratio * std == tolerance)
    _, repeats = np.unique(tolerance[np.isfinite(tolerance)], return_counts=True)
    if serves.sum() <= (repeats.max() if repeats.size else 0):
        serves[:] = False
    return np.where(serves, ratio, 0.0), serves


#: Fields of the columns table that the standardize transform makes equal to a measured one:
#: stored as NULL where equal (bit for bit) to it, filled back by :func:`unpack_columns_table`.
#: Measured on the 2,000 x 50 table of benchmarks/overhead.py: columns.parquet 7,769 -> 6,582 bytes.
REPEATED = {"shift": "mean", "scale": "std", "ledger_scale": "std"}


def _filled(columns: pa.Table) -> pa.Table:
    """The :data:`REPEATED` fields of a table of one field per number with their NULLs filled
    from the fields they repeat (tables that hold every value are returned as they are)."""
    for name, source in REPEATED.items():
        if name in columns.column_names and source in columns.column_names and columns.column(name).null_count:
            i = columns.schema.get_field_index(name)
            columns = columns.set_column(i, columns.schema.field(i),
                                         pc.coalesce(columns.column(name), columns.column(source)))
    return columns


def pack_columns_table(columns: pa.Table) -> pa.Table:
    """The columns table of :func:`columns_schema` (one field per number, as
    ``model.FittedModel.to_tables`` builds it) in its stored form
    (:func:`packed_columns_schema`): one float64 list ``numbers`` per column,
    :data:`PACKED_NUMBERS` then the weights, a NULL entry where the field is NULL; ``position``
    left out.

    The tolerance t of a column is stored as a ratio q with q * std == t bit for bit, where there
    is one (t NULL, q stored; q is one ratio common to most columns where it serves, as
    max_std_error makes it, so the entries repeat and compress to nearly nothing;
    :func:`_tolerance_ratio`); else t is stored as it is and q is NULL. Two entries are NULL where derived instead: ``rel_rms`` where it equals, bit for bit,
    :func:`relative_rms` of the stored ``err_l2``, ``err_cells`` and ``std`` (NaN counts as
    equal to NaN); the :data:`REPEATED` fields where equal to the field they repeat;
    ``residual_step`` where it equals twice the column's tolerance bit for bit
    (the step of the tolerance's residual codes), or where both are NULL (no tolerance, no
    residual codes); a column with a tolerance but no residual codes stores NaN there.
    :func:`unpack_columns_table` is the exact inverse, except that a NULL ``rel_rms`` (never
    written by rankfold) reads as NaN."""
    n = columns.num_rows
    number = {name: columns.column(name).to_numpy(zero_copy_only=False).astype(np.float64)
              for name in PACKED_NUMBERS[:-1]}  # NULL -> NaN; the last is packed only
    missing = {name: columns.column(name).is_null().to_numpy(zero_copy_only=False) for name in PACKED_NUMBERS[:-1]}
    tolerance, step = number["tolerance"], number["residual_step"]
    with np.errstate(over="ignore"):
        missing["residual_step"] = np.where(np.isfinite(tolerance), step == 2.0 * tolerance, np.isnan(step))
    number["tolerance_over_std"], by_ratio = _tolerance_ratio(tolerance, number["std"])
    missing["tolerance_over_std"] = ~by_ratio
    missing["tolerance"] = missing["tolerance"] | by_ratio
    missing["rel_rms"] = _same(number["rel_rms"], relative_rms(number["err_l2"], number["err_cells"], number["std"]))
    for name, source in REPEATED.items():  # NaN never equals: stored as it is
        missing[name] = missing[name] | (number[name] == number[source])
    weights = columns.column("weights")
    lengths = pc.list_value_length(weights).fill_null(-1).to_numpy(zero_copy_only=False)
    c = int(lengths[0]) if n else 0
    if np.any(lengths != c):
        raise CorruptArchiveError(
            f"rankfold was about to write {layout.COLUMNS} with {sorted(set(lengths.tolist()))[:4]} weights "
            "per column, where every column has one per basis entry; nothing was written. This is a "
            "defect of rankfold: please report it.")
    matrix = np.hstack([np.column_stack([number[f] for f in PACKED_NUMBERS]).reshape(n, len(PACKED_NUMBERS)),
                        pc.list_flatten(weights).to_numpy(zero_copy_only=False).reshape(n, c)])
    mask = np.hstack([np.column_stack([missing[f] for f in PACKED_NUMBERS]).reshape(n, len(PACKED_NUMBERS)),
                      np.zeros((n, c), bool)])
    offsets = pa.array(np.arange(n + 1, dtype=np.int32) * matrix.shape[1])
    flat = pa.array(matrix.ravel(), pa.float64(), mask=mask.ravel())
    optional = _optional(columns.schema)
    data = {"name": columns.column("name"), "type": columns.column("type"), "role": columns.column("role"),
            "numbers": pa.ListArray.from_arrays(offsets, flat, pa.list_(pa.float64())),
            **{o: columns.column(o) for o in optional}}
    return pa.table(data, schema=packed_columns_schema(optional))


def unpack_columns_table(columns: pa.Table, where: Any) -> pa.Table:
    """The columns table in the form of :func:`columns_schema` from either stored form: the
    packed one (:func:`pack_columns_table`; its schema is checked here, refused with the file
    ``where``) or the one of archives written before, one field per number (returned as it
    is but for the :data:`REPEATED` fields filled; its schema is checked by the caller). The one
    place that knows both forms."""
    if not is_packed(columns.schema):
        return _filled(columns)
    optional = _optional(columns.schema)
    n, k = columns.num_rows, len(PACKED_NUMBERS)
    if is_by_field(columns.schema):
        check_schema(columns.schema, by_field_columns_schema(
            [f for f in PACKED_NUMBERS if f in columns.schema.names], optional), where)
        weights = columns.column("weights")
        lengths = pc.list_value_length(weights).fill_null(-1).to_numpy(zero_copy_only=False).astype(np.int64)
        if n and (lengths.min() < 0 or lengths.min() != lengths.max()):
            raise CorruptArchiveError(
                f"{where} holds lists of weights of {sorted(set(lengths.tolist()))[:4]} entries, where the format "
                "has one weight per basis entry, alike for all columns; the archive is damaged or was edited: "
                "restore it from a copy or compress the source again.")
        width = k + (int(lengths[0]) if n else 0)
        values = np.full((n, width), np.nan)
        missing = np.ones((n, width), bool)
        for i, name in enumerate(PACKED_NUMBERS):
            if name in columns.schema.names:
                field_values = columns.column(name)
                values[:, i] = field_values.cast(pa.float64()).fill_null(np.nan).to_numpy()
                missing[:, i] = field_values.is_null().to_numpy(zero_copy_only=False)
        flat_weights = pc.list_flatten(weights)
        values[:, k:] = flat_weights.fill_null(np.nan).to_numpy().reshape(n, width - k)
        missing[:, k:] = flat_weights.is_null().to_numpy(zero_copy_only=False).reshape(n, width - k)
    else:
        check_schema(columns.schema, packed_columns_schema(optional), where)
        numbers = columns.column("numbers")
        lengths = pc.list_value_length(numbers).fill_null(-1).to_numpy(zero_copy_only=False).astype(np.int64)
        if n and (lengths.min() < k or lengths.min() != lengths.max()):
            raise CorruptArchiveError(
                f"{where} holds lists of numbers of {sorted(set(lengths.tolist()))[:4]} entries, where the format "
                f"has {k} for every column and one weight per basis entry, alike for all; the archive is "
                "damaged or was edited: restore it from a copy or compress the source again.")
        width = int(lengths[0]) if n else k
        flat = pc.list_flatten(numbers)
        values = flat.fill_null(np.nan).to_numpy().reshape(n, width)
        missing = flat.is_null().to_numpy(zero_copy_only=False).reshape(n, width)
    field = {name: values[:, i] for i, name in enumerate(PACKED_NUMBERS)}
    nulls = {name: missing[:, i] for i, name in enumerate(PACKED_NUMBERS)}
    if np.any(missing[:, :len(_COUNTS)]) or np.any(missing[:, k:]):
        raise CorruptArchiveError(
            f"{where} holds a NULL count or weight; the archive is damaged or was edited: restore it "
            "from a copy or compress the source again.")
    tolerance = np.where(nulls["tolerance"], field["tolerance_over_std"] * field["std"], field["tolerance"])
    step = np.where(nulls["residual_step"], 2.0 * tolerance, field["residual_step"])  # NaN: none
    rel_rms = np.where(nulls["rel_rms"], relative_rms(field["err_l2"], field["err_cells"], field["std"]),
                       field["rel_rms"])
    data: dict[str, Any] = {
        "name": columns.column("name"), "position": pa.array(np.arange(n, dtype=np.int32)),
        "type": columns.column("type"), "role": columns.column("role"),
        "weights": pa.ListArray.from_arrays(pa.array(np.arange(n + 1, dtype=np.int32) * (width - k)),
                                            pa.array(values[:, k:].ravel(), pa.float64()), pa.list_(pa.float64())),
        "residual_step": pa.array(step, pa.float64(), mask=~np.isfinite(step)),
        "tolerance": pa.array(tolerance, pa.float64(), mask=~np.isfinite(tolerance)),
        "rel_rms": pa.array(rel_rms, pa.float64())}
    for name, source in REPEATED.items():
        field[name] = np.where(nulls[name], field[source], field[name])
        nulls[name] = nulls[name] & nulls[source]
    for name in PACKED_NUMBERS:
        if name in _COUNTS:
            data[name] = pa.array(field[name].astype(np.int64), pa.int64())
        elif name not in data:
            data[name] = pa.array(field[name], pa.float64(), mask=nulls[name])
    data.update({o: columns.column(o) for o in optional})
    schema = columns_schema(optional)
    return pa.table({f.name: data[f.name] for f in schema}, schema=schema)


CELLS_SCHEMA = pa.schema([(layout.ROW_ID, pa.int64()), (layout.COLUMN_ID, pa.int32()),
                          ("value", pa.float64()), ("reason", pa.dictionary(pa.int32(), pa.string()))])


def anchors_schema(numeric: list[str], with_rows: bool) -> pa.Schema:
    """The anchors table: the row ids, and one float64 column per numeric column when there
    are anchor rows (without, the row ids alone: empty columns cost footer bytes for nothing)."""
    return pa.schema([(layout.ROW_ID, pa.int64())]
                     + [(n, pa.float64()) for n in (numeric if with_rows else [])])


#: Types a residual-code column may have: zigzag codes (``arithmetic.encode_codes``) in any
#: unsigned width up to 32 bits. rankfold writes uint32; a narrower type stores the same bytes
#: (Parquet's physical type of all three is INT32) and is read alike.
CODE_TYPES = (pa.uint8(), pa.uint16(), pa.uint32())

Reserved = pa.DataType | tuple[pa.DataType, ...] | None


def row_file_reserved(basis_stored: dict[str, pa.DataType | None],
                      code_columns: list[str], *, row_ledger: bool = True,
                      packed_codes: bool = False) -> dict[str, Reserved]:
    """Reserved columns of every row file and their types (None: any of several; a tuple:
    one of these).

    ``basis_stored``: the stored basis columns by name (``_rf_basis_<k>`` codes are int32;
    scores float64 or float32; source columns keep the source's type, given as None here and
    checked against the manifest's schema by the caller). ``code_columns``: the residual
    code columns (zigzag unsigned, one of :data:`CODE_TYPES`, ``arithmetic.encode_codes``).
    ``row_ledger``: the row files carry the row ledger (float32 row figures; left out when
    every approximated column has a tolerance, ``model.FittedModel.row_ledger``).
    ``packed_codes``: the codes are held by one list column instead
    (``packed_codes.PACKED_TYPE``, ``model.FittedModel.packed_codes``)."""
    reserved: dict[str, Reserved] = {layout.ROW_ID: pa.int64()}
    if row_ledger:
        reserved.update({layout.ROW_ERR_MAX: pa.float32(), layout.ROW_ERR_L2: pa.float32()})
    reserved.update(basis_stored)
    if packed_codes and code_columns:
        reserved[layout.PACKED_CODES] = pa.list_(pa.field("element", pa.uint32()))
    else:
        reserved.update({name: CODE_TYPES for name in code_columns})
    return reserved


def check_schema(schema: pa.Schema, declared: pa.Schema, where: Any, *, ordered: bool = True,
                 writing: bool = False) -> None:
    """Refuse ``schema`` (of the table file ``where``) unless it has every field of
    ``declared`` with its type and no other; in the declared order unless ``ordered`` is
    False (tables read by field name). ``writing``: the table is about to be written (a
    mismatch is then a defect of rankfold itself)."""
    wanted = [(f.name, f.type) for f in declared]
    have = [(f.name, f.type) for f in schema]
    if (have != wanted) if ordered else (sorted(have, key=str) != sorted(wanted, key=str)):
        missing = [n for n, _ in wanted if n not in schema.names]
        other = [f"{n}: {t}" for n, t in have if n in declared.names and declared.field(n).type != t]
        extra = [n for n, _ in have if n not in declared.names]
        detail = "; ".join(part for part in (
            f"lacks {missing}" if missing else "", f"types {other}" if other else "",
            f"unknown fields {extra}" if extra else "") if part) or "fields in another order"
        if writing:
            raise CorruptArchiveError(
                f"rankfold was about to write {where} without its declared table schema "
                f"({detail}); nothing was written. This is a defect of rankfold: please report it.")
        raise CorruptArchiveError(
            f"{where} does not have the declared table schema ({detail}); the archive is damaged "
            "or was written by another program: restore it from a copy or compress the source again."
        )


def check_row_schema(schema: pa.Schema, reserved: dict[str, Reserved], where: Any, *,
                     writing: bool = False) -> None:
    """Refuse a row file's ``schema`` (of the file ``where``) unless it holds every reserved
    column of ``reserved`` (:func:`row_file_reserved`) with its type (None: any type; such a
    column keeps the source's type, checked against the manifest by the reader; a tuple: any
    of these)."""
    for column, wanted in reserved.items():
        problem = None
        allowed = wanted if isinstance(wanted, tuple) else (wanted,)
        if column not in schema.names:
            problem = f"lacks the column {column!r} the manifest implies"
        elif wanted is not None and schema.field(column).type not in allowed:
            declared = " or ".join(str(t) for t in allowed)
            problem = f"stores {column!r} as {schema.field(column).type}, where the format declares {declared}"
        if problem is None:
            continue
        if writing:
            raise CorruptArchiveError(
                f"rankfold was about to write a row file that {problem} ({where}); nothing was "
                "committed. This is a defect of rankfold: please report it.")
        raise CorruptArchiveError(
            f"{where} {problem}; the archive is damaged or was edited: restore it from a copy or "
            "compress the source again.")
