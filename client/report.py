"""The quality report of an archive: one self-contained HTML file with PNG plots and tables.

``write_report(archive, "report.html")`` draws, from the archive alone:

1. the singular values of the transformed table (manifest ``spectrum``) with the chosen rank
   marked, and the best possible error at each rank beside the error this archive achieved;
2. the error of every approximated column, worst first (column ledger), with the tolerance
   line when the archive has one;
3. a row-by-column heatmap on a sample of rows: the guaranteed bound on each cell's error
   (from the ledgers), or, given ``source=``, the true error measured against the source;
4. the largest error in each row (row ledger ``_rf_err_max``);
5. which columns were kept exactly and why: each column's rank-k leverage in the rebuilt table
   and how much of the rebuild leans on each basis column.

Each plot has a table of the numbers beside it. Plots are drawn with matplotlib's Agg canvas
(no display, no global backend switch) and embedded as base64 PNG data URIs; the numbers are
also embedded as JSON (``<script id="rankfold-report-data">``). matplotlib is an optional
dependency: ``python -m pip install matplotlib`` (or the ``report`` extra).

``summary(archive)`` returns the description that ``rankfold inspect`` prints.
"""

from __future__ import annotations

import base64
import datetime as _dt
import html
import io
import json
import math
from pathlib import Path
from typing import Any, Callable

import numpy as np
import pyarrow as pa

from rankfold.udfs.errors import InvalidInputError, RankfoldError
from rankfold.udfs.store import layout

from .archive import Archive

__all__ = ["summary", "report_data", "write_report", "column_selection", "default_output"]

CAUTION = (
    "Caution: rankfold archives are lossy. Keep lossless originals wherever law, contract or "
    "safety rules require them (follow your local record-keeping law), and check a value's "
    "bound before it drives a safety, health or money decision."
)

_SAMPLE_ROWS = 48
_HEATMAP_COLUMNS = 120
_ROW_BINS = 1000
_BASIS = "#c2410c"     # basis columns (kept exactly)
_DERIVED = "#2563eb"   # derived columns (rebuilt)
_MUTED = "#9ca3af"


def _archive(archive: Any) -> Archive:
    return archive if isinstance(archive, Archive) else Archive(archive)


def _num(value: Any) -> float | None:
    if value is None:
        return None
    value = float(value)
    return value if math.isfinite(value) else None


def _g(value: Any, digits: int = 4) -> str:
    """A number as shown in the report's tables (4 significant digits)."""
    if value is None:
        return "n/a"
    if isinstance(value, (int, np.integer)) and not isinstance(value, bool):
        return f"{int(value):,}"
    value = float(value)
    if math.isnan(value):
        return "n/a"
    return f"{value:.{digits}g}"


# -- description ---------------------------------------------------------------------------------
def summary(archive: Any) -> dict[str, Any]:
    """Shape, method, rank, sizes, error summary, and which columns and rows are kept exactly."""
    arch = _archive(archive)
    m = arch.manifest
    rows, width = arch.shape
    files = [{"name": f["name"], "bytes": int(f["bytes"])} for f in m["files"]]
    return {
        "archive": str(arch.path),
        "archive_id": m["archive_id"],
        "created_at": m.get("created_at"),
        "source": m.get("source"),
        "shape": [rows, width],
        "numeric_columns": arch.numeric_columns,
        "exact_columns": list(m.get("exact_columns", [])),
        "key": m.get("key"),
        "method": m["method"]["kind"],
        "rank": m["method"]["rank"],
        "rank_reason": m["method"].get("rank_reason"),
        "transform": m.get("transform"),
        "sketch": _sketch_rows(m, rows),
        "options": m["method"].get("options", {}),
        "seed": m["method"].get("seed"),
        "basis_columns": arch.basis_columns,
        "anchor_rows": arch.anchor_rows,
        "cells_stored_exactly_outside_factors": m["errors"].get("cells_stored_exactly_outside_factors"),
        "archive_bytes": arch.nbytes,
        "raw_float64_bytes": rows * width * 8,
        "source_bytes": arch.source_bytes,
        "source_measure": (m.get("source_size") or {}).get("measure"),
        "size_comparison": arch.size_comparison,
        "files": files,
        "errors": arch.errors,
        "guarantee": arch.guarantee,
        "warnings": arch.warnings,
    }


def _option(options: dict[str, Any], name: str) -> Any:
    """A recorded compress option; archives written before the rename hold the old name."""
    old = {"column_method": "columns", "row_method": "rows"}.get(name)
    return options.get(name, options.get(old) if old else None)


def _sketch_rows(manifest: dict[str, Any], rows: int) -> dict[str, Any]:
    """Which rows the sketch read (archives written before sketch_rows read every row)."""
    return manifest.get("sketch") or {"rows_read": rows, "of_rows": rows, "sampled": False}


