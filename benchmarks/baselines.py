"""Simple error-bounded encodings of a numeric table, the baselines rankfold is measured against.

Each function takes a pyarrow Table of numeric columns (NULLs allowed; NaN and +-inf are not,
because none of these encodings can keep them within a tolerance), encodes it into an in-memory
Parquet file, decodes the values the way a reader would, and returns an ``Encoded``:

* ``nbytes``: the size of the Parquet file (everything needed to decode it, metadata included);
* ``max_error``: per column, the largest |true - decoded| measured in float64 (0 where a column
  is all NULL);
* ``detail``: per column, the parameter the encoding chose (the step, or the number of digits);
* ``layout``: the Parquet writer settings that produced ``nbytes``.

``lossless_bss``    the table as it is: Parquet zstd, dictionary off, BYTE_STREAM_SPLIT floats.
``quantize_columns`` per-column fixed-step quantization: q = round(x / step), step = 2 x the
                     column's tolerance, the integers q - min(q) stored in the smallest
                     integer type (step and min(q) in the file metadata).
``round_significant`` rounding to the fewest significant decimal digits d (per column) that keep
                     every value within its column's tolerance (common practice), stored as
                     float64.

The lossy baselines try a few ordinary Parquet writer settings (zstd throughout, whole table or
chosen column by column by measurement, as rankfold chooses its own) and keep the smallest file,
so that rankfold is compared with the strongest version of each.
"""

from __future__ import annotations

import io
import json
from typing import Mapping, NamedTuple, Sequence

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

__all__ = [
    "Encoded",
    "lossless_bss",
    "quantize_columns",
    "quantize_column",
    "quantized_table",
    "decode_quantized",
    "round_significant",
    "significant_table",
    "fewest_digits",
    "round_to_digits",
    "column_values",
    "column_std",
]

ZSTD_LEVEL = 3          # zstd's own default level; rankfold writes its archives at the same level
MAX_DIGITS = 17         # 17 significant digits always reproduce a float64 exactly


class Encoded(NamedTuple):
    nbytes: int
    max_error: np.ndarray
    detail: np.ndarray
    layout: str

    def within(self, tolerances: Sequence[float] | np.ndarray) -> bool:
        """True when every column's measured max error is at most its tolerance."""
        return bool(np.all(self.max_error <= np.asarray(tolerances, dtype=np.float64)))


# -- helpers ---------------------------------------------------------------------------------------

def column_values(column: pa.ChunkedArray | pa.Array) -> tuple[np.ndarray, np.ndarray]:
    """(float64 values with NaN at NULLs, NULL mask) of one numeric column."""
    column = column.combine_chunks() if isinstance(column, pa.ChunkedArray) else column
    nulls = column.is_null().to_numpy(zero_copy_only=False)
    values = column.cast(pa.float64()).fill_null(np.nan).to_numpy(zero_copy_only=False)
    return np.asarray(values, dtype=np.float64), np.asarray(nulls, dtype=bool)


def column_std(table: pa.Table) -> np.ndarray:
    """Per column population standard deviation (ddof=0) of the non-NULL values."""
    return np.array([np.nanstd(column_values(table.column(j))[0]) for j in range(table.num_columns)])


def _tolerances(table: pa.Table, tolerances: Sequence[float] | Mapping[str, float] | np.ndarray) -> np.ndarray:
    if isinstance(tolerances, Mapping):
        tol = np.array([float(tolerances[name]) for name in table.column_names])
    else:
        tol = np.asarray(tolerances, dtype=np.float64).reshape(-1)
        if tol.size == 1:
            tol = np.full(table.num_columns, float(tol[0]))
    if tol.shape != (table.num_columns,):
        raise ValueError(f"need one tolerance per column ({table.num_columns}); got {tol.size}")
    if not np.all(np.isfinite(tol) & (tol > 0)):
        raise ValueError("every tolerance must be a positive finite number")
    return tol


def _checked_values(table: pa.Table, j: int) -> tuple[np.ndarray, np.ndarray]:
    values, nulls = column_values(table.column(j))
    if not np.all(np.isfinite(values[~nulls])):
        raise ValueError(f"column {table.column_names[j]!r} holds NaN or +-inf; the baselines "
                         "encode finite values and NULLs only")
    return values, nulls


def _parquet_bytes(table: pa.Table, **writer: object) -> int:
    sink = io.BytesIO()
    pq.write_table(table, sink, compression="zstd", compression_level=ZSTD_LEVEL, **writer)
    return sink.tell()


