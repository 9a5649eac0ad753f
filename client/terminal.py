"""A one-line progress bar for long passes, drawn on a terminal stream.

It takes the dicts of ``rankfold.udfs.passes.progress`` (``stage``, ``rows_done``,
``rows_total``, ``rows_per_second``, ``seconds``, ``done``) and redraws one line in place::

    verify   [##########..........]  52%  1,048,576 / 2,000,000 rows  812,345 rows/s  0:01 left

When the total is not known yet (the profile pass learns it), the line shows rows and speed only.
The bar draws only when the stream is a terminal, so pipes and log files never receive it.
"""

from __future__ import annotations

import math
import shutil
import sys
import time
from typing import Any, TextIO

__all__ = ["ProgressBar", "format_seconds", "render_table", "terminal_width", "format_value",
           "format_bound", "format_with_bound"]

_WIDTH = 20


def format_seconds(seconds: float) -> str:
    """``0:07``, ``3:05``, ``1:02:09``."""
    seconds = max(0, int(round(seconds)))
    hours, rest = divmod(seconds, 3600)
    minutes, secs = divmod(rest, 60)
    return f"{hours}:{minutes:02d}:{secs:02d}" if hours else f"{minutes}:{secs:02d}"


class ProgressBar:
    """Callable progress sink. ``enabled=None`` means: draw only if ``stream`` is a terminal.

    Redraws at most every ``interval`` seconds (and always when a pass ends); ``close()``
    ends the line.
    """

    def __init__(self, stream: TextIO | None = None, *, enabled: bool | None = None,
                 interval: float = 0.1):
        self.stream = stream if stream is not None else sys.stderr
        if enabled is None:
            isatty = getattr(self.stream, "isatty", None)
            enabled = bool(isatty and isatty())
        self.enabled = enabled
        self.interval = interval
        self._last = 0.0
        self._open_line = False

    @staticmethod
    def line(report: dict[str, Any]) -> str:
        """The text of one progress line for one report dict."""
        stage = str(report.get("stage", ""))
        done = int(report.get("rows_done", 0))
        total = report.get("rows_total")
        rate = float(report.get("rows_per_second") or 0.0)
        parts = [f"{stage:<9}"]
        if total:
            fraction = min(1.0, done / total)
            filled = int(round(fraction * _WIDTH))
            parts.append(f"[{'#' * filled}{'.' * (_WIDTH - filled)}] {fraction * 100:3.0f}%")
            parts.append(f"{done:,} / {int(total):,} rows")
        else:
            parts.append(f"{done:,} rows")
        parts.append(f"{rate:,.0f} rows/s")
        if report.get("done"):
            parts.append(f"done in {format_seconds(float(report.get('seconds', 0.0)))}")
        elif total and rate > 0:
            parts.append(f"{format_seconds((int(total) - done) / rate)} left")
        return "  ".join(parts)

    def __call__(self, report: dict[str, Any]) -> None:
        if not self.enabled:
            return
        now = time.monotonic()
        if not report.get("done") and now - self._last < self.interval:
            return
        self._last = now
        text = self.line(report)
        self.stream.write("\r" + text + "\x1b[K")  # carriage return, then clear to end of line
        if report.get("done"):
            self.stream.write("\n")
            self._open_line = False
        else:
            self._open_line = True
        self.stream.flush()

    def close(self) -> None:
        if self.enabled and self._open_line:
            self.stream.write("\n")
            self.stream.flush()
            self._open_line = False


# -- tables for the terminal ----------------------------------------------------------------------
def terminal_width(default: int = 100) -> int:
    """Columns of the terminal on stdout (``default`` when stdout is not a terminal)."""
    return shutil.get_terminal_size((default, 24)).columns if sys.stdout.isatty() else default


def _decimals(bound: float) -> int:
    """Digits after the point that resolve ``bound`` to one more figure than its first: the
    display rounding (half a unit of the last digit) is then at most bound / 20."""
    return 1 - math.floor(math.log10(bound))


def _display_step(bound: Any) -> float:
    """Half a unit of the last printed digit of a value whose bound is ``bound`` (0 when the
    value prints in full)."""
    if bound is None or not isinstance(bound, float) or not math.isfinite(bound) or bound <= 0:
        return 0.0
    return 0.5 * 10.0 ** (-_decimals(bound))


