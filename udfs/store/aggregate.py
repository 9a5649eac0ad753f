"""Aggregates, covariance and correlation straight from the factors, with hard bounds.

Every numeric column j is rebuilt as xhat_ij = offset_j + sum_t W[t, j] f_it + step_j q_ij
(f: filled basis values, q: residual codes), then overridden exactly (exactly stored basis
columns, anchor rows, cells.parquet). A sum over a row set S is therefore linear in per-set
sums: |S| offset_j + W_j . (sum_S f) + step_j sum_S q_j, plus the exact correction of the
overridden cells (true value minus xhat; minus xhat alone where the true value is NULL).
Nothing is rebuilt row by row: one grouped SQL aggregate over the c basis columns (and the
residual codes of the requested columns) and a c x n product answer every group and column.

Per row-group sums are written at compress time (``blocks.parquet``, see :class:`BlockSums`),
so an aggregate over all rows, or over a row range, reads no row file except the (at most two)
row groups cut by the range's ends.

Hard bound of a sum (design.md section 5), over the N_a approximated cells of column j in S:
|sum e| <= min(ledger_scale_j * sum_S rowmax_i, N_a colmax_j, sqrt(N_a) err_l2_j), plus a
floating-point term 4 gamma_{|S| + 2c + 16} M_j that covers the encode pass's own rounding of
each xhat (Higham eq. 3.4-3.5, as in ``arithmetic.slack``) and every summation here, where M_j
is the same sum taken over absolute values. A mean divides by the count of non-NULL cells.
The estimate sqrt(N_a) * rms_j (rms_j = err_l2_j / sqrt(err_cells_j)) is labelled as such: it is
what the error of a sum of N_a independent errors of that size would typically be, not a bound.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import duckdb
import numpy as np
import pyarrow as pa

from ..errors import InvalidInputError, UnknownColumnError
from . import arithmetic, layout, packed_codes, row_differences
from .integrity import damaged, read_parquet_sql, read_small_table, sealed_rows_sql
from .sql_rebuild import basis_value_sql, double_list
from .sql_text import checked_condition, quote_identifier, sql_literal

__all__ = ["BLOCKS", "BlockSums", "aggregate", "covariance", "correlation", "FUNCS",
           "rows_source_sql", "check_where", "check_result_names", "pack_blocks", "unpack_blocks"]

BLOCKS = "blocks.parquet"
FUNCS = ("sum", "avg", "count")
U = arithmetic.UNIT_ROUNDOFF


def _gamma(n):
    """gamma_n = n u / (1 - n u) (Higham), elementwise; inf once n u reaches 1/2."""
    nu = np.asarray(n, dtype=np.float64) * U
    with np.errstate(divide="ignore"):
        out = np.where(nu < 0.5, nu / np.maximum(1.0 - nu, 0.5), np.inf)
    return float(out) if out.ndim == 0 else out


def _up(x):
    return arithmetic.round_up(x)


# -- written at compress time -----------------------------------------------------------------
def _override_terms(x: np.ndarray, x_hat: np.ndarray, null: np.ndarray | None):
    """Per overridden cell (arrays of one shape): the correction x - xhat (-xhat where NULL),
    the magnitude |x| + |xhat| (|xhat| where NULL; 0 where not finite) and (x - xhat)^2
    (0 where NULL)."""
    with np.errstate(invalid="ignore", over="ignore"):
        delta = x - x_hat
        if null is None:
            corr, mag, square = delta, np.abs(x) + np.abs(x_hat), delta * delta
        else:
            corr = np.where(null, -x_hat, delta)
            mag = np.where(null, 0.0, np.abs(x)) + np.abs(x_hat)
            square = np.where(null, 0.0, delta * delta)
    return corr, np.where(np.isfinite(mag), mag, 0.0), square


class BlockSums:
    """Per row-group sums gathered by the encode pass (one record per Parquet row group of the
    row files: each verify batch is cut at ``layout.ROW_GROUP_ROWS`` like the writer cuts it).

    Per block: first_row, rows, rowmax_sum (sum of the row figures, rounded up; kept when
    the row files carry no row ledger, ``FittedModel.row_ledger``), and as lists:
    f_sum, f_abs (c: sums of filled basis values and of their absolute values), d_sum (c: sums
    of f - shift), gram, gram_abs (c*c, row-major: sums of (f - shift)(f - shift)^T and of its
    absolute values), q_sum, q_abs, q_sq (n: residual codes), ov_cells, ov_nulls (n: cells
    stored exactly and those of them that are NULL), ov_corr (n: sum over those cells of the
    true value minus xhat, NULL cells counting -xhat), ov_abs (n: sum of |x| + |xhat| there),
    ov_sq (n: sum of (x - xhat)^2 over the non-NULL ones).

    ``add`` makes the records of one block of rows; the encode pass instead takes the sums of
    its sub-blocks with ``partial`` and appends one record per row group with ``add_partials``.
    """

    def __init__(self, width: int, basis: int, shift: np.ndarray):
        self.width, self.basis = width, basis
        self.shift = np.asarray(shift, dtype=np.float64)
        self.records: list[dict[str, Any]] = []

    def add(self, first: int, filled: np.ndarray, codes: np.ndarray | None, xhat: np.ndarray,
            block: np.ndarray, mask: np.ndarray | None, approximated: np.ndarray,
            row_max: np.ndarray) -> None:
        """Records for rows first .. first + b - 1, one per ``layout.ROW_GROUP_ROWS`` rows.

        filled (b, c), codes (b, n) or None, xhat (b, n) (rebuilt values, residual included),
        block (b, n) (source values, NaN where NULL), mask (b, n) NULL mask or None,
        approximated (b, n) bool (False where a cell is stored exactly), row_max (b,)."""
        step = layout.ROW_GROUP_ROWS
        for lo in range(0, block.shape[0], step):
            hi = min(lo + step, block.shape[0])
            rows_i, cols_j = np.nonzero(~approximated[lo:hi])
            part = self.partial(filled[lo:hi], None if codes is None else codes[lo:hi],
                                xhat[lo:hi], block[lo:hi], None if mask is None else mask[lo:hi],
                                cells=(rows_i, cols_j))
            self.add_partials(first + lo, [part], row_max[lo:hi])

    def partial(self, filled: np.ndarray, codes: np.ndarray | None, xhat: np.ndarray,
                block: np.ndarray, mask: np.ndarray | None, *,
                code_columns: np.ndarray | None = None, exact_columns: np.ndarray | None = None,
                cells: tuple[np.ndarray, np.ndarray] | None = None,
                scratch: np.ndarray | None = None) -> dict[str, Any]:
        """The additive sums of one row range of s rows (every field of a record except
        first_row and rowmax_sum; its "rows" is s). Partials of consecutive ranges add up to the
        sums of their union, up to the order of floating-point summation.

        filled (s, c); xhat, block (s, n); mask (s, n) or None; codes (s, n), or (s, q) with
        ``code_columns`` (q,) naming their columns (the others have no code), or None.
        Overridden cells (stored exactly): the whole columns ``exact_columns`` (summed per
        column, O(s e) for e such columns), plus ``cells`` = (rows, cols) (equal-length index
        arrays, outside ``exact_columns``; summed over their indices only, O(cells)).
        ``scratch``: an optional array of the shape of ``codes`` that receives |codes| (the
        encode pass lends one of its work arrays instead of a fresh temporary).
        """
        s, n = block.shape
        d = filled - self.shift[None, :]
        abs_d = np.abs(d)
        q_sum, q_abs, q_sq = np.zeros(n), np.zeros(n), np.zeros(n)
        if codes is not None:
            where = slice(None) if code_columns is None else code_columns
            q_sum[where], q_abs[where], q_sq[where] = (codes.sum(axis=0), np.abs(codes, out=scratch).sum(axis=0),
                                                       np.einsum("ij,ij->j", codes, codes))
        ov_cells, ov_nulls = np.zeros(n, np.int64), np.zeros(n, np.int64)
        ov_corr, ov_abs, ov_sq = np.zeros(n), np.zeros(n), np.zeros(n)
        rows, cols = cells if cells is not None else (None, None)
        if rows is not None and rows.size:
            x, x_hat = block[rows, cols], xhat[rows, cols]
            null = mask[rows, cols] if mask is not None else None
            corr, mag, square = _override_terms(x, x_hat, null)
            per_column = (lambda weights: np.bincount(cols, weights=weights, minlength=n))
            ov_cells += np.bincount(cols, minlength=n)
            if null is not None:
                ov_nulls += np.bincount(cols, weights=null.astype(np.float64), minlength=n).astype(np.int64)
            ov_corr += per_column(corr)
            ov_abs += per_column(mag)
            ov_sq += per_column(square)
        if exact_columns is not None and exact_columns.size:
            null = mask[:, exact_columns] if mask is not None else None
            corr, mag, square = _override_terms(block[:, exact_columns], xhat[:, exact_columns], null)
            ov_cells[exact_columns] += s
            if null is not None:
                ov_nulls[exact_columns] += np.count_nonzero(null, axis=0)
            with np.errstate(invalid="ignore", over="ignore"):  # inf - inf: NaN, as bincount gives
                ov_corr[exact_columns] += corr.sum(axis=0)
                ov_abs[exact_columns] += mag.sum(axis=0)
                ov_sq[exact_columns] += square.sum(axis=0)
        return {
            "rows": s,
            "f_sum": filled.sum(axis=0), "f_abs": np.abs(filled).sum(axis=0), "d_sum": d.sum(axis=0),
            "gram": (d.T @ d).ravel(), "gram_abs": (abs_d.T @ abs_d).ravel(),
            "q_sum": q_sum, "q_abs": q_abs, "q_sq": q_sq,
            "ov_cells": ov_cells, "ov_nulls": ov_nulls, "ov_corr": ov_corr, "ov_abs": ov_abs,
            "ov_sq": ov_sq,
        }

    def add_partials(self, first: int, partials: list[dict[str, Any]], row_max: np.ndarray) -> None:
        """Append one record (one row group) for rows first .. first + len(row_max) - 1 from
        the ``partial`` sums of consecutive row ranges that cover exactly those rows, in row
        order; row_max (rows,) holds the row figures before they are stored."""
        if sum(p["rows"] for p in partials) != row_max.shape[0]:
            raise InvalidInputError(
                f"Block sums for rows {first}.. cover {sum(p['rows'] for p in partials)} rows, "
                f"but {row_max.shape[0]} row figures were given: pass the partials of exactly "
                "the rows of the record.")
        record: dict[str, Any] = {"first_row": first, "rows": row_max.shape[0],
                                  "rowmax_sum": float(arithmetic.round_up(row_max).sum())}
        for name in partials[0]:
            if name != "rows":
                record[name] = partials[0][name] if len(partials) == 1 else sum(p[name] for p in partials)
        self.records.append(record)

    def table(self) -> pa.Table:
        lists = ["f_sum", "f_abs", "d_sum", "gram", "gram_abs", "q_sum", "q_abs", "q_sq",
                 "ov_corr", "ov_abs", "ov_sq"]
        columns: dict[str, Any] = {
            "first_row": pa.array([r["first_row"] for r in self.records], pa.int64()),
            "rows": pa.array([r["rows"] for r in self.records], pa.int64()),
            "rowmax_sum": pa.array([r["rowmax_sum"] for r in self.records], pa.float64()),
        }
        for name in lists:
            columns[name] = pa.array([np.asarray(r[name], np.float64) for r in self.records],
                                     pa.list_(pa.float64()))
        for name in ("ov_cells", "ov_nulls"):
            columns[name] = pa.array([np.asarray(r[name], np.int64) for r in self.records],
                                     pa.list_(pa.int64()))
        return pa.table(columns)

    def write(self, writer) -> str:
        """Write ``blocks.parquet`` with ``writer`` (an ArchiveWriter), packed
        (:func:`pack_blocks`); returns the file name."""
        writer.write_table(BLOCKS, pack_blocks(self.table(), self.basis, self.width))
        return BLOCKS


# The per-block sums, in the order a packed blocks table holds them: (name, length in terms of
# c basis entries and n numeric columns, integer counts?).
_PACKED_FIELDS = (("f_sum", "c", False), ("f_abs", "c", False), ("d_sum", "c", False),
                  ("gram", "cc", False), ("gram_abs", "cc", False), ("q_sum", "n", False),
                  ("q_abs", "n", False), ("q_sq", "n", False), ("ov_corr", "n", False),
                  ("ov_abs", "n", False), ("ov_sq", "n", False), ("ov_cells", "n", True),
                  ("ov_nulls", "n", True))
PACKED = "sums"


def _lengths(basis: int, width: int) -> list[int]:
    return [{"c": basis, "cc": basis * basis, "n": width}[size] for _, size, _ in _PACKED_FIELDS]


def pack_blocks(table: pa.Table, basis: int, width: int) -> pa.Table:
    """The blocks table as written: first_row, rows, rowmax_sum, and per block one list
    ``sums`` holding the 13 list fields of :meth:`BlockSums.table` one after the other
    (lengths c, c, c, c*c, c*c, then n eight times; the counts ov_cells and ov_nulls as
    float64, exact below 2^53). One list column instead of 13 cuts the Parquet footer and
    page headers: measured 2,850 -> 894 bytes for one block of 50 columns."""
    flat = [np.asarray(table.column(name).combine_chunks().values.to_numpy(zero_copy_only=False),
                       np.float64).reshape(table.num_rows, -1) for name, _, _ in _PACKED_FIELDS]
    sums = np.hstack(flat) if table.num_rows else np.zeros((0, sum(_lengths(basis, width))))
    offsets = pa.array(np.arange(table.num_rows + 1, dtype=np.int32) * sums.shape[1], pa.int32())
    return pa.table({"first_row": table.column("first_row"), "rows": table.column("rows"),
                     "rowmax_sum": table.column("rowmax_sum"),
                     PACKED: pa.ListArray.from_arrays(offsets, pa.array(sums.ravel(), pa.float64()))})


def unpack_blocks(table: pa.Table, basis: int, width: int, where: Any) -> pa.Table:
    """The blocks table with one list column per field (:meth:`BlockSums.table`), from a
    packed one (:func:`pack_blocks`), or as it is when written before packing (one column per
    field). A packed list of another length than c basis entries and n columns imply is refused."""
    if PACKED not in table.column_names:
        return table
    lengths = _lengths(basis, width)
    packed = table.column(PACKED).combine_chunks()
    sizes = pa.compute.list_value_length(packed).to_numpy(zero_copy_only=False)
    if packed.null_count or np.any(sizes != sum(lengths)):
        raise damaged(where, f"holds packed sums of other lengths than the {sum(lengths)} that "
                             f"{basis} basis entries and {width} columns imply")
    values = np.asarray(packed.values.to_numpy(zero_copy_only=False), np.float64).reshape(len(packed), -1)
    columns: dict[str, Any] = {n: table.column(n) for n in ("first_row", "rows", "rowmax_sum")}
    start = 0
    for (name, _, counts), length in zip(_PACKED_FIELDS, lengths):
        part = values[:, start:start + length]
        start += length
        kind = pa.int64() if counts else pa.float64()
        columns[name] = pa.array([row.astype(np.int64) if counts else row for row in part], pa.list_(kind))
    return pa.table(columns)


@dataclass
class _Blocks:
    first: np.ndarray
    rows: np.ndarray
    table: pa.Table

    def stack(self, name: str, sel: np.ndarray) -> np.ndarray:
        column = self.table.column(name).combine_chunks().take(pa.array(np.flatnonzero(sel)))
        if len(column) == 0:
            return np.zeros((0, 0))
        return np.asarray(column.values.to_numpy(zero_copy_only=False), np.float64).reshape(len(column), -1)


def _blocks(reader) -> _Blocks | None:
    cached = getattr(reader, "_rf_blocks", None)
    if cached is not None:
        return cached or None
    names = {f["name"] for f in reader.manifest.get("files", [])}
    if layout.table_file(reader.manifest, BLOCKS) not in names:
        reader._rf_blocks = False  # archives written before blocks.parquet: scan instead
        return None
    name = layout.table_file(reader.manifest, BLOCKS)
    with reader.version_files():
        table = read_small_table(reader.path, reader.manifest, name)
    table = unpack_blocks(table, reader.model.weights.shape[0], len(reader.numeric_columns), reader.path / name)
    blocks = _Blocks(table.column("first_row").to_numpy(), table.column("rows").to_numpy(), table)
    reader._rf_blocks = blocks
    return blocks


# -- SQL pieces shared with the scan ----------------------------------------------------------
def rows_source_sql(reader, sealed: str | None = None, file_row_number: bool = False,
                    codes: np.ndarray | None = None) -> str:
    """``read_parquet`` of exactly this archive version's row files (names from the manifest,
    never a glob), after checking their SHA-256: DuckDB does not verify page checksums.

    ``sealed``: the name of the SQL function that checks row groups as DuckDB reads them
    (``integrity.sealed_rows_sql``; registered by ``sql.register``). With it, and row files
    that carry row-group digests, only the key columns are checked before the query
    (``ArchiveReader.check_for_scan``); otherwise the whole files. ``file_row_number``: each
    row also carries its position in its file (``integrity.read_parquet_sql``).

    Residual codes come as one column each (``_rf_q_<j>``) whatever the layout: codes packed
    into one list column (``FittedModel.packed_codes``) are unpacked here, the one place SQL
    names row files (``packed_codes.unpacked_sql``); ``codes``: the numeric columns (positions)
    whose codes the query reads (None: every one)."""
    paths = [reader.path / p[2] for p in reader.parts]
    if sealed is not None and reader.check_for_scan():
        source = sealed_rows_sql(paths, sealed, reader.seal.token, file_row_number)
    else:
        reader.check_row_files()
        source = read_parquet_sql(paths, file_row_number)
    if reader.model.packed_codes:
        wanted = None if codes is None else [layout.CODE_PATTERN.format(int(j)) for j in codes]
        source = packed_codes.unpacked_sql(source, reader.model.code_names, wanted)
    return source


# Most restart chunks a filtered read decodes by name (row ranges as constants, which DuckDB
# prunes row groups with); a condition that touches more decodes every row.
MAX_NAMED_CHUNKS = 256


def decoded_rows_sql(reader, col_idx: np.ndarray, sealed: str | None = None, where: str | None = None,
                     con=None) -> tuple[str, np.ndarray]:
    """The row files as SQL (``rows_source_sql``) with the residual codes of the columns
    ``col_idx`` (q,) that are stored as row differences decoded (``row_differences``), and
    which of the q columns those are ((q,) bool; read their codes with
    ``row_differences.signed_code_sql``). Filter the rows only after this: a chunk decodes
    whole.

    ``where`` (a checked condition on key columns and ``_rf_row``, ``check_where``) and a
    cursor ``con``: the rows the caller will keep. Their chunks are found first (one query on
    the key columns, pushed into the Parquet scan) and, when there are at most
    ``MAX_NAMED_CHUNKS`` holding at most half the rows, only those chunks' rows are read and
    decoded (a point lookup decodes one chunk instead of the table). The rows returned are then a superset of those that
    pass ``where``, each decoded correctly; the caller still filters by ``where``."""
    col_idx = np.asarray(col_idx, dtype=np.int64)
    differenced = reader.model.difference[col_idx] if col_idx.size else np.zeros(0, bool)
    if not differenced.any():
        return rows_source_sql(reader, sealed, codes=col_idx), differenced
    names = list(dict.fromkeys(layout.CODE_PATTERN.format(int(j)) for j in col_idx[differenced]))
    source = rows_source_sql(reader, sealed, True, codes=col_idx)
    if where is not None and con is not None:
        found = con.sql(f"SELECT DISTINCT {row_differences.chunk_sql()} AS c FROM {source} "
                        f"WHERE {where} ORDER BY c LIMIT {MAX_NAMED_CHUNKS + 1}").fetchnumpy()["c"]
        if found.size <= MAX_NAMED_CHUNKS and found.size * row_differences.CHUNK_ROWS <= reader.rows_count // 2:
            # a chunk starting at c ends before c + K; rows of a later chunk (another file)
            # inside that range start their own chunk, so they decode correctly too
            k = row_differences.CHUNK_ROWS
            ranges = " OR ".join(f"({layout.ROW_ID} >= {int(c)} AND {layout.ROW_ID} < {int(c) + k})"
                                 for c in found) or "false"
            span = (f"{layout.ROW_ID} >= {int(found.min())} AND {layout.ROW_ID} < {int(found.max()) + k} AND "
                    if found.size else "")
            source = f"(SELECT * FROM {source} WHERE {span}({ranges}))"
    return row_differences.decoded_codes_sql(source, names), differenced


# -- the partial sums of one row set -----------------------------------------------------------
@dataclass
class _Partial:
    """Sums over a row set for q requested columns (arrays per group: shape (g,) or (g, .))."""

    n: np.ndarray          # (g,) rows
    rowmax: np.ndarray     # (g,) sum of row figures
    f_sum: np.ndarray      # (g, c)
    f_abs: np.ndarray      # (g, c)
    q_sum: np.ndarray      # (g, q)
    q_abs: np.ndarray      # (g, q)
    corr: np.ndarray       # (g, q) exact correction of overridden cells
    ov_abs: np.ndarray     # (g, q)
    ov_cells: np.ndarray   # (g, q)
    ov_nulls: np.ndarray   # (g, q)

    @classmethod
    def zeros(cls, g: int, c: int, q: int) -> "_Partial":
        z = lambda *s: np.zeros(s)  # noqa: E731
        return cls(z(g), z(g), z(g, c), z(g, c), z(g, q), z(g, q), z(g, q), z(g, q), z(g, q), z(g, q))

    def __iadd__(self, other: "_Partial") -> "_Partial":
        for name in self.__dataclass_fields__:
            setattr(self, name, getattr(self, name) + getattr(other, name))
        return self


def _check_func(func: Any) -> str:
    if not isinstance(func, str) or func.lower() not in FUNCS:
        raise InvalidInputError(
            f"func must be one of {list(FUNCS)}; got {func!r}. Aggregates from the factors are "
            "linear: other functions need the rebuilt rows (rankfold_scan in SQL).")
    return func.lower()


def _check_by(reader, by: Any) -> list[str]:
    if by is None:
        return []
    names = [by] if isinstance(by, str) else list(by) if isinstance(by, (list, tuple)) else None
    if names is None or not all(isinstance(n, str) for n in names):
        raise InvalidInputError(f"by must be a key column name or a list of names; got {by!r}.")
    exact = list(reader.manifest.get("exact_columns", []))
    for name in names:
        if name not in exact:
            raise UnknownColumnError(
                f"The archive {reader.path} has no key (exact) column {name!r} to group by; its "
                f"key columns are {exact}. Numeric columns are approximated and cannot be group keys.")
    return names


def check_result_names(columns: list[tuple[str, str]], request: str, remedy: str) -> None:
    """Refuse a result whose column names collide: ``columns`` lists (name, what it holds)
    in result order, e.g. ("q_bound", "the bound of 'q'"). Names are compared without case,
    as DuckDB does. The scan and the aggregates both call this, so a source column named
    like another column's bound or estimate is refused the same way in Python and SQL."""
    seen: dict[str, str] = {}
    for name, what in columns:
        folded = name.casefold()
        if folded in seen:
            raise InvalidInputError(
                f"{request} would return two columns named {name!r}: {seen[folded]} and {what}. "
                f"{remedy}")
        seen[folded] = what


