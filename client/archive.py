"""The ``Archive`` facade: rebuild values, bounds and tables from a rankfold archive."""

from __future__ import annotations

from collections import namedtuple
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa

from rankfold.udfs.errors import InvalidInputError, RankfoldError
from rankfold.udfs.store import aggregate as _aggregate
from rankfold.udfs.store import layout, remote
from rankfold.udfs.store.manifest import manifest_text
from rankfold.udfs.store.manifest_schema import COLUMN_TOLERANCES
from rankfold.udfs.store.reader import ArchiveReader, Rebuilt
from rankfold.udfs.store.rebuild_log import RebuildLog

__all__ = ["Archive", "Cell", "Keys", "bound_column_names", "describe_guarantee", "describe_sizes",
           "error_warnings",
           "LARGE_ERROR_STD"]

Cell = namedtuple("Cell", ["value", "bound"])
Cell.__doc__ = """A rebuilt cell: ``value`` (float, or None where the source was NULL) and
``bound``, a guaranteed limit on |true value - value| (0.0 for cells stored exactly)."""


class Keys:
    """Address rows by the values of the archive's key column: ``archive.to_numpy(rows=Keys(["S-01"]))``."""

    def __init__(self, values: Any):
        self.values = list(values) if isinstance(values, (list, tuple, np.ndarray)) else [values]

    def __repr__(self) -> str:
        return f"Keys({self.values!r})"


