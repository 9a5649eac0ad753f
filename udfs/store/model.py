"""The fitted model of an archive, with its one encoder and its one decoder side by side.

A numeric column j (of n) is rebuilt from the c basis values of its row (source columns kept
in the row files, or synthetic scores) as

    xhat_ij = offset_j + sum_k weights_kj basis_ik  (+ code_ij * residual_step_j)

(``arithmetic.approximate`` and ``arithmetic.add_residual``), and its bound is
min(ledger_scale_j * rowmax_i, err_max_j) + slack_ij, capped at tolerance_j (DEVELOPERS.md,
"The bound contract"). :class:`FittedModel` holds every per-column and per-basis-entry array
of that formula, the anchor rows, and what serving needs (observed range, type kind).

* :meth:`FittedModel.to_tables` is the encoder: the columns table, the anchors table
  (schemas in ``table_schemas``) and :meth:`FittedModel.basis_entries` for the manifest.
* :meth:`FittedModel.from_tables` is the decoder of the same three.

The compress passes build one before the encode pass (``with_statistics`` adds what that
pass measured), append reads one back and encodes the new rows with it, and every reader
(``reader.ArchiveReader.model``; SQL, report, verification through the reader) rebuilds
from it.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from functools import cached_property
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa

from ..errors import CorruptArchiveError
from . import arithmetic, layout, packed_codes, row_differences
from .table_schemas import (
    COLUMNS_OPTIONAL,
    anchors_schema,
    check_schema,
    columns_schema,
    pack_columns_table,
    row_file_reserved,
    unpack_columns_table,
)

__all__ = ["Mixing", "Coding", "FittedModel", "mixing_for_columns", "mixing_for_scores",
           "STATISTICS"]

# columns-table fields measured on the rows (profile and encode pass), not fitted
STATISTICS = ("valid", "nulls", "nans", "infinities", "mean", "std", "min", "max",
              "err_max", "err_l2", "err_sum", "err_cells", "rel_rms")


@dataclass
class Mixing:
    """Raw-unit rebuild: ``weights`` (c, n), ``offset`` (n,), ``fill`` (c,) for missing
    basis values, ``basis_columns`` (c,) source positions (None for synthetic scores)."""

    weights: np.ndarray
    offset: np.ndarray
    fill: np.ndarray
    basis_columns: np.ndarray | None


def mixing_for_columns(columns: np.ndarray, mixing: np.ndarray, transform: Any) -> Mixing:
    """Raw-unit mixing for real basis columns J (c,) and the mixing matrix M (c, n) of the
    transformed table z = (x - shift) / scale (``transform``: its ``shift`` and ``scale``, (n,)).

    With Z ~ Z[:, J] M, each column is an affine combination of raw basis values:
    W[k, j] = scale_j M[k, j] / scale_{J_k}, offset_j = shift_j - sum_k W[k, j] shift_{J_k}.
    Basis columns get the identity (W[:, J_k] = e_k, offset 0): they are stored exactly and
    the plain-SQL rebuild then returns them unchanged. Missing basis values are filled with
    their column's shift (z = 0)."""
    columns = np.asarray(columns, dtype=np.int64)
    weights = mixing * transform.scale[None, :] / transform.scale[columns][:, None]
    offset = transform.shift - transform.shift[columns] @ weights
    weights[:, columns] = np.eye(columns.size)
    offset[columns] = 0.0
    return Mixing(weights, offset, transform.shift[columns].copy(), columns)


def mixing_for_scores(right: np.ndarray, rank: int, transform: Any) -> Mixing:
    """Raw-unit mixing for synthetic scores T = Z V_k (method 'svd', ``right`` (n, >= rank)):
    x = shift + scale (T V_k^T). Missing scores are filled with 0."""
    weights = right[:, :rank].T * transform.scale[None, :]
    return Mixing(np.ascontiguousarray(weights), transform.shift.copy(), np.zeros(rank), None)


