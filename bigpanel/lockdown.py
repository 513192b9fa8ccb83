"""What the engine may reach once a connection is set up, and the guard on what it runs.

After set-up (settings, the DuckDB source attached read-only, frames registered),
:mod:`bigpanel.source` runs :func:`lockdown_sql`: DuckDB may then read only the source's
own files (``allowed_paths``; for a glob in a query, the folder before the first wildcard
in ``allowed_directories``), nothing else (``enable_external_access = false``), and no
setting can change (``lock_configuration = true``). Extension auto-install and auto-load
are off from the moment the connection opens. DuckDB adds the spill folder to the allowed
folders itself; it is a private folder (mode 0700) made for this session and removed when
the session closes.

An allowed path can still be written (a COPY over a source file), and a read-only DuckDB
file, once detached, could be attached again for writing. So every statement a session
runs goes through :class:`LockedConnection`, which runs nothing but a single SELECT
(DESCRIBE included; parsed by ``source.check_select``, each distinct text once): no COPY, ATTACH, DETACH, SET, INSTALL, LOAD or PRAGMA, whatever a
check upstream missed.

Remote sources (any ``scheme://``) are refused, as the source or read inside a query.
"""

from __future__ import annotations

import os
import re
from collections.abc import Callable, Iterable
from typing import Any

import duckdb

from . import interrupts, sqlbuild
from .errors import InputError, echo

_REMOTE = re.compile(r"^\s*[A-Za-z][A-Za-z0-9+.\-]*://")
_WILDCARDS = "*?["
_NAMED_ARGUMENT = "COMPARISON"  # read_csv('f.csv', delim = ';'): a named argument parses as a comparison


def is_remote(path: str) -> bool:
    """True for a URL with a scheme (http://, s3://, hf://, ...)."""
    return bool(_REMOTE.match(path))


# URL schemes of the file systems a Spark cluster reads itself (bigpanel.spark): with
# --engine spark such a path goes to Spark unread; DuckDB never opens a URL.
SPARK_SCHEMES = ("hdfs", "viewfs", "s3a", "s3", "gs", "abfs", "abfss", "wasb", "wasbs", "file")


_URL_KEY = re.compile(r"\b([A-Za-z][A-Za-z0-9+.\-]*://)[^/@\s]*@")


def mask_url_keys(text: str) -> str:
    """``text`` with whatever a URL holds before an ``@`` (a user, key or password) shown as ``***``."""
    return _URL_KEY.sub(r"\1***@", text)


def url_scheme(path: str) -> str:
    return path.split("://", 1)[0].strip().lower() if is_remote(path) else ""


def refuse_remote_source(path: str, engine: str = "duckdb") -> None:
    if not is_remote(path):
        return
    if engine == "spark":
        if url_scheme(path) in SPARK_SCHEMES:
            return
        raise InputError(f"Source '{echo(path)}' is a {url_scheme(path)}:// URL, which the spark engine does not read; "
                         f"give a folder, file or glob on a file system Spark reads ({', '.join(SPARK_SCHEMES)}).")
    raise InputError(f"Source '{echo(path)}' is a remote URL; bigpanel reads local files only. "
                     "Download the data and point at the local copy, or let a Spark cluster read it "
                     "(--engine spark reads hdfs://, s3a://, gs://, abfss:// and file:// paths).")


def _read_places(tree: Any) -> list[tuple[dict, str, bool]]:
    """Where a parsed query names what it reads as files, as (node, key, is_table_name):
    table names (``FROM 'x.parquet'``) and the positional text arguments of table functions
    (``read_parquet(['a/*.parquet', 'b.parquet'])``), in ``json_serialize_sql``'s tree."""
    found: list[tuple[dict, str, bool]] = []

    def strings(node: Any) -> Iterable[dict]:
        if isinstance(node, dict):
            if node.get("class") == "CONSTANT":
                literal = node.get("literal") or {}
                if literal.get("kind") == "STRING":
                    yield literal
                return
            for value in node.values():
                yield from strings(value)
        elif isinstance(node, list):
            for value in node:
                yield from strings(value)

    def walk(node: Any) -> None:
        if isinstance(node, dict):
            if node.get("type") == "BASE_TABLE" and not node.get("schema_name") and not node.get("catalog_name"):
                found.append((node, "table_name", True))
            if node.get("type") == "TABLE_FUNCTION":
                for argument in (node.get("function") or {}).get("arguments", []):
                    expression = argument.get("expression") if isinstance(argument, dict) else None
                    if expression and not argument.get("name") and expression.get("class") != _NAMED_ARGUMENT:
                        found.extend((literal, "text", False) for literal in strings(expression))
            for value in node.values():
                walk(value)
        elif isinstance(node, list):
            for value in node:
                walk(value)

    walk(tree)
    return found


