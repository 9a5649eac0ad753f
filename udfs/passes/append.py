"""Append rows to an archive without refactoring it.

The new rows are rebuilt from their own basis values (CUR) or scores (SVD, from the stored
right factor) with the archive's mixing matrix, and go through the encode pass unchanged:
residual measured on the factors as stored, residual codes and corrections under the
archive's tolerance, exact cells, row ledger. The encode-pass guarantee (``encode.py``)
therefore holds for appended rows exactly as for the original ones. The column ledger is
merged (max, hypot, sums), as are the column statistics; the transform and the ledger scale
stay those of the archive, which the rebuild formula depends on.

A new archive version is written into a temporary folder beside the archive, under the
archive's write lock, then published (``store.versions.publish_in_place``): new row files and
the small tables that change (columns, cells, blocks) get names carrying this version's token,
listed in the manifest's ``tables``; they move into the archive, and one atomic rename of
``manifest.json`` commits them. No existing file is modified, so a reader holding the old
version keeps reading it; a killed append leaves the old version as it was.

Drift: the relative error of all appended rows (Frobenius, after the transform) against a
limit: the archive's ``rel_error`` target when it had one, else ``DRIFT_FACTOR`` times the
error measured at compress time; and the share of cells stored as corrections against
``DRIFT_FACTOR`` times the share at compress time (at least 1%). Past either, the manifest's
``drift.refactor_due`` is true: compress the whole table again.
"""

from __future__ import annotations

import dataclasses
import os
import shutil
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa

from ..errors import ArchiveNotFoundError, EmptySourceError, InvalidInputError
from ..store import arithmetic, layout, versions
from ..store.aggregate import BLOCKS, BlockSums, pack_blocks, unpack_blocks
from ..store.integrity import read_small_table
from ..store.manifest import file_entry, write_manifest
from ..store.manifest_schema import holds_table
from ..store.reader import ArchiveReader
from ..store.table_schemas import CELLS_SCHEMA
from .commit import PART_ROWS, RowPartWriter, concat_parquet, write_small_table
from .executors import one_blas_thread
from .keys import check_unique_key
from .profile import ColumnProfile, Transform, profile_block
from .progress import Progress
from .sources import block_from_batch, open_source
from .encode import ColumnLedger, column_error_figures, column_statistics, encode_pass

__all__ = ["append", "DRIFT_FACTOR"]

DRIFT_FACTOR = 1.5
_EXACT_INTEGER_LIMIT = 2.0**53


def _check_schema(source_schema: pa.Schema, manifest: dict, description: str, path: Path) -> None:
    wanted = [(f["name"], f["type"]) for f in manifest["schema"]]
    have = [(f.name, str(f.type)) for f in source_schema]
    names = [n for n, _ in wanted]
    if [n for n, _ in have] != names:
        missing = [n for n in names if n not in source_schema.names]
        extra = [n for n, _ in have if n not in names]
        detail = (f"missing {missing}" if missing else "") + ("; " if missing and extra else "") + (
            f"not in the archive {extra}" if extra else "")
        raise InvalidInputError(
            f"The appended source {description} has the columns {[n for n, _ in have]}, but the "
            f"archive {path} holds {names} ({detail or 'same names, other order'}). Select the "
            "archive's columns in its order before appending."
        )
    for (name, archived), (_, given) in zip(wanted, have):
        if archived != given:
            raise InvalidInputError(
                f"Column {name!r} of the appended source {description} is {given}, but the archive "
                f"{path} stores it as {archived}. Cast it to {archived} before appending."
            )


