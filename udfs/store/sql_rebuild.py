"""SQL text that rebuilds values and bounds, generated from a :class:`model.FittedModel`.

The numpy path (``reader.ArchiveReader.rebuild`` through ``arithmetic``) and this SQL read the
same arrays of the same model object: offset and weights (the value), residual steps, the
ledger scale, the column ledger, the tolerance (the bound), the observed range and the type
kind (the served value). Every number enters the SQL as a literal printed to 17 significant
digits (``sql_text.sql_literal``), so it is the same double.

The expressions name the columns of the scan's inner select (``udfs/sql/tables.py``):
``__f`` the filled basis values of the row as DOUBLE[c] and ``__fa`` their absolute values,
``__rowmax`` the row figure (only when the archive keeps a row ledger,
``FittedModel.row_ledger``), ``__q<s>`` the residual code of the s-th requested column.
"""

from __future__ import annotations

import numpy as np

from . import arithmetic
from .model import FittedModel
from .sql_text import quote_identifier, sql_literal

__all__ = ["double_list", "basis_value_sql", "derived_value_sql", "stored_bound_sql", "served_sql", "row_bound_sql"]

U = arithmetic.UNIT_ROUNDOFF


def basis_value_sql(model: FittedModel, t: int) -> str:
    """SQL of the filled value of basis entry t (code * step where stored as codes; the fill
    where NULL or not finite), as DOUBLE: the same value ``FittedModel.basis_values`` gives."""
    column = quote_identifier(model.basis_stored[t])
    fill = sql_literal(float(model.fill[t]))
    step = model.basis_step[t]
    if np.isfinite(step):
        value = f"(CAST({column} AS DOUBLE) * {sql_literal(float(step))})"
    else:
        value = f"CAST({column} AS DOUBLE)"
    return f"(CASE WHEN isfinite({value}) THEN {value} ELSE {fill} END)"


def double_list(values) -> str:
    """A constant DOUBLE[k] list of ``values`` (each printed to 17 significant digits)."""
    return "[" + ", ".join(f"{float(v):.17e}" for v in values) + f"]::DOUBLE[{len(values)}]"


def derived_value_sql(model: FittedModel, j: int, slot: int) -> tuple[str, str]:
    """SQL of the stored value of derived column j (requested as the ``slot``-th column) and
    of its magnitude |offset_j| + sum_k |w_kj| |f_k| + |code * step| (what the slack scales):
    ``arithmetic.approximate`` then ``arithmetic.add_residual``, as one inner product
    (``array_inner_product``, any summation order: the slack covers it)."""
    c = len(model.basis_names)
    offset = float(model.offset[j])
    step = model.residual_step[j]
    value = sql_literal(offset)
    magnitude = sql_literal(abs(offset))
    if c:
        value += f" + array_inner_product(__f, {double_list(model.weights[:, j])})"
        magnitude += f" + array_inner_product(__fa, {double_list(np.abs(model.weights[:, j]))})"
    if np.isfinite(step):
        value = f"({value}) + CAST(__q{slot} AS DOUBLE) * {sql_literal(float(step))}"
        magnitude += f" + abs(CAST(__q{slot} AS DOUBLE) * {sql_literal(float(step))})"
    return value, magnitude


def stored_bound_sql(model: FittedModel, j: int, magnitude: str) -> str:
    """SQL of the bound of a stored value of derived column j, as ``ArchiveReader.rebuild``
    computes it: min(round_up(rowmax * scale_j), colmax_j) + slack, capped at the tolerance;
    the factor (1 + 16u) more than covers round_up and this expression's own rounding.
    Without a row ledger: colmax_j + slack, capped at the tolerance."""
    ledger = sql_literal(float(model.err_max[j]))
    if model.row_ledger:
        ledger = f"least(__rowmax * {sql_literal(float(model.ledger_scale[j]))}, {ledger})"
    raw = (f"({ledger} + "
           f"{sql_literal(arithmetic.slack_factor(len(model.basis_names)))} * ({magnitude})) * "
           f"{sql_literal(1.0 + 16 * U)}")
    tol = float(model.tolerance[j])
    if np.isfinite(tol):
        raw = f"least({raw}, {sql_literal(tol)})"
    return raw


