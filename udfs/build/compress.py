"""Compress a source into an archive: profile, select (sketch, columns, rows), link, verify,
commit. Each pass streams the source in row blocks through DuckDB; memory is
O((c + r) n + n^2 + block n), independent of the number of rows.
"""

from __future__ import annotations

import datetime as _dt
import math
import uuid
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa

from ..version import __version__
from ..errors import (EmptySourceError, InvalidInputError, NoNumericColumnsError,
                      RankTooLargeError, SourceChangedError)
from ..factor import cur as _cur
from ..factor.svd import gavish_donoho_rank
from ..store import layout
from ..store.arithmetic import round_up
from . import link as _link
from .commit import ArchiveWriter, prepare_target
from .options import DEFAULT_RANK_CAP_DIVISOR, CompressOptions
from .profile import ColumnProfile, Fingerprint, Transform, profile_block
from .progress import Progress
from .select import AnchorRows, anchor_pass, sketch_pass
from .sources import Source, block_from_batch, open_source
from .verify import VerifyResult, verify_pass

__all__ = ["compress"]

# Integers above 2^53 do not survive float64; such columns are kept exactly instead. The
# profile sees them as float64, where 2^53 + 1 reads as 2^53: so 2^53 itself counts too.
_EXACT_INTEGER_LIMIT = 2.0**53


def _is_numeric(data_type: pa.DataType) -> bool:
    return (pa.types.is_integer(data_type) or pa.types.is_floating(data_type))


def _stream(source: Source, names: list[str], opts: CompressOptions, stage: str,
            extra: list[str] = (), total: int | None = None) -> Iterator:
    """Blocks (first row, batch, float64 block, NULL mask) of one pass, reporting progress."""
    report = Progress(opts.progress, stage, total)
    first = 0
    for batch in source.batches(list(dict.fromkeys(list(extra) + names)), opts.batch_rows):
        block, mask = block_from_batch(batch, names)
        yield first, batch, block, mask
        first += batch.num_rows
        report.advance(batch.num_rows)
    report.finish()


def compress(source: Any, path: str | Path, *, rank: int | None = None, seed: int = 0,
             **options: Any) -> Path:
    """Compress ``source`` into an archive directory at ``path``; returns the path.

    See ``rankfold.compress`` for the user-facing documentation.
    """
    opts = CompressOptions.from_call(rank, seed, options)
    target = prepare_target(path, opts.overwrite)
    src = open_source(source, opts.connection)
    try:
        return _compress(src, target, opts)
    finally:
        src.close()


def _plan_columns(schema: pa.Schema, opts: CompressOptions) -> tuple[list[str], list[str]]:
    names = schema.names
    bad = [n for n in names if n.startswith(layout.RESERVED_PREFIX)]
    if bad:
        raise InvalidInputError(
            f"Column names starting with {layout.RESERVED_PREFIX!r} are reserved by rankfold; "
            f"rename {bad} before compressing."
        )
    if len(set(names)) != len(names):
        raise InvalidInputError(f"The source has duplicate column names {names}; rename them.")
    for wanted in ([opts.key] if opts.key else []) + list(opts.exact_columns):
        if wanted not in names:
            raise InvalidInputError(
                f"The source has no column {wanted!r} (named in key/exact_columns). Its columns are {names}."
            )
    exact = set(opts.exact_columns) | ({opts.key} if opts.key else set())
    numeric = [f.name for f in schema if _is_numeric(f.type) and f.name not in exact]
    passthrough = [n for n in names if n not in numeric]
    return numeric, passthrough


def _profile(src: Source, numeric: list[str], opts: CompressOptions):
    profile = ColumnProfile.empty(len(numeric))
    fingerprint = Fingerprint()
    for first, _, block, mask in _stream(src, numeric, opts, "profile"):
        profile = profile.merge(profile_block(block, mask))
        fingerprint.update(first, block)
    return profile, fingerprint


