"""SQL for another engine, written from DuckDB's parse tree: one user language everywhere.

Users write terms, filters and queries in DuckDB's SQL on every engine. Each text is
checked as on DuckDB (:mod:`bigpanel.expressions`: DuckDB's parser, ``json_serialize_sql``),
and the SQL sent to another engine is written here from that checked tree, node by node,
never from the user's text. A node or a function this module does not know for the target
is refused (:class:`Unsupported`, naming the engine and the function); nothing is
translated into something that means otherwise.

A :class:`Target` describes one engine: identifier quoting, string literals, parameter
markers, a type map for CAST, and function tables for three uses:

- ``functions``: scalar functions a user may call (same name or an exact equivalent on
  the target, with the same result on every value where both are defined);
- ``aggregates``: aggregates a user's source query may use, and bigpanel's own SQL;
- ``internal``: bigpanel's own constructs (``fsum``, ``isfinite``, windows, ...), used
  only when rendering the queries bigpanel builds (``mode="internal"``).

Modes: ``expression`` (one user scalar expression), ``query`` (a user's source query:
scalar functions and plain aggregates) and ``internal`` (bigpanel's queries, whose user
parts were rendered in ``expression`` mode first, when they were checked).

Entry points: :func:`expression` (a checked expression node), :func:`statement` (a
checked statement node) and :func:`translate` (SQL text bigpanel built, parsed by DuckDB's
parser and rendered; cached). Another engine adds a :class:`Target` (see ``POSTGRES``).
"""

from __future__ import annotations

import functools
import json
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field

from .source import parse_tree
from .sqlbuild import NUMBER_TEXT, NUMBER_WORDS

MAX_RENDERED = 200_000  # characters: a guarded function repeats its argument; refuse a blow-up


class Unsupported(Exception):
    """A node or function the target cannot run with the same meaning. ``function`` names
    the function (or construct) and ``engine`` the target, for the caller's message."""

    def __init__(self, function: str, engine: str, reason: str = ""):
        self.function = function
        self.engine = engine
        self.reason = reason
        super().__init__(f"{engine} has no {function}" + (f" ({reason})" if reason else ""))


Rule = str | Callable[[list[str]], str]


@dataclass(frozen=True, eq=False)  # compared and hashed by identity (the translation cache's key)
class Target:
    """One engine's SQL: what :class:`Renderer` needs to write it.

    ``param(position, kind, name)`` writes the marker of the ``position``-th bound
    parameter (1-based; :attr:`Rendered.names` lists the names by position), named
    ``name`` in bigpanel's SQL (``$name``), whose Python value is of ``kind`` (``float``,
    ``int``, ``str``, ``bool``): ``CAST($3 AS bigint)`` on PostgreSQL; a target with named
    markers can write ``:name`` instead.
    Function tables map a lower-case DuckDB name to a rule: a name (the same arguments,
    renamed) or a function of the rendered arguments returning SQL text.
    """

    name: str
    engine: str
    quote: str
    types: Mapping[str, str]
    functions: Mapping[str, Rule]
    aggregates: Mapping[str, Rule]
    internal: Mapping[str, Rule]
    windows: frozenset[str]
    param: Callable[[int, str, str], str]
    string: Callable[[str], str]
    divide: Callable[[str, str, bool], str]  # (a, b, user) -> a / b as DuckDB's '/' means it
    operators: Mapping[str, Rule] = field(default_factory=dict)  # DuckDB operator name -> rule
    like_escape: str = ""  # appended to LIKE (DuckDB's LIKE has no escape character by default)
    byte_order: str = ""  # appended to a text constant compared by order (DuckDB orders text by bytes)

    def quote_ident(self, name: str) -> str:
        name = str(name)
        if "\x00" in name:
            raise Unsupported("identifiers holding a NUL character", self.engine)
        q = self.quote
        return q + name.replace(q, q + q) + q


@dataclass(frozen=True)
class Rendered:
    """SQL text for the target and the names of its bound parameters, in marker order."""

    sql: str
    names: tuple[str, ...]

    def values(self, params: Mapping | None) -> tuple:
        params = params or {}
        return tuple(params[n] for n in self.names)


def kind_of(value) -> str:
    """The parameter kind of a Python value (see :attr:`Target.param`)."""
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "bool"
    if isinstance(value, int):
        return "int"
    if isinstance(value, float):
        return "float"
    if isinstance(value, str):
        return "str"
    if type(value).__module__ == "numpy":
        return "float" if "float" in type(value).__name__ else "int"
    raise TypeError(f"no parameter kind for {type(value).__name__}")


# ---------------------------------------------------------------- the renderer

_COMPARISONS = {
    "COMPARE_EQUAL": "=", "COMPARE_NOTEQUAL": "<>", "COMPARE_LESSTHAN": "<", "COMPARE_GREATERTHAN": ">",
    "COMPARE_LESSTHANOREQUALTO": "<=", "COMPARE_GREATERTHANOREQUALTO": ">=",
    "COMPARE_DISTINCT_FROM": "IS DISTINCT FROM", "COMPARE_NOT_DISTINCT_FROM": "IS NOT DISTINCT FROM",
}
_JOINS = {"INNER": "JOIN", "LEFT": "LEFT JOIN", "RIGHT": "RIGHT JOIN", "OUTER": "FULL JOIN"}
_FRAME = {
    "UNBOUNDED_PRECEDING": "UNBOUNDED PRECEDING", "UNBOUNDED_FOLLOWING": "UNBOUNDED FOLLOWING",
    "CURRENT_ROW_RANGE": "CURRENT ROW", "CURRENT_ROW_ROWS": "CURRENT ROW",
    "EXPR_PRECEDING_ROWS": "PRECEDING", "EXPR_PRECEDING_RANGE": "PRECEDING",
    "EXPR_FOLLOWING_ROWS": "FOLLOWING", "EXPR_FOLLOWING_RANGE": "FOLLOWING",
}
_BOOLEAN_CLASSES = {"COMPARISON", "CONJUNCTION", "BETWEEN"}
_BOOLEAN_OPERATORS = {"OPERATOR_NOT", "OPERATOR_IS_NULL", "OPERATOR_IS_NOT_NULL", "COMPARE_IN", "COMPARE_NOT_IN"}
_BOOLEAN_FUNCTIONS = {"~~", "!~~", "~~*", "!~~*"}


