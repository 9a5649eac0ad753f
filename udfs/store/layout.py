"""File names and reserved column names of an archive directory.

An archive is a directory::

    manifest.json          format version, schema, options, seed, files with SHA-256, errors
    rows-00000.parquet     one row per source row, in source order: _rf_row, key columns,
                           basis columns (exact), _rf_err_max, _rf_err_l2 (row ledger, in
                           units of each column's ledger_scale, i.e. its standard deviation;
                           absent when every column has a tolerance: manifest row_ledger)
                           and the residual codes: one column _rf_q_<j> per coded column, or
                           every code of the row in one list _rf_codes (manifest packed_codes)
    columns.parquet        one row per numeric column: transform, offset and weights of the
                           mixing matrix, profile counts, column ledger (its numbers packed
                           into one list: ``table_schemas.pack_columns_table``)
    anchors.parquet        the anchor rows (R factor): _rf_row and every numeric column, exact
                           (written only when there are anchor rows)
    cells.parquet          cells stored exactly: _rf_row, _rf_column, value, reason (written
                           only when there are such cells; ``manifest_schema.OPTIONAL_TABLES``)

All of it is plain Parquet and JSON, readable by DuckDB or pyarrow without rankfold.
These are the names of a folder's first version; every later version (append, overwrite)
inserts its own token (``store.versions.versioned_name``), so no name is reused in a folder,
and the manifest lists the current names (``row_parts``, ``tables``, ``files``). The journal
``.rankfold-versions.json`` records superseded files until they are swept.
"""

from __future__ import annotations

MANIFEST = "manifest.json"
COLUMNS = "columns.parquet"
ANCHORS = "anchors.parquet"
CELLS = "cells.parquet"
ROWS_PATTERN = "rows-{:05d}.parquet"

FORMAT_NAME = "rankfold-archive"
FORMAT_VERSION = "1.0"

RESERVED_PREFIX = "_rf_"
ROW_ID = "_rf_row"
COLUMN_ID = "_rf_column"
ROW_ERR_MAX = "_rf_err_max"
ROW_ERR_L2 = "_rf_err_l2"
SCORE_PATTERN = "_rf_score_{}"
BASIS_PATTERN = "_rf_basis_{}"   # a basis column stored quantized (integer codes x step)
CODE_PATTERN = "_rf_q_{}"        # quantized residual codes of numeric column {position}
PACKED_CODES = "_rf_codes"       # all residual codes of a row as one list (manifest packed_codes)


def code_sql(column: str) -> str:
    """SQL that turns a stored residual code (zigzag, UTINYINT, USMALLINT or UINTEGER) back
    into its signed integer.

    Codes q are stored as u = 2q for q >= 0 and u = -2q - 1 for q < 0 (zigzag, common
    practice): small magnitudes of either sign keep the high bytes zero, so byte-stream-split
    coding compresses them (measured 11-14% smaller than signed integers with a dictionary at
    tolerances of 0.1 and 0.01 std).
    """
    v = f"CAST({column} AS BIGINT)"
    return f"(CASE WHEN {v} % 2 = 0 THEN {v} // 2 ELSE -(({v} + 1) // 2) END)"

# Rows per Parquet row group in row files: close to DuckDB's own default (122,880), so
# row-range reads and DuckDB's parallel scans both find several groups per file.
ROW_GROUP_ROWS = 131_072


def table_file(manifest: dict, name: str) -> str:
    """The file that holds the small table ``name`` (``COLUMNS``, ``ANCHORS``, ``CELLS``,
    ``blocks.parquet``) in this archive version: an append writes new versions of them under
    new names and lists them in the manifest's ``tables``; older archives use the plain names."""
    return (manifest.get("tables") or {}).get(name, name)
