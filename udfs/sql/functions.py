"""rankfold's SQL functions for DuckDB: ``register(con)`` and the UDFs behind it.

Every public name is a TEMP macro ``<prefix>_<verb>`` over an internal Python UDF
``<prefix>__<verb>``. The macros give what DuckDB 2.0.1 Python UDFs lack (duckdb-notes.md
section 1): optional and named parameters (``rankfold_compress(src, path, rank := 8)``), and a
type check with rankfold's own message. Each macro hands the UDF its arguments plus
``typeof(argument)``, a constant folded at bind time, so a DOUBLE row position or a numeric
column name fails with an :class:`InvalidInputError` naming the function, the argument and the
type, instead of a cast error or a "no function matches" error that names the internal UDF.

The cell and row functions are arrow UDFs: one call per vector of at most 2048 rows; the call
groups its rows by archive path, rebuilds all of them with one reader call per distinct path
(NaN kept: native UDFs would turn it into NULL), and writes one rebuild-log record per path.
"""

from __future__ import annotations

import inspect
import json
import math
import re
from typing import Any, Callable

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..passes.compress import compress as _compress
from ..errors import ArchiveExistsError, InvalidInputError, RankfoldError
from ..store import layout
from ..store.integrity import seal_for_token
from ..store.reader import ArchiveReader
from ..store.rebuild_log import RebuildLog
from . import tables as _tables
from .readers import ReaderCache

__all__ = ["register", "FUNCTIONS"]

_CACHE = ReaderCache()

# Largest (distinct rows x distinct columns) block rebuilt at once for the cell functions;
# past it, cells are rebuilt column by column (2048 rows x 512 columns = 1M cells, 18 MB).
_BLOCK_CELLS = 1 << 20

_INTEGER_TYPES = ("TINYINT", "SMALLINT", "INTEGER", "BIGINT", "UTINYINT", "USMALLINT",
                  "UINTEGER", "UBIGINT", "HUGEINT", "UHUGEINT")
_NULL_TYPE = '"NULL"'  # typeof(NULL)

_ROW_STRUCT = 'STRUCT("column" VARCHAR, "value" DOUBLE, "bound" DOUBLE)'
_INFO_FIELDS = {
    "path": "VARCHAR",
    "archive_id": "VARCHAR",
    "rows": "BIGINT",
    "columns": "BIGINT",
    "method": "VARCHAR",
    "rank": "BIGINT",
    "basis_columns": "VARCHAR[]",
    "anchor_rows": "BIGINT",
    "relative_frobenius": "DOUBLE",
    "largest_error": "DOUBLE",
    "numeric_columns": "VARCHAR[]",
}
_INFO_TYPE = "STRUCT(" + ", ".join(f'"{k}" {v}' for k, v in _INFO_FIELDS.items()) + ")"

# name -> (signature shown in messages and docs, one-line description)
FUNCTIONS = {
    "compress": ("compress(source, path, rank := NULL, seed := 0, overwrite := false, options := NULL)",
                 "compress a table name or SELECT statement into an archive; returns its info"),
    "info": ("info(path)", "shape, method, rank, basis columns and error summary of an archive"),
    "cell": ("cell(path, row, col)", "rebuilt value (DOUBLE; NULL where the source was NULL)"),
    "cell_bound": ("cell_bound(path, row, col)", "guaranteed bound on |true - rebuilt| (DOUBLE)"),
    "cell_with_bound": ("cell_with_bound(path, row, col)", "STRUCT(value DOUBLE, bound DOUBLE)"),
    "row": ("row(path, row, cols := NULL)",
            "rebuilt row as STRUCT(column, value, bound)[] in archive column order"),
    "scan": ("scan(path, columns := NULL, bounds := 'row', predicate := NULL)",
             "table: key columns exact, numeric columns rebuilt, _rf_bound (or <column>_bound), _rf_row"),
    "aggregate": ("aggregate(path, columns, func := 'avg', group_by := NULL, predicate := NULL, "
                  "row_from := NULL, row_to := NULL, estimates := false)",
                  "table: sum/avg/count per group from the factors, with <column>_bound"),
    "covariance": ("covariance(path, columns := NULL)",
                   "table (column_a, column_b, value, bound): sample covariance from the factors"),
    "correlation": ("correlation(path, columns := NULL)",
                    "table (column_a, column_b, value, bound): Pearson correlation from the factors"),
    "column_errors": ("column_errors(path)", "table: the column error ledger (columns.parquet)"),
    "row_errors": ("row_errors(path)",
                   "table: per-row error figures, in units of each column's ledger_scale "
                   "(NULL when every column has a tolerance: no row ledger is kept then)"),
}