def _smallest(table: pa.Table, layouts: dict[str, dict], per_column: Sequence[str] = ()) -> tuple[int, str]:
    """The smallest file over whole-table ``layouts`` and, if ``per_column`` names encodings,
    one more layout that gives each column the encoding that made it smallest on its own."""
    sizes = {name: _parquet_bytes(table, **writer) for name, writer in layouts.items()}
    if per_column:
        choice = {}
        for name in table.column_names:
            alone = table.select([name])
            trial = {enc: _parquet_bytes(alone, use_dictionary=True) if enc == "dictionary" else
                     _parquet_bytes(alone, use_dictionary=False, column_encoding={name: enc})
                     for enc in per_column}
            choice[name] = min(trial, key=trial.__getitem__)
        dictionary = [n for n, enc in choice.items() if enc == "dictionary"]
        encodings = {n: enc for n, enc in choice.items() if enc != "dictionary"}
        counts = ", ".join(f"{sum(e == enc for e in choice.values())} {enc}" for enc in per_column
                           if enc in choice.values())
        sizes[f"zstd, per column ({counts})"] = _parquet_bytes(
            table, use_dictionary=dictionary or False, column_encoding=encodings or None)
    best = min(sizes, key=sizes.__getitem__)
    return sizes[best], best


def _float_columns(table: pa.Table) -> list[str]:
    return [f.name for f in table.schema if pa.types.is_floating(f.type)]


# -- (a) lossless ----------------------------------------------------------------------------------

def lossless_bss(table: pa.Table) -> Encoded:
    """The table unchanged as Parquet zstd, dictionary off, BYTE_STREAM_SPLIT for float columns
    (integer columns keep the default encoding). Max error 0 by construction."""
    encoding = {name: "BYTE_STREAM_SPLIT" for name in _float_columns(table)}
    nbytes = _parquet_bytes(table, use_dictionary=False, column_encoding=encoding or None)
    zeros = np.zeros(table.num_columns)
    return Encoded(nbytes, zeros, zeros.copy(), "zstd, no dictionary, BYTE_STREAM_SPLIT floats")


# -- (b) per-column fixed-step quantization --------------------------------------------------------

def _smallest_int(q: np.ndarray) -> np.dtype:
    if q.size == 0:
        return np.dtype(np.int8)
    lo, hi = q.min(), q.max()
    for dtype in (np.int8, np.int16, np.int32, np.int64):
        info = np.iinfo(dtype)
        if info.min <= lo and hi <= info.max:
            return np.dtype(dtype)
    raise ValueError("quantized values exceed int64; the tolerance is too small for this column")


def quantize_column(values: np.ndarray, tolerance: float) -> tuple[np.ndarray, float]:
    """q = round(x / step) with step = 2 x tolerance, so |x - q * step| <= tolerance in exact
    arithmetic. Decoding (q * step) rounds once more; if that ever pushes a value past the
    tolerance (a tie at a large magnitude), the step is shrunk by a relative 2**-40 until every
    value fits. Returns (q as float64 integers, the step used)."""
    step = 2.0 * tolerance
    finite = values[np.isfinite(values)]
    for _ in range(64):
        q = np.rint(finite / step)
        if np.all(np.abs(finite - q * step) <= tolerance):
            break
        step *= 1.0 - 2.0**-40
    else:  # pragma: no cover - would need a step far below the spacing of the values
        raise ValueError("could not quantize within the tolerance")
    out = np.full(values.shape, np.nan)
    out[np.isfinite(values)] = q
    return out, step


def quantized_table(table: pa.Table, tolerances: Sequence[float] | Mapping[str, float] | np.ndarray
                    ) -> tuple[pa.Table, np.ndarray, np.ndarray]:
    """The quantized table as stored: per column the integers q - min(q) (non-negative, in the
    smallest integer type, NULLs kept), with the steps and the offsets min(q) in the schema
    metadata (``quantization_steps``, ``quantization_offsets``). Subtracting the minimum keeps
    the sign bits constant, which byte-stream-split and delta codings need to compress well.
    Returns (table, steps, measured max error per column of the decoded (s + min q) * step)."""
    tol = _tolerances(table, tolerances)
    arrays, steps, errors = [], np.empty(table.num_columns), np.zeros(table.num_columns)
    offsets = np.zeros(table.num_columns, dtype=np.int64)
    for j in range(table.num_columns):
        values, nulls = _checked_values(table, j)
        q, step = quantize_column(values, tol[j])
        kept = q[~nulls]
        low = kept.min() if kept.size else 0.0
        shifted = kept - low
        qi = shifted.astype(_smallest_int(shifted))
        decoded = (qi.astype(np.float64) + low) * step          # what a reader computes
        errors[j] = np.abs(values[~nulls] - decoded).max() if kept.size else 0.0
        full = np.zeros(values.shape, dtype=qi.dtype)
        full[~nulls] = qi
        arrays.append(pa.array(full, mask=nulls))
        steps[j], offsets[j] = step, int(low)
    names = table.column_names
    meta = {b"quantization_steps": json.dumps(dict(zip(names, steps.tolist()))).encode(),
            b"quantization_offsets": json.dumps(dict(zip(names, offsets.tolist()))).encode()}
    return pa.table(arrays, names=names).replace_schema_metadata(meta), steps, errors


def decode_quantized(stored: pa.Table) -> np.ndarray:
    """Values of a quantized table as a reader rebuilds them: (s + offset) * step, NaN at NULLs."""
    steps = json.loads(stored.schema.metadata[b"quantization_steps"])
    offsets = json.loads(stored.schema.metadata[b"quantization_offsets"])
    return np.column_stack([(column_values(stored.column(name))[0] + offsets[name]) * steps[name]
                            for name in stored.column_names])