def check_where(reader, con, where: Any) -> str | None:
    """``where`` checked by parsing (``sql_text.checked_condition``): one expression over the
    key (exact) columns and ``_rf_row``, returned as the SQL to run; then bound against those
    columns, so a type error is reported here. Raises ConditionRefusedError otherwise."""
    if where is None:
        return None
    allowed = set(reader.manifest.get("exact_columns", [])) | {layout.ROW_ID}
    own = con is None
    con = _connection(con)
    # bind the checked condition against the key columns alone: a numeric column fails here
    keys = ", ".join(quote_identifier(n) for n in sorted(allowed))
    try:
        condition = checked_condition(where, sorted(allowed), what="row condition (where/predicate)", con=con)
        # DESCRIBE binds only (reads footers, no data page): no SHA-256 needed for it
        files = read_parquet_sql([reader.path / p[2] for p in reader.parts])
        con.execute(f"DESCRIBE SELECT * FROM (SELECT {keys} FROM {files}) "
                    f"WHERE {condition}").fetchall()
    except duckdb.Error as exc:
        first = str(exc).splitlines()[0]
        raise InvalidInputError(
            f"where {where!r} is not a predicate on the key columns {sorted(allowed)} of the "
            f"archive {reader.path} ({first}). Numeric columns are approximated: filter on key "
            "columns, or filter rankfold_scan's rebuilt rows instead.") from None
    finally:
        if own:
            con.close()
    return condition


