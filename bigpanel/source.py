"""Opening panel data and running SQL on it: the only module that opens connections.

A :class:`Source` names where the rows live (Parquet files, CSV files, a table in a
DuckDB file, a SQL query over any of these, or an in-memory Arrow/Polars/pandas
frame) and a row filter; :class:`Engine` holds the DuckDB settings. Rows are never
brought into Python: callers get aggregates back.
"""

from __future__ import annotations

import glob as globmod
import json
import os
import re
import threading
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import duckdb
import pyarrow.parquet as pq

from . import interrupts, lockdown, sqlbuild
from .errors import InputError, unknown_column

INTEGER_TYPES = (
    "TINYINT", "SMALLINT", "INTEGER", "BIGINT", "HUGEINT", "UTINYINT", "USMALLINT", "UINTEGER",
    "UBIGINT", "UHUGEINT",
)  # fmt: skip
NUMERIC_TYPES = INTEGER_TYPES + ("FLOAT", "DOUBLE", "REAL", "DECIMAL", "BOOLEAN")
_FRAME_VIEW = "bigpanel_frame"
_ATTACHED = "bigpanel_src"


_SIZE = re.compile(
    r"^\s*(\d+(?:\.\d*)?|\.\d+)\s*(b|bytes?|k|kb|kib|kilobytes?|m|mb|mib|megabytes?|g|gb|gib|gigabytes?|"
    r"t|tb|tib|terabytes?|%)\s*$",
    re.IGNORECASE,
)


@dataclass(frozen=True)
class Engine:
    """DuckDB settings: worker threads, memory limit (e.g. ``"4GB"``) and the folder under
    which a private spill folder is made (default: the system's temporary folder).

    The values are checked when the Engine is made, before anything is read.
    """

    threads: int | None = None
    memory_limit: str | None = None
    temp_directory: str | None = None

    def __post_init__(self) -> None:
        if self.threads is not None and (isinstance(self.threads, bool) or not isinstance(self.threads, int) or self.threads < 1):
            raise InputError(f"Option --threads must be a whole number of at least 1, got {str(self.threads)[:40]}. "
                             "Give a positive count, or leave it out to use all cores.")
        if self.memory_limit is not None:
            match = _SIZE.match(str(self.memory_limit))
            value = float(match.group(1)) if match else 0.0
            if not match or value <= 0 or (match.group(2) == "%" and value > 100):
                raise InputError(
                    f"Option --memory-limit must be a positive size such as 500MB, 4GB or 2GiB, got '{str(self.memory_limit)[:40]}'. "
                    "Give a number with a unit (KB, MB, GB, TB or KiB, MiB, GiB, TiB), or leave the option out for no limit.")
        if self.temp_directory is not None:
            problem = _unwritable_folder(str(self.temp_directory))
            if problem:
                raise InputError(f"Option --temp-directory names '{str(self.temp_directory)[:200]}', {problem}. "
                                 "Give a folder you can write to, or leave the option out to use the system's temporary folder.")

    def settings(self, spill_folder: str | None, threads: int | None = None) -> list[str]:
        """SET statements for a connection; ``spill_folder`` None turns spilling off,
        ``threads`` overrides the worker count (1 for the chunk instance)."""
        out = [
            "SET enable_progress_bar = false",
            "SET enable_progress_bar_print = false",
            "SET preserve_insertion_order = true",
            "SET parquet_metadata_cache = true",
        ]
        threads = threads or self.threads
        if threads is not None:
            out.append(f"SET threads = {int(threads)}")
        if self.memory_limit is not None:
            out.append(f"SET memory_limit = {sqlbuild.quote_literal(self.memory_limit)}")
        out.append(f"SET temp_directory = {sqlbuild.quote_literal(spill_folder or '')}")
        return out


