"""PostgreSQL as an engine: the moment plan runs inside the warehouse, aggregates come back.

A source written as a PostgreSQL URI (``postgresql://...`` or ``postgres://...``), or as
``env:NAME`` where the environment variable NAME holds such a URI, with a table
(``--table schema.name``) or a query (``--query``, in DuckDB's SQL like every user text),
is a source of kind ``postgres``. libpq's own environment (PGHOST, PGPORT, PGUSER,
PGPASSWORD, PGDATABASE, PGSERVICE, PGPASSFILE) fills in what the URI leaves out, so a
password need never be written on the command line; a password that is written there
is masked (``***``) in every label, message and result.

:class:`PostgresSession` has the methods of :class:`bigpanel.source.Session` that the
pipeline and the checkup use; every query they build (DuckDB's SQL, from
:mod:`bigpanel.sqlbuild`) is parsed by DuckDB's parser and written for PostgreSQL by
:mod:`bigpanel.render` from the tree, with its parameters bound (``$1``..., never pasted).
What comes back is aggregates, as Arrow (through ADBC: ``adbc-driver-postgresql``, the
``postgres`` extra); the bytes received are counted (:attr:`PostgresSession.bytes_fetched`).

Nothing is written in the warehouse: the session is read-only
(``default_transaction_read_only``), no temporary table or function is made, and a role
with SELECT on the panel's table is all it needs. Queries run without parallel workers, so
every sum adds its rows in one order: the same data give the same bits on every run.
"""

from __future__ import annotations

import os
import re
import threading
from collections.abc import Sequence
from typing import Any
from urllib.parse import parse_qsl, urlsplit

from . import render, sqlbuild
from .engine import DuckDBEngine
from .errors import BigpanelError, InputError, echo, shown, unknown_column
from .source import Session

SCHEMES = ("postgresql://", "postgres://")
ENV_PREFIX = "env:"
EXTRA = "pip install 'bigpanel[postgres]'"

# Session settings sent after connecting (fixed text, no user input): read-only, and one
# process per query so that sums add in one order (reproducible to the bit).
SETTINGS = (
    ("default_transaction_read_only", "on"),
    ("max_parallel_workers_per_gather", "0"),
)

_PG_TO_DUCKDB = {
    "int2": "SMALLINT", "int4": "INTEGER", "int8": "BIGINT", "float4": "FLOAT", "float8": "DOUBLE",
    "numeric": "DECIMAL", "text": "VARCHAR", "varchar": "VARCHAR", "bpchar": "VARCHAR", "name": "VARCHAR",
    "bool": "BOOLEAN", "date": "DATE", "timestamp": "TIMESTAMP", "timestamptz": "TIMESTAMP WITH TIME ZONE",
}


def is_postgres(source: Any) -> bool:
    """True for a PostgreSQL URI or an ``env:NAME`` source."""
    if not isinstance(source, (str, os.PathLike)):
        return False
    text = str(source).strip()
    return text.lower().startswith(SCHEMES) or text.startswith(ENV_PREFIX)


def resolve(text: str) -> str:
    """The URI to connect with: ``env:NAME`` reads the variable NAME."""
    text = str(text).strip()
    if not text.startswith(ENV_PREFIX):
        return text
    name = text[len(ENV_PREFIX):]
    if not re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]*", name):
        raise InputError(f"Source {shown(text)} should name an environment variable, like env:WAREHOUSE_URI.")
    value = os.environ.get(name)
    if not value:
        raise InputError(f"Environment variable {name} (source {shown(text)}) is not set. "
                         "Set it to a PostgreSQL URI such as postgresql://analyst@/warehouse?host=/run/pg.")
    if not value.strip().lower().startswith(SCHEMES):
        raise InputError(f"Environment variable {name} does not hold a PostgreSQL URI (postgresql://...). Check its value.")
    return value.strip()


def mask(text: str) -> str:
    """``text`` with every password in a PostgreSQL URI or key=value string replaced by ***."""
    text = re.sub(r"(?i)(postgres(?:ql)?://[^:@/\s?#]*:)([^@\s]*)(@)", r"\1***\3", text)
    return re.sub(r"(?i)(password\s*=\s*)('[^']*'|[^&\s]+)", r"\1***", text)


def label(source_text: str, table: str | None, query: str | None) -> str:
    """How the source is named in messages and results (no password)."""
    shown_uri = source_text if source_text.startswith(ENV_PREFIX) else mask(source_text)
    what = f" table {table}" if table else " query" if query else ""
    return echo(f"PostgreSQL {shown_uri}{what}")


def _secrets(uri: str) -> list[str]:
    """The password(s) in a URI, to scrub from any text (a driver message may echo them)."""
    found = []
    try:
        parts = urlsplit(uri)
        if parts.password:
            found.append(parts.password)
        found += [v for k, v in parse_qsl(parts.query) if k.lower() == "password" and v]
    except ValueError:
        pass
    return found


def _driver():
    try:
        import adbc_driver_postgresql.dbapi as driver
    except ImportError:
        raise InputError(f"PostgreSQL sources need the ADBC PostgreSQL driver: {EXTRA}.") from None
    return driver