# -- argument checks ---------------------------------------------------------------------------
class _Arg:
    """One macro parameter: its SQL kind ('text', 'int', 'bool', 'text_list', 'options')."""

    def __init__(self, name: str, kind: str, default: str | None = None):
        self.name, self.kind, self.default = name, kind, default

    def macro_param(self) -> str:
        return self.name if self.default is None else f"{self.name} := {self.default}"

    def udf_expr(self) -> str:
        """The value handed to the UDF: the argument in the UDF's parameter type, or NULL
        when the argument's type is wrong (the UDF then complains, using its typeof)."""
        n = self.name
        if self.kind == "text":
            return f"CASE WHEN typeof({n}) = 'VARCHAR' THEN TRY_CAST({n} AS VARCHAR) END"
        if self.kind == "int":
            types = ", ".join(f"'{t}'" for t in _INTEGER_TYPES)
            return f"CASE WHEN typeof({n}) IN ({types}) THEN CAST({n} AS BIGINT) END"
        if self.kind == "bool":
            return f"CASE WHEN typeof({n}) = 'BOOLEAN' THEN TRY_CAST({n} AS BOOLEAN) END"
        if self.kind == "text_list":
            return (f"CASE WHEN typeof({n}) = 'VARCHAR' THEN [TRY_CAST({n} AS VARCHAR)] "
                    f"WHEN typeof({n}) = 'VARCHAR[]' THEN TRY_CAST({n} AS VARCHAR[]) END")
        if self.kind == "options":  # JSON text, or a STRUCT literal turned into JSON
            return (f"CASE WHEN typeof({n}) LIKE 'STRUCT(%' THEN CAST(to_json({n}) AS VARCHAR) "
                    f"WHEN typeof({n}) IN ('VARCHAR', 'JSON') THEN TRY_CAST({n} AS VARCHAR) END")
        raise AssertionError(self.kind)

    def udf_type(self) -> str:
        return {"text": "VARCHAR", "int": "BIGINT", "bool": "BOOLEAN", "text_list": "VARCHAR[]",
                "options": "VARCHAR"}[self.kind]

    def accepts(self, sql_type: str) -> bool:
        if sql_type == _NULL_TYPE:
            return True
        if self.kind == "text":
            return sql_type == "VARCHAR"
        if self.kind == "int":
            return sql_type in _INTEGER_TYPES
        if self.kind == "bool":
            return sql_type == "BOOLEAN"
        if self.kind == "text_list":
            return sql_type in ("VARCHAR", "VARCHAR[]")
        return sql_type in ("VARCHAR", "JSON") or sql_type.startswith("STRUCT(")

    def wanted(self) -> str:
        if self.kind == "int" and self.name == "row":
            return "an integer (0-based row position)"
        return {"text": "a VARCHAR", "int": "an integer", "bool": "a BOOLEAN",
                "text_list": "a VARCHAR or a VARCHAR[] of column names",
                "options": "JSON text or a STRUCT literal such as {'n_columns': 12}"}[self.kind]


def _check_types(function: str, args: list[_Arg], types: list[str]) -> None:
    for arg, sql_type in zip(args, types):
        if not arg.accepts(sql_type):
            raise InvalidInputError(
                f"{function}(): the argument {arg.name!r} must be {arg.wanted()}; got a value of "
                f"type {sql_type}. Cast it, e.g. CAST({arg.name} AS {arg.udf_type()})."
            )


def _first_types(type_arrays: tuple) -> list[str]:
    """typeof() arguments of an arrow call are constant vectors: read the first value."""
    return [(a[0].as_py() if len(a) else _NULL_TYPE) for a in type_arrays]


