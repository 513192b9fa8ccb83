"""User expressions: parsed once by DuckDB, checked on the parse tree, rendered from it.

Terms, the outcome, the row filter and a source query arrive as text. Each is parsed by
DuckDB's own parser (``json_serialize_sql``); the checks walk that tree; and the SQL that
runs is generated from the checked tree (``json_deserialize_sql``), never pasted from the
user's text. A comment, a stray newline or a quote that opens in one term and closes in
the next therefore cannot survive: what was checked is what runs. Each rendering is parsed
again and must give back the same tree (locations aside), or the expression is refused.

Two forms of our own are recognised on the tree, as whole terms only:

- ``lag(EXPR)`` / ``lag(EXPR, K)``: EXPR in the same unit K periods earlier;
- ``lead(EXPR)`` / ``lead(EXPR, K)``: EXPR in the same unit K periods later (a lag of -K);
- ``levels(COLUMN)`` / ``levels(COLUMN, 'BASE')``: indicators for a categorical column.

An absorbed effect (``effects``) is a column, or ``cell(COLUMN, COLUMN[, ...])``: one effect
per combination of the columns' levels (:func:`parse_effect`).
"""

from __future__ import annotations

import copy
import functools
from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

from .errors import InputError, echo, shown
from .source import parse_tree, render_tree, scalar_function_kinds, statement_kinds

MAX_LAG_ORDER = 100_000  # periods; far beyond any panel, small enough that K * step stays exact

_REFUSED_CLASSES = {
    "SUBQUERY": "it contains a subquery",
    "WINDOW": "it contains a window function",
    "STAR": "it is not a scalar expression",
    "COLUMNS": "it is not a scalar expression",
    "PARAMETER": "it contains a query parameter",
    "DEFAULT": "it is not a scalar expression",
}
_OWN_FORMS = ("lag", "lead", "levels")


@dataclass(frozen=True)
class Term:
    """One regressor as the user wrote it, and how to compute it.

    ``kind`` is ``expr`` (``expr`` is SQL rendered from the checked parse tree), ``lag``
    (that SQL ``lag`` periods earlier; a negative ``lag`` is a ``lead()``, that many periods
    later) or ``levels`` (indicators for the column named
    ``expr`` against the level ``base``).
    """

    text: str
    kind: str
    expr: str
    lag: int = 0
    base: str | None = None


def split_top_level(text: str, sep: str = ",") -> list[str]:
    """Split on ``sep`` outside parentheses, brackets and quotes; strip the pieces.

    Only the labels come from these pieces: :func:`parse_terms` checks that DuckDB's parser
    sees the same number of terms in the whole text, and each piece is parsed on its own.
    """
    parts, depth, quote, start = [], 0, None, 0
    for i, ch in enumerate(text):
        if quote:
            if ch == quote:
                quote = None
        elif ch in "'\"":
            quote = ch
        elif ch in "([{":
            depth += 1
        elif ch in ")]}":
            depth -= 1
        elif ch == sep and depth == 0:
            parts.append(text[start:i].strip())
            start = i + 1
    parts.append(text[start:].strip())
    return [p for p in parts if p]


# ---------------------------------------------------------------- trees


def _strip_locations(node: Any) -> Any:
    if isinstance(node, dict):
        return {k: _strip_locations(v) for k, v in node.items() if k not in ("query_location", "query_location_length")}
    if isinstance(node, list):
        return [_strip_locations(v) for v in node]
    return node


def _select_items(text: str, what: str) -> list[dict]:
    """The select list of ``SELECT <text>``, refused unless it is a bare list of expressions."""
    tree = parse_tree("SELECT " + text)
    if tree.get("error"):
        raise InputError(f"{what} {shown(text)} is not valid SQL ({echo(tree.get('error_message', 'parse error'))}). Fix the expression.")
    statements = tree.get("statements", [])
    if len(statements) != 1:
        raise InputError(f"{what} {shown(text)} is refused: it holds more than one statement. Give one scalar SQL expression.")
    node = statements[0]["node"]
    bare = (
        node.get("type") == "SELECT_NODE"
        and node.get("from_table", {}).get("type") in (None, "EMPTY")
        and not any(node.get(key) for key in ("where_clause", "having", "qualify", "sample", "modifiers", "group_expressions", "group_sets"))
        and not node.get("cte_map", {}).get("map")
        and node.get("aggregate_handling", "STANDARD_HANDLING") == "STANDARD_HANDLING"
    )
    if not bare:
        raise InputError(f"{what} {shown(text)} is refused: it is not a plain expression (it reads a table or has clauses). "
                         "Give one scalar SQL expression over the source's columns.")
    return node["select_list"]


