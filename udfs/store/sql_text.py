"""SQL text that rankfold writes: the one place where names and values become SQL.

* :func:`quote_identifier` -- a column, table or view name as a quoted identifier.
* :func:`qualified_name` -- a table name given by a user, possibly dotted
  (``catalog.schema.table``), as quoted identifiers joined by dots.
* :func:`sql_literal` -- a Python value as a SQL literal that DuckDB reads back as the same value.
* :func:`checked_condition` -- a user's row condition (``--where``, ``predicate :=``,
  ``where=``), parsed by DuckDB and accepted only when it is ONE expression built from the
  allowed columns, constants, operators, comparisons, conjunctions, casts, BETWEEN, IN lists,
  CASE and scalar functions of an allow-list. The SQL that rankfold runs is DuckDB's own
  rendering of the checked tree, never the user's text.

No user string is pasted into SQL anywhere else: the rest of the code base builds SQL from
these helpers, from numbers it formats itself and from bind parameters.
"""

from __future__ import annotations

import json
import math
import re
from collections.abc import Iterable
from typing import Any

import numpy as np

from ..errors import ConditionRefusedError, InvalidInputError

__all__ = ["quote_identifier", "qualified_name", "sql_literal", "checked_condition",
           "one_query", "ALLOWED_FUNCTIONS"]


def quote_identifier(name: str) -> str:
    """``name`` as a DuckDB quoted identifier: inside double quotes, a double quote doubled
    (SQL standard, common practice). Any text is a valid name this way, so a name can never
    end the identifier and start other SQL."""
    if not isinstance(name, str):
        raise InvalidInputError(f"A SQL name must be text; got {name!r}.")
    if "\x00" in name:
        raise InvalidInputError(f"A SQL name cannot contain a NUL character; got {name!r}.")
    return '"' + name.replace('"', '""') + '"'


_NAME_PART = re.compile(r'"((?:[^"]|"")*)"|([^."]+)')


def qualified_name(text: str) -> str:
    """A user's table name, ``table``, ``schema.table`` or ``catalog.schema.table`` (each part
    bare or double-quoted, as in SQL), as quoted identifiers joined by dots. A bare part is
    taken as written (surrounding spaces removed); a quoted part may hold dots. Anything
    else -- a parenthesis, a quote left open, more than three parts -- is refused."""
    parts: list[str] = []
    pos, text_len = 0, len(text)
    while True:
        found = _NAME_PART.match(text, pos)
        if found is None:
            raise InvalidInputError(
                f"{text!r} is not a table name (table, schema.table or catalog.schema.table, "
                "each part bare or in double quotes). To read a query, give a SELECT statement.")
        part = found.group(1).replace('""', '"') if found.group(1) is not None else found.group(2).strip()
        if not part:
            raise InvalidInputError(f"The table name {text!r} has an empty part; write it as schema.table.")
        parts.append(part)
        pos = found.end()
        if pos == text_len:
            break
        if text[pos] != ".":
            raise InvalidInputError(f"{text!r} is not a table name: unexpected {text[pos:]!r}.")
        pos += 1
    if len(parts) > 3:
        raise InvalidInputError(
            f"The table name {text!r} has {len(parts)} parts; at most catalog.schema.table. "
            "Put a name that holds dots in double quotes.")
    return ".".join(quote_identifier(p) for p in parts)


def sql_literal(value: Any) -> str:
    """A SQL literal that DuckDB reads back as the same value (floats as DOUBLE, exactly:
    17 significant digits round-trip a float64, IEEE 754-2008 section 5.12.2)."""
    if value is None:
        return "NULL"
    if isinstance(value, (bool, np.bool_)):
        return "true" if value else "false"
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)):
        v = float(value)
        if math.isnan(v):
            return "'nan'::DOUBLE"
        if math.isinf(v):
            return "'inf'::DOUBLE" if v > 0 else "'-inf'::DOUBLE"
        return f"{v:.17e}::DOUBLE"
    text = str(value)
    if "\x00" in text:
        raise InvalidInputError(f"A SQL text value cannot contain a NUL character; got {text!r}.")
    return "'" + text.replace("'", "''") + "'"


def one_query(text: str, con) -> str:
    """``text`` unchanged when DuckDB parses it as exactly one query (SELECT, WITH, FROM,
    VALUES or TABLE), so that it can be used inside parentheses as a source; a second
    statement (``...; COPY ... TO``) or any other kind of statement is refused. The query
    itself is the caller's own, run on the caller's own connection."""
    import duckdb

    try:
        parsed = json.loads(con.execute("SELECT json_serialize_sql(?)", [text]).fetchall()[0][0])
    except duckdb.Error as exc:
        raise InvalidInputError(f"The source query {text!r} could not be parsed ({str(exc).splitlines()[0]}).") from None
    count = len(parsed.get("statements", []))
    if parsed.get("error") or count != 1:
        why = parsed.get("error_message") if parsed.get("error") else f"it holds {count} statements"
        raise ConditionRefusedError(
            f"The source {text!r} was refused: a source query must be exactly one SELECT statement "
            f"({why}). Run other statements yourself first, then pass the table name or the query.")
    return text


