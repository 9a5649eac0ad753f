"""Compressing one benchmark variant and measuring it: shared by the size benchmarks.

``run_variant`` compresses a table with a per-column ``max_abs_error`` and the variant's options,
``archive_bytes`` counts every byte a user keeps (every file under the archive folder: data,
manifest, version journal), ``check_archive`` measures the rebuilt cells and bounds against the
tolerance.
"""

from __future__ import annotations

import shutil
import time
from pathlib import Path

import numpy as np
import pyarrow as pa

import rankfold

__all__ = ["archive_bytes", "check_archive", "run_variant"]


def archive_bytes(path: Path) -> int:
    """Every byte a user keeps: all files under the archive folder."""
    return sum(f.stat().st_size for f in Path(path).rglob("*") if f.is_file())


def check_archive(archive: rankfold.Archive, names: list[str], truth: np.ndarray, tol: np.ndarray
                  ) -> tuple[float, float]:
    """(max over cells of |true - rebuilt| / tolerance, max of bound / tolerance); ``truth``
    (m, q) float64 with NaN where NULL, ``tol`` (q,) in column units."""
    rebuilt = archive.to_numpy(columns=names)
    bounds = archive.cell_bounds(columns=names)
    both_missing = np.isnan(truth) & np.isnan(rebuilt)
    err = np.where(both_missing, 0.0, np.abs(truth - rebuilt))
    err = np.where(np.isnan(err), np.inf, err)                 # NULL on one side only: a failure
    return float(np.max(err / tol)), float(np.nanmax(bounds / tol))


def run_variant(table: pa.Table, path: Path, tolerances: dict[str, float], options: dict) -> dict:
    """Compress ``table`` to ``path`` (replacing an earlier run's folder) and return the archive,
    its bytes, seconds, kind and rank; or ``{"error": message}`` when compress refused it (one
    failing variant must not hide the others)."""
    shutil.rmtree(path, ignore_errors=True)
    started = time.perf_counter()
    try:
        archive = rankfold.compress(table, path, max_abs_error=tolerances, seed=0, **options)
    except Exception as exc:  # report and go on
        return {"error": f"{type(exc).__name__}: {str(exc).splitlines()[0][:160]}"}
    seconds = time.perf_counter() - started
    method = archive.manifest.get("method", {})
    return {"archive": archive, "bytes": archive_bytes(path), "seconds": seconds,
            "kind": method.get("kind", "?"), "rank": method.get("rank", "?")}
