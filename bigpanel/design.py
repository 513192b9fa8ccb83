"""The design: the model's columns as SQL expressions with their roles.

Built once per model from the checked specification and the source's schema (no rows
read, except one small ``SELECT DISTINCT`` per ``levels()`` term). A term equal to one of
the source's column names is that column, quoted, even when the name is a SQL keyword or
holds spaces or capitals (``union``, ``Sales 2024``); the label keeps the plain name.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

from . import sqlbuild
from .errors import InputError, echo, shown, unknown_column
from .spec import FitSpec

MAX_LEVELS = 500
ROLES = ("regressor", "lag", "indicator", "effect", "endogenous", "instrument", "outcome")


@dataclass(frozen=True)
class Column:
    """One design column: ``sql`` is a checked scalar expression over the source's
    columns, read ``lag`` periods earlier in the same unit; ``label`` is its name in the result."""

    sql: str
    role: str
    label: str
    lag: int = 0


@dataclass(frozen=True)
class Design:
    """Regressor columns (terms, indicators, effect indicators) and the outcome, last."""

    columns: tuple[Column, ...]
    notes: tuple[str, ...] = ()

    @property
    def regressors(self) -> tuple[Column, ...]:
        return self.columns[:-1]

    @property
    def labels(self) -> list[str]:
        return [c.label for c in self.regressors]

    @property
    def is_effect(self) -> list[bool]:
        return [c.role == "effect" for c in self.regressors]

    @property
    def endogenous(self) -> list[int]:
        """Positions of the instrumented terms (two-stage least squares)."""
        return [j for j, c in enumerate(self.regressors) if c.role == "endogenous"]

    @property
    def excluded(self) -> list[int]:
        """Positions of the excluded instruments."""
        return [j for j, c in enumerate(self.regressors) if c.role == "instrument"]

    @property
    def sql_columns(self) -> tuple[tuple[str, int], ...]:
        """(expression, lag) per column, outcome last: what the rows are built from."""
        return tuple((c.sql, c.lag) for c in self.columns)

    @property
    def q(self) -> int:
        return len(self.columns)

    def with_effects(self, effects: list[Column]) -> "Design":
        return Design(self.regressors + tuple(effects) + self.columns[-1:], self.notes)


_BASE_TEN_LOG = re.compile(r"(?<![\w.])log\s*\(", re.IGNORECASE)


def check_keys(engine, spec: FitSpec) -> None:
    """Unit, period and cluster columns exist; the filter is a predicate; lags and
    differences have whole-number periods."""
    engine.require_columns([spec.unit, spec.period, *spec.cluster, *(c for cols in spec.effect_columns for c in cols)])
    engine.check_filter()
    if spec.needs_order:
        from .panel import _period_kind

        ptype = engine.columns()[spec.period]
        if _period_kind(ptype) is None:
            raise InputError(
                f"Column '{spec.period}' in {engine.label} has type {ptype}; first differences and lags need "
                "whole-number, DATE or TIMESTAMP periods. Use a period index column (for example months since a start date)."
            )


def integer_period(engine, spec: FitSpec) -> bool:
    return engine.is_integer(engine.columns()[spec.period].upper())


def numeric_expression(engine, text: str, sql: str, what: str, notes: list[str]) -> str:
    """The SQL for a numeric term or outcome: a column named exactly ``text`` (or whose
    checked SQL ``sql`` is that column), quoted; else ``sql``, rendered from the checked
    parse tree of what the user wrote (``text``)."""
    cols = engine.columns()
    name = next((c for c in (text.strip(), sql.strip(), sql.strip().strip('"').replace('""', '"')) if c in cols), None)
    if name is not None:
        if not engine.is_numeric(cols[name]):
            advice = (f"Use levels({name}) for a categorical column, or convert it in an expression." if what == "Term"
                      else "Give a numeric outcome, or convert it in an expression.")
            if cols[name].upper() == "VARCHAR":
                advice += " If it holds numbers and tokens such as NA, read those as missing with --csv-null."
            raise InputError(f"Column '{echo(name)}' in {engine.label} has type {cols[name]}, not a number. {advice}")
        return sqlbuild.quote_ident(name, engine.dialect)
    if _BASE_TEN_LOG.search(sql):
        msg = f"{what} {shown(text)} uses log(), which in SQL is the base-10 logarithm; ln() is the natural one"
        if msg not in notes:
            notes.append(msg)
    sql = engine.expression(sql, what, text)  # the checked tree in the engine's dialect
    kind = engine.describe_expression(sql, what, text)
    if not engine.is_numeric(kind):
        raise InputError(f"{what} {shown(text)} has type {kind}, not a number. Give a numeric expression.")
    return sql


def distinct_levels(executor, quoted: str) -> list[str]:
    """The levels of a column (one pass over it, once per executor)."""
    values = executor.distinct(quoted, MAX_LEVELS + 1)
    if len(values) > MAX_LEVELS:
        raise InputError(f"Column '{quoted.strip(chr(34))}' has more than {MAX_LEVELS} levels. Give it as a fixed effect "
                         "(--effects UNIT,COLUMN takes any number of levels) or group it first.")
    return values


def build_design(executor, spec: FitSpec) -> Design:
    """The terms' columns (``levels()`` expanded) and the outcome."""
    engine = executor.engine
    check_keys(engine, spec)
    notes: list[str] = []
    columns: list[Column] = []
    cols = engine.columns()
    for term in spec.terms:
        if term.kind == "levels":
            if term.expr not in cols:
                raise unknown_column(term.expr, engine.label, cols)
            quoted = sqlbuild.quote_ident(term.expr, engine.dialect)
            levels = distinct_levels(executor, quoted)
            base = term.base if term.base is not None else (levels[0] if levels else None)
            if base not in levels:
                raise InputError(f"Term '{echo(term.text)}': base level '{echo(base)}' does not occur in column '{echo(term.expr)}'; "
                                 f"name one of its levels ({echo(', '.join(map(str, levels[:10])))}) as the base.")
            columns += [Column(sqlbuild.indicator_sql(quoted, level, engine.dialect), "indicator", f"{term.expr}={level}")
                        for level in levels if level != base]
        else:
            text = term.text if term.kind == "expr" else term.expr
            sql = numeric_expression(engine, text, term.expr, "Term", notes)
            columns.append(Column(sql, "lag" if term.lag else "regressor", term.text, term.lag))
    for role, group in (("endogenous", spec.endogenous), ("instrument", spec.instruments)):
        for term in group:  # after the regressors, before the outcome (bigpanel.instruments)
            text = term.text if term.kind == "expr" else term.expr
            columns.append(Column(numeric_expression(engine, text, term.expr, "Term", notes), role, term.text, term.lag))
    outcome = numeric_expression(engine, spec.outcome, spec.outcome_sql, "Outcome", notes)
    columns.append(Column(outcome, "outcome", spec.outcome))
    return Design(tuple(columns), tuple(notes))


def period_indicators(executor, spec: FitSpec) -> list[Column]:
    """Indicator columns for every period but the first (period effects as columns)."""
    dialect = executor.engine.dialect
    quoted = sqlbuild.quote_ident(spec.period, dialect)
    values = sorted(distinct_levels(executor, quoted), key=_period_key)[1:]
    return [Column(sqlbuild.indicator_sql(quoted, v, dialect), "effect", f"{spec.period}={v}") for v in values]


def _period_key(value: str):
    try:
        return (0, float(value), value)
    except ValueError:
        return (1, 0.0, value)