# -- row conditions -----------------------------------------------------------------------------
# Scalar functions a row condition may call: pure functions of their arguments (no file, setting,
# environment, catalog or random access). Operators (+, LIKE as ~~, ...) are functions in
# DuckDB's tree and are listed here too.
ALLOWED_FUNCTIONS = frozenset({
    # arithmetic, string and pattern operators
    "+", "-", "*", "/", "//", "%", "**", "^", "||", "~~", "!~~", "~~*", "!~~*", "~~~", "!~~~",
    "@>", "<@", "&&",
    # numbers
    "abs", "sign", "round", "round_even", "floor", "ceil", "ceiling", "trunc", "mod", "least",
    "greatest", "isnan", "isinf", "isfinite", "sqrt", "ln", "log", "log10", "log2", "exp", "pow",
    "power",
    # text
    "lower", "upper", "lcase", "ucase", "length", "strlen", "substr", "substring", "trim",
    "ltrim", "rtrim", "starts_with", "ends_with", "contains", "prefix", "suffix", "concat",
    "regexp_matches", "like_escape", "ilike_escape", "replace", "left", "right",
    # time
    "year", "month", "day", "hour", "minute", "second", "dayofweek", "dayofyear", "week",
    "quarter", "date_part", "datepart", "date_trunc", "datetrunc", "epoch", "make_date",
    "strftime", "strptime",
    # nulls, lists and tuples
    "ifnull", "nullif", "list_value", "list_contains", "array_contains", "list_has", "row",
})
_OPERATORS = frozenset({"OPERATOR_NOT", "OPERATOR_IS_NULL", "OPERATOR_IS_NOT_NULL", "COMPARE_IN",
                        "COMPARE_NOT_IN", "OPERATOR_COALESCE", "OPERATOR_NULLIF"})
_CLASSES = frozenset({"COLUMN_REF", "CONSTANT", "COMPARISON", "CONJUNCTION", "OPERATOR",
                      "BETWEEN", "CAST", "CASE", "FUNCTION", "TYPE"})


def checked_condition(condition: Any, allowed: Iterable[str], *, what: str = "row condition",
                      con=None) -> str:
    """The SQL of ``condition`` (text), checked to be ONE expression over the columns
    ``allowed``, as DuckDB renders the parsed tree (parenthesized). Raises
    :class:`ConditionRefusedError` naming what was refused.

    DuckDB parses ``SELECT <condition>`` with ``json_serialize_sql`` (bound as a parameter,
    so the text is never run); accepted are exactly one plain SELECT without FROM, WHERE or
    other clauses, whose single unnamed expression holds only column references to
    ``allowed``, constants, comparisons, AND/OR/NOT, IS [NOT] NULL, [NOT] IN lists, BETWEEN,
    CASE, casts to built-in types and calls of :data:`ALLOWED_FUNCTIONS`. The returned text
    is ``json_deserialize_sql`` of that tree, so only what was checked is ever run.
    """
    import duckdb

    allowed = list(allowed)
    hint = (f"Give one condition on the columns {sorted(allowed)} with constants, comparisons, "
            "AND/OR/NOT, IN lists, BETWEEN, CASE, casts and plain functions, e.g. "
            "\"site IN ('A', 'B') AND day BETWEEN 1 AND 7\".")
    if not isinstance(condition, str) or not condition.strip():
        raise ConditionRefusedError(f"The {what} is empty or not text ({condition!r}). {hint}")
    own = con is None
    con = duckdb.connect() if own else con
    try:
        parsed = json.loads(con.execute("SELECT json_serialize_sql(?)", [f"SELECT {condition}"]).fetchall()[0][0])
        statements = parsed.get("statements", [])
        if len(statements) > 1 or (parsed.get("error") and ";" in condition):
            _refuse(condition, what, hint, "it holds more than one statement, where one expression is allowed")
        if parsed.get("error") or not statements:
            _refuse(condition, what, hint, "DuckDB does not read it as one expression "
                    f"({parsed.get('error_message', 'parse error')})")
        node = statements[0]["node"]
        _check_select(node, condition, what, hint)
        lookup = {name.lower(): name for name in allowed}
        _check_expression(node["select_list"][0], lookup, condition, what, hint)
        rendered = con.execute("SELECT json_deserialize_sql(?)", [json.dumps(parsed)]).fetchall()[0][0]
        # the rendering must read back as the very tree that was checked (positions aside)
        again = json.loads(con.execute("SELECT json_serialize_sql(?)", [rendered]).fetchall()[0][0])
        if again.get("error") or _without_positions(again) != _without_positions(parsed):
            _refuse(condition, what, hint, "DuckDB does not read its own rendering of it back the same way")
    except duckdb.Error as exc:
        raise ConditionRefusedError(
            f"The {what} {condition!r} could not be parsed ({str(exc).splitlines()[0]}). {hint}") from None
    finally:
        if own:
            con.close()
    if not rendered.startswith("SELECT "):
        raise ConditionRefusedError(f"The {what} {condition!r} could not be rendered back. {hint}")
    return f"({rendered[len('SELECT '):]})"