def duckdb_type(field) -> str:
    """A DuckDB type name for an Arrow field fetched from PostgreSQL (its type in metadata)."""
    meta = field.metadata or {}
    name = (meta.get(b"POSTGRESQL:type") or b"").decode()
    return _PG_TO_DUCKDB.get(name, name.upper() or str(field.type).upper())


def _plain(table):
    """Arrow result with PostgreSQL numerics (text in Arrow) as int64 or float64 columns."""
    import pyarrow as pa

    for i, field in enumerate(table.schema):
        if (field.metadata or {}).get(b"POSTGRESQL:type") != b"numeric":
            continue
        values = [None if v is None else str(v) for v in table.column(i).cast(pa.string()).to_pylist()] \
            if not isinstance(field.type, pa.ExtensionType) else \
            [None if v is None else str(v) for v in table.column(i).combine_chunks().storage.to_pylist()]
        whole = all(v is None or re.fullmatch(r"-?\d+", v) for v in values)
        column = pa.array([None if v is None else (int(v) if whole else float(v)) for v in values],
                          type=pa.int64() if whole else pa.float64())
        table = table.set_column(i, pa.field(field.name, column.type), column)
    return table


class _Cursor:
    """What :func:`bigpanel.moments.run_chunks` asks of a chunk cursor (queries run on the
    session's one connection, one at a time)."""

    def close(self) -> None:
        pass


class PostgresSession:
    """An open, read-only connection to PostgreSQL on a ``postgres`` source, with the
    methods of :class:`bigpanel.source.Session` the pipeline and the checkup use."""

    dialect = sqlbuild.POSTGRES

    def __init__(self, source):
        self.source = source
        self._lock = threading.Lock()
        self._columns: dict[str, str] | None = None
        self.bytes_fetched = 0  # Arrow buffer bytes of every result received
        self.queries = 0
        uri = resolve(source.uri or "")
        self._secrets = _secrets(uri)
        driver = _driver()
        try:
            self.con = driver.connect(uri, autocommit=True)
        except Exception as exc:  # noqa: BLE001 - the driver's own error types
            raise InputError(f"Could not connect to {source.label} ({self._scrub(exc)}). Check the URI, "
                             "the server and the PG* environment variables (PGPASSWORD, PGPASSFILE).") from None
        self._single = _Cursor()
        from . import interrupts

        interrupts.register(self)
        try:
            with self.con.cursor() as cur:
                for name, value in SETTINGS:
                    cur.execute(sqlbuild.setting_sql(name, value))
            self._check_user_sql()
        except BaseException:
            self.close()
            raise

    # ---- user text: checked as DuckDB's SQL already, here rendered for PostgreSQL
    def _check_user_sql(self) -> None:
        src = self.source
        if src.query_sql:
            tree = render.parse_tree(src.query_sql)
            try:
                render.statement(tree["statements"][0]["node"], render.POSTGRES, "query")
            except render.Unsupported as exc:
                raise InputError(f"Option 'query' {shown(src.query)} uses {exc.function}{self._reason(exc)}. "
                                 "Rewrite it with functions both engines share.") from None

    @staticmethod
    def _reason(exc: render.Unsupported) -> str:
        """The end of a refusal: for a function, that PostgreSQL lacks it; for a construct,
        that bigpanel does not write it for PostgreSQL; and why, when known."""
        lacks = "which PostgreSQL does not have" if exc.function.endswith("()") else "which bigpanel does not run on PostgreSQL"
        return f", {lacks}" + (f" ({exc.reason})" if exc.reason else "")

    def check_expression(self, sql: str, what: str, text: str | None = None) -> None:
        """Refuse a checked expression (DuckDB's SQL) that PostgreSQL cannot run with the
        same meaning, naming the engine and the function."""
        tree = render.parse_tree("SELECT " + sql)
        node = tree["statements"][0]["node"]["select_list"][0]
        try:
            render.expression(node, render.POSTGRES, self._booleans())
        except render.Unsupported as exc:
            raise InputError(f"{what} {shown(text or sql)} uses {exc.function}{self._reason(exc)}. Rewrite it with "
                             "functions both engines share (README: Data beyond one machine).") from None

    def _booleans(self) -> frozenset[str]:
        cols = self._columns or {}
        return frozenset(c for c, t in cols.items() if t == "BOOLEAN")

    # ---- running
    def _scrub(self, exc: BaseException | str) -> str:
        text = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        text = re.sub(r"^[A-Z_]+: (\[libpq\] )?", "", text)
        text = re.sub(r"^(Failed to (prepare|execute) query|could not begin COPY)[^:]*: ", "", text)
        for secret in self._secrets:
            text = text.replace(secret, "***")
        return echo(mask(text))

    def run(self, sql: str, params: dict | Sequence | None = None, con: Any = None):
        """Run one query built by sqlbuild (DuckDB's SQL), rendered for PostgreSQL from its
        parse tree with its parameters bound; return the aggregate result as Arrow."""
        from . import interrupts

        params = dict(params or {})
        try:
            rendered = render.translate(sql, render.POSTGRES, params, "internal", self._booleans())
        except render.Unsupported as exc:
            raise BigpanelError(f"This model needs {exc.function}{self._reason(exc)} yet. "
                                "Export the panel to Parquet and fit it there.") from None
        interrupts.raise_if_received()
        with self._lock:
            cur = self.con.cursor()
            try:
                cur.execute(rendered.sql, rendered.values(params) or None)
                table = cur.fetch_arrow_table()
            except Exception as exc:  # noqa: BLE001 - the driver's own error types
                raise self._explain(exc) from None
            finally:
                cur.close()
        self.queries += 1
        self.bytes_fetched += table.nbytes
        return _plain(table)

    def _explain(self, exc: BaseException) -> BaseException:
        from . import interrupts

        if interrupts.received() is not None:
            return interrupts.Interrupted(interrupts.received())
        message = self._scrub(exc)
        state = getattr(exc, "sqlstate", None) or (re.search(r"SQLSTATE: (\w+)", str(exc)) or [None, None])[1] or ""
        missing = re.search(r'column "([^"]+)" does not exist', str(exc))
        if missing and self._columns is not None:
            return unknown_column(missing.group(1), self.source.label, self._columns)
        if state.startswith("22"):
            return InputError(f"PostgreSQL could not compute a term or filter on some rows of {self.source.label} ({message}). "
                              "DuckDB gives an infinity or NaN there and leaves such rows out; filter those rows out "
                              "(--where) or rewrite the term.")
        if state == "57014":
            return BigpanelError(f"The query on {self.source.label} was cancelled.")
        if state.startswith("42"):
            return InputError(f"SQL on {self.source.label} was refused by PostgreSQL ({message}). "
                              "Check the table, the filter, the terms and the query.")
        return BigpanelError(f"PostgreSQL failed on {self.source.label}: {message}")

    def cursor(self, threads: int | None = None) -> _Cursor:
        return _Cursor()

    def interrupt(self) -> None:
        """Cancel the running query (a stop signal)."""
        self.con.adbc_cancel()

    def close(self) -> None:
        from . import interrupts

        interrupts.unregister(self)
        try:
            self.con.close()
        except Exception:  # noqa: BLE001 - closing a broken connection
            pass

    def __enter__(self) -> "PostgresSession":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # ---- schema
    def columns(self) -> dict[str, str]:
        """Column name -> type (DuckDB's names) of the source, from a query reading no rows."""
        if self._columns is None:
            table = self.run(sqlbuild.head_sql(self.source.relation(), 0).strip("()"))
            self._columns = {f.name: duckdb_type(f) for f in table.schema}
        return self._columns

    # the same checks as DuckDB's session, on this session's columns and types
    require_columns = Session.require_columns
    check_filter = Session.check_filter

    def describe_expression(self, expression: str, what: str = "Term", text: str | None = None) -> str:
        """Type (DuckDB's names) of a checked expression over the source, reading no rows;
        refused first when PostgreSQL lacks a function it calls."""
        self.columns()
        self.check_expression(expression, what, text)
        sql = sqlbuild.expression_type_sql(expression, self.source.relation()) + " LIMIT 0"
        table = self.run(sql)
        return duckdb_type(table.schema.field(0))


