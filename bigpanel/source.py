"""Opening panel data and running SQL on it: the only module that opens connections.

A :class:`Source` names where the rows live (Parquet files, CSV files, a table in a
DuckDB file, a SQL query over any of these, or an in-memory Arrow/Polars/pandas
frame) and a row filter; :class:`Engine` holds the DuckDB settings. Rows are never
brought into Python: callers get aggregates back.
"""

from __future__ import annotations

import glob as globmod
import os
import re
import threading
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import duckdb
import pyarrow.parquet as pq

from . import sqlbuild
from .errors import InputError, echo, unknown_column

INTEGER_TYPES = (
    "TINYINT", "SMALLINT", "INTEGER", "BIGINT", "HUGEINT", "UTINYINT", "USMALLINT", "UINTEGER",
    "UBIGINT", "UHUGEINT",
)  # fmt: skip
NUMERIC_TYPES = INTEGER_TYPES + ("FLOAT", "DOUBLE", "REAL", "DECIMAL", "BOOLEAN")
_FRAME_VIEW = "bigpanel_frame"
_ATTACHED = "bigpanel_src"


@dataclass(frozen=True)
class Engine:
    """DuckDB settings: worker threads, memory limit (e.g. ``"4GB"``) and spill folder."""

    threads: int | None = None
    memory_limit: str | None = None
    temp_directory: str | None = None

    def settings(self) -> list[str]:
        out = [
            "SET enable_progress_bar = false",
            "SET enable_progress_bar_print = false",
            "SET preserve_insertion_order = true",
            "SET parquet_metadata_cache = true",
        ]
        if self.threads is not None:
            if int(self.threads) < 1:
                raise InputError(f"Option 'threads' must be at least 1, got {self.threads}. Give a positive count.")
            out.append(f"SET threads = {int(self.threads)}")
        if self.memory_limit is not None:
            out.append(f"SET memory_limit = {sqlbuild.quote_literal(self.memory_limit)}")
        if self.temp_directory is not None:
            out.append(f"SET temp_directory = {sqlbuild.quote_literal(self.temp_directory)}")
        return out


@dataclass(frozen=True)
class Source:
    """Where the panel rows are, and which of them to use.

    Build one with :func:`open_source`; the fields are filled in there.
    """

    kind: str  # parquet | csv | duckdb | query | frame
    label: str
    files: tuple[str, ...] = ()
    hive: bool = False
    database: str | None = None
    table: str | None = None
    query: str | None = None
    csv_types: tuple[tuple[str, str], ...] = ()
    csv_options: tuple[tuple[str, str], ...] = ()
    where: str | None = None
    frame: Any = field(default=None, compare=False, repr=False)
    engine: Engine = Engine()

    def relation(self, files: Sequence[str] | None = None) -> str:
        """SQL FROM-clause text for all rows, or for a subset of the Parquet files."""
        if self.kind == "parquet":
            return sqlbuild.parquet_relation(list(files or self.files), self.hive)
        if self.kind == "csv":
            return sqlbuild.csv_relation(list(self.files), dict(self.csv_types), dict(self.csv_options))
        if self.kind == "duckdb" and self.table is not None:
            return sqlbuild.table_relation(_ATTACHED, self.table)
        if self.kind == "frame":
            return sqlbuild.quote_ident(_FRAME_VIEW)
        return sqlbuild.query_relation(self.query or "")

    def filtered(self, files: Sequence[str] | None = None, unit_range: tuple[str, Any, Any] | None = None) -> str:
        """A subquery of the source's rows after the row filter; ``unit_range`` =
        (column, low, high) keeps low <= column < high (either bound may be None)."""
        conditions = [f"({self.where})"] if self.where else []
        if unit_range is not None:
            column, low, high = unit_range
            if low is not None:
                conditions.append(f"{sqlbuild.quote_ident(column)} >= {sqlbuild.value_literal(low)}")
            if high is not None:
                conditions.append(f"{sqlbuild.quote_ident(column)} < {sqlbuild.value_literal(high)}")
        where = f" WHERE {' AND '.join(conditions)}" if conditions else ""
        return f"(SELECT * FROM {self.relation(files)}{where})"

    def connect(self) -> duckdb.DuckDBPyConnection:
        """A fresh in-memory connection with the engine settings and the source attached."""
        con = duckdb.connect(":memory:")
        for statement in self.engine.settings():
            try:
                con.execute(statement)
            except duckdb.Error as exc:
                con.close()
                setting = statement.split()[1]
                raise InputError(
                    f"Option '{setting}' was refused by DuckDB ({_first_line(exc)}). "
                    "Give a size like 4GB for the memory limit, or an existing folder for the temporary directory."
                ) from None
        if self.database is not None:
            try:
                con.execute(sqlbuild.attach_sql(self.database, _ATTACHED))
            except duckdb.Error as exc:
                con.close()
                raise InputError(
                    f"DuckDB file '{self.database}' could not be opened read-only ({_first_line(exc)}). "
                    "Check that it is a DuckDB database written by a compatible version."
                ) from None
            if self.kind == "query":
                con.execute(f"USE {sqlbuild.quote_ident(_ATTACHED)}")
        if self.frame is not None:
            con.register(_FRAME_VIEW, self.frame)
        return con


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__