def _arguments(node: dict) -> list[dict]:
    return [a["expression"] if isinstance(a, dict) and "expression" in a else a for a in node.get("arguments", [])]


class Renderer:
    """Writes one tree for a target; collects the parameters it meets, in order."""

    def __init__(self, target: Target, mode: str = "expression", kinds: Mapping[str, str] | None = None,
                 booleans: frozenset[str] = frozenset()):
        if mode not in ("expression", "query", "internal"):
            raise ValueError(mode)
        self.target = target
        self.mode = mode
        self.kinds = dict(kinds or {})
        self.booleans = booleans  # boolean columns: a CAST of one to a number goes through INTEGER
        self.names: list[str] = []

    def refuse(self, what: str, reason: str = ""):
        raise Unsupported(what, self.target.engine, reason)

    # ---- expressions
    def expr(self, node: dict) -> str:
        cls = node.get("class")
        method = getattr(self, "_" + str(cls).lower(), None)
        if method is None:
            self.refuse(f"the SQL construct {str(cls).lower()}")
        return method(node)

    def _constant(self, node: dict) -> str:
        literal = node.get("literal") or {}
        kind, text = literal.get("kind"), str(literal.get("text", ""))
        if kind == "NULL_LITERAL":
            return "NULL"
        if kind == "BOOLEAN":
            return "TRUE" if text.lower() == "true" else "FALSE"
        if kind in ("INTEGER", "BIGINT", "HUGEINT", "NUMERIC", "DECIMAL", "DOUBLE"):
            if not all(c in "0123456789.eE+-" for c in text) or not text:
                self.refuse(f"the constant {text!r}")
            return f"({text})" if text.startswith("-") else text
        if kind == "STRING":
            return self.target.string(text)
        self.refuse(f"constants of type {str(kind).lower()}")

    def _column_ref(self, node: dict) -> str:
        names = node.get("column_names") or []
        if not names:
            self.refuse("an empty column reference")
        return ".".join(self.target.quote_ident(n) for n in names)

    def _parameter(self, node: dict) -> str:
        if self.mode != "internal":
            self.refuse("query parameters")
        name = str(node.get("identifier", ""))
        kind = self.kinds.get(name)
        if kind is None:
            raise KeyError(f"parameter ${name} has no value")
        if kind == "null":
            return "NULL"
        self.names.append(name)
        return self.target.param(len(self.names), kind, name)

    def _ordered(self, node: dict) -> str:
        """An operand of an order comparison: a text constant compared in DuckDB's byte order
        (a database's collation may order 'East' after 'other')."""
        text = self.expr(node)
        if node.get("class") == "CONSTANT" and (node.get("literal") or {}).get("kind") == "STRING":
            text += self.target.byte_order
        return text

    def _comparison(self, node: dict) -> str:
        op = _COMPARISONS.get(node.get("type"))
        if op is None:
            self.refuse(f"the comparison {node.get('type')}")
        if op in ("<", ">", "<=", ">="):
            return f"({self._ordered(node['left'])} {op} {self._ordered(node['right'])})"
        return f"({self.expr(node['left'])} {op} {self.expr(node['right'])})"

    def _conjunction(self, node: dict) -> str:
        op = {"CONJUNCTION_AND": " AND ", "CONJUNCTION_OR": " OR "}.get(node.get("type"))
        if op is None:
            self.refuse(f"the conjunction {node.get('type')}")
        return "(" + op.join(self.expr(c) for c in node.get("children", [])) + ")"

    def _between(self, node: dict) -> str:
        return f"({self.expr(node['input'])} BETWEEN {self._ordered(node['lower'])} AND {self._ordered(node['upper'])})"

    def _operator(self, node: dict) -> str:
        kind = node.get("type")
        kids = node.get("children", [])
        if kind == "OPERATOR_NOT":
            return f"(NOT {self.expr(kids[0])})"
        if kind == "OPERATOR_IS_NULL":
            return f"({self.expr(kids[0])} IS NULL)"
        if kind == "OPERATOR_IS_NOT_NULL":
            return f"({self.expr(kids[0])} IS NOT NULL)"
        if kind in ("COMPARE_IN", "COMPARE_NOT_IN"):
            word = "IN" if kind == "COMPARE_IN" else "NOT IN"
            return f"({self.expr(kids[0])} {word} ({', '.join(self.expr(k) for k in kids[1:])}))"
        if kind == "OPERATOR_COALESCE":
            return f"coalesce({', '.join(self.expr(k) for k in kids)})"
        if kind == "GROUPING_FUNCTION" and self.mode == "internal":
            return f"GROUPING({', '.join(self.expr(k) for k in kids)})"
        if kind == "ARRAY_CONSTRUCTOR" and self.mode == "internal":
            return f"ARRAY[{', '.join(self.expr(k) for k in kids)}]"
        self.refuse(f"the operator {str(kind).lower()}")

    def _case(self, node: dict) -> str:
        parts = [f"WHEN {self.expr(c['when_expr'])} THEN {self.expr(c['then_expr'])}" for c in node.get("case_checks", [])]
        tail = node.get("else_expr")
        if tail is not None and not (tail.get("class") == "CONSTANT" and (tail.get("literal") or {}).get("kind") == "NULL_LITERAL"):
            parts.append(f"ELSE {self.expr(tail)}")
        return "(CASE " + " ".join(parts) + " END)"

    def type_name(self, type_expr: dict) -> str:
        name = str(type_expr.get("type_name", "")).upper()
        if type_expr.get("schema") or type_expr.get("catalog"):
            self.refuse(f"the type {name}")
        rule = self.target.types.get(name)
        if rule is None:
            self.refuse(f"the type {name}", "CAST to a type both engines have, such as DOUBLE, BIGINT, VARCHAR or DATE")
        children = type_expr.get("children") or []
        if children:
            if name not in ("DECIMAL", "NUMERIC"):
                self.refuse(f"the type {name} with modifiers")
            args = []
            for child in children:
                literal = (child.get("literal") or {}) if child.get("class") == "CONSTANT" else {}
                if literal.get("kind") != "INTEGER" or not str(literal.get("text", "")).isdigit():
                    self.refuse(f"the type {name} with modifiers")
                args.append(str(int(literal["text"])))
            return f"{rule}({', '.join(args)})"
        if name in ("DECIMAL", "NUMERIC"):
            return f"{rule}(18, 3)"  # DuckDB's DECIMAL without a width
        return rule

    def _is_boolean(self, node: dict) -> bool:
        cls = node.get("class")
        if cls in _BOOLEAN_CLASSES:
            return True
        if cls == "OPERATOR" and node.get("type") in _BOOLEAN_OPERATORS:
            return True
        if cls == "FUNCTION" and node.get("function_name") in _BOOLEAN_FUNCTIONS:
            return True
        if cls == "CONSTANT":
            return (node.get("literal") or {}).get("kind") == "BOOLEAN"
        if cls == "COLUMN_REF":
            return (node.get("column_names") or [""])[-1] in self.booleans
        return False

    def _cast(self, node: dict) -> str:
        if node.get("try_cast"):
            rule = self.target.internal.get("try_cast") if self.mode == "internal" else None
            if rule is None:
                self.refuse("TRY_CAST")
            return rule([self.expr(node["child"]), self.type_name(node["type_expr"])])
        child = self.expr(node["child"])
        kind = self.type_name(node["type_expr"])
        if self.mode != "internal" and kind == self.target.types.get("VARCHAR"):
            # numbers become other text (DuckDB writes 100.0, PostgreSQL 100)
            self.refuse("CAST to VARCHAR", "numbers are written as text differently on each engine")
        if self._is_boolean(node["child"]) and kind not in ("boolean", "text", "BOOLEAN", "STRING"):
            child = f"CAST({child} AS {self.target.types['INTEGER']})"
        return f"CAST({child} AS {kind})"

    def _function(self, node: dict) -> str:
        name = str(node.get("function_name", "")).lower()
        if node.get("schema") or node.get("catalog"):
            self.refuse(f"{node.get('schema')}.{name}()")
        args = [self.expr(a) for a in _arguments(node)]
        if node.get("is_operator"):
            return self._operator_call(name, args)
        if name == "count_star" or (name == "count" and not args):
            name, args = "count", ["*"]
        rule = self._rule(name, aggregate=name in self.target.aggregates)
        extra = node.get("filter") or node.get("distinct") or (node.get("order_bys") or {}).get("orders")
        if name in self.target.aggregates:
            if (node.get("order_bys") or {}).get("orders"):
                self.refuse(f"ORDER BY inside {name}()")
            if node.get("distinct"):
                if not isinstance(rule, str):
                    self.refuse(f"DISTINCT inside {name}()")
                args = ["DISTINCT " + ", ".join(args)]
            if callable(rule) and node.get("filter"):
                self.refuse(f"FILTER on {name}()")
            out = rule(args) if callable(rule) else f"{rule}({', '.join(args)})"
            if node.get("filter"):
                out += f" FILTER (WHERE {self.expr(node['filter'])})"
            return out
        if extra:
            self.refuse(f"aggregate clauses on {name}()")
        return rule(args) if callable(rule) else f"{rule}({', '.join(args)})"

    def _rule(self, name: str, aggregate: bool = False) -> Rule:
        t = self.target
        if aggregate:
            if self.mode == "expression":
                self.refuse(f"the aggregate {name}()")
            return t.aggregates[name]
        if name in t.functions:
            return t.functions[name]
        if self.mode == "internal" and name in t.internal:
            return t.internal[name]
        self.refuse(f"{name}()")

    def _operator_call(self, name: str, args: list[str]) -> str:
        t = self.target
        if name in t.operators:
            rule = t.operators[name]
            return rule(args) if callable(rule) else f"({f' {rule} '.join(args)})"
        if name == "-" and len(args) == 1:
            return f"(- {args[0]})"
        if name in ("+", "-", "*") and len(args) == 2:
            return f"({args[0]} {name} {args[1]})"
        if name == "/" and len(args) == 2:
            return t.divide(args[0], args[1], self.mode != "internal")
        if name in ("~~", "!~~", "~~*", "!~~*") and len(args) == 2:
            word = {"~~": "LIKE", "!~~": "NOT LIKE", "~~*": "ILIKE", "!~~*": "NOT ILIKE"}[name]
            return f"({args[0]} {word} {args[1]}{t.like_escape})"
        if name == "||" and len(args) == 2:
            return f"({args[0]} || {args[1]})"
        if self.mode == "internal" and name in ("&", "|", "<<", ">>") and len(args) == 2:
            return f"({args[0]} {name} {args[1]})"
        if self.mode == "internal" and name in t.internal:
            rule = t.internal[name]
            return rule(args) if callable(rule) else f"{rule}({', '.join(args)})"
        self.refuse(f"the operator {name}")

    def _window(self, node: dict) -> str:
        name = str(node.get("function_name", "")).lower()
        if self.mode != "internal" or name not in self.target.windows:
            self.refuse(f"the window function {name}()")
        if node.get("ignore_nulls") or node.get("filter_expr") or node.get("distinct") or node.get("arg_orders"):
            self.refuse(f"clauses of the window function {name}()")
        if node.get("exclude_clause") not in (None, "NO_OTHER"):
            self.refuse(f"EXCLUDE in the window of {name}()")
        args = [self.expr(a) for a in _arguments(node)]
        for extra in ("offset_expr", "default_expr"):
            if node.get(extra) is not None:
                args.append(self.expr(node[extra]))
        if name in ("count_star", "count") and not args:
            call = "count(*)"
        else:
            call = f"{self.target.aggregates.get(name, name)}({', '.join(args)})"
        parts = []
        if node.get("partitions"):
            parts.append("PARTITION BY " + ", ".join(self.expr(p) for p in node["partitions"]))
        if node.get("orders"):
            parts.append("ORDER BY " + ", ".join(self.order(o) for o in node["orders"]))
        start, end = node.get("start"), node.get("end")
        if (start, end) != ("UNBOUNDED_PRECEDING", "CURRENT_ROW_RANGE"):
            unit = "ROWS" if "ROWS" in str(start) + str(end) else "RANGE"
            parts.append(f"{unit} BETWEEN {self._bound(start, node.get('start_expr'))} AND {self._bound(end, node.get('end_expr'))}")
        return f"{call} OVER ({' '.join(parts)})"

    def _bound(self, kind: str, value: dict | None) -> str:
        word = _FRAME.get(kind)
        if word is None:
            self.refuse(f"the window frame {kind}")
        return f"{self.expr(value)} {word}" if kind.startswith("EXPR_") else word

    def _subquery(self, node: dict) -> str:
        if self.mode == "expression":
            self.refuse("subqueries")
        kind = node.get("subquery_type")
        body = self.query_node(node["subquery"]["node"])
        if kind == "SCALAR":
            return f"({body})"
        if kind == "EXISTS":
            return f"(EXISTS ({body}))"
        if kind == "ANY" and node.get("comparison_type") in _COMPARISONS:
            op = _COMPARISONS[node["comparison_type"]]
            if op.startswith("IS"):
                self.refuse("IS [NOT] DISTINCT FROM ANY")
            return f"({self.expr(node['child'])} {op} ANY ({body}))"
        self.refuse(f"{str(kind).lower()} subqueries")

    def order(self, item: dict) -> str:
        direction = {"ORDER_DEFAULT": "", "ASCENDING": " ASC", "DESCENDING": " DESC"}.get(item.get("type"))
        nulls = {"ORDER_DEFAULT": " NULLS LAST", "NULLS_FIRST": " NULLS FIRST", "NULLS_LAST": " NULLS LAST"}.get(item.get("null_order"))
        if direction is None or nulls is None:
            self.refuse("the ordering " + str(item.get("type")))
        return f"{self.expr(item['expression'])}{direction}{nulls}"

    # ---- statements
    def query_node(self, node: dict) -> str:
        ctes = self._ctes(node.get("cte_map") or {})
        kind = node.get("type")
        if kind == "SELECT_NODE":
            body = self._select(node)
        elif kind == "SET_OPERATION_NODE":
            body = self._set_operation(node)
        else:
            self.refuse(f"the query form {str(kind).lower()}")
        return ctes + body + self._modifiers(node.get("modifiers") or [], kind == "SELECT_NODE", node)

    def _ctes(self, cte_map: dict) -> str:
        items = cte_map.get("map") or []
        if not items:
            return ""
        parts = []
        for item in items:
            value = item["value"]
            if value.get("key_targets") or value.get("payload_aggregates"):
                self.refuse("recursive or keyed CTEs")
            names = value.get("aliases") or []
            cols = f" ({', '.join(self.target.quote_ident(a) for a in names)})" if names else ""
            how = {"CTE_MATERIALIZE_ALWAYS": "MATERIALIZED ", "CTE_MATERIALIZE_NEVER": "NOT MATERIALIZED "}.get(
                value.get("materialized"), "")
            parts.append(f"{self.target.quote_ident(item['key'])}{cols} AS {how}({self.query_node(value['query_node'])})")
        return "WITH " + ", ".join(parts) + " "

    def _select(self, node: dict) -> str:
        if node.get("qualify") or node.get("sample"):
            self.refuse("QUALIFY or USING SAMPLE")
        if node.get("aggregate_handling", "STANDARD_HANDLING") != "STANDARD_HANDLING":
            self.refuse("GROUP BY ALL")
        distinct = any(m.get("type") == "DISTINCT_MODIFIER" for m in node.get("modifiers") or [])
        items = ", ".join(self._select_item(i) for i in node.get("select_list", []))
        sql = f"SELECT {'DISTINCT ' if distinct else ''}{items}"
        source = node.get("from_table") or {"type": "EMPTY"}
        if source.get("type") != "EMPTY":
            sql += " FROM " + self.table_ref(source)
        if node.get("where_clause"):
            sql += " WHERE " + self.expr(node["where_clause"])
        groups = node.get("group_expressions") or []
        if groups:
            rendered = [self.expr(g) for g in groups]
            sets = node.get("group_sets") or [list(range(len(groups)))]
            if len(sets) == 1 and sorted(sets[0]) == list(range(len(groups))):
                sql += " GROUP BY " + ", ".join(rendered)
            else:
                sql += " GROUP BY GROUPING SETS (" + ", ".join(
                    "(" + ", ".join(rendered[i] for i in s) + ")" for s in sets) + ")"
        if node.get("having"):
            sql += " HAVING " + self.expr(node["having"])
        return sql

    def _select_item(self, item: dict) -> str:
        if item.get("class") == "STAR":
            if item.get("exclude_list") or item.get("replace_list") or item.get("columns") or item.get("expr") \
                    or item.get("qualified_exclude_list") or item.get("rename_list"):
                self.refuse("* with EXCLUDE, REPLACE, RENAME or COLUMNS")
            rel = item.get("relation_name")
            text = f"{self.target.quote_ident(rel)}.*" if rel else "*"
        else:
            text = self.expr(item)
        alias = item.get("alias")
        return f"{text} AS {self.target.quote_ident(alias)}" if alias else text

    def _set_operation(self, node: dict) -> str:
        word = {"UNION": "UNION", "EXCEPT": "EXCEPT", "INTERSECT": "INTERSECT"}.get(node.get("setop_type"))
        if word is None:
            self.refuse(f"{str(node.get('setop_type')).replace('_', ' ')}")
        kids = node.get("children") or [node.get("left"), node.get("right")]
        glue = f" {word}{' ALL' if node.get('setop_all') else ''} "
        return glue.join(f"({self.query_node(k)})" for k in kids)

    def _width(self, node: dict) -> int:
        """Columns of a query node's result (ORDER BY ALL orders by each, left to right)."""
        while node.get("type") == "SET_OPERATION_NODE":
            node = (node.get("children") or [node.get("left")])[0]
        items = node.get("select_list") or []
        if any(i.get("class") in ("STAR", "COLUMNS") for i in items):
            self.refuse("ORDER BY ALL over *")
        return len(items)

    def _modifiers(self, modifiers: list[dict], select: bool, node: dict) -> str:
        out = ""
        for m in modifiers:
            kind = m.get("type")
            orders = m.get("orders", [])
            if kind == "ORDER_MODIFIER" and len(orders) == 1 and (orders[0].get("expression") or {}).get("class") == "STAR" \
                    and orders[0]["expression"].get("columns") and self.mode == "internal":
                suffix = self.order({**orders[0], "expression": {"class": "CONSTANT", "literal": {"kind": "INTEGER", "text": "0"}}})[1:]
                out += " ORDER BY " + ", ".join(f"{i}{suffix}" for i in range(1, self._width(node) + 1))
            elif kind == "ORDER_MODIFIER":
                out += " ORDER BY " + ", ".join(self.order(o) for o in orders)
            elif kind == "LIMIT_MODIFIER":
                if m.get("limit") is not None:
                    out += " LIMIT " + self.expr(m["limit"])
                if m.get("offset") is not None:
                    out += " OFFSET " + self.expr(m["offset"])
            elif kind == "DISTINCT_MODIFIER" and select and not m.get("distinct_on_targets"):
                continue
            else:
                self.refuse(f"the clause {str(kind).lower()}")
        return out

    def table_ref(self, ref: dict) -> str:
        kind = ref.get("type")
        alias = ref.get("alias")
        cols = ref.get("column_name_alias") or []
        if ref.get("sample"):
            self.refuse("USING SAMPLE")
        if kind == "BASE_TABLE":
            if ref.get("at_clause"):
                self.refuse("AT (time travel)")
            parts = [p for p in (ref.get("schema_name"), ref.get("table_name")) if p]
            if ref.get("catalog_name"):
                self.refuse("a table in another database", "name the table as schema.table")
            text = ".".join(self.target.quote_ident(p) for p in parts)
        elif kind == "SUBQUERY":
            text = f"({self.query_node(ref['subquery']['node'])})"
            if not alias:
                alias = "subquery"
        elif kind == "EXPRESSION_LIST":
            rows = ", ".join("(" + ", ".join(self.expr(v) for v in row) + ")" for row in ref.get("values", []))
            text = f"(VALUES {rows})"
            alias = alias or "valueslist"
        elif kind == "JOIN" and ref.get("join_type") in ("ANTI", "SEMI") and ref.get("ref_type") in ("REGULAR", None):
            # a ANTI JOIN b ON c: the rows of a with no (SEMI: some) row of b meeting c, under a's name
            left = ref["left"]
            name = left.get("alias") or (left.get("table_name") if left.get("type") == "BASE_TABLE" else None)
            if not name or ref.get("condition") is None or left.get("column_name_alias"):
                self.refuse("this form of anti or semi join")
            test = "NOT EXISTS" if ref["join_type"] == "ANTI" else "EXISTS"
            return (f"(SELECT * FROM {self.table_ref(left)} WHERE {test} (SELECT 1 FROM {self.table_ref(ref['right'])} "
                    f"WHERE {self.expr(ref['condition'])})) AS {self.target.quote_ident(name)}")
        elif kind == "JOIN" and ref.get("ref_type") == "CROSS":
            return f"{self.table_ref(ref['left'])} CROSS JOIN {self.table_ref(ref['right'])}"
        elif kind == "JOIN":
            if ref.get("ref_type") not in ("REGULAR", None) or ref.get("join_type") not in _JOINS:
                self.refuse(f"{str(ref.get('ref_type')).lower()} {str(ref.get('join_type')).lower()} joins")
            left, right = self.table_ref(ref["left"]), self.table_ref(ref["right"])
            if ref.get("using_columns"):
                on = " USING (" + ", ".join(self.target.quote_ident(c) for c in ref["using_columns"]) + ")"
            elif ref.get("condition") is not None:
                on = " ON " + self.expr(ref["condition"])
            elif ref.get("join_type") == "INNER":
                return f"{left} CROSS JOIN {right}"
            else:
                self.refuse("a join without a condition")
            return f"{left} {_JOINS[ref['join_type']]} {right}{on}"
        elif kind == "TABLE_FUNCTION":
            function = (ref.get("function") or {}).get("function_name", "a table function")
            self.refuse(f"the table function {function}()")
        else:
            self.refuse(f"the table reference {str(kind).lower()}")
        if alias:
            text += f" AS {self.target.quote_ident(alias)}"
            if cols:
                text += "(" + ", ".join(self.target.quote_ident(c) for c in cols) + ")"
        elif cols:
            self.refuse("column aliases without a table alias")
        return text