def _sizes(opts: CompressOptions, rows: int, width: int, spectrum) -> tuple[int, int, int, str]:
    limit = min(rows, width)
    if opts.rank is not None:
        if opts.rank > limit:
            raise RankTooLargeError(
                f"The 'rank' option of compress must be at most min(rows, numeric columns) = "
                f"{limit} for this source ({rows} x {width}). Got {opts.rank} instead."
            )
        rank, why = opts.rank, "given"
    else:
        rank = gavish_donoho_rank(spectrum.values, rows, width)
        cap = max(1, width // DEFAULT_RANK_CAP_DIVISOR)
        why = (f"Gavish-Donoho hard threshold on the singular values ({rank}), capped at "
               f"n/{DEFAULT_RANK_CAP_DIVISOR}")
        rank = max(1, min(rank, cap, limit))
    if opts.method == "svd":
        return rank, rank, 0, why
    # i.i.d. draws (replace=True) may outnumber the columns or rows, as in the published
    # estimators; repeats are merged, so the archive keeps at most n distinct columns.
    iid = opts.sample_with_replacement
    c = opts.n_columns if opts.n_columns is not None else min(2 * rank, width)
    if c > width and not (iid and opts.columns != "pivoted_qr"):
        raise RankTooLargeError(
            f"The 'n_columns' option of compress must be at most the {width} numeric columns. Got {c} instead."
        )
    if c < rank and opts.columns == "pivoted_qr":
        raise RankTooLargeError(
            f"The 'n_columns' option of compress must be at least the rank ({rank}). Got {c} instead."
        )
    r = opts.n_rows if opts.n_rows is not None else min(2 * min(c, width), rows)
    if r > rows and not (iid and opts.rows != "qdeim"):
        raise RankTooLargeError(
            f"The 'n_rows' option of compress must be at most the {rows} source rows. Got {r} instead."
        )
    return rank, c, r, why


def _compress(src: Source, target: Path, opts: CompressOptions) -> Path:
    numeric, passthrough = _plan_columns(src.schema, opts)
    if not numeric:
        raise NoNumericColumnsError(
            f"The source {src.description} has no numeric column to compress (columns: "
            f"{src.schema.names}). rankfold compresses integer and floating-point columns."
        )
    profile, fingerprint = _profile(src, numeric, opts)
    rows = int(fingerprint.rows)
    if rows == 0:
        raise EmptySourceError(f"The source {src.description} has no rows; there is nothing to compress.")
    too_big = [n for j, n in enumerate(numeric)
               if pa.types.is_integer(src.schema.field(n).type)
               and profile.valid[j] > 0  # an all-NULL column has range (inf, -inf)
               and max(abs(profile.minimum[j]), abs(profile.maximum[j])) >= _EXACT_INTEGER_LIMIT]
    if too_big:  # keep exactly, outside the factorization
        keep = [j for j, n in enumerate(numeric) if n not in too_big]
        profile = ColumnProfile(*(getattr(profile, f)[keep] for f in profile.__dataclass_fields__))
        fingerprint = fingerprint.select(keep)
        numeric = [numeric[j] for j in keep]
        passthrough = [n for n in src.schema.names if n not in numeric]
        if not numeric:
            raise NoNumericColumnsError(
                f"Every numeric column of {src.description} holds integers beyond 2^53, which "
                "cannot be rebuilt exactly in float64; there is nothing to factor."
            )
    width = len(numeric)
    transform = Transform.fit(opts.transform, profile)
    passes = iter(("sketch", "select"))
    blocks = lambda: ((f, b, m) for f, _, b, m in _stream(src, numeric, opts, next(passes), total=rows))
    sketch = sketch_pass(blocks, transform, width)
    rank, c, r, rank_reason = _sizes(opts, rows, width, sketch.spectrum)
    rng = np.random.default_rng(opts.seed)

    if opts.method == "svd":
        mixing = _link.mixing_for_scores(sketch.spectrum.right, rank, transform)
        anchors = AnchorRows(np.zeros(0, np.int64), np.zeros((0, width)), np.zeros((0, width), bool))
        score_right = sketch.spectrum.right[:, :rank]
        basis_names = [layout.SCORE_PATTERN.format(k) for k in range(rank)]
    else:
        replace = opts.sample_with_replacement
        choice = _cur.choose_columns(opts.columns, sketch.r, sketch.spectrum, rank, c, rng,
                                     replace=replace)
        anchors = anchor_pass(blocks, transform, sketch, opts.rows, rank, r, rng, replace=replace)
        anchor_z = transform.apply(anchors.values)
        columns, m_transformed = _cur.build_mixing(opts.link, choice, sketch.r, anchor_z)
        mixing = _link.mixing_for_columns(columns, m_transformed, transform)
        score_right = None
        basis_names = [numeric[k] for k in columns]

    writer = ArchiveWriter(target, opts.overwrite)
    try:
        result = verify_pass(_stream(src, numeric, opts, "verify", passthrough, rows), numeric,
                             passthrough, mixing, anchors, transform, score_right, writer,
                             ledger_scale(profile))
        if not result.fingerprint.matches(fingerprint):
            raise SourceChangedError(
                f"The source {src.description} gave different rows in the profile and verify "
                f"passes ({fingerprint.rows} then {result.rows} rows, or the same count with "
                "other values or order). Compress a stable snapshot, or add an ORDER BY."
            )
        files = _write_small_tables(writer, src.schema, numeric, profile, transform, mixing,
                                    anchors, result, basis_names)
        manifest = _manifest(src, opts, numeric, passthrough, rows, rank, rank_reason,
                             sketch.spectrum, profile, transform, mixing, anchors, result, basis_names,
                             writer.parts)
        return writer.commit(manifest, [p["name"] for p in writer.parts] + files)
    except BaseException:
        writer.abort()
        raise


def ledger_scale(profile: ColumnProfile) -> np.ndarray:
    """Units of the row ledger per column: the standard deviation, or 1 when it is 0 or not finite."""
    std = profile.std
    return np.where((std > 0) & np.isfinite(std), std, 1.0)


def _column_table(schema, numeric, profile, transform, mixing, result) -> pa.Table:
    width = len(numeric)
    is_basis = np.zeros(width, bool)
    if mixing.basis_columns is not None:
        is_basis[mixing.basis_columns] = True
    std = profile.std
    ledger = result.ledger
    rms = np.divide(ledger.err_l2, np.sqrt(np.maximum(ledger.cells, 1)))
    rel_rms = np.divide(rms, std, out=np.full(width, np.nan), where=std > 0)
    return pa.table({
        "name": pa.array(numeric, pa.string()),
        "position": pa.array(np.arange(width, dtype=np.int32)),
        "type": pa.array([str(schema.field(n).type) for n in numeric], pa.string()),
        "role": pa.array(np.where(is_basis, "basis", "derived").tolist(), pa.string()),
        "shift": transform.shift, "scale": transform.scale,
        "ledger_scale": ledger_scale(profile),
        "offset": mixing.offset,
        "weights": pa.array(list(np.ascontiguousarray(mixing.weights.T)), pa.list_(pa.float64())),
        "valid": profile.valid, "nulls": profile.nulls, "nans": profile.nans,
        "infinities": profile.infinities,
        "mean": profile.mean, "std": std, "min": profile.minimum, "max": profile.maximum,
        "err_max": round_up(ledger.err_max), "err_l2": round_up(ledger.err_l2),
        "err_sum": ledger.err_sum, "err_cells": ledger.cells,
        "rel_rms": rel_rms,
    })


def _write_small_tables(writer, schema, numeric, profile, transform, mixing, anchors, result,
                        basis_names) -> list[str]:
    writer.write_table(layout.COLUMNS,
                       _column_table(schema, numeric, profile, transform, mixing, result),
                       factor_columns=["shift", "scale", "offset"])
    anchor_cols = {layout.ROW_ID: pa.array(anchors.positions, pa.int64())}
    for j, name in enumerate(numeric):
        anchor_cols[name] = pa.array(anchors.values[:, j], pa.float64(), mask=anchors.nulls[:, j])
    writer.write_table(layout.ANCHORS, pa.table(anchor_cols))
    writer.write_table(layout.CELLS, result.cells.table())
    return [layout.COLUMNS, layout.ANCHORS, layout.CELLS]


def _finite_or_none(value: float) -> float | None:
    value = float(value)
    return value if math.isfinite(value) else None


def _error_summary(numeric, profile, transform, result, spectrum, rank) -> dict[str, Any]:
    ledger = result.ledger
    std = profile.std
    rms = ledger.err_l2 / np.sqrt(np.maximum(ledger.cells, 1))
    with np.errstate(invalid="ignore", divide="ignore"):
        rel_rms = np.where(std > 0, rms / np.where(std > 0, std, 1), np.nan)
        max_over_std = np.where(std > 0, ledger.err_max / np.where(std > 0, std, 1), np.nan)
    total = float(np.sqrt(np.sum(spectrum.values ** 2)))
    z_err = float(np.sqrt(np.sum((ledger.err_l2 / transform.scale) ** 2)))
    worst = int(np.nanargmax(rel_rms)) if np.isfinite(rel_rms).any() else None
    optimum = spectrum.optimal_relative_error(rank)
    achieved = z_err / total if total > 0 else 0.0
    return {
        "relative_frobenius": _finite_or_none(achieved),
        "optimal_relative_frobenius": _finite_or_none(optimum),
        "ratio_to_optimum": _finite_or_none(achieved / optimum) if optimum > 0 else None,
        "mean_column_relative_rms": _finite_or_none(np.nanmean(rel_rms)) if np.isfinite(rel_rms).any() else None,
        "worst_column": numeric[worst] if worst is not None else None,
        "worst_column_relative_rms": _finite_or_none(rel_rms[worst]) if worst is not None else None,
        "max_abs_error_over_std": _finite_or_none(np.nanmax(max_over_std)) if np.isfinite(max_over_std).any() else None,
        "max_abs_error": _finite_or_none(ledger.err_max.max()),
        "cells_approximated": int(ledger.cells.sum()),
        "cells_exact": int(result.rows * len(numeric) - ledger.cells.sum()),
        "cells_stored_exactly_outside_factors": result.cells.count,
        "note": "relative figures are in transformed units (after the transform); "
                "relative RMS is per column, divided by the column's standard deviation",
    }


def _manifest(src, opts, numeric, passthrough, rows, rank, rank_reason, spectrum,
              profile, transform, mixing, anchors, result: VerifyResult, basis_names, parts) -> dict:
    roles = {n: "numeric" for n in numeric} | {n: "exact" for n in passthrough}
    return {
        "format": layout.FORMAT_NAME,
        "format_version": layout.FORMAT_VERSION,
        "writer": {"name": "rankfold", "version": __version__},
        "archive_id": str(uuid.uuid4()),
        "created_at": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "source": src.description,
        "shape": [rows, len(numeric)],
        "schema": [{"name": f.name, "type": str(f.type), "role": roles[f.name]} for f in src.schema],
        "numeric_columns": numeric,
        "exact_columns": passthrough,
        "key": opts.key,
        "method": {"kind": opts.method, "rank": rank, "rank_reason": rank_reason,
                   "n_columns": len(basis_names), "n_rows": int(anchors.positions.size),
                   "seed": opts.seed, "options": opts.recorded()},
        "transform": transform.kind,
        "basis": [{"name": n, "fill": float(f)} for n, f in zip(basis_names, mixing.fill)],
        "anchors": [int(p) for p in anchors.positions],
        "row_parts": parts,
        "spectrum": [float(s) for s in spectrum.values],
        "errors": _error_summary(numeric, profile, transform, result, spectrum, rank),
        "files": [],
    }
