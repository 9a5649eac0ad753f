"""The schemas of an archive's table files, declared once.

* ``columns.parquet``: one row per numeric column (:data:`COLUMNS_SCHEMA`), written by
  ``model.FittedModel.to_tables`` and read by ``model.FittedModel.from_tables``.
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

import pyarrow as pa

from ..errors import CorruptArchiveError
from . import layout

__all__ = ["COLUMNS_SCHEMA", "COLUMNS_OPTIONAL", "columns_schema", "CELLS_SCHEMA", "anchors_schema",
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
                      code_columns: list[str], *, row_ledger: bool = True) -> dict[str, Reserved]:
    """Reserved columns of every row file and their types (None: any of several; a tuple:
    one of these).

    ``basis_stored``: the stored basis columns by name (``_rf_basis_<k>`` codes are int32;
    scores float64 or float32; source columns keep the source's type, given as None here and
    checked against the manifest's schema by the caller). ``code_columns``: the residual
    code columns (zigzag unsigned, one of :data:`CODE_TYPES`, ``arithmetic.encode_codes``).
    ``row_ledger``: the row files carry the row ledger (float32 row figures; left out when
    every approximated column has a tolerance, ``model.FittedModel.row_ledger``)."""
    reserved: dict[str, Reserved] = {layout.ROW_ID: pa.int64()}
    if row_ledger:
        reserved.update({layout.ROW_ERR_MAX: pa.float32(), layout.ROW_ERR_L2: pa.float32()})
    reserved.update(basis_stored)
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