class Archive:
    """A compressed table, opened read-only.

    Rows are 0-based positions in source order (int, slice or sequence of ints), or
    :class:`Keys` when the archive was compressed with ``key=``. Columns are numeric column
    names (a name or a list; None means all). Every rebuild request writes one record to the
    rebuild log (logger ``rankfold.rebuild``; also to ``log_path`` as JSON Lines if given).
    """

    def __init__(self, path: str | Path, *, log_path: str | Path | None = None, checksums: bool = False,
                 storage_options: dict | None = None):
        self.url = None
        if remote.is_url(path):  # object storage: read from a private local copy (store.remote)
            self._copy = remote.fetch(str(path), storage_options)
            self.url, path = str(path), self._copy.path
        self._reader = ArchiveReader(path, checksums=checksums)
        self.path = self._reader.path
        self._log = RebuildLog(self.manifest["archive_id"], str(self.path), log_path)

    # -- description ---------------------------------------------------------------------------
    @property
    def manifest(self) -> dict[str, Any]:
        return self._reader.manifest

    @property
    def shape(self) -> tuple[int, int]:
        """(rows, numeric columns)."""
        return (self._reader.rows_count, len(self._reader.numeric_columns))

    @property
    def nbytes(self) -> int:
        """Bytes of the whole archive version opened: every file the manifest lists plus
        ``manifest.json`` itself (its text as written, one field per line). ``target_bytes``
        is met in this measure, and ``manifest["achieved"]["bytes"]`` records it."""
        return _data_bytes(self.manifest) + len(manifest_text(self.manifest).encode("utf-8"))

    @property
    def source_bytes(self) -> int | None:
        """Size of the source this archive was compressed from, in bytes: its Parquet files
        as stored, or else its numeric columns as raw values (rows x bytes per value of each
        column's type); ``manifest["source_size"]["measure"]`` says which. None for archives
        written before the source's size was recorded."""
        recorded = self.manifest.get("source_size")
        return int(recorded["bytes"]) if isinstance(recorded, dict) else None

    @property
    def size_comparison(self) -> str:
        """One plain sentence: the archive's size beside its source's, and plainly whether
        the archive is smaller."""
        return describe_sizes(self.nbytes, self.manifest.get("source_size"))

    @property
    def numeric_columns(self) -> list[str]:
        return list(self._reader.numeric_columns)

    @property
    def basis_columns(self) -> list[str]:
        """Numeric columns kept exactly as the C factor (empty for method='svd')."""
        return [n for n in self._reader.model.basis_names if not n.startswith(layout.RESERVED_PREFIX)]

    @property
    def anchor_rows(self) -> list[int]:
        """Positions of the rows kept exactly as the R factor."""
        return [int(p) for p in self._reader.model.anchor_positions]

    @property
    def errors(self) -> dict[str, Any]:
        """The error summary measured when the archive was written."""
        return dict(self.manifest["errors"])

    @property
    def guarantee(self) -> str:
        """One plain sentence: what compress guaranteed for every rebuilt value (a tolerance
        relative to each column's standard deviation, an absolute tolerance, or none)."""
        return describe_guarantee(self.manifest)

    @property
    def warnings(self) -> list[str]:
        """Plain warnings about the archive's error, e.g. values off by a large part of their
        column's standard deviation (more than ``LARGE_ERROR_STD``); empty when none."""
        return error_warnings(self.manifest)

    def column_ledger(self) -> pa.Table:
        """Per numeric column: profile, transform, mixing and measured error (err_max, err_l2, rel_rms)."""
        return self._reader.columns_table

    def __repr__(self) -> str:
        m, n = self.shape
        return (f"<rankfold.Archive {self.path} {m} x {n}, {self.manifest['method']['kind']} "
                f"rank {self.manifest['method']['rank']}>")

    # -- rebuilds --------------------------------------------------------------------------------
    def _rebuild(self, request: str, rows: Any, columns: Any) -> Rebuilt:
        positions = (self._reader.locate(rows.values) if isinstance(rows, Keys)
                     else self._reader.resolve_rows(rows))
        result = self._reader.rebuild(columns=columns, positions=positions)
        largest = float(result.bounds.max()) if result.bounds.size else 0.0
        self._log.record(
            request,
            rows=rows.values if isinstance(rows, Keys) else _describe_rows(rows),
            columns=None if columns is None else result.columns,
            cells_rebuilt=int((~result.exact).sum()),
            cells_exact=int(result.exact.sum()),
            largest_bound=largest,
        )
        return result

    def to_numpy(self, rows: Any = None, columns: Any = None) -> np.ndarray:
        """Rebuilt values, float64, shape (rows, columns); NaN where the source was NULL or NaN."""
        return self._rebuild("to_numpy", rows, columns).values

    def cell_bounds(self, rows: Any = None, columns: Any = None) -> np.ndarray:
        """Per-cell guaranteed limit on |true - rebuilt|, same shape as ``to_numpy``; 0 for
        cells stored exactly (basis columns, anchor rows, NULL/NaN/inf cells)."""
        return self._rebuild("cell_bounds", rows, columns).bounds

    def cell(self, row: Any, column: str) -> Cell:
        """One rebuilt cell and its bound, as ``Cell(value, bound)``."""
        if not isinstance(column, str):
            raise InvalidInputError(f"cell() takes one column name; got {column!r}.")
        rows = Keys([row.values[0]]) if isinstance(row, Keys) else [row]
        result = self._rebuild("cell", rows, [column])
        value = None if result.nulls[0, 0] else float(result.values[0, 0])
        return Cell(value, float(result.bounds[0, 0]))

    def rebuild(self, rows: Any = None, columns: Any = None, *, bounds: bool = False) -> pa.Table:
        """The table for ``rows``: exact (key and non-numeric) columns plus the requested
        numeric columns rebuilt, in source column order and source types (integer columns
        rounded to the nearest integer), with NULLs where the source had NULLs.

        ``bounds=True`` puts a float64 column ``<column>_bound`` right after each rebuilt
        column (see :func:`bound_column_names` for a name the source already uses): per cell,
        a guaranteed limit on |true value - value as returned| (0 for cells stored exactly,
        NULL cells included, as in :meth:`cell_bounds` and SQL). For integer columns it covers the rounding: the true
        value is an integer within ``b`` of the unrounded value, so the rounded one is within
        ``floor(b + 1/2)``."""
        return self._table(self._rebuild("rebuild", rows, columns), bounds=bounds)

    def to_pandas(self, rows: Any = None, columns: Any = None, *, bounds: bool = False):
        """:meth:`rebuild` as a pandas DataFrame (pandas is optional: ``pip install pandas``)."""
        try:
            import pandas  # noqa: F401  (pyarrow's to_pandas needs it)
        except ImportError:
            raise RankfoldError(
                "Archive.to_pandas needs pandas, which is not installed. Install it with: "
                "python -m pip install pandas (or use Archive.rebuild, which returns an Arrow table)."
            ) from None
        return self.rebuild(rows, columns, bounds=bounds).to_pandas()

    def _table(self, result: Rebuilt, bounds: bool = False) -> pa.Table:
        wanted = set(result.columns)
        index = {n: t for t, n in enumerate(result.columns)}
        schema_names = [f["name"] for f in self.manifest["schema"]]
        bound_name = bound_column_names(result.columns, schema_names) if bounds else {}
        arrays, names = [], []
        for field in self.manifest["schema"]:
            name = field["name"]
            if field["role"] == "exact":
                arrays.append(result.rows.column(name))
            elif name in wanted:
                t, null = index[name], result.nulls[:, index[name]]
                arrays.append(_typed(result.values[:, t], null, field["type"]))
                if bounds:
                    names.append(name)
                    bound = result.bounds[:, t]
                    if pa.types.is_integer(_arrow_type(field["type"])):
                        bound = np.floor(bound + 0.5)  # rounding to the integer nearest the value
                    # a NULL cell is stored exactly: bound 0, as in cell_bounds() and SQL
                    arrays.append(pa.array(np.where(null, 0.0, bound), pa.float64()))
                    name = bound_name[name]
            else:
                continue
            names.append(name)
        return pa.table(arrays, names=names)

    # -- streaming and appending --------------------------------------------------------------------
    def iter_batches(self, rows: Any = None, columns: Any = None, *, batch_rows: int = 131_072,
                     bounds: bool = False):
        """Like :meth:`rebuild` (``bounds=True`` too), as a stream of tables of at most
        ``batch_rows`` rows (``rows``: None, a slice or positions): only the row groups of each
        batch are read, so a range of a large archive is exported with memory of one batch."""
        for result in self._reader.iter_rebuild(rows, columns, batch_rows=batch_rows):
            self._log.record("iter_batches", rows=f"{int(result.positions[0])}:{int(result.positions[-1]) + 1}"
                             if result.positions.size else None,
                             columns=None if columns is None else result.columns,
                             cells_rebuilt=int((~result.exact).sum()), cells_exact=int(result.exact.sum()),
                             largest_bound=float(result.bounds.max()) if result.bounds.size else 0.0)
            yield self._table(result, bounds=bounds)

    def append(self, source: Any, *, connection: Any = None, batch_rows: int = 131_072,
               progress: Any = None) -> "Archive":
        """Append the rows of ``source`` (same columns and types as the archive) without
        refactoring: they are rebuilt from their own basis values with the existing mixing
        matrix and verified like the original rows, so every bound holds for them too. Writes
        a new archive version atomically (this object keeps reading the old one) and returns
        it opened; see :attr:`refactor_due` for when the error has drifted past the target."""
        from rankfold.udfs.passes.append import append as _append

        path = _append(self.path, source, expected_id=self.manifest["archive_id"],
                       expected_version=int(self.manifest.get("version", 0)),
                       connection=connection, batch_rows=batch_rows, progress=progress)
        return Archive(path)

    @property
    def refactor_due(self) -> bool:
        """True when appended rows have drifted past the archive's error target (details in
        ``manifest["drift"]``): compress the whole table again."""
        return bool((self.manifest.get("drift") or {}).get("refactor_due", False))

    # -- aggregates from the factors ---------------------------------------------------------------
    def aggregate(self, columns: Any, func: str = "avg", by: Any = None, where: str | None = None,
                  *, rows: Any = None, estimates: bool = False) -> pa.Table:
        """sum, avg or count of numeric ``columns`` from the factors, never rebuilding rows.

        ``by``: key (exact) column name(s) to group by; ``where``: a SQL predicate on key
        columns (DuckDB syntax, e.g. ``"site IN ('A', 'B')"``); ``rows``: a contiguous range of
        row positions (slice), answered from the stored per row-group sums without a scan.
        Returns one row per group (ordered by the ``by`` columns): the ``by`` columns, then for
        each column its value and ``<column>_bound``, a hard bound on |true - value| (0 for
        counts); ``estimates=True`` adds ``<column>_estimate``, a typical error (an estimate,
        not a bound). A group whose column has only NULLs gives NULL (bound 0), as SQL does.
        The value is the aggregate of the values as stored (not of the clamped, rounded cells
        that :meth:`rebuild` serves) and its bound covers the aggregate of the TRUE values;
        it can differ from the sum of rebuilt cells by at most this bound plus their bounds.
        """
        return _aggregate.aggregate(self._reader, columns, func, by, where, rows=rows, estimates=estimates)

    def covariance(self, columns: Any = None) -> pa.Table:
        """Sample covariance (divisor rows - 1) of numeric ``columns`` (default: all) of the
        values as stored, as a long table (column_a, column_b, value, bound); ``bound`` is a
        hard bound on |true - value| (Cauchy-Schwarz over the column error norms). Computed
        from the c x c Gram matrix of the basis columns when that is the whole stored value,
        else (rank 0, quantized residuals, many exact cells) from one pass over the stored
        values. Columns with NULL, NaN or infinite values are refused (InvalidInputError)."""
        return _aggregate.pairs_table(*_aggregate.covariance(self._reader, columns))

    def correlation(self, columns: Any = None) -> pa.Table:
        """Pearson correlation of numeric ``columns`` (default: all) of the values as stored,
        as a long table (column_a, column_b, value, bound); ``bound`` is a hard bound on
        |true - value| from the angle each column's error can turn it by (at most 1 + |value|;
        2 with a NaN value where a column's stored spread cannot be told from its error)."""
        return _aggregate.pairs_table(*_aggregate.correlation(self._reader, columns))