def _parquet_files(path: str) -> tuple[list[str], bool]:
    """Resolve a file, folder (recursive) or glob to a sorted list of Parquet files."""
    if any(ch in path for ch in "*?["):
        files = sorted(f for f in globmod.glob(path, recursive=True) if os.path.isfile(f))
        if not files:
            raise InputError(f"No files match '{echo(path)}'. Check the pattern (brace lists like {{a,b}} are not supported).")
        _check_same_kinds(files)
        return files, any("=" in part for part in Path(files[0]).parts)
    p = Path(path)
    if p.is_dir():
        files = sorted(_walk_parquet(p, path))
        if not files:
            raise InputError(f"Folder '{echo(path)}' holds no Parquet files (searched its subfolders for *.parquet). Point at the folder that holds the data.")
        _check_same_kinds(files)
        hive = any("=" in part for f in files[:1] for part in Path(f).relative_to(p).parts[:-1])
        return files, hive
    if not p.exists():
        raise InputError(f"Source '{echo(path)}' does not exist. Check the path.")
    _require_readable(path)
    return [str(p)], False


def _value_kind(arrow_type) -> str:
    """number, text, time or other: types within a kind unify without losing meaning."""
    import pyarrow.types as pt

    if pt.is_integer(arrow_type) or pt.is_floating(arrow_type) or pt.is_decimal(arrow_type) or pt.is_boolean(arrow_type):
        return "number"
    if pt.is_string(arrow_type) or pt.is_large_string(arrow_type) or pt.is_dictionary(arrow_type):
        return "text"
    if pt.is_temporal(arrow_type):
        return "time"
    return str(arrow_type)


def _check_same_kinds(files: Sequence[str]) -> None:
    """Refuse files that give one column values of different kinds (numbers in one file,
    text in another): read together they would all turn into text. Footers only. A column
    that some files lack is allowed (its rows count as missing there)."""
    if len(files) < 2:
        return
    first: dict[str, tuple[str, str, Any]] = {}
    for f in files:
        try:
            schema = pq.read_schema(f)
        except Exception:  # noqa: BLE001 - an unreadable file is named when the scan fails
            continue
        for field_ in schema:
            kind = _value_kind(field_.type)
            seen = first.setdefault(field_.name, (kind, f, field_.type))
            if seen[0] != kind:
                raise InputError(
                    f"Column '{echo(field_.name)}' is {seen[2]} in '{echo(seen[1])}' but {field_.type} in '{echo(f)}'. "
                    "Give it one type in every file (re-export the odd ones), or read the files with a --query that casts it."
                )


def _walk_parquet(folder: Path, shown: str) -> list[str]:
    """Every *.parquet file under ``folder``; a subfolder that cannot be listed is an error
    (skipping it would silently drop its rows)."""

    def refuse(exc: OSError) -> None:
        where = exc.filename or shown
        raise InputError(f"Folder '{echo(where)}' cannot be read ({exc.strerror or exc}). "
                         "Check its permissions, or point at a folder you can read.") from None

    files = []
    for root, _dirs, names in os.walk(folder, onerror=refuse):
        for name in names:
            if name.endswith(".parquet"):
                full = os.path.join(root, name)
                if os.path.isfile(full):
                    _require_readable(full)
                    files.append(full)
    return files


