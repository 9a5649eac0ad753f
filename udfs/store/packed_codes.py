"""Residual codes of all coded columns packed into one list column of a row file.

A row file normally holds one column ``_rf_q_<j>`` (``layout.CODE_PATTERN``) per coded numeric
column. Parquet pays a fixed cost per column chunk (its footer entry, a page header, a zstd
frame): on a short wide table that cost is most of the bytes (the 64 x 6,830 real table of
``benchmarks/real_tables.py`` at 0.01 std: 86 footer bytes and 121 data bytes per column of
64 codes whose order-0 entropy is about 62 bytes). The packed layout stores instead one
column ``_rf_codes`` (``layout.PACKED_CODES``): per row, the list of that row's codes of
every coded column in position order (zigzag uint32, ``arithmetic.encode_codes``; a NULL
element where the code is NULL). Which layout an archive uses is chosen by measured trial
(``code_layout.choose_packing``) and recorded in the manifest (``packed_codes``,
``model.FittedModel.packed_codes``); archives without the entry use one column per code.

Every reader keeps its per-column view: :func:`unpack` turns a packed row-file table back
into the ``_rf_q_<j>`` columns right where row files are read (``reader.ArchiveReader``), and
:func:`unpacked_sql` does the same in SQL for ``aggregate.rows_source_sql``, the one place SQL
names row files. So row differences, NULL codes, aggregates, scans and append see the same
columns in either layout.

References: Apache Parquet format specification, "Nested encoding" (lists as repetition and
definition levels) and "Encodings".
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..errors import CorruptArchiveError
from . import layout
from .sql_text import quote_identifier

__all__ = ["PACKED_TYPE", "LEAF_PATH", "pack", "unpack", "file_columns", "unpacked_sql"]

#: The Arrow type of the packed column (the element field named as Parquet's list convention
#: reads it back; pyarrow compares list types without the field name).
PACKED_TYPE = pa.list_(pa.field("element", pa.uint32()))
#: The Parquet path of the list's values, which writer options (encoding, zstd level) name.
LEAF_PATH = f"{layout.PACKED_CODES}.list.element"


def pack(codes: np.ndarray, nulls: np.ndarray | None = None) -> pa.ListArray:
    """The list column of ``codes`` (b, q) zigzag uint32, row-major: row i's list holds its
    q codes in column order; elements where ``nulls`` (b, q) is True are NULL."""
    codes = np.ascontiguousarray(codes, dtype=np.uint32)
    b, q = codes.shape
    mask = None if nulls is None or not np.any(nulls) else np.ascontiguousarray(nulls, dtype=bool).ravel()
    values = pa.array(codes.ravel(), pa.uint32(), mask=mask)
    offsets = pa.array(np.arange(0, (b + 1) * q, q, dtype=np.int32) if b else np.zeros(1, np.int32))
    return pa.ListArray.from_arrays(offsets, values, type=PACKED_TYPE)


def file_columns(columns: Sequence[str] | None, packed: bool) -> list[str] | None:
    """The row-file columns to read for the per-column view ``columns`` (None: all): in a
    packed archive every requested code column is read from ``_rf_codes``."""
    if columns is None or not packed:
        return None if columns is None else list(columns)
    prefix = layout.CODE_PATTERN.format("")
    kept = [c for c in columns if not c.startswith(prefix)]
    if len(kept) != len(columns):
        kept.append(layout.PACKED_CODES)
    return list(dict.fromkeys(kept))


def unpack(table: pa.Table, code_names: Sequence[str], wanted: Iterable[str] | None = None,
           where: object = "a row file") -> pa.Table:
    """``table`` (read from a packed row file) with ``_rf_codes`` replaced by the columns
    ``code_names`` (the coded columns' ``_rf_q_<j>`` names, in the packed order), uint32 with
    NULL where the element is NULL; only those of ``wanted`` (None: all). A table without
    ``_rf_codes`` is returned as it is. Flatten and reshape: no loop over rows.

    Raises CorruptArchiveError when a row's list is NULL or does not hold exactly
    ``len(code_names)`` codes."""
    if layout.PACKED_CODES not in table.column_names:
        return table
    position = table.column_names.index(layout.PACKED_CODES)
    column = table.column(position).combine_chunks()
    q, b = len(code_names), table.num_rows
    lengths = pc.list_value_length(column).to_numpy(zero_copy_only=False) if b else np.zeros(0)
    if column.null_count or (b and not np.all(lengths == q)):
        raise CorruptArchiveError(
            f"{where} holds packed residual codes whose rows do not each list {q} codes (one per "
            "coded column); the archive is damaged or was edited: restore it from a copy or compress "
            "the source again.")
    values = pc.list_flatten(column)
    flat = values.fill_null(0).to_numpy(zero_copy_only=False).reshape(b, q) if q else np.zeros((b, 0), np.uint32)
    nulls = values.is_null().to_numpy(zero_copy_only=False).reshape(b, q) if values.null_count else None
    keep = set(code_names) if wanted is None else set(wanted)
    picked = [t for t, name in enumerate(code_names) if name in keep]
    columns = np.ascontiguousarray(flat[:, picked].T)  # one contiguous row per code column
    arrays = [pa.array(columns[k], pa.uint32(),
                       mask=None if nulls is None or not nulls[:, t].any() else nulls[:, t])
              for k, t in enumerate(picked)]
    rest = table.remove_column(position)
    return pa.Table.from_arrays([*rest.columns, *arrays],  # one table built once: linear in q
                                names=[*rest.column_names, *(code_names[t] for t in picked)])


def unpacked_sql(source: str, code_names: Sequence[str], wanted: Iterable[str] | None = None) -> str:
    """SQL over ``source`` (a relation of packed row files) giving every column but
    ``_rf_codes``, then each code column of ``code_names`` (packed order) by name, or only
    those of ``wanted`` (None: all): the SQL form of :func:`unpack` (DuckDB lists count from
    1). Projections and filters on the other columns (``_rf_row``, key columns) still reach
    the Parquet scan below. Naming only the codes a query reads keeps its SQL short: DuckDB
    binds every expression of the text (nci60's 6,830 codes: a 5-column point lookup 0.62 s
    with all of them named, against 0.34 s with one column per code)."""
    packed = quote_identifier(layout.PACKED_CODES)
    keep = None if wanted is None else set(wanted)
    items = [f"{packed}[{t + 1}] AS {quote_identifier(name)}" for t, name in enumerate(code_names)
             if keep is None or name in keep]
    return f"(SELECT * EXCLUDE ({packed}){''.join(', ' + item for item in items)} FROM {source})"