# An error larger than this many standard deviations of its column changes what the value says
# about its row (half the typical spread of the column): the summary warns. Our choice; no source.
LARGE_ERROR_STD = 0.5


def describe_guarantee(manifest: dict[str, Any]) -> str:
    """What the archive's targets guarantee for every rebuilt value, as one sentence."""
    targets = manifest.get("targets") or {}
    relative, absolute = targets.get("max_std_error"), targets.get("max_abs_error")
    tail = "; each value's bound tells how close"
    if isinstance(relative, (int, float)):
        return (f"every rebuilt value is within {relative:g} x its column's standard deviation "
                f"of the true value (max_std_error={relative:g}){tail}")
    if isinstance(relative, dict):
        return (f"every rebuilt value of the {len(relative)} columns named in max_std_error is within "
                f"its column's fraction of the column's standard deviation of the true value{tail}")
    if isinstance(absolute, (int, float)):
        return f"every rebuilt value is within {absolute:g} of the true value (max_abs_error={absolute:g}){tail}"
    if isinstance(absolute, dict):
        return (f"every rebuilt value of the {len(absolute)} columns named in max_abs_error is within "
                f"its column's tolerance of the true value{tail}")
    if absolute == COLUMN_TOLERANCES:  # per column, the tolerances columns.parquet holds
        return (f"every rebuilt value of the columns named in max_abs_error is within its column's "
                f"tolerance of the true value{tail}")
    return ("no tolerance was asked for (a rank or relative-error target only): each value "
            "comes with a bound, but no limit on the bounds was guaranteed")


