"""rankfold.udfs: the DuckDB extension and the numerical engine under it.

``register(con)`` adds rankfold's SQL functions to a DuckDB connection. The subpackages are
the engine that the client (``import rankfold``) and the SQL functions share:

* ``store``  - the archive format: layout, manifest, rebuild arithmetic, bounds, reader, log
* ``factor`` - numerical kernels: sampling, pivoted-QR selection, link matrices, sketches, SVD
* ``build``  - the compress passes: sources, profile, select, link, verify, commit
* ``sql``    - the SQL functions and macros
"""

from .version import __version__

__all__ = ["register", "__version__"]


def register(con, *, prefix: str = "rankfold", **options):
    """Add rankfold's SQL functions to the DuckDB connection ``con``; returns their names.
    ``options`` go to ``rankfold.udfs.sql.register`` (e.g. ``log_path=`` for the rebuild log)."""
    from .sql.functions import register as _register

    return _register(con, prefix=prefix, **options)