def served_sql(model: FittedModel, j: int, v: str, b: str) -> tuple[str, str]:
    """SQL of the served value and its bound for numeric column j from the stored value ``v``
    and bound ``b`` (column names): the same steps as ``arithmetic.serve`` -- clamped into the
    column's observed range, rounded half to even in integer columns (bound: the farthest
    integer the true value can be; in the fallback, the factor 1 + 8u covers this
    expression's own rounding). SQL serves every numeric column as DOUBLE, so float32
    columns are not narrowed here."""
    lower, upper = float(model.lower[j]), float(model.upper[j])
    clamped = v
    if np.isfinite(upper):
        clamped = f"least({clamped}, {sql_literal(upper)})"
    if np.isfinite(lower):
        clamped = f"greatest({clamped}, {sql_literal(lower)})"
    if model.kind[j] == "i":
        r = f"round_even({clamped}, 0)"
        low = f"nextafter({v} - {b}, {sql_literal(-np.inf)})"
        high = f"nextafter({v} + {b}, {sql_literal(np.inf)})"
        if np.isfinite(lower):
            low = f"greatest({low}, {sql_literal(lower)})"
        if np.isfinite(upper):
            high = f"least({high}, {sql_literal(upper)})"
        low, high = f"ceil({low})", f"floor({high})"
        bound = (f"(CASE WHEN {low} <= {high} THEN greatest({high} - {r}, {r} - {low}, 0.0) "
                 f"ELSE ({b} + abs({r} - {v})) * {sql_literal(1.0 + 8 * U)} END)")
        return f"({r})", bound
    # float columns (float32 too: SQL serves DOUBLE) are clamped only, their bound unchanged
    return f"({clamped})", f"({b})"


def row_bound_sql(model: FittedModel, cols: np.ndarray, slots: list[int], use_anchors: bool) -> str:
    """One bound for every requested derived cell of a row (columns ``cols``, requested as
    the ``slots``-th columns), cheaper than the cell bounds' maximum: max_j min(scale_j r,
    colmax_j) (r: the row figure) is a non-decreasing piecewise linear function of r,
    evaluated over the columns not dominated by another (larger scale and larger colmax); the
    slack uses, per basis entry, the largest |weight| of the requested columns, which can
    only raise it; the cap is the largest tolerance. Without a row ledger the ledger part
    is the largest colmax_j."""
    if cols.size == 0:
        return "0.0::DOUBLE"
    scale = model.ledger_scale[cols]
    colmax = model.err_max[cols]
    order = np.lexsort((-colmax, -scale))  # by scale descending, then colmax descending
    front, best = [], -np.inf
    for k in order:
        if colmax[k] > best:
            front.append(k)
            best = colmax[k]
    # along the front scale falls and colmax rises: breakpoints r_k = colmax_k / scale_k rise
    a = scale[front]
    b = colmax[front]
    r = "__rowmax"
    whens = []
    for i in range(len(front)):
        lower = f"{sql_literal(float(b[i - 1]))}" if i else None
        term = f"{r} * {sql_literal(float(a[i]))}"
        expr = f"greatest({lower}, {term})" if lower else term
        whens.append(f"WHEN {r} * {sql_literal(float(a[i]))} < {sql_literal(float(b[i]))} THEN {expr}")
    ledger = f"CASE {' '.join(whens)} ELSE {sql_literal(float(b[-1]))} END"
    if not model.row_ledger:
        ledger = sql_literal(float(b[-1]))  # the largest colmax (the front ends at it)
    c = len(model.basis_names)
    mag = sql_literal(float(np.max(np.abs(model.offset[cols]))))
    if c:
        mag += f" + array_inner_product(__fa, {double_list(np.max(np.abs(model.weights[:, cols]), axis=1))})"
    steps = model.residual_step[cols]
    # a NULL code (a NULL cell, bound 0) counts as 0 here
    coded = [f"abs(CAST(coalesce(__q{s}, 0) AS DOUBLE)) * {sql_literal(float(steps[t]))}"
             for t, s in enumerate(slots) if np.isfinite(steps[t])]
    if coded:
        mag += f" + greatest({', '.join(coded)})" if len(coded) > 1 else f" + {coded[0]}"
    bound = (f"(({ledger}) + {sql_literal(arithmetic.slack_factor(c))} * ({mag})) * "
             f"{sql_literal(1.0 + 16 * U)}")
    tol = model.tolerance[cols]
    if np.all(np.isfinite(tol)):
        bound = f"least({bound}, {sql_literal(float(tol.max()))})"
    if use_anchors:
        bound = f"CASE WHEN __anchor THEN 0.0 ELSE {bound} END"
    return f"CAST({bound} AS DOUBLE)"