def _relabel(function: str, call: Callable, *args: Any) -> Any:
    """Run ``call``; put the SQL function's name in front of any rankfold error's message."""
    try:
        return call(*args)
    except RankfoldError as exc:
        text = str(exc)
        if not text.startswith(f"{function}()"):
            text = f"{function}(): {text}"
        raise type(exc)(text) from None


# -- shared pieces -----------------------------------------------------------------------------
def _reader(path: str) -> ArchiveReader:
    return _CACHE.get(path)


def _codes(array: pa.ChunkedArray | pa.Array) -> tuple[np.ndarray, list]:
    """Dictionary codes (-1 for NULL) and the distinct values of a string array."""
    if isinstance(array, pa.ChunkedArray):
        array = array.combine_chunks()
    encoded = pc.dictionary_encode(array)
    codes = encoded.indices.fill_null(-1).to_numpy(zero_copy_only=False).astype(np.int64)
    return codes, encoded.dictionary.to_pylist()


def _int_values(array: pa.ChunkedArray) -> tuple[np.ndarray, np.ndarray]:
    array = array.combine_chunks() if isinstance(array, pa.ChunkedArray) else array
    nulls = array.is_null().to_numpy(zero_copy_only=False)
    return array.fill_null(0).to_numpy(zero_copy_only=False).astype(np.int64), nulls


def _largest(bounds: np.ndarray) -> float:
    finite = bounds[~np.isnan(bounds)]
    return float(finite.max()) if finite.size else 0.0


def _log(log_path, reader: ArchiveReader, request: str, positions: np.ndarray,
         columns: list[str] | None, exact: np.ndarray, bounds: np.ndarray) -> None:
    RebuildLog(reader.manifest["archive_id"], str(reader.path), log_path).record(
        request,
        rows=[int(p) for p in positions],
        columns=columns,
        cells_rebuilt=int((~exact).sum()),
        cells_exact=int(exact.sum()),
        largest_bound=_largest(bounds),
    )


# -- cell functions ----------------------------------------------------------------------------
def _rebuild_cells(reader: ArchiveReader, rows: np.ndarray, names: list[str],
                   col_slot: np.ndarray):
    """values, bounds, exact, nulls (each (b,)) for cells (rows[i], names[col_slot[i]])."""
    positions = reader.resolve_rows(rows)
    unique_rows, row_slot = np.unique(positions, return_inverse=True)
    b = positions.size
    if unique_rows.size * len(names) <= _BLOCK_CELLS:
        block = reader.rebuild(columns=names, positions=unique_rows)
        pick = (row_slot, col_slot)
        return (positions, block.values[pick], block.bounds[pick], block.exact[pick],
                block.nulls[pick])
    values, bounds = np.empty(b), np.empty(b)
    exact, nulls = np.zeros(b, bool), np.zeros(b, bool)
    for t, name in enumerate(names):
        sel = np.flatnonzero(col_slot == t)
        these, slot = np.unique(positions[sel], return_inverse=True)
        block = reader.rebuild(columns=[name], positions=these)
        values[sel], bounds[sel] = block.values[slot, 0], block.bounds[slot, 0]
        exact[sel], nulls[sel] = block.exact[slot, 0], block.nulls[slot, 0]
    return positions, values, bounds, exact, nulls


def _cells(request: str, log_path, path, row, col) -> tuple[np.ndarray, ...]:
    """For one arrow call: values, bounds, source-NULL mask and result-NULL mask (input NULLs)."""
    n = len(path)
    path_codes, paths = _codes(path)
    col_codes, col_names = _codes(col)
    rows, row_nulls = _int_values(row)
    missing = (path_codes < 0) | (col_codes < 0) | row_nulls
    values, bounds = np.full(n, np.nan), np.full(n, np.nan)
    source_null = np.zeros(n, bool)
    for g, archive in enumerate(paths):
        sel = np.flatnonzero((path_codes == g) & ~missing)
        if sel.size == 0:
            continue
        reader = _reader(archive)
        used = np.unique(col_codes[sel])
        names = reader.resolve_columns([col_names[c] for c in used])
        col_slot = np.searchsorted(used, col_codes[sel])
        positions, v, bd, ex, nu = _rebuild_cells(reader, rows[sel], names, col_slot)
        values[sel], bounds[sel], source_null[sel] = v, bd, nu
        _log(log_path, reader, request, positions, names, ex, bd)
    return values, bounds, source_null, missing