def _check_rows(reader, rows: Any) -> tuple[int, int] | None:
    if rows is None:
        return None
    m = reader.rows_count
    if isinstance(rows, range):
        rows = slice(rows.start, rows.stop, rows.step)
    if isinstance(rows, slice):
        start, stop, step = rows.indices(m)
        if step != 1:
            raise InvalidInputError(f"rows must be a contiguous range (step 1); got {rows!r}.")
        return start, max(start, stop)
    if isinstance(rows, tuple) and len(rows) == 2 and all(isinstance(v, (int, np.integer)) for v in rows):
        return _check_rows(reader, slice(int(rows[0]), int(rows[1])))
    raise InvalidInputError(
        f"rows must be a slice or a (start, stop) pair of row positions; got {rows!r}. For any "
        "other row set, use where= with a predicate on key columns.")


def _connection(con):
    return con if con is not None else duckdb.connect()


def _derived_overrides(reader, col_idx: np.ndarray, derived: np.ndarray) -> pa.Table | None:
    """Long table (_rf_row, _rf_q (slot), value) of overridden cells of derived requested columns."""
    rows, slots, values, nulls = [], [], [], []
    derived_slots = np.flatnonzero(derived)
    if derived_slots.size == 0:
        return None
    if reader.model.anchor_positions.size:
        a = reader.model.anchor_positions.size
        for s in derived_slots:
            j = col_idx[s]
            rows.append(reader.model.anchor_positions.astype(np.int64))
            slots.append(np.full(a, s, np.int64))
            values.append(reader.model.anchor_values[:, j])
            nulls.append(reader.model.anchor_nulls[:, j])
    if reader.cell_rows.size:
        slot_of = np.full(len(reader.numeric_columns), -1, np.int64)
        slot_of[col_idx[derived_slots]] = derived_slots
        hit = slot_of[reader.cell_cols] >= 0
        if hit.any():
            rows.append(reader.cell_rows[hit].astype(np.int64))
            slots.append(slot_of[reader.cell_cols[hit]])
            values.append(reader.cell_values[hit])
            nulls.append(reader.cell_nulls[hit])
    if not rows:
        return None
    return pa.table({
        layout.ROW_ID: pa.array(np.concatenate(rows)),
        "_rf_slot": pa.array(np.concatenate(slots)),
        "_rf_value": pa.array(np.concatenate(values), pa.float64(), mask=np.concatenate(nulls)),
    })


