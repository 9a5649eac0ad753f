"""Writing Arrow tables out: Parquet or CSV files, CSV or JSON text, or an aligned text table.

Used by the command line (``rankfold rebuild``, ``rankfold query``) and usable from Python.
Files are never replaced unless ``overwrite=True``.
"""

from __future__ import annotations

import datetime as _dt
import io
import json
import math
from pathlib import Path
from typing import Any, BinaryIO

import pyarrow as pa

from rankfold.udfs.errors import ArchiveExistsError, InvalidInputError

__all__ = ["write_table", "table_to_csv", "table_to_json", "OUTPUT_SUFFIXES",
           "check_output_path"]

OUTPUT_SUFFIXES = {".parquet": "parquet", ".pq": "parquet", ".csv": "csv"}


def check_output_path(path: str | Path, *, overwrite: bool, suffixes: tuple[str, ...] | None = None,
                      what: str = "output file") -> Path:
    """Refuse a path that exists (unless ``overwrite``), whose folder is missing, or whose
    suffix is not one of ``suffixes``; return it as a Path."""
    out = Path(path)
    if suffixes is not None and out.suffix.lower() not in suffixes:
        raise InvalidInputError(
            f"Cannot tell the format of the {what} {out}: its name must end in "
            f"{' or '.join(suffixes)}."
        )
    if out.is_dir():
        raise InvalidInputError(f"The {what} {out} is a folder; give a file name.")
    if out.exists() and not overwrite:
        raise ArchiveExistsError(
            f"The {what} {out} already exists; choose another name or pass overwrite=True "
            "to replace it."
        )
    if not out.parent.exists():
        raise InvalidInputError(f"The folder of the {what} {out} does not exist; create it first.")
    return out


def write_table(table: pa.Table, path: str | Path, *, overwrite: bool = False) -> Path:
    """Write ``table`` to ``path``: Parquet (zstd) for ``.parquet``/``.pq``, CSV for ``.csv``."""
    out = check_output_path(path, overwrite=overwrite, suffixes=tuple(OUTPUT_SUFFIXES))
    kind = OUTPUT_SUFFIXES[out.suffix.lower()]
    try:
        if kind == "csv":
            import pyarrow.csv as pacsv

            pacsv.write_csv(table, out)
        else:
            import pyarrow.parquet as pq

            pq.write_table(table, out, compression="zstd")
    except OSError as exc:
        raise InvalidInputError(f"Cannot write {out}: {exc}. Check the path and permissions.") from None
    return out


def table_to_csv(table: pa.Table, sink: BinaryIO) -> None:
    """CSV with a header line, written to a binary stream."""
    import pyarrow.csv as pacsv

    pacsv.write_csv(table, sink)


def _plain(value: Any) -> Any:
    if isinstance(value, float) and not math.isfinite(value):
        return None if math.isnan(value) else ("inf" if value > 0 else "-inf")
    if isinstance(value, (_dt.date, _dt.datetime, _dt.time, _dt.timedelta)):
        return value.isoformat() if hasattr(value, "isoformat") else str(value)
    if isinstance(value, dict):
        return {k: _plain(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_plain(v) for v in value]
    if isinstance(value, bytes):
        return value.hex()
    return value


def table_to_json(table: pa.Table) -> str:
    """A JSON array of row objects (NaN as null, infinities as "inf"/"-inf", times in ISO 8601)."""
    return json.dumps([_plain(row) for row in table.to_pylist()], default=str)


def csv_text(table: pa.Table) -> str:
    buffer = io.BytesIO()
    table_to_csv(table, buffer)
    return buffer.getvalue().decode("utf-8")