_CELL_ARGS = [_Arg("path", "text"), _Arg("row", "int"), _Arg("col", "text")]


def _cell_udfs(prefix: str, log_path) -> dict[str, Callable]:
    def make(verb: str, shape: Callable) -> Callable:
        function = f"{prefix}_{verb}"

        def body(path, row, col, *types):
            _check_types(function, _CELL_ARGS, _first_types(types))
            parts = _cells(f"sql:{function}", log_path, path, row, col)
            return shape(*parts)

        def udf(*args):
            return _relabel(function, body, *args)

        udf.__name__ = _internal(prefix, verb)
        return udf

    def value(values, bounds, source_null, missing):
        return pa.array(values, pa.float64(), mask=source_null | missing)

    def bound(values, bounds, source_null, missing):
        return pa.array(bounds, pa.float64(), mask=missing)

    def both(values, bounds, source_null, missing):
        return pa.StructArray.from_arrays(
            [pa.array(values, pa.float64(), mask=source_null | missing),
             pa.array(bounds, pa.float64(), mask=missing)],
            names=["value", "bound"], mask=pa.array(missing))

    return {"cell": (make("cell", value), "DOUBLE"),
            "cell_bound": (make("cell_bound", bound), "DOUBLE"),
            "cell_with_bound": (make("cell_with_bound", both), "STRUCT(value DOUBLE, bound DOUBLE)")}


# -- row function ------------------------------------------------------------------------------
_ROW_ARGS = [_Arg("path", "text"), _Arg("row", "int"), _Arg("cols", "text_list", "NULL")]


def _row_udf(prefix: str, log_path) -> Callable:
    function = f"{prefix}_row"

    def body(path, row, cols, *types):
        sql_types = _first_types(types)
        _check_types(function, _ROW_ARGS, sql_types)
        all_columns = sql_types[2] == _NULL_TYPE
        path_codes, paths = _codes(path)
        rows, row_nulls = _int_values(row)
        missing = (path_codes < 0) | row_nulls
        wanted = None
        if not all_columns:
            cols = cols.combine_chunks() if isinstance(cols, pa.ChunkedArray) else cols
            missing |= cols.is_null().to_numpy(zero_copy_only=False)
            wanted = cols.to_pylist()
        out = _RowOutput(len(path_codes))
        for g, archive in enumerate(paths):
            sel = np.flatnonzero((path_codes == g) & ~missing)
            if sel.size:
                _rows_of_archive(function, log_path, _reader(archive), sel, rows[sel],
                                 None if all_columns else [wanted[i] for i in sel], out)
        return out.to_arrow(missing)

    def udf(*args):
        return _relabel(function, body, *args)

    return udf


def _rows_of_archive(function: str, log_path, reader: ArchiveReader, sel: np.ndarray,
                     rows: np.ndarray, wanted: list | None, out: "_RowOutput") -> None:
    """Rebuild the rows ``sel`` of one arrow call that address ``reader`` into ``out``."""
    if wanted is None:
        names = list(reader.numeric_columns)
    else:
        for w in wanted:
            if any(c is None for c in w):
                raise InvalidInputError(
                    f"{function}(): the column list {w!r} holds a NULL; list column names only.")
        asked = {c for w in wanted for c in w}
        names = [c for c in reader.numeric_columns if c in asked]
        reader.resolve_columns(sorted(asked - set(names)))  # raises UnknownColumnError
    positions = reader.resolve_rows(rows)
    unique_rows, row_slot = np.unique(positions, return_inverse=True)
    block = reader.rebuild(columns=names, positions=unique_rows)
    index = {c: t for t, c in enumerate(names)}
    lists = [None] if wanted is None else list({tuple(dict.fromkeys(w)) for w in wanted})
    exact, bounds = [], []
    for columns in lists:  # usually one list for the whole vector
        if columns is None:
            these, take = np.arange(sel.size), np.arange(len(names))
        else:
            these = np.array([k for k, w in enumerate(wanted) if tuple(dict.fromkeys(w)) == columns],
                             dtype=np.int64)
            take = np.array([index[c] for c in columns], dtype=np.int64)
        picked = (row_slot[these][:, None], take[None, :])
        out.put(sel[these], [names[t] for t in take], block.values[picked], block.bounds[picked],
                block.nulls[picked])
        exact.append(block.exact[picked].ravel())
        bounds.append(block.bounds[picked].ravel())
    _log(log_path, reader, f"sql:{function}", positions, None if wanted is None else names,
         np.concatenate(exact), np.concatenate(bounds))