def _fixed_part(glob_text: str) -> str:
    """A glob's folders before its first wildcard ('' when the first part has one)."""
    parts = glob_text.split(os.sep)
    return os.sep.join(parts[: next(i for i, p in enumerate(parts) if any(c in p for c in _WILDCARDS))])


def query_reads(tree: dict) -> list[str]:
    """Strings a parsed query reads as files (:func:`_read_places`)."""
    return [node.get(key, "") for node, key, _ in _read_places(tree)]


def rebase_reads(tree: Any, folder: str) -> None:
    """Make the relative file paths a parsed query reads relative to ``folder`` (a spec
    file's) instead of the working folder, in place: a path is rewritten when it names a
    file there, or is a glob whose folder before the first wildcard is there (a table
    function's argument may also name a folder). Anything else (a table's name, a path
    that exists nowhere) is left as written."""
    for node, key, table_name in _read_places(tree):
        text = node.get(key, "")
        if not text or is_remote(text) or os.path.isabs(os.path.expanduser(text)):
            continue
        candidate = os.path.join(folder, text)
        if any(c in text for c in _WILDCARDS):
            found = os.path.isdir(os.path.join(folder, _fixed_part(text)))
        else:
            found = os.path.isfile(candidate) or (not table_name and os.path.isdir(candidate))
        if found:
            node[key] = candidate
            qualified = node.get("qualified_name") if table_name else None
            if isinstance(qualified, dict) and qualified.get("path") == [text]:  # a table's name is held twice
                qualified["path"] = [candidate]


def allowed_for_query(reads: Iterable[str]) -> tuple[list[str], list[str]]:
    """(files, folders) to open for what a query reads: an existing file as itself, a
    glob as the folder before its first wildcard; anything else is not opened (a table
    name, a misspelt path: DuckDB then reports it). A remote URL is refused."""
    files: list[str] = []
    folders: list[str] = []
    for text in reads:
        if is_remote(text):
            raise InputError(f"Option --query reads the remote URL '{echo(text)}'; bigpanel reads local files only. "
                             "Download the data and read the local copy.")
        if any(c in text for c in _WILDCARDS):
            fixed = _fixed_part(text)
            folder = os.path.abspath(fixed or (os.sep if text.startswith(os.sep) else "."))
            if os.path.isdir(folder):
                folders.append(folder.rstrip(os.sep) + os.sep)
        elif text and os.path.isfile(text):
            files.append(os.path.abspath(text))
    return files, folders


def lockdown_sql(files: Iterable[str], folders: Iterable[str]) -> list[str]:
    """The statements that close the engine after set-up, in the order DuckDB needs
    (the allowed lists cannot change once external access is off)."""
    def listing(items: Iterable[str]) -> str:
        return "[" + ", ".join(sqlbuild.quote_literal(i) for i in dict.fromkeys(items)) + "]"

    return [
        f"SET allowed_paths = {listing(files)}",
        f"SET allowed_directories = {listing(folders)}",
        "SET enable_external_access = false",
        "SET lock_configuration = true",
    ]


class LockedConnection:
    """A DuckDB connection or cursor that runs single SELECT statements only.

    It is registered with :mod:`bigpanel.interrupts` while open, so a stop signal
    interrupts its running query.
    """

    def __init__(self, raw: duckdb.DuckDBPyConnection, check: Callable[[str], None]):
        self.raw = raw
        self._check = check  # raises unless the text is exactly one SELECT statement
        interrupts.register(raw)

    def execute(self, sql: str, params: Any = None) -> duckdb.DuckDBPyConnection:
        self._check(sql)
        interrupts.raise_if_received()  # a query about to start after a stop signal
        return self.raw.execute(sql, params) if params else self.raw.execute(sql)

    def sql(self, sql: str, params: Any = None) -> duckdb.DuckDBPyRelation:
        self._check(sql)
        interrupts.raise_if_received()
        return self.raw.sql(sql, params=params) if params else self.raw.sql(sql)

    def cursor(self) -> LockedConnection:
        return LockedConnection(self.raw.cursor(), self._check)

    def interrupt(self) -> None:
        self.raw.interrupt()

    def close(self) -> None:
        interrupts.unregister(self.raw)
        self.raw.close()
