"""One plan per compress: the options checked together and against the source's columns,
once, before any pass reads a row.

``CompressOptions`` (``options.py``) checks each option on its own: type, range, allowed
names. ``CompressPlan`` adds what only the options together, and the source's schema, can
decide; it is the object every pass reads (``plan.rank``, ``plan.link``, ... as the options,
plus the source's ``numeric`` and ``passthrough`` columns). It is built in two steps:
``CompressPlan.from_call`` when ``compress`` is called (no path prepared, no source opened:
the rules between options), then ``for_source`` once the source's schema is known (column
names and the number of numeric columns), before the first pass.

Options given together. R: refused (``InvalidInputError``, or ``RankTooLargeError`` for a
size) before any row is read, unless the row count is needed; H: honoured, and the manifest's
``method`` entry records the rank and basis size used. An option counts as given when it is
passed with a value other than None.

==========================================  ==  ==================================================
given together                              do  what happens, and why
==========================================  ==  ==================================================
rank + rel_error                            R   rel_error chooses the rank
n_columns or n_rows + rel_error             R   rel_error chooses the basis, and grows it until met
target_bytes + rank, n_columns, n_rows or   R   target_bytes chooses the method, rank and basis
any other target
rank and/or n_columns + max_abs_error or    H   the basis size is fixed (cur: n_columns, else
max_std_error (n_columns alone: with the        2 * rank, at most the numeric columns; svd: rank
default max_std_error)                          scores); the residual is coded to meet the
                                                tolerance
n_rows + a tolerance + rank or n_columns    H   n_rows anchor rows (links that keep them)
n_rows without rank and n_columns           R   the basis is then chosen (maybe 0 columns, no
                                                anchor row), and the anchor rows with it
max_abs_error + max_std_error               H   the smaller tolerance of the two, per column
a tolerance + rel_error                     H   the coding meets the tolerance, the basis grows
                                                until rel_error is met
rank > numeric columns                      R   before reading: the schema gives the width
rank > rows; n_rows > rows (draws without   R   after the profile pass, the first moment the
replacement)                                    row count is known; nothing is written
n_columns > numeric columns (draws without  R   a basis holds distinct columns
replacement)
n_columns < rank (column_method pivoted_qr) R   c pivoted columns span at most rank c
method 'svd' + n_columns, n_rows,           R   svd keeps rank synthetic scores: no columns,
column_method, row_method, link, replace,       rows or draws to choose; its scores are always
basis_precision 'tolerance'                     rounded to a step below the tolerance
link 'cx' + row_method or n_rows            R   cx (C^+ A) keeps no anchor rows
link 'textbook' + column_method pivoted_qr  R   its 1/sqrt(s p) rescaling needs sampled columns
replace, with nothing drawn at random       R   pivoted_qr columns and qdeim rows draw nothing
residual other than 'auto', no tolerance    R   the residual coding exists to meet a tolerance
basis_precision 'tolerance', no tolerance   R   the basis step is twice the tolerance
row_differences other than 'off', no        R   only residual codes are stored as differences
tolerance
row_differences naming a column that is     R   before reading: the schema gives the names
not numeric
sketch_rows a number + any target (the      R   targets and the refit need every row's
default tolerance too) or refit_outliers        statistics before the encode pass
storage_options, no URL source or path      R   fsspec options of a URL: no effect on local files
key, exact_columns, per-column targets      R   when they name no column of the source; a
                                                per-column target must name a numeric column
                                                that is not kept exactly (key, exact_columns)
==========================================  ==  ==================================================

A rank above the row count is refused, not clamped: a clamped rank would give an archive of
another size and error than the one asked for, under a rank the caller believes was used;
the refusal names the limit, so the caller decides (the same rule as for the columns).
"""

from __future__ import annotations

import copy
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pyarrow as pa

from ..errors import InvalidInputError, NoNumericColumnsError, RankTooLargeError
from ..store import layout, remote
from .options import CompressOptions

__all__ = ["CompressPlan"]

# per-column targets: one number, or a mapping of numeric column name to number
PER_COLUMN_TARGETS = ("max_abs_error", "max_std_error", "rel_error")
# options that choose columns, rows or draws: meaningless for synthetic SVD scores
_CUR_ONLY = ("n_columns", "n_rows", "column_method", "row_method", "link", "replace")
# at most this many column names in a message (wide tables have 10^5 columns)
_NAMES_SHOWN = 20