class _RowOutput:
    """Collects (rows x columns) blocks for the output rows of one arrow call, then builds
    the LIST(STRUCT(column, value, bound)) array in output-row order."""

    def __init__(self, n: int):
        self.n = n
        self.blocks: list = []  # (output rows, names, values, bounds, nulls)

    def put(self, at: np.ndarray, names: list[str], values, bounds, nulls) -> None:
        self.blocks.append((at, names, values, bounds, nulls))

    def to_arrow(self, missing: np.ndarray) -> pa.Array:
        lengths = np.zeros(self.n, np.int64)
        for at, names, *_ in self.blocks:
            lengths[at] = len(names)
        offsets = np.concatenate([[0], np.cumsum(lengths)])
        total = int(offsets[-1])
        values, bounds = np.empty(total), np.empty(total)
        nulls = np.zeros(total, bool)
        name_code = np.empty(total, np.int64)
        dictionary: list[str] = []
        for at, names, v, b, nu in self.blocks:
            slots = (offsets[at][:, None] + np.arange(len(names))[None, :]).ravel()
            values[slots], bounds[slots], nulls[slots] = v.ravel(), b.ravel(), nu.ravel()
            name_code[slots] = np.tile(np.arange(len(dictionary), len(dictionary) + len(names)),
                                       at.size)
            dictionary.extend(names)
        items = pa.StructArray.from_arrays(
            [pc.take(pa.array(dictionary, pa.string()), pa.array(name_code)),
             pa.array(values, pa.float64(), mask=nulls), pa.array(bounds, pa.float64())],
            names=["column", "value", "bound"])
        return pa.ListArray.from_arrays(pa.array(offsets.astype(np.int32)), items,
                                        mask=pa.array(missing))


# -- info and compress (native UDFs: one call per row, called rarely) ---------------------------
def _finite(value: Any) -> float | None:
    if value is None:
        return None
    value = float(value)
    return value if math.isfinite(value) else None


def _info(reader: ArchiveReader) -> dict[str, Any]:
    m = reader.manifest
    errors = m.get("errors", {})
    return {
        "path": str(reader.path),
        "archive_id": m["archive_id"],
        "rows": int(m["shape"][0]),
        "columns": int(m["shape"][1]),
        "method": m["method"]["kind"],
        "rank": int(m["method"]["rank"]),
        "basis_columns": [n for n in reader.model.basis_names if not n.startswith(layout.RESERVED_PREFIX)],
        "anchor_rows": int(len(reader.model.anchor_positions)),
        "relative_frobenius": _finite(errors.get("relative_frobenius")),
        "largest_error": _finite(errors.get("largest_error")),
        "numeric_columns": list(reader.numeric_columns),
    }


_INFO_ARGS = [_Arg("path", "text")]


def _info_udf(prefix: str) -> Callable:
    function = f"{prefix}_info"

    def body(path, *types):
        _check_types(function, _INFO_ARGS, list(types))
        return None if path is None else _info(_reader(path))

    def udf(*args):
        return _relabel(function, body, *args)

    return udf


_COMPRESS_ARGS = [_Arg("source", "text"), _Arg("path", "text"), _Arg("rank", "int", "NULL"),
                  _Arg("seed", "int", "0"), _Arg("overwrite", "bool", "false"),
                  _Arg("options", "options", "NULL")]
# set by the macro's own parameters; the connection is the registering one's cursor
_RESERVED_OPTIONS = {"rank", "seed", "overwrite", "connection"}