class PostgresEngine(DuckDBEngine):
    """The engine adapter for a ``postgres`` source: DuckDB's adapter on a
    :class:`PostgresSession` (one chunk, no numpy fold, no footer row count), with the
    PostgreSQL dialect and its capabilities."""

    dialect = sqlbuild.POSTGRES
    twoway_pass = False  # unit + period effects go through period indicators (no bitstring_agg)
    # The unit-cluster meat by expansion sums ~k^4/4 products per unit: cheap in DuckDB, but
    # PostgreSQL evaluates them one by one (at k = 5, 5x the rest of the pass): a second
    # pass over the rows (unit_scores.sql) is faster there. Only k = 1 is expanded.
    max_expanded = 1

    def refuse_model(self, spec) -> None:
        """Refuse, before any row is read, what bigpanel does not run on PostgreSQL yet."""
        if spec.many_effects:
            raise InputError(f"Effects beyond the unit and the period ({', '.join(spec.effects)}) are absorbed by "
                             "iteration over a private copy of the rows, which bigpanel does not make in a PostgreSQL "
                             "warehouse yet. Fit a Parquet export of the panel, or keep to unit and period effects.")

    def row_count(self) -> int | None:
        return None

    def thread_count(self) -> int:
        return 1  # one query at a time, without parallel workers

    def run_facts(self) -> dict:
        """For the result's ``run`` entry: the engine, and the queries and Arrow bytes
        received from it so far in this session (aggregates only: kilobytes)."""
        return {"engine": "postgresql", "queries": self.session.queries, "fetched_bytes": self.session.bytes_fetched}

    def plan_chunks(self, unit: str):
        from .moments import Chunk

        return [Chunk()]
