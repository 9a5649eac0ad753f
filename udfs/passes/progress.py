"""Progress reports of the compress passes.

A callback given as ``progress=`` receives one dict per row block and one when a pass ends::

    {"stage": "encode", "rows_done": 262144, "rows_total": 1000000 or None,
     "rows_per_second": 812345.6, "seconds": 0.32, "done": False}

Stages, in order: ``profile`` (column statistics and the sketch, one pass), ``select``
(only for links that keep anchor rows), ``refit`` and ``refit-select`` (only when refitting
without outliers), ``encode``. ``rows_total`` is None during the profile pass, which is where
the row count is learned.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from typing import Any

__all__ = ["Progress"]


class Progress:
    """Reports one pass to ``callback`` (a no-op when it is None)."""

    def __init__(self, callback: Callable[[dict[str, Any]], None] | None, stage: str,
                 total: int | None):
        self.callback = callback
        self.stage = stage
        self.total = total
        self.rows = 0
        self.started = time.perf_counter()

    def _send(self, done: bool) -> None:
        if self.callback is None:
            return
        seconds = time.perf_counter() - self.started
        self.callback({"stage": self.stage, "rows_done": self.rows, "rows_total": self.total,
                       "rows_per_second": self.rows / seconds if seconds > 0 else 0.0,
                       "seconds": seconds, "done": done})

    def advance(self, rows: int) -> None:
        self.rows += rows
        self._send(False)

    def finish(self) -> None:
        self._send(True)
