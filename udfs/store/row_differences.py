"""Residual codes stored as the difference from the previous row's code, in restart chunks.

A column flagged in ``model.Coding.difference`` keeps, in its row-file column
``_rf_q_<j>`` (zigzag, ``arithmetic.encode_codes``), not its residual code q_i but

    d_i = q_i                 at a restart row,
    d_i = q_i - q_{i-1}       at every other row (i - 1 is the previous row of the same file),

so q_i = sum of d over the rows of its chunk up to i (delta coding). NaN, +-inf and
corrected cells keep the code the encode pass gave them (0 where none was usable) like
every other row: they are stored exactly elsewhere and take part in the sums as plain
integers, so decoding stays exact. A NULL cell (a NULL code) carries the code of the row
before it in its chunk, so its difference is 0 and is stored as NULL, which the running sum
skips (:func:`carry_forward`).

**Restart rule.** A row r of a row file whose first row is f restarts a chunk when r = f or
r is a multiple of :data:`CHUNK_ROWS`. So the chunk of row r starts at

    chunk(r) = max(floor(r / K) K, f),        K = CHUNK_ROWS,

and holds at most K rows. The rule needs nothing but the row id and its file's first row:
row files written by parallel partitions and by append (whose first row is a multiple of
nothing) start their own chunks, and no chunk spans two files. In DuckDB the file's first row
is ``_rf_row - file_row_number`` (``read_parquet(..., file_row_number = true)``), so the chunk
key is one expression (:func:`chunk_sql`) and a window sum ``PARTITION BY chunk ORDER BY
_rf_row`` decodes (:func:`decoded_codes_sql`). A point read decodes one chunk of at most K
rows (``reader.ArchiveReader.read_rows`` widens its read to whole chunks).

**Range.** The encode pass keeps |q| within half its type's zigzag limit for these columns
(:func:`code_limit`), so every difference |q_i - q_{i-1}| fits the stored type too; a code
beyond that goes to the exact cells like any code beyond the type.

References: delta coding of series, D. Salomon, "Data Compression: The Complete Reference",
4th ed., Springer 2007, section 1.3.1 (common practice); restart chunks as in
``chunk_codes`` (whose codec this module's layout follows: previous-row differences, per-chunk
restart, window-sum decoding in SQL).
"""

from __future__ import annotations

import numpy as np

from . import layout
from .chunk_codes import CHUNK_ROWS
from .sql_text import quote_identifier

__all__ = ["CHUNK_ROWS", "FILE_ROW", "chunk_starts", "code_limit", "difference", "undifference",
           "chunk_sql", "decoded_codes_sql", "signed_code_sql"]

#: The column DuckDB adds with ``read_parquet(..., file_row_number = true)``: a row's
#: 0-based position in its file.
FILE_ROW = "file_row_number"


