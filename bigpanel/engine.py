"""The engine boundary: what the pipeline asks of a SQL engine, and DuckDB's answers.

The executor (:mod:`bigpanel.execute`) and the design (:mod:`bigpanel.design`) talk to an
engine only through :class:`EngineAdapter`; all SQL text comes from :mod:`bigpanel.sqlbuild`
in the engine's :class:`~bigpanel.sqlbuild.Dialect`. DuckDB is the one implementation;
another SQL engine is a new adapter (DEVELOPERS.md lists what it must provide).
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from typing import Protocol

import duckdb
import pyarrow.parquet as pq

from . import moments, sqlbuild
from .expressions import expression_sql
from .source import Session, check_select, is_integer, is_numeric


STREAM_BATCH_ROWS = 131_072  # upper bound per streamed batch (batches also break at row groups)


class EngineAdapter(Protocol):
    """What a SQL engine provides to the pipeline."""

    dialect: sqlbuild.Dialect
    label: str  # the source's name in messages
    where: str | None  # the row filter as the user gave it

    def columns(self) -> dict[str, str]:
        """Column name -> type of the source (schema only, no rows read)."""

    def is_numeric(self, column_type: str) -> bool: ...

    def is_integer(self, column_type: str) -> bool: ...

    def require_columns(self, names: Sequence[str]) -> None:
        """Raise the unknown-column error (with close names) for a missing column."""

    def check_filter(self) -> None:
        """Refuse a filter that is not one checked predicate over the columns."""

    def check_expression(self, text: str, what: str) -> str:
        """Refuse anything but one scalar expression; return the SQL rendered from its
        checked parse tree (DuckDB's parser; rendered in this engine's dialect)."""

    def expression(self, sql: str, what: str, text: str) -> str:
        """A checked expression (the SQL DuckDB rendered from its checked tree) in this
        engine's dialect, rendered from the same tree; refused when the engine lacks one of
        its functions."""

    def describe_expression(self, expression: str, what: str, text: str) -> str:
        """The type of a checked expression over the source, reading no rows."""

    def filtered(self, chunk: moments.Chunk | None = None, unit: str | None = None, head: int | None = None) -> str:
        """FROM text for the source's rows after the filter (one chunk of units, or the first rows)."""

    def run(self, sql: str, params: dict | None = None):
        """Run one query; return its (aggregate) result as a pyarrow Table."""

    def run_alone(self, sql: str, params: dict | None = None):
        """Run one query over the whole source so that its sums are added in one fixed
        order whatever the thread count (DuckDB: on one thread)."""

    def thread_count(self) -> int:
        """Chunk queries run at once."""

    def plan_chunks(self, unit: str) -> list[moments.Chunk]:
        """Cut the source into unit ranges that read few storage blocks (or one chunk)."""

    def run_chunks(self, chunks: Sequence[moments.Chunk], make_sql: Callable, params: dict) -> list:
        """One query per chunk, results in chunk order (bitwise the same on every run)."""

    def row_count(self) -> int | None:
        """Rows after the filter when known without a scan (storage metadata), else None."""

    def stream(self, sql: str, params: dict | None = None):
        """Optional: the rows of one query as Arrow record batches, in one fixed order
        whatever the thread count (many effects: the rows copied to the scratch folder)."""

    def scratch_folder(self) -> str:
        """Optional: a new private folder for the run's scratch files, removed with the session."""

    def reader(self, sql: str, params: dict, batch_rows: int):
        """Optional: a query's rows as a pyarrow RecordBatchReader (the write-back's rows)."""

    def fold_chunks(self, chunks: Sequence[moments.Chunk], make_sql: Callable, params: dict, fold: Callable) -> list:
        """Optional: stream each chunk's rows as Arrow batches into ``fold(batches)`` (one
        thread per chunk, the rows in storage order); results in chunk order."""


def open_session(source):
    """An open session on a source: :class:`~bigpanel.source.Session` (DuckDB),
    :class:`~bigpanel.pg.PostgresSession` for a ``postgres`` source (same methods), or for
    the spark engine its adapter itself (:class:`~bigpanel.spark.SparkEngine`)."""
    if source.engine.name == "spark":
        from .spark import SparkEngine

        return SparkEngine(source)
    if source.kind == "postgres":
        from .pg import PostgresSession

        return PostgresSession(source)
    return Session(source)