@dataclass
class Coding:
    """How values are coded beyond the factors (arrays over the n numeric columns, or over the
    c basis entries for ``basis_step``).

    tolerance: guaranteed max abs error per column (inf: none); approximated cells whose
        error plus slack would exceed it are stored exactly as corrections.
    residual_step: step of the quantized residual per column (NaN: no residual stored).
    basis_step: step of stored basis values or scores (NaN: stored exactly / as float64).
    float32_scores: SVD scores stored as float32 (when no step is set).
    difference: (n,) bool, columns whose residual codes are stored as the difference from the
        previous row's code in restart chunks (``row_differences``); None: none. Only columns
        with residual codes can be; the flag is ignored elsewhere.
    """

    tolerance: np.ndarray
    residual_step: np.ndarray
    basis_step: np.ndarray
    float32_scores: bool = False
    difference: np.ndarray | None = None

    @classmethod
    def plain(cls, width: int, basis: int) -> "Coding":
        return cls(np.full(width, np.inf), np.full(width, np.nan), np.full(basis, np.nan))


def _kind(type_name: str) -> str:
    """How a served value is typed: 'i' integer, 'f' float32, 'e' float16, 'd' float64."""
    if type_name.startswith(("int", "uint")):
        return "i"
    return {"float": "f", "halffloat": "e"}.get(type_name, "d")