_REGISTERED = 0


def _scan_partials(reader, con, names, col_idx, by, where, row_range):
    """Grouped sums over the row files: (group key table, _Partial). One scan for the basis
    sums, one join for the overridden cells of derived columns."""
    global _REGISTERED
    c = len(reader.model.basis_names)
    q = len(names)
    steps = reader.model.residual_step[col_idx]
    is_basis = reader.model.is_basis[col_idx]
    coded = np.isfinite(steps) & ~is_basis
    # codes stored as row differences are decoded before any row is filtered out
    conds = []
    if where:
        conds.append(f"({where})")
    if row_range is not None:
        conds.append(f"{layout.ROW_ID} >= {row_range[0]} AND {layout.ROW_ID} < {row_range[1]}")
    source, differenced = decoded_rows_sql(reader, np.asarray(col_idx)[coded],
                                           where=" AND ".join(conds) or None, con=con)
    differenced_at = np.zeros(q, bool)
    differenced_at[np.flatnonzero(coded)] = differenced

    def code_of(s: int, prefix: str = "") -> str:
        column = prefix + quote_identifier(layout.CODE_PATTERN.format(int(col_idx[s])))
        return row_differences.signed_code_sql(column, bool(differenced_at[s]))

    cond = (" WHERE " + " AND ".join(conds)) if conds else ""
    group = ", ".join(quote_identifier(b) for b in by)
    f = [basis_value_sql(reader.model, t) for t in range(c)]
    # without a row ledger no row figures are stored: the rows term is +inf, the other terms bound
    rowmax = f"sum({layout.ROW_ERR_MAX})" if reader.model.row_ledger else "CAST('inf' AS DOUBLE)"
    items = ["count(*) AS __n", f"{rowmax} AS __rowmax"]
    items += [f"sum({e}) AS __f{t}" for t, e in enumerate(f)]
    items += [f"sum(abs({e})) AS __a{t}" for t, e in enumerate(f)]
    basis_slot = {reader.model.basis_names[t]: t for t in range(c)}
    # NULL codes are NULL cells (encode pass): the sums skip their codes; their stored value
    # (offset + basis . weights) is taken back out as an override, as for an exact NULL cell
    null_coded = coded & reader.model.may_hold_nulls[col_idx]
    f_list = f"[{', '.join(f)}]::DOUBLE[{c}]" if c else None
    f_abs_list = f"[{', '.join(f'abs({e})' for e in f)}]::DOUBLE[{c}]" if c else None
    for s in range(q):
        if coded[s]:
            code = code_of(s)
            items += [f"sum({code})::DOUBLE AS __q{s}", f"sum(abs({code}))::DOUBLE AS __qa{s}"]
        if null_coded[s]:
            j = int(col_idx[s])
            lin = sql_literal(float(reader.model.offset[j]))
            mag = sql_literal(abs(float(reader.model.offset[j])))
            if c:
                lin += f" + array_inner_product({f_list}, {double_list(reader.model.weights[:, j])})"
                mag += f" + array_inner_product({f_abs_list}, {double_list(np.abs(reader.model.weights[:, j]))})"
            null_rows = f"FILTER (WHERE {code} IS NULL)"
            items += [f"count(*) {null_rows} AS __qn{s}", f"sum({lin}) {null_rows} AS __qx{s}",
                      f"sum({mag}) {null_rows} AS __qm{s}"]
        if is_basis[s]:
            col = f"CAST({quote_identifier(names[s])} AS DOUBLE)"
            items += [f"sum({col}) AS __bs{s}", f"count({col}) AS __bc{s}", f"sum(abs({col})) AS __ba{s}"]
    select = (f"{group}, " if by else "") + ", ".join(items)
    sql = f"SELECT {select} FROM {source}{cond}" + (f" GROUP BY {group} ORDER BY {group}" if by else "")
    main = con.sql(sql).to_arrow_table()
    g = main.num_rows
    if not by and g == 1 and main.column("__n")[0].as_py() == 0:
        pass
    num = lambda name: main.column(name).to_numpy(zero_copy_only=False).astype(np.float64)  # noqa: E731
    part = _Partial.zeros(g, c, q)
    if g == 0:
        return main.select(by), part
    part.n = num("__n")
    part.rowmax = np.nan_to_num(num("__rowmax"), posinf=np.inf)
    if c:
        part.f_sum = np.nan_to_num(np.column_stack([num(f"__f{t}") for t in range(c)]))
        part.f_abs = np.nan_to_num(np.column_stack([num(f"__a{t}") for t in range(c)]))
    for s in range(q):
        if coded[s]:
            part.q_sum[:, s] = np.nan_to_num(num(f"__q{s}"))
            part.q_abs[:, s] = np.nan_to_num(num(f"__qa{s}"))
        if null_coded[s]:
            nulls = np.nan_to_num(num(f"__qn{s}"))
            part.corr[:, s] -= np.nan_to_num(num(f"__qx{s}"))
            mag = np.nan_to_num(num(f"__qm{s}"))
            part.ov_abs[:, s] += np.where(np.isfinite(mag), mag, 0.0)
            part.ov_cells[:, s] += nulls
            part.ov_nulls[:, s] += nulls
        if is_basis[s]:
            t = basis_slot[names[s]]
            values = main.column(f"__bs{s}")
            total = values.fill_null(0.0).to_numpy(zero_copy_only=False).astype(np.float64)
            part.corr[:, s] = total - part.f_sum[:, t]
            part.ov_abs[:, s] = np.nan_to_num(num(f"__ba{s}")) + part.f_abs[:, t]
            part.ov_cells[:, s] = part.n
            part.ov_nulls[:, s] = part.n - num(f"__bc{s}")
    overrides = _derived_overrides(reader, col_idx, ~is_basis)
    if overrides is not None and overrides.num_rows:
        _REGISTERED += 1
        view = f"__rankfold_overrides_{_REGISTERED}"
        con.register(view, overrides)
        try:
            code_case = " ".join(
                f"WHEN {s} THEN {code_of(s, 'r.')}"
                for s in range(q) if coded[s])
            code_expr = f"CAST(CASE o._rf_slot {code_case} ELSE 0 END AS DOUBLE)" if code_case else "0.0"
            inner = [layout.ROW_ID] + [quote_identifier(b) for b in by]
            inner += [f"{e} AS __f{t}" for t, e in enumerate(f)]
            inner += [quote_identifier(layout.CODE_PATTERN.format(int(col_idx[s]))) for s in range(q) if coded[s]]
            keys = ", ".join(f"r.{quote_identifier(b)}" for b in by)
            items = ["o._rf_slot AS __slot", "count(*) AS __n", "count(o._rf_value) AS __nn",
                     "sum(o._rf_value) AS __v", "sum(abs(o._rf_value)) AS __va",
                     f"sum({code_expr}) AS __q", f"sum(abs({code_expr})) AS __qa"]
            items += [f"sum(r.__f{t}) AS __f{t}" for t in range(c)]
            items += [f"sum(abs(r.__f{t})) AS __a{t}" for t in range(c)]
            sql = (f"SELECT {(keys + ', ') if by else ''}{', '.join(items)} FROM {view} o JOIN "
                   f"(SELECT {', '.join(inner)} FROM {source}{cond}) r ON o.{layout.ROW_ID} = r.{layout.ROW_ID} "
                   f"GROUP BY ALL")
            ov = con.sql(sql).to_arrow_table()
        finally:
            con.unregister(view)
        if ov.num_rows:
            gi = _group_index(main, ov, by)
            si = ov.column("__slot").to_numpy().astype(np.int64)
            onum = lambda name: ov.column(name).to_numpy(zero_copy_only=False).astype(np.float64)  # noqa: E731
            n_ov = onum("__n")
            fs = np.column_stack([onum(f"__f{t}") for t in range(c)]) if c else np.zeros((ov.num_rows, 0))
            fa = np.column_stack([onum(f"__a{t}") for t in range(c)]) if c else np.zeros((ov.num_rows, 0))
            w = reader.model.weights[:, col_idx[si]]  # (c, k)
            st = np.where(np.isfinite(steps[si]), steps[si], 0.0)
            xhat_sum = n_ov * reader.model.offset[col_idx[si]] + np.einsum("kc,ck->k", fs, w) + st * onum("__q")
            value_sum = ov.column("__v").fill_null(0.0).to_numpy(zero_copy_only=False).astype(np.float64)
            mag = (n_ov * np.abs(reader.model.offset[col_idx[si]]) + np.einsum("kc,ck->k", fa, np.abs(w))
                   + st * onum("__qa") + np.nan_to_num(onum("__va"), nan=0.0))
            np.add.at(part.corr, (gi, si), value_sum - xhat_sum)
            np.add.at(part.ov_abs, (gi, si), np.where(np.isfinite(mag), mag, 0.0))
            np.add.at(part.ov_cells, (gi, si), n_ov)
            np.add.at(part.ov_nulls, (gi, si), n_ov - onum("__nn"))
    return main.select(by), part