_SOURCE_MEASURES = {
    "parquet_files": "its Parquet files as stored",
    "raw_numeric": "its numeric columns as raw values (rows x bytes per value of each column's type)",
}


def describe_sizes(archive_bytes: int, source_size: dict[str, Any] | None) -> str:
    """The sentence of :attr:`Archive.size_comparison` (``source_size``: the manifest's
    record, ``{"bytes": int, "measure": "parquet_files" | "raw_numeric"}``, or None)."""
    head = f"The archive takes {archive_bytes:,} bytes (every file and the manifest counted)"
    if not isinstance(source_size, dict):
        return head + "; the source's size was not recorded (an archive from an older rankfold)."
    source = int(source_size["bytes"])
    measure = _SOURCE_MEASURES.get(source_size.get("measure"), "as recorded")
    head += f"; the source takes {source:,} bytes ({measure})"
    if archive_bytes < source:
        return head + f": the archive is {source / archive_bytes:.3g}x smaller."
    larger = ("the same size" if archive_bytes == source else
              f"{archive_bytes / source:.3g}x larger" if source > 0 else "larger")
    return head + (f": the archive is NOT smaller than its source ({larger}); keeping the "
                   "source as it is costs no more space and loses nothing.")


def _data_bytes(manifest: dict[str, Any]) -> int:
    return int(sum(f["bytes"] for f in manifest["files"]))