def format_value(value: Any, bound: Any = None) -> str:
    """A value as text. Floats with a positive finite ``bound`` keep the digits the bound makes
    meaningful (bound 134 -> ``612``; bound 0.013 -> ``611.417``); with bound 0 (stored exactly)
    every digit; with no bound ten significant digits. NULL for None, ``nan``/``inf`` as such."""
    if value is None:
        return "NULL"
    if not isinstance(value, float):
        return str(value)
    if not math.isfinite(value):
        return str(value)
    if isinstance(bound, (int, float)) and math.isfinite(bound):
        if bound == 0:
            return repr(value)
        if bound > 0:
            d = _decimals(float(bound))
            return f"{value:.{d}f}" if d > 0 else f"{round(value, d):.0f}"
    return f"{value:.10g}"


def format_bound(bound: Any, extra: float = 0.0) -> str:
    """A bound as text with two significant figures, rounded UP after adding ``extra`` (the
    display rounding of the value it belongs to), so the printed figure is still a bound on the
    printed value."""
    if bound is None:
        return "NULL"
    if not isinstance(bound, (int, float)) or not math.isfinite(bound):
        return str(bound)
    total = float(bound) + extra
    if total == 0:
        return "0"
    exponent = math.floor(math.log10(total)) - 1
    unit = 10.0 ** exponent
    up = math.ceil(total / unit * (1 - 1e-15)) * unit
    while up < total:  # the division's rounding went down: one unit more
        up += unit
    return f"{up:.{max(0, -exponent)}f}" if exponent < 0 else f"{up:.0f}"


def format_with_bound(value: Any, bound: Any) -> tuple[str, str]:
    """``(value text, bound text)``: the value to the digits its bound makes meaningful and
    the bound rounded up to cover that display rounding too (``611.4`` and ``1.3`` for
    611.4234 and 1.2496)."""
    step = _display_step(float(bound)) if isinstance(bound, (int, float)) else 0.0
    return format_value(value, bound), format_bound(bound, step)


def _is_bound_name(name: str) -> bool:
    return name.endswith("_bound") or name == "bound"


def render_table(table: Any, *, limit: int | None = 40, width: int = 100,
                 precision: dict[str, Any] | None = None) -> str:
    """An Arrow table as text for the terminal, in rankfold's own layout.

    Narrow results: a header line, then one line per row (numbers right-aligned), then a line
    ``N rows``. Results wider than ``width`` characters: one block per row, each ``row i``
    followed by one ``name  value`` line per column. ``precision`` maps a column name to its
    bound -- a number (one bound for the column) or the name of a column holding each row's
    bound -- which sets the digits shown (:func:`format_value`); bound columns print rounded
    up (:func:`format_bound`) including the display rounding of the values they bound, so a
    printed bound holds for the printed value. At most ``limit`` rows are shown.
    """
    precision = dict(precision or {})
    shown = table if limit is None else table.slice(0, limit)
    names = list(table.schema.names)
    rows = shown.to_pylist()
    bound_of = {v: k for k, v in precision.items() if isinstance(v, str)}  # bound column -> value column
    # display rounding of values bounded by a column-wide figure: covered by any row bound shown
    row_extra = max((_display_step(float(v)) for v in precision.values()
                     if isinstance(v, (int, float))), default=0.0)

    def cell(row: dict[str, Any], name: str) -> str:
        value = row[name]
        hint = precision.get(name)
        if isinstance(hint, str):
            return format_value(value, row.get(hint))
        if hint is not None:
            return format_value(value, hint)
        if _is_bound_name(name) and isinstance(value, float):
            owner = bound_of.get(name)
            extra = _display_step(row.get(name)) if owner is not None else row_extra
            return format_bound(value, extra)
        return format_value(value)

    cells = [[cell(row, n) for n in names] for row in rows]
    numeric = [_is_number_type(f.type) for f in table.schema]
    widths = [max([len(n)] + [len(r[j]) for r in cells]) for j, n in enumerate(names)]
    if sum(widths) + 2 * max(len(names) - 1, 0) <= width:
        def line(values: list[str]) -> str:
            return "  ".join(v.rjust(w) if num else v.ljust(w)
                             for v, w, num in zip(values, widths, numeric)).rstrip()
        out = [line(names)] + [line(r) for r in cells]
    else:
        label = max((len(n) for n in names), default=0)
        out = []
        for i, r in enumerate(cells):
            if i:
                out.append("")
            out.append(f"row {i + 1}")
            out += [f"  {n.ljust(label)}  {v}" for n, v in zip(names, r)]
    total = table.num_rows
    footer = f"{total} row{'s' if total != 1 else ''}"
    if len(rows) < total:
        footer = f"showing {len(rows)} of {total} rows (--limit N shows more; --format csv or --output gives all)"
    out.append(footer)
    return "\n".join(out)


def _is_number_type(data_type: Any) -> bool:
    import pyarrow as pa

    return (pa.types.is_integer(data_type) or pa.types.is_floating(data_type)
            or pa.types.is_decimal(data_type))
