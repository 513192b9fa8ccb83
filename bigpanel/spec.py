"""The model specification: what to estimate, checked once, frozen.

Every parameter is checked by the one table in :mod:`bigpanel.params`. Terms are written
as SQL scalar expressions over the source's columns (each parsed once by DuckDB and run
as SQL rendered from the checked tree, :mod:`bigpanel.expressions`), plus two forms of our
own:

- ``lead(EXPR)`` or ``lead(EXPR, K)``: EXPR in the same unit K periods later (a lag of
  minus K, with the same rules);
- ``lag(EXPR)`` or ``lag(EXPR, K)``: EXPR in the same unit K periods earlier; missing
  (and the row dropped) when that period is absent, so gaps are respected.
- ``levels(COLUMN)`` or ``levels(COLUMN, 'BASE')``: one 0/1 indicator per level of a
  categorical column except the base level (default: the first level in sort order).

Effects are columns, or ``cell(A, B)`` for one effect per combination of levels; a within
fit with effects beyond the unit and the period absorbs them by iteration (``many_effects``).

A term or outcome that SQL cannot parse but that may be a column's own name (a keyword
such as ``union``, or ``Sales 2024``) is kept as that name, quoted; the design checks
that the source has such a column.
"""

from __future__ import annotations

from dataclasses import dataclass

from . import params, sqlbuild
from .errors import InputError, echo
from .expressions import Term, expression_sql, parse_effect, parse_term, parse_terms, split_top_level

_NOT_A_NAME = ("(", ")", "'", '"', "--", "/*", ";", ",")


def _maybe_name(text: str) -> bool:
    """Could ``text`` be a column's name that SQL does not parse (a keyword, spaces)?"""
    return bool(text.strip()) and not any(mark in text for mark in _NOT_A_NAME)


def _terms(regressors) -> tuple[Term, ...]:
    """Checked terms; when SQL cannot parse the list, a piece that fails alone and may be a
    column's name is kept as that name (never when the text holds a comment)."""
    try:
        return parse_terms(regressors)
    except InputError:
        texts = [regressors] if isinstance(regressors, str) else [str(v) for v in regressors]
        if any("--" in t or "/*" in t for t in texts):
            raise
        pieces = split_top_level(regressors) if isinstance(regressors, str) else [t.strip() for t in texts]
        if not any(_maybe_name(p) for p in pieces):
            raise
    return tuple(_term(p) for p in pieces if p)


def _term(text: str) -> Term:
    try:
        return parse_term(text)
    except InputError:
        if not _maybe_name(text):
            raise
        return Term(text=" ".join(text.split()), kind="expr", expr=sqlbuild.quote_ident(text.strip()))


def _effect_label(text: str) -> str:
    """An effect as the result names it: a column as written; ``cell(a, b)`` spelt evenly."""
    columns = parse_effect(text)
    return f"cell({', '.join(columns)})" if len(columns) > 1 else columns[0]


def _outcome_sql(text: str) -> str:
    try:
        return expression_sql(text, "Outcome")
    except InputError:
        if not _maybe_name(text):
            raise
        return sqlbuild.quote_ident(text.strip())


