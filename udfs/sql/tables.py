"""Table functions over archives: SQL text generated for one request, run by ``query()``.

DuckDB 2.0.1 has no Python table functions (duckdb-notes.md section 3), so each table function
is a TEMP table macro ``FROM query(<prefix>__<verb>_sql(...))``: the UDF runs at bind time
(twice per query), checks its arguments and returns the SQL of the answer.

* ``scan``: narrow SQL over the row files for the requested numeric columns only, in the
  ``array_inner_product`` style (the basis values of a row form one DOUBLE[c] list, each
  column is its offset plus one inner product with its weights as a constant list), so bind
  cost follows the request, not the archive's width. Anchor rows and exact cells come in by
  LEFT JOINs only when the request touches them. Predicates on key columns reach the Parquet
  scan (DuckDB pushes them below the joins).
* ``aggregate``, ``covariance``, ``correlation``: answered in Python by
  ``store.aggregate`` (on a cursor of the registering connection), handed back through a
  Parquet file in a temporary folder (see ``table_sql``).
  A result is cached per request and archive version (the manifest digest), so the second
  bind costs nothing and an append or overwrite is seen by the next query.
* ``column_errors``, ``row_errors``: the error ledger as tables, straight from the Parquet files.
"""

from __future__ import annotations

import atexit
import os
import shutil
import tempfile
import threading
from collections import OrderedDict
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from ..errors import InvalidInputError
from ..store import aggregate as agg
from ..store import layout
from ..store.integrity import read_parquet_sql
from ..store.reader import ArchiveReader
from ..store.row_differences import signed_code_sql
from ..store.sql_rebuild import basis_value_sql, derived_value_sql, row_bound_sql, served_sql, stored_bound_sql
from ..store.sql_text import quote_identifier
from ..store.table_schemas import PACKED_NUMBERS, REPEATED

__all__ = ["scan_sql", "table_sql", "column_errors_sql", "row_errors_sql", "ResultCache",
           "sweep_spools"]

BOUND = "_rf_bound"
BOUND_MODES = ("row", "cell", "none")


