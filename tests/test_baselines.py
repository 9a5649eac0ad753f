"""The benchmark baselines (benchmarks/baselines.py) are honest: each one measures the error it
really achieves, that error is within the tolerance, and each encoding follows its stated rule,
checked against numpy and Python references. All tables are invented by seeded generators."""

from __future__ import annotations

import importlib.util
import io
import json
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

_spec = importlib.util.spec_from_file_location(
    "rankfold_bench_baselines", Path(__file__).resolve().parents[1] / "benchmarks" / "baselines.py")
baselines = importlib.util.module_from_spec(_spec)
_spec.loader.exec_module(baselines)


def _table(seed: int, rows: int = 1_500) -> pa.Table:
    """Columns over 6 decades of scale, large means, an integer column, a few NULLs."""
    rng = np.random.default_rng(seed)
    scales = np.logspace(-3, 3, 6)
    cols = {f"f{j}": rng.normal(rng.normal(0, 1e3), s, rows) for j, s in enumerate(scales)}
    cols["grid"] = np.round(rng.normal(610.0, 25.0, rows), 2)          # values on a 0.01 grid
    arrays = {name: pa.array(v, mask=rng.random(rows) < 0.01) for name, v in cols.items()}
    arrays["count"] = pa.array(rng.poisson(3.0, rows).astype(np.int64))
    return pa.table(arrays)


def _truth(table: pa.Table) -> np.ndarray:
    return np.column_stack([baselines.column_values(table.column(j))[0] for j in range(table.num_columns)])


def _roundtrip(table: pa.Table) -> pa.Table:
    sink = io.BytesIO()
    pq.write_table(table, sink, compression="zstd")
    return pq.read_table(io.BytesIO(sink.getvalue()))


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("fraction", [1e-1, 1e-2, 1e-3])
def test_lossy_baselines_stay_within_tolerance(seed, fraction):
    table = _table(seed)
    tol = fraction * baselines.column_std(table)
    for encode in (baselines.quantize_columns, baselines.round_significant):
        result = encode(table, tol)
        assert result.within(tol), encode.__name__
        assert np.all(result.max_error <= tol)
        assert result.nbytes > 0
    # a mapping of column name to tolerance means the same as the array
    by_name = dict(zip(table.column_names, tol))
    assert baselines.quantize_columns(table, by_name).nbytes == baselines.quantize_columns(table, tol).nbytes


def test_quantization_round_trip_by_numpy():
    # rule: q = round(x / step), step = 2 x tolerance, stored q - min(q), decoded
    # x' = (stored + min(q)) * step (numpy.rint, read back through a Parquet file)
    table = _table(3)
    tol = 1e-2 * baselines.column_std(table)
    stored, steps, errors = baselines.quantized_table(table, tol)
    back = _roundtrip(stored)                                   # through a real Parquet file
    assert back.schema.metadata[b"quantization_steps"] == stored.schema.metadata[b"quantization_steps"]
    truth = _truth(table)
    decoded = baselines.decode_quantized(back)
    np.testing.assert_array_equal(np.isnan(decoded), np.isnan(truth))       # NULLs kept
    ok = ~np.isnan(truth)
    err = np.where(ok, np.abs(truth - np.nan_to_num(decoded)), 0.0)
    np.testing.assert_array_equal(err.max(axis=0), errors)                  # measured honestly
    assert np.all(err.max(axis=0) <= tol)
    offsets = json.loads(back.schema.metadata[b"quantization_offsets"])
    for j, name in enumerate(table.column_names):
        stored_ints = back.column(name).to_numpy(zero_copy_only=False)[ok[:, j]].astype(np.float64)
        expected = np.rint(truth[ok[:, j], j] / steps[j])
        assert stored_ints.min() == 0 and offsets[name] == expected.min()   # stored: q - min(q)
        np.testing.assert_array_equal(stored_ints + offsets[name], expected)
        expected = expected - expected.min()
        assert steps[j] <= 2 * tol[j] and steps[j] >= 2 * tol[j] * (1 - 1e-9)
        # the smallest integer type that holds the integers
        width = pa.types.is_int8, pa.types.is_int16, pa.types.is_int32, pa.types.is_int64
        kind = next(k for k, test in enumerate(width) if test(back.schema.field(name).type))
        span = max(abs(expected.min()), abs(expected.max()))
        assert span <= np.iinfo((np.int8, np.int16, np.int32, np.int64)[kind]).max
        if kind:                                                  # and no smaller one does
            assert span > np.iinfo((np.int8, np.int16, np.int32)[kind - 1]).max


def test_quantization_ties_at_large_magnitude_stay_within_tolerance():
    # Values exactly halfway between two steps, far from zero: decoding q * step in float64
    # overshoots the tolerance for some of them with the plain step; the baseline must not.
    rng = np.random.default_rng(4)
    tol = 0.1
    x = (rng.integers(1_000, 1_000_000_000, 20_000).astype(np.float64) + 0.5) * (2 * tol)
    plain = np.rint(x / (2 * tol))
    assert np.abs(x - plain * (2 * tol)).max() > tol        # the hazard is real on this data
    q, step = baselines.quantize_column(x, tol)
    assert step < 2 * tol
    assert np.abs(x - q * step).max() <= tol


def test_smallest_integer_type():
    assert baselines._smallest_int(np.array([-128.0, 127.0])) == np.int8
    assert baselines._smallest_int(np.array([-129.0, 0.0])) == np.int16
    assert baselines._smallest_int(np.array([0.0, 32768.0])) == np.int32
    assert baselines._smallest_int(np.array([0.0, 2.0**31])) == np.int64


