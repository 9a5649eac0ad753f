"""Compress a source into an archive. By default two passes over the rows: profile (column
statistics and the sketch), then verify (rebuild, measure, write); in between, columns are
chosen and linked from the sketch alone. For a large Parquet source the profile pass reads
only a seeded sample of row groups (``sketch_rows``), and the encode pass, the one pass that
reads every row, gathers the column statistics as well; every error is still measured on
every row. Links that keep anchor rows add a select pass; a
refit without outliers adds a sketch pass (and, for those links, a second select). Commit last.
Each pass is a map over row partitions plus an associative merge (``executors``):
in process, the source is one partition streamed in row blocks through DuckDB; on Dask, the
partitions are Parquet row-group ranges read by the workers. Memory is
O((c + r) n + n^2 + block n), independent of the number of rows.
"""

from __future__ import annotations

import copy
import dataclasses
import datetime as _dt
import json
import math
import shutil
import tempfile
import uuid
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa

from ..version import __version__
from ..errors import (EmptySourceError, InvalidInputError, NoNumericColumnsError,
                      SizeTargetMissedError, SourceChangedError)
from ..factor import cur as _cur
from ..factor import selection
from ..factor.svd import gavish_donoho_rank
from ..store import layout, remote, versions
from ..store.manifest_schema import COLUMN_TOLERANCES
from ..store.aggregate import BlockSums
from ..store.model import Coding, FittedModel, Mixing, mixing_for_columns, mixing_for_scores
from ..factor.sketch import GramSketch, RowSketch
from .commit import ArchiveWriter, RowPartWriter, prepare_target
from .executors import make_executor, one_blas_thread
from .keys import check_unique_key
from .options import (AUTO_SKETCH_ROWS, AUTO_SKETCH_ROWS_PER_COLUMN, DEFAULT_RANK_CAP_DIVISOR,
                      CompressOptions)
from .plan import CompressPlan
from .row_groups import RowGroup, choose_row_groups
from .profile import (SUB_BLOCK_ROWS, ColumnProfile, Fingerprint, Transform, new_sketch,
                      profile_rows)
from .select import AnchorRows, AnchorScan, anchor_partial, merge_anchor_partials, sketch_of
from .refit import KAPPA, OutlierScreen, refit_left_out
from .encode import EncodeResult, column_error_figures, column_statistics, encode_pass
from .predictors import SampleRuns, run_rows
from .coding import code_packing, coding_for_plan, measured_bytes, predictor_trial, trim_factors, with_row_differences
from . import basis_size, sizes, targets

__all__ = ["compress"]

# Integers above 2^53 do not survive float64; such columns are kept exactly instead. The
# profile sees them as float64, where 2^53 + 1 reads as 2^53: so 2^53 itself counts too.
_EXACT_INTEGER_LIMIT = 2.0**53


# -- the passes as tasks over one partition's blocks (first row, batch, block, NULL mask) ---------
# rows of the first batch whose Parquet bytes per value feed the size model (exact_bytes):
# 16,384 rows measured within 5% of 20,000 (the whole demo table) per column of the demo table,
# and 65,536 rows took 0.31 s of a compress at 1e6 x 100
_BYTES_SAMPLE_ROWS = 16_384


def _profile_task(blocks, part, width: int, keep_sample: bool, seed: int = 0):
    """Column statistics, the fingerprint and the co-moments (the sketch) of one partition;
    with ``keep_sample``, also the measured bytes per value of each column and the sample of
    runs of rows the predictor trial writes (``predictors.SampleRuns``)."""
    profile = ColumnProfile.empty(width)
    fingerprint = Fingerprint()
    gram = new_sketch(width)
    sample = None  # the bytes per value, measured on a thread of its own (pyarrow's writer
    # releases the GIL): 0.16 s of the pass's thread at 1e6 x 100, now beside it
    runs = SampleRuns(seed, run_rows(width)) if keep_sample else None
    with ThreadPoolExecutor(max_workers=1, thread_name_prefix="rankfold-bytes") as pool:
        for first, batch, block, mask in blocks:
            if keep_sample and sample is None:
                sample = pool.submit(targets.column_bytes, batch.slice(0, _BYTES_SAMPLE_ROWS))
            profile, gram = profile_rows(first, block, mask, profile, fingerprint, gram)
            if runs is not None:
                runs.add(first, block, mask)
        sample = sample.result() if sample is not None else {}
    return profile, fingerprint, sample, gram, runs


def _sketch_task(blocks, part, screen, width: int):
    """Gram matrix of the transformed (and screened, for a refit) partition."""
    screen = copy.copy(screen)
    if isinstance(screen, OutlierScreen):
        screen.replaced = screen.rows_left_out = 0
    gram = new_sketch(width)
    if isinstance(gram, RowSketch):  # a wide table: the screened rows themselves
        from .select import row_uniforms

        for first, _, block, _ in blocks:
            gram.add(first, screen.apply(block), row_uniforms(0, 7, first + np.arange(block.shape[0])))
    else:
        gram = GramSketch(width)
        for _, _, block, _ in blocks:
            for lo in range(0, block.shape[0], SUB_BLOCK_ROWS):  # cache-sized temporaries
                gram.update(screen.apply(block[lo:lo + SUB_BLOCK_ROWS]))
    counts = (screen.replaced, screen.rows_left_out) if isinstance(screen, OutlierScreen) else (0, 0)
    return gram, counts


@dataclass(frozen=True)
class _AnchorRequest:
    """How anchor rows are drawn: ``method`` and ``rank`` of the row choice, ``count`` rows,
    the ``seed``, draws with ``replace``-ment, and ``draw`` (keys the random numbers of a
    second choice, after a refit, apart from the first)."""

    method: str
    rank: int
    count: int
    seed: int
    replace: bool
    draw: int


def _anchor_task(blocks, part, screen, sketch, request: _AnchorRequest):
    return anchor_partial(((f, b, m) for f, _, b, m in blocks),
                          AnchorScan(copy.copy(screen), sketch, request.method, request.rank, request.count,
                                     request.seed, replace=request.replace, draw=request.draw))