# ---------------------------------------------------------------- entry points


def expression(node: dict, target: Target, booleans: frozenset[str] = frozenset()) -> str:
    """A user's checked scalar expression (a parse-tree node) as the target's SQL."""
    out = Renderer(target, "expression", booleans=booleans).expr(node)
    if len(out) > MAX_RENDERED:
        raise Unsupported("an expression this deeply nested", target.engine, "its rendering is too long")
    return out


def statement(node: dict, target: Target, mode: str = "query", kinds: Mapping[str, str] | None = None,
              booleans: frozenset[str] = frozenset()) -> Rendered:
    """A checked statement's query node (``statements[0]['node']``) as the target's SQL."""
    renderer = Renderer(target, mode, kinds, booleans)
    sql = renderer.query_node(node)
    if len(sql) > MAX_RENDERED * 10:
        raise Unsupported("a query this large", target.engine, "its rendering is too long")
    return Rendered(sql, tuple(renderer.names))


def translate(sql: str, target: Target, params: Mapping | None = None, mode: str = "internal",
              booleans: frozenset[str] = frozenset()) -> Rendered:
    """SQL text in DuckDB's dialect (built by :mod:`bigpanel.sqlbuild`) for the target:
    parsed by DuckDB's parser (one SELECT statement) and rendered from the tree. The result
    depends on the text and the parameters' kinds only, and is cached on them."""
    kinds = tuple(sorted((k, kind_of(v)) for k, v in (params or {}).items()))
    return _translate(sql, target, kinds, mode, booleans)


