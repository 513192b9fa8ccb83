"""The model parameters, declared once: name, kind, constraint, default and help.

``fit()``, ``fit_many()`` model dicts, the command line (and later spec files) read this
table; :func:`check` writes every parameter error, so a constraint lives in one place.
A CLI option is the kebab-case spelling of the name unless ``flag`` says otherwise:
renaming an option is one line here.
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from .errors import InputError, echo

ESTIMATORS = ("pooled", "within", "first-difference", "between", "random-effects")
ENGINES = ("duckdb", "spark")  # where the SQL runs (bigpanel.engine.open_engine)
VARIANCES = ("homoskedastic", "hc1", "cluster")
# How absorbed effect levels enter K' of the cluster small-sample factor (ESTIMATION.md):
# "not-nested" leaves out the effects nested in at least one cluster dimension, "all"
# counts every level (the dummy-variable convention). One K' for every component.
LEVEL_COUNTS = ("not-nested", "all")


@dataclass(frozen=True)
class Param:
    """One model parameter.

    ``kind`` is one of ``expression`` (a SQL scalar expression or column), ``terms`` (a list
    of terms, or one text split at top-level commas), ``restrictions`` (one text or a list of
    texts, each one joint test: restrictions separated by top-level commas), ``column``, ``columns`` (a list, or
    comma-separated text), ``choice`` (one of ``choices``), ``flag`` (True/False/None),
    ``count`` (a whole number of at least ``minimum``), ``number`` (a real number within ``bounds``)
    and ``folder`` (a folder to write into, checked against the source when the fit starts:
    :mod:`bigpanel.writeback`).
    """

    name: str
    kind: str
    help: str
    default: Any = None
    choices: tuple[str, ...] = ()
    minimum: int | None = None
    maximum: int | None = None
    required: bool = False
    flag: str | None = None
    empty: str = ""  # what to do when the value is empty
    scope: str = ""  # source options in spec files: "model" (a model may set it too), "setting" (engine only)
    bounds: tuple[float, float] | None = None  # a ``number``'s smallest and largest value

    @property
    def option(self) -> str:
        return self.flag or "--" + self.name.replace("_", "-")


PARAMETERS: dict[str, Param] = {p.name: p for p in (
    Param("outcome", "expression", "Outcome column or SQL expression, e.g. \"ln(parcels)\".", required=True,
          empty="Name the outcome column or expression."),
    Param("regressors", "terms", "Terms separated by commas (not inside parentheses): columns, SQL expressions, "
          "lag(EXPR[, K]), lead(EXPR[, K]), levels(COLUMN[, 'BASE']).", required=True,
          empty="Give at least one term, separated by commas."),
    Param("unit", "column", "Column identifying the unit (depot, store, worker, ...).", required=True),
    Param("period", "column", "Column identifying the period (whole numbers for differences and lags).", required=True),
    Param("estimator", "choice", "pooled, within, first-difference, between (least squares on unit means) or "
          "random-effects (generalized least squares with Swamy-Arora variance components).", default="within",
          choices=ESTIMATORS),
    Param("effects", "columns", "Fixed effects, comma-separated: within defaults to the unit and takes any number of "
          "columns besides (each with any number of levels), and cell(A, B) for one effect per combination of levels "
          "(e.g. --effects worker,firm,year or depot,cell(region, month)); the unit and the period alone run exactly, "
          "more run by iteration to --effects-tolerance. First-difference takes the period for period intercepts."),
    Param("variance", "choice", "Variance: homoskedastic, hc1 or cluster (default: cluster for within and first-difference, homoskedastic for "
          "pooled).", choices=VARIANCES),
    Param("cluster", "columns", "One or two cluster columns, comma-separated (default: the unit)."),
    Param("intercept", "flag", "Intercept of pooled and first-difference fits (kept by default; --no-intercept drops it).",
          flag="--no-intercept"),
    Param("absorbed_levels", "choice", "Absorbed effect levels counted in the cluster small-sample factor K' (one K' "
          "for every component of a two-way variance): not-nested (default; effects nested in a cluster dimension are "
          "left out) or all (every level, as a dummy-variable fit counts them).", default="not-nested",
          choices=LEVEL_COUNTS),
    Param("effects_tolerance", "number", "Tolerance of the iteration that absorbs many effects: the largest "
          "remaining level mean of a transformed column, count-weighted over every effect, relative to the column's "
          "norm (default 1e-10).", default=1e-10, bounds=(1e-15, 1e-2),
          empty="Give a small positive number such as 1e-10."),
    Param("effects_iterations", "count", "Most iterations (each one pass over the rows) when absorbing many effects "
          "(default 1000); a fit that stops short of the tolerance says so.", default=1000, minimum=1,
          maximum=1_000_000, empty="Give a whole number of iterations such as 1000."),
    Param("test", "restrictions", "A joint Wald test of linear restrictions on the terms, written with term names "
          "and numbers: \"grant = 0, lag(grant) = 0\" or \"2*x = z + 1\" (repeat the option for several tests).",
          flag="--test"),
    Param("serial_test", "flag", "Test the within or first-difference errors for serial correlation (one more scan "
          "over the rows, so on request).", default=False, flag="--serial-test"),
    Param("period_step", "count", "Distance between consecutive whole-number periods (default: the panel's detected "
          "step: the gcd of the gaps, or for dates a day, week, month, quarter or year).", minimum=1, maximum=2**53,
          empty="Give the distance between consecutive periods."),
    Param("write_effects", "folder", "Folder to write the estimated effects into, one Parquet file per effect "
          "(level, effect, rows), normalised as README describes; within fits only.",
          empty="Give a folder outside the source's folders."),
    Param("write_residuals", "folder", "Folder to write residuals.parquet into: each used row's keys, fitted value and "
          "residual; within and first-difference fits.",
          empty="Give a folder outside the source's folders."),
    Param("weights", "column", "Column of analytic weights (finite, at least 0): every sum and variance is weighted, unit "
          "means are weighted means, rows of weight 0 are left out and counted; a first difference takes the weight of "
          "its later row."),
    Param("endogenous", "terms", "Regressors to instrument, written like the regressors (columns, expressions, lag(), "
          "lead()); they join the regressors and are estimated by two-stage least squares. Needs --instruments.",
          empty="Give at least one endogenous term, separated by commas."),
    Param("instruments", "terms", "Excluded instruments for the endogenous terms, written like the regressors; at least "
          "as many as endogenous terms. The regressors instrument themselves.",
          empty="Give at least one instrument, separated by commas."),
)}

MODEL_KEYS = tuple(PARAMETERS)
# Model keys that the models of one source share (fit_many takes them once); a spec file
# may give them in its source table.
SHARED_KEYS = ("unit", "period", "period_step")

# The source options of ``fit`` and ``open_source``, declared once for spec files
# (bigpanel.batch): ``text`` is one text, ``columns`` a list or comma-separated text,
# ``mapping`` a table of text values, ``count`` a whole number. ``scope``: "model" when a
# model (or the defaults) may set it too, on top of the source's value; "setting" for engine
# settings (fields of source.Engine), which change how a fit runs, never its numbers (they
# enter no resume key). Every other key is passed to open_source under its own name.
SOURCE_PARAMETERS: dict[str, Param] = {p.name: p for p in (
    Param("path", "text", "Parquet file, folder or glob; CSV file or glob; or a DuckDB file (relative to the spec file); "
          "or a PostgreSQL URI (postgresql://... or env:NAME, as given)."),
    Param("table", "text", "Table or view in the DuckDB file or the PostgreSQL database (schema.name)."),
    Param("query", "text", "A SQL query giving the rows (inside the DuckDB file or PostgreSQL database, or on its own)."),
    Param("where", "text", "SQL predicate keeping rows, e.g. \"region = 'north'\".", scope="model"),
    Param("csv_types", "mapping", "Override detected CSV column types: a table of column = \"TYPE\"."),
    Param("csv_nulls", "columns", "Extra CSV tokens read as missing values, e.g. [\"NA\", \".\"]."),
    Param("csv_options", "mapping", "CSV reader options as a table, e.g. delim = \";\", decimal_separator = \",\"."),
    Param("threads", "count", "DuckDB worker threads (default: all cores).", minimum=1, maximum=1024, scope="setting"),
    Param("memory_limit", "text", "DuckDB memory limit, e.g. \"2GB\"; past it DuckDB spills to disk.", scope="setting"),
    Param("temp_directory", "text", "Folder for DuckDB's spill files.", scope="setting"),
    Param("engine", "choice", "Where the SQL runs: duckdb (default), or spark: Spark SQL over the Parquet files "
          "(pip install 'bigpanel[spark]'; only aggregates come back).", default="duckdb", choices=ENGINES),
    Param("spark_master", "text", "With engine spark: the Spark master URL, e.g. local[4] or spark://host:7077 "
          "(default: SPARK_MASTER, else spark.master in spark-defaults.conf, else local mode on every core).",
          scope="setting"),
)}


def source_scope(name: str) -> str:
    """Where a spec file may set source option ``name``: "model" or "source"."""
    return "model" if SOURCE_PARAMETERS[name].scope == "model" else "source"


def affects_result(name: str) -> bool:
    """False for an engine setting (threads, memory, spill folder): results do not change."""
    return SOURCE_PARAMETERS[name].scope != "setting"


def check_source(name: str, value: Any) -> Any:
    """The value of source option ``name`` normalised, or one InputError (kinds as in
    :data:`SOURCE_PARAMETERS`)."""
    p = SOURCE_PARAMETERS[name]
    if p.kind == "text":
        if not isinstance(value, str) or not value.strip():
            raise InputError(f"Option '{name}' must be non-empty text; got {echo(repr(value), 40)}. {p.help}")
        return value
    if p.kind == "columns":
        if not isinstance(value, (str, list)) or not all(isinstance(v, str) for v in (value if isinstance(value, list) else [value])):
            raise InputError(f"Option '{name}' must be text or a list of text; got {echo(repr(value), 40)}. {p.help}")
        return [v.strip() for v in (value.split(",") if isinstance(value, str) else value) if v.strip()]
    if p.kind == "mapping":
        if not isinstance(value, dict) or not all(isinstance(v, str) and v.strip() for v in value.values()):
            raise InputError(f"Option '{name}' must be a table of text values; got {echo(repr(value), 60)}. {p.help}")
        return {str(k): v.strip() for k, v in value.items()}
    if p.kind == "choice":
        if value not in p.choices:
            raise InputError(f"Option '{name}' must be one of {', '.join(p.choices)}; got {echo(repr(value), 40)}.")
        return value
    if p.kind == "count":
        if isinstance(value, bool) or not isinstance(value, int) or not p.minimum <= value <= p.maximum:
            raise InputError(f"Option '{name}' must be a whole number from {p.minimum} to {p.maximum}; "
                             f"got {echo(repr(value), 40)}.")
        return value
    raise AssertionError(p.kind)


def as_list(value: str | Sequence[str] | None) -> tuple[str, ...]:
    if value is None:
        return ()
    if isinstance(value, str):
        from .expressions import split_top_level  # imported here: --help needs no engine

        return tuple(split_top_level(value))
    return tuple(str(v).strip() for v in value if str(v).strip())


def check(name: str, value: Any) -> Any:
    """The value of parameter ``name`` normalised (lists as tuples), or one InputError."""
    p = PARAMETERS[name]
    if value is None:
        if p.required:
            raise InputError(f"Option '{name}' is missing. {p.empty or p.help}")
        return p.default if p.kind not in ("columns", "restrictions") else ()
    if p.kind == "folder":
        if not isinstance(value, (str, os.PathLike)) or not str(os.fspath(value)).strip():
            raise InputError(f"Option '{name}' must name a folder; got {echo(repr(value), 40)}. {p.empty}")
        return str(os.fspath(value))
    if p.kind in ("expression", "column"):
        if not isinstance(value, str) or not value.strip():
            raise InputError(f"Option '{name}' is empty. {p.empty or p.help}")
        return value.strip() if p.kind == "expression" else value
    if p.kind in ("terms", "columns"):
        if not isinstance(value, (str, list, tuple)):
            raise InputError(f"Option '{name}' must be text or a list of text; got {type(value).__name__}.")
        items = as_list(value)
        if p.kind == "terms" and not items:
            raise InputError(f"Option '{name}' is empty. {p.empty}")
        return items
    if p.kind == "restrictions":
        texts = [value] if isinstance(value, str) else value
        if not isinstance(texts, (list, tuple)) or not all(isinstance(t, str) for t in texts):
            raise InputError(f"Option '{name}' must be text or a list of text; got {type(value).__name__}.")
        if not all(t.strip() for t in texts):
            raise InputError(f"Option '{name}' is empty. {p.help}")
        return tuple(t.strip() for t in texts)
    if p.kind == "choice":
        if value not in p.choices:
            raise InputError(f"Option '{name}' must be one of {', '.join(p.choices)}; got '{echo(value)}'.")
        return value
    if p.kind == "flag":
        if value not in (True, False):
            raise InputError(f"Option '{name}' must be True or False; got {echo(repr(value), 40)}.")
        return bool(value)
    if p.kind == "count":
        whole = (isinstance(value, int) or type(value).__module__ == "numpy" and float(value).is_integer()
                 or isinstance(value, float) and value.is_integer())
        if isinstance(value, bool) or not whole:
            raise InputError(f"Option '{name}' must be a whole number, got {echo(repr(value), 40)}.")
        if not p.minimum <= int(value) <= (p.maximum or int(value)):
            top = f"2**53 ({p.maximum:,})" if p.maximum == 2**53 else f"{p.maximum:,}"
            raise InputError(f"Option '{name}' must be a whole number from {p.minimum} to {top}, "
                             f"got {echo(value, 40)}. {p.empty}")
        return int(value)
    if p.kind == "number":
        if isinstance(value, str):
            try:
                value = float(value)
            except ValueError:
                raise InputError(f"Option '{name}' must be a number, got {echo(repr(value), 40)}. {p.empty}") from None
        if isinstance(value, bool) or not isinstance(value, (int, float)) and type(value).__module__ != "numpy":
            raise InputError(f"Option '{name}' must be a number, got {echo(repr(value), 40)}. {p.empty}")
        low, high = p.bounds
        if not low <= float(value) <= high:
            raise InputError(f"Option '{name}' must be from {low:g} to {high:g}, got {echo(value, 40)}. {p.empty}")
        return float(value)
    raise AssertionError(p.kind)


def check_keys(keys, where: str) -> None:
    """Refuse keys that are not model parameters, suggesting close names."""
    for key in keys:
        if key not in PARAMETERS:
            raise InputError(unknown_key(key, MODEL_KEYS, where))


def unknown_key(key: str, known, where: str) -> str:
    """The message for a key that is not one of ``known``, with close matches."""
    import difflib

    close = difflib.get_close_matches(key, list(known), n=2, cutoff=0.6)
    hint = f" Did you mean {', '.join(repr(c) for c in close)}?" if close else ""
    return f"{where} has an unknown key '{echo(key, 60)}'.{hint} Known keys: {', '.join(known)}."