def _problem(node: Any, kinds: dict[str, str]) -> str | None:
    """Why an expression tree is not a scalar expression we may run, or None."""
    stack = [node]
    while stack:
        item = stack.pop()
        if isinstance(item, list):
            stack.extend(item)
            continue
        if not isinstance(item, dict):
            continue
        cls = item.get("class")
        if cls in _REFUSED_CLASSES:
            return _REFUSED_CLASSES[cls]
        if cls == "FUNCTION":
            name = str(item.get("function_name", "")).lower()
            if name in _OWN_FORMS:
                return f"{name}() must be a whole term, not part of an expression"
            kind = kinds.get(name)
            if kind not in (None, "scalar", "macro"):
                return f"it calls the {kind} function {name}()"
            if item.get("filter") or item.get("distinct") or (item.get("order_bys") or {}).get("orders"):
                return f"it gives {name}() an aggregate clause"
        stack.extend(v for v in item.values() if isinstance(v, (dict, list)))
    return None


def _render(node: dict, text: str, what: str) -> str:
    """SQL text for an expression tree; refused unless parsing it gives the same tree back."""
    node = copy.deepcopy(node)
    node["alias"] = ""
    statement = parse_tree("SELECT 1")["statements"][0]
    statement["node"]["select_list"] = [node]
    rendered = render_tree({"error": False, "statements": [statement]})
    if not rendered.startswith("SELECT "):
        raise InputError(f"{what} {shown(text)} could not be rendered as SQL. Rewrite it in plain SQL.")
    sql = rendered[len("SELECT "):]
    again = parse_tree("SELECT " + sql)
    items = again.get("statements", [{}])[0].get("node", {}).get("select_list") if not again.get("error") else None
    if not items or len(items) != 1 or _strip_locations(items[0]) != _strip_locations(node):
        raise InputError(f"{what} {shown(text)} could not be rendered as SQL that means the same. Rewrite it in plain SQL.")
    return sql


def _checked_node(node: dict, text: str, what: str) -> str:
    problem = _problem(node, scalar_function_kinds())
    if problem:
        raise InputError(f"{what} {shown(text)} is refused: {problem}. Give one scalar SQL expression over the source's columns.")
    return _render(node, text, what)


def _single(text: str, what: str) -> dict:
    items = _select_items(text, what)
    if len(items) != 1:
        raise InputError(f"{what} {shown(text)} holds {len(items)} expressions. Give one scalar SQL expression.")
    return items[0]


# ---------------------------------------------------------------- public


def _not_too_deep(check):
    """Refuse, in one sentence, an expression nested beyond what the tree walk can hold."""

    @functools.wraps(check)
    def guarded(text, *args, **kwargs):
        try:
            return check(text, *args, **kwargs)
        except RecursionError:
            raise InputError(f"Expression {shown(text)} is nested too deeply to check. "
                             "Simplify it, or compute it in a query (--query).") from None

    return guarded


@_not_too_deep
def expression_sql(text: str, what: str) -> str:
    """Check one scalar expression and return its SQL, rendered from the checked tree."""
    text = str(text).strip()
    if not text:
        raise InputError(f"{what} is empty. Give a column name or a SQL expression.")
    return _checked_node(_single(text, what), text, what)


def _arguments(node: dict) -> list[dict]:
    return [a["expression"] if "expression" in a else a for a in node.get("arguments", node.get("children", []))]