@functools.lru_cache(maxsize=512)
def _translate(sql: str, target: Target, kinds: tuple, mode: str, booleans: frozenset[str]) -> Rendered:
    tree = parse_tree(sql)
    if tree.get("error"):
        raise ValueError(f"not valid SQL: {tree.get('error_message')}")
    statements = tree.get("statements") or []
    if len(statements) != 1:
        raise ValueError("not exactly one statement")
    return statement(statements[0]["node"], target, mode, dict(kinds), booleans)


def dump(node: dict) -> str:
    """A node as JSON (for debugging messages)."""
    return json.dumps(node)[:400]


# ---------------------------------------------------------------- PostgreSQL


def _pg_string(text: str) -> str:
    if "\x00" in text:
        raise Unsupported("text holding a NUL character", "PostgreSQL")
    # E'' strings read the same whatever standard_conforming_strings is set to
    return "E'" + text.replace("\\", "\\\\").replace("'", "''") + "'"


_PG_PARAM_TYPES = {"float": "double precision", "int": "bigint", "str": "text", "bool": "boolean"}


def _pg_param(position: int, kind: str, name: str) -> str:
    return f"CAST(${position} AS {_PG_PARAM_TYPES[kind]})"


def _pg_divide(a: str, b: str, user: bool) -> str:
    # DuckDB's '/' divides as doubles (7 / 2 is 3.5); PostgreSQL's truncates integers and
    # stops the query at a zero divisor, where DuckDB gives an infinity or NaN: a user's
    # division by zero gives NULL here, which leaves the row out of a fit as DuckDB's
    # non-finite value does (README: "Data beyond one machine").
    divisor = f"NULLIF(CAST({b} AS double precision), 0)" if user else b
    return f"(CAST({a} AS double precision) / {divisor})"


