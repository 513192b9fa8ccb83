"""Spark SQL as an engine: the moment plan's queries run in Spark, aggregates come back as Arrow.

Spark reads the source's Parquet files itself (``spark.read.parquet``) into a temporary
view, the one object bigpanel makes in Spark, dropped when the fit ends. Every query is
built by :mod:`bigpanel.sqlbuild` in the ``SPARK`` dialect, checked by Spark's own parser
to be one query (``parseQuery``: no command, no second statement) and run with its values
bound as named parameters (``:name``); its result, a few aggregate rows, is collected
with ``DataFrame.toArrow()``. User expressions were checked by DuckDB's parser and are
rendered for Spark from that checked tree (:mod:`bigpanel.render`); a function Spark lacks
is refused by name.

The master is ``--spark-master`` (``spark_master``), else the environment's ``SPARK_MASTER``,
else ``spark.master`` in ``spark-defaults.conf`` (``$SPARK_CONF_DIR`` or
``$SPARK_HOME/conf``), else local mode on every core (``local[*]``). A session already
active in the process is used as it is. Local mode runs without network (driver on
127.0.0.1, no UI); logs are errors only; no progress bars.

Sums: Spark has no compensated sum, and its order of summation follows its partitioning,
so results agree with DuckDB's to :data:`RELATIVE_TOLERANCE`, not bit for bit. The
design columns are shifted (and scaled) before summing, as on DuckDB.
"""

from __future__ import annotations

import logging
import os
import re
import tempfile
import threading
import uuid
import warnings
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path

from . import moments, sqlbuild
from .errors import BigpanelError, InputError, echo, shown, unknown_column
from .source import Session, is_integer, is_numeric

# Agreement with DuckDB on the same data (coefficients and standard errors, relative to
# the larger magnitude): Spark's plain sums in partition order against DuckDB's
# compensated ones. Measured on wagepan (tests/test_engine_spark.py): about 1e-13; the
# stated bound leaves room for long panels, where plain sums lose ~n * eps.
RELATIVE_TOLERANCE = 1e-9

LOCAL_MASTER = "local[*]"
LOG_CONFIG = Path(__file__).with_name("spark-log4j2.properties")
LOCAL_SHUFFLE_PARTITIONS = 8  # Spark's default 200 costs seconds of scheduling on small local runs
# What bigpanel's SQL means depends on two session settings: times read in UTC (a month or a
# day of a timestamp as DuckDB reads it) and x / 0 as NULL (not an error, as in DuckDB). A
# session bigpanel starts has them; a session already active (a notebook's) gets them for
# the length of each query and its own values back afterwards (``_meaning``).
SESSION_SETTINGS = {"spark.sql.session.timeZone": "UTC", "spark.sql.ansi.enabled": "false"}

# Spark type names (DataType.simpleString) as the DuckDB type names the pipeline checks
_TYPES = {"tinyint": "TINYINT", "smallint": "SMALLINT", "int": "INTEGER", "bigint": "BIGINT", "float": "FLOAT",
          "double": "DOUBLE", "boolean": "BOOLEAN", "string": "VARCHAR", "date": "DATE",
          "timestamp": "TIMESTAMP WITH TIME ZONE", "timestamp_ntz": "TIMESTAMP", "binary": "BLOB"}

_session_lock = threading.Lock()


def _pyspark():
    """The pyspark.sql module (its import warns about pandas versions: not our users' concern)."""
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            from pyspark.sql import SparkSession
    except ImportError:
        raise InputError("The spark engine needs pyspark, which is not installed. "
                         "Install it with pip install 'bigpanel[spark]' (Spark also needs Java 17).") from None
    for name in ("SQLQueryContextLogger", "DataFrameQueryContextLogger"):  # errors are ours to report, in one line
        logging.getLogger(name).disabled = True
    # pyspark checks the pandas version on its first Arrow collect and warns about pandas 3,
    # which bigpanel never hands it
    warnings.filterwarnings("ignore", message="PySpark does not yet fully support pandas", category=FutureWarning)
    return SparkSession