def _require_readable(path: str) -> None:
    """Refuse a file that exists but cannot be opened (permissions), naming it."""
    try:
        with open(path, "rb"):
            pass
    except OSError as exc:
        raise InputError(f"File '{echo(path)}' cannot be read ({exc.strerror or exc}). "
                         "Check its permissions.") from None


def open_source(
    source: Any,
    *,
    table: str | None = None,
    query: str | None = None,
    where: str | None = None,
    csv_types: dict[str, str] | None = None,
    csv_options: dict[str, str] | None = None,
    engine: Engine | None = None,
) -> Source:
    """Describe a data source without reading its rows.

    Parameters
    ----------
    source : str, path, pyarrow.Table, polars.DataFrame or pandas.DataFrame
        A Parquet file, a folder of Parquet files (searched recursively; ``key=value``
        folder names become columns), a glob, a CSV file or glob (``.csv``, ``.tsv``,
        ``.csv.gz``), a DuckDB database file (``.duckdb``/``.db``, with ``table`` or
        ``query``), or an in-memory frame.
    table : str, optional
        Table or view in a DuckDB file.
    query : str, optional
        A SQL query. With a DuckDB file it runs inside that database; with ``source``
        None it runs on its own (it may read files itself).
    where : str, optional
        A SQL predicate applied to every row before anything else.
    csv_types, csv_options : dict, optional
        Column types that override CSV detection (``{"month": "DATE"}``) and reader
        options (``delim``, ``decimal_separator``, ``nullstr``, ``header``).
    engine : Engine, optional
        DuckDB settings.
    """
    engine = engine or Engine()
    common = dict(where=where, engine=engine)
    _check_source_options(source, table, query, csv_types)
    if source is None:
        if not query:
            raise InputError("No source given. Pass a file, folder, glob, DuckDB file or a query.")
        src = Source(kind="query", label="query", query=query, **common)
    elif not isinstance(source, (str, os.PathLike)):
        src = Source(kind="frame", label=f"in-memory {type(source).__name__}", frame=_as_arrow(source), **common)
    else:
        path = str(source)
        lower = path.lower()
        if lower.endswith((".duckdb", ".db", ".ddb")):
            if not os.path.exists(path):
                raise InputError(f"DuckDB file '{echo(path)}' does not exist. Check the path.")
            if not table and not query:
                raise InputError(f"DuckDB file '{echo(path)}' needs a table name or a query. Pass --table NAME or --query SQL.")
            src = Source(kind="query" if query else "duckdb", label=echo(f"{Path(path).name}" + (f" table {table}" if table else "")),
                         database=path, table=table, query=query, **common)
        elif lower.endswith((".csv", ".tsv", ".csv.gz", ".tsv.gz", ".txt")):
            files = sorted(globmod.glob(path, recursive=True)) if any(c in path for c in "*?[") else [path]
            if not files or not all(os.path.exists(f) for f in files):
                raise InputError(f"Source '{echo(path)}' does not exist. Check the path.")
            src = Source(kind="csv", label=echo(Path(path).name), files=tuple(files),
                         csv_types=tuple((csv_types or {}).items()), csv_options=tuple((csv_options or {}).items()), **common)
        else:
            files, hive = _parquet_files(path)
            src = Source(kind="parquet", label=echo(Path(path).name or path), files=tuple(files), hive=hive, **common)
    if query and src.kind == "query":
        _check_query_text(query)
    return src