def _options(function: str, text: str | None) -> dict[str, Any]:
    if text is None:
        return {}
    try:
        options = json.loads(text)
    except json.JSONDecodeError as exc:
        raise InvalidInputError(
            f"{function}(): options must be a JSON object such as '{{\"n_columns\": 12}}'; "
            f"{text!r} is not valid JSON ({exc.msg}).") from None
    if not isinstance(options, dict):
        raise InvalidInputError(
            f"{function}(): options must be a JSON object such as '{{\"n_columns\": 12}}'; got {text!r}.")
    clash = sorted(_RESERVED_OPTIONS & set(options))
    if clash:
        raise InvalidInputError(
            f"{function}(): {clash} cannot be given in options; "
            + ("pass them as named arguments, e.g. rank := 8." if set(clash) - {"connection"}
               else "the source is read from the database that calls the function."))
    if isinstance(options.get("exact_columns"), list):
        options["exact_columns"] = tuple(options["exact_columns"])
    return options


def _compress_udf(prefix: str, con) -> Callable:
    function = f"{prefix}_compress"

    def body(source, path, rank, seed, overwrite, options, *types):
        _check_types(function, _COMPRESS_ARGS, list(types))
        if source is None or path is None:
            return None
        opts = _options(function, options)
        cursor = con.cursor()  # a UDF cannot use the connection that runs it
        try:
            written = _compress(source, path, rank=rank, seed=0 if seed is None else seed,
                                overwrite=bool(overwrite), connection=cursor, **opts)
        except ArchiveExistsError as exc:
            raise ArchiveExistsError(f"{exc} (In SQL: overwrite := true.)") from None
        except InvalidInputError as exc:
            if "cannot read the source" in str(exc):
                raise InvalidInputError(
                    f"{exc} SQL functions read the source through a separate connection that "
                    "sees committed data only: COMMIT the transaction that created it first."
                ) from None
            raise
        finally:
            cursor.close()
        return _info(_reader(str(written)))

    def udf(*args):
        return _relabel(function, body, *args)

    return udf


# -- table functions: macros over query(<generated SQL>) ----------------------------------------
_TABLE_ARGS = {
    "scan": [_Arg("path", "text"), _Arg("columns", "text_list", "NULL"), _Arg("bounds", "text", "'row'"),
             _Arg("predicate", "text", "NULL")],
    "aggregate": [_Arg("path", "text"), _Arg("columns", "text_list"), _Arg("func", "text", "'avg'"),
                  _Arg("group_by", "text_list", "NULL"), _Arg("predicate", "text", "NULL"),
                  _Arg("row_from", "int", "NULL"), _Arg("row_to", "int", "NULL"),
                  _Arg("estimates", "bool", "false")],
    "covariance": [_Arg("path", "text"), _Arg("columns", "text_list", "NULL")],
    "correlation": [_Arg("path", "text"), _Arg("columns", "text_list", "NULL")],
    "column_errors": [_Arg("path", "text")],
    "row_errors": [_Arg("path", "text")],
}
_RESULTS = _tables.ResultCache()