def _encode_task(blocks, part, temp, part_rows, model: FittedModel, distributed, profile_columns,
                 writer=None):
    """Verify one partition: row files (its own names when distributed), exact cells in a
    file of its own, the ledger and the per row-group sums (and with ``profile_columns``,
    the column statistics).

    ``temp`` is a local directory, or a ``remote.Staging`` prefix on a store: then every
    file is streamed there (``remote.StagedUpload``) and each row part carries the
    ``record`` (size, SHA-256, footer SHA-256) its upload measured."""
    cells_name = f".cells-{part.index:05d}.parquet"
    uploads: list[remote.StagedUpload] = []

    def upload(name: str) -> remote.StagedUpload:
        uploads.append(temp.open(name))
        return uploads[-1]

    on_store = isinstance(temp, remote.Staging)
    if writer is None:
        name_of = lambda k: f".part-{part.index:05d}-{k:04d}.parquet"  # noqa: E731
        writer = (RowPartWriter(None, part_rows, name_of, open_file=upload) if on_store
                  else RowPartWriter(Path(temp), part_rows, name_of))
    sums = BlockSums(model.width, model.weights.shape[0], model.fill)
    try:
        result = encode_pass(blocks, model, writer, block_sums=sums,
                             cells_file=(lambda: upload(cells_name)) if on_store else Path(temp) / cells_name,
                             profile_columns=profile_columns)
        if distributed:
            writer.close()
        else:
            writer.close_rows()  # the files are complete before their sizes are read
    except BaseException:
        if on_store:  # abandon unfinished uploads (the client removes finished ones)
            try:
                writer.close()
            except Exception:  # noqa: BLE001 - the error being handled is the one to report
                pass
            for handle in uploads:
                handle.discard()
        raise
    parts = list(writer.parts) if distributed else None
    if on_store:
        records = {handle.path.rsplit("/", 1)[1]: handle.record for handle in uploads}
        parts = [dict(p, record=records[p["name"]]) for p in parts]
        result.cells.spill_to = None  # the opener holds the uploads: not sent back to the client
    return result, parts, sums.records


class _Passes:
    """Runs the passes of one compress call on an executor and merges their partials."""

    def __init__(self, executor, opts: CompressOptions):
        self.ex, self.opts = executor, opts
        self.trial_rows: np.ndarray | None = None  # (m, n) the predictor trial's sample, NaN = NULL
        self.trial_starts: np.ndarray | None = None  # (r,) where each run of the sample starts

    def profile(self, numeric: list[str], keep_sample: bool, groups: list[RowGroup] | None = None):
        """Statistics, fingerprint, a sample of encoded sizes and the co-moments: of every
        row, or of the given row groups only."""
        kept = set(numeric)
        extra = [n for n in self.ex.schema.names if n not in kept] if keep_sample else []
        task_args = (len(numeric), keep_sample, self.opts.seed)
        if groups is None:
            parts = self.ex.run("profile", _profile_task, numeric, extra, None, task_args)
        else:
            parts = self.ex.run("sketch-sample", _profile_task, numeric, extra,
                                sum(g.rows for g in groups), task_args,
                                partitions=self.ex.sample_partitions(groups))
        profile, fingerprint, sample = ColumnProfile.empty(len(numeric)), Fingerprint(), {}
        gram = new_sketch(len(numeric))
        runs = None
        for p, f, s, g, r in parts:
            profile, fingerprint, gram = profile.merge(p), fingerprint.merge(f), gram.merge(g)
            sample = sample or s
            runs = r if runs is None else runs.merge(r)
        self.trial_rows = runs.rows(len(numeric)) if runs is not None else None
        self.trial_starts = runs.run_starts() if runs is not None else None
        return profile, fingerprint, sample, gram

    def sketch(self, stage: str, numeric: list[str], rows: int, screen):
        parts = self.ex.run(stage, _sketch_task, numeric, (), rows, (screen, len(numeric)))
        gram = parts[0][0]
        for g, _ in parts[1:]:
            gram = gram.merge(g)
        if isinstance(screen, OutlierScreen):
            for _, (replaced, left_out) in parts:
                screen.replaced += replaced
                screen.rows_left_out += left_out
        if isinstance(gram, RowSketch):  # rows already transformed and screened
            return sketch_of(gram.gram(np.zeros(gram.width), np.ones(gram.width)))
        return sketch_of(gram)

    def anchors(self, stage, numeric, rows, screen, sketch, request: _AnchorRequest):
        parts = self.ex.run(stage, _anchor_task, numeric, (), rows, (screen, sketch, request))
        return merge_anchor_partials(parts, len(numeric), request.method, request.count,
                                     replace=request.replace)


def compress(source: Any, path: str | Path, *, rank: int | None = None, seed: int = 0,
             **options: Any) -> Path | str:
    """Compress ``source`` into an archive directory at ``path`` (or at an fsspec URL such as
    ``s3://bucket/prefix``); returns the path (the URL).

    See ``rankfold.compress`` for the user-facing documentation.
    """
    opts = CompressPlan.from_call(rank, seed, options)  # the rules between options, before any work
    opts.check_locations(source, path)
    if remote.is_url(path):  # object storage (see _compress_to_store)
        return _compress_to_store(source, str(path), opts)
    target = prepare_target(path, opts.overwrite)
    return _compress_at(source, target, opts)


def _compress_at(source: Any, target: Path, opts: CompressOptions) -> Path:
    with versions.WriteLock(target):  # one writer per path; leftovers of crashed writes go
        versions.recover(target)
        executor = make_executor(opts.executor, source, opts.connection, opts.batch_rows,
                                 opts.progress, opts.storage_options)
        try:
            # BLAS on one thread between the passes too (the passes set it themselves): the
            # fit's many small products waited on OpenBLAS's second thread, measured 0.4 s of
            # pivoted QR and CX mixing at 1e6 x 100 on the shared machine (ms alone); same bytes
            with one_blas_thread():
                return _compress_with(executor, lambda: ArchiveWriter(target, opts.overwrite), opts)
        finally:
            executor.close()


def _compress_with(executor, new_writer, opts: CompressOptions):
    """``_compress``, and once more reading every row when the sketch's sample missed."""
    try:
        return _compress(executor, new_writer, opts)
    except _SampleMissed:  # rare: the sample hid what the sketch must see; read every row
        return _compress(executor, new_writer, _all_rows(opts))


def _is_local_executor(executor: Any) -> bool:
    return executor is None or (isinstance(executor, str) and executor == "local")


def _compress_to_store(source: Any, url: str, opts: CompressOptions) -> str:
    """Compress to a store URL; the manifest, uploaded last, is the commit point.

    * Distributed executors (Dask): the workers stream their row files and exact-cell files
      straight to a private staging prefix on the store; the client moves them into place,
      uploads the small tables and the manifest last (``store_writer.StoreArchiveWriter``).
      The workers need the store, not the client's disk.
    * In process: the archive is built in a private local staging directory (the local
      commit protocol), then uploaded, data files first, manifest last."""
    store = remote.RemoteTarget(url, opts.storage_options, opts.overwrite)  # checked before any work
    if not _is_local_executor(opts.executor):
        from .store_writer import StoreArchiveWriter

        executor = make_executor(opts.executor, source, opts.connection, opts.batch_rows,
                                 opts.progress, opts.storage_options)
        try:
            return _compress_with(executor, lambda: StoreArchiveWriter(store), opts)
        finally:
            executor.close()
    staging = Path(tempfile.mkdtemp(prefix="rankfold-stage-"))
    try:
        built = _compress_at(source, prepare_target(staging / "archive", False), opts)
        return store.publish(built)
    finally:
        shutil.rmtree(staging, ignore_errors=True)  # our own staging directory, made above