def _group_index(main: pa.Table, ov: pa.Table, by: list[str]) -> np.ndarray:
    if not by:
        return np.zeros(ov.num_rows, np.int64)
    lookup = {k: i for i, k in enumerate(zip(*[main.column(b).to_pylist() for b in by]))}
    return np.array([lookup[k] for k in zip(*[ov.column(b).to_pylist() for b in by])], np.int64)


def _block_partials(reader, blocks: _Blocks, col_idx, sel) -> _Partial:
    c = len(reader.model.basis_names)
    q = col_idx.size
    part = _Partial.zeros(1, c, q)
    if not sel.any():
        return part
    part.n[0] = blocks.rows[sel].sum()
    part.rowmax[0] = np.asarray(blocks.table.column("rowmax_sum").to_numpy())[sel].sum()
    if c:
        part.f_sum[0] = blocks.stack("f_sum", sel).sum(axis=0)
        part.f_abs[0] = blocks.stack("f_abs", sel).sum(axis=0)
    for name, target in (("q_sum", "q_sum"), ("q_abs", "q_abs"), ("ov_corr", "corr"),
                         ("ov_abs", "ov_abs"), ("ov_cells", "ov_cells"), ("ov_nulls", "ov_nulls")):
        getattr(part, target)[0] = blocks.stack(name, sel)[:, col_idx].sum(axis=0)
    return part