@pytest.mark.parametrize("value, digits, expected", [
    (123.456, 3, 123.0),
    (123.456, 4, 123.5),
    (0.0012345, 2, 0.0012),
    (-98765.0, 2, -99000.0),
    (9.999, 2, 10.0),
    (1.0, 1, 1.0),
    (0.0, 3, 0.0),
    (6.02214076e23, 3, 6.02e23),
])
def test_significant_digits_known_values(value, digits, expected):
    # common practice: Python's round(x, d - 1 - floor(log10|x|)) and
    # numpy.format_float_positional(x, precision=d, unique=False, fractional=False)
    ours = float(baselines.round_to_digits(np.array([value]), digits)[0])
    assert ours == expected
    if value != 0:
        decimals = digits - 1 - int(np.floor(np.log10(abs(value))))
        assert round(value, decimals) == expected
    text = np.format_float_positional(value, precision=digits, unique=False, fractional=False)
    assert float(text) == expected


def test_significant_digits_agree_with_numpy_on_random_values():
    rng = np.random.default_rng(5)
    x = rng.standard_normal(3_000) * 10.0 ** rng.uniform(-8, 8, 3_000)
    d = rng.integers(1, 13, 3_000)
    ours = baselines.round_to_digits(x, d)
    decimals = (d - 1 - np.floor(np.log10(np.abs(x)))).astype(int)
    # numpy.round with the same decimal places: identical (same scale-rint-unscale rule)
    np.testing.assert_array_equal(ours, [np.round(v, k) for v, k in zip(x, decimals)])
    # exact decimal rounding (numpy.format_float_positional): equal up to 2 ulp (the scaled
    # product x * 10**k is itself rounded before rint)
    exact = np.array([float(np.format_float_positional(v, precision=int(k), unique=False, fractional=False))
                      for v, k in zip(x, d)])
    assert np.all(np.abs(ours - exact) <= 2 * np.spacing(np.abs(exact)))
    # and d significant digits means d digits: the rounded value printed with d digits is itself
    back = [float(np.format_float_positional(v, precision=int(k), unique=False, fractional=False))
            for v, k in zip(ours, d)]
    assert np.all(np.abs(ours - back) <= 2 * np.spacing(np.abs(ours)))


def test_fewest_digits_is_the_fewest():
    # 123.456 within 0.05: 3 digits give 123 (error 0.456), 4 give 123.5 (error 0.044)
    d, rounded, err = baselines.fewest_digits(np.array([123.456, 0.5, np.nan]), 0.05)
    assert d == 4
    np.testing.assert_array_equal(rounded[:2], [123.5, 0.5])
    assert np.isnan(rounded[2])
    assert err == pytest.approx(0.044, abs=1e-12)
    # one significant digit already holds 3, 40 and 500 exactly
    d, rounded, err = baselines.fewest_digits(np.array([3.0, 40.0, -500.0]), 1e-9)
    assert (d, err) == (1, 0.0)
    # 0.123456789 within 5e-10 needs 9 digits (0.123456789); 8 give 0.12345679 (error 1e-9)
    assert baselines.fewest_digits(np.array([0.123456789]), 5e-10)[0] == 9
    table = _table(6)
    tol = 1e-2 * baselines.column_std(table)
    stored, digits, errors = baselines.significant_table(table, tol)
    truth = _truth(table)
    back = _truth(_roundtrip(stored))
    for j in range(table.num_columns):
        x = truth[~np.isnan(truth[:, j]), j]
        assert np.abs(x - back[~np.isnan(truth[:, j]), j]).max() == errors[j] <= tol[j]
        if digits[j] > 1:                                        # one digit fewer is too few
            assert np.abs(x - baselines.round_to_digits(x, digits[j] - 1)).max() > tol[j]


def test_lossless_is_lossless_and_uses_byte_stream_split():
    table = _table(7)
    result = baselines.lossless_bss(table)
    assert result.nbytes > 0 and np.all(result.max_error == 0)
    sink = io.BytesIO()
    float_cols = [f.name for f in table.schema if pa.types.is_floating(f.type)]
    pq.write_table(table, sink, compression="zstd", compression_level=baselines.ZSTD_LEVEL,
                   use_dictionary=False, column_encoding={n: "BYTE_STREAM_SPLIT" for n in float_cols})
    assert sink.tell() == result.nbytes
    back = pq.read_table(io.BytesIO(sink.getvalue()))
    assert back.equals(table)
    meta = pq.ParquetFile(io.BytesIO(sink.getvalue())).metadata.row_group(0)
    for j, field in enumerate(table.schema):
        encodings = meta.column(j).encodings
        assert ("BYTE_STREAM_SPLIT" in encodings) == (field.name in float_cols)


def test_baselines_refuse_nan_and_bad_tolerances():
    table = pa.table({"a": [1.0, np.nan, 3.0]})
    with pytest.raises(ValueError, match="NaN"):
        baselines.quantize_columns(table, [0.1])
    with pytest.raises(ValueError, match="NaN"):
        baselines.round_significant(table, [0.1])
    good = pa.table({"a": [1.0, 2.0], "b": [3.0, 4.0]})
    with pytest.raises(ValueError, match="one tolerance per column"):
        baselines.quantize_columns(good, [0.1, 0.1, 0.1])
    with pytest.raises(ValueError, match="positive"):
        baselines.round_significant(good, [0.1, 0.0])