@dataclass(frozen=True, eq=False)
class FittedModel:
    """What rebuilding an archive's numeric columns needs (n columns, c basis entries, r
    anchor rows). Frozen: a new version of the model is a new object
    (``dataclasses.replace``, ``with_statistics``); compared by identity, not by its arrays.

    names, types: the numeric columns and their Arrow type names (n). exact_columns: the
    columns the row files keep as they are (key and non-numeric columns).
    transform_kind, shift, scale: the transform z = (x - shift) / scale (n,).
    mixing: weights (c, n), offset (n,), fill (c,), basis_columns (c,) or None for scores.
    basis_names: source column or score name of each basis entry (c).
    coding: tolerance (n,), residual_step (n,), basis_step (c,), float32_scores.
    ledger_scale: units of the row ledger (n,), each column's standard deviation (1 when 0).
    anchor_positions (r,), anchor_values (r, n), anchor_nulls (r, n): rows kept exactly.
    score_right: the right factor (n, c) the scores are computed with (method 'svd'); None:
    derived from the weights (``scores_right``).
    statistics: the measured fields of the columns table (``STATISTICS``; None before the
    encode pass). err_max, lower, upper and special come from them.
    row_ledger: the row files carry the row ledger (``_rf_err_max``, ``_rf_err_l2``). None
    (a new model) decides: no ledger when every approximated column has a finite tolerance
    (:attr:`bounded_by_tolerance`); each bound is then min(err_max_j + slack, tolerance_j),
    and the row figures could only tighten it below a tolerance the user already accepted.
    Recorded as the manifest's ``row_ledger`` (archives written before it carry a ledger,
    and an append keeps what the archive has).
    packed_codes: the row files hold the residual codes of all coded columns as one list
    column (``packed_codes``, chosen by trial: ``code_layout.choose_packing``) instead of one
    column per coded column; the manifest's ``packed_codes`` (absent: one column each).
    Readers unpack at the source (:meth:`unpack_codes`), so every other method sees the
    per-column view.
    """

    names: list[str]
    types: list[str]
    exact_columns: list[str]
    transform_kind: str
    shift: np.ndarray
    scale: np.ndarray
    mixing: Mixing
    basis_names: list[str]
    coding: Coding
    ledger_scale: np.ndarray
    anchor_positions: np.ndarray
    anchor_values: np.ndarray
    anchor_nulls: np.ndarray
    score_right: np.ndarray | None = None
    statistics: dict[str, np.ndarray] | None = None
    row_ledger: bool | None = None
    packed_codes: bool = False

    def __post_init__(self) -> None:
        if self.row_ledger is None:  # a new model: no row ledger when the tolerances bound every cell
            object.__setattr__(self, "row_ledger", not self.bounded_by_tolerance)

    # -- shapes and the arrays of the rebuild formula ----------------------------------------
    @property
    def width(self) -> int:
        return len(self.names)

    @property
    def weights(self) -> np.ndarray:
        return self.mixing.weights

    @property
    def offset(self) -> np.ndarray:
        return self.mixing.offset

    @property
    def fill(self) -> np.ndarray:
        return self.mixing.fill

    @property
    def tolerance(self) -> np.ndarray:
        return self.coding.tolerance

    @cached_property
    def column_index(self) -> dict[str, int]:
        return {n: j for j, n in enumerate(self.names)}

    @cached_property
    def in_basis(self) -> np.ndarray:
        """(n,) True at the columns that are basis entries (stored exactly or quantized)."""
        flags = np.zeros(self.width, bool)
        if self.mixing.basis_columns is not None:
            flags[self.mixing.basis_columns] = True
        return flags

    @cached_property
    def residual_step(self) -> np.ndarray:
        """(n,) step of each column's residual codes as stored (NaN: none; never at basis columns)."""
        return np.where(self.in_basis, np.nan, self.coding.residual_step)

    @cached_property
    def difference(self) -> np.ndarray:
        """(n,) True at the columns whose residual codes are stored as differences from the
        previous row's code (``row_differences``); only columns with residual codes."""
        flags = np.zeros(self.width, bool)
        if self.coding.difference is not None:
            flags[:] = np.asarray(self.coding.difference, dtype=bool)
        return flags & np.isfinite(self.residual_step)

    def undifference(self, rows: pa.Table, chunks: np.ndarray) -> pa.Table:
        """``rows`` (a row-file table of consecutive rows of one row file, holding whole
        chunks up to its last row) with every difference-coded column's stored differences
        replaced by the residual codes themselves (zigzag, the column's type), as columns
        without differences store them. ``chunks`` (b,): each row's chunk start
        (``row_differences.chunk_starts``)."""
        position = {name: i for i, name in enumerate(rows.column_names)}  # once: wide tables
        columns = list(rows.columns)
        for j in np.flatnonzero(self.difference):
            i = position.get(layout.CODE_PATTERN.format(int(j)))
            if i is None:
                continue
            column = columns[i]
            # a NULL (a NULL cell) stores the difference 0 (row_differences.carry_forward)
            nulls = column.is_null().to_numpy(zero_copy_only=False) if column.null_count else None
            signed = arithmetic.decode_codes(
                column.fill_null(0).to_numpy(zero_copy_only=False)).astype(np.int64)
            codes = row_differences.undifference(signed, chunks)
            columns[i] = pa.array(arithmetic.encode_codes(codes), mask=nulls).cast(column.type)
        return pa.Table.from_arrays(columns, schema=rows.schema)  # built once: linear in the width

    @cached_property
    def basis_step(self) -> np.ndarray:
        """(c,) step of each basis entry's stored integer codes (NaN: stored as values)."""
        step = np.full(len(self.basis_names), np.nan)
        given = self.coding.basis_step[:step.size]
        step[:given.size] = given
        return step

    @cached_property
    def basis_stored(self) -> list[str]:
        """(c) the row-file column holding each basis entry: its own name, or
        ``_rf_basis_<k>`` for a source column stored as integer codes."""
        return [layout.BASIS_PATTERN.format(t) if np.isfinite(step) and self.mixing.basis_columns is not None
                else name for t, (name, step) in enumerate(zip(self.basis_names, self.basis_step))]

    @cached_property
    def is_basis(self) -> np.ndarray:
        """(n,) True at basis columns stored exactly (served as stored, bound 0)."""
        exact = {n for n, step in zip(self.basis_names, self.basis_step) if not np.isfinite(step)}
        return np.array([n in exact for n in self.names], bool)

    @cached_property
    def is_integer(self) -> np.ndarray:
        return np.array([t.startswith(("int", "uint")) for t in self.types], bool)

    @cached_property
    def kind(self) -> np.ndarray:
        """(n,) how a served value is typed: 'i' integer, 'f' float32, 'e' float16, 'd' float64."""
        return np.array([_kind(t) for t in self.types], dtype="<U1")

    @cached_property
    def bounded_by_tolerance(self) -> bool:
        """Whether every column that is approximated (all but basis columns stored exactly)
        has a finite tolerance, so that no cell's bound needs a row figure."""
        return bool(np.all(np.isfinite(self.tolerance) | self.is_basis))

    def row_file_reserved(self) -> dict[str, pa.DataType | None]:
        """The reserved columns of this model's row files and their types
        (``table_schemas.row_file_reserved``): the row id and ledger, the stored basis (codes
        int32; scores float64, or float32 with ``coding.float32_scores``; None for source
        columns, which keep the source's type) and the residual codes of every coded column."""
        basis: dict[str, pa.DataType | None] = {}
        for t, name in enumerate(self.basis_stored):
            if np.isfinite(self.basis_step[t]):
                basis[name] = pa.int32()
            elif self.mixing.basis_columns is None:
                basis[name] = pa.float32() if self.coding.float32_scores else pa.float64()
            else:
                basis[name] = None
        return row_file_reserved(basis, self.code_names, row_ledger=self.row_ledger,
                                 packed_codes=self.packed_codes)

    @cached_property
    def code_names(self) -> list[str]:
        """The residual-code columns (``layout.CODE_PATTERN``) in position order: the order of
        the codes in a packed row (``packed_codes``)."""
        return [layout.CODE_PATTERN.format(int(j)) for j in np.flatnonzero(np.isfinite(self.residual_step))]

    def unpack_codes(self, rows: pa.Table, wanted: Any = None, where: Any = "a row file") -> pa.Table:
        """``rows`` as read from a row file, in the per-column view: a packed code list
        replaced by the code columns ``wanted`` (None: all; ``packed_codes.unpack``)."""
        if not self.packed_codes:
            return rows
        return packed_codes.unpack(rows, self.code_names, wanted, where)

    def row_file_columns(self, columns: Any) -> list[str] | None:
        """The row-file columns to read for the per-column view ``columns`` (None: all)."""
        return packed_codes.file_columns(columns, self.packed_codes)

    def scores_right(self) -> np.ndarray | None:
        """(n, c) the right factor that turns transformed rows into scores (None: basis columns)."""
        if self.mixing.basis_columns is not None:
            return None
        if self.score_right is not None:
            return self.score_right
        return (self.mixing.weights / self.scale[None, :]).T

    # -- what the encode pass measured -------------------------------------------------------
    def _stat(self, name: str, default: float) -> np.ndarray:
        """A measured field as float64 (n,); ``default`` before the encode pass measured it."""
        if self.statistics is None:
            return np.full(self.width, default)
        return np.asarray(self.statistics[name], dtype=np.float64)

    @cached_property
    def may_hold_nulls(self) -> np.ndarray:
        """(n,) bool: the column has NULL cells (the measured ``nulls``; True before the encode
        pass measured it). Where it is False, no residual code of the column is NULL."""
        return self._stat("nulls", 1.0) > 0

    @cached_property
    def err_max(self) -> np.ndarray:
        """(n,) the column ledger: max |x - xhat| over approximated cells, rounded up."""
        return self._stat("err_max", np.inf)

    @cached_property
    def lower(self) -> np.ndarray:
        """(n,) observed minimum of each column's finite values: served values are clamped into
        [lower, upper] (``arithmetic.serve``)."""
        return self._stat("min", -np.inf)

    @cached_property
    def upper(self) -> np.ndarray:
        return self._stat("max", np.inf)

    @cached_property
    def special(self) -> np.ndarray:
        """(n,) columns that may hold NaN or infinite cells (before the encode pass: all may)."""
        return (self._stat("nans", np.inf) > 0) | (self._stat("infinities", np.inf) > 0)

    def with_statistics(self, statistics: dict[str, np.ndarray]) -> "FittedModel":
        """This model with the measured fields of the columns table (``STATISTICS``)."""
        return dataclasses.replace(self, statistics=dict(statistics))

    # -- the rebuild of a block of rows -------------------------------------------------------
    def basis_values(self, rows: pa.Table) -> np.ndarray:
        """Filled basis values (b, c) as float64 from a row-file table: stored codes times
        their step, missing or non-finite values replaced by the fill."""
        if not self.basis_names:
            return np.zeros((rows.num_rows, 0))
        block = np.column_stack([
            rows.column(n).cast(pa.float64()).fill_null(np.nan).to_numpy() for n in self.basis_stored
        ])
        coded = np.isfinite(self.basis_step)
        if coded.any():
            block[:, coded] = block[:, coded] * self.basis_step[coded][None, :]
        return arithmetic.fill_missing(block, self.fill)

    def residual_codes(self, rows: pa.Table, col_idx: np.ndarray) -> np.ndarray | None:
        """Quantized residual codes (b, q) of the columns ``col_idx`` (q,) from a row-file
        table: 0 in columns without codes; None when none of them has codes."""
        steps = self.residual_step[col_idx]
        if not np.isfinite(steps).any():
            return None
        codes = np.zeros((rows.num_rows, col_idx.size))
        for t, j in enumerate(col_idx):
            if np.isfinite(steps[t]):
                codes[:, t] = arithmetic.decode_codes(  # a NULL code (a NULL cell): 0
                    rows.column(layout.CODE_PATTERN.format(int(j))).fill_null(0).to_numpy(zero_copy_only=False))
        return codes

    def null_codes(self, rows: pa.Table, col_idx: np.ndarray) -> np.ndarray | None:
        """(b, q) bool: the cells of the columns ``col_idx`` (q,) whose residual code is NULL
        in the row-file table ``rows``, i.e. NULL cells of the source (the encode pass stores
        them so instead of as exact cells; archives written before hold none); None when
        there are none."""
        found = None
        present = set(rows.column_names)  # once: the property builds a new list on every use
        for t, j in enumerate(col_idx):
            name = layout.CODE_PATTERN.format(int(j))
            if not np.isfinite(self.residual_step[j]) or name not in present:
                continue
            column = rows.column(name)
            if column.null_count:
                if found is None:
                    found = np.zeros((rows.num_rows, col_idx.size), bool)
                found[:, t] = column.is_null().to_numpy(zero_copy_only=False)
        return found

    def rebuild_block(self, rows: pa.Table, col_idx: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """The stored values (b, q) of the columns ``col_idx`` (q,) for a row-file table of b
        rows, their bounds (b, q) and the floating-point part of the bounds, the slack (b, q):
        value = offset + basis @ weights + code * step (``arithmetic``), bound =
        min(round_up(rowmax * ledger_scale), err_max) + slack, capped at the tolerance (the
        encode pass stored every cell whose error plus slack exceeded it); without a row
        ledger (``row_ledger``), err_max + slack capped at the tolerance. Basis columns,
        anchor rows, exact cells and serving are the reader's (``ArchiveReader.rebuild``)."""
        filled = self.basis_values(rows)
        weights = self.weights[:, col_idx]
        offset = self.offset[col_idx]
        values = arithmetic.approximate(filled, weights, offset)
        codes = self.residual_codes(rows, col_idx)
        residual_term = None
        if codes is not None:
            steps = self.residual_step[col_idx]
            residual_term = codes * np.where(np.isfinite(steps), steps, 0.0)[None, :]
            values = arithmetic.add_residual(values, codes, steps)
        slack = arithmetic.slack(filled, weights, offset, residual_term)
        bounds = np.broadcast_to(self.err_max[col_idx][None, :], slack.shape)
        if self.row_ledger:
            row_max = rows.column(layout.ROW_ERR_MAX).to_numpy()
            by_row = arithmetic.round_up(row_max[:, None] * self.ledger_scale[col_idx][None, :])
            bounds = np.minimum(by_row, bounds)
        bounds = bounds + slack
        bounds = np.minimum(bounds, self.tolerance[col_idx][None, :])
        return values, bounds, slack

    # -- the encoder -------------------------------------------------------------------------
    def basis_entries(self) -> list[dict[str, Any]]:
        """Manifest entries of the basis: source column or score name, fill, and where the
        stored values are integer codes, the column holding them and their step."""
        entries = []
        for t, (name, fill) in enumerate(zip(self.basis_names, self.fill)):
            entry: dict[str, Any] = {"name": name, "fill": float(fill)}
            if np.isfinite(self.basis_step[t]):
                entry["step"] = float(self.basis_step[t])
                entry["stored_as"] = self.basis_stored[t]
            entries.append(entry)
        return entries

    def to_tables(self) -> dict[str, pa.Table]:
        """The columns table and the anchors table (``layout.COLUMNS``, ``layout.ANCHORS``),
        checked against their declared schemas (``table_schemas``), as they are written: the
        columns table packed (``table_schemas.pack_columns_table``)."""
        stats, coding = self.statistics or {}, self.coding
        residual_step = self.residual_step
        data = {
            "name": self.names,
            "position": np.arange(self.width, dtype=np.int32),
            "type": self.types,
            "role": np.where(self.in_basis, "basis", "derived").tolist(),
            "shift": self.shift, "scale": self.scale, "ledger_scale": self.ledger_scale,
            "offset": self.offset,
            "weights": list(np.ascontiguousarray(self.weights.T)),
            **{n: stats[n] for n in STATISTICS if n in stats},  # a field missing is refused below
            "tolerance": pa.array(coding.tolerance, pa.float64(), mask=~np.isfinite(coding.tolerance)),
            "residual_step": pa.array(residual_step, pa.float64(), mask=~np.isfinite(residual_step)),
        }
        optional = []
        if self.difference.any():  # optional field: only archives that use it carry it
            data["difference"] = self.difference
            optional.append("difference")
        declared = columns_schema(optional)
        schema = pa.schema([f for f in declared if f.name in data])
        columns = pa.table({f.name: pa.array(data[f.name], f.type) if not isinstance(data[f.name], pa.Array)
                            else data[f.name] for f in schema}, schema=schema)
        check_schema(columns.schema, declared, layout.COLUMNS, writing=True)
        columns = pack_columns_table(columns)
        with_rows = bool(self.anchor_positions.size)
        anchor_cols = {layout.ROW_ID: pa.array(self.anchor_positions, pa.int64())}
        for j, name in enumerate(self.names if with_rows else []):
            anchor_cols[name] = pa.array(self.anchor_values[:, j], pa.float64(), mask=self.anchor_nulls[:, j])
        anchors = pa.table(anchor_cols, schema=anchors_schema(self.names, with_rows))
        return {layout.COLUMNS: columns, layout.ANCHORS: anchors}

    # -- the decoder -------------------------------------------------------------------------
    @classmethod
    def from_tables(cls, manifest: dict[str, Any], columns: pa.Table, anchors: pa.Table,
                    row_schema: pa.Schema | None = None, directory: Path | None = None) -> "FittedModel":
        """The model of an archive version from its manifest, columns table and anchors table
        (as read; the schemas are checked here, the cross-checks against the manifest in
        ``integrity.check_tables``). ``row_schema``: a row file's schema, which tells whether
        scores are stored as float32 (None: as float64). ``directory``: the archive's, named
        in the messages of a refused table."""
        names = list(manifest["numeric_columns"])
        width = len(names)
        where = Path(directory or "")
        # either stored form: packed, or one field per number (archives written before)
        columns = unpack_columns_table(columns, where / layout.table_file(manifest, layout.COLUMNS))
        check_schema(columns.schema, columns_schema([n for n in COLUMNS_OPTIONAL.names if n in columns.schema.names]),
                     where / layout.table_file(manifest, layout.COLUMNS))
        check_schema(anchors.schema, anchors_schema(names, anchors.num_rows > 0),
                     where / layout.table_file(manifest, layout.ANCHORS), ordered=False)
        basis = manifest["basis"]
        basis_names = [b["name"] for b in basis]
        weights = np.array(columns.column("weights").to_pylist(), dtype=np.float64).T.reshape(
            len(basis), width)
        fill = np.array([b["fill"] for b in basis], dtype=np.float64)
        scores = not basis_names or basis_names[0].startswith(layout.RESERVED_PREFIX)
        position = {n: j for j, n in enumerate(names)}
        basis_columns = None if scores else np.array([position[n] for n in basis_names], dtype=np.int64)
        mixing = Mixing(weights, columns.column("offset").to_numpy(), fill, basis_columns)
        float32 = False
        stored_first = basis[0].get("stored_as", basis[0]["name"]) if basis else None
        if row_schema is not None and stored_first in row_schema.names:
            float32 = row_schema.field(stored_first).type == pa.float32()
        coding = Coding(columns.column("tolerance").fill_null(np.inf).to_numpy(),
                        columns.column("residual_step").fill_null(np.nan).to_numpy(),
                        np.array([b.get("step", np.nan) for b in basis], dtype=np.float64),
                        float32_scores=float32,
                        difference=(columns.column("difference").fill_null(False).to_numpy(zero_copy_only=False)
                                    if "difference" in columns.column_names else None))
        statistics = {n: columns.column(n).to_numpy(zero_copy_only=False) for n in STATISTICS}
        types = {f["name"]: f["type"] for f in manifest["schema"]}
        positions = anchors.column(layout.ROW_ID).to_numpy()
        if positions.size:
            values = np.column_stack([anchors.column(n).to_numpy(zero_copy_only=False) for n in names])
            nulls = np.column_stack([anchors.column(n).is_null().to_numpy(zero_copy_only=False) for n in names])
        else:
            values, nulls = np.zeros((0, width)), np.zeros((0, width), bool)
        model = cls(names, [types[n] for n in names], list(manifest.get("exact_columns", [])),
                    manifest["transform"], columns.column("shift").to_numpy(),
                    columns.column("scale").to_numpy(), mixing, basis_names, coding,
                    columns.column("ledger_scale").to_numpy(), positions, values, nulls,
                    statistics=statistics, row_ledger=bool(manifest.get("row_ledger", True)),
                    packed_codes=bool(manifest.get("packed_codes", False)))
        if coding.difference is not None and not np.array_equal(model.difference, coding.difference):
            raise CorruptArchiveError(
                f"The columns table of {where} marks columns "
                f"{[names[j] for j in np.flatnonzero(coding.difference & ~model.difference)]} as stored as "
                "row differences, but they have no residual codes; the archive is damaged or was edited: "
                "restore it from a copy or compress the source again.")
        if [b.get("stored_as", b["name"]) for b in basis] != model.basis_stored:
            raise CorruptArchiveError(
                f"The manifest of {where} stores the basis entries in the row-file columns "
                f"{[b.get('stored_as', b['name']) for b in basis]}, where this format keeps them in "
                f"{model.basis_stored}; the archive is damaged or was edited: restore it from a "
                "copy or compress the source again.")
        return model