def _stream(src, names, passthrough, batch_rows, first_row, transform, state, report):
    """Blocks of the appended rows, numbered after the archive's rows; gathers their column
    statistics and transformed squared norm on the way."""
    first = first_row
    integer = [j for j, n in enumerate(names) if pa.types.is_integer(src.schema.field(n).type)]
    for batch in src.batches(list(dict.fromkeys(list(passthrough) + names)), batch_rows):
        block, mask = block_from_batch(batch, names)
        if integer:
            big = np.abs(np.where(np.isfinite(block[:, integer]), block[:, integer], 0.0)) >= _EXACT_INTEGER_LIMIT
            if big.any():
                j = integer[int(np.flatnonzero(big.any(axis=0))[0])]
                raise InvalidInputError(
                    f"Column {names[j]!r} of the appended rows holds integers beyond 2^53, which "
                    "float64 cannot rebuild exactly, and the archive factors it. Compress the "
                    "whole table again (such columns are then kept exactly)."
                )
        state["profile"] = state["profile"].merge(profile_block(block, mask))
        z = transform.apply(block)
        state["z_norm2"] += float(np.einsum("ij,ij->", z, z))
        yield first, batch, block, mask
        first += batch.num_rows
        report.advance(batch.num_rows)


def append(path: str | Path, source: Any, *, expected_id: str | None = None,
           expected_version: int | None = None, connection=None, batch_rows: int = 131_072,
           progress=None) -> Path:
    """Append the rows of ``source`` to the archive at ``path``; returns the path."""
    directory = Path(path)
    if directory.is_symlink():  # lock and write beside the folder the link names
        directory = directory.resolve()
    if not directory.is_dir():
        raise ArchiveNotFoundError(f"No archive at {directory}. Check the path.")
    with versions.WriteLock(directory):  # one writer per path; leftovers of crashed writes go
        versions.recover(directory)
        return _append(directory, source, expected_id, expected_version, connection, batch_rows, progress)


def _append(directory, source, expected_id, expected_version, connection, batch_rows, progress) -> Path:
    reader = ArchiveReader(directory)
    manifest = reader.manifest
    version = int(manifest.get("version", 0))
    if (expected_id is not None and manifest["archive_id"] != expected_id) or (
            expected_version is not None and version != expected_version):
        raise InvalidInputError(
            f"The archive at {directory} changed since it was opened (now version {version}); "
            "open it again with rankfold.open and append to that."
        )
    src = open_source(source, connection)
    temp = versions.new_temp_dir(directory)
    try:
        _check_schema(src.schema, manifest, src.description, directory)
        return _write_version(reader, src, batch_rows, progress, temp)
    finally:
        src.close()
        shutil.rmtree(temp, ignore_errors=True)  # empty after a commit


def _code_types(reader: ArchiveReader, name: str) -> dict[str, pa.DataType]:
    """The residual-code columns of the row file ``name`` and their unsigned types (every row
    file of an archive holds the same: ``integrity`` checks it)."""
    prefix = layout.CODE_PATTERN.format("")
    return {f.name: f.type for f in reader.row_file_schema(name) if f.name.startswith(prefix)}