def defaults_master(environ=os.environ) -> str | None:
    """``spark.master`` from ``spark-defaults.conf`` in ``$SPARK_CONF_DIR`` or ``$SPARK_HOME/conf``."""
    folders = [environ.get("SPARK_CONF_DIR")] + ([os.path.join(environ["SPARK_HOME"], "conf")] if environ.get("SPARK_HOME") else [])
    for folder in filter(None, folders):
        path = os.path.join(folder, "spark-defaults.conf")
        try:
            with open(path, encoding="utf-8") as handle:
                for line in handle:
                    parts = line.strip().split(None, 1)
                    if len(parts) == 2 and parts[0] == "spark.master":
                        return parts[1].strip()
        except OSError:
            continue
    return None


def resolve_master(given: str | None, environ=os.environ) -> tuple[str, str]:
    """(master URL, where it came from): the option, ``SPARK_MASTER``, spark-defaults, or local mode."""
    if given:
        return given, "--spark-master"
    if environ.get("SPARK_MASTER"):
        return environ["SPARK_MASTER"], "SPARK_MASTER"
    found = defaults_master(environ)
    if found:
        return found, "spark-defaults.conf"
    return LOCAL_MASTER, "local mode (the default)"


def is_local(master: str) -> bool:
    return master == "local" or master.startswith("local[")


def spark_session(master: str | None = None):
    """The process's SparkSession: the active one, else one made for ``master`` (see the
    module note). Made once; later calls return it."""
    session_class = _pyspark()
    with _session_lock:
        active = session_class.getActiveSession()
        if active is not None:
            return active
        url, origin = resolve_master(master)
        builder = (session_class.builder.master(url).appName("bigpanel")
                   .config("spark.ui.enabled", "false")
                   .config("spark.ui.showConsoleProgress", "false")
                   .config("spark.sql.session.timeZone", SESSION_SETTINGS["spark.sql.session.timeZone"])
                   .config("spark.sql.ansi.enabled", SESSION_SETTINGS["spark.sql.ansi.enabled"])
                   .config("spark.driver.extraJavaOptions", f"-Dlog4j2.configurationFile={LOG_CONFIG.as_uri()}"))
        if is_local(url):
            # Spark makes its (unused) warehouse folder when it starts: in the system's temporary
            # folder, not the user's working folder
            warehouse = os.path.join(tempfile.gettempdir(), "bigpanel-spark-warehouse")
            builder = (builder.config("spark.driver.host", "127.0.0.1").config("spark.driver.bindAddress", "127.0.0.1")
                       .config("spark.sql.shuffle.partitions", str(LOCAL_SHUFFLE_PARTITIONS))
                       .config("spark.sql.warehouse.dir", Path(warehouse).as_uri()))
        try:
            session = builder.getOrCreate()
        except Exception as exc:  # noqa: BLE001 - py4j and the JVM launcher raise their own kinds
            raise BigpanelError(f"Spark could not start with master '{echo(url)}' (from {origin}): {echo(_first_line(exc))}. "
                                "Check the master URL, and that Java 17 is installed (JAVA_HOME).") from None
        session.sparkContext.setLogLevel("ERROR")
        return session


@contextmanager
def _meaning(spark) -> Iterator[None]:
    """:data:`SESSION_SETTINGS` on ``spark`` while a query runs; the session's own values
    (or their absence) restored afterwards."""
    conf = spark.conf
    saved = {key: conf.get(key, None) for key in SESSION_SETTINGS}
    changed = [key for key, value in SESSION_SETTINGS.items() if saved[key] != value]
    for key in changed:
        conf.set(key, SESSION_SETTINGS[key])
    try:
        yield
    finally:
        for key in changed:
            if saved[key] is None:
                conf.unset(key)
            else:
                conf.set(key, saved[key])


def _first_line(exc: BaseException) -> str:
    from .lockdown import mask_url_keys

    text = [line for line in str(exc).strip().splitlines() if line.strip()]
    if len(text) > 1 and text[0].startswith("An error occurred while calling"):  # py4j's wrapper: the Java error follows
        text = [text[1].lstrip(": ")]
    return mask_url_keys(re.sub(r"\s*SQLSTATE: \w+\.?", "", text[0])) if text else type(exc).__name__


