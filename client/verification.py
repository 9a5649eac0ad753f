"""Verify an archive: its files against the manifest, and, given the source, every bound.

``verify(archive_path)`` checks that every file listed in the manifest exists with its recorded
size and SHA-256. ``verify(archive_path, source=...)`` also streams the source once, rebuilds
the same rows from the archive and checks, cell by cell, that

* every rebuilt numeric value, as ``Archive.rebuild()`` returns it (typed: integer columns
  rounded, float32 columns narrowed), is within its bound of the source value,
* NULL, NaN and infinite cells come back exactly as they were,
* the columns kept exactly (keys, non-numeric columns) are equal,
* the source has the archive's rows and columns,

and re-measures the error per column (largest error and relative RMS) next to the ledger's
figures. The result is a plain dict (JSON-ready); ``report["ok"]`` is True when nothing failed.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any, Callable

import numpy as np
import pyarrow as pa

from rankfold.udfs.passes.progress import Progress
from rankfold.udfs.passes.sources import block_from_batch, open_source
from rankfold.udfs.errors import ArchiveNotFoundError, CorruptArchiveError
from rankfold.udfs.store.manifest import read_manifest, sha256_of
from rankfold.udfs.store.reader import ArchiveReader

from .archive import Archive

__all__ = ["verify", "check_files"]

_BATCH_ROWS = 65_536
_MAX_EXAMPLES = 5


def check_files(path: str | Path) -> list[dict[str, Any]]:
    """One entry per file listed in the manifest: name, bytes, ok and the problem if any."""
    directory = Path(path)
    if not directory.exists():
        raise ArchiveNotFoundError(f"No archive at {directory}. Check the path.")
    if not directory.is_dir():
        raise CorruptArchiveError(f"{directory} is a file, not an archive directory.")
    manifest = read_manifest(directory)
    out = []
    for entry in manifest["files"]:
        file = directory / entry["name"]
        problem = None
        if file.is_symlink() and file.resolve().parent != directory.resolve():
            problem = "a symbolic link that leaves the archive directory"
        elif not file.is_file():
            problem = "missing"
        elif file.stat().st_size != entry["bytes"]:
            problem = f"{file.stat().st_size} bytes where the manifest records {entry['bytes']}"
        elif sha256_of(file) != entry["sha256"]:
            problem = "SHA-256 differs from the manifest"
        out.append({"name": entry["name"], "bytes": entry["bytes"], "ok": problem is None,
                    "problem": problem})
    return out


def verify(archive: str | Path, source: Any = None, *, connection: Any = None,
           batch_rows: int = _BATCH_ROWS,
           progress: Callable[[dict[str, Any]], None] | None = None) -> dict[str, Any]:
    """Check the archive at ``archive`` (and its bounds against ``source``); return a report.

    ``source`` is anything ``rankfold.compress`` accepts (a Parquet/CSV path, an Arrow table,
    a numpy array, a table name or SELECT with ``connection=``). ``progress`` receives the
    same dicts as compress's callback, with stage ``"verify"``.
    """
    path = Path(archive)
    files = check_files(path)
    manifest = read_manifest(path)
    report: dict[str, Any] = {
        "archive": str(path),
        "archive_id": manifest["archive_id"],
        "files": files,
        "checksums_ok": all(f["ok"] for f in files),
        "source": None,
        "problems": [f"{f['name']}: {f['problem']}" for f in files if not f["ok"]],
    }
    if report["checksums_ok"]:
        # the manifest against the files' own contents (names, types, row counts): an edited
        # manifest is refused here too, as CorruptArchiveError
        ArchiveReader(path)
    if source is not None:
        if report["checksums_ok"]:
            report["source"] = _against_source(Archive(path), source, connection, batch_rows, progress)
            report["problems"] += report["source"]["problems"]
        else:
            report["problems"].append("the source was not compared: the archive's files do not "
                                      "match its manifest")
    report["ok"] = not report["problems"]
    return report


def _against_source(arch: Archive, source: Any, connection: Any, batch_rows: int,
                    progress: Callable | None) -> dict[str, Any]:
    src = open_source(source, connection)
    try:
        return _compare(arch, src, batch_rows, progress)
    finally:
        src.close()


def _compare(arch: Archive, src, batch_rows: int, progress: Callable | None) -> dict[str, Any]:
    numeric = arch.numeric_columns
    exact_names = [f["name"] for f in arch.manifest["schema"] if f["role"] == "exact"]
    m, n = arch.shape
    problems: list[str] = []
    result: dict[str, Any] = {"description": src.description, "rows_archive": m, "rows_source": 0,
                              "cells_checked": 0, "cells_exact": 0, "violations": 0,
                              "missing_value_mismatches": 0, "exact_column_mismatches": {},
                              "largest_error_over_bound": 0.0, "examples": [], "columns": [],
                              "problems": problems}
    missing = [c for c in numeric + exact_names if c not in src.schema.names]
    if missing:
        problems.append(f"the source lacks the archive's columns {missing[:10]}")
        return result
    ledger = arch.column_ledger()
    std = ledger.column("std").to_numpy(zero_copy_only=False)
    err_max = np.zeros(n)
    err_sq = np.zeros(n)
    err_count = np.zeros(n, dtype=np.int64)
    violations = np.zeros(n, dtype=np.int64)
    worst_ratio = 0.0
    tracker = Progress(progress, "verify", m)
    start = 0
    counted = 0
    for batch in src.batches(numeric + exact_names, batch_rows):
        b = batch.num_rows
        counted += b
        stop = start + b
        if stop > m:  # more rows than the archive: count them, compare no further
            start = stop
            continue
        rebuilt = arch._rebuild("verify", slice(start, stop), None)
        # compare what rebuild() hands out: the typed table (integers rounded, float32
        # narrowed, all clamped), read back as float64 -- not an intermediate value
        served = arch._table(rebuilt)
        rebuilt.values = np.column_stack(
            [served.column(name).cast(pa.float64()).fill_null(np.nan).to_numpy() for name in numeric]
        ) if numeric else rebuilt.values
        truth, mask = block_from_batch(batch, numeric)
        src_null = mask if mask is not None else np.zeros_like(rebuilt.nulls)
        # missing-value pattern: NULL where NULL, NaN where NaN, the same infinity
        null_bad = src_null != rebuilt.nulls
        with np.errstate(invalid="ignore"):
            nan_bad = ~src_null & (np.isnan(truth) != np.isnan(rebuilt.values))
            inf_t, inf_v = np.isinf(truth), np.isinf(rebuilt.values)
            inf_bad = ~src_null & (inf_t | inf_v) & (truth != rebuilt.values)
        pattern_bad = null_bad | nan_bad | inf_bad
        finite = ~src_null & np.isfinite(truth) & np.isfinite(rebuilt.values)
        error = np.where(finite, np.abs(truth - np.where(finite, rebuilt.values, 0.0)), 0.0)
        over = finite & (error > rebuilt.bounds)
        approximated = finite & ~rebuilt.exact
        err_max = np.maximum(err_max, np.where(approximated, error, 0.0).max(axis=0, initial=0.0))
        err_sq += (np.where(approximated, error, 0.0) ** 2).sum(axis=0)
        err_count += approximated.sum(axis=0)
        violations += over.sum(axis=0) + pattern_bad.sum(axis=0)
        result["cells_checked"] += int(b * n)
        result["cells_exact"] += int(rebuilt.exact.sum())
        result["missing_value_mismatches"] += int(pattern_bad.sum())
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = np.where(finite & (rebuilt.bounds > 0), error / rebuilt.bounds, 0.0)
        ratio = np.where(finite & (rebuilt.bounds == 0) & (error > 0), np.inf, ratio)
        if ratio.size:
            worst_ratio = max(worst_ratio, float(ratio.max()))
        for i, j in zip(*np.nonzero(over | pattern_bad)):
            if len(result["examples"]) >= _MAX_EXAMPLES:
                break
            result["examples"].append({
                "row": int(start + i), "column": numeric[j],
                "source": None if src_null[i, j] else _number(truth[i, j]),
                "rebuilt": None if rebuilt.nulls[i, j] else _number(rebuilt.values[i, j]),
                "bound": float(rebuilt.bounds[i, j]),
            })
        for name in exact_names:
            theirs = pa.chunked_array([batch.column(name)])
            ours = rebuilt.rows.column(name)
            if ours.type != theirs.type:
                ours = ours.cast(theirs.type)
            if not theirs.equals(ours):
                same = [a == c for a, c in zip(theirs.to_pylist(), ours.to_pylist())]
                result["exact_column_mismatches"][name] = (
                    result["exact_column_mismatches"].get(name, 0) + same.count(False))
        start = stop
        tracker.advance(b)
    tracker.finish()
    result["rows_source"] = counted
    if counted != m:
        problems.append(f"the source has {counted} rows where the archive has {m}; it is not "
                        "the table this archive was compressed from, or it has changed since")
    result["violations"] = int(violations.sum())
    result["largest_error_over_bound"] = worst_ratio if math.isfinite(worst_ratio) else None
    ledger_max = ledger.column("err_max").to_numpy(zero_copy_only=False)
    ledger_rel = ledger.column("rel_rms").to_numpy(zero_copy_only=False)
    for j, name in enumerate(numeric):
        rms = math.sqrt(err_sq[j] / err_count[j]) if err_count[j] else 0.0
        result["columns"].append({
            "name": name,
            "cells_approximated": int(err_count[j]),
            "measured_err_max": float(err_max[j]),
            "ledger_err_max": _number(ledger_max[j]),
            "measured_rel_rms": rms / std[j] if std[j] > 0 else None,
            "ledger_rel_rms": _number(ledger_rel[j]),
            "violations": int(violations[j]),
        })
    if result["violations"]:
        bad = [c["name"] for c in result["columns"] if c["violations"]]
        problems.append(f"{result['violations']} cells are outside their bounds or changed their "
                        f"missing-value pattern, in the columns {bad[:10]}")
    for name, count in result["exact_column_mismatches"].items():
        problems.append(f"{count} values of the exactly kept column {name} differ from the source")
    return result


def _number(value: Any) -> Any:
    value = float(value)
    if math.isnan(value):
        return None
    return value if math.isfinite(value) else ("inf" if value > 0 else "-inf")
