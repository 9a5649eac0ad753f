"""Integer codes of one column, stored in restart chunks under a predictor.

A column under a tolerance is kept as integer codes ``q`` (int64, shape ``(rows,)``; the value
is ``q * step``) with a validity mask: NULL, NaN and +-inf cells are not coded (the caller keeps
them elsewhere) and decode to code 0 with ``valid = False``. This module turns codes into the
stored form and back, exactly:

* rows are cut into **restart chunks** of ``chunk_rows`` rows (:data:`CHUNK_ROWS` by default),
  chunk ``c`` holding rows ``[c * chunk_rows, (c + 1) * chunk_rows)``. Nothing crosses a chunk
  boundary, so one row is decoded from its own chunk alone;
* a **predictor** says what is stored per valid row (:data:`PREDICTORS`):

  - ``none``: the code itself, ``v_i = q_i``;
  - ``previous``: the difference from the previous valid row of the same chunk,
    ``v_i = q_i - q_{i'}``; the first valid row of a chunk stores ``v = 0`` and the chunk keeps
    that row's code as its ``start`` (delta coding);
  - ``lowrank`` and ``lowrank+previous``: the same two codings, applied by the caller to residual
    codes ``r = q - p`` where ``p`` is an integer prediction from the basis columns. The codec
    codes ``r`` and records the name; adding ``p`` back is the caller's job;
* per chunk, a **reference**, the chunk's smallest stored value ``min v`` (or, by choice, the
  column's smallest, the same for every chunk), and the values as
  **unsigned offsets** ``v - reference`` in the narrowest unsigned type (8, 16, 32 or 64 bits)
  that holds the column's largest offset. Offsets from the minimum take no more bits than the
  zigzag map of signed integers, and fewer when the values lean to one side.

Decoding (:func:`decode_codes`, :func:`decode_rows`) is the exact inverse: ``q = reference +
offset`` for ``none``; for the difference codings a running sum inside each chunk,
``q_i = start + sum_{valid i' <= i in the chunk} (offset_i' + reference)``. The same decoder as
DuckDB SQL text (:func:`decode_sql`) uses a window sum over each chunk and is checked against
the numpy decoder cell by cell in the tests.

Range: valid codes must satisfy ``|q| <= CODE_LIMIT`` (2**61). Then every difference lies
within +-2**62 and every offset below 2**63, so offsets fit int64 on the way back (numpy and
DuckDB BIGINT) and no step of the decoder can overflow except the running sum's intermediate
terms, which numpy wraps modulo 2**64 (the result is exact because it lies in range) and
DuckDB sums as HUGEINT. Codes beyond the limit are refused: they would need a step below the
spacing of float64 values anyway (2**53).

References: delta coding of series, e.g. D. Salomon, "Data Compression: The Complete
Reference", 4th ed., Springer 2007, section 1.3.1 (common practice); frame-of-reference
coding (values minus a per-block minimum): J. Goldstein, R. Ramakrishnan, U. Shaft,
"Compressing relations and indexes", ICDE 1998.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
import pyarrow as pa

from ..errors import CorruptArchiveError, InvalidInputError
from .sql_text import quote_identifier

__all__ = [
    "CHUNK_ROWS",
    "CODE_LIMIT",
    "PREDICTORS",
    "DIFFERENCE_PREDICTORS",
    "REFERENCES",
    "CodedColumn",
    "encode_codes",
    "decode_codes",
    "decode_rows",
    "chunk_table",
    "chunk_field_names",
    "decode_sql",
]

#: Rows per restart chunk. Measured with ``benchmarks/codec_trial.py --chunk-rows`` (its
#: "Results" section): with the column-wide reference on offer, the coded bytes of the
#: multi-chunk real tables moved by under 1% between 2,048 and 65,536 rows per chunk; the
#: per-chunk integers cost 16 bytes per column and chunk (0.5 kB of 110-250 kB at 8,192), and
#: a point read decodes one chunk, so smaller is faster to look up and larger is smaller to
#: store. 8,192 keeps the per-chunk integers under 0.5% and a lookup to 8,192 rows.
CHUNK_ROWS = 8192

#: Largest magnitude of a code the codec accepts (see the module docstring for why).
CODE_LIMIT = 2**61

PREDICTORS = ("none", "previous", "lowrank", "lowrank+previous")
#: How a chunk's reference is chosen (see :func:`encode_codes`).
REFERENCES = ("chunk", "column")
DIFFERENCE_PREDICTORS = frozenset({"previous", "lowrank+previous"})

_UNSIGNED = (np.uint8, np.uint16, np.uint32, np.uint64)


@dataclass(frozen=True, eq=False)
class CodedColumn:
    """One column's codes in stored form.

    Attributes
    ----------
    predictor : str
        One of :data:`PREDICTORS`.
    chunk_rows : int
        Rows per restart chunk (positive).
    offsets : ndarray, shape (rows,), narrowest unsigned dtype
        ``v - reference`` per row; 0 where the row is not valid.
    valid : ndarray, shape (rows,), bool
        True where the row holds a code.
    references : ndarray, shape (chunks,), int64
        Each chunk's smallest stored value (0 for a chunk without valid rows), or the column's
        smallest for every chunk (``encode_codes(..., reference="column")``).
    starts : ndarray, shape (chunks,), int64
        First valid code of each chunk for the difference predictors; all 0 otherwise.

    ``chunks = ceil(rows / chunk_rows)``. Construction checks that these fit together and
    raises :class:`CorruptArchiveError` otherwise (stored parts that disagree are damaged).
    """

    predictor: str
    chunk_rows: int
    offsets: np.ndarray
    valid: np.ndarray
    references: np.ndarray
    starts: np.ndarray

    def __post_init__(self) -> None:
        _check_predictor(self.predictor)
        _check_chunk_rows(self.chunk_rows)
        rows = self.offsets.shape[0] if self.offsets.ndim == 1 else -1
        chunks = -(-rows // self.chunk_rows)
        problems = []
        if self.offsets.ndim != 1 or self.offsets.dtype.type not in _UNSIGNED:
            problems.append(f"offsets must be one unsigned integer vector, got dtype {self.offsets.dtype} "
                            f"and shape {self.offsets.shape}")
        if self.valid.dtype != np.bool_ or self.valid.shape != self.offsets.shape:
            problems.append(f"the validity mask must be bool of shape {self.offsets.shape}, got "
                            f"{self.valid.dtype} {self.valid.shape}")
        for name in ("references", "starts"):
            part = getattr(self, name)
            if part.dtype != np.int64 or part.shape != (max(chunks, 0),):
                problems.append(f"{name} must be int64 of shape ({chunks},) for {rows} rows in chunks of "
                                f"{self.chunk_rows}, got {part.dtype} {part.shape}")
        if not problems and rows and int(self.offsets.max()) >= 2**63:
            problems.append("an offset is 2**63 or more, beyond what the encoder writes")
        if not problems and self.predictor not in DIFFERENCE_PREDICTORS and np.any(self.starts):
            problems.append(f"predictor {self.predictor!r} keeps no chunk starts, but some are non-zero")
        if problems:
            raise CorruptArchiveError("Coded column parts do not fit together: " + "; ".join(problems)
                                      + ". Rewrite the column from its source.")

    @property
    def rows(self) -> int:
        return int(self.offsets.shape[0])

    @property
    def chunks(self) -> int:
        return int(self.references.shape[0])

    def offsets_array(self) -> pa.Array:
        """The offsets as an Arrow array, NULL where the row is not valid (what a row file
        stores for this column)."""
        return pa.array(self.offsets, mask=~self.valid)


def _check_predictor(predictor: str) -> None:
    if predictor not in PREDICTORS:
        raise InvalidInputError(f"Unknown predictor {predictor!r} for integer codes; choose one of "
                                f"{', '.join(PREDICTORS)}.")


def _check_chunk_rows(chunk_rows: int) -> None:
    if isinstance(chunk_rows, bool) or not isinstance(chunk_rows, (int, np.integer)) or chunk_rows < 1:
        raise InvalidInputError(f"chunk_rows must be a positive integer; got {chunk_rows!r}.")


def _narrowest_unsigned(largest: int) -> np.dtype:
    for dtype in _UNSIGNED:
        if largest <= np.iinfo(dtype).max:
            return np.dtype(dtype)
    raise AssertionError("unreachable: offsets are below 2**63")  # pragma: no cover


def _checked_codes(codes: np.ndarray, valid: np.ndarray, where: str) -> tuple[np.ndarray, np.ndarray]:
    codes = np.asarray(codes)
    valid = np.asarray(valid)
    if codes.ndim != 1 or not np.issubdtype(codes.dtype, np.integer):
        raise InvalidInputError(f"{where}: codes must be a one-dimensional integer array; got dtype "
                                f"{codes.dtype} and shape {codes.shape}. Round values to integer codes first.")
    if valid.dtype != np.bool_ or valid.shape != codes.shape:
        raise InvalidInputError(f"{where}: the validity mask must be a bool array of shape {codes.shape}; "
                                f"got {valid.dtype} {valid.shape}.")
    kept = codes[valid]
    if kept.size:
        low, high = int(kept.min()), int(kept.max())
        if low < -CODE_LIMIT or high > CODE_LIMIT:
            bad = low if low < -CODE_LIMIT else high
            raise InvalidInputError(
                f"{where}: code {bad} is beyond +-2**61, the range the codec stores exactly. Use a "
                "larger step (a larger tolerance) or keep this column exactly.")
    return codes.astype(np.int64), valid


def encode_codes(codes: np.ndarray, valid: np.ndarray, predictor: str,
                 chunk_rows: int = CHUNK_ROWS, reference: str = "chunk") -> CodedColumn:
    """Code one column's integer codes in restart chunks under ``predictor``.

    Parameters
    ----------
    codes : ndarray, shape (rows,), integer
        The codes (or, for ``lowrank*``, the residual codes); values at invalid rows are ignored.
        Valid codes must lie within ``+-CODE_LIMIT``.
    valid : ndarray, shape (rows,), bool
        True where a row holds a code (False for NULL, NaN, +-inf).
    predictor : str
        One of :data:`PREDICTORS`.
    chunk_rows : int
        Rows per restart chunk.
    reference : {"chunk", "column"}
        Each chunk's reference is its own minimum stored value (``"chunk"``), or the minimum
        over the whole column, the same for every chunk (``"column"``). The stored form and the
        decoder are the same; ``"column"`` keeps an equal value at an equal offset in every
        chunk, which dictionary and zstd coding of a column with few distinct values need
        (measured on real tables, ``benchmarks/codec_trial.py``), while ``"chunk"`` keeps the
        offsets small in a column that drifts.

    Returns
    -------
    CodedColumn
        Decoding it with :func:`decode_codes` gives back ``codes`` at every valid row exactly.
    """
    _check_predictor(predictor)
    _check_chunk_rows(chunk_rows)
    if reference not in REFERENCES:
        raise InvalidInputError(f"Unknown reference {reference!r} for integer codes; choose one of "
                                f"{', '.join(REFERENCES)}.")
    q, valid = _checked_codes(codes, valid, "encode_codes")
    rows = q.shape[0]
    chunks = -(-rows // chunk_rows)
    positions = np.flatnonzero(valid)
    chunk_of = positions // chunk_rows
    kept = q[positions]
    starts = np.zeros(chunks, dtype=np.int64)
    if predictor in DIFFERENCE_PREDICTORS:
        stored = np.zeros_like(kept)
        stored[1:] = kept[1:] - kept[:-1]              # |.| <= 2**62: no overflow
        first = np.ones(kept.shape, dtype=bool)
        first[1:] = chunk_of[1:] != chunk_of[:-1]
        stored[first] = 0
        starts[chunk_of[first]] = kept[first]
    else:
        stored = kept
    references = np.zeros(chunks, dtype=np.int64)
    if positions.size:
        # smallest stored value per chunk: chunk_of is sorted, so each chunk is one run
        run_starts = np.flatnonzero(np.r_[True, chunk_of[1:] != chunk_of[:-1]])
        references[chunk_of[run_starts]] = np.minimum.reduceat(stored, run_starts)
        if reference == "column":
            references[:] = stored.min()
    shifted = stored - references[chunk_of]            # in [0, 2**63)
    dtype = _narrowest_unsigned(int(shifted.max()) if shifted.size else 0)
    offsets = np.zeros(rows, dtype=dtype)
    offsets[positions] = shifted.astype(dtype)
    return CodedColumn(predictor, int(chunk_rows), offsets, valid.copy(), references, starts)


def _decode(predictor: str, chunk_rows: int, offsets: np.ndarray, valid: np.ndarray,
            references: np.ndarray, starts: np.ndarray) -> np.ndarray:
    """Codes of whole chunks (the arrays start at a chunk boundary); 0 where not valid."""
    rows = offsets.shape[0]
    chunk_of = np.arange(rows) // chunk_rows
    values = np.where(valid, offsets.astype(np.int64) + references[chunk_of], 0)
    if predictor not in DIFFERENCE_PREDICTORS:
        return values
    # running sum restarted at each chunk: one cumulative sum minus its value before the chunk.
    # Intermediate sums may wrap modulo 2**64 (numpy integer arithmetic); the decoded code lies
    # within +-2**61, so the wrapped result equals it exactly.
    with np.errstate(over="ignore"):
        total = np.cumsum(values)
        first_rows = np.arange(references.shape[0]) * chunk_rows
        before = np.where(first_rows > 0, total[np.maximum(first_rows - 1, 0)], 0) if rows else total[:0]
        decoded = starts[chunk_of] + (total - before[chunk_of])
    return np.where(valid, decoded, 0)


def decode_codes(coded: CodedColumn) -> tuple[np.ndarray, np.ndarray]:
    """All codes of a coded column.

    Returns
    -------
    codes : ndarray, shape (rows,), int64
        The codes given to :func:`encode_codes` at valid rows; 0 elsewhere.
    valid : ndarray, shape (rows,), bool
    """
    codes = _decode(coded.predictor, coded.chunk_rows, coded.offsets, coded.valid, coded.references,
                    coded.starts)
    return codes, coded.valid.copy()


def decode_rows(coded: CodedColumn, start: int, stop: int) -> tuple[np.ndarray, np.ndarray]:
    """Codes of rows ``[start, stop)``, decoding only the chunks that hold them (a point read
    of one row decodes one chunk). Returns ``(codes, valid)`` of shape ``(stop - start,)``."""
    if not (0 <= start <= stop <= coded.rows):
        raise InvalidInputError(f"decode_rows: rows [{start}, {stop}) are outside the column's "
                                f"{coded.rows} rows; give 0 <= start <= stop <= {coded.rows}.")
    if start == stop:
        return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=bool)
    k = coded.chunk_rows
    first, last = start // k, (stop - 1) // k
    lo, hi = first * k, min((last + 1) * k, coded.rows)
    codes = _decode(coded.predictor, k, coded.offsets[lo:hi], coded.valid[lo:hi],
                    coded.references[first:last + 1], coded.starts[first:last + 1])
    return codes[start - lo:stop - lo], coded.valid[start:stop].copy()


# -- the per-chunk table and the SQL decoder ------------------------------------------------------

CHUNK_FIELD = "chunk"


def chunk_field_names(column: str) -> tuple[str, str]:
    """Names of the reference and start fields of ``column`` in the per-chunk table."""
    return f"{column}:reference", f"{column}:start"


def chunk_table(columns: Mapping[str, CodedColumn]) -> pa.Table:
    """One row per chunk: ``chunk`` (int64, 0, 1, ...), then for each column its reference and,
    under a difference predictor, its start (int64). All columns must share rows and chunk
    size, as the columns of one row file do."""
    coded = list(columns.values())
    if not coded:
        raise InvalidInputError("chunk_table needs at least one coded column.")
    shapes = {(c.rows, c.chunk_rows) for c in coded}
    if len(shapes) != 1:
        raise InvalidInputError(f"chunk_table: the columns differ in rows or chunk size ({sorted(shapes)}); "
                                "code the columns of one table with the same chunk size.")
    fields = {CHUNK_FIELD: pa.array(np.arange(coded[0].chunks, dtype=np.int64))}
    for name, c in columns.items():
        reference, start = chunk_field_names(name)
        fields[reference] = pa.array(c.references)
        if c.predictor in DIFFERENCE_PREDICTORS:
            fields[start] = pa.array(c.starts)
    return pa.table(fields)


def decode_sql(offsets: str, chunks: str, predictors: Mapping[str, str], *, chunk_rows: int = CHUNK_ROWS,
               row: str = "file_row_number", lookup: bool = False) -> str:
    """DuckDB SQL that decodes coded columns to their int64 codes.

    Parameters
    ----------
    offsets : str
        Name of a table or view holding the row position ``row`` (BIGINT, 0-based and unique,
        e.g. ``read_parquet(..., file_row_number = true)``) and one offsets column per entry of
        ``predictors`` (NULL where not valid).
    chunks : str
        Name of a table or view shaped like :func:`chunk_table`.
    predictors : mapping of column name to predictor
    chunk_rows : int
        The chunk size the columns were coded with.
    lookup : bool
        If true, the query has one bind parameter ``$row`` and returns that row only, reading
        and decoding only the rows of its chunk.

    Returns
    -------
    str
        ``SELECT row, <column>...`` with each column's codes (BIGINT, NULL where not valid), in
        no particular row order. Names go through :func:`quote_identifier`; the only numbers
        written into the text are ``chunk_rows`` (checked to be an integer) and constants.
        Each row is first joined with its chunk's reference and start; the difference codings
        then decode as ``start + sum(offset + reference)`` over the chunk's rows up to the
        current one, a window ``PARTITION BY chunk ORDER BY row`` (one window sum per column:
        measured 1.5x faster than a sum and a count of the offsets alone, joined afterwards).
        ``offset + reference`` is a stored value within +-2**62 and the sums are HUGEINT, so
        nothing overflows before the final cast.
    """
    _check_chunk_rows(chunk_rows)
    if not predictors:
        raise InvalidInputError("decode_sql needs at least one column to decode.")
    for predictor in predictors.values():
        _check_predictor(predictor)
    k = int(chunk_rows)
    r = quote_identifier(row)
    chunk = quote_identifier(CHUNK_FIELD)
    window = f"(PARTITION BY {chunk} ORDER BY {r})"
    joined_parts, decoded_parts = [f"o.{r} AS {r}", f"c.{chunk} AS {chunk}"], [f"{r}"]
    for i, (name, predictor) in enumerate(predictors.items()):
        col = quote_identifier(name)
        reference, start = (quote_identifier(f) for f in chunk_field_names(name))
        value = quote_identifier(f"_v{i}")
        if predictor in DIFFERENCE_PREDICTORS:
            # the stored value (difference) per row; NULL where not valid, skipped by sum
            start_alias = quote_identifier(f"_s{i}")
            joined_parts += [f"CAST(o.{col} AS BIGINT) + c.{reference} AS {value}", f"c.{start} AS {start_alias}"]
            decoded_parts.append(f"CASE WHEN {value} IS NULL THEN NULL ELSE CAST({start_alias}::HUGEINT + "
                                 f"sum({value}) OVER {window} AS BIGINT) END AS {col}")
        else:
            joined_parts.append(f"CAST(o.{col} AS BIGINT) + c.{reference} AS {value}")
            decoded_parts.append(f"{value} AS {col}")
    where = (f" WHERE o.{r} BETWEEN ($row // {k}) * {k} AND ($row // {k}) * {k} + {k - 1}" if lookup else "")
    joined = (f"SELECT {', '.join(joined_parts)} FROM {quote_identifier(offsets)} AS o JOIN "
              f"{quote_identifier(chunks)} AS c ON c.{chunk} = o.{r} // {k}{where}")
    decoded = f"SELECT {', '.join(decoded_parts)} FROM ({joined}) AS j"
    return f"SELECT * FROM ({decoded}) AS d WHERE {r} = $row" if lookup else decoded