def _check_source_options(source: Any, table: str | None, query: str | None, csv_types: dict | None) -> None:
    """Refuse options that the kind of source would silently ignore."""
    path = str(source).lower() if isinstance(source, (str, os.PathLike)) else None
    database = path is not None and path.endswith((".duckdb", ".db", ".ddb"))
    csv = path is not None and path.endswith((".csv", ".tsv", ".csv.gz", ".tsv.gz", ".txt"))
    shown = echo(source) if path is not None else "an in-memory frame"
    if table and not database:
        raise InputError(f"Option --table applies to DuckDB files, but the source is '{shown}'. "
                         "Leave --table out, or give a .duckdb file.")
    if table and query:
        raise InputError("Options --table and --query are both given. Give one of them.")
    if query and source is not None and not database:
        raise InputError(f"Option --query applies to a DuckDB file or stands alone, but the source is '{shown}'. "
                         "Leave the source out and read the files in the query, or drop --query.")
    if csv_types and not csv:
        raise InputError(f"Option --csv-types applies to CSV sources, but the source is '{shown}'. Leave it out.")


def _check_query_text(query: str) -> None:
    if query.strip().rstrip(";").count(";"):
        raise InputError("Option 'query' holds more than one statement. Give a single SELECT query.")


def _as_arrow(frame: Any):
    import pyarrow as pa

    if isinstance(frame, (pa.Table, pa.RecordBatchReader)):
        return frame
    module = type(frame).__module__.split(".")[0]
    if module == "polars":
        return frame.to_arrow()
    if module == "pandas":
        return pa.Table.from_pandas(frame, preserve_index=False)
    raise InputError(f"In-memory source of type {type(frame).__name__} is not supported. Pass a pyarrow Table, polars DataFrame or pandas DataFrame.")


