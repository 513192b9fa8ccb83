"""Engines other than DuckDB, one module each, behind :class:`bigpanel.engine.EngineAdapter`.

:func:`open_engine` turns a :class:`~bigpanel.source.Source` into an open adapter for the
engine its settings name (``Engine.name``): DuckDB on a locked session, or Spark SQL
(:mod:`bigpanel.engines.spark`).
"""

from __future__ import annotations

from contextlib import contextmanager


@contextmanager
def open_engine(source):
    """An open engine adapter on ``source``, closed on exit."""
    if source.engine.name == "spark":
        from .spark import SparkEngine

        engine = SparkEngine(source)
        try:
            yield engine
        finally:
            engine.close()
        return
    from ..engine import DuckDBEngine
    from ..source import Session

    with Session(source) as session:
        yield DuckDBEngine(session)