def duck_type(spark_type: str) -> str:
    """A Spark type name as the DuckDB type name the pipeline's checks read."""
    if spark_type.startswith("decimal"):
        return spark_type.upper()
    return _TYPES.get(spark_type, spark_type.upper())


class SparkEngine:
    """Spark SQL over the Parquet files of one source (an EngineAdapter, bigpanel/engine.py)."""

    dialect = sqlbuild.SPARK
    received = {"queries": 0, "bytes": 0}  # process-wide: results collected from Spark (Arrow bytes)

    def __init__(self, source, session=None):
        if source.kind != "parquet":
            raise InputError(f"The spark engine reads Parquet files; {source.label} is a {_kind_name(source.kind)}. "
                             "Give Parquet files, a folder or a glob, or use --engine duckdb.")
        self.source = source
        self.label = source.label
        self.where = source.where
        self.spark = session or spark_session(source.engine.spark_master)
        self.view = f"bigpanel_{uuid.uuid4().hex[:16]}"
        self._columns: dict[str, str] | None = None
        self._where_sql: str | None = None
        reader = self.spark.read.option("mergeSchema", "true")  # a column missing from some files reads as NULL
        if source.hive:
            reader = reader.option("basePath", os.path.commonpath([os.path.dirname(f) for f in source.files]))
        try:
            frame = reader.parquet(*source.files)
        except Exception as exc:  # noqa: BLE001
            raise InputError(f"Spark could not read {source.label} ({echo(_first_line(exc))}). "
                             "Check that the files are Parquet and readable (a URL also needs Spark's connector "
                             "for its file system).") from None
        frame.createOrReplaceTempView(self.view)
        self._schema = frame.schema

    def close(self) -> None:
        try:
            self.spark.catalog.dropTempView(self.view)
        except Exception:  # noqa: BLE001 - a stopped session has no views left
            pass

    def __enter__(self) -> "SparkEngine":  # opened by engine.open_session: the adapter is its own session
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def refuse_model(self, spec) -> None:
        """Refuse, before any row is read, what bigpanel does not run on Spark yet."""
        if spec.many_effects:
            raise InputError(f"Effects beyond the unit and the period ({', '.join(spec.effects)}) are absorbed by "
                             "iteration over a private copy of the rows, which bigpanel does not make on Spark yet. "
                             "Fit the Parquet files with --engine duckdb, or keep to unit and period effects.")

    def run_facts(self) -> dict:
        """For the result's ``run`` entry: the engine and its master."""
        return {"engine": "spark", "master": str(self.spark.sparkContext.master)}

    # ---- schema
    def columns(self) -> dict[str, str]:
        if self._columns is None:
            self._columns = {f.name: duck_type(f.dataType.simpleString()) for f in self._schema.fields}
        return self._columns

    def is_numeric(self, column_type: str) -> bool:
        return is_numeric(column_type)

    def is_integer(self, column_type: str) -> bool:
        return is_integer(column_type)

    require_columns = Session.require_columns  # the same checks on Spark's columns and types

    def check_filter(self) -> None:
        if not self.source.where_sql:
            return
        kind = self.describe_expression(self.where_sql(), "Filter", self.source.where)
        if kind != "BOOLEAN":
            raise InputError(f"Filter {shown(self.source.where)} has type {kind}, not a yes/no condition. "
                             "Write a comparison, for example \"region = 'north'\" or \"promo > 0\".")

    def expression(self, sql: str, what: str, text: str) -> str:
        from . import render

        node = render.parse_tree("SELECT " + sql)["statements"][0]["node"]["select_list"][0]
        booleans = frozenset(c for c, t in self.columns().items() if t == "BOOLEAN")
        try:
            return render.expression(node, render.SPARK, booleans)
        except render.Unsupported as exc:
            reason = f" ({exc.reason})" if exc.reason else ""
            raise InputError(f"{what} {shown(text or sql)} uses {exc.function}, which Spark does not have{reason}. "
                             "Rewrite it with functions both engines share (README: Data beyond one machine), "
                             "or use --engine duckdb.") from None

    def where_sql(self) -> str | None:
        if self._where_sql is None and self.source.where_sql:
            self._where_sql = self.expression(self.source.where_sql, "Filter", self.source.where)
        return self._where_sql

    def describe_expression(self, expression: str, what: str, text: str) -> str:
        sql = sqlbuild.expression_type_sql(expression, self.dialect.quote_ident(self.view))
        try:
            self._check_query(sql)
            with _meaning(self.spark):
                field = self.spark.sql(sql).schema.fields[0]
        except BigpanelError:
            raise
        except Exception as exc:  # noqa: BLE001
            missing = re.search(r"name `([^`]+)` cannot be resolved", str(exc))
            if missing:
                raise unknown_column(missing.group(1), self.label, self.columns()) from None
            raise InputError(f"{what} {shown(text or expression)} cannot be evaluated by Spark on {self.label} "
                             f"({echo(_first_line(exc))}). Check the column names and SQL.") from None
        return duck_type(field.dataType.simpleString())

    # ---- rows
    def filtered(self, chunk: moments.Chunk | None = None, unit: str | None = None, head: int | None = None) -> str:
        rows = sqlbuild.filtered_sql(self.dialect.quote_ident(self.view), self.where_sql())
        return sqlbuild.head_sql(rows, head) if head else rows

    def row_count(self) -> int | None:
        if self.source.where or self.source.remote:
            return None
        from .source import _parquet

        return sum(_parquet().read_metadata(f).num_rows for f in self.source.files)

    # ---- running
    def _check_query(self, sql: str) -> None:
        """Stop as a bug unless Spark's parser reads ``sql`` as exactly one query (a
        command, such as CREATE or INSERT, or a second statement does not parse as one)."""
        try:
            self.spark._jsparkSession.sessionState().sqlParser().parseQuery(sql)
        except Exception as exc:  # noqa: BLE001
            raise BigpanelError("bigpanel built a query that Spark does not read as exactly one query "
                                f"({echo(_first_line(exc))}); it was not run. This is a bug: report it with the "
                                "command that caused it.") from None

    def run(self, sql: str, params: dict | None = None):
        """Run one query; its result (a few aggregate rows) as a pyarrow Table."""
        text, args = self.dialect.bind(sql, params)
        self._check_query(text)
        try:
            with _meaning(self.spark):
                table = self.spark.sql(text, args=args).toArrow()
        except Exception as exc:  # noqa: BLE001 - Spark's errors arrive through py4j
            raise self._explain(exc) from None
        SparkEngine.received["queries"] += 1
        SparkEngine.received["bytes"] += table.nbytes
        return table

    def _explain(self, exc: BaseException) -> BaseException:
        from . import interrupts

        if interrupts.received() is not None:
            return interrupts.Interrupted(interrupts.received())
        name = type(exc).__name__
        if name in ("AnalysisException", "ParseException"):
            return InputError(f"SQL on {self.label} was refused by Spark ({echo(_first_line(exc))}). "
                              "Check the filter and terms.")
        return BigpanelError(f"Spark failed on {self.label}: {echo(_first_line(exc))}")

    def run_alone(self, sql: str, params: dict | None = None):
        return self.run(sql, params)

    def thread_count(self) -> int:
        return int(self.spark.sparkContext.defaultParallelism)

    def plan_chunks(self, unit: str) -> list[moments.Chunk]:
        return [moments.Chunk()]  # Spark splits the scan itself

    def run_chunks(self, chunks: Sequence[moments.Chunk], make_sql: Callable, params: dict) -> list:
        return [self.run(make_sql(chunk), params | chunk.params()) for chunk in chunks]


def _kind_name(kind: str) -> str:
    return {"csv": "CSV file", "duckdb": "DuckDB file", "query": "SQL query", "frame": "frame in memory"}.get(kind, kind)