# -- why the basis columns ------------------------------------------------------------------------
def _ledger(arch: Archive) -> dict[str, np.ndarray]:
    table = arch.column_ledger()
    out = {name: table.column(name).to_numpy(zero_copy_only=False)
           for name in ("std", "err_max", "err_l2", "rel_rms", "shift", "scale", "mean",
                        "valid", "nulls")}
    out["role"] = np.array(table.column("role").to_pylist())
    model = arch._reader.model  # the fitted model, as the archive's readers decode it
    out["weights"] = model.weights  # (c, n)
    # absolute, per column (inf where there is none)
    out["tolerance"] = model.tolerance if np.isfinite(model.tolerance).any() else None
    return out


def _tolerance(arch: Archive, ledger: dict[str, Any]) -> np.ndarray | None:
    """Per-column absolute tolerance, from the column ledger or the options; None when absent."""
    if ledger["tolerance"] is not None:
        return ledger["tolerance"]
    value = (arch.manifest.get("targets") or {}).get("max_abs_error")
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        return np.full(arch.shape[1], float(value))
    return None


def column_selection(archive: Any) -> dict[str, Any]:
    """Per numeric column: role, rank-k leverage in the rebuilt table, squared-norm share
    (transformed units), and for basis columns the share of the mixing weights they carry.

    The archive does not store the scores its column selection used, so they are recomputed
    from what it does store. Leverage: with Z_C the transformed basis columns (read from the
    row files) and M the mixing matrix in transformed units, the rebuilt table is Z_C M; the
    top-k right singular vectors V_k of Z_C M come from the small matrix L^T M, where
    L L^T = Z_C^T Z_C; column j's leverage is ||V_k[j, :]||^2 (the leverages sum to k).
    """
    arch = _archive(archive)
    ledger = _ledger(arch)
    names = arch.numeric_columns
    n = len(names)
    rank = int(arch.manifest["method"]["rank"])
    scale = np.where(ledger["scale"] > 0, ledger["scale"], 1.0)
    basis = arch.basis_columns
    index = {name: j for j, name in enumerate(names)}
    weights = ledger["weights"]
    if basis:
        cols = np.array([index[b] for b in basis])
        transformed = weights * scale[cols][:, None] / scale[None, :]       # M (c, n)
        model = arch._reader.model
        gram = np.zeros((len(basis), len(basis)))
        for part in arch.manifest["row_parts"]:
            file = arch._reader.row_file(part["name"])
            for batch in file.iter_batches(batch_size=layout.ROW_GROUP_ROWS, columns=model.basis_stored):
                # the basis values as stored (codes times their step) and filled
                block = model.basis_values(pa.Table.from_batches([batch]))
                z = (block - ledger["shift"][cols]) / scale[cols]
                gram += z.T @ z
        values, vectors = np.linalg.eigh(gram)
        root = vectors * np.sqrt(np.clip(values, 0.0, None))[None, :]       # L with L L^T = G
        small = root.T @ transformed                                         # (c, n)
    else:  # synthetic scores (method 'svd'): the weights hold V_k^T in raw units
        cols = np.zeros(0, dtype=int)
        transformed = weights / scale[None, :]
        small = transformed
    _, _, vt = np.linalg.svd(small, full_matrices=False)
    k = min(rank, vt.shape[0])
    leverage = np.sum(vt[:k] ** 2, axis=0)
    mean_z = (ledger["mean"] - ledger["shift"]) / scale
    std_z = ledger["std"] / scale
    sq_norm = ledger["valid"] * (np.nan_to_num(std_z) ** 2 + np.nan_to_num(mean_z) ** 2)
    norm_share = sq_norm / sq_norm.sum() if sq_norm.sum() > 0 else np.zeros(n)
    order = np.argsort(-leverage, kind="stable")
    leverage_rank = np.empty(n, dtype=int)
    leverage_rank[order] = np.arange(1, n + 1)
    usage = np.zeros(n)
    if basis:
        derived = np.ones(n, bool)
        derived[cols] = False
        load = np.abs(transformed[:, derived]).sum(axis=1)
        usage[cols] = load / load.sum() if load.sum() > 0 else 0.0
    return {
        "rank": rank,
        "selection": _option(arch.manifest["method"].get("options", {}), "column_method"),
        "columns": [{"name": names[j], "basis": bool(names[j] in basis),
                     "leverage": float(leverage[j]), "leverage_rank": int(leverage_rank[j]),
                     "squared_norm_share": float(norm_share[j]),
                     "mixing_share": float(usage[j]), "nulls": int(ledger["nulls"][j])}
                    for j in range(n)],
    }


# -- the numbers ----------------------------------------------------------------------------------
def _optimal_curve(spectrum: np.ndarray) -> np.ndarray:
    """Relative Frobenius error of the best rank-r approximation, r = 0 .. len(spectrum)."""
    energy = spectrum ** 2
    total = energy.sum()
    tail = np.concatenate([np.cumsum(energy[::-1])[::-1], [0.0]])
    return np.sqrt(tail / total) if total > 0 else np.zeros(spectrum.size + 1)