class _SampleMissed(Exception):
    """The encode pass found, outside the sketch's sample, an integer column beyond 2^53,
    which must be kept exactly: compress again with a sketch of every row."""


def _all_rows(opts: CompressOptions) -> CompressOptions:
    again = copy.copy(opts)
    again.sketch_rows = "all"
    return again


@dataclass(frozen=True)
class _SketchRows:
    """The rows the sketch reads: every row (``groups`` None), or a seeded sample of whole
    Parquet row groups. ``total`` is the source's row count from the Parquet footers (None
    when only a pass can count them)."""

    groups: list[RowGroup] | None
    total: int | None
    of_groups: int = 0

    @property
    def sampled(self) -> bool:
        return self.groups is not None

    @property
    def rows_read(self) -> int:
        """Rows of the sampled groups."""
        return sum(g.rows for g in self.groups)

    def recorded(self, rows: int) -> dict[str, Any]:
        """The manifest's record of it."""
        if not self.sampled:
            return {"rows_read": rows, "of_rows": rows, "sampled": False}
        return {"rows_read": self.rows_read, "of_rows": rows, "sampled": True,
                "row_groups_read": len(self.groups), "of_row_groups": self.of_groups,
                "first_rows": [g.first_row for g in self.groups]}


def _sketch_rows(src, opts: CompressOptions, numeric: list[str]) -> _SketchRows:
    """Whether the sketch reads a sample of row groups, and which (see ``sketch_rows``)."""
    every = _SketchRows(None, None)
    if not opts.may_sample_sketch:
        return every
    groups = src.row_groups(numeric)
    if groups is None:
        if isinstance(opts.sketch_rows, int):
            raise InvalidInputError(
                f"sketch_rows={opts.sketch_rows} reads a sample of row groups, but "
                f"{src.description} is neither a Parquet dataset whose files hold every numeric "
                "column nor a DuckDB base table (views, queries and CSV files have no row groups "
                "to pick). Drop sketch_rows (the sketch then reads every row)."
            )
        return every
    total = sum(g.rows for g in groups)
    if opts.sketch_rows == "auto":
        wanted = max(AUTO_SKETCH_ROWS, AUTO_SKETCH_ROWS_PER_COLUMN * len(numeric))
    else:
        wanted = opts.sketch_rows
    chosen = choose_row_groups(groups, wanted, opts.seed)
    read = sum(g.rows for g in chosen)
    # "auto" samples only when that halves the rows read at least: below, the full profile
    # costs little more and gives the exact statistics up front
    if read >= total or (opts.sketch_rows == "auto" and 2 * read > total):
        return _SketchRows(None, total)
    return _SketchRows(chosen, total, len(groups))


def _sizes(opts: CompressOptions, rows: int, width: int, spectrum) -> tuple[int, int, int, str]:
    limit = min(rows, width)
    if opts.rank is not None:  # at most limit: CompressPlan.check_rows
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
    # sizes given were checked against the table by CompressPlan (for_source, check_rows)
    c = opts.n_columns if opts.n_columns is not None else min(2 * rank, width)
    if opts.link == "cx":  # C^+ A uses no rows: no anchor rows are kept
        return rank, c, 0, why
    r = opts.n_rows if opts.n_rows is not None else min(2 * min(c, width), rows)
    return rank, c, r, why


@dataclass(frozen=True)
class _Inputs:
    """What the profile pass gives every attempt: the numeric and exactly kept columns, the
    row count, the column statistics (of the sketch's sample when ``read.sampled``), the
    fingerprint, the transform, the sketch and the rows it read."""

    numeric: list[str]
    passthrough: list[str]
    rows: int
    profile: ColumnProfile
    fingerprint: Fingerprint
    transform: Transform
    sketch: Any
    read: _SketchRows


@dataclass
class _Build:
    """Everything one attempt needs beyond the source: sizes, coding and a reason."""

    method: str
    rank: int
    n_columns: int
    n_rows: int
    coding_plan: targets.Plan | None
    reason: str


def _compress(src, new_writer, opts: CompressPlan) -> Path | str:
    """Every pass and attempt of one compress; ``new_writer()`` gives each attempt its
    writer (``ArchiveWriter`` or ``StoreArchiveWriter``)."""
    opts = opts.for_source(src.schema, src.description)  # every option checked; no row read yet
    numeric, passthrough = list(opts.numeric), list(opts.passthrough)
    passes = _Passes(src, opts)
    read = _sketch_rows(src, opts, numeric)
    if read.sampled and (opts.method == "svd" or opts.link == "cx"):
        # the next full pass is the encode pass: DuckDB starts on it while the sample is read
        src.open_ahead(numeric, passthrough)
    profile, fingerprint, sample, gram = passes.profile(numeric, keep_sample=opts.has_targets,
                                                        groups=read.groups)
    rows = int(read.total) if read.sampled else int(fingerprint.rows)
    if rows == 0:
        raise EmptySourceError(f"The source {src.description} has no rows; there is nothing to compress.")
    too_big = _beyond_float64(src.schema, numeric, profile)
    if too_big:  # keep exactly, outside the factorization
        keep = [j for j, n in enumerate(numeric) if n not in too_big]
        profile = ColumnProfile(*(getattr(profile, f)[keep] for f in profile.__dataclass_fields__))
        fingerprint = fingerprint.select(keep)
        gram = gram.select(keep)
        if passes.trial_rows is not None:
            passes.trial_rows = passes.trial_rows[:, keep]
        numeric = [numeric[j] for j in keep]
        factored = set(numeric)
        passthrough = [n for n in src.schema.names if n not in factored]
        if not numeric:
            raise NoNumericColumnsError(
                f"Every numeric column of {src.description} holds integers beyond 2^53, which "
                "cannot be rebuilt exactly in float64; there is nothing to factor."
            )
    if not read.sampled and (opts.method == "svd" or opts.link == "cx"):
        # the profile read every row and the next full pass is the encode pass (a refit's
        # sketch pass over other columns closes it unread): DuckDB plans it and decodes its
        # first batch while the fit and the trials run (0.4 s to the first batch at 1e6 x 100)
        src.open_ahead(numeric, passthrough)
    width = len(numeric)
    transform = Transform.fit(opts.transform, profile)
    # the sketch comes from the profile pass's co-moments, moved to the transform's shift;
    # from a sample of m rows, scaled by rows / m to estimate the whole table's Gram matrix
    with np.errstate(over="ignore", invalid="ignore"):
        moments = gram.gram(transform.shift, transform.scale)
        if read.sampled:
            moments.rescale(rows / max(int(fingerprint.rows), 1))
    del gram  # a wide table's kept rows: not needed past this point
    _check_squares(moments.diagonal(), profile, numeric, src.description)
    sketch = sketch_of(moments)
    del moments
    goal = _Goal.from_options(opts, numeric, profile.std)
    goal.serving(src.schema, numeric, profile)
    inputs = _Inputs(numeric, passthrough, rows, profile, fingerprint, transform, sketch, read)
    model = _tolerance_model(opts, opts.method or "cur", inputs, sample) if goal.max_abs_error is not None else None
    build = _measured_basis(_first_build(opts, goal, inputs, sample, model), opts, goal, inputs, model, passes)
    smallest = None  # the smallest archive measured exactly (target_bytes), manifest included
    for attempt in range(_MAX_ATTEMPTS):
        written = _write(src, new_writer, opts, inputs, build, passes)
        verdict = goal.verdict(written, transform, sketch)
        last = (attempt == _MAX_ATTEMPTS - 1 or build.n_columns >= width
                or (goal.target_bytes is not None and build.n_columns == 0))
        if verdict is not None and last and goal.target_bytes is None:
            written.abort()
            raise InvalidInputError(f"rankfold could not meet the target: {verdict}")
        if verdict is None or last:
            # target_bytes: the size is checked exactly as the manifest is written (every file
            # and the manifest counted); the verdict above only steered by an estimate
            try:
                return written.commit(goal, attempt + 1)
            except SizeTargetMissedError as missed:
                smallest = missed.total if smallest is None else min(smallest, missed.total)
                if last and build.n_columns == 0:
                    raise SizeTargetMissedError(
                        f"target_bytes={goal.target_bytes} is below the smallest archive rankfold "
                        f"can write for this source: {smallest} bytes, every file and the manifest "
                        "counted (no basis columns: the exactly kept columns, row ids and column "
                        f"offsets). Raise the target to at least {smallest}.", total=smallest) from None
                if last:
                    raise SizeTargetMissedError(
                        f"target_bytes={goal.target_bytes} cannot be met: the smallest archive "
                        f"rankfold wrote for this source in {attempt + 1} attempts takes {smallest} "
                        "bytes, every file and the manifest counted. Raise the target to at least "
                        f"{smallest}, or ask for an error target instead.", total=smallest) from None
        else:
            written.abort()
        build = goal.next_build(build, width, rows, last=attempt == _MAX_ATTEMPTS - 2)
    raise AssertionError("unreachable")