class Session:
    """An open connection on a source, with checked helpers for the estimators.

    Every public method returns aggregates (a few rows) or schema facts.
    """

    def __init__(self, source: Source):
        self.source = source
        self.con = source.connect()
        self._lock = threading.Lock()
        self._columns: dict[str, str] | None = None
        self._function_kinds: dict[str, str] | None = None

    def close(self) -> None:
        self.con.close()

    def __enter__(self) -> "Session":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # ---- running
    def run(self, sql: str, params: Sequence[Any] | None = None, con: duckdb.DuckDBPyConnection | None = None):
        """Run a query and return a pyarrow Table of its (aggregate) result."""
        target = con or self.con
        try:
            rel = target.sql(sql, params=params) if params else target.sql(sql)
            return None if rel is None else rel.to_arrow_table()
        except duckdb.Error as exc:
            raise self._explain(exc) from None

    def execute(self, sql: str, params: dict | None = None) -> None:
        """Run a statement that returns nothing of interest (CREATE, INSERT)."""
        try:
            self.con.execute(sql, params or {})
        except duckdb.Error as exc:
            raise self._explain(exc) from None

    def describe(self, sql: str, params: dict | None = None) -> list[tuple[str, str]]:
        """(name, type) of a query's result columns, binding it without running it."""
        try:
            rows = self.con.execute(f"DESCRIBE {sql}", params or {}).fetchall()
        except duckdb.Error as exc:
            raise self._explain(exc) from None
        return [(r[0], r[1]) for r in rows]

    def cursor(self, threads: int | None = None) -> duckdb.DuckDBPyConnection:
        cur = self.con.cursor()
        if threads is not None:
            cur.execute(f"SET threads = {int(threads)}")
        return cur

    def _explain(self, exc: duckdb.Error) -> Exception:
        from .errors import BigpanelError

        message = echo(_first_line(exc))
        settled = (duckdb.ParserException, duckdb.BinderException, duckdb.CatalogException, duckdb.OutOfMemoryException,
                   duckdb.InterruptException)
        if self.source.kind == "parquet" and not isinstance(exc, settled):
            bad = _find_corrupt_parquet(self.source.files) or _find_unreadable_pages(self.source.files)
            if bad:
                return InputError(f"File '{echo(bad[0])}' is not a readable Parquet file ({echo(bad[1])}). "
                                  "Re-export it or move it out of the source.")
        if self.source.kind == "csv" and self.source.csv_types and re.search(r"\bTYPE|DuckDB Type|COLUMN_TYPES", str(exc), re.IGNORECASE):
            shown = echo(", ".join(f"{k}={v}" for k, v in self.source.csv_types))
            return InputError(f"Option --csv-types ({shown}) was refused by DuckDB for {self.source.label} ({message}). "
                              "Name columns the CSV file has, with DuckDB type names such as BIGINT, DOUBLE, DATE or VARCHAR.")
        if isinstance(exc, duckdb.InvalidInputException) and self.source.kind == "csv" and "sniffing" in str(exc):
            return InputError(f"CSV file {self.source.label} could not be read as CSV ({message}). "
                              "Check that it is a CSV text file with a header line.")
        if isinstance(exc, duckdb.CatalogException) and self.source.kind == "duckdb" and self.source.table is not None:
            return InputError(f"Table '{echo(self.source.table)}' not found in DuckDB file '{echo(self.source.database)}' "
                              f"({message}). Check the table name, or pass --query.")
        if isinstance(exc, duckdb.IOException):
            return InputError(f"Source {self.source.label} could not be read ({message}). Check the path and file format.")
        if isinstance(exc, duckdb.ConversionException):
            return InputError(f"A value in {self.source.label} could not be converted ({message}). Check the column types or pass csv types.")
        if isinstance(exc, duckdb.OutOfMemoryException):
            return BigpanelError(f"DuckDB ran out of memory ({message}). Raise --memory-limit or set --temp-directory for spilling.")
        if isinstance(exc, (duckdb.ParserException, duckdb.BinderException, duckdb.CatalogException)):
            return InputError(f"SQL on {self.source.label} was refused ({message}). Check the filter, terms and query.")
        return BigpanelError(f"DuckDB failed on {self.source.label}: {message}")

    # ---- schema
    def columns(self) -> dict[str, str]:
        """Column name -> DuckDB type of the source (before the filter)."""
        if self._columns is None:
            try:
                rows = self.con.execute(f"DESCRIBE SELECT * FROM {self.source.relation()}").fetchall()
            except duckdb.Error as exc:
                raise self._explain(exc) from None
            self._columns = {r[0]: r[1] for r in rows}
            if self.source.kind == "csv" and all(t == "VARCHAR" for t in self._columns.values()):
                _check_csv_shape(self.source.files, self._columns)
        return self._columns

    def require_columns(self, names: Sequence[str], numeric: Sequence[str] = ()) -> None:
        """Raise a helpful error for a missing column or a non-numeric one."""
        cols = self.columns()
        for name in names:
            if name not in cols:
                raise unknown_column(name, self.source.label, cols)
        for name in numeric:
            if not is_numeric(cols[name]):
                raise InputError(
                    f"Column '{name}' in {self.source.label} has type {cols[name]}, not a number. "
                    "Choose a numeric column, or convert it in an expression (for example CAST(col AS DOUBLE))."
                )

    def check_expression(self, expression: str, what: str) -> None:
        """Refuse anything but a single scalar SQL expression over the source's columns."""
        sql, params = sqlbuild.parse_check_sql(expression)
        tree = self.con.execute(sql, params).fetchall()[0][0]
        problem = sqlbuild.expression_problem(tree, self.function_kinds())
        if problem:
            raise InputError(f"{what} '{expression}' is refused: {problem}. Give one scalar SQL expression over the source's columns.")

    def function_kinds(self) -> dict[str, str]:
        """Function name -> its most restrictive DuckDB kind (read once per session)."""
        if self._function_kinds is not None:
            return self._function_kinds
        rank = {"table": 3, "table_macro": 3, "aggregate": 2, "pragma": 2}
        kinds: dict[str, str] = {}
        for name, kind in self.con.execute(sqlbuild.function_kinds_sql()).fetchall():
            if rank.get(kind, 0) >= rank.get(kinds.get(name, ""), 0):
                kinds[name] = kind
        self._function_kinds = kinds
        return kinds

    def check_filter(self) -> None:
        """Validate the row filter as a predicate (parsed, bound against the columns)."""
        where = self.source.where
        if not where:
            return
        self.check_expression(where, "Filter")
        try:
            self.con.execute(f"DESCRIBE SELECT * FROM {self.source.filtered()}").fetchall()
        except duckdb.Error as exc:
            raise InputError(f"Filter '{where}' is not valid on {self.source.label} ({_first_line(exc)}). Fix the SQL predicate.") from None

    def describe_expression(self, expression: str) -> str:
        """DuckDB type of an expression over the source (binding it, reading no rows)."""
        try:
            row = self.con.execute(f"DESCRIBE SELECT {expression} AS x FROM {self.source.relation()}").fetchall()[0]
        except duckdb.Error as exc:
            missing = re.search(r'Referenced column "([^"]+)" not found', str(exc))
            if missing:
                raise unknown_column(missing.group(1), self.source.label, self.columns()) from None
            raise InputError(f"Term '{expression}' cannot be evaluated on {self.source.label} ({_first_line(exc)}). Check the column names and SQL.") from None
        return row[1]