def _without_positions(tree: Any) -> Any:
    """The parse tree without the query_location fields (they differ between renderings)."""
    if isinstance(tree, dict):
        return {k: _without_positions(v) for k, v in tree.items() if not k.startswith("query_location")}
    if isinstance(tree, list):
        return [_without_positions(v) for v in tree]
    return tree


def _refuse(condition: str, what: str, hint: str, detail: str) -> None:
    raise ConditionRefusedError(f"The {what} {condition!r} was refused: {detail}. {hint}")


def _check_select(node: dict, condition: str, what: str, hint: str) -> None:
    if node.get("type") != "SELECT_NODE":
        _refuse(condition, what, hint, "it combines queries (UNION, EXCEPT, ...), not one expression")
    clauses = {
        "a FROM clause": (node.get("from_table") or {}).get("type") not in (None, "EMPTY"),
        "a WHERE clause": node.get("where_clause") is not None,
        "GROUP BY": bool(node.get("group_expressions")) or bool(node.get("group_sets")),
        "HAVING": node.get("having") is not None,
        "QUALIFY": node.get("qualify") is not None,
        "a SAMPLE clause": node.get("sample") is not None,
        "ORDER BY, LIMIT or another modifier": bool(node.get("modifiers")),
        "a WITH clause": bool((node.get("cte_map") or {}).get("map")),
        "several expressions": len(node.get("select_list", [])) != 1,
        "a DISTINCT or aggregate mode": node.get("aggregate_handling", "STANDARD_HANDLING") != "STANDARD_HANDLING",
    }
    for label, present in clauses.items():
        if present:
            _refuse(condition, what, hint, f"it holds {label}")


def _check_expression(tree: Any, lookup: dict[str, str], condition: str, what: str, hint: str) -> None:
    """Walk every dict and list of the tree: each node that has a class must be allowed."""
    stack = [tree]
    while stack:
        item = stack.pop()
        if isinstance(item, list):
            stack.extend(item)
            continue
        if not isinstance(item, dict):
            continue
        kind = item.get("class")
        if kind is not None:
            _check_node(item, kind, lookup, condition, what, hint)
        elif item.get("type") in ("SELECT_NODE", "SET_OPERATION_NODE", "RECURSIVE_CTE_NODE", "CTE_NODE"):
            _refuse(condition, what, hint, "it holds a query")
        stack.extend(v for v in item.values() if isinstance(v, (dict, list)))


def _check_node(node: dict, kind: str, lookup: dict[str, str], condition: str, what: str, hint: str) -> None:
    if kind not in _CLASSES:
        label = {"SUBQUERY": "a subquery", "WINDOW": "a window function", "PARAMETER": "a parameter",
                 "STAR": "a * or COLUMNS(...)", "COLUMNS": "COLUMNS(...)", "LAMBDA": "a lambda",
                 "COLLATE": "a COLLATE"}.get(kind, f"an expression of kind {kind}")
        _refuse(condition, what, hint, f"it holds {label}")
    if node.get("alias"):
        _refuse(condition, what, hint, f"it names an expression ({node['alias']!r})")
    if kind == "COLUMN_REF":
        names = node.get("column_names") or []
        if len(names) != 1 or names[0].lower() not in lookup:
            shown = ".".join(names)
            _refuse(condition, what, hint, f"{shown!r} is not one of the columns it may use (numeric "
                    "columns are approximated: a row condition uses columns kept exactly)")
    elif kind == "OPERATOR" and node.get("type") not in _OPERATORS:
        _refuse(condition, what, hint, f"it holds the operator {node.get('type')}")
    elif kind == "FUNCTION":
        name = str(node.get("function_name", "")).lower()
        if node.get("schema") or node.get("catalog") or name not in ALLOWED_FUNCTIONS:
            _refuse(condition, what, hint, f"the function {name!r} is not among the allowed scalar functions")
        if node.get("filter") is not None or node.get("distinct") or node.get("export_state") \
                or (node.get("order_bys") or {}).get("orders"):
            _refuse(condition, what, hint, f"{name}() is called as an aggregate")
        if any(arg.get("name") for arg in node.get("arguments", []) if isinstance(arg, dict)):
            _refuse(condition, what, hint, f"{name}() is called with named arguments")
    elif kind == "TYPE" and (node.get("catalog") or node.get("schema")):
        _refuse(condition, what, hint, "it casts to a type of a schema")