@dataclass(frozen=True)
class FitSpec:
    """A checked model specification (see :func:`bigpanel.fit` for the meaning of each field)."""

    outcome: str
    outcome_sql: str  # rendered from the outcome's checked parse tree (or its quoted name)
    terms: tuple[Term, ...]
    unit: str
    period: str
    estimator: str
    effects: tuple[str, ...]
    variance: str
    cluster: tuple[str, ...]
    intercept: bool
    period_step: int | None = None  # None: the panel's detected step
    absorbed_levels: str = "not-nested"
    effects_tolerance: float = 1e-10  # many effects: the iteration's tolerance (bigpanel.sweeps)
    effects_iterations: int = 1000
    write_effects: str | None = None  # folders the fit writes its effects / residuals into (bigpanel.writeback)
    write_residuals: str | None = None

    @classmethod
    def build(
        cls,
        outcome: str,
        regressors: str | list[str] | tuple[str, ...],
        unit: str,
        period: str,
        estimator: str = "within",
        effects: str | list[str] | None = None,
        variance: str | None = None,
        cluster: str | list[str] | None = None,
        intercept: bool | None = None,
        period_step: int | None = None,
        absorbed_levels: str | None = None,
        effects_tolerance: float | None = None,
        effects_iterations: int | None = None,
        write_effects: str | None = None,
        write_residuals: str | None = None,
    ) -> "FitSpec":
        estimator = params.check("estimator", estimator)
        outcome = params.check("outcome", outcome)
        params.check("regressors", regressors)
        unit, period = params.check("unit", unit), params.check("period", period)
        terms = _terms(regressors)
        if not terms:
            raise InputError("Option 'regressors' is empty. Give at least one term, separated by commas.")
        texts = [t.text for t in terms]
        if len(set(texts)) != len(texts):
            dup = next(t for t in texts if texts.count(t) > 1)
            raise InputError(f"Option 'regressors' lists '{echo(dup)}' twice. Give each term once.")
        outcome_sql = _outcome_sql(outcome)
        eff = params.check("effects", effects)
        if estimator == "within" and not eff:
            eff = (unit,)
        if estimator == "within" and unit not in eff:
            raise InputError(f"Option 'effects' must include the unit column '{echo(unit)}' for the within estimator (got {echo(', '.join(eff))}); "
                             f"write --effects {echo(unit)} or --effects {echo(unit)},{echo(period)}.")
        if estimator == "pooled" and unit in eff:
            raise InputError(f"Option 'effects' names the unit '{echo(unit)}' for the pooled estimator; that is the within estimator. Use --estimator within.")
        eff = tuple(_effect_label(e) for e in eff)
        if len(set(eff)) != len(eff):
            dup = next(e for e in eff if eff.count(e) > 1)
            raise InputError(f"Option 'effects' lists '{echo(dup)}' twice. Give each effect once.")
        for e in eff:
            if e not in (unit, period) and estimator != "within":
                raise InputError(f"Option 'effects' names '{echo(e)}': effects other than the unit '{echo(unit)}' and the "
                                 f"period '{echo(period)}' need the within estimator. Use --estimator within.")
        if estimator == "first-difference" and unit in eff:
            raise InputError(f"Option 'effects' names the unit '{echo(unit)}' for first differences, which already remove it. Use --effects {echo(period)} for period intercepts.")
        if variance is None:
            variance = "homoskedastic" if estimator == "pooled" and not cluster else "cluster"
        variance = params.check("variance", variance)
        clus = params.check("cluster", cluster)
        if variance == "cluster" and not clus:
            clus = (unit,)
        if variance != "cluster" and clus:
            raise InputError(f"Option 'cluster' is given but 'variance' is '{echo(variance)}'. "
                             "Use --variance cluster, or drop --cluster.")
        if len(clus) > 2:
            raise InputError(f"Option 'cluster' names {len(clus)} columns; one- and two-way clustering are supported, so give one or two.")
        if len(set(clus)) != len(clus):
            raise InputError(f"Option 'cluster' names '{echo(clus[0])}' twice. Give two different columns for two-way clustering, or one.")
        if intercept is None:
            intercept = estimator != "within"
        intercept = params.check("intercept", intercept)
        if estimator == "within" and intercept:
            raise InputError("Option 'intercept' cannot be used with the within estimator: the unit effects already remove it.")
        period_step = params.check("period_step", period_step)
        absorbed_levels = params.check("absorbed_levels", absorbed_levels)
        effects_tolerance = params.check("effects_tolerance", effects_tolerance)
        effects_iterations = params.check("effects_iterations", effects_iterations)
        write_effects = params.check("write_effects", write_effects)
        write_residuals = params.check("write_residuals", write_residuals)
        if write_effects is not None and estimator != "within":
            raise InputError(f"Option 'write_effects' needs the within estimator: {estimator} fits estimate no unit "
                             "effects to write. Use --estimator within, or leave out --write-effects.")
        if write_residuals is not None and estimator == "pooled":
            raise InputError("Option 'write_residuals' applies to within and first-difference fits, not pooled ones. "
                             "Use --estimator within or first-difference, or leave out --write-residuals.")
        return cls(
            outcome=outcome, outcome_sql=outcome_sql, terms=terms, unit=unit, period=period, estimator=estimator,
            effects=eff, variance=variance, cluster=clus, intercept=bool(intercept), period_step=None if period_step is None else int(period_step),
            absorbed_levels=absorbed_levels, effects_tolerance=effects_tolerance, effects_iterations=effects_iterations,
            write_effects=write_effects, write_residuals=write_residuals,
        )

    @property
    def effect_columns(self) -> tuple[tuple[str, ...], ...]:
        """Each effect's source columns (``cell(a, b)``: both)."""
        return tuple(parse_effect(e) for e in self.effects)

    @property
    def many_effects(self) -> bool:
        """Effects beyond the unit and the period: absorbed by iteration (bigpanel.sweeps)."""
        return self.estimator == "within" and any(e not in (self.unit, self.period) for e in self.effects)

    @property
    def period_effects(self) -> bool:
        return self.period in self.effects

    @property
    def needs_order(self) -> bool:
        """True when rows must be ordered within units (differences or lags)."""
        return self.estimator == "first-difference" or any(t.kind == "lag" for t in self.terms)