def scan_sql(reader: ArchiveReader, columns: Any = None, bounds: str = "row",
             predicate: str | None = None, con=None, sealed: str | None = None) -> str:
    """SELECT of the rebuilt table: exact columns, the requested numeric columns (all when
    None), then ``_rf_bound`` (the largest cell bound of the row over those columns; with
    ``bounds='cell'`` one ``<column>_bound`` per column instead; 'none': no bound) and
    ``_rf_row`` (the row's 0-based position). Values and bounds are those of
    ``ArchiveReader.rebuild`` up to floating-point rounding, which the slack term covers.
    ``predicate`` (SQL on key columns) filters the row files before anything is rebuilt: DuckDB
    pushes plain comparisons of a key column with constants (=, <, BETWEEN, IN) from an outer
    WHERE into the Parquet scan, but evaluates other filters (e.g. ``id % 10 = 3``) only after
    every row has been rebuilt (measured: 4.7 s instead of 0.5 s for 10% of 100,000 x 300).

    ``sealed``: the SQL function that checks each row group as DuckDB reads it
    (``aggregate.rows_source_sql``). Then the only stored columns served as they are, and so
    the only ones DuckDB can filter on inside the Parquet scan before that check, are
    ``_rf_row`` and the key columns (checked before the query): basis columns are served as
    ``value * 1.0`` (the same double), which DuckDB 2.0.1 does not push into the scan."""
    if bounds not in BOUND_MODES:
        raise InvalidInputError(f"bounds must be one of {list(BOUND_MODES)}; got {bounds!r}.")
    names = reader.resolve_columns(columns)
    if len(set(names)) != len(names):
        raise InvalidInputError(f"columns lists a column twice: {names}. Name each column once.")
    model = reader.model  # the values and bounds below are generated from it (store/sql_rebuild.py)
    c = len(model.basis_names)
    exact_cols = [f["name"] for f in reader.manifest["schema"] if f["role"] == "exact"]
    col_idx = np.array([model.column_index[n] for n in names], np.int64)
    is_basis = model.is_basis[col_idx] if col_idx.size else np.zeros(0, bool)
    derived = [s for s in range(len(names)) if not is_basis[s]]
    inner = [f"r.{layout.ROW_ID}"] + [f"r.{quote_identifier(n)}" for n in exact_cols]
    if derived and c:
        fs = [basis_value_sql(reader.model, t) for t in range(c)]
        inner.append(f"[{', '.join(fs)}]::DOUBLE[{c}] AS __f")
        inner.append(f"[{', '.join(f'abs({e})' for e in fs)}]::DOUBLE[{c}] AS __fa")
    if model.row_ledger:  # without: every bound is the column's (FittedModel.row_ledger)
        inner.append(f"r.{layout.ROW_ERR_MAX} AS __rowmax")
    for s in range(len(names)):
        if is_basis[s]:
            inner.append(f"r.{quote_identifier(names[s])} AS __b{s}")
        elif np.isfinite(model.residual_step[col_idx[s]]):
            code = signed_code_sql('r.' + quote_identifier(layout.CODE_PATTERN.format(int(col_idx[s]))),
                                   bool(model.difference[col_idx[s]]))
            inner.append(f"{code} AS __q{s}")
    joins = ""
    use_anchors = bool(model.anchor_positions.size) and bool(derived)
    if use_anchors:
        anchor = read_parquet_sql([reader.path / layout.table_file(reader.manifest, layout.ANCHORS)])
        picked = ", ".join(f"{quote_identifier(names[s])} AS __av{s}" for s in derived)
        inner.append("a.__anchor")
        inner += [f"a.__av{s}" for s in derived]
        joins += (f" LEFT JOIN (SELECT {layout.ROW_ID}, true AS __anchor, {picked} FROM "
                  f"{anchor}) a ON r.{layout.ROW_ID} = a.{layout.ROW_ID}")
    with_cells = [s for s in derived if np.isin(col_idx[s], reader.cell_cols).any()] if reader.cell_rows.size else []
    if with_cells:
        cells = read_parquet_sql([reader.path / layout.table_file(reader.manifest, layout.CELLS)])
        wanted = ", ".join(str(int(col_idx[s])) for s in with_cells)
        parts = []
        for s in with_cells:
            j = int(col_idx[s])
            parts.append(f"bool_or({layout.COLUMN_ID} = {j}) AS __ch{s}")
            parts.append(f"max(value) FILTER (WHERE {layout.COLUMN_ID} = {j}) AS __cv{s}")
        inner += [f"x.__ch{s}" for s in with_cells] + [f"x.__cv{s}" for s in with_cells]
        joins += (f" LEFT JOIN (SELECT {layout.ROW_ID}, {', '.join(parts)} FROM {cells} "
                  f"WHERE {layout.COLUMN_ID} IN ({wanted}) GROUP BY {layout.ROW_ID}) x "
                  f"ON r.{layout.ROW_ID} = x.{layout.ROW_ID}")
    outer = [quote_identifier(n) for n in exact_cols]
    middle: list[str] = []  # stored value __v<s> and bound __e<s> of each derived column
    widened: list[str] = []
    bound_exprs = []
    per_cell = bounds == "cell"
    for s, name in enumerate(names):
        j = int(col_idx[s])
        if is_basis[s]:
            served = f"CAST(__b{s} AS DOUBLE)"
            outer.append(f"{'(' + served + ' * 1.0)' if sealed else served} AS {quote_identifier(name)}")
            bound_exprs.append("0.0::DOUBLE")
            continue
        lin, mag = derived_value_sql(model, j, s)
        raw = stored_bound_sql(model, j, mag)
        middle += [f"{lin} AS __v{s}", f"{raw} AS __e{s}"]
        outer_val, outer_bound = served_sql(model, j, f"__v{s}", f"__e{s}")
        served_extra = model.kind[j] == "i"  # the served bound may exceed the stored one
        over_v, over_b = [], []
        if use_anchors:
            over_v.append(f"WHEN __anchor THEN CAST(__av{s} AS DOUBLE)")
            over_b.append("WHEN __anchor THEN 0.0")
        if s in with_cells:
            over_v.append(f"WHEN __ch{s} THEN __cv{s}")
            over_b.append(f"WHEN __ch{s} THEN 0.0")
        if np.isfinite(model.residual_step[j]):
            # a NULL code is a NULL cell (encode pass): NULL, bound 0
            over_v.append(f"WHEN __q{s} IS NULL THEN NULL")
            over_b.append(f"WHEN __q{s} IS NULL THEN 0.0")
        if over_v:
            outer_val = f"CASE {' '.join(over_v)} ELSE {outer_val} END"
            outer_bound = f"CASE {' '.join(over_b)} ELSE {outer_bound} END"
        outer.append(f"{outer_val} AS {quote_identifier(name)}")
        bound_exprs.append(outer_bound if per_cell else None)
        if served_extra:
            widened.append(outer_bound)
    named = [(n, f"the key column {n!r}") for n in exact_cols]
    named += [(n, f"the rebuilt column {n!r}") for n in names]
    named += {"row": [(BOUND, "the row bound")], "none": [],
              "cell": [(f"{n}_bound", f"the bound of {n!r}") for n in names]}[bounds]
    named.append((layout.ROW_ID, "the row position"))
    agg.check_result_names(named, "This scan", "Use bounds := 'row' (one _rf_bound per row), scan "
                           "those columns separately, or rename the source column and compress again.")
    if bounds == "row":
        row = row_bound_sql(model, col_idx[derived], derived, use_anchors)
        if widened:  # integer and float32 cells: their served bounds, beside the stored ones
            row = f"greatest({row}, {', '.join(f'CAST({w} AS DOUBLE)' for w in widened)})"
        outer.append(f"{row} AS {BOUND}")
    elif bounds == "cell":
        outer += [f"CAST({b} AS DOUBLE) AS {quote_identifier(n + '_bound')}" for n, b in zip(names, bound_exprs)]
    outer.append(layout.ROW_ID)
    # codes stored as row differences decode over whole chunks: before the predicate filters
    # (which then picks the chunks to decode)
    condition = agg.check_where(reader, con, predicate) if predicate is not None else None
    source, _ = agg.decoded_rows_sql(reader, col_idx[derived] if derived else col_idx[:0], sealed,
                                     condition, con)
    if condition is not None:
        source = f"(SELECT * FROM {source} WHERE {condition})"
    stored = f"(SELECT {', '.join(inner)} FROM {source} r{joins})"
    if middle:
        stored = f"(SELECT *, {', '.join(middle)} FROM {stored})"
    return f"SELECT {', '.join(outer)} FROM {stored}"


