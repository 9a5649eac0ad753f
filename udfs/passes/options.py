"""Options of ``compress``: one validation, one sentence shape for every complaint."""

from __future__ import annotations

import decimal
import difflib
import numbers
import warnings
from dataclasses import dataclass, field, fields
from typing import Any, ClassVar

import duckdb
import numpy as np

from ..errors import InvalidInputError, UnknownOptionError
from ..factor.cur import COLUMN_METHODS, LINKS, ROW_METHODS

__all__ = ["CompressOptions", "METHODS", "TRANSFORMS", "DEFAULT_MAX_STD_ERROR", "RENAMED_OPTIONS"]

METHODS = ("cur", "svd")
RESIDUALS = ("auto", "quantized", "corrections")
BASIS_PRECISIONS = ("auto", "exact", "tolerance")
ROW_DIFFERENCES = ("off", "auto", "all")
TRANSFORMS = ("standardize", "center", "none")

# Rank chosen when neither a rank nor a target is set (compress no longer gets there: with
# neither, the default is the tolerance DEFAULT_MAX_STD_ERROR below): the Gavish-Donoho hard
# threshold (noise level estimated from the median singular value), capped at n / 10.
DEFAULT_RANK_CAP_DIVISOR = 10

# The safe default: with no rank and no target, every rebuilt value is guaranteed within this
# fraction of its column's standard deviation (max_std_error). Chosen by measurement (README,
# "Why the default is max_std_error=0.05"; benchmarks/default_level.py prints the table): from
# 0.01 to 0.05 the archives of the demo table and of three scikit-learn tables shrank by 3-47%,
# from 0.05 to 0.2 by at most 15% more while the error quadrupled.
DEFAULT_MAX_STD_ERROR = 0.05

# Old option names still accepted for one release, with a DeprecationWarning: their new names
# cannot be mistaken for lists of column names or row positions.
#: The options a manifest records under ``targets`` (not again under ``method.options``).
TARGET_OPTIONS = ("rel_error", "max_abs_error", "max_std_error", "target_bytes")
RENAMED_OPTIONS = {"columns": "column_method", "rows": "row_method"}

# sketch_rows="auto": the sketch reads a seeded sample of row groups (of Parquet files, or
# row-id ranges of a DuckDB table) holding at least
# max(AUTO_SKETCH_ROWS, AUTO_SKETCH_ROWS_PER_COLUMN * n) rows, when that is at most half the
# table; otherwise every row. 2^17 rows estimate a 100 x 100 Gram matrix to about 0.3% per
# entry (1 / sqrt(m) for independent rows; common practice); 256 rows per column keep the
# sample well above the n rows that the n x n matrix needs to have full rank at all.
AUTO_SKETCH_ROWS = 1 << 17
AUTO_SKETCH_ROWS_PER_COLUMN = 256