def _unwritable_folder(path: str) -> str | None:
    """Why ``path`` cannot be (made into) a writable folder, or None when it can."""
    if lockdown.is_remote(path):
        return "a remote URL, not a local folder"
    probe = os.path.abspath(path)
    while not os.path.exists(probe):
        parent = os.path.dirname(probe)
        if parent == probe:
            break
        probe = parent
    if not os.path.isdir(probe):
        return "which is a file, not a folder" if probe == os.path.abspath(path) else f"but '{probe}' on its way is a file"
    if not os.access(probe, os.W_OK | os.X_OK):
        where = "" if probe == os.path.abspath(path) else f" (it does not exist and its parent '{probe}' is not writable)"
        return f"which is not writable: permission denied{where}"
    return None


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

    def connect(self, spill_folder: str | None = None, threads: int | None = None) -> duckdb.DuckDBPyConnection:
        """A fresh in-memory DuckDB instance with the engine settings and the source
        attached, then locked down (:mod:`bigpanel.lockdown`): it can read the source's
        files only and its settings cannot change. ``spill_folder`` None: no spilling."""
        con = duckdb.connect(":memory:", config={"autoinstall_known_extensions": False, "autoload_known_extensions": False})
        try:
            self._set_up(con, spill_folder, threads)
        except BaseException:
            con.close()
            raise
        return con

    def _set_up(self, con: duckdb.DuckDBPyConnection, spill_folder: str | None, threads: int | None) -> None:
        for statement in self.engine.settings(spill_folder, threads):
            try:
                con.execute(statement)
            except duckdb.Error as exc:
                setting = statement.split()[1]
                option = {"memory_limit": "--memory-limit", "temp_directory": "--temp-directory"}.get(setting, setting)
                raise InputError(
                    f"Option {option} was refused by DuckDB ({_first_line(exc)}). "
                    "Give a size like 4GB for the memory limit, or a writable folder for the temporary directory."
                ) from None
        if self.database is not None:
            try:
                con.execute(sqlbuild.attach_sql(self.database, _ATTACHED))
            except duckdb.Error as exc:
                raise InputError(
                    f"DuckDB file '{self.database}' could not be opened read-only ({_first_line(exc)}). "
                    "Check that it is a DuckDB database written by a compatible version."
                ) from None
            if self.kind == "query":
                con.execute(f"USE {sqlbuild.quote_ident(_ATTACHED)}")
        if self.frame is not None:
            con.register(_FRAME_VIEW, self.frame)
        files, folders = self._allowed(con)
        for statement in lockdown.lockdown_sql(files, folders):
            con.execute(statement)

    def _allowed(self, con: duckdb.DuckDBPyConnection) -> tuple[list[str], list[str]]:
        """Files and folders this source's queries may read (the DuckDB file is attached
        already and needs no entry)."""
        if self.kind in ("parquet", "csv"):
            return [os.path.abspath(f) for f in self.files], []
        if self.kind == "query" and self.query:
            tree = json.loads(con.execute(*lockdown.parse_tree_sql(self.query)).fetchall()[0][0])
            if not tree.get("error"):
                return lockdown.allowed_for_query(lockdown.query_reads(tree))
        return [], []


def _subfolder(folder: str, name: str) -> str:
    """A spill subfolder, one per DuckDB instance (made now, so it is there to inspect)."""
    path = os.path.join(folder, name)
    os.makedirs(path, exist_ok=True)
    return path


def out_of_memory_message(source: Source, spill_folder: str, message: str) -> str:
    """The next step after DuckDB ran out of memory, for the settings in force."""
    import shutil

    engine = source.engine
    try:
        free = f"{shutil.disk_usage(spill_folder).free / 1e9:.1f} GB free"
    except OSError:
        free = "free space unknown"
    if engine.temp_directory:
        spill = f"--temp-directory '{engine.temp_directory}' ({free})"
        more_disk = "free space in --temp-directory or point it at a larger disk"
    else:
        spill = f"the system's temporary folder {os.path.dirname(spill_folder)} ({free})"
        more_disk = "give --temp-directory on a disk with more free space"
    if engine.memory_limit is None:
        return (f"DuckDB ran out of memory on {source.label} with no --memory-limit set ({message[:200]}); "
                f"it spills to {spill}. Set --memory-limit below this machine's free memory (for example 4GB) "
                f"so that DuckDB spills to disk sooner, or {more_disk}.")
    return (f"DuckDB ran out of memory on {source.label} under --memory-limit {engine.memory_limit} ({message[:200]}); "
            f"it spills to {spill}. Raise --memory-limit if the machine has the memory, or {more_disk}.")


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__