@contextmanager
def open_engine(source) -> Iterator["EngineAdapter"]:
    """The engine adapter for a source, open for the block: DuckDB, PostgreSQL for a
    ``postgres`` source (:mod:`bigpanel.pg`), or Spark SQL when the source's engine
    settings name it (:mod:`bigpanel.spark`)."""
    with open_session(source) as session:
        yield adapter(session)


def adapter(session) -> "EngineAdapter":
    """The engine adapter on an open session (:func:`open_session`)."""
    if session.source.engine.name == "spark":  # Spark's session is its adapter
        return session
    if session.source.kind == "postgres":
        from .pg import PostgresEngine

        return PostgresEngine(session)
    return DuckDBEngine(session)


class DuckDBEngine:
    """DuckDB on one open :class:`~bigpanel.source.Session`."""

    dialect = sqlbuild.DUCKDB

    def __init__(self, session: Session):
        self.session = session
        self.source = session.source
        self.label = session.source.label
        self.where = session.source.where

    def columns(self) -> dict[str, str]:
        return self.session.columns()

    def is_numeric(self, column_type: str) -> bool:
        return is_numeric(column_type)

    def is_integer(self, column_type: str) -> bool:
        return is_integer(column_type)

    def require_columns(self, names: Sequence[str]) -> None:
        self.session.require_columns(names)

    def check_filter(self) -> None:
        self.session.check_filter()

    def check_expression(self, text: str, what: str) -> str:
        return expression_sql(text, what)

    def expression(self, sql: str, what: str, text: str) -> str:
        return sql

    def describe_expression(self, expression: str, what: str, text: str) -> str:
        return self.session.describe_expression(expression, what, text)

    def filtered(self, chunk: moments.Chunk | None = None, unit: str | None = None, head: int | None = None) -> str:
        rows = chunk.source_sql(self.source, unit) if chunk else self.source.filtered()
        return sqlbuild.head_sql(rows, head) if head else rows

    def run(self, sql: str, params: dict | None = None):
        return self.session.run(sql, params)

    def run_alone(self, sql: str, params: dict | None = None):
        return moments.run_alone(self.session, sql, params)

    def thread_count(self) -> int:
        return moments.thread_count(self.session)

    def plan_chunks(self, unit: str) -> list[moments.Chunk]:
        return moments.plan_chunks(self.session, unit)

    def run_chunks(self, chunks: Sequence[moments.Chunk], make_sql: Callable, params: dict) -> list:
        return moments.run_chunks(self.session, chunks, make_sql, params)

    def fold_chunks(self, chunks: Sequence[moments.Chunk], make_sql: Callable, params: dict, fold: Callable) -> list:
        session = self.session
        threads = moments.thread_count(session)

        def one(chunk):
            sql = make_sql(chunk)
            check_select(sql)
            cur = session.cursor(threads=1)
            try:
                reader = cur.sql(sql, params=params | chunk.params()).to_arrow_reader(STREAM_BATCH_ROWS)
                return fold(iter(reader))
            except duckdb.Error as exc:
                raise session._explain(exc) from None
            finally:
                cur.close()

        return moments.in_parallel(one, chunks, threads)

    def reader(self, sql: str, params: dict, batch_rows: int):
        """A query's rows as a pyarrow RecordBatchReader on all threads (one SELECT on the
        locked main connection; the write-back streams them into its writer instance)."""
        check_select(sql)
        try:
            return self.session.con.sql(sql, params=params).to_arrow_reader(batch_rows)
        except duckdb.Error as exc:
            raise self.session._explain(exc) from None

    def explain(self, exc: BaseException) -> BaseException:
        """The error to raise for a DuckDB error met while streaming rows out."""
        return self.session._explain(exc) if isinstance(exc, duckdb.Error) else exc

    def row_count(self) -> int | None:
        if self.source.kind == "parquet" and not self.source.where:
            return sum(pq.read_metadata(f).num_rows for f in self.source.files)
        return None

    def stream(self, sql: str, params: dict | None = None):
        session = self.session
        check_select(sql)
        cur = session.cursor(threads=1)  # one thread: the rows come in the same order on every run
        try:
            reader = cur.sql(sql, params=params) if params else cur.sql(sql)
            yield from reader.to_arrow_reader(STREAM_BATCH_ROWS)
        except duckdb.Error as exc:
            raise session._explain(exc) from None
        finally:
            cur.close()

    def scratch_folder(self) -> str:
        import tempfile

        return tempfile.mkdtemp(prefix="effects-", dir=self.session.spill_folder)
