"""The rebuild log: one structured record per rebuild request.

Each record goes to the standard ``logging`` logger ``rankfold.rebuild`` (level INFO, the
record as JSON in the message and as ``record.rankfold`` on the LogRecord) and, when a path
is given, is appended as one line to a JSON Lines file.
"""

from __future__ import annotations

import datetime as _dt
import json
import logging
import threading
from pathlib import Path
from typing import Any

__all__ = ["LOGGER_NAME", "RebuildLog"]

LOGGER_NAME = "rankfold.rebuild"
_logger = logging.getLogger(LOGGER_NAME)
_file_lock = threading.Lock()


def _summarize_rows(rows: Any) -> Any:
    if rows is None:
        return "all"
    if isinstance(rows, (list, tuple)) and len(rows) > 8:
        return {"count": len(rows), "first": list(rows[:8])}
    return rows


class RebuildLog:
    """Writes rebuild records for one archive."""

    def __init__(self, archive_id: str, archive_path: str, jsonl_path: str | Path | None = None):
        self.archive_id = archive_id
        self.archive_path = archive_path
        self.jsonl_path = Path(jsonl_path) if jsonl_path is not None else None

    def record(
        self,
        request: str,
        *,
        rows: Any,
        columns: list[str] | None,
        cells_rebuilt: int,
        cells_exact: int,
        largest_bound: float,
    ) -> dict[str, Any]:
        entry = {
            "time": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="milliseconds"),
            "archive_id": self.archive_id,
            "archive": self.archive_path,
            "request": request,
            "rows": _summarize_rows(rows),
            "columns": columns if columns is None or len(columns) <= 16 else {"count": len(columns)},
            "cells_rebuilt": int(cells_rebuilt),
            "cells_exact": int(cells_exact),
            "largest_bound": float(largest_bound) if largest_bound == largest_bound else None,
        }
        text = json.dumps(entry, default=str)
        _logger.info(text, extra={"rankfold": entry})
        if self.jsonl_path is not None:
            with _file_lock, open(self.jsonl_path, "a", encoding="utf-8") as handle:
                handle.write(text + "\n")
        return entry
