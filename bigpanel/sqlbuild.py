"""Every SQL text bigpanel runs is built here, from the templates in ``sql/``.

Building never touches a connection: functions return ``(sql, params)`` or SQL text
that :mod:`bigpanel.source` runs. Identifiers go through :func:`quote_ident` only;
values travel as parameters, except file names inside table functions, which go
through :func:`quote_literal` (DuckDB does not bind parameters inside ``ATTACH``).
Template placeholders are ``{{name}}`` and are filled only with fragments made by this
module: quoted identifiers, validated user expressions, or lists of those.
"""

from __future__ import annotations

import json
import re
from functools import cache
from importlib import resources
from pathlib import Path

_PLACEHOLDER = re.compile(r"\{\{(\w+)\}\}")


def quote_ident(name: str) -> str:
    """Quote an identifier for DuckDB: ``a"b`` becomes ``"a""b"``."""
    return '"' + str(name).replace('"', '""') + '"'


def quote_literal(value: str) -> str:
    """Quote a string literal: ``it's`` becomes ``'it''s'``."""
    return "'" + str(value).replace("'", "''") + "'"


def _template_dir() -> Path:
    packaged = resources.files("bigpanel") / "sql"
    if packaged.is_dir():
        return Path(str(packaged))
    return Path(__file__).resolve().parent.parent / "sql"


@cache
def template(name: str) -> str:
    """Return the text of ``sql/<name>.sql`` without its leading comment block."""
    text = (_template_dir() / f"{name}.sql").read_text(encoding="utf-8")
    body = [line for line in text.splitlines() if not line.startswith("--")]
    return "\n".join(body).strip()


def template_placeholders(name: str) -> set[str]:
    """Placeholders used by a template (tests check each is filled by a builder)."""
    return set(_PLACEHOLDER.findall(template(name)))


def render(name: str, **fragments: str) -> str:
    """Fill a template's placeholders; every placeholder must be given, and no other."""
    text = template(name)
    wanted = set(_PLACEHOLDER.findall(text))
    if wanted != set(fragments):
        raise KeyError(f"template {name}: expects {sorted(wanted)}, got {sorted(fragments)}")
    return _PLACEHOLDER.sub(lambda m: fragments[m.group(1)], text)


def template_names() -> list[str]:
    return sorted(p.stem for p in _template_dir().glob("*.sql"))


# ---------------------------------------------------------------- relations


def parquet_relation(paths: list[str], hive: bool) -> str:
    """``read_parquet`` over a list of files; columns missing from some files read as NULL."""
    files = "[" + ", ".join(quote_literal(p) for p in paths) + "]"
    return f"read_parquet({files}, union_by_name = true, hive_partitioning = {str(hive).lower()})"


def csv_relation(paths: list[str], types: dict[str, str] | None, options: dict[str, str] | None) -> str:
    """``read_csv`` with auto-detection; ``types`` pins column types, ``options`` passes
    ``delim``, ``decimal_separator``, ``nullstr`` or ``header``."""
    files = "[" + ", ".join(quote_literal(p) for p in paths) + "]"
    parts = [files, "auto_detect = true", "union_by_name = true"]
    if types:
        pairs = ", ".join(f"{quote_literal(k)}: {quote_literal(v)}" for k, v in types.items())
        parts.append(f"types = {{{pairs}}}")
    for key, value in (options or {}).items():
        parts.append(f"{key} = {quote_literal(value)}")
    return f"read_csv({', '.join(parts)})"


def table_relation(catalog: str | None, table: str) -> str:
    parts = [p for p in (catalog, *table.split(".")) if p]
    return ".".join(quote_ident(p) for p in parts)


def query_relation(sql: str) -> str:
    return f"({sql})"


def attach_sql(path: str, alias: str) -> str:
    return f"ATTACH {quote_literal(path)} AS {quote_ident(alias)} (READ_ONLY)"


# ---------------------------------------------------------------- expressions


def parse_check_sql(expression: str) -> tuple[str, list]:
    """Query that returns DuckDB's parse tree of ``SELECT <expression>`` as JSON."""
    return "SELECT json_serialize_sql($1)", ["SELECT " + expression]


_FORBIDDEN_CLASSES = {"SUBQUERY", "WINDOW", "STAR", "COLUMNS", "LAMBDA_REF"}


def expression_problem(tree_json: str, function_kinds: dict[str, str]) -> str | None:
    """Why a parsed ``SELECT <expr>`` is not a single scalar expression, or None.

    ``function_kinds`` maps function names to DuckDB's ``function_type`` (scalar,
    aggregate, table, ...).
    """
    tree = json.loads(tree_json)
    if tree.get("error"):
        return f"it is not valid SQL ({tree.get('error_message', 'parse error')})"
    statements = tree.get("statements", [])
    if len(statements) != 1:
        return "it holds more than one statement"
    node = statements[0]["node"]
    if node.get("type") != "SELECT_NODE" or len(node.get("select_list", [])) != 1:
        return "it is not a single expression"
    if node.get("from_table", {}).get("type") not in (None, "EMPTY"):
        return "it reads from a table"
    for key in ("where_clause", "having", "qualify", "sample"):
        if node.get(key):
            return "it is not a single expression"
    if node.get("modifiers") or node.get("group_expressions") or node.get("cte_map", {}).get("map"):
        return "it is not a single expression"
    stack = list(node["select_list"])
    while stack:
        item = stack.pop()
        if isinstance(item, dict):
            cls = item.get("class")
            if cls in _FORBIDDEN_CLASSES:
                return {"SUBQUERY": "it contains a subquery", "WINDOW": "it contains a window function"}.get(
                    cls, "it is not a scalar expression"
                )
            if cls == "FUNCTION":
                name = str(item.get("function_name", "")).lower()
                kind = function_kinds.get(name)
                if kind not in (None, "scalar", "macro"):
                    return f"it calls the {kind} function {name}()"
            stack.extend(v for v in item.values() if isinstance(v, (dict, list)))
        elif isinstance(item, list):
            stack.extend(item)
    return None


def function_kinds_sql() -> str:
    return "SELECT DISTINCT lower(function_name), function_type FROM duckdb_functions()"