@dataclass
class CompressOptions:
    """Every option of ``rankfold.compress``, each checked on its own (type, range, allowed
    names). The rules between options and against the source's columns are in ``plan.py``
    (``CompressPlan``). See the README for their meaning."""

    # names of the options the caller passed with a value other than None (set by from_call)
    given: ClassVar[frozenset[str]] = frozenset()

    rank: int | None = None
    seed: int = 0
    method: str | None = None
    column_method: str = "pivoted_qr"
    row_method: str | None = None  # "qdeim" for the links that keep anchor rows
    link: str = "cx"
    transform: str = "standardize"
    n_columns: int | None = None
    n_rows: int | None = None
    replace: bool | None = None
    key: str | None = None
    exact_columns: tuple[str, ...] = ()
    overwrite: bool = False
    batch_rows: int = 131_072
    sketch_rows: Any = "auto"
    connection: Any = field(default=None, repr=False)
    progress: Any = field(default=None, repr=False)
    rel_error: Any = None
    max_abs_error: Any = None
    max_std_error: Any = None
    target_bytes: int | None = None
    residual: str = "auto"
    # auto: under a tolerance the basis columns are rounded to it or kept exactly, whichever a
    # trial of the real writer on a sample of rows measures smaller (passes/predictors.py);
    # rounding was smaller on real tables but 37% larger on the demo table, so neither fixed
    # choice is smaller everywhere. Without a tolerance, exact.
    basis_precision: str = "auto"
    # residual codes stored as differences from the previous row's: off by default (a SQL
    # filter written outside rankfold_scan then decodes whole chunks: DEVELOPERS.md, "Row
    # differences"); "auto": per column, where a trial measures it 10% smaller; "all"; or names
    row_differences: Any = "off"
    refit_outliers: bool | None = None
    executor: Any = field(default="local", repr=False)
    storage_options: dict | None = field(default=None, repr=False)

    @classmethod
    def from_call(cls, rank: Any, seed: Any, options: dict[str, Any]) -> "CompressOptions":
        known = {f.name for f in fields(CompressOptions)} - {"rank", "seed"}
        options = dict(options)
        for old, new in RENAMED_OPTIONS.items():
            if old in options:
                if new in options:
                    raise InvalidInputError(
                        f"compress got both {old!r} and {new!r}; {old!r} is the old name of "
                        f"{new!r}. Give only {new!r}."
                    )
                warnings.warn(f"The compress option {old!r} is now called {new!r} (a method, "
                              "not a list of names); the old name will be removed.",
                              DeprecationWarning, stacklevel=3)
                options[new] = options.pop(old)
        for name in options:
            if name not in known:
                close = difflib.get_close_matches(name, sorted(known | {"rank", "seed"}), n=1)
                hint = f" Did you mean {close[0]!r}?" if close else ""
                raise UnknownOptionError(
                    f"compress has no option {name!r}.{hint} Known options: rank, seed, "
                    + ", ".join(sorted(known)) + "."
                )
        opts = cls(rank=rank, seed=seed, **options)
        opts.given = frozenset(n for n, v in options.items() if v is not None) | (
            {"rank"} if rank is not None else set())
        opts._validate()
        return opts

    def _validate(self) -> None:
        self.rank = _positive_int("rank", self.rank, allow_none=True)
        if self.rank is None and not self.has_targets:
            # the safe default: every value within a fraction of its column's spread
            self.max_std_error = DEFAULT_MAX_STD_ERROR
        self.n_columns = _positive_int("n_columns", self.n_columns, allow_none=True)
        self.n_rows = _positive_int("n_rows", self.n_rows, allow_none=True)
        self.batch_rows = _positive_int("batch_rows", self.batch_rows, allow_none=False)
        if self.sketch_rows not in ("auto", "all"):
            if not _is_integer(self.sketch_rows) or self.sketch_rows < 1:
                raise InvalidInputError(
                    "The 'sketch_rows' option of compress must be 'auto', 'all' or a positive "
                    f"number of rows. Got {self.sketch_rows!r} instead."
                )
            self.sketch_rows = int(self.sketch_rows)
        if not _is_integer(self.seed) or self.seed < 0:
            raise InvalidInputError(
                f"The 'seed' option of compress must be a non-negative integer. Got {self.seed!r} instead."
            )
        self.seed = int(self.seed)  # a plain int for the manifest (JSON)
        if self.method is not None:
            _choice("method", self.method, METHODS)
        _choice("residual", self.residual, RESIDUALS)
        _choice("basis_precision", self.basis_precision, BASIS_PRECISIONS)
        if isinstance(self.row_differences, (list, tuple)):
            if not self.row_differences or not all(isinstance(n, str) for n in self.row_differences):
                raise InvalidInputError(
                    f"The 'row_differences' option of compress takes {', '.join(map(repr, ROW_DIFFERENCES))} "
                    f"or a non-empty list of numeric column names; got {self.row_differences!r}.")
            self.row_differences = list(self.row_differences)
        else:
            _choice("row_differences", self.row_differences, ROW_DIFFERENCES)
        self.target_bytes = _positive_int("target_bytes", self.target_bytes, allow_none=True)
        for option in ("max_abs_error", "max_std_error", "rel_error"):
            setattr(self, option, _target(option, getattr(self, option)))
        _choice("column_method", self.column_method, COLUMN_METHODS)
        _choice("link", self.link, LINKS)
        self.row_method = self.row_method if self.row_method is not None else "qdeim"
        _choice("row_method", self.row_method, ROW_METHODS)
        _choice("transform", self.transform, TRANSFORMS)
        if self.refit_outliers is not None and not isinstance(self.refit_outliers, bool):
            raise InvalidInputError(
                f"The 'refit_outliers' option of compress must be True, False or None. Got {self.refit_outliers!r} instead."
            )
        if self.replace is not None and not isinstance(self.replace, bool):
            raise InvalidInputError(
                f"The 'replace' option of compress must be True, False or None. Got {self.replace!r} instead."
            )
        if isinstance(self.exact_columns, str):
            self.exact_columns = (self.exact_columns,)
        try:
            self.exact_columns = tuple(self.exact_columns)
        except TypeError:
            self.exact_columns = (self.exact_columns,)  # refused just below
        if self.progress is not None and not callable(self.progress):
            raise InvalidInputError(
                f"The 'progress' option of compress must be a callable taking one dict. Got {self.progress!r} instead."
            )
        if self.connection is not None and not isinstance(self.connection, duckdb.DuckDBPyConnection):
            raise InvalidInputError(
                "The 'connection' option of compress must be a DuckDB connection (duckdb.connect()) "
                f"that holds the table or query to compress. Got {type(self.connection).__name__} instead."
            )
        if self.storage_options is not None and not isinstance(self.storage_options, dict):
            raise InvalidInputError(
                f"The 'storage_options' option of compress must be a dict (fsspec options, e.g. "
                f"credentials). Got {self.storage_options!r} instead."
            )
        if self.key is not None and not isinstance(self.key, str):
            raise InvalidInputError(
                f"The 'key' option of compress must be one column name. Got {self.key!r} instead."
            )
        if not all(isinstance(name, str) for name in self.exact_columns):
            raise InvalidInputError(
                "The 'exact_columns' option of compress must be column names (strings). Got "
                f"{list(self.exact_columns)!r} instead."
            )

    @property
    def refits(self) -> bool:
        """Refit once without outliers: asked for, or by default with a tolerance."""
        return self.refit_outliers if self.refit_outliers is not None else self.has_tolerance

    @property
    def has_tolerance(self) -> bool:
        """A per-cell tolerance was asked for (max_abs_error and/or max_std_error)."""
        return self.max_abs_error is not None or self.max_std_error is not None

    @property
    def has_targets(self) -> bool:
        return any(v is not None for v in (self.rel_error, self.max_abs_error, self.max_std_error,
                                           self.target_bytes))

    @property
    def may_sample_sketch(self) -> bool:
        """The sketch may come from a sample of row groups: no error or size target and no
        refit, which need the full column statistics (or a second look at every row) before
        the encode pass."""
        return self.sketch_rows != "all" and not self.has_targets and not self.refits

    @property
    def sample_with_replacement(self) -> bool:
        """i.i.d. draws for the published textbook estimator, distinct draws otherwise."""
        return (self.link == "textbook") if self.replace is None else self.replace

    def recorded(self) -> dict[str, Any]:
        """The options as written into the manifest (no connection object). The error and size
        targets are not repeated here: the manifest's ``targets`` records them as asked (a
        per-column tolerance for 751 columns took 40 kB in each of the two places)."""
        return {f.name: _plain(getattr(self, f.name)) for f in fields(CompressOptions)
                if f.name not in ("connection", "overwrite", "progress", "executor",
                                  "storage_options") + TARGET_OPTIONS} | {
                    "exact_columns": list(self.exact_columns)}