@_not_too_deep
def parse_term(text: str) -> Term:
    """Check one regressor term and return it with SQL rendered from its tree."""
    text = str(text).strip()
    what = "Term"
    if not text:
        raise InputError("A term is empty. Give a column name or a SQL expression.")
    node = _single(text, what)
    text = " ".join(text.split())  # the label, on one line
    name = str(node.get("function_name", "")).lower() if node.get("class") == "FUNCTION" else ""
    if name not in _OWN_FORMS:
        return Term(text=text, kind="expr", expr=_checked_node(node, text, what))
    if node.get("filter") or node.get("distinct") or (node.get("order_bys") or {}).get("orders") or node.get("schema"):
        raise InputError(f"Term {shown(text)} is not understood: write {name}(...) with plain arguments.")
    args = _arguments(node)
    if name in ("lag", "lead"):
        if len(args) not in (1, 2):
            raise InputError(f"Term {shown(text)} is not understood: write {name}(EXPR) or {name}(EXPR, K).")
        order = 1
        if len(args) == 2:
            literal = args[1].get("literal", {}) if args[1].get("class") == "CONSTANT" else {}
            raw = str(literal.get("text", ""))
            if literal.get("kind") not in ("INTEGER", "BIGINT", "HUGEINT") or not raw.isdigit() or int(raw) < 1:
                raise InputError(f"Term {shown(text)} has a {name} order that is not a whole number of 1 or more. Write {name}(EXPR, K) with K = 1, 2, ...")
            order = int(raw)
            if order > MAX_LAG_ORDER:
                raise InputError(f"Term {shown(text)} has {name} order {shown(raw, 24)}, more than {MAX_LAG_ORDER:,} periods. Give a smaller order.")
        return Term(text=text, kind="lag", expr=_checked_node(args[0], text, what), lag=order if name == "lag" else -order)
    if len(args) not in (1, 2):
        raise InputError(f"Term {shown(text)} is not understood: write levels(COLUMN) or levels(COLUMN, 'BASE').")
    column = args[0]
    if column.get("class") != "COLUMN_REF" or len(column.get("column_names", [])) != 1:
        raise InputError(f"Term {shown(text)}: levels() takes a column name, like levels(kind).")
    base = None
    if len(args) == 2:
        literal = args[1].get("literal", {}) if args[1].get("class") == "CONSTANT" else {}
        if literal.get("kind") in (None, "NULL_LITERAL"):
            raise InputError(f"Term {shown(text)}: the base level must be a quoted value, like levels(kind, 'hub').")
        base = str(literal.get("text", ""))
    return Term(text=text, kind="levels", expr=str(column["column_names"][0]), base=base)


def parse_terms(value: str | Iterable[str] | None, option: str = "regressors") -> tuple[Term, ...]:
    """Terms from a comma-separated text or a list of texts, each checked on its own tree.

    A text is cut at top-level commas for the labels; DuckDB's parser must find the same
    number of expressions in the whole text, so a comment or quote that hides or reveals a
    comma is refused instead of being read two ways.
    """
    if value is None:
        return ()
    if isinstance(value, str):
        pieces = split_top_level(value)
        if pieces:
            whole = parse_tree("SELECT " + value)
            if whole.get("error"):
                raise InputError(f"Option '{option}' {shown(value)} is not a valid list of SQL expressions "
                                 f"({echo(whole.get('error_message', 'parse error'))}). Fix the terms.")
            statements = whole.get("statements", [])
            count = len(statements[0]["node"].get("select_list", [])) if len(statements) == 1 else None
            if count != len(pieces):
                raise InputError(
                    f"Option '{option}' {shown(value)} reads as {count} terms to SQL but {len(pieces)} when cut at commas "
                    "(a comment or quote spans a comma). Remove comments, or pass the terms as a list."
                )
    else:
        pieces = [str(v).strip() for v in value if str(v).strip()]
    return tuple(parse_term(p) for p in pieces)


@_not_too_deep
def expression_trees(text: str, what: str) -> list[dict]:
    """DuckDB's parse trees (locations left out) of a comma-separated list of expressions
    that is never run, only read (the restrictions of a joint test, hypotheses.py)."""
    text = str(text).strip()
    if not text:
        raise InputError(f"{what} is empty. Give restrictions such as \"x = 0, z = 0\".")
    return [_strip_locations(item) for item in _select_items(text, what)]