_MAX_ATTEMPTS = 6


def _beyond_float64(schema: pa.Schema, numeric: list[str], profile: ColumnProfile) -> list[str]:
    """Integer columns holding values that float64 cannot hold exactly (|x| >= 2^53)."""
    return [n for j, n in enumerate(numeric)
            if pa.types.is_integer(schema.field(n).type)
            and profile.valid[j] > 0  # an all-NULL column has range (inf, -inf)
            and max(abs(profile.minimum[j]), abs(profile.maximum[j])) >= _EXACT_INTEGER_LIMIT]


def _check_squares(second_moments: np.ndarray | None, profile: ColumnProfile, numeric: list[str],
                   description: str) -> None:
    """Refuse columns whose squared deviations overflow float64 (|x - mean| beyond ~1e154):
    their second moments, and so the sketch, cannot be formed. ``second_moments`` (n,) is
    the sketch's diagonal (None: check the profile alone)."""
    bad = ~np.isfinite(profile.m2)
    if second_moments is not None:
        bad |= ~np.isfinite(second_moments)
    if bad.any():
        names = [numeric[j] for j in np.flatnonzero(bad)]
        largest = float(np.max(np.maximum(np.abs(profile.minimum[bad]), np.abs(profile.maximum[bad]))))
        raise InvalidInputError(
            f"The columns {names} of {description} hold values too large to square in float64 "
            f"(|x| up to {largest:.3g}; squares overflow beyond about 1e154), so their spread "
            "cannot be measured. Store them in other units (e.g. divided by a power of ten), or "
            "keep them exactly with exact_columns=[...]."
        )