def _plain(value: Any) -> Any:
    """JSON-ready copy: numpy numbers to Python numbers, mappings and sequences recursively."""
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, np.generic):
        return value.item()
    return value


def _is_integer(value: Any) -> bool:
    """True for Python and numpy integers (``numbers.Integral``), False for booleans."""
    return isinstance(value, numbers.Integral) and not isinstance(value, (bool, np.bool_))


def _positive_int(name: str, value: Any, *, allow_none: bool) -> int | None:
    """``value`` as a plain int (or None where allowed), or an error naming the option."""
    if value is None and allow_none:
        return None
    if not _is_integer(value) or value < 1:
        raise InvalidInputError(
            f"The {name!r} option of compress must be a positive integer"
            f"{' or None' if allow_none else ''}. Got {value!r} instead."
        )
    return int(value)


def _target(option: str, value: Any) -> float | dict[str, float] | None:
    """A per-column target as a positive float, or a non-empty mapping of column name to
    positive float (the names are checked against the source by ``CompressPlan``)."""
    if value is None:
        return None
    if isinstance(value, dict):
        if not value:
            raise InvalidInputError(
                f"The {option!r} option of compress got an empty mapping: name at least one "
                "column, or pass one number for every column, or drop the option."
            )
        wrong = [k for k in value if not isinstance(k, str)]
        if wrong:
            raise InvalidInputError(
                f"The {option!r} option of compress maps column names to numbers; these keys "
                f"are not names: {wrong!r}."
            )
        return {k: _positive_number(option, v) for k, v in value.items()}
    return _positive_number(option, value)


def _positive_number(option: str, value: Any) -> float:
    """``value`` as a positive finite float, or an error naming the option."""
    number = float(value) if isinstance(value, (numbers.Real, decimal.Decimal)) and not isinstance(
        value, (bool, np.bool_)) else float("nan")
    if not (number > 0 and np.isfinite(number)):
        raise InvalidInputError(
            f"The {option!r} option of compress must be a positive number (or a mapping of "
            f"column name to positive number). Got {value!r} instead."
        )
    return number


def _choice(name: str, value: Any, allowed: tuple[str, ...]) -> None:
    if value not in allowed:
        raise UnknownOptionError(
            f"The {name!r} option of compress must be one of {', '.join(map(repr, allowed))}. "
            f"Got {value!r} instead."
        )
