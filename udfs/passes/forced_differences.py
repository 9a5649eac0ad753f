"""Difference coding of residual codes, forced on chosen columns (tests and trials).

The row-difference predictor (``store/row_differences.py``, ``store.model.Coding.difference``)
is complete in the format and on every read path, but nothing chooses it by default yet: the
choice per column by measured trial belongs to the compress passes. Until then a caller can
force it for the columns it names, for one compress run in this thread::

    with forced_differences(["flow", "temp"]):    # or "all": every column with codes
        compress(source, path, max_abs_error=...)

Columns without residual codes (basis columns, columns without a tolerance) ignore it.
Append keeps what the archive stores.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from contextvars import ContextVar
import dataclasses

import numpy as np

from ..errors import InvalidInputError
from ..store.model import Coding

__all__ = ["forced_differences", "apply_forced_differences"]

_FORCED: ContextVar[tuple[str, ...] | str | None] = ContextVar("rankfold_forced_differences", default=None)


@contextmanager
def forced_differences(columns: Sequence[str] | str) -> Iterator[None]:
    """Inside: compress stores the residual codes of ``columns`` (names, or ``"all"``) as
    differences from the previous row's code."""
    if isinstance(columns, str) and columns != "all":
        raise InvalidInputError(f"forced_differences takes a list of column names or 'all'; got {columns!r}.")
    token = _FORCED.set(columns if isinstance(columns, str) else tuple(columns))
    try:
        yield
    finally:
        _FORCED.reset(token)


def apply_forced_differences(coding: Coding, names: list[str]) -> Coding:
    """``coding`` with the difference flags forced by :func:`forced_differences` (unchanged
    outside it). A named column that is not numeric is refused."""
    forced = _FORCED.get()
    if forced is None:
        return coding
    if forced == "all":
        flags = np.ones(len(names), bool)
    else:
        unknown = [n for n in forced if n not in names]
        if unknown:
            raise InvalidInputError(f"forced_differences names {unknown}, which are not numeric columns of "
                                    f"the source (numeric: {names[:20]}).")
        flags = np.isin(np.array(names, dtype=object), np.array(list(forced), dtype=object))
    return dataclasses.replace(coding, difference=flags)