def _arity(name: str, counts: tuple[int, ...], rule: Callable[[list[str]], str],
           engine: str = "PostgreSQL") -> Callable[[list[str]], str]:
    def checked(args: list[str]) -> str:
        if len(args) not in counts:
            raise Unsupported(f"{name}() with {len(args)} arguments", engine)
        return rule(args)

    return checked


def _same(name: str, *counts: int) -> Callable[[list[str]], str]:
    return _arity(name, counts, lambda a: f"{name}({', '.join(a)})")


def _positive_only(name: str) -> Callable[[list[str]], str]:
    # DuckDB: ln(0) = -inf, ln(-1) = NaN; PostgreSQL stops the query. NULL instead: the row
    # is left out of a fit either way. GREATEST keeps NaN (PostgreSQL orders it above all).
    return _arity(name, (1,), lambda a: f"{name}(NULLIF(GREATEST(CAST({a[0]} AS double precision), 0), 0))")


def _sqrt(args: list[str]) -> str:
    # DuckDB: sqrt(-1) = NaN; PostgreSQL stops the query: NULL for negative values
    x = f"CAST({args[0]} AS double precision)"
    return f"sqrt(CASE WHEN {x} < 0 THEN NULL ELSE {x} END)"


def _date_part(args: list[str]) -> str:
    part = args[0].lower()
    allowed = ("year", "quarter", "month", "day", "dow", "doy", "hour", "minute", "week", "isoyear", "epoch")
    if part not in [f"e'{p}'" for p in allowed]:
        raise Unsupported("date_part() of that part", "PostgreSQL", "use year, quarter, month, day, dow, doy, week, isoyear, hour, minute or epoch")
    return f"date_part({args[0].lower()}, {args[1]})"