def _parquet_files(path: str) -> tuple[list[str], bool]:
    """Resolve a file, folder (recursive) or glob to a sorted list of Parquet files."""
    if any(ch in path for ch in "*?["):
        files = sorted(f for f in globmod.glob(path, recursive=True) if os.path.isfile(f))
        if not files:
            raise InputError(f"No files match '{path}'. Check the pattern (brace lists like {{a,b}} are not supported).")
        return files, any("=" in part for part in Path(files[0]).parts)
    p = Path(path)
    if p.is_dir():
        files = sorted(str(f) for f in p.rglob("*.parquet") if f.is_file())
        if not files:
            raise InputError(f"Folder '{path}' holds no Parquet files (searched its subfolders for *.parquet). Point at the folder that holds the data.")
        hive = any("=" in part for f in files[:1] for part in Path(f).relative_to(p).parts[:-1])
        return files, hive
    if not p.exists():
        raise InputError(f"Source '{path}' does not exist. Check the path.")
    return [str(p)], False


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
    if source is None:
        if not query:
            raise InputError("No source given. Pass a file, folder, glob, DuckDB file or a query.")
        src = Source(kind="query", label="query", query=query, **common)
    elif not isinstance(source, (str, os.PathLike)):
        src = Source(kind="frame", label=f"in-memory {type(source).__name__}", frame=_as_arrow(source), **common)
    else:
        path = str(source)
        lockdown.refuse_remote_source(path)
        lower = path.lower()
        if lower.endswith((".duckdb", ".db", ".ddb")):
            if not os.path.exists(path):
                raise InputError(f"DuckDB file '{path}' does not exist. Check the path.")
            if not table and not query:
                raise InputError(f"DuckDB file '{path}' needs a table name or a query. Pass --table NAME or --query SQL.")
            src = Source(kind="query" if query else "duckdb", label=f"{Path(path).name}" + (f" table {table}" if table else ""),
                         database=path, table=table, query=query, **common)
        elif lower.endswith((".csv", ".tsv", ".csv.gz", ".tsv.gz", ".txt")):
            files = sorted(globmod.glob(path, recursive=True)) if any(c in path for c in "*?[") else [path]
            if not files or not all(os.path.exists(f) for f in files):
                raise InputError(f"Source '{path}' does not exist. Check the path.")
            src = Source(kind="csv", label=Path(path).name, files=tuple(files),
                         csv_types=tuple((csv_types or {}).items()), csv_options=tuple((csv_options or {}).items()), **common)
        else:
            files, hive = _parquet_files(path)
            src = Source(kind="parquet", label=Path(path).name or path, files=tuple(files), hive=hive, **common)
    if query and src.kind == "query":
        _check_query_text(query)
    return src


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
        self._lock = threading.Lock()
        self._columns: dict[str, str] | None = None
        self._function_kinds: dict[str, str] | None = None
        self._single: lockdown.LockedConnection | None = None
        self._closed = False
        self.spill_folder = interrupts.private_folder(source.engine.temp_directory)
        try:
            self.con = lockdown.LockedConnection(source.connect(_subfolder(self.spill_folder, "main")))
        except BaseException:
            interrupts.remove_folder(self.spill_folder)
            raise

    def close(self) -> None:
        """Close the connections and remove the private spill folder (idempotent)."""
        if self._closed:
            return
        self._closed = True
        try:
            for con in (self._single, self.con):
                if con is not None:
                    con.close()
        finally:
            interrupts.remove_folder(self.spill_folder)

    def __enter__(self) -> "Session":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # ---- running
    def run(self, sql: str, params: Sequence[Any] | None = None, con: lockdown.LockedConnection | None = None):
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

    def cursor(self, threads: int | None = None) -> lockdown.LockedConnection:
        """A cursor for a query in another Python thread; close it after use.

        ``threads=1``: a cursor of a second DuckDB instance set up like the first but
        with one worker thread (its own spill subfolder), made on first use. Chunk
        queries run there, each on one thread, so the order of every sum is fixed
        (bitwise reproducible runs); the configuration is locked, so the thread count
        cannot be changed per cursor. ``threads=None``: a cursor of the main instance.
        """
        if threads is None:
            return self.con.cursor()
        if threads != 1:
            raise ValueError("Session.cursor takes threads=None (all) or threads=1")
        with self._lock:
            if self._single is None:
                folder = _subfolder(self.spill_folder, "single")
                self._single = lockdown.LockedConnection(self.source.connect(folder, threads=1))
        return self._single.cursor()

    def _explain(self, exc: duckdb.Error) -> BaseException:
        from .errors import BigpanelError

        if interrupts.received() is not None:
            return interrupts.Interrupted(interrupts.received())
        message = _first_line(exc)
        if isinstance(exc, duckdb.InterruptException):
            return BigpanelError(f"The query on {self.source.label} was interrupted.")
        if isinstance(exc, duckdb.PermissionException):
            reached = re.search(r'"([^"]*)"', message)
            return InputError(
                f"SQL on {self.source.label} tried to reach '{reached.group(1)[:200] if reached else message[:200]}', "
                "which bigpanel does not open: queries may read the source's own files only. "
                "Name that file as the source, or read it in --query.")
        if isinstance(exc, (duckdb.IOException, duckdb.InvalidInputException)) and self.source.kind == "parquet":
            bad = _find_corrupt_parquet(self.source.files)
            if bad:
                return InputError(f"File '{bad[0]}' is not a readable Parquet file ({bad[1]}). Re-export it or move it out of the source.")
        if isinstance(exc, duckdb.IOException):
            return InputError(f"Source {self.source.label} could not be read ({message}). Check the path and file format.")
        if isinstance(exc, duckdb.ConversionException):
            return InputError(f"A value in {self.source.label} could not be converted ({message}). Check the column types or pass csv types.")
        if isinstance(exc, duckdb.OutOfMemoryException):
            return BigpanelError(out_of_memory_message(self.source, self.spill_folder, message))
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
