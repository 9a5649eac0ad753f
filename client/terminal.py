"""A one-line progress bar for long passes, drawn on a terminal stream.

It takes the dicts of ``rankfold.udfs.build.progress`` (``stage``, ``rows_done``,
``rows_total``, ``rows_per_second``, ``seconds``, ``done``) and redraws one line in place::

    verify   [##########..........]  52%  1,048,576 / 2,000,000 rows  812,345 rows/s  0:01 left

When the total is not known yet (the profile pass learns it), the line shows rows and speed only.
The bar draws only when the stream is a terminal, so pipes and log files never receive it.
"""

from __future__ import annotations

import sys
import time
from typing import Any, TextIO

__all__ = ["ProgressBar", "format_seconds"]

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