def label_tree(label: str) -> dict | None:
    """The parse tree (locations left out) of a term's label, or None when the label is not
    one SQL expression (the tree a restriction's part is compared with, hypotheses.py)."""
    try:
        items = _select_items(label, "Term")
    except (InputError, RecursionError):
        return None
    return _strip_locations(items[0]) if len(items) == 1 else None


@_not_too_deep
def query_sql(text: str, relative_to: str | None = None) -> str:
    """Check a source query (exactly one SELECT statement) and render it from its tree;
    ``relative_to``: the folder its relative file paths are read from (a spec file's)."""
    text = str(text).strip()
    if not text:
        raise InputError("Option 'query' is empty. Give one SELECT query.")
    kinds = statement_kinds(text)
    if isinstance(kinds, str):
        raise InputError(f"Option 'query' {shown(text)} is not valid SQL ({echo(kinds)}). Fix the query.")
    if len(kinds) != 1:
        raise InputError(f"Option 'query' holds {len(kinds)} statements ({', '.join(kinds)}). Give a single SELECT query.")
    if kinds[0] != "SELECT":
        raise InputError(f"Option 'query' is a {kinds[0]} statement, not a SELECT query. Give one SELECT query that returns the panel's rows.")
    tree = parse_tree(text)
    if tree.get("error"):
        raise InputError(f"Option 'query' {shown(text)} is not valid SQL ({echo(tree.get('error_message', 'parse error'))}). Fix the query.")
    statements = tree.get("statements", [])
    if _has_class(statements[0], "PARAMETER"):
        raise InputError(f"Option 'query' {shown(text)} has a query parameter ($name or ?). Write the values into the query.")
    if relative_to is not None:
        from .lockdown import rebase_reads

        rebase_reads(statements[0], relative_to)
    rendered = render_tree({"error": False, "statements": statements})
    again = parse_tree(rendered)
    if again.get("error") or _strip_locations(again.get("statements")) != _strip_locations(statements):
        raise InputError(f"Option 'query' {shown(text)} could not be rendered as SQL that means the same. Rewrite it in plain SQL.")
    return rendered


def _has_class(node: Any, cls: str) -> bool:
    stack = [node]
    while stack:
        item = stack.pop()
        if isinstance(item, dict):
            if item.get("class") == cls:
                return True
            stack.extend(v for v in item.values() if isinstance(v, (dict, list)))
        elif isinstance(item, list):
            stack.extend(item)
    return False


def parse_effect(text: str) -> tuple[str, ...]:
    """The source columns of one absorbed effect: ``cell(A, B[, ...])`` (recognised on the
    parse tree, like ``levels()``) gives (A, B, ...), one level per combination of their
    values; any other text is one column's name, as written (the design checks it exists)."""
    text = str(text).strip()
    if "(" not in text:
        return (text,)
    tree = parse_tree("SELECT " + text)
    statements = tree.get("statements", []) if not tree.get("error") else []
    items = statements[0]["node"].get("select_list", []) if len(statements) == 1 else []
    node = items[0] if len(items) == 1 else {}
    name = str(node.get("function_name", "")).lower() if node.get("class") == "FUNCTION" else ""
    if name != "cell":
        if node.get("class") == "COLUMN_REF" or not node:
            return (text,)
        raise InputError(f"Effect {shown(text)} is not understood: name a column, or write cell(COLUMN, COLUMN) for one "
                         "effect per combination of levels.")
    args = _arguments(node)
    if node.get("schema") or node.get("filter") or node.get("distinct") or len(args) < 2 or any(
            a.get("class") != "COLUMN_REF" or len(a.get("column_names", [])) != 1 for a in args):
        raise InputError(f"Effect {shown(text)} is not understood: cell() takes two or more column names, like "
                         "cell(firm, year).")
    columns = tuple(str(a["column_names"][0]) for a in args)
    if len(set(columns)) != len(columns):
        raise InputError(f"Effect {shown(text)} names a column twice. Give each column once: cell(firm, year).")
    return columns