@dataclass
class _Goal:
    """The user's target, as arrays over the numeric columns (None where not asked)."""

    rel_error: np.ndarray | None
    rel_error_per_column: bool
    max_abs_error: np.ndarray | None
    max_abs_error_per_column: bool
    target_bytes: int | None
    max_std_error: np.ndarray | None = None
    max_std_error_per_column: bool = False
    margin: np.ndarray | None = None  # how far serving may move a value (see ``serving``)
    integer: np.ndarray | None = None
    # max_abs_error as the user gave it (``max_abs_error`` above also holds the tolerances
    # max_std_error implies); only this is recorded: columns.parquet holds every tolerance
    asked_abs_error: np.ndarray | None = None
    asked_abs_error_per_column: bool = False

    def serving(self, schema: pa.Schema, names: list[str], profile: ColumnProfile) -> None:
        """Record how far ``arithmetic.serve`` may move a stored value: integer columns are
        rounded (1/2), float32 / float16 columns narrowed (at most one ulp of that type at the
        column's largest magnitude: served values are clamped into the observed range first).
        An error target implies the profile of every row (``may_sample_sketch``), so the
        range is the table's."""
        types = [schema.field(n).type for n in names]
        self.integer = np.array([pa.types.is_integer(t) for t in types], bool)
        reach = np.maximum(np.abs(profile.minimum), np.abs(profile.maximum))
        reach = np.where(np.isfinite(reach), reach, 0.0)
        margin = np.zeros(len(names))
        for j, t in enumerate(types):
            if pa.types.is_float32(t):
                margin[j] = float(np.spacing(np.float32(reach[j])))
            elif pa.types.is_float16(t):
                margin[j] = float(np.spacing(np.float16(min(reach[j], 65504.0))))
        self.margin = margin

    def stored_tolerance(self) -> np.ndarray | None:
        """The tolerance the stored values must meet so that the SERVED values meet
        ``max_abs_error``. An integer column is served rounded, which moves a value by up to
        1/2: with t >= 1/2 its stored values must be within t - 1/2 (then the rounded value
        is within t of the integer truth); below 1/2 rounding finds the truth itself. A
        float32 column is served narrowed: its stored values must be within
        max(t - margin, t / 2) (``arithmetic.serve``: within t either way)."""
        t = self.max_abs_error
        if t is None or self.integer is None:
            return t
        # t - margin leaves room for the narrowing; below t / 2, t / 2 does: where half a unit
        # exceeds the stored error, only one number of the type is possible (bound 0)
        floats = np.maximum(t - self.margin, t / 2.0)
        return np.where(self.integer, np.where(t >= 0.5, t - 0.5, t), floats)

    @classmethod
    def from_options(cls, opts: CompressPlan, names: list[str],
                     std: np.ndarray | None = None) -> "_Goal":
        """``max_abs_error`` here is the per-column tolerance in column units: the user's
        max_abs_error, and max_std_error * std_j (std over the column's valid values), the
        smaller where both are given. A column whose std is 0 (constant) gets tolerance 0:
        any cell the factors miss is stored exactly."""
        absolute = asked = opts.per_column_target("max_abs_error", names)
        relative = opts.per_column_target("max_std_error", names)
        if relative is not None:
            spread = np.where(np.isfinite(std), std, 0.0) if std is not None else np.zeros(len(names))
            with np.errstate(invalid="ignore"):  # inf * 0 for unnamed constant columns
                from_std = np.where(np.isfinite(relative), relative * spread, np.inf)
            absolute = from_std if absolute is None else np.minimum(absolute, from_std)
        return cls(opts.per_column_target("rel_error", names),
                   isinstance(opts.rel_error, dict), absolute,
                   isinstance(opts.max_abs_error, dict) or relative is not None, opts.target_bytes,
                   relative, isinstance(opts.max_std_error, dict),
                   asked_abs_error=asked, asked_abs_error_per_column=isinstance(opts.max_abs_error, dict))

    def recorded(self, names: list[str], tolerance: np.ndarray | None = None) -> dict[str, Any]:
        """The targets as the user asked them. The per-column tolerances max_std_error implies
        are not repeated here: ``columns.parquet`` holds every column's tolerance (measured:
        1.5 kB of a 50-column manifest). Nor is a per-column max_abs_error that equals, bit for
        bit, the stored ``tolerance`` (n,) of every column it names and names every column that
        has one: it is recorded as ``manifest_schema.COLUMN_TOLERANCES`` where that is shorter."""
        def listed(values, per_column):
            if values is None:
                return None
            if per_column:
                return {n: float(v) for n, v in zip(names, values) if np.isfinite(v)}
            return float(values[0])
        absolute = listed(self.asked_abs_error, self.asked_abs_error_per_column)
        if (isinstance(absolute, dict) and tolerance is not None
                and len(json.dumps(absolute)) > len(json.dumps(COLUMN_TOLERANCES))  # shorter only
                and np.array_equal(np.where(np.isfinite(tolerance), tolerance, np.inf),
                                   np.where(np.isfinite(self.asked_abs_error), self.asked_abs_error, np.inf))):
            absolute = COLUMN_TOLERANCES
        return {"rel_error": listed(self.rel_error, self.rel_error_per_column),
                "max_abs_error": absolute,
                "max_std_error": listed(self.max_std_error, self.max_std_error_per_column),
                "target_bytes": self.target_bytes}

    def verdict(self, written: "_Written", transform: Transform, sketch) -> str | None:
        """None when the written archive meets the target, else what missed."""
        if self.target_bytes is not None and written.bytes > self.target_bytes:
            return f"the archive takes {written.bytes} bytes"
        if self.rel_error is not None:
            ledger = written.result.ledger
            z_err = ledger.err_l2 / transform.scale
            if self.rel_error_per_column:
                norms = np.sqrt(np.sum(sketch.r**2, axis=0))
                with np.errstate(divide="ignore", invalid="ignore"):
                    rel = np.where(norms > 0, z_err / norms, 0.0)
                named = np.isfinite(self.rel_error)
                missed = named & (rel > self.rel_error)
                if missed.any():
                    j = int(np.flatnonzero(missed)[0])
                    return f"column {j} has relative error {rel[j]:.4g} > {self.rel_error[j]:.4g}"
            else:
                total = float(np.sqrt(np.sum(sketch.spectrum.values**2)))
                achieved = float(np.sqrt(np.sum(z_err**2))) / total if total > 0 else 0.0
                if achieved > self.rel_error[0]:
                    return f"relative error {achieved:.4g} > {self.rel_error[0]:.4g}"
        return None

    def next_build(self, build: _Build, width: int, rows: int, *, last: bool) -> _Build:
        """Shrink for a size target; grow for an error target (the last try keeps every
        column, whose error is zero, so an error target is always met in the end)."""
        if self.target_bytes is not None:
            c = max(1, int(build.n_columns * 0.75))
            if c == build.n_columns:
                c -= 1
        elif last:
            c = width
        else:
            c = min(width, max(build.n_columns + 1, int(np.ceil(build.n_columns * 1.3))))
        rank = (c + 1) // 2 if build.method == "cur" else c
        return _Build(build.method, max(rank, 0), c, min(2 * c, rows) if build.method == "cur" else 0,
                      build.coding_plan, build.reason + f"; retried with {c} columns")


def _first_build(opts, goal, inputs: _Inputs, sample, model=None) -> _Build:
    """The first attempt's sizes and coding plan, from the size model (``model``: the
    ``_tolerance_model`` of a ``max_abs_error`` goal)."""
    rows, width, sketch = inputs.rows, len(inputs.numeric), inputs.sketch
    transform, numeric, passthrough = inputs.transform, inputs.numeric, inputs.passthrough
    opts.check_rows(rows, width)
    method = opts.method or "cur"
    if goal.target_bytes is not None:
        exact = np.array([sample.get(n, 8.0) for n in numeric])
        fixed = rows * sum(sample.get(n, 8.0) for n in passthrough) + rows * 8.0
        candidates = [targets.PredictedResiduals.of_cur(sketch.r, transform.scale, rows) if m == "cur"
                      else targets.PredictedResiduals.of_svd(sketch.spectrum, transform.scale, rows)
                      for m in ((opts.method,) if opts.method else ("cur", "svd"))]
        plan = targets.plan_for_bytes(float(goal.target_bytes), candidates, exact, fixed)
        if plan is None:
            # below the size model's least: write the smallest archive (no basis columns) and
            # measure it, so that the refusal names a size that is true, not a model's guess
            return _Build("cur", 0, 0, 0, None, "no basis columns: target_bytes is below the "
                          "size model's smallest archive")
        return _Build(plan.method, plan.rank, plan.columns,
                      min(2 * plan.columns, rows) if plan.method == "cur" else 0, plan, plan.reason)
    if goal.max_abs_error is not None:
        predicted, coding, limit = model
        plan = targets.plan_for_tolerance(
            predicted, goal.stored_tolerance(), coding, opts.basis_sizes(method, width, limit),
            reason=("given size; residual coded to meet the tolerance" if opts.fixed_basis
                    else "fewest predicted bytes at the tolerance"))
        c = plan.columns
        return _Build(method, plan.rank, c, opts.anchor_count(c, rows) if method == "cur" else 0, plan,
                      plan.reason)
    if goal.rel_error is not None:
        order, res = targets.cur_residuals(sketch.r)
        norms = np.sqrt(np.sum(sketch.r**2, axis=0))
        total = float(np.sqrt(np.sum(sketch.spectrum.values**2)))
        c = targets.plan_for_rel_error(goal.rel_error, res, norms, total, goal.rel_error_per_column, width)
        if method == "svd":
            res_svd = targets.svd_residuals(sketch.spectrum.values, sketch.spectrum.right)
            c = targets.plan_for_rel_error(goal.rel_error, res_svd, norms, total, goal.rel_error_per_column, width)
        c = max(c, 1)
        rank = (c + 1) // 2 if method == "cur" else c
        return _Build(method, rank, c, min(2 * c, rows) if method == "cur" else 0, None,
                      "fewest columns whose predicted error meets rel_error")
    rank, c, r, why = _sizes(opts, rows, width, sketch.spectrum)
    return _Build(method, rank, c, r, None, why)