def chunk_starts(rows: np.ndarray, file_first: np.ndarray | int) -> np.ndarray:
    """(b,) int64: the first row of the chunk of each row id in ``rows`` (b,), whose row file
    starts at ``file_first`` (scalar or (b,)): max(floor(r / K) K, f)."""
    rows = np.asarray(rows, dtype=np.int64)
    return np.maximum(rows // CHUNK_ROWS * CHUNK_ROWS, np.asarray(file_first, dtype=np.int64))


def code_limit(type_limit: float) -> float:
    """Largest |code| of a difference-coded column whose stored type holds codes up to
    ``type_limit`` in zigzag form: half of it (rounded down), so that a difference of two
    codes, at most twice that, fits the type as well."""
    return float(np.floor(type_limit / 2.0))


def difference(codes: np.ndarray, restart: np.ndarray, previous: np.ndarray) -> np.ndarray:
    """The stored form (b, q) int64 of codes (b, q) of consecutive rows of one row file.

    ``restart`` (b,) bool: rows that start a chunk (they store their code); ``previous`` (q,):
    the codes of the row before the first one (used unless the first row restarts)."""
    q = np.asarray(codes).astype(np.int64)
    out = np.empty_like(q)
    if q.shape[0]:
        out[0] = q[0] - np.asarray(previous, dtype=np.int64)
        out[1:] = q[1:] - q[:-1]
        out[restart] = q[restart]
    return out


def carry_forward(codes: np.ndarray, nulls: np.ndarray, restart: np.ndarray,
                  previous: np.ndarray) -> np.ndarray:
    """``codes`` (b, k) of consecutive rows of one row file with each NULL cell (``nulls``
    (b, k) bool) given the code of the row before it in its chunk (0 at a chunk's first row,
    ``restart`` (b,) bool; ``previous`` (k,): the codes of the row before the first one). The
    difference stored at a NULL cell is then 0, so it may be stored as NULL: a running sum
    that skips NULLs decodes every other row of the chunk exactly."""
    out = np.array(codes, dtype=np.float64, copy=True)
    b = out.shape[0]
    rows = np.arange(b)
    for k in range(out.shape[1]):
        null = nulls[:, k]
        if not null.any():
            continue
        column = np.where(null & restart, 0.0, out[:, k])
        holder = np.where(~null | restart, rows, -1)  # rows whose own code stands
        np.maximum.accumulate(holder, out=holder)
        out[:, k] = np.where(holder >= 0, column[np.maximum(holder, 0)], float(previous[k]))
    return out


def undifference(stored: np.ndarray, chunks: np.ndarray) -> np.ndarray:
    """The codes (b,) int64 of stored differences (b,) of consecutive rows, ``chunks`` (b,)
    the chunk start of each row (:func:`chunk_starts`). The rows must hold every row of each
    of their chunks up to the last one given (a chunk's first row stores its code): then the
    running sum restarted at each chunk gives every code exactly (each partial sum is a code
    of the column, within the type's range, so int64 does not overflow)."""
    d = np.asarray(stored, dtype=np.int64)
    if d.size == 0:
        return d.copy()
    total = np.cumsum(d)
    first = np.flatnonzero(np.r_[True, chunks[1:] != chunks[:-1]])
    before = np.zeros(first.size, dtype=np.int64)
    before[1:] = total[first[1:] - 1]
    lengths = np.diff(np.r_[first, d.size])
    return total - np.repeat(before, lengths)


def chunk_sql(row: str = layout.ROW_ID, file_row: str = FILE_ROW) -> str:
    """SQL of the chunk start of a row (BIGINT) from its row id and its position in its file
    (:func:`chunk_starts` with f = row - file_row)."""
    r, p = quote_identifier(row), quote_identifier(file_row)
    return f"greatest({r} // {CHUNK_ROWS} * {CHUNK_ROWS}, {r} - {p})"


def decoded_codes_sql(source: str, columns: list[str]) -> str:
    """A SELECT of every column of ``source`` (row-file rows read with ``file_row_number``)
    with each of the difference-coded code columns ``columns`` replaced by its decoded
    signed code (BIGINT): a window sum of the signed differences over the row's chunk up to
    it. Rows must not be filtered before this (a chunk must be whole); filter after it."""
    if not columns:
        return source
    window = f"(PARTITION BY {chunk_sql()} ORDER BY {layout.ROW_ID})"
    # a NULL difference (a NULL cell, ``carry_forward``: its difference is 0) is skipped by
    # the sum and stays NULL
    decoded = ", ".join(
        f"CASE WHEN {quote_identifier(c)} IS NULL THEN NULL ELSE "
        f"CAST(sum({layout.code_sql(quote_identifier(c))}) OVER {window} AS BIGINT) END AS {quote_identifier(c)}"
        for c in columns)
    return f"(SELECT * REPLACE ({decoded}) FROM {source})"


def signed_code_sql(column: str, differenced: bool) -> str:
    """SQL of a residual code as a signed integer from the row-file column ``column`` (SQL
    text, already quoted): zigzag-decoded (``layout.code_sql``), or, for a difference-coded
    column read through :func:`decoded_codes_sql`, the decoded code itself."""
    return f"CAST({column} AS BIGINT)" if differenced else layout.code_sql(column)