def is_numeric(duck_type: str) -> bool:
    return duck_type.upper().split("(")[0] in NUMERIC_TYPES


def is_integer(duck_type: str) -> bool:
    """A whole-number type (a period that can be differenced or lagged)."""
    return duck_type.upper().split("(")[0] in INTEGER_TYPES


def _find_corrupt_parquet(files: Sequence[str]) -> tuple[str, str] | None:
    for f in files:
        try:
            pq.read_metadata(f)
        except Exception as exc:  # noqa: BLE001 - any failure means the file is unreadable
            return f, _first_line(exc)
    return None


def _check_csv_shape(files: Sequence[str], columns: dict[str, str]) -> None:
    """Explain a CSV source read as text columns only: an empty file, a header without
    rows, or a line whose number of fields differs from the header's (DuckDB's detection
    then gives up on the delimiter and reads one column)."""
    import csv
    import gzip

    def opened(f: str):
        opener = gzip.open if f.endswith(".gz") else open
        return opener(f, "rt", newline="", encoding="utf-8", errors="replace")

    for f in files:
        if os.path.getsize(f) == 0:
            raise InputError(f"CSV file '{echo(f)}' is empty. Give a file with a header line and rows.")
    if all(_csv_has_no_rows(opened(f)) for f in files):
        raise InputError(f"CSV file '{echo(files[0])}' has a header line but no rows. Give a file with rows.")
    only_column = next(iter(columns)) if len(columns) == 1 else ""
    delimiter = next((d for d in (",", ";", "\t", "|") if d in only_column), None)
    if delimiter is None:
        return
    for f in files:
        with opened(f) as handle:
            rows = csv.reader(handle, delimiter=delimiter)
            header = next(rows, [])
            for row in rows:
                if row and len(row) != len(header):
                    raise InputError(
                        f"CSV file '{echo(f)}' line {rows.line_num} has {len(row)} fields where the header has "
                        f"{len(header)}. Fix or remove that line (a stray delimiter or an unquoted one inside a value)."
                    )


def _csv_has_no_rows(handle) -> bool:
    """Does the open text file hold at most one non-blank line (a header)?"""
    with handle:
        lines = 0
        for line in handle:
            lines += bool(line.strip())
            if lines > 1:
                return False
    return True


def _find_unreadable_pages(files: Sequence[str]) -> tuple[str, str] | None:
    """The first file whose data pages cannot be decoded (its footer may be intact): every
    column of every row group is read, one row group at a time. Only run after a scan
    failed, to name the culprit."""
    for f in files:
        try:
            reader = pq.ParquetFile(f)
            for group in range(reader.metadata.num_row_groups):
                reader.read_row_group(group)
        except Exception as exc:  # noqa: BLE001 - any failure means the file is unreadable
            return f, _first_line(exc)
    return None


def parquet_row_groups(files: Sequence[str], column: str) -> list[tuple[str, int, Any, Any]] | None:
    """(file, rows, min, max) of a column for every row group with rows, from the
    Parquet footers; None when a file lacks the column or its statistics."""
    out = []
    for f in files:
        meta = pq.read_metadata(f)
        names = [meta.schema.column(i).name for i in range(meta.num_columns)]
        if column not in names:
            return None
        idx = names.index(column)
        for g in range(meta.num_row_groups):
            group = meta.row_group(g)
            if group.num_rows == 0:
                continue
            stats = group.column(idx).statistics
            if stats is None or not stats.has_min_max:
                return None
            out.append((f, group.num_rows, stats.min, stats.max))
    return out