PG_FUNCTIONS: dict[str, Rule] = {
    **{n: _same(n, 1) for n in ("abs", "ceil", "ceiling", "floor", "trunc", "cbrt", "exp", "sin", "cos", "tan", "asin",
                                "acos", "atan", "degrees", "radians", "lower", "upper", "length")},
    "atan2": _same("atan2", 2), "pi": _same("pi", 0),
    "power": _same("power", 2), "pow": _arity("pow", (2,), lambda a: f"power({a[0]}, {a[1]})"),
    "sign": _same("sign", 1),
    "greatest": _arity("greatest", tuple(range(1, 100)), lambda a: f"GREATEST({', '.join(a)})"),
    "least": _arity("least", tuple(range(1, 100)), lambda a: f"LEAST({', '.join(a)})"),
    "nullif": _arity("nullif", (2,), lambda a: f"NULLIF({a[0]}, {a[1]})"),
    "ln": _positive_only("ln"), "log": _positive_only("log"), "log10": _positive_only("log10"),
    "sqrt": _arity("sqrt", (1,), _sqrt),
    "date_part": _arity("date_part", (2,), _date_part),
}

def _pg_sxx(args: list[str]) -> str:
    # PostgreSQL's regr_sxx (Youngs-Cramer) can leave a tiny positive sum for a constant
    # column, where DuckDB's streaming update gives exactly zero: zero when min = max
    if args[0] != args[1]:
        return f"regr_sxx({args[0]}, {args[1]})"
    return f"(CASE WHEN min({args[0]}) = max({args[0]}) THEN 0 ELSE regr_sxx({args[0]}, {args[1]}) END)"