def _tolerance_model(opts, method: str, inputs: _Inputs, sample):
    """The size model under a tolerance: the predicted residuals of ``method``, the coding
    (with ``sample``'s measured bytes per exactly stored value), and the most basis columns
    (or scores) a plan may have."""
    rows, width, sketch, transform = inputs.rows, len(inputs.numeric), inputs.sketch, inputs.transform
    if method == "cur":
        predicted = targets.PredictedResiduals.of_cur(sketch.r, transform.scale, rows)
    else:
        predicted = targets.PredictedResiduals.of_svd(sketch.spectrum, transform.scale, rows)
    exact = np.array([sample.get(n, 8.0) for n in inputs.numeric])
    limit = min(width - 1, rows, max(1, width // 2)) if method == "cur" else min(width, rows, max(1, width // 2))
    coding = targets.ToleranceCoding(opts.residual, opts.basis_precision, inputs.profile.std, exact)
    return predicted, coding, max(limit, 0)


def _measured_basis(build: _Build, opts, goal, inputs: _Inputs, model, passes) -> _Build:
    """The size model's number of basis columns checked by measured trial on the profile
    pass's sample of runs of rows (``basis_size.climb``, ``coding.measured_bytes``); the build
    unchanged when the model's pick measures smallest, or when nothing is on offer: a given
    basis size, the SVD method, a link that reads anchor rows (each size would cost a pass
    over the rows), no sample."""
    trial = passes.trial_rows
    if (goal.max_abs_error is None or build.method != "cur" or opts.fixed_basis or opts.link != "cx"
            or build.coding_plan is None or trial is None or not trial.shape[0]):
        return build
    trial = basis_size.search_sample(trial, passes.trial_starts)
    predicted, coding, limit = model
    orders: list[np.ndarray] = []  # pivoted QR orders are nested: one order, sliced, serves every size
    tolerance, transform, rows, width = goal.stored_tolerance(), inputs.transform, inputs.rows, len(inputs.numeric)
    builds: dict[int, _Build] = {build.n_columns: build}
    alone_cache: dict = {}
    layouts: dict = {}
    packs = {"model": False}  # whether the model's pick measured its codes packed

    def measure(c: int) -> float:
        if c not in builds:
            plan = targets.plan_for_tolerance(predicted, tolerance, coding, [((c + 1) // 2, c)], reason=build.reason)
            builds[c] = _Build("cur", plan.rank, c, opts.anchor_count(c, rows), plan, build.reason)
        if c == 0:
            mixing = Mixing(np.zeros((0, width)), transform.shift.copy(), np.zeros(0), np.zeros(0, np.int64))
            anchor_values = np.zeros((0, width))
        else:  # the first fit of ``_write``, with the same seed
            choice = None
            if opts.column_method == "pivoted_qr":
                if not orders or orders[0].size < c:
                    orders[:] = [selection.pivoted_qr_order(inputs.sketch.r, max(c, 2 * build.n_columns))]
                choice = _cur.ColumnChoice(orders[0][:c], None)
            mixing, anchors, _ = _fit_cur(passes, opts, builds[c], inputs, inputs.sketch, transform,
                                          np.random.default_rng(opts.seed), False, choice)
            anchor_values = anchors.values
        plan_coding = coding_for_plan(builds[c].coding_plan, mixing, builds[c])
        mixing = trim_factors(mixing, plan_coding.tolerance, inputs.profile)
        # the layouts the model's pick measured smallest serve the other sizes (one write, not
        # four); so does whether its codes pack into one list column (the table's shape decides)
        first = c == build.n_columns
        total, found, packed = measured_bytes(trial, mixing, plan_coding, transform, anchor_values, rows,
                                              alone_cache, layouts, packing=first or packs["model"])
        if first:
            layouts.update(found)
            packs["model"] = packed
        return total

    chosen, measured = basis_size.climb(build.n_columns, limit, measure)
    if chosen == build.n_columns:
        return build
    tried = ", ".join(f"{c}: {int(b)}" for c, b in sorted(measured.items()))
    return dataclasses.replace(
        builds[chosen], reason=f"{build.reason}; {chosen} basis columns by measured trial, not the model's "
        f"{build.n_columns} (bytes estimated from a sample of {trial.shape[0]} rows, by basis columns: {tried})")


class _Written:
    """One attempt written to a temporary directory, not yet committed."""

    def __init__(self, writer, result, manifest, files, tolerance=None):
        self.writer, self.result, self.manifest, self.files = writer, result, manifest, files
        self.tolerance = tolerance  # (n,) every column's tolerance as columns.parquet holds it
        # data files as written plus an estimate of the manifest (steers target_bytes attempts;
        # the size recorded and checked is exact: ``commit``)
        self.bytes = sum(writer.size_of(f) for f in files) + sizes.manifest_allowance(manifest, files)

    def abort(self) -> None:
        self.writer.abort()

    def commit(self, goal: _Goal, attempts: int) -> Path | str:
        self.manifest["targets"] = goal.recorded(self.manifest["numeric_columns"], self.tolerance)
        self.manifest["achieved"] = {
            "bytes": int(self.bytes),  # made exact by write_manifest: every file + manifest.json
            "relative_frobenius": self.manifest["errors"]["relative_frobenius"],
            "largest_error": self.manifest["errors"]["largest_error"],
            "corrections": self.result.corrections,
            "attempts": attempts,
        }
        try:
            path = self.writer.commit(self.manifest, self.files, at_most=goal.target_bytes)
        except BaseException:
            self.writer.abort()
            raise
        return path


def _write(src, new_writer, opts, inputs: _Inputs, build: _Build, passes: _Passes) -> _Written:
    """One attempt: fit from the sketch, then the encode pass writes it to a temporary
    directory. ``inputs.profile`` is the profile pass's (of a sample when ``read.sampled``:
    then the encode pass gathers the statistics of every row, which the archive records)."""
    numeric, passthrough, rows, profile = inputs.numeric, inputs.passthrough, inputs.rows, inputs.profile
    transform, sketch, read = inputs.transform, inputs.sketch, inputs.read
    width = len(numeric)
    rng = np.random.default_rng(opts.seed)
    plan = build.coding_plan
    refit = None
    if build.method == "svd":
        rank = build.n_columns
        score_right = sketch.spectrum.right[:, :rank]
        mixing = mixing_for_scores(sketch.spectrum.right, rank, transform)
        screen = OutlierScreen(transform, mixing, sketch.r, None, rows, score_right) if opts.refits and rank else None
        refit = refit_left_out(screen, passes.trial_rows, opts.refit_outliers)
        if screen is not None and refit is None:
            cleaned = passes.sketch("refit", numeric, rows, screen)
            refit = {"kappa": KAPPA, "cells_screened": screen.replaced,
                     "rows_left_out": screen.rows_left_out}
            score_right = cleaned.spectrum.right[:, :rank]
            mixing = mixing_for_scores(cleaned.spectrum.right, rank, transform)
        anchors = _no_anchors(width)
        basis_names = [layout.SCORE_PATTERN.format(k) for k in range(rank)]
    elif build.n_columns == 0:  # no low-rank part: offsets (the column means) and the residual
        mixing = Mixing(np.zeros((0, width)), transform.shift.copy(), np.zeros(0), np.zeros(0, np.int64))
        anchors = _no_anchors(width)
        score_right, basis_names = None, []
    else:
        mixing, anchors, m_transformed = _fit_cur(passes, opts, build, inputs, sketch, transform, rng, False)
        screen = OutlierScreen(transform, mixing, sketch.r, m_transformed, rows) if opts.refits else None
        refit = refit_left_out(screen, passes.trial_rows, opts.refit_outliers)
        if screen is not None and refit is None:
            cleaned = passes.sketch("refit", numeric, rows, screen)
            refit = {"kappa": KAPPA, "cells_screened": screen.replaced,
                     "rows_left_out": screen.rows_left_out}
            mixing, anchors, _ = _fit_cur(passes, opts, build, inputs, cleaned, screen, rng, True)
        score_right = None
        basis_names = [numeric[k] for k in mixing.basis_columns]
    coding = coding_for_plan(plan, mixing, build) or Coding.plain(width, mixing.weights.shape[0])
    if np.isfinite(coding.tolerance).any():
        mixing = trim_factors(mixing, coding.tolerance, profile)
    if plan is not None and passes.trial_rows is not None and passes.trial_rows.shape[0]:
        exact_basis = None
        if opts.basis_precision == "auto" and build.method == "cur" and np.isfinite(coding.basis_step).any():
            exact_basis = coding_for_plan(dataclasses.replace(plan, basis_step=np.full(plan.basis_step.size, np.nan)),
                                  mixing, build)
        trial = predictor_trial(passes.trial_rows, mixing, coding, transform, score_right, plan, build,
                                 rows, anchors.values, keep_basis=opts.fixed_basis, exact_basis=exact_basis)
        if trial is not None:
            mixing, coding, build = trial
            if build.n_columns == 0:
                anchors, basis_names = _no_anchors(width), []
                score_right = None if score_right is None else score_right[:, :0]
    coding = with_row_differences(opts.row_differences, coding, numeric, passes.trial_rows, passes.trial_starts,
                                  mixing, transform, score_right)
    # one list column of codes per row, or one column per coded column (store/packed_codes.py)
    packing = code_packing(passes.trial_rows, mixing, coding, transform, score_right, rows, passes.trial_starts)
    if packing is not None and packing.packed:
        build = dataclasses.replace(build, reason=(
            f"{build.reason}; residual codes packed into one list column per row ({packing.packed_bytes} "
            f"against {packing.columns_bytes} bytes as one column each, estimated from {packing.sampled_rows} rows)"))
    model = FittedModel(
        numeric, [str(src.schema.field(n).type) for n in numeric], passthrough, transform.kind,
        transform.shift, transform.scale, mixing, basis_names, coding,
        ledger_scale(profile),  # units of the row ledger (of the sample's spread, if sampled)
        anchors.positions, anchors.values, anchors.nulls, score_right=score_right,
        packed_codes=packing is not None and packing.packed)
    writer = new_writer()
    sums = BlockSums(width, mixing.weights.shape[0], mixing.fill)
    try:
        distributed = passes.ex.distributed
        parts = passes.ex.run(
            "encode", _encode_task, numeric, passthrough, rows,
            (writer.worker_target, writer.part_rows, model, distributed, read.sampled)
            + (() if distributed else (writer,)))
        result = EncodeResult.merge([p[0] for p in parts], width)
        if distributed:
            writer.adopt_parts([part for p in parts for part in p[1]])
        for p in parts:
            sums.records.extend(p[2])
        cell_files = [f".cells-{k:05d}.parquet" for k, p in enumerate(parts) if p[0].cells.written]
        if opts.key:
            files, filesystem = writer.row_files()
            check_unique_key(files, opts.key, src.description, filesystem=filesystem)
        if read.sampled:
            profile = _whole_table_profile(src, numeric, rows, result)
        elif not result.fingerprint.matches(inputs.fingerprint):
            raise SourceChangedError(
                f"The source {src.description} gave different rows in the profile and encode "
                f"passes ({inputs.fingerprint.rows} then {result.rows} rows, or the same count with "
                "other values or order). Compress a stable snapshot, or add an ORDER BY."
            )
        model = model.with_statistics(column_statistics(profile, result.ledger, result.rows))
        files = _write_small_tables(writer, model, result, cell_files)
        files.append(sums.write(writer))
        manifest = _manifest(src, opts, inputs, build, model, profile, result, writer.parts)
        manifest["refit"] = refit
        manifest["sketch"] = read.recorded(rows)
        if read.sampled:
            manifest["errors"]["note"] += (
                "; the spectrum, and so the optimal error, is estimated from the sketch's "
                "sample of rows; every error, and the table's norm, is measured on every row")
        return _Written(writer, result, manifest, [p["name"] for p in writer.parts] + files, model.tolerance)
    except BaseException:
        writer.abort()
        raise


def _whole_table_profile(src, numeric: list[str], rows: int, result: EncodeResult) -> ColumnProfile:
    """The statistics of every row, gathered by the encode pass when the sketch read a
    sample; checks what the profile pass would have checked on them."""
    if result.rows != rows:
        raise SourceChangedError(
            f"Before the passes, {src.description} held {rows} rows (counted from its Parquet "
            f"footers or its table's row ids), but the encode pass read {result.rows}. The source "
            "changed during compress: compress a stable snapshot."
        )
    if _beyond_float64(src.schema, numeric, result.profile):
        raise _SampleMissed()
    _check_squares(None, result.profile, numeric, src.description)
    return result.profile


def _no_anchors(width: int) -> AnchorRows:
    return AnchorRows(np.zeros(0, np.int64), np.zeros((0, width)), np.zeros((0, width), bool))


def _fit_cur(passes, opts, build, inputs: _Inputs, sketch, screen, rng, refit: bool, choice=None):
    """Basis columns, anchor rows and raw-unit mixing of one CUR fit. ``screen`` is the
    transform used to read rows (the plain transform, or an OutlierScreen for a refit);
    a ``refit`` keys the row choice's random numbers (with the seed and each row's position)
    apart from the first fit's. ``choice``: the columns, when already chosen (else by
    ``opts.column_method``).

    The ``cx`` link (C^+ Z) uses no rows: it keeps no anchor rows and spends no pass on them."""
    numeric, rows = inputs.numeric, inputs.rows
    replace = opts.sample_with_replacement
    rank = max(1, build.rank)
    if choice is None:
        choice = _cur.choose_columns(opts.column_method, sketch.r, sketch.spectrum, rank, build.n_columns,
                                     rng, replace=replace)
    if opts.link == "cx":
        anchors = _no_anchors(len(numeric))
    else:
        request = _AnchorRequest(opts.row_method, rank, build.n_rows, opts.seed, replace, int(refit))
        anchors = passes.anchors("refit-select" if refit else "select", numeric, rows, screen, sketch,
                                 request)
    columns, m_transformed = _cur.build_mixing(opts.link, choice, sketch.r, screen.apply(anchors.values))
    return mixing_for_columns(columns, m_transformed, inputs.transform), anchors, m_transformed


def ledger_scale(profile: ColumnProfile) -> np.ndarray:
    """Units of the row ledger per column: the standard deviation, or 1 when it is 0 or not finite."""
    std = profile.std
    return np.where((std > 0) & np.isfinite(std), std, 1.0)


def _write_small_tables(writer, model: FittedModel, result: EncodeResult, cell_files=()) -> list[str]:
    """The columns and anchors tables (``FittedModel.to_tables``) and the exact cells of the
    partitions, streamed into one file; the names of the files written. The
    anchors and cells tables are written only when they hold rows
    (``manifest_schema.OPTIONAL_TABLES``)."""
    tables = model.to_tables()
    writer.write_table(layout.COLUMNS, tables[layout.COLUMNS])
    written = [layout.COLUMNS]
    if tables[layout.ANCHORS].num_rows:
        writer.write_table(layout.ANCHORS, tables[layout.ANCHORS])
        written.append(layout.ANCHORS)
    if cell_files or result.cells.rows:  # a partition's cell file exists only when it holds cells
        writer.concat_cells(list(cell_files), [result.cells.table()] if result.cells.rows else [])
        written.append(layout.CELLS)
    return written


def _finite_or_none(value: float) -> float | None:
    value = float(value)
    return value if math.isfinite(value) else None


def _transformed_norm(profile: ColumnProfile, transform: Transform) -> float:
    """||Z||_F of the transformed table (missing cells at 0) from every row's statistics:
    per column, sum_i (x_ij - shift_j)^2 / scale_j^2 = (m2_j + valid_j (mean_j - shift_j)^2) / scale_j^2."""
    with np.errstate(over="ignore", invalid="ignore"):
        per_column = (profile.m2 + profile.valid * (profile.mean - transform.shift) ** 2) / transform.scale**2
    return float(np.sqrt(np.sum(per_column)))


def _recorded_spectrum(values: np.ndarray, rows_read: int) -> list[float]:
    """The sketch's singular values (n,) as the manifest records them: a table of ``rows_read``
    rows has rank at most ``rows_read``, so every value beyond the first ``rows_read`` is 0
    (Golub and Van Loan, "Matrix Computations", 4th ed., 2013, section 2.4); the sketch gives
    them as rounding noise, about sqrt(u) sigma_1 (Gram matrix eigenvalues), recorded as 0 and
    so stored as a count (``manifest_schema.written_form``). Measured on a real 24 x 1,728 table
    at 0.01 std: 1,704 such values, 8,745 bytes of manifest -> about 200."""
    recorded = [float(s) for s in values]
    for k in range(min(max(int(rows_read), 0), len(recorded)), len(recorded)):
        recorded[k] = 0.0
    return recorded


def _error_summary(numeric, profile, transform, result, spectrum, rank, sampled=False) -> dict[str, Any]:
    ledger = result.ledger
    # the spectrum of a sampled sketch estimates ||Z||_F; every row's statistics give it exactly
    total = _transformed_norm(profile, transform) if sampled else float(np.sqrt(np.sum(spectrum.values ** 2)))
    z_err = float(np.sqrt(np.sum((ledger.err_l2 / transform.scale) ** 2)))
    optimum = spectrum.optimal_relative_error(rank)
    achieved = z_err / total if total > 0 else 0.0
    return {
        "relative_frobenius": _finite_or_none(achieved),
        "optimal_relative_frobenius": _finite_or_none(optimum),
        "ratio_to_optimum": _finite_or_none(achieved / optimum) if optimum > 0 else None,
        **column_error_figures(numeric, profile.std, ledger),
        "cells_approximated": int(ledger.cells.sum()),
        "cells_exact": int(result.rows * len(numeric) - ledger.cells.sum()),
        "cells_stored_exactly_outside_factors": result.cells.count,
        "note": "relative figures are in transformed units (after the transform); "
                "relative RMS is per column, divided by the column's standard deviation",
    }


def _manifest(src, opts, inputs: _Inputs, build: _Build, model: FittedModel, profile: ColumnProfile,
              result: EncodeResult, parts) -> dict:
    """The manifest of one attempt (``profile``: the statistics of every row)."""
    numeric, passthrough, rows, spectrum = inputs.numeric, inputs.passthrough, inputs.rows, inputs.sketch.spectrum
    roles = {n: "numeric" for n in numeric} | {n: "exact" for n in passthrough}
    return {
        "format": layout.FORMAT_NAME,
        "format_version": layout.FORMAT_VERSION,
        "writer": {"name": "rankfold", "version": __version__},
        "archive_id": str(uuid.uuid4()),
        "created_at": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "source": src.description,
        "source_size": sizes.source_size(src.schema, numeric, rows, *sizes.parquet_files_of(src)),
        "shape": [rows, len(numeric)],
        "schema": [{"name": f.name, "type": str(f.type), "role": roles[f.name]} for f in src.schema],
        "numeric_columns": numeric,
        "exact_columns": passthrough,
        "key": opts.key,
        "method": {"kind": build.method, "rank": build.rank, "rank_reason": build.reason,
                   "n_columns": len(model.basis_names), "n_rows": int(model.anchor_positions.size),
                   "seed": opts.seed, "options": opts.recorded()},
        "transform": model.transform_kind,
        "basis": model.basis_entries(),
        "row_ledger": model.row_ledger,  # False: the row files carry no row ledger
        # NULL cells stored as NULL residual codes (absent when none are: manifest_schema)
        **({"null_codes": True} if result.null_codes else {}),
        # every residual code of a row in one list column (store/packed_codes.py)
        **({"packed_codes": True} if model.packed_codes else {}),
        "anchors": [int(p) for p in model.anchor_positions],
        "row_parts": parts,
        "spectrum": _recorded_spectrum(spectrum.values, inputs.read.rows_read if inputs.read.sampled else rows),
        "errors": _error_summary(numeric, profile, inputs.transform, result, spectrum, build.rank,
                                 sampled=result.profile is not None),
        "files": [],
    }
