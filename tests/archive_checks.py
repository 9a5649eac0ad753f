"""Checks shared by tests that write one table into two archive forms (one column per code
against row differences or packed codes) and need every read path to serve the same values.

Not a test module (pytest collects ``test_*.py`` only); imported by the tests beside it.
The reference for "the same" is the plain archive's reads, and for "within its bound" the
invented source table itself, compared with numpy.
"""

from __future__ import annotations

from collections.abc import Iterable

import numpy as np
import pyarrow as pa

from rankfold.portable_view import view_sql


def with_specials(values: np.ndarray, u: np.ndarray, shares: tuple[float, float, float, float]) -> np.ndarray:
    """Mark special cells in ``values`` (m,) in place by uniform draws ``u`` (m,): NaN, +inf,
    -inf and NULL, each for the next share of [0, 1) (``shares``, in that order); returns the
    NULL mask."""
    edges = np.cumsum((0.0, *shares))
    for (low, high), special in zip(zip(edges[:-2], edges[1:-1]), (np.nan, np.inf, -np.inf)):
        values[(u >= low) & (u < high)] = special
    return (u >= edges[3]) & (u < edges[4])


def source_values(table: pa.Table, names: list[str]) -> np.ndarray:
    """The source's columns ``names`` as float64 (m, q), NaN where NULL."""
    out = []
    for n in names:
        column = table.column(n)
        values = column.fill_null(0).to_numpy(zero_copy_only=False).astype(np.float64)
        out.append(np.where(column.is_null().to_numpy(zero_copy_only=False), np.nan, values))
    return np.column_stack(out)


def scan(con, path, where: str = "", **named) -> dict:
    """``rankfold_scan`` of the archive at ``path`` with the named arguments, rows in order."""
    args = "".join(f", {k} := {v}" for k, v in named.items())
    return con.sql(f"SELECT * FROM rankfold_scan('{path}'{args}) {where} ORDER BY _rf_row").fetchnumpy()


def assert_reads_alike(plain, other, table: pa.Table, con, rows: Iterable[int], *, cell_column: str,
                       view: str, single_rtol: float = 0.0):
    """Python and SQL reads of ``other`` equal those of ``plain`` (archives of ``table`` with an
    ``id`` key), and every served value lies within its bound of the source: the Python rebuild,
    the SQL full scan with bounds, a scan filtered on the key, point lookups of ``rows`` (an
    outer WHERE on the key, the Python reader, the SQL cell function on ``cell_column``) and the
    plain-SQL view named ``view``. A single row read in Python equals its row of the whole read
    exactly, or within ``single_rtol`` (one row may be summed in another BLAS order). Returns
    (plain rebuild, other rebuild, plain scan, other scan, source values)."""
    names = other.numeric_columns
    a, b = plain._reader.rebuild(), other._reader.rebuild()
    np.testing.assert_array_equal(b.values, a.values)
    np.testing.assert_array_equal(b.bounds, a.bounds)
    truth = source_values(table, names)
    finite = np.isfinite(truth)
    assert np.all(np.abs(truth[finite] - b.values[finite]) <= b.bounds[finite])  # the served bound holds
    sa, sb = scan(con, plain.path, bounds="'cell'"), scan(con, other.path, bounds="'cell'")
    for n in names:
        np.testing.assert_array_equal(sb[n], sa[n])
        np.testing.assert_array_equal(sb[n + "_bound"], sa[n + "_bound"])
    # filtered scan (predicate on the key, rows filtered before the rebuild) = unfiltered rows
    m = table.num_rows
    picked = scan(con, other.path, predicate=f"'id % 7 = 3 OR id = {m - 1}'")
    keep = (sb["id"] % 7 == 3) | (sb["id"] == m - 1)
    for n in names:
        np.testing.assert_array_equal(picked[n], sb[n][keep])
    for row in sorted(set(rows)):
        one = scan(con, other.path, where=f"WHERE id = {int(sb['id'][row])}")
        for n in names:
            np.testing.assert_array_equal(one[n], sb[n][row:row + 1])
        single = other._reader.rebuild(rows=[row])
        np.testing.assert_allclose(single.values[0], b.values[row], rtol=single_rtol, atol=0)
        np.testing.assert_allclose(single.bounds[0], b.bounds[row], rtol=single_rtol, atol=0)
        cell = con.sql(f"SELECT rankfold_cell('{other.path}', {row}, '{cell_column}')").fetchall()[0][0]
        np.testing.assert_array_equal(np.float64(np.nan if cell is None else cell), sb[cell_column][row])
    con.execute(view_sql(other, view))  # the plain-SQL view (no UDFs) serves what the scan serves
    viewed = con.sql(f"SELECT * FROM {view} ORDER BY _rf_row").fetchnumpy()
    for n in names:
        np.testing.assert_array_equal(viewed[n], sa[n])
    return a, b, sa, sb, truth