def _sample_positions(arch: Archive, row_max: np.ndarray, count: int) -> np.ndarray:
    m = arch.shape[0]
    if m <= count:
        return np.arange(m, dtype=np.int64)
    worst = np.argsort(-np.nan_to_num(row_max, nan=0.0), kind="stable")[:max(1, count // 8)]
    even = np.linspace(0, m - 1, count - worst.size).round().astype(np.int64)
    picked = np.unique(np.concatenate([even, worst]))
    return picked[:count] if picked.size > count else picked


def _row_ledger(arch: Archive) -> np.ndarray:
    """The row figures (m,), NaN when the archive keeps no row ledger (every column has a
    tolerance: ``FittedModel.row_ledger``)."""
    if not arch._reader.model.row_ledger:
        return np.full(arch.shape[0], np.nan)
    parts = [arch._reader.row_file(p["name"]).read(columns=[layout.ROW_ERR_MAX])
             .column(0).to_numpy(zero_copy_only=False) for p in arch.manifest["row_parts"]]
    return np.concatenate(parts).astype(np.float64) if parts else np.zeros(0)


def _source_rows(source: Any, connection: Any, names: list[str], positions: np.ndarray,
                 rows: int, progress: Callable | None) -> np.ndarray:
    """Source values (float64, NaN for NULL) of ``positions`` for the numeric ``names``."""
    from rankfold.udfs.passes.progress import Progress
    from rankfold.udfs.passes.sources import block_from_batch, open_source

    src = open_source(source, connection)
    out = np.full((positions.size, len(names)), np.nan)
    tracker = Progress(progress, "sample", rows)
    try:
        missing = [n for n in names if n not in src.schema.names]
        if missing:
            raise InvalidInputError(
                f"The source {src.description} lacks the archive's columns {missing[:5]}; pass "
                "the table this archive was compressed from."
            )
        start = 0
        for batch in src.batches(names, 65_536):
            stop = start + batch.num_rows
            lo, hi = np.searchsorted(positions, [start, stop])
            if hi > lo:
                block, _ = block_from_batch(batch, names)
                out[lo:hi] = block[positions[lo:hi] - start]
            start = stop
            tracker.advance(batch.num_rows)
        tracker.finish()
    finally:
        src.close()
    if start != rows:
        raise InvalidInputError(
            f"The source {src.description} has {start} rows where the archive has {rows}; pass "
            "the table this archive was compressed from."
        )
    return out


def report_data(archive: Any, *, source: Any = None, connection: Any = None,
                sample_rows: int = _SAMPLE_ROWS,
                progress: Callable[[dict[str, Any]], None] | None = None) -> dict[str, Any]:
    """Every number the report shows (JSON-ready), plus the arrays its plots need under
    the key ``"_arrays"``."""
    arch = _archive(archive)
    if not isinstance(sample_rows, (int, np.integer)) or sample_rows < 1:
        raise InvalidInputError(f"sample_rows must be a positive integer; got {sample_rows!r}.")
    info = summary(arch)
    e = info["errors"]
    ledger = _ledger(arch)
    names = arch.numeric_columns
    n = len(names)
    rank = int(info["rank"])
    spectrum = np.asarray(arch.manifest.get("spectrum", []), dtype=np.float64)
    curve = _optimal_curve(spectrum) if spectrum.size else np.zeros(0)
    std = ledger["std"]
    with np.errstate(divide="ignore", invalid="ignore"):
        max_over_std = np.where(std > 0, ledger["err_max"] / std, np.nan)
    tolerance = _tolerance(arch, ledger)
    derived = ledger["role"] != "basis"
    order = [j for j in np.argsort(-np.nan_to_num(ledger["rel_rms"], nan=-1.0), kind="stable")
             if derived[j]]
    columns = [{"name": names[j], "rel_rms": _num(ledger["rel_rms"][j]),
                "err_max": _num(ledger["err_max"][j]), "std": _num(std[j]),
                "err_max_over_std": _num(max_over_std[j]),
                "tolerance": None if tolerance is None else _num(tolerance[j])} for j in order]

    row_max = _row_ledger(arch)
    positions = _sample_positions(arch, row_max, int(sample_rows))
    shown = list(range(n))
    if n > _HEATMAP_COLUMNS:
        worst = sorted(np.argsort(-np.nan_to_num(ledger["rel_rms"], nan=-1.0), kind="stable")[:_HEATMAP_COLUMNS])
        shown = [int(j) for j in worst]
    shown_names = [names[j] for j in shown]
    rebuilt = arch._rebuild("report", positions, shown_names)
    scale = np.where(std[shown] > 0, std[shown], 1.0)[None, :]
    if source is not None:
        truth = _source_rows(source, connection, shown_names, positions, arch.shape[0], progress)
        with np.errstate(invalid="ignore"):
            cells = np.abs(truth - rebuilt.values) / scale
        kind = "error"
    else:
        cells = rebuilt.bounds / scale
        kind = "bound"
    hidden = rebuilt.exact | rebuilt.nulls | ~np.isfinite(cells)
    visible = cells[~hidden]
    top = []
    if visible.size:
        flat = np.where(hidden, -np.inf, cells)
        for idx in np.argsort(-flat, axis=None, kind="stable")[:8]:
            i, j = np.unravel_index(idx, cells.shape)
            if hidden[i, j]:
                break
            top.append({"row": int(positions[i]), "column": shown_names[j], "value": float(cells[i, j])})

    finite_rows = row_max[np.isfinite(row_max)]
    anchors = set(arch.anchor_rows)
    worst_rows = np.argsort(-np.nan_to_num(row_max, nan=-1.0), kind="stable")[:5 if finite_rows.size else 0]
    selection = column_selection(arch)
    data = {
        "summary": info,
        "spectrum": {
            "rank": rank, "rank_reason": info["rank_reason"], "values": spectrum.tolist(),
            "sigma_1": _num(spectrum[0]) if spectrum.size else None,
            "sigma_k": _num(spectrum[rank - 1]) if 0 < rank <= spectrum.size else None,
            "sigma_k_plus_1": _num(spectrum[rank]) if rank < spectrum.size else None,
            "optimal_relative_frobenius": _num(e.get("optimal_relative_frobenius")),
            "relative_frobenius": _num(e.get("relative_frobenius")),
            "ratio_to_optimum": _num(e.get("ratio_to_optimum")),
            "basis_columns": len(info["basis_columns"]), "anchor_rows": len(info["anchor_rows"]),
        },
        "columns": {"derived": columns, "basis": [names[j] for j in range(n) if not derived[j]],
                    "tolerance": None if tolerance is None else "per column" if ledger["tolerance"] is not None else "option",
                    "mean_column_relative_rms": _num(e.get("mean_column_relative_rms")),
                    "worst_column": e.get("worst_column"),
                    "worst_column_relative_rms": _num(e.get("worst_column_relative_rms"))},
        "heatmap": {"kind": kind, "rows": positions.tolist(), "columns": shown_names,
                    "columns_total": n, "cells": int(cells.size), "cells_exact_or_missing": int(hidden.sum()),
                    "median": _num(np.median(visible)) if visible.size else None,
                    "max": _num(visible.max()) if visible.size else None, "top": top},
        "rows": {"count": int(row_max.size), "anchor_rows": len(anchors),
                 "row_ledger": bool(arch._reader.model.row_ledger),
                 "median": _num(np.median(finite_rows)) if finite_rows.size else None,
                 "p99": _num(np.percentile(finite_rows, 99)) if finite_rows.size else None,
                 "max": _num(finite_rows.max()) if finite_rows.size else None,
                 "worst": [{"row": int(i), "err_max_over_std": _num(row_max[i])} for i in worst_rows]},
        "selection": selection,
        "_arrays": {"curve": curve, "rel_rms": np.array([c["rel_rms"] if c["rel_rms"] is not None else np.nan for c in columns]),
                    "max_over_std": np.array([c["err_max_over_std"] if c["err_max_over_std"] is not None else np.nan for c in columns]),
                    "tolerance_over_std": None if tolerance is None else np.array(
                        [(c["tolerance"] / c["std"]) if c["tolerance"] is not None and c["std"] else np.nan for c in columns]),
                    "cells": np.where(hidden, np.nan, cells), "row_max": row_max},
    }
    return data


# -- the plots ------------------------------------------------------------------------------------
def _matplotlib():
    try:
        from matplotlib.figure import Figure
    except ImportError:  # pragma: no cover - the test extra installs matplotlib
        raise RankfoldError(
            "The quality report needs matplotlib, which is not installed. Install it with: "
            "python -m pip install matplotlib"
        ) from None
    return Figure


def _png(fig) -> str:
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    FigureCanvasAgg(fig)
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=110)
    return base64.b64encode(buffer.getvalue()).decode("ascii")


def _positive_log(ax, values: np.ndarray) -> None:
    positive = values[np.isfinite(values) & (values > 0)]
    if positive.size:  # ignore rounded-up zeros (the ledger stores 0 as the smallest float)
        positive = positive[positive > positive.max() * 1e-9]
    if positive.size and np.log10(positive.max()) - np.log10(positive.min()) > 1.5:
        ax.set_yscale("log")


def _plot_spectrum(data: dict[str, Any]) -> str:
    Figure = _matplotlib()
    s = data["spectrum"]
    values = np.asarray(s["values"])
    curve = data["_arrays"]["curve"]
    k = s["rank"]
    fig = Figure(figsize=(10, 4.2), layout="constrained")
    left, right = fig.subplots(1, 2)
    index = np.arange(1, values.size + 1)
    keep = values > 0
    left.plot(index[keep], values[keep], "o-", ms=3, color=_DERIVED, label="singular value")
    left.axvline(k + 0.5, color=_BASIS, ls="--", label=f"chosen rank k = {k}")
    left.set_yscale("log")
    left.set_title("Singular values of the transformed table")
    left.set_xlabel("index i")
    left.set_ylabel("singular value σ_i (transformed units)")
    left.legend(loc="upper right")
    left.grid(alpha=0.3)
    ranks = np.arange(curve.size)
    ok = curve > 0
    right.plot(ranks[ok], curve[ok], "-", color=_DERIVED, label="best possible at rank r (SVD)")
    if s["optimal_relative_frobenius"] is not None and s["optimal_relative_frobenius"] > 0:
        right.plot([k], [s["optimal_relative_frobenius"]], "o", color=_DERIVED, ms=8,
                   label=f"best possible at k: {_g(s['optimal_relative_frobenius'])}")
    if s["relative_frobenius"] is not None and s["relative_frobenius"] > 0:
        right.plot([k], [s["relative_frobenius"]], "*", color=_BASIS, ms=14,
                   label=f"this archive: {_g(s['relative_frobenius'])}")
    right.axvline(k, color=_BASIS, ls="--", lw=1)
    right.set_yscale("log")
    right.set_title("Relative error vs rank")
    right.set_xlabel("rank r")
    right.set_ylabel("‖Z − Z_r‖_F / ‖Z‖_F (transformed units)")
    right.legend(loc="upper right")
    right.grid(alpha=0.3)
    return _png(fig)


def _plot_columns(data: dict[str, Any]) -> str | None:
    columns = data["columns"]["derived"]
    if not columns:
        return None
    Figure = _matplotlib()
    arrays = data["_arrays"]
    rel, mx, tol = arrays["rel_rms"], arrays["max_over_std"], arrays["tolerance_over_std"]
    fig = Figure(figsize=(10, 4.2), layout="constrained")
    ax = fig.subplots()
    x = np.arange(1, len(columns) + 1)
    show_rel = np.where(rel > 0, rel, np.nan)
    show_max = np.where(mx > 0, mx, np.nan)
    if len(columns) <= 60:
        ax.bar(x, np.nan_to_num(show_rel), color=_DERIVED, label="relative RMS error")
    else:
        ax.plot(x, show_rel, "-", color=_DERIVED, label="relative RMS error")
    ax.plot(x, show_max, ".", color=_BASIS, ms=5, label="max |error| / std")
    if tol is not None and np.isfinite(tol).any():
        ax.step(x, tol, where="mid", color="black", ls="--", label="tolerance / std")
    _positive_log(ax, np.concatenate([show_rel, show_max]))
    ax.set_title(f"Error of each rebuilt column, worst first ({len(columns)} columns; "
                 f"{len(data['columns']['basis'])} basis columns are exact)")
    ax.set_xlabel("columns ranked by relative RMS error (1 = worst)")
    ax.set_ylabel("error / column standard deviation")
    if len(columns) <= 30:
        ax.set_xticks(x, [c["name"] for c in columns], rotation=90, fontsize=7)
    ax.legend(loc="upper right")
    ax.grid(alpha=0.3, axis="y")
    return _png(fig)


def _plot_heatmap(data: dict[str, Any]) -> str:
    Figure = _matplotlib()
    from matplotlib import colormaps
    from matplotlib.colors import LogNorm, Normalize

    h = data["heatmap"]
    cells = np.ma.masked_invalid(data["_arrays"]["cells"])
    fig = Figure(figsize=(10, 5.2), layout="constrained")
    ax = fig.subplots()
    cmap = colormaps["viridis"].with_extremes(bad="#e5e7eb")
    positive = cells.compressed()
    positive = positive[positive > 0]
    if positive.size and positive.max() > positive.min():
        vmin = max(positive.min(), positive.max() * 1e-4)
        norm = LogNorm(vmin=vmin, vmax=positive.max(), clip=True)
        cells = np.ma.masked_where(np.ma.getmaskarray(cells) | (cells.filled(0) <= 0), cells)
    else:
        norm = Normalize(vmin=0.0, vmax=float(positive.max()) if positive.size else 1.0)
    image = ax.imshow(cells, aspect="auto", interpolation="nearest", cmap=cmap, norm=norm)
    what = ("|error| measured against the source" if h["kind"] == "error"
            else "guaranteed bound on |error| (from the ledgers)")
    fig.colorbar(image, ax=ax, label=f"{'|error|' if h['kind'] == 'error' else 'bound'} / column std")
    ax.set_title(f"{what[0].upper() + what[1:]}, {len(h['rows'])} sampled rows x "
                 f"{len(h['columns'])} columns (grey: stored exactly or missing)")
    ax.set_xlabel("numeric column (source order)" + ("" if len(h["columns"]) == h["columns_total"]
                                                      else f"; the {len(h['columns'])} worst of {h['columns_total']}"))
    ax.set_ylabel("row position")
    step = max(1, len(h["rows"]) // 16)
    ax.set_yticks(np.arange(0, len(h["rows"]), step), [str(r) for r in h["rows"][::step]], fontsize=7)
    if len(h["columns"]) <= 40:
        ax.set_xticks(np.arange(len(h["columns"])), h["columns"], rotation=90, fontsize=7)
    return _png(fig)


def _plot_rows(data: dict[str, Any]) -> str:
    Figure = _matplotlib()
    row_max = data["_arrays"]["row_max"]
    m = row_max.size
    fig = Figure(figsize=(10, 3.4), layout="constrained")
    ax = fig.subplots()
    bins = min(_ROW_BINS, max(m, 1))
    edges = np.linspace(0, m, bins + 1).astype(np.int64)
    clean = np.nan_to_num(row_max, nan=0.0)
    peaks = np.array([clean[a:b].max() if b > a else 0.0 for a, b in zip(edges[:-1], edges[1:])])
    floor = peaks.max() * 1e-9 if peaks.size else 0.0
    ax.plot(edges[:-1], np.where(peaks > floor, peaks, np.nan), "-", color=_DERIVED, lw=1)
    _positive_log(ax, peaks)
    ax.set_title("Largest error in each row, measured when the archive was written (row ledger)")
    per_point = int(math.ceil(m / bins)) if bins else 1
    ax.set_xlabel("row position" + (f" (each point: the largest of {per_point:,} consecutive rows)"
                                    if per_point > 1 else ""))
    ax.set_ylabel("max |error| / column std")
    ax.grid(alpha=0.3)
    return _png(fig)


def _plot_selection(data: dict[str, Any]) -> str:
    Figure = _matplotlib()
    sel = data["selection"]
    cols = sel["columns"]
    n = len(cols)
    fig = Figure(figsize=(10, 4.0), layout="constrained")
    ax = fig.subplots()
    x = np.arange(n)
    lev = np.array([c["leverage"] for c in cols])
    basis = np.array([c["basis"] for c in cols])
    ax.bar(x[~basis], lev[~basis], color=_MUTED, width=1.0 if n > 80 else 0.8, label="rebuilt column")
    ax.bar(x[basis], lev[basis], color=_BASIS, width=1.0 if n > 80 else 0.8,
           label="basis column (kept exactly)")
    ax.axhline(sel["rank"] / max(n, 1), color="black", ls="--", lw=1, label=f"uniform (k/n = {_g(sel['rank'] / max(n, 1))})")
    ax.set_title(f"Rank-{sel['rank']} leverage of each column in the rebuilt table")
    ax.set_xlabel("numeric column (source order)")
    ax.set_ylabel(f"leverage (sums to k = {sel['rank']})")
    if n <= 40:
        ax.set_xticks(x, [c["name"] for c in cols], rotation=90, fontsize=7)
    ax.legend(loc="upper right")
    ax.grid(alpha=0.3, axis="y")
    return _png(fig)


# -- HTML -----------------------------------------------------------------------------------------
def _table(header: list[str], rows: list[list[Any]]) -> str:
    head = "".join(f"<th>{html.escape(str(h))}</th>" for h in header)
    body = "".join("<tr>" + "".join(f"<td>{html.escape(str(c))}</td>" for c in r) + "</tr>" for r in rows)
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def _section(title: str, text: str, image: str | None, table: str, alt: str) -> str:
    img = (f'<img alt="{html.escape(alt)}" src="data:image/png;base64,{image}">' if image
           else '<p class="none">No plot: nothing to show.</p>')
    return (f"<section><h2>{html.escape(title)}</h2><p>{text}</p>"
            f'<div class="pair"><div class="plot">{img}</div><div class="numbers">{table}</div></div>'
            "</section>")


_STYLE = """
body{font-family:system-ui,-apple-system,"Segoe UI",sans-serif;margin:24px auto;max-width:1500px;color:#111827;padding:0 16px}
h1{font-size:1.5em;margin-bottom:4px} h2{font-size:1.15em;margin-top:32px;border-bottom:1px solid #e5e7eb}
.caution{background:#fef3c7;border-left:4px solid #d97706;padding:8px 12px}
.pair{display:flex;gap:20px;align-items:flex-start;flex-wrap:wrap}
.plot img{max-width:1000px;width:100%;border:1px solid #e5e7eb}
.numbers{flex:1;min-width:280px}
table{border-collapse:collapse;font-size:0.85em} td,th{border:1px solid #e5e7eb;padding:3px 8px;text-align:left}
td:nth-child(n+2){font-variant-numeric:tabular-nums} th{background:#f3f4f6}
.muted{color:#6b7280;font-size:0.85em}
"""


def _html(data: dict[str, Any], images: dict[str, str | None]) -> str:
    info = data["summary"]
    e = info["errors"]
    s = data["spectrum"]
    esc = html.escape
    overview = _table(["", ""], [
        ["archive", info["archive"]], ["archive id", info["archive_id"]],
        ["written", info["created_at"]], ["source", info["source"]],
        ["shape", f"{info['shape'][0]:,} rows x {info['shape'][1]:,} numeric columns"],
        ["kept exactly (not factored)", ", ".join(info["exact_columns"]) or "none"],
        ["method", f"{info['method']}, rank {info['rank']} ({info['rank_reason']}), transform {info['transform']}"],
        ["selection", f"column_method {_option(info['options'], 'column_method')}, row_method "
                      f"{_option(info['options'], 'row_method')}, "
                      f"link {info['options'].get('link')}, seed {info['seed']}"],
        ["archive size", f"{info['archive_bytes']:,} bytes in {len(info['files'])} files and the manifest "
                         f"(raw float64 numeric block: {info['raw_float64_bytes']:,} bytes)"],
        ["against the source", info["size_comparison"]],
        ["relative Frobenius error", f"{_g(e.get('relative_frobenius'))} (best possible at rank "
                                     f"{info['rank']}: {_g(e.get('optimal_relative_frobenius'))})"],
        ["worst column", f"{e.get('worst_column')}: relative RMS {_g(e.get('worst_column_relative_rms'))}"],
        ["largest error", f"{_g(e.get('largest_error_over_std'))} column std"],
    ])
    spectrum_table = _table(["figure", "value"], [
        ["chosen rank k", s["rank"]], ["why this rank", s["rank_reason"]],
        ["basis columns c / anchor rows r", f"{s['basis_columns']} / {s['anchor_rows']}"],
        ["σ_1", _g(s["sigma_1"])], ["σ_k", _g(s["sigma_k"])], ["σ_k+1", _g(s["sigma_k_plus_1"])],
        ["best possible relative error at k (SVD)", _g(s["optimal_relative_frobenius"])],
        ["this archive's relative error", _g(s["relative_frobenius"])],
        ["ratio to the best possible", _g(s["ratio_to_optimum"])],
    ])
    cols = data["columns"]
    tol_header = ["tolerance"] if cols["tolerance"] else []
    col_table = _table(["column", "relative RMS", "max |error|", "std", "max |error| / std"] + tol_header,
                       [[c["name"], _g(c["rel_rms"]), _g(c["err_max"]), _g(c["std"]), _g(c["err_max_over_std"])]
                        + ([_g(c["tolerance"])] if cols["tolerance"] else []) for c in cols["derived"][:12]])
    col_text = (f"From the column ledger: for each rebuilt column, the RMS error and the largest "
                f"absolute error measured when the archive was written, both divided by the "
                f"column's standard deviation. Mean relative RMS {esc(_g(cols['mean_column_relative_rms']))}; "
                f"worst {esc(str(cols['worst_column']))} ({esc(_g(cols['worst_column_relative_rms']))}). "
                + ("The dashed line is the tolerance." if cols["tolerance"] else
                   "This archive was written without a tolerance, so no tolerance line is drawn.")
                + " The table lists the 12 worst columns.")
    h = data["heatmap"]
    heat_rows = [["rows sampled", len(h["rows"])], ["columns shown", f"{len(h['columns'])} of {h['columns_total']}"],
                 ["cells stored exactly or missing", f"{h['cells_exact_or_missing']:,} of {h['cells']:,}"],
                 ["median (std units)", _g(h["median"])], ["max (std units)", _g(h["max"])]]
    heat_rows += [[f"row {t['row']}, {t['column']}", _g(t["value"])] for t in h["top"]]
    heat_table = _table(["figure", "value"], heat_rows)
    heat_text = ("True absolute error of each sampled cell, measured against the source given to "
                 "the report, in units of the column's standard deviation." if h["kind"] == "error" else
                 "The archive alone does not hold the true values, so this map shows each sampled "
                 "cell's guaranteed bound: " + ("min(row ledger x column std, column max error)"
                                                if data["rows"]["row_ledger"] else "the column max error") +
                 " plus the floating-point slack (capped at the tolerance, if any), in units of the "
                 "column's standard deviation. The true error is at most this. Pass the source "
                 "(--source) to see the true error instead.") + (
                 " Rows are evenly spaced plus the rows with the largest ledger error."
                 if data["rows"]["row_ledger"] else " Rows are evenly spaced.")
    r = data["rows"]
    row_table = _table(["figure", "value"], [
        ["rows", r["count"]], ["anchor rows (exact, error 0)", r["anchor_rows"]],
        ["median (std units)", _g(r["median"])], ["99th percentile", _g(r["p99"])], ["max", _g(r["max"])],
    ] + [[f"row {w['row']}", _g(w["err_max_over_std"])] for w in r["worst"]])
    sel = data["selection"]
    basis_cols = [c for c in sel["columns"] if c["basis"]]
    sel_table = _table(["basis column", "leverage", "leverage rank", "share of mixing weight",
                        "squared-norm share", "NULLs"],
                       [[c["name"], _g(c["leverage"]), f"{c['leverage_rank']} of {len(sel['columns'])}",
                         _g(c["mixing_share"]), _g(c["squared_norm_share"]), c["nulls"]] for c in basis_cols])
    method_words = {
        "pivoted_qr": "column-pivoted QR on the sketch of the transformed table: step by step, the "
                      "column with the largest part not yet explained by the columns already taken",
        "leverage": "random sampling in proportion to each column's rank-k leverage",
        "length_squared": "random sampling in proportion to each column's squared norm",
    }
    anchors = info["anchor_rows"]
    if basis_cols:
        sel_text = (f"{len(basis_cols)} basis columns are kept exactly, chosen by "
                    f"{esc(method_words.get(sel['selection'], str(sel['selection'])))}. Every other "
                    "numeric column is rebuilt as an affine combination of them. The archive does not "
                    "store the scores the selection used, so the report recomputes from what it stores: "
                    "each column's rank-k leverage in the rebuilt table (how much of the top-k singular "
                    "directions it carries; columns with high leverage are those a good selection "
                    "keeps; the rebuilt table holds the basis columns exactly, which favours them somewhat), "
                    "each basis column's share of the mixing weights (how much the rebuilt columns "
                    "lean on it, in transformed units), and its share of the squared norm.")
    else:
        sel_text = ("This archive was written with method 'svd': it stores synthetic factors, so no "
                    "real numeric column is kept exactly. The plot shows each column's rank-k leverage.")
    sel_text += (f" {len(anchors)} anchor rows are kept exactly: "
                 f"{esc(', '.join(str(a) for a in anchors[:40]))}{' ...' if len(anchors) > 40 else ''}.")
    blob = json.dumps({k: v for k, v in data.items() if not k.startswith("_")}, default=str,
                      allow_nan=False).replace("</", "<\\/")
    generated = _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
    parts = [
        "<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
        f"<title>rankfold quality report: {esc(Path(info['archive']).name)}</title>",
        f"<style>{_STYLE}</style></head><body>",
        f"<h1>Quality report: {esc(Path(info['archive']).name)}</h1>",
        f'<p class="muted">Written {esc(generated)} by rankfold; every figure is measured on the '
        "archive as written. Relative figures are in units of each column's standard deviation; "
        "the spectrum is of the transformed table.</p>",
        f'<p class="caution">{esc(CAUTION)}</p>',
        "<section><h2>Overview</h2>" + overview + "</section>",
        _section("1. Singular values and the chosen rank",
                 "Left: singular values of the transformed table (after the per-column transform), "
                 "with the chosen rank marked. Right: the smallest relative error any rank-r "
                 "approximation can have (truncated SVD), next to the error this archive achieved. "
                 "A CUR archive keeps c real columns (c can exceed k) and some exact cells, so it "
                 "can beat the rank-k optimum.", images["spectrum"], spectrum_table,
                 "singular values with the chosen rank, and relative error vs rank"),
        _section("2. Error per column", col_text, images["columns"], col_table,
                 "relative error of each rebuilt column, sorted"),
        _section("3. Error on a sample of rows", esc(heat_text), images["heatmap"], heat_table,
                 "row by column heatmap of the error on sampled rows"),
        _section("4. Error per row", ("From the row ledger: the largest error in each row, in units "
                 "of each column's standard deviation, measured when the archive was written. "
                 "Anchor rows are exact.") if data["rows"]["row_ledger"] else (
                 "This archive keeps no row ledger: every column has a tolerance, so each cell's "
                 "bound is its column's largest error (section 2) plus the floating-point slack, "
                 "capped at the tolerance."), images["rows"], row_table, "largest error in each row"),
        _section("5. Kept exactly, and why", sel_text, images["selection"], sel_table,
                 "leverage of each column with the basis columns highlighted"),
        f'<script type="application/json" id="rankfold-report-data">{blob}</script>',
        "</body></html>",
    ]
    return "\n".join(parts)


def default_output(archive: Any) -> Path:
    """``<archive name without suffix>-report.html`` in the current folder."""
    return Path(f"{Path(str(archive)).stem}-report.html")


def write_report(archive: Any, output: str | Path | None = None, *, source: Any = None,
                 connection: Any = None, sample_rows: int = _SAMPLE_ROWS, overwrite: bool = False,
                 progress: Callable[[dict[str, Any]], None] | None = None) -> dict[str, Any]:
    """Write the quality report of ``archive`` to ``output`` (an ``.html`` file; default
    :func:`default_output`). Returns ``{"output": path, "plots": count, ...numbers}``.

    ``source`` (anything ``rankfold.compress`` accepts) switches the heatmap from bounds to
    the true error on the sampled rows. An existing file is replaced only with ``overwrite=True``.
    """
    from .export import check_output_path

    arch = _archive(archive)
    out = check_output_path(default_output(arch.path) if output is None else output,
                            overwrite=overwrite, suffixes=(".html", ".htm"), what="report file")
    _matplotlib()  # fail early, before any work, when matplotlib is missing
    data = report_data(arch, source=source, connection=connection, sample_rows=sample_rows,
                       progress=progress)
    images = {"spectrum": _plot_spectrum(data), "columns": _plot_columns(data),
              "heatmap": _plot_heatmap(data), "rows": _plot_rows(data),
              "selection": _plot_selection(data)}
    text = _html(data, images)
    try:
        out.write_text(text, encoding="utf-8")
    except OSError as exc:
        raise InvalidInputError(f"Cannot write the report to {out}: {exc}. Check the path and "
                                "permissions.") from None
    result = {k: v for k, v in data.items() if not k.startswith("_")}
    result["output"] = str(out)
    result["plots"] = sum(1 for v in images.values() if v)
    result["bytes"] = out.stat().st_size
    return result
