"""rankfold: archive wide numeric tables as exact column-row (CUR) factors in Parquet, and
rebuild any cell, row, column or table with an error bound that holds on the data as stored.

    >>> import rankfold
    >>> archive = rankfold.compress(table, "panel.rankfold")          # doctest: +SKIP
    >>> archive.cell(17, "pressure_03")                               # doctest: +SKIP
    Cell(value=101.32, bound=0.004)

Lossy storage: keep lossless originals wherever law, contract or safety requires them, and
check the bound before a rebuilt value drives a safety, health or money decision.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from rankfold.udfs.errors import *  # noqa: F401,F403  (the one exception hierarchy)
from rankfold.udfs.errors import __all__ as _error_names
from rankfold.udfs.version import __version__

from .archive import Archive, Cell, Keys
from .report import write_report
from .sql_view import query
from .verification import verify

__all__ = ["compress", "open", "query", "verify", "write_report", "Archive", "Cell", "Keys",
           "__version__", *_error_names]


def compress(source: Any, path: str | Path, *, rank: int | None = None, seed: int = 0,
             **options: Any) -> Archive:
    """Compress ``source`` into an archive directory at ``path`` and open it.

    Parameters
    ----------
    source : 2-D numpy array, pyarrow Table, pandas DataFrame, Parquet/CSV path, or a table
        name or SELECT statement together with ``connection=``.
    path : the archive directory to create. It must not exist (or pass ``overwrite=True`` to
        replace an existing archive; other files are never replaced). One write per path at
        a time: another compress or append to it raises ArchiveBusyError. Readers of the
        replaced version keep reading it (README, "Versions, writers and crashes"). It may
        be an fsspec URL (``s3://bucket/prefix``, with ``storage_options`` or the store's
        environment variables): built locally, then uploaded with the manifest last; never
        replaced there.
    rank : target rank k. Default: none, and with no other target either the archive keeps
        every rebuilt value within ``max_std_error=0.05`` of its column's standard deviation
        (the rank is chosen for that). ``rank`` alone keeps no tolerance; with a tolerance both
        are honoured (fixed rank, residual coded to meet the tolerance).
    seed : seed of the one numpy Generator used for every random choice; written to the manifest.
    **options : see the README's option table. Targets: max_std_error (number or {column:
        number}: every rebuilt value guaranteed within that fraction of its column's standard
        deviation; default 0.05 when nothing else is asked), max_abs_error (number or {column:
        number}, in column units: every rebuilt value is guaranteed within it; with
        max_std_error the smaller applies), rel_error (number or {column: number}),
        target_bytes. Method: method ('cur' | 'svd'), column_method ('pivoted_qr' | 'leverage'
        | 'length_squared'; old name ``columns``, deprecated), link ('cx' | 'optimal' |
        'skeleton' | 'textbook'; cx, the least-squares C^+ A, keeps no anchor rows), row_method
        ('qdeim' | 'leverage' | 'length_squared'; links other than cx; old name ``rows``),
        transform ('standardize' | 'center' | 'none'), n_columns (default 2 * rank), n_rows (default 2 * n_columns; links
        other than cx), replace (sample with replacement). Coding under a tolerance: residual
        ('auto' | 'quantized' | 'corrections'), basis_precision ('auto' | 'exact' | 'tolerance'),
        refit_outliers. Data: key (a column to address rows by), exact_columns (numeric
        columns kept exactly), connection (DuckDB, for table or query sources). Running:
        executor ('local' | 'dask' | a dask.distributed Client), storage_options, batch_rows,
        sketch_rows ('auto' | 'all' | a number of rows: the sketch that chooses the columns
        reads a seeded sample of Parquet row groups; every error is still measured on every
        row), progress (a callable), overwrite. Options given together are honoured or
        refused before any row is read, never ignored: the README's "Options given together"
        table (e.g. n_columns with a tolerance is kept; n_columns with rel_error is refused).

    Returns
    -------
    Archive : ``archive.guarantee`` says in one sentence what was guaranteed, and
        ``archive.warnings`` lists warnings when values are off by a large part of their
        column's standard deviation.
    """
    from rankfold.udfs.passes.compress import compress as _compress

    return Archive(_compress(source, path, rank=rank, seed=seed, **options),
                   storage_options=options.get("storage_options"))


def open(path: str | Path, *, log_path: str | Path | None = None, checksums: bool = False,  # noqa: A001
         storage_options: dict | None = None) -> Archive:
    """Open the archive at ``path``. ``log_path`` appends rebuild records as JSON Lines;
    ``checksums=True`` verifies every file's SHA-256 (sizes are always checked). ``path`` may
    be an fsspec URL (``s3://bucket/prefix``): the archive is then read from a private local
    copy, with ``storage_options`` (fsspec options: credentials, endpoint) or the store's
    environment variables."""
    return Archive(path, log_path=log_path, checksums=checksums, storage_options=storage_options)