def _write_version(reader: ArchiveReader, src, batch_rows, progress, temp: Path) -> Path:
    directory, manifest = reader.path, reader.manifest
    version = int(manifest.get("version", 0)) + 1
    # the archive's model, without its anchor rows (those are rows of the archive, not of the
    # appended source): the encode pass measures the new rows with it
    model = dataclasses.replace(reader.model, anchor_positions=np.zeros(0, np.int64),
                                anchor_values=np.zeros((0, reader.model.width)),
                                anchor_nulls=np.zeros((0, reader.model.width), bool))
    names, passthrough, width = model.names, model.exact_columns, model.width
    transform = Transform(model.transform_kind, model.shift, model.scale)
    stats = reader.model.statistics  # the archive's column statistics and ledger (decoded)
    first_row = reader.rows_count
    token = versions.new_token()
    old_parts = list(manifest["row_parts"])
    writer = RowPartWriter(temp, PART_ROWS, lambda k: versions.versioned_name(
        layout.ROWS_PATTERN.format(len(old_parts) + k), token))
    sums = BlockSums(width, model.weights.shape[0], model.fill)
    cells_temp = temp / f".append-{token}-cells.parquet"
    state = {"profile": ColumnProfile.empty(width), "z_norm2": 0.0}
    report = Progress(progress, "append", None)
    stream = _stream(src, names, passthrough, batch_rows, first_row, transform, state, report)
    try:
        with one_blas_thread():
            result = encode_pass(stream, model, writer, block_sums=sums, cells_file=cells_temp,
                                 code_types=_code_types(reader, old_parts[0]["name"]))
    finally:
        writer.close()
    report.finish()
    if result.rows == 0:
        raise EmptySourceError(f"The appended source {src.description} has no rows; nothing to append.")
    if manifest.get("key"):  # the old rows and the new ones together: one row per key value
        check_unique_key([directory / p["name"] for p in old_parts] + [temp / p["name"] for p in writer.parts],
                         manifest["key"],
                         f"the archive {directory} with the appended rows of {src.description}")
    tables = dict(manifest.get("tables") or {})
    new_files: list[str] = [p["name"] for p in writer.parts]
    # cells: the old table, then the new rows' cells (no table when neither holds any)
    cells_sources = ([os.path.abspath(directory / layout.table_file(manifest, layout.CELLS))]
                     if holds_table(manifest, layout.CELLS) else [])
    cells_sources += [cells_temp.name] if result.cells.written else []
    if cells_sources:
        cells_name = versions.versioned_name(f"cells.v{version}.parquet", token)
        concat_parquet(temp, cells_sources, cells_name, CELLS_SCHEMA, remove=False)
        tables[layout.CELLS] = cells_name
        new_files.append(cells_name)
    cells_temp.unlink(missing_ok=True)
    # blocks (per row-group sums for aggregates), when the archive has them
    listed = {f["name"] for f in manifest["files"]}
    old_blocks = layout.table_file(manifest, BLOCKS)
    if old_blocks in listed:
        blocks_name = versions.versioned_name(f"blocks.v{version}.parquet", token)
        old = unpack_blocks(read_small_table(directory, manifest, old_blocks), sums.basis, sums.width,
                            directory / old_blocks)
        write_small_table(temp / blocks_name, pack_blocks(pa.concat_tables([old, sums.table()]),
                                                          sums.basis, sums.width))
        tables[BLOCKS] = blocks_name
        new_files.append(blocks_name)
    # columns: merged ledger and statistics
    old = ColumnLedger(*(np.array(stats[n]) for n in ("err_max", "err_l2", "err_sum", "err_cells")))
    ledger = old.merge(result.ledger)
    before = ColumnProfile(
        stats["valid"], stats["nulls"], stats["nans"], stats["infinities"], stats["mean"],
        stats["std"] ** 2 * stats["valid"], stats["min"], stats["max"])
    profile = before.merge(state["profile"])
    figures = column_statistics(profile, ledger, first_row + result.rows)
    # the stored err_max is an upper limit already: rounded up again (round_up_short), it would
    # grow by a step of its 24 significant bits at every append
    figures["err_max"] = np.maximum(old.err_max, arithmetic.round_up_short(result.ledger.err_max))
    measured = reader.model.with_statistics(figures)
    columns_name = versions.versioned_name(f"columns.v{version}.parquet", token)
    write_small_table(temp / columns_name, measured.to_tables()[layout.COLUMNS])
    tables[layout.COLUMNS] = columns_name
    new_files.append(columns_name)
    # the manifest of the new version
    replaced = {layout.table_file(manifest, layout.CELLS), layout.table_file(manifest, layout.COLUMNS),
                layout.table_file(manifest, BLOCKS)}
    new = dict(manifest)
    new["version"] = version
    if result.null_codes:  # NULL cells stored as NULL residual codes (manifest_schema)
        new["null_codes"] = True
    new["shape"] = [reader.rows_count + result.rows, width]
    new["row_parts"] = old_parts + list(writer.parts)
    new["tables"] = tables
    new["errors"] = _errors(manifest, ledger, profile, transform, result, reader.rows_count + result.rows,
                            state["z_norm2"])
    new["drift"] = _drift(manifest, result, transform, state["z_norm2"], width)
    new["files"] = [f for f in manifest["files"] if f["name"] not in replaced] + [
        file_entry(temp, name, [layout.ROW_ID] + list(manifest.get("exact_columns", [])))
        for name in new_files]
    write_manifest(temp, new)
    versions.publish_in_place(directory, temp, new_files, expect=manifest)  # commit: one rename
    return directory