def _partials(reader, con, names, col_idx, by, where, row_range):
    """(group keys, _Partial): from blocks.parquet when there is no grouping and no predicate
    (row-range ends scanned), else from a scan of the row files."""
    blocks = _blocks(reader) if not by and where is None else None
    if blocks is None:
        return _scan_partials(reader, con, names, col_idx, by, where, row_range)
    lo, hi = row_range if row_range is not None else (0, reader.rows_count)
    ends = blocks.first + blocks.rows
    inside = (blocks.first >= lo) & (ends <= hi)
    part = _block_partials(reader, blocks, col_idx, inside)
    for cut in np.flatnonzero(~inside & (blocks.first < hi) & (ends > lo)):
        edge = (max(lo, int(blocks.first[cut])), min(hi, int(ends[cut])))
        _, extra = _scan_partials(reader, con, names, col_idx, [], None, edge)
        part += extra
    return pa.table({}), part


def aggregate(reader, columns: Any, func: str = "avg", by: Any = None, where: str | None = None,
              *, rows: Any = None, estimates: bool = False, con=None) -> pa.Table:
    """sum / avg / count of numeric ``columns`` per group of ``by`` (key columns) over the rows
    that satisfy ``where`` (a SQL predicate on key columns) and lie in ``rows`` (a slice of
    positions), from the factors. Returns one row per group: the ``by`` columns, then per column
    its value and ``<column>_bound`` (hard bound on |true - value|; 0 for counts), and with
    ``estimates=True`` also ``<column>_estimate`` (a typical error, not a bound).

    What the value is: the aggregate of the values as stored (the factors' rebuild, exact
    cells applied), clamped into what the column's observed range allows (see
    ``_within_range``); its bound covers |aggregate of the TRUE source values - value|. It is
    not computed from the served cells (which are clamped one by one, and rounded in integer
    columns), so it may differ from the sum or mean of ``Archive.rebuild()``'s values; both
    are within their own bounds of the truth, so they differ by at most this bound plus the
    sum (or mean) of those cells' bounds."""
    func = _check_func(func)
    if columns is None:
        raise InvalidInputError("aggregate() needs the numeric columns to aggregate, e.g. ['x1', 'x2'].")
    names = reader.resolve_columns(columns)
    if not names:
        raise InvalidInputError("aggregate() needs at least one numeric column.")
    by_names = _check_by(reader, by)
    own = con is None
    con = _connection(con)
    try:
        where = check_where(reader, con, where)
        row_range = _check_rows(reader, rows)
        col_idx = np.array([reader.column_index[n] for n in names], np.int64)
        keys, part = _partials(reader, con, names, col_idx, by_names, where, row_range)
    finally:
        if own:
            con.close()
    return _finish(reader, names, col_idx, func, keys, part, estimates, by_names)


def _finish(reader, names, col_idx, func, keys: pa.Table, part: _Partial, estimates, by) -> pa.Table:
    c = len(reader.model.basis_names)
    w = reader.model.weights[:, col_idx]
    offset = reader.model.offset[col_idx]
    steps = np.where(np.isfinite(reader.model.residual_step[col_idx]), reader.model.residual_step[col_idx], 0.0)
    n = part.n[:, None]
    with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
        total = n * offset[None, :] + part.f_sum @ w + steps[None, :] * part.q_sum + part.corr
        magnitude = (n * np.abs(offset)[None, :] + part.f_abs @ np.abs(w)
                     + steps[None, :] * part.q_abs + part.ov_abs)
        count = n - part.ov_nulls
        approx = np.maximum(n - part.ov_cells, 0.0)
        cols = reader.columns_table
        err_l2 = cols.column("err_l2").to_numpy()[col_idx]
        err_cells = cols.column("err_cells").to_numpy()[col_idx].astype(np.float64)
        colmax = reader.model.err_max[col_idx]
        scale = reader.model.ledger_scale[col_idx]
        rows_term = _up(scale[None, :] * _up(part.rowmax[:, None] * (1.0 + _gamma(n.max() + 2 if n.size else 2))))
        ledger = np.minimum(np.minimum(rows_term, _up(approx * colmax[None, :])),
                            _up(np.sqrt(approx) * err_l2[None, :] * (1 + 4 * U)))
        ledger = np.where(approx > 0, ledger, 0.0)
        fp = _up(4.0 * _gamma(n + 2 * c + 16) * magnitude)
        bound = _up(ledger + fp)
        rms = np.where(err_cells > 0, err_l2 / np.sqrt(np.maximum(err_cells, 1.0)), 0.0)
        estimate = np.minimum(np.sqrt(approx) * rms[None, :] + fp, bound)
        if func == "sum":
            value = np.where(count > 0, total, np.nan)
            null = count <= 0
        elif func == "avg":
            value = total / np.where(count > 0, count, 1.0)
            bound = _up(bound / np.where(count > 0, count, 1.0) * (1 + 4 * U) + 2 * U * np.abs(value))
            estimate = estimate / np.where(count > 0, count, 1.0)
            null = count <= 0
        else:
            value, bound, estimate = count, np.zeros_like(count), np.zeros_like(count)
            null = np.zeros_like(count, bool)
        if func in ("sum", "avg"):
            value, bound = _within_range(reader, col_idx, func, value, bound, count)
            estimate = np.minimum(estimate, bound)
    bound = np.where(null, 0.0, bound)
    estimate = np.where(null, 0.0, estimate)
    named = [(b, f"the group column {b!r}") for b in by]
    for name in names:
        named += [(name, f"the {func} of {name!r}"), (f"{name}_bound", f"the bound of {name!r}")]
        if estimates:
            named.append((f"{name}_estimate", f"the error estimate of {name!r}"))
    check_result_names(named, "This aggregate", "Aggregate those columns in separate calls, or "
                       "rename the source column and compress again.")
    arrays, out_names = [keys.column(b) for b in by], list(by)
    for s, name in enumerate(names):
        if func == "count":
            arrays.append(pa.array(value[:, s].astype(np.int64), pa.int64()))
        else:
            arrays.append(pa.array(value[:, s], pa.float64(), mask=null[:, s]))
        arrays.append(pa.array(bound[:, s], pa.float64()))
        out_names += [name, f"{name}_bound"]
        if estimates:
            arrays.append(pa.array(estimate[:, s], pa.float64()))
            out_names.append(f"{name}_estimate")
    table = pa.table(arrays, names=out_names)
    return table.replace_schema_metadata({
        "rankfold.func": func,
        "rankfold.bound": "hard bound on |true - value| from the error ledger, as stored",
        "rankfold.estimate": "estimate, not a bound: sqrt(cells) * rms error of the column",
    })