def column_errors_sql(reader: ArchiveReader) -> str:
    wanted = ["name", "position", "type", "role", "valid", "nulls", "mean", "std", "ledger_scale",
              "err_max", "err_l2", "err_sum", "err_cells", "rel_rms", "tolerance", "residual_step"]
    path = reader.path / layout.table_file(reader.manifest, layout.COLUMNS)
    reader.check_table(layout.COLUMNS)  # DuckDB reads the columns table again: unchanged?
    if reader.columns_packed:  # the stored forms of table_schemas.pack_columns_table / by_field_columns_table
        items = _unpacked_sql(wanted, reader.columns_stored_fields)
        return f"SELECT {', '.join(items)} FROM {read_parquet_sql([path], file_row_number=True)}"
    have = set(reader.columns_table.column_names)
    # shift, scale and ledger_scale are stored once where they repeat mean or std (table_schemas.REPEATED)
    cols = ", ".join(f"coalesce({n}, {REPEATED[n]}) AS {n}" if n in REPEATED else n for n in wanted if n in have)
    return f"SELECT {cols} FROM {read_parquet_sql([path])}"


def _unpacked_sql(wanted: list[str], stored: list[str] | None = None) -> list[str]:
    """SELECT items giving the fields ``wanted`` of a packed columns table read with its file
    row numbers: what ``table_schemas.unpack_columns_table`` does, in SQL (DuckDB lists count
    from 1; the same IEEE operations, so the same bits). ``stored``: the stored table's field
    names; without ``numbers`` it is stored by field (``table_schemas.by_field_columns_table``:
    an entry is its own field, NULL in every row where the field is left out)."""
    packed = stored is None or "numbers" in stored

    def entry(name: str) -> str:
        if packed:
            return f"numbers[{PACKED_NUMBERS.index(name) + 1}]"
        return quote_identifier(name) if name in stored else "CAST(NULL AS DOUBLE)"

    std, l2, cells, step = (entry(n) for n in ("std", "err_l2", "err_cells", "residual_step"))
    tol = f"coalesce({entry('tolerance')}, {entry('tolerance_over_std')} * {std})"
    expressions = {
        "tolerance": tol,
        "position": "CAST(file_row_number AS INTEGER)",
        "rel_rms": f"coalesce({entry('rel_rms')}, CASE WHEN {std} > 0 THEN {l2} / sqrt(greatest({cells}, 1.0)) "
                   f"/ {std} ELSE CAST('NaN' AS DOUBLE) END)",
        "residual_step": f"CASE WHEN {step} IS NULL THEN 2.0 * ({tol}) WHEN isnan({step}) THEN NULL ELSE {step} END",
    }
    items = []
    for name in wanted:
        if name in expressions:
            value = expressions[name]
        elif name in REPEATED:
            value = f"coalesce({entry(name)}, {entry(REPEATED[name])})"
        elif name in ("valid", "nulls", "nans", "infinities", "err_cells"):
            value = f"CAST({entry(name)} AS BIGINT)"
        elif name in PACKED_NUMBERS:
            value = entry(name)
        else:
            value = name
        items.append(f"{value} AS {name}")
    return items