PG_AGGREGATES: dict[str, Rule] = {
    "count": "count", "sum": "sum", "min": "min", "max": "max", "avg": "avg",
    "fsum": "sum", "kahan_sum": "sum", "sumkahan": "sum", "favg": "avg", "regr_sxx": _arity("regr_sxx", (2,), _pg_sxx),
    "array_agg": "array_agg",
}


def _pg_year_month(part: str) -> Callable[[list[str]], str]:
    return _arity(part, (1,), lambda a: f"CAST(date_part(E'{part}', {a[0]}) AS bigint)")


def _pg_try_cast(args: list[str]) -> str:
    # TRY_CAST(text AS DOUBLE) (the checkup's test for numbers written as text): NULL unless
    # the text reads as a number as DuckDB reads it
    value, kind = args
    if kind != "double precision":
        raise Unsupported(f"TRY_CAST to {kind}", "PostgreSQL")
    special = ", ".join(_pg_string(t) for t in NUMBER_WORDS)
    # (PostgreSQL 15 reads no underscores between digits: they are taken out first)
    return (f"(CASE WHEN {value} ~ {_pg_string(NUMBER_TEXT)} OR lower(trim({value})) IN ({special}) "
            f"THEN CAST(replace(trim({value}), E'_', E'') AS double precision) END)")


def _pg_day_diff(args: list[str]) -> str:
    if args[0].lower() != "e'day'":
        raise Unsupported("date_diff() in units other than days", "PostgreSQL")
    return f"(CAST({args[2]} AS date) - CAST({args[1]} AS date))"


PG_INTERNAL: dict[str, Rule] = {
    # a finite double times zero is zero; an infinity or NaN gives NaN, NULL stays NULL
    "isfinite": _arity("isfinite", (1,), lambda a: f"(({a[0]}) * 0 = 0)"),
    "//": _arity("//", (2,), lambda a: f"div({a[0]}, {a[1]})"),
    "year": _pg_year_month("year"),
    "month": _pg_year_month("month"),
    "epoch_us": _arity("epoch_us", (1,), lambda a: f"CAST(date_part(E'epoch', {a[0]}) * 1000000 AS bigint)"),
    "date_diff": _arity("date_diff", (3,), lambda a: _pg_day_diff(a)),
    "try_cast": _pg_try_cast,
}

PG_TYPES = {
    "DOUBLE": "double precision", "FLOAT8": "double precision", "FLOAT": "real", "REAL": "real", "FLOAT4": "real",
    "BIGINT": "bigint", "INT8": "bigint", "LONG": "bigint", "INTEGER": "integer", "INT": "integer", "INT4": "integer",
    "SMALLINT": "smallint", "INT2": "smallint", "TINYINT": "smallint", "HUGEINT": "numeric",
    "DECIMAL": "numeric", "NUMERIC": "numeric", "VARCHAR": "text", "TEXT": "text", "STRING": "text",
    "BOOLEAN": "boolean", "BOOL": "boolean", "DATE": "date", "TIMESTAMP": "timestamp",
    "TIMESTAMPTZ": "timestamptz", "TIMESTAMP WITH TIME ZONE": "timestamptz",
}