def _errors(manifest, ledger, profile, transform, result, rows, z_norm2_new) -> dict:
    """The ``errors`` record after an append: every figure restated over every row (the merged
    column ledger and statistics), except the optimum, which is that of the compressed rows."""
    names = list(manifest["numeric_columns"])
    width = len(names)
    errors = dict(manifest["errors"])
    previous = manifest.get("drift") or {}
    z_norm2 = float(np.sum(np.square(manifest["spectrum"]))) + previous.get("z_norm2", 0.0) + z_norm2_new
    z_err = float(np.sqrt(np.sum((ledger.err_l2 / transform.scale) ** 2)))
    errors["relative_frobenius"] = z_err / np.sqrt(z_norm2) if z_norm2 > 0 else 0.0
    errors.update(column_error_figures(names, profile.std, ledger))
    errors["cells_approximated"] = int(ledger.cells.sum())
    errors["cells_exact"] = int(rows * width - ledger.cells.sum())
    errors["cells_stored_exactly_outside_factors"] = int(
        errors.get("cells_stored_exactly_outside_factors", 0) + result.cells.count)
    optimum = errors.get("optimal_relative_frobenius")
    errors["ratio_to_optimum"] = (errors["relative_frobenius"] / optimum) if optimum else None
    errors["note_append"] = ("after appends: relative_frobenius, the column figures and the cell counts "
                             "cover every row; the optimum and spectrum are those of the compressed rows")
    return errors


def _drift(manifest, result, transform, z_norm2_new, width) -> dict:
    previous = manifest.get("drift") or {}
    at_compress = previous.get("relative_frobenius_at_compress",
                               manifest["errors"].get("relative_frobenius") or 0.0)
    shape_rows = manifest["shape"][0] - previous.get("rows_appended", 0)
    compress_corrections = previous.get(
        "corrections_share_at_compress",
        ((manifest.get("achieved") or {}).get("corrections") or 0) / max(shape_rows * width, 1))
    z_err2 = previous.get("z_err2", 0.0) + float(np.sum((result.ledger.err_l2 / transform.scale) ** 2))
    z_norm2 = previous.get("z_norm2", 0.0) + z_norm2_new
    rows = previous.get("rows_appended", 0) + result.rows
    corrections = previous.get("corrections_appended", 0) + result.corrections
    relative = float(np.sqrt(z_err2 / z_norm2)) if z_norm2 > 0 else 0.0
    target = (manifest.get("targets") or {}).get("rel_error")
    limit = float(target) if isinstance(target, (int, float)) else DRIFT_FACTOR * at_compress
    share = corrections / max(rows * width, 1)
    share_limit = max(DRIFT_FACTOR * compress_corrections, 0.01)
    reasons = []
    if relative > limit:
        reasons.append(f"the appended rows' relative error {relative:.4g} exceeds {limit:.4g}")
    if share > share_limit:
        reasons.append(f"{share:.2%} of the appended cells are corrections (limit {share_limit:.2%})")
    return {
        "appends": previous.get("appends", 0) + 1,
        "rows_appended": rows,
        "relative_frobenius_appended": relative,
        "relative_frobenius_at_compress": at_compress,
        "relative_frobenius_limit": limit,
        "corrections_appended": corrections,
        "corrections_share_appended": share,
        "corrections_share_at_compress": compress_corrections,
        "corrections_share_limit": share_limit,
        "z_err2": z_err2, "z_norm2": z_norm2,
        "refactor_due": bool(reasons),
        "reason": "; ".join(reasons) if reasons else None,
        "note": "relative errors are in transformed units; refactor_due: compress the whole table again",
    }