def _table_udf(prefix: str, verb: str, con) -> Callable:
    function = f"{prefix}_{verb}"
    args = _TABLE_ARGS[verb]

    def need(name: str, value: Any) -> None:
        if value is None:
            raise InvalidInputError(
                f"{function}(): {name} is NULL; a table function needs a value here "
                f"({FUNCTIONS[verb][0]}).")

    def body(*values):
        q = len(args)
        _check_types(function, args, list(values[q:]))
        params = dict(zip([a.name for a in args], values[:q]))
        need("path", params["path"])
        reader = _reader(params["path"])
        # every query: the archive files DuckDB will read are unchanged since their SHA-256
        # was checked (a stat per file; a changed file is hashed again), even when the SQL
        # text is cached (the scan checks the row files by row group as DuckDB reads them:
        # rows_source_sql). Aggregates, covariance and correlation are answered in Python
        # from checked reads and handed to DuckDB as our own spooled table: nothing to check
        # again for them.
        if verb == "scan":
            reader.check_for_scan()
        elif verb == "column_errors":
            reader.check_table(layout.COLUMNS)
        elif verb == "row_errors":
            reader.check_row_files()
        key = (prefix, verb, str(reader.path), reader.version,  # the SQL names prefixed UDFs
               tuple((k, tuple(v) if isinstance(v, list) else v) for k, v in params.items()))
        return _RESULTS.get(key, lambda: make(reader, params))

    def make(reader: ArchiveReader, p: dict[str, Any]) -> str:
        if verb == "scan":
            need("bounds", p["bounds"])
            sealed = _internal(prefix, "sealed")
            if p["predicate"] is None:
                return _tables.scan_sql(reader, p["columns"], p["bounds"], sealed=sealed)
            cursor = con.cursor()
            try:
                return _tables.scan_sql(reader, p["columns"], p["bounds"], p["predicate"], cursor,
                                        sealed=sealed)
            finally:
                cursor.close()
        if verb == "column_errors":
            return _tables.column_errors_sql(reader)
        if verb == "row_errors":
            return _tables.row_errors_sql(reader)
        cursor = con.cursor()  # a UDF cannot use the connection that runs it
        try:
            if verb == "aggregate":
                need("columns", p["columns"])
                need("func", p["func"])
                rows = None
                if p["row_from"] is not None or p["row_to"] is not None:
                    rows = slice(p["row_from"], p["row_to"])
                table = _tables.agg.aggregate(reader, p["columns"], p["func"], p["group_by"], p["predicate"],
                                              rows=rows, estimates=bool(p["estimates"]), con=cursor)
            else:
                kind = _tables.agg.covariance if verb == "covariance" else _tables.agg.correlation
                table = _tables.agg.pairs_table(*kind(reader, p["columns"]))
            return _tables.table_sql(table)
        finally:
            cursor.close()

    def udf(*values):
        return _relabel(function, body, *values)

    return udf


def _sealed_udf(prefix: str) -> Callable:
    """``<prefix>_internal_sealed(token, _rf_row)``: true for every row, after checking the
    SHA-256 of the row groups holding these rows (``integrity.RowFileSeal.check_rows``); a
    damaged group raises CorruptArchiveError before any of its rows passes the filter."""
    function = f"{prefix}_scan"

    def body(tokens: pa.Array, rows: pa.Array) -> pa.Array:
        first = tokens[0].as_py() if len(tokens) else None
        if first is not None and tokens.null_count == 0 and pc.all(pc.equal(tokens, first)).as_py():
            groups = [(first, rows)]  # the usual call: one scan, one archive version
        else:
            groups = [(t, pc.filter(rows, pc.equal(tokens, t)))
                      for t in pc.unique(tokens.drop_null()).to_pylist()]
        for token, mine in groups:
            positions = mine.drop_null().to_numpy(zero_copy_only=False).astype(np.int64, copy=False)
            seal_for_token(token).check_rows(positions)
        return pa.array(np.ones(len(rows), dtype=bool))

    def udf(*args):
        return _relabel(function, body, *args)

    return udf


def _table_macro(con, prefix: str, verb: str) -> None:
    args = _TABLE_ARGS[verb]
    params = ", ".join(a.macro_param() for a in args)
    values = ", ".join(a.udf_expr() for a in args)
    types = ", ".join(f"typeof({a.name})" for a in args)
    con.execute(f"CREATE OR REPLACE TEMP MACRO {prefix}_{verb}({params}) AS TABLE "
                f"FROM query({_internal(prefix, verb + '_sql')}({values}, {types}))")


# -- registration ------------------------------------------------------------------------------
def _internal(prefix: str, verb: str) -> str:
    """Name of the Python UDF behind the public macro ``<prefix>_<verb>``: it says it is
    internal in the function catalogue (DuckDB lists Python UDF parameters as col0..colN;
    the public macros carry the real parameter names and a comment)."""
    return f"{prefix}_internal_{verb}"


def _describe(con, prefix: str, verb: str, table: bool) -> None:
    """The one-line description of FUNCTIONS as the macro's comment in the catalogue."""
    signature, text = FUNCTIONS[verb]
    comment = f"rankfold: {prefix}_{signature} -> {text}".replace("'", "''")
    con.execute(f"COMMENT ON MACRO {'TABLE ' if table else ''}{prefix}_{verb} IS '{comment}'")