POSTGRES = Target(
    name="postgres",
    engine="PostgreSQL",
    quote='"',
    types=PG_TYPES,
    functions=PG_FUNCTIONS,
    aggregates=PG_AGGREGATES,
    internal=PG_INTERNAL,
    windows=frozenset({"lag", "lead", "first_value", "avg", "sum", "count", "count_star", "min", "max"}),
    param=_pg_param,
    string=_pg_string,
    divide=_pg_divide,
    operators={"**": lambda a: f"power({a[0]}, {a[1]})", "^": lambda a: f"power({a[0]}, {a[1]})", "%": "%"},
    like_escape=" ESCAPE E''",
    byte_order=' COLLATE "C"',
)


# ---------------------------------------------------------------- Spark SQL
# User expressions only (bigpanel's own queries for Spark are written by sqlbuild in its
# SPARK dialect). The session runs with spark.sql.ansi.enabled = false, so a division by
# zero or a failed cast gives NULL: the row is left out of a fit, as DuckDB leaves out its
# non-finite values.


def _spark_string(text: str) -> str:
    # Spark reads backslash escapes inside '...': the backslash is doubled, the quote escaped
    return "'" + text.replace("\\", "\\\\").replace("'", "\\'") + "'"


def _spark_param(position: int, kind: str, name: str) -> str:
    return f":{name}"


def _spark_divide(a: str, b: str, user: bool) -> str:
    # DuckDB's '/' divides as doubles (7 / 2 is 3.5), as Spark's does
    return f"(CAST({a} AS DOUBLE) / CAST({b} AS DOUBLE))"


def _spark_arity(name: str, counts: tuple[int, ...], rule: Callable[[list[str]], str]) -> Callable[[list[str]], str]:
    return _arity(name, counts, rule, "Spark")


def _spark_same(name: str, *counts: int, spark_name: str | None = None) -> Callable[[list[str]], str]:
    return _spark_arity(name, counts, lambda a: f"{spark_name or name}({', '.join(a)})")


def _spark_like(word: str) -> Callable[[list[str]], str]:
    # DuckDB's LIKE has no escape character; Spark's is the backslash. Same meaning only
    # for a literal pattern without one.
    def rule(args: list[str]) -> str:
        pattern = args[1]
        if not (pattern.startswith("'") and pattern.endswith("'")) or "\\" in pattern:
            raise Unsupported(f"{word} with a pattern that is not a text without backslashes", "Spark")
        return f"({args[0]} {word} {pattern})"

    return rule


SPARK_FUNCTIONS: dict[str, Rule] = {
    # same name, same result wherever both are defined (Spark's ln, log10, sqrt of values
    # outside the domain give NULL or NaN where DuckDB gives NaN, an infinity or an error:
    # the row is left out of a fit either way)
    **{n: _spark_same(n, 1) for n in ("abs", "exp", "ln", "log10", "log2", "sqrt", "cbrt", "sin", "cos", "tan", "asin",
                                      "acos", "atan", "degrees", "radians", "lower", "upper", "length", "year",
                                      "quarter", "month")},
    "log": _spark_same("log", 1, spark_name="log10"),  # DuckDB's log(x) is base 10; Spark's one-argument log is ln
    "atan2": _spark_same("atan2", 2), "pi": _spark_same("pi", 0),
    "power": _spark_same("power", 2), "pow": _spark_same("pow", 2, spark_name="power"),
    "sign": _spark_same("sign", 1, spark_name="signum"),
    "greatest": _spark_arity("greatest", tuple(range(2, 100)), lambda a: f"greatest({', '.join(a)})"),
    "least": _spark_arity("least", tuple(range(2, 100)), lambda a: f"least({', '.join(a)})"),
    "nullif": _spark_same("nullif", 2),
    "dayofmonth": _spark_same("dayofmonth", 1),
}

SPARK_TYPES = {
    "DOUBLE": "DOUBLE", "FLOAT8": "DOUBLE", "FLOAT": "FLOAT", "REAL": "FLOAT", "FLOAT4": "FLOAT",
    "BIGINT": "BIGINT", "INT8": "BIGINT", "LONG": "BIGINT", "INTEGER": "INT", "INT": "INT", "INT4": "INT",
    "SMALLINT": "SMALLINT", "INT2": "SMALLINT", "TINYINT": "TINYINT", "HUGEINT": "DECIMAL(38, 0)",
    "DECIMAL": "DECIMAL", "NUMERIC": "DECIMAL", "VARCHAR": "STRING", "TEXT": "STRING", "STRING": "STRING",
    "BOOLEAN": "BOOLEAN", "BOOL": "BOOLEAN", "DATE": "DATE", "TIMESTAMP": "TIMESTAMP_NTZ",
    "TIMESTAMPTZ": "TIMESTAMP", "TIMESTAMP WITH TIME ZONE": "TIMESTAMP",
}

SPARK = Target(
    name="spark",
    engine="Spark",
    quote="`",
    types=SPARK_TYPES,
    functions=SPARK_FUNCTIONS,
    aggregates={"count": "count", "sum": "sum", "min": "min", "max": "max", "avg": "avg"},
    internal={},
    windows=frozenset(),
    param=_spark_param,
    string=_spark_string,
    divide=_spark_divide,
    operators={"**": lambda a: f"power({a[0]}, {a[1]})", "^": lambda a: f"power({a[0]}, {a[1]})", "%": "%",
               "~~": _spark_like("LIKE"), "!~~": _spark_like("NOT LIKE"), "~~*": _spark_like("ILIKE"),
               "!~~*": _spark_like("NOT ILIKE")},
)