def _within_range(reader, col_idx, func: str, value: np.ndarray, bound: np.ndarray,
                  count: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Narrow a sum or mean (g, q) with its bound to what the column's observed range allows:
    the true sum of `count` values in [lower_j, upper_j] lies in [count lower_j, count
    upper_j] (the mean in [lower_j, upper_j]). The value is clamped into that range and the
    bound becomes the farthest end of [value - bound, value + bound] intersected with it, so
    it never grows. Columns with NaN or infinite values (their sums are not finite) and
    empty intersections (which the bound's premise excludes) are left as they are. The ends
    count * lower_j are moved out by one ulp to cover their own rounding."""
    lower, upper = reader.model.lower[col_idx][None, :], reader.model.upper[col_idx][None, :]
    cols = reader.columns_table
    special = np.zeros(col_idx.size, bool)
    for name in ("nans", "infinities"):
        if name in cols.column_names:
            special |= cols.column(name).to_numpy()[col_idx] > 0
    with np.errstate(invalid="ignore", over="ignore"):
        if func == "sum":
            low = np.nextafter(count * lower, -np.inf)
            high = np.nextafter(count * upper, np.inf)
        else:
            low, high = np.broadcast_to(lower, value.shape), np.broadcast_to(upper, value.shape)
        # where the true value can be, widened by one ulp at each end for their rounding
        a = np.nextafter(np.maximum(value - bound, low), -np.inf)
        b = np.nextafter(np.minimum(value + bound, high), np.inf)
        usable = (np.isfinite(low) & np.isfinite(high) & np.isfinite(value) & (count > 0)
                  & ~special[None, :] & (a <= b))
        clamped = np.minimum(np.maximum(value, low), high)
        # clamping onto a range that holds the true value never moves away from it: the old
        # bound holds for the clamped value as well, and the narrowed one may be smaller
        narrowed = np.minimum(_up(np.maximum(b - clamped, clamped - a)), bound)
    return np.where(usable, clamped, value), np.where(usable, narrowed, bound)


# -- covariance and correlation --------------------------------------------------------------
def _cov_columns(reader, columns: Any) -> tuple[list[str], np.ndarray]:
    names = reader.resolve_columns(columns)
    if not names:
        raise InvalidInputError("covariance() needs at least one numeric column.")
    col_idx = np.array([reader.column_index[n] for n in names], np.int64)
    cols = reader.columns_table
    counts = {k: cols.column(k).to_numpy()[col_idx] for k in ("nulls", "nans", "infinities")
              if k in cols.column_names}
    for s, name in enumerate(names):
        bad = {k: int(v[s]) for k, v in counts.items() if v[s] > 0}
        if bad:
            raise InvalidInputError(
                f"Covariance from the factors needs columns without NULL, NaN or infinite "
                f"values; the column {name!r} of {reader.path} has {bad}. Leave it out (columns=[...]), "
                "or compute it over rebuilt rows (rankfold_scan) with covar_samp, which skips NULLs.")
    return names, col_idx


def covariance(reader, columns: Any = None) -> tuple[list[str], np.ndarray, np.ndarray]:
    names, cov, bound, _, _ = _covariance(reader, columns)
    return names, cov, bound


def _covariance(reader, columns: Any = None):
    """(names, C, B, fp, d): the covariance of the values as stored, by the cheaper route that
    sees them: from the Gram matrix of the basis values (no scan) when the low-rank part is
    the whole stored value up to the residual, else (no basis, residual codes, or overridden
    cells that weigh more than the residual) from one scan of the rebuilt values."""
    names, col_idx = _cov_columns(reader, columns)
    blocks = _blocks(reader)
    if blocks is not None and len(reader.model.basis_names):
        every = np.ones(blocks.first.size, bool)
        coded = np.isfinite(reader.model.residual_step[col_idx]) & ~reader.model.is_basis[col_idx]
        ov_sq = blocks.stack("ov_sq", every)[:, col_idx].sum(axis=0)
        err_l2 = reader.columns_table.column("err_l2").to_numpy()[col_idx]
        if not coded.any() and np.all(np.sqrt(ov_sq) <= err_l2):
            return _gram_covariance(reader, columns)
    return _stored_covariance(reader, names, col_idx)


def _stored_covariance(reader, names: list[str], col_idx: np.ndarray, *,
                       chunk_rows: int = layout.ROW_GROUP_ROWS):
    """(names, C, B, fp, d) from one pass over the values as stored (``rebuild(serve=False)``:
    basis part, residual codes and exact cells; memory of one chunk), for any archive: rank
    0, quantized codings, many exact cells.

    x = v + e with v the stored value as rebuilt here: e is 0 on exact cells, and on the
    others at most the encode pass's error (its column norm is ``err_l2``, an upper limit)
    plus this rebuild's floating-point slack, so ||P e_j|| <= d_j = err_l2_j + ||slack_j||.
    The co-moments are summed about the profile's means (Chan et al.: shifting keeps the
    cancellation small); their floating-point error is at most 8 gamma_{m+16}
    sqrt(C_jj C_ll) (Higham eq. 3.4-3.5 with |a|.|b| <= ||a|| ||b||, Cauchy-Schwarz)."""
    m = reader.rows_count
    if m < 2:
        raise InvalidInputError(f"A sample covariance needs at least 2 rows; {reader.path} has {m}.")
    q = col_idx.size
    shift = reader.columns_table.column("mean").to_numpy()[col_idx].astype(np.float64)
    shift = np.where(np.isfinite(shift), shift, 0.0)
    gram, total, slack_sq = np.zeros((q, q)), np.zeros(q), np.zeros(q)
    for lo in range(0, m, chunk_rows):
        block = reader.rebuild(columns=names, positions=np.arange(lo, min(lo + chunk_rows, m)), serve=False)
        d = block.values - shift[None, :]
        gram += d.T @ d
        total += d.sum(axis=0)
        slack = np.where(block.exact, 0.0, block.slack)
        slack_sq += np.einsum("ij,ij->j", slack, slack)
    mm = float(m)
    g = _gamma(mm + 16)
    cov = (gram - np.outer(total, total) / mm) / (mm - 1)
    cov = (cov + cov.T) / 2.0
    diag = np.maximum(np.diag(gram), 0.0) * (1 + 4 * g)
    fp = _up(8.0 * g * np.sqrt(np.outer(diag, diag)) / (mm - 1) * (1 + 8 * U))
    err_l2 = reader.columns_table.column("err_l2").to_numpy()[col_idx]
    delta = _up(err_l2 + np.sqrt(_up(slack_sq)) * (1 + 4 * U))
    delta = np.where(reader.model.is_basis[col_idx], 0.0, delta)
    spread = _up(np.sqrt(np.maximum(np.diag(cov) + np.diag(fp), 0.0) * (mm - 1)))
    bound = _up((np.outer(spread, delta) + np.outer(delta, spread) + np.outer(delta, delta)) / (mm - 1)
                * (1 + 8 * U) + fp)
    return names, cov, bound, fp, delta


def _gram_covariance(reader, columns: Any = None):
    """(names, C, B): the sample covariance (divisor rows - 1) of the chosen numeric columns as
    rebuilt from the Gram matrix of the basis values, and B, a hard bound on |true C - C|
    elementwise. With x = xhat + e (e: everything the basis part misses, i.e. the ledger's
    residual, the quantized residual and the overridden cells' differences), centred vectors
    satisfy |cov(x_j, x_l) - cov(xhat_j, xhat_l)| <= (s_j d_l + d_j s_l + d_j d_l) / (m - 1)
    (Cauchy-Schwarz), s_j = ||P xhat_j||, d_j >= ||P e_j|| (P: centring, a projection)."""
    names, col_idx = _cov_columns(reader, columns)
    blocks = _blocks(reader)
    if blocks is None:
        raise InvalidInputError(
            f"The archive {reader.path} was written before per row-group sums (blocks.parquet) "
            "existed; compress it again to get covariances from the factors.")
    m = float(reader.rows_count)
    if m < 2:
        raise InvalidInputError(f"A sample covariance needs at least 2 rows; {reader.path} has {int(m)}.")
    c = len(reader.model.basis_names)
    every = np.ones(blocks.first.size, bool)
    w = reader.model.weights[:, col_idx]
    if c:
        gram = blocks.stack("gram", every).sum(axis=0).reshape(c, c)
        gram_abs = blocks.stack("gram_abs", every).sum(axis=0).reshape(c, c)
        d = blocks.stack("d_sum", every).sum(axis=0)
        cov_f = (gram - np.outer(d, d) / m) / (m - 1)
        cov = w.T @ cov_f @ w
        mag = np.abs(w).T @ ((gram_abs + np.outer(np.abs(d), np.abs(d)) / m) / (m - 1)) @ np.abs(w)
    else:
        cov = np.zeros((col_idx.size, col_idx.size))
        mag = np.zeros_like(cov)
    fp = _up(4.0 * _gamma(m + 2 * c + 16) * mag)
    cov = (cov + cov.T) / 2.0
    cols = reader.columns_table
    err_l2 = cols.column("err_l2").to_numpy()[col_idx]
    steps = np.where(np.isfinite(reader.model.residual_step[col_idx]), reader.model.residual_step[col_idx], 0.0)
    q_sq = blocks.stack("q_sq", every)[:, col_idx].sum(axis=0)
    ov_sq = blocks.stack("ov_sq", every)[:, col_idx].sum(axis=0)
    delta = _up(np.sqrt(_up(err_l2**2 + ov_sq)) + steps * np.sqrt(_up(q_sq)))
    spread = _up(np.sqrt(np.maximum(np.diag(cov) + np.diag(fp), 0.0) * (m - 1)))
    bound = _up((np.outer(spread, delta) + np.outer(delta, spread) + np.outer(delta, delta)) / (m - 1) * (1 + 8 * U) + fp)
    return names, cov, bound, fp, delta


def correlation(reader, columns: Any = None) -> tuple[list[str], np.ndarray, np.ndarray]:
    """(names, R, B): Pearson correlations of the values as stored and a hard bound on
    |true R - R|.

    For centred vectors u (true) and uh (stored) with ||u - uh|| <= d, the angle between
    them is at most theta = asin(d / |uh|) (pi once d >= |uh|). Angles between directions
    obey the triangle inequality (they are a metric on the sphere), so the true angle
    between u and v lies within theta_u + theta_v of the stored one, phi = arccos(R), and
    the true correlation lies in [cos(min(pi, phi + theta)), cos(max(0, phi - theta))]. The
    bound is the farther end of that interval from R: at most 1 + |R|, about
    sin(phi) (theta_u + theta_v) when the errors are small. The floating-point error of R
    (from the covariance's) widens the interval first."""
    names, cov, _, fp, delta = _covariance(reader, columns)
    m = float(reader.rows_count)
    var = np.diag(cov)
    with np.errstate(invalid="ignore", divide="ignore"):
        sd = np.sqrt(np.maximum(var, 0.0))
        corr = np.clip(cov / np.outer(sd, sd), -1.0, 1.0)
        # the computed norms carry floating-point error: take them down by its bound
        low_var = np.maximum(var - np.diag(fp), 0.0)
        low = np.sqrt(low_var * (m - 1))
        theta = np.where((low > 0) & (delta < low), np.arcsin(np.minimum(delta / low, 1.0)), np.pi)
        theta = np.where(delta == 0, 0.0, theta * (1 + 1e-12))
        low_sd = np.sqrt(low_var)
        fp_r = (2.0 * fp / np.outer(low_sd, low_sd)
                + np.abs(corr) * (np.diag(fp) / low_var)[:, None] + np.abs(corr) * (np.diag(fp) / low_var)[None, :]
                + 16 * U * (1 + np.abs(corr)))
        fp_r = np.where(np.isfinite(fp_r), fp_r, 2.0)
        phi_lo = np.arccos(np.minimum(corr + fp_r, 1.0))
        phi_hi = np.arccos(np.maximum(corr - fp_r, -1.0))
        spread = theta[:, None] + theta[None, :]
        top = np.cos(np.maximum(phi_lo - spread, 0.0))
        bottom = np.cos(np.minimum(phi_hi + spread, np.pi))
        # cos and arccos are within a few ulps (common practice): 1e-15 absolute more
        bound = _up(np.maximum(top - corr, corr - bottom) + 1e-15)
        bad = ~(low > 0)
        bound = np.where(np.isfinite(bound) & ~bad[:, None] & ~bad[None, :], np.minimum(bound, 2.0), 2.0)
        corr[bad, :] = np.nan
        corr[:, bad] = np.nan
    np.fill_diagonal(bound, np.where(bad, 2.0, 0.0))
    np.fill_diagonal(corr, np.where(bad, np.nan, 1.0))
    return names, corr, bound


def pairs_table(names: list[str], values: np.ndarray, bounds: np.ndarray) -> pa.Table:
    """A q x q matrix of values and bounds (covariance, correlation) as a long table:
    column_a, column_b, value, bound (q^2 rows, row-major)."""
    q = len(names)
    a, b = np.repeat(np.arange(q), q), np.tile(np.arange(q), q)
    return pa.table({"column_a": pa.array([names[i] for i in a], pa.string()),
                     "column_b": pa.array([names[i] for i in b], pa.string()),
                     "value": pa.array(values.ravel(), pa.float64()),
                     "bound": pa.array(bounds.ravel(), pa.float64())})