def error_warnings(manifest: dict[str, Any]) -> list[str]:
    """Warnings when the measured error is large compared with its column's spread."""
    worst = (manifest.get("errors") or {}).get("largest_error_over_std")
    if worst is None or not worst > LARGE_ERROR_STD:
        return []
    column = (manifest.get("errors") or {}).get("worst_column")
    return [f"some rebuilt values are off by up to {worst:.3g} standard deviations of their "
            f"column (more than {LARGE_ERROR_STD:g}; worst relative RMS in {column}): do not "
            "read single values of this archive without their bounds, or compress again "
            "with a tolerance (max_std_error) or a higher rank"]


def bound_column_names(columns: list[str], taken: list[str]) -> dict[str, str]:
    """Name of the bound column of each of ``columns``: ``<column>_bound``, with ``_2``,
    ``_3``... appended when the table already has a column of that name (``taken``)."""
    used, out = set(taken), {}
    for name in columns:
        candidate, n = f"{name}_bound", 1
        while candidate in used:
            n += 1
            candidate = f"{name}_bound_{n}"
        used.add(candidate)
        out[name] = candidate
    return out


def _describe_rows(rows: Any) -> Any:
    if rows is None:
        return None
    if isinstance(rows, slice):
        return f"{rows.start}:{rows.stop}:{rows.step}"
    if isinstance(rows, range):
        return f"{rows.start}:{rows.stop}:{rows.step}"
    positions = np.atleast_1d(np.asarray(rows))
    if positions.size > 100:  # a log record stays small: the count and the span
        return f"{positions.size} positions from {int(positions.min())} to {int(positions.max())}"
    return positions.tolist()


def _typed(values: np.ndarray, nulls: np.ndarray, type_name: str) -> pa.Array:
    data_type = _arrow_type(type_name)
    if pa.types.is_integer(data_type):
        info = np.iinfo(data_type.to_pandas_dtype())
        safe = np.where(np.isfinite(values), values, 0.0)
        ints = np.clip(np.rint(safe), info.min, info.max).astype(data_type.to_pandas_dtype())
        return pa.array(ints, data_type, mask=nulls)
    return pa.array(values, pa.float64(), mask=nulls).cast(data_type)


def _arrow_type(name: str) -> pa.DataType:
    return {"float": pa.float32(), "double": pa.float64(), "halffloat": pa.float16()}.get(
        name) or pa.type_for_alias(name)
