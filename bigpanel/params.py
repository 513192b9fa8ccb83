"""The model parameters, declared once: name, kind, constraint, default and help.

``fit()``, ``fit_many()`` model dicts, the command line (and later spec files) read this
table; :func:`check` writes every parameter error, so a constraint lives in one place.
A CLI option is the kebab-case spelling of the name unless ``flag`` says otherwise:
renaming an option is one line here.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from .errors import InputError, echo

ESTIMATORS = ("pooled", "within", "first-difference")
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
    of terms, or one text split at top-level commas), ``column``, ``columns`` (a list, or
    comma-separated text), ``choice`` (one of ``choices``), ``flag`` (True/False/None) and
    ``count`` (a whole number of at least ``minimum``).
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
    Param("estimator", "choice", "pooled, within or first-difference.", default="within", choices=ESTIMATORS),
    Param("effects", "columns", "Fixed effects: within defaults to the unit (add the period with --effects UNIT,PERIOD); "
          "first-difference takes the period for period intercepts."),
    Param("variance", "choice", "Variance: homoskedastic, hc1 or cluster (default: cluster for within and first-difference, homoskedastic for "
          "pooled).", choices=VARIANCES),
    Param("cluster", "columns", "One or two cluster columns, comma-separated (default: the unit)."),
    Param("intercept", "flag", "Intercept of pooled and first-difference fits (kept by default; --no-intercept drops it).",
          flag="--no-intercept"),
    Param("absorbed_levels", "choice", "Absorbed effect levels counted in the cluster small-sample factor K' (one K' "
          "for every component of a two-way variance): not-nested (default; effects nested in a cluster dimension are "
          "left out) or all (every level, as a dummy-variable fit counts them).", default="not-nested",
          choices=LEVEL_COUNTS),
    Param("period_step", "count", "Distance between consecutive whole-number periods (default: the panel's detected "
          "step: the gcd of the gaps, or for dates a day, week, month, quarter or year).", minimum=1, maximum=2**53,
          empty="Give the distance between consecutive periods."),
)}

MODEL_KEYS = tuple(PARAMETERS)

# Where the SQL runs, for fit and fit_many (API keywords, CLI options, spec files' source
# tables); the values reach source.Engine, which checks them.
ENGINE_PARAMETERS: dict[str, Param] = {p.name: p for p in (
    Param("engine", "choice", "Where the SQL runs: duckdb (default), or spark: Spark SQL over the Parquet files "
          "(pip install 'bigpanel[spark]'; only aggregates come back).", default="duckdb", choices=ENGINES),
    Param("spark_master", "column", "With --engine spark: the Spark master URL, e.g. local[4] or spark://host:7077 "
          "(default: SPARK_MASTER, else spark.master in spark-defaults.conf, else local mode on every core)."),
)}


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
        return p.default if p.kind != "columns" else ()
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
    raise AssertionError(p.kind)


def check_keys(keys, where: str) -> None:
    """Refuse keys that are not model parameters, suggesting close names."""
    import difflib

    for key in keys:
        if key not in PARAMETERS:
            close = difflib.get_close_matches(key, MODEL_KEYS, n=2, cutoff=0.6)
            hint = f" Did you mean {', '.join(repr(c) for c in close)}?" if close else ""
            raise InputError(f"{where} has an unknown key '{key}'.{hint} Known keys: {', '.join(MODEL_KEYS)}.")