def row_errors_sql(reader: ArchiveReader) -> str:
    key = reader.manifest.get("key")
    keys = f"{quote_identifier(key)}, " if key else ""
    figures = [layout.ROW_ERR_MAX, layout.ROW_ERR_L2]
    if not reader.model.row_ledger:  # no row figures stored: every bound is the column's
        figures = ["CAST(NULL AS FLOAT)"] * 2
    return (f"SELECT {layout.ROW_ID}, {keys}{figures[0]} AS err_max_scaled, "
            f"{figures[1]} AS err_l2_scaled FROM {agg.rows_source_sql(reader, codes=np.zeros(0, np.int64))}")


_SPOOL: dict[str, Any] = {}
_SPOOL_LOCK = threading.Lock()
_SPOOL_PREFIX = "rankfold-sql-"


def _spool_dir() -> Path:
    with _SPOOL_LOCK:
        if "dir" not in _SPOOL:  # the pid in the name lets sweep_spools find dead owners
            _SPOOL["dir"] = Path(tempfile.mkdtemp(prefix=f"{_SPOOL_PREFIX}{os.getpid()}-"))
            _SPOOL["count"] = 0
            atexit.register(shutil.rmtree, _SPOOL["dir"], True)
        _SPOOL["count"] += 1
        return _SPOOL["dir"] / f"result-{_SPOOL['count']:06d}.parquet"


def table_sql(table: pa.Table) -> str:
    """A SELECT that gives ``table`` back: the table is written to a Parquet file in a
    temporary folder of this process (removed at exit). Measured on 50 groups x 600 result
    columns: a VALUES list of typed literals took 2.1 s to bind and run, the file 0.01 s."""
    path = _spool_dir()
    pq.write_table(table, path)
    return f"SELECT * FROM {read_parquet_sql([path])}"


def sweep_spools(directory: str | os.PathLike | None = None) -> list[str]:
    """Remove the spool folders of result files left by processes that ended without their
    exit handler (killed): ``rankfold-sql-<pid>-*`` in the temporary folder whose pid no
    longer runs. Returns the folders removed. Spools of running processes are kept."""
    base = Path(directory or tempfile.gettempdir())
    removed = []
    for entry in base.glob(f"{_SPOOL_PREFIX}*-*"):
        pid = entry.name[len(_SPOOL_PREFIX):].split("-", 1)[0]
        if not pid.isdigit() or not entry.is_dir() or entry.is_symlink() or _running(int(pid)):
            continue
        shutil.rmtree(entry, ignore_errors=True)
        if not entry.exists():  # another user's folder stays
            removed.append(str(entry))
    return removed


def _running(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # another user's process
        return True
    return True


class ResultCache:
    """The last few generated statements, keyed by request and archive version (the
    manifest's digest, ``ArchiveReader.version``: an append or overwrite makes a new key), so
    the second bind of one query costs nothing and no query sees an older version's answer."""

    def __init__(self, size: int = 16):
        self._items: OrderedDict = OrderedDict()
        self._size = size
        self._lock = threading.Lock()

    def clear(self) -> None:
        """Forget every result (benchmarks clear it so that each run computes its answer)."""
        with self._lock:
            self._items.clear()

    def get(self, key, make):
        with self._lock:
            if key in self._items:
                self._items.move_to_end(key)
                return self._items[key]
        value = make()
        with self._lock:
            self._items[key] = value
            while len(self._items) > self._size:
                self._items.popitem(last=False)
        return value