def _macro(con, prefix: str, verb: str, args: list[_Arg]) -> None:
    params = ", ".join(a.macro_param() for a in args)
    values = ", ".join(a.udf_expr() for a in args)
    types = ", ".join(f"typeof({a.name})" for a in args)
    # TEMP: not written into a database file (UDFs are not persisted, so a stored macro
    # would fail after reopening), and nothing is left behind in read-only databases.
    con.execute(f"CREATE OR REPLACE TEMP MACRO {prefix}_{verb}({params}) AS "
                f"{_internal(prefix, verb)}({values}, {types})")


def _udf(con, name: str, fn: Callable, params: list[str], returns: str, **kwargs: Any) -> None:
    # DuckDB reads the arity from the signature; the wrappers take *args
    fn.__signature__ = inspect.Signature(
        [inspect.Parameter(f"arg{i}", inspect.Parameter.POSITIONAL_ONLY) for i in range(len(params))])
    try:
        con.remove_function(name)
    except duckdb.InvalidInputException:  # not registered on this connection yet
        pass
    try:
        con.create_function(name, fn, params, returns, null_handling="special", **kwargs)
    except duckdb.CatalogException as exc:
        # UDFs belong to the database: another connection of it (e.g. the one this cursor came
        # from) registered this name, and only that connection may remove it. Keep its UDF.
        if "already exists" not in str(exc):
            raise


def register(con: duckdb.DuckDBPyConnection, *, prefix: str = "rankfold",
             log_path: str | None = None) -> list[str]:
    """Add rankfold's SQL functions to the DuckDB connection ``con``; returns their names.

    Parameters
    ----------
    con : a DuckDB connection. The internal UDFs belong to its database (visible from
        cursors); the public macros are TEMP, so register each connection that calls them.
        Registering again replaces the functions.
    prefix : the common prefix of every function name (default ``rankfold``).
    log_path : also append every rebuild-log record to this JSON Lines file (records always go
        to the ``rankfold.rebuild`` logger).
    """
    if not isinstance(prefix, str) or re.fullmatch(r"[a-z][a-z0-9_]*", prefix) is None:
        raise InvalidInputError(
            f"The 'prefix' parameter of register must be a lowercase SQL identifier such as "
            f"'rankfold'. Got {prefix!r} instead.")
    types = lambda args: ["VARCHAR"] * len(args)  # noqa: E731  (typeof() strings)
    for verb, (fn, returns) in _cell_udfs(prefix, log_path).items():
        _udf(con, _internal(prefix, verb), fn, [a.udf_type() for a in _CELL_ARGS] + types(_CELL_ARGS),
             returns, type="arrow")
        _macro(con, prefix, verb, _CELL_ARGS)
    _udf(con, _internal(prefix, "row"), _row_udf(prefix, log_path),
         [a.udf_type() for a in _ROW_ARGS] + types(_ROW_ARGS), f"{_ROW_STRUCT}[]", type="arrow")
    _macro(con, prefix, "row", _ROW_ARGS)
    _udf(con, _internal(prefix, "info"), _info_udf(prefix), ["VARCHAR"] + types(_INFO_ARGS), _INFO_TYPE)
    _macro(con, prefix, "info", _INFO_ARGS)
    _udf(con, _internal(prefix, "compress"), _compress_udf(prefix, con),
         [a.udf_type() for a in _COMPRESS_ARGS] + types(_COMPRESS_ARGS), _INFO_TYPE,
         side_effects=True)
    _macro(con, prefix, "compress", _COMPRESS_ARGS)
    _udf(con, _internal(prefix, "sealed"), _sealed_udf(prefix), ["VARCHAR", "BIGINT"], "BOOLEAN",
         type="arrow", side_effects=True)
    for verb, args in _TABLE_ARGS.items():
        _udf(con, _internal(prefix, f"{verb}_sql"), _table_udf(prefix, verb, con),
             [a.udf_type() for a in args] + types(args), "VARCHAR")
        _table_macro(con, prefix, verb)
    for verb in FUNCTIONS:
        _describe(con, prefix, verb, table=verb in _TABLE_ARGS)
    return [f"{prefix}_{verb}" for verb in FUNCTIONS]