def _is_numeric(data_type: pa.DataType) -> bool:
    return pa.types.is_integer(data_type) or pa.types.is_floating(data_type)


def _listed(names: list[str] | tuple[str, ...]) -> str:
    """Column names for a message: all of them, or the first ``_NAMES_SHOWN`` and a count."""
    shown = ", ".join(repr(n) for n in names[:_NAMES_SHOWN])
    more = len(names) - _NAMES_SHOWN
    return shown + (f" and {more} more" if more > 0 else "")


@dataclass
class CompressPlan(CompressOptions):
    """The options of one compress, checked together and against the source (rule table in
    the module docstring). ``numeric`` are the columns factored (in source order),
    ``passthrough`` the columns kept exactly (key, exact_columns and non-numeric columns),
    ``source`` the source's description for messages. Empty until ``for_source``."""

    numeric: tuple[str, ...] = field(default=(), repr=False)
    passthrough: tuple[str, ...] = field(default=(), repr=False)
    source: str = field(default="", repr=False)

    # -- step 1: the options together --------------------------------------------------------
    def _validate(self) -> None:
        super()._validate()
        self._refuse_conflicts()

    def _refuse_conflicts(self) -> None:
        """The rules between options that need no source (module docstring)."""
        given = self.given
        if self.rel_error is not None and self.rank is not None:
            raise InvalidInputError(
                "compress takes either 'rank' or 'rel_error', not both: rel_error chooses the "
                "rank. Drop one of them."
            )
        if self.rel_error is not None:
            sizes = [n for n in ("n_columns", "n_rows") if getattr(self, n) is not None]
            if sizes:
                raise InvalidInputError(
                    f"compress takes 'rel_error' without {' or '.join(map(repr, sizes))}: "
                    "rel_error chooses the basis columns (and anchor rows), and adds more until "
                    f"the error is met. Drop {' and '.join(map(repr, sizes))}, or replace "
                    "rel_error by max_std_error / max_abs_error (those keep a given basis size)."
                )
        if self.target_bytes is not None and (self.rank is not None or self.rel_error is not None
                                              or self.has_tolerance or self.n_columns is not None
                                              or self.n_rows is not None):
            raise InvalidInputError(
                "compress takes 'target_bytes' alone: it chooses the rank and method to fit the "
                "size. Drop 'rank', 'n_columns', 'n_rows', 'rel_error', 'max_abs_error' and "
                "'max_std_error', or drop 'target_bytes'."
            )
        if self.n_rows is not None and self.rank is None and self.n_columns is None:
            raise InvalidInputError(
                f"n_rows={self.n_rows} needs 'rank' or 'n_columns': without them the tolerance "
                "chooses the basis (possibly no column at all, then no anchor row is kept), and "
                "the anchor rows follow it. Give a rank or n_columns too, or drop 'n_rows'."
            )
        if self.basis_precision == "tolerance" and not self.has_tolerance:
            raise InvalidInputError(
                "basis_precision='tolerance' needs max_abs_error or max_std_error: the basis "
                "columns are rounded to steps of twice the tolerance."
            )
        if self.row_differences != "off" and not self.has_tolerance:
            raise InvalidInputError(
                f"row_differences={self.row_differences!r} needs max_abs_error or max_std_error: only "
                "residual codes, which a tolerance brings, are stored as row differences. Add a "
                "tolerance, or drop 'row_differences'.")
        if self.residual != "auto" and not self.has_tolerance:
            raise InvalidInputError(
                f"residual={self.residual!r} needs max_abs_error or max_std_error: the residual "
                "is coded only to meet a tolerance (with 'rank' alone, or rel_error or "
                "target_bytes, the archive keeps no tolerance). Add a tolerance, or drop 'residual'."
            )
        if self.method == "svd":
            cur_only = [n for n in _CUR_ONLY if n in given]
            if self.basis_precision == "tolerance":
                cur_only.append("basis_precision")
            if cur_only:
                raise InvalidInputError(
                    f"method='svd' keeps synthetic scores, not source columns or rows, so "
                    f"{', '.join(map(repr, cur_only))} would have no effect (with a tolerance "
                    "its scores are always rounded to a step below it). Drop "
                    f"{'it' if len(cur_only) == 1 else 'them'}, or use method='cur'."
                )
        if self.link == "cx" and ("row_method" in given or "n_rows" in given):
            raise InvalidInputError(
                "The 'cx' link (the default: every column a least-squares combination of the "
                "basis columns, C^+ A) keeps no anchor rows, so 'row_method' and 'n_rows' would "
                "have no effect. Pass link='optimal' (or 'skeleton', 'textbook') to keep anchor rows."
            )
        if self.link == "textbook" and self.column_method == "pivoted_qr":
            raise InvalidInputError(
                "The 'textbook' link needs sampled columns (its 1/sqrt(s p) rescaling uses the "
                "sampling probabilities); use column_method='length_squared' or 'leverage' with it."
            )
        rows_drawn = self.link != "cx" and self.row_method not in (None, "qdeim")
        if self.replace is not None and self.method != "svd" and not (
                self.column_method != "pivoted_qr" or rows_drawn):
            raise InvalidInputError(
                f"replace={self.replace} has no effect here: column_method='pivoted_qr' and "
                f"{'the cx link' if self.link == 'cx' else 'row_method=' + repr(self.row_method or 'qdeim')} "
                "draw nothing at random. Drop 'replace', or choose sampled columns "
                "(column_method='leverage' or 'length_squared') or sampled rows."
            )
        if isinstance(self.sketch_rows, int) and (self.has_targets or self.refits):
            raise InvalidInputError(
                f"sketch_rows={self.sketch_rows} cannot be combined with an error or size target "
                "(including the default max_std_error) or with refit_outliers: those need every "
                "row's statistics before the encode pass. Give 'rank' (alone it keeps no "
                "tolerance), or drop 'sketch_rows' (the sketch then reads every row)."
            )

    def check_locations(self, source: Any, path: Any) -> None:
        """``storage_options`` are fsspec options of a URL: refused when neither the source nor
        the archive path is one (they would have no effect)."""
        if self.storage_options is None or remote.is_url(path):
            return
        sources = source if isinstance(source, (list, tuple)) else [source]
        if not any(remote.is_url(s) for s in sources):
            raise InvalidInputError(
                "storage_options are file-system options of a URL source or archive path "
                "(s3://..., gs://...), but neither the source nor the path "
                f"{str(path)!r} is a URL, so they would have no effect. Drop storage_options."
            )

    # -- step 2: the source's columns ---------------------------------------------------------
    def for_source(self, schema: pa.Schema, description: str) -> "CompressPlan":
        """This plan for a source of this schema: column names checked (reserved, duplicate,
        key, exact_columns, per-column targets), the numeric columns chosen, and the sizes
        checked against their number. Reads no row."""
        names = schema.names
        bad = [n for n in names if n.startswith(layout.RESERVED_PREFIX)]
        if bad:
            raise InvalidInputError(
                f"Column names starting with {layout.RESERVED_PREFIX!r} are reserved by rankfold; "
                f"rename {bad} before compressing."
            )
        if len(set(names)) != len(names):
            raise InvalidInputError(f"The source has duplicate column names {names}; rename them.")
        present = set(names)
        for wanted in ([self.key] if self.key else []) + list(self.exact_columns):
            if not isinstance(wanted, str) or wanted not in present:
                raise InvalidInputError(
                    f"The source has no column {wanted!r} (named in key/exact_columns). Its "
                    f"columns are {names}."
                )
        exact = set(self.exact_columns) | ({self.key} if self.key else set())
        numeric = [f.name for f in schema if _is_numeric(f.type) and f.name not in exact]
        if not numeric:
            raise NoNumericColumnsError(
                f"The source {description} has no numeric column to compress (columns: "
                f"{names}). rankfold compresses integer and floating-point columns."
            )
        factored = set(numeric)  # a set: wide tables have 10^5 columns
        if isinstance(self.row_differences, list):
            unknown = [n for n in self.row_differences if n not in factored]
            if unknown:
                raise InvalidInputError(
                    f"The 'row_differences' option of compress names columns that are not numeric "
                    f"columns of the source {description}: {_listed(unknown)}. Numeric columns: "
                    f"{_listed(numeric)}. Name only these.")
        for option in PER_COLUMN_TARGETS:
            value = getattr(self, option)
            if isinstance(value, dict):
                unknown = [k for k in value if k not in factored]
                if unknown:
                    kept = [k for k in unknown if k in exact]
                    why = (f" ({_listed(kept)} {'is' if len(kept) == 1 else 'are'} kept exactly, "
                           "as key or exact_columns: no target applies)") if kept else ""
                    raise InvalidInputError(
                        f"The {option!r} option of compress names columns that are not numeric "
                        f"columns of the source {description}: {_listed(unknown)}{why}. Numeric "
                        f"columns: {_listed(numeric)}. Name only these."
                    )
        plan = copy.copy(self)
        plan.numeric = tuple(numeric)
        plan.passthrough = tuple(n for n in names if n not in factored)
        plan.source = description
        plan._check_sizes(rows=None, width=len(numeric))
        return plan

    # -- once the row count is known ------------------------------------------------------------
    def check_rows(self, rows: int, width: int) -> None:
        """Sizes against the table: ``rows`` counted by the profile pass, ``width`` the numeric
        columns factored (fewer than the schema's when integers beyond 2^53 are kept exactly)."""
        self._check_sizes(rows=rows, width=width)

    def _check_sizes(self, *, rows: int | None, width: int) -> None:
        limit = width if rows is None else min(rows, width)
        if self.rank is not None and self.rank > limit:
            counted = (f"{width} numeric columns" if rows is None
                       else f"{rows} rows x {width} numeric columns")
            raise RankTooLargeError(
                f"The 'rank' option of compress must be at most min(rows, numeric columns) = "
                f"{limit} for this source ({counted}). Got {self.rank} instead. Give a smaller "
                "rank, or a tolerance (max_std_error) and let compress choose."
            )
        if self.method == "svd":
            return
        columns_drawn = self.sample_with_replacement and self.column_method != "pivoted_qr"
        if self.n_columns is not None and self.n_columns > width and not columns_drawn:
            raise RankTooLargeError(
                f"The 'n_columns' option of compress must be at most the {width} numeric columns. "
                f"Got {self.n_columns} instead."
            )
        if (self.n_columns is not None and self.rank is not None and self.n_columns < self.rank
                and self.column_method == "pivoted_qr"):
            raise RankTooLargeError(
                f"The 'n_columns' option of compress must be at least the rank ({self.rank}): "
                f"{self.n_columns} pivoted columns span at most rank {self.n_columns}. Got "
                f"{self.n_columns} instead."
            )
        rows_drawn = self.sample_with_replacement and self.row_method != "qdeim"
        if rows is not None and self.n_rows is not None and self.n_rows > rows and not rows_drawn:
            raise RankTooLargeError(
                f"The 'n_rows' option of compress must be at most the {rows} source rows. Got "
                f"{self.n_rows} instead."
            )

    # -- what the passes read ----------------------------------------------------------------------
    @property
    def fixed_basis(self) -> bool:
        """A rank or basis size was given: a tolerance is then met by coding, not by size."""
        return self.rank is not None or (self.method != "svd" and self.n_columns is not None)

    def basis_sizes(self, method: str, width: int, max_columns: int) -> list[tuple[int, int]]:
        """Candidate (rank, basis columns) for a tolerance: the given size only, or every
        size from 0 to ``max_columns`` (cur: rank ceil(c / 2); svd: c scores of rank c)."""
        if method == "svd":
            if self.rank is not None:
                return [(self.rank, self.rank)]
            return [(c, c) for c in range(max_columns + 1)]
        if self.fixed_basis:
            c = self.n_columns if self.n_columns is not None else min(2 * self.rank, width)
            return [(self.rank if self.rank is not None else max(1, (c + 1) // 2), c)]
        return [((c + 1) // 2, c) for c in range(max_columns + 1)]

    def anchor_count(self, columns: int, rows: int) -> int:
        """Anchor rows for ``columns`` basis columns: n_rows when given, else 2c (at most the rows)."""
        return self.n_rows if self.n_rows is not None else min(2 * columns, rows)

    def per_column_target(self, option: str, names: list[str]) -> np.ndarray | None:
        """The target ``option`` as an array over ``names`` (inf where a mapping names no
        value). Keys were checked by ``for_source``; a key missing from ``names`` is a column
        kept exactly since (integers beyond 2^53), which meets any target."""
        value = getattr(self, option)
        if value is None:
            return None
        if not isinstance(value, dict):
            return np.full(len(names), float(value))
        out = np.full(len(names), np.inf)
        position = {n: j for j, n in enumerate(names)}
        for name, number in value.items():
            if name in position:
                out[position[name]] = float(number)
        return out