def quantize_columns(table: pa.Table, tolerances: Sequence[float] | Mapping[str, float] | np.ndarray) -> Encoded:
    """Per-column fixed-step quantization (step = 2 x tolerance), integers in the smallest
    integer type, Parquet zstd; the steps are stored in the file's key-value metadata.
    ``detail`` holds the step of each column."""
    stored, steps, errors = quantized_table(table, tolerances)
    names = stored.column_names
    nbytes, layout = _smallest(stored, {
        "zstd, dictionary": dict(use_dictionary=True),
        "zstd, no dictionary": dict(use_dictionary=False),
        "zstd, DELTA_BINARY_PACKED": dict(use_dictionary=False,
                                          column_encoding={n: "DELTA_BINARY_PACKED" for n in names}),
        "zstd, BYTE_STREAM_SPLIT": dict(use_dictionary=False,
                                        column_encoding={n: "BYTE_STREAM_SPLIT" for n in names}),
    }, per_column=("dictionary", "PLAIN", "BYTE_STREAM_SPLIT", "DELTA_BINARY_PACKED"))
    return Encoded(nbytes, errors, steps, layout)


# -- (c) significant decimal digits ----------------------------------------------------------------

def round_to_digits(values: np.ndarray, digits: int | np.ndarray) -> np.ndarray:
    """Round each value to ``digits`` significant decimal digits (0 stays 0, NaN stays NaN),
    computed like numpy.round: scale by a power of ten, round half to even, scale back (for
    negative decimal places it divides first, as numpy.round does)."""
    values = np.asarray(values, dtype=np.float64)
    digits = np.broadcast_to(np.asarray(digits), values.shape)
    out = values.copy()
    nonzero = np.isfinite(values) & (values != 0)
    x = values[nonzero]
    exponent = np.floor(np.log10(np.abs(x)))
    # log10 can land one off next to a power of ten; fix the exponent so 10**e <= |x| < 10**(e+1)
    exponent[np.abs(x) < 10.0**exponent] -= 1
    exponent[np.abs(x) >= 10.0 ** (exponent + 1)] += 1
    decimals = digits[nonzero] - 1 - exponent
    rounded = np.empty_like(x)
    up = decimals >= 0
    scale = 10.0 ** decimals[up]
    rounded[up] = np.rint(x[up] * scale) / scale
    scale = 10.0 ** (-decimals[~up])
    rounded[~up] = np.rint(x[~up] / scale) * scale
    out[nonzero] = rounded
    return out


def fewest_digits(values: np.ndarray, tolerance: float) -> tuple[int, np.ndarray, float]:
    """The fewest significant digits d (1..17) with |x - round_to_digits(x, d)| <= tolerance
    for every value; returns (d, rounded values, max error)."""
    finite = values[np.isfinite(values)]
    for d in range(1, MAX_DIGITS):
        rounded = round_to_digits(finite, d)
        err = np.abs(finite - rounded).max() if finite.size else 0.0
        if err <= tolerance:
            out = values.copy()
            out[np.isfinite(values)] = rounded
            return d, out, float(err)
    # 17 significant digits identify every float64, so the value itself is its 17-digit form
    # (the scaled arithmetic above can miss it by an ulp when the tolerance is below one ulp)
    return MAX_DIGITS, values.copy(), 0.0


def significant_table(table: pa.Table, tolerances: Sequence[float] | Mapping[str, float] | np.ndarray
                      ) -> tuple[pa.Table, np.ndarray, np.ndarray]:
    """The digit-rounded table as stored (float64, NULLs kept). Returns (table, digits per
    column, measured max error per column)."""
    tol = _tolerances(table, tolerances)
    arrays, digits, errors = [], np.zeros(table.num_columns, dtype=np.int64), np.zeros(table.num_columns)
    for j in range(table.num_columns):
        values, nulls = _checked_values(table, j)
        d, rounded, err = fewest_digits(values, tol[j])
        digits[j], errors[j] = d, err
        arrays.append(pa.array(np.where(nulls, 0.0, rounded), mask=nulls))
    return pa.table(arrays, names=table.column_names), digits, errors


def round_significant(table: pa.Table, tolerances: Sequence[float] | Mapping[str, float] | np.ndarray) -> Encoded:
    """Each column rounded to the fewest significant digits that keep it within its tolerance,
    stored as float64, Parquet zstd. ``detail`` holds the digits of each column."""
    stored, digits, errors = significant_table(table, tolerances)
    names = stored.column_names
    nbytes, layout = _smallest(stored, {
        "zstd, dictionary": dict(use_dictionary=True),
        "zstd, no dictionary": dict(use_dictionary=False),
        "zstd, BYTE_STREAM_SPLIT": dict(use_dictionary=False,
                                        column_encoding={n: "BYTE_STREAM_SPLIT" for n in names}),
    }, per_column=("dictionary", "PLAIN", "BYTE_STREAM_SPLIT"))
    return Encoded(nbytes, errors, digits, layout)
