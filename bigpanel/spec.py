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


def _instrument_terms(endogenous, instruments, terms: tuple[Term, ...]) -> tuple[tuple[Term, ...], tuple[Term, ...]]:
    """Checked endogenous terms and excluded instruments: both or neither, no term twice,
    none among the regressors, no ``levels()``; at least as many instruments as endogenous
    terms (else the model is not identified)."""
    params.check("endogenous", endogenous)
    params.check("instruments", instruments)
    if endogenous is None and instruments is None:
        return (), ()
    if endogenous is None or instruments is None:
        given, missing = ("endogenous", "instruments") if instruments is None else ("instruments", "endogenous")
        raise InputError(f"Option '{given}' is given without '{missing}'. Two-stage least squares needs both: "
                         "--endogenous \"T1, T2\" --instruments \"Z1, Z2\".")
    endog, instr = _terms(endogenous), _terms(instruments)
    regressors = {t.text for t in terms}
    seen: set[str] = set()
    for name, group in (("endogenous", endog), ("instruments", instr)):
        for t in group:
            if t.kind == "levels":
                raise InputError(f"Option '{name}' has the term '{echo(t.text)}'; levels() is not supported there yet. "
                                 "Write the indicators as expressions, e.g. CAST(region = 'north' AS DOUBLE).")
            if t.text in regressors:
                raise InputError(f"Option '{name}' repeats the regressor '{echo(t.text)}'. A regressor instruments "
                                 "itself; list each term in one option only.")
            if t.text in seen:
                raise InputError(f"Option '{name}' repeats '{echo(t.text)}', listed already as endogenous or instrument. "
                                 "List each term once.")
            seen.add(t.text)
    if len(instr) < len(endog):
        raise InputError(f"Option 'instruments' gives {len(instr)} excluded instrument{'s' if len(instr) != 1 else ''} for "
                         f"{len(endog)} endogenous terms, so the model is not identified (under-identified); give at "
                         "least as many instruments as endogenous terms.")
    return endog, instr


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
    weights: str | None = None  # column of analytic weights (bigpanel.weights)
    endogenous: tuple[Term, ...] = ()  # instrumented terms (bigpanel.instruments)
    instruments: tuple[Term, ...] = ()  # excluded instruments
    tests: tuple[str, ...] = ()  # joint Wald tests, each restrictions separated by commas (hypotheses.py)
    serial_test: bool = False  # the serial-correlation test of within and first-difference errors

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
        weights: str | None = None,
        endogenous: str | list[str] | None = None,
        instruments: str | list[str] | None = None,
        test: str | list[str] | None = None,
        serial_test: bool | None = None,
    ) -> "FitSpec":
        estimator = params.check("estimator", estimator)
        outcome = params.check("outcome", outcome)
        no_regressors = regressors is None or (isinstance(regressors, (str, list, tuple)) and not params.as_list(regressors))
        if not (no_regressors and endogenous):  # an instrumented model may have no other regressor
            params.check("regressors", regressors)
        unit, period = params.check("unit", unit), params.check("period", period)
        terms = _terms(regressors) if not no_regressors else ()
        if not terms and not endogenous:
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
        unit_means = estimator in ("between", "random-effects")
        if unit_means and eff:
            raise InputError(f"Option 'effects' is given for the {estimator} estimator, which models the unit effect itself. "
                             f"Leave out --effects; for period intercepts add the term levels({echo(period)}).")
        if variance is None:
            variance = "homoskedastic" if estimator in ("pooled", "between") and not cluster else "cluster"
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
        if unit_means and (variance == "hc1" and estimator == "random-effects" or clus not in ((), (unit,))):
            raise InputError(f"The {estimator} estimator takes variance homoskedastic or cluster by the unit '{echo(unit)}'"
                             f"{' (or hc1)' if estimator == 'between' else ''}; got {echo(variance)}"
                             f"{' by ' + echo(', '.join(clus)) if clus else ''}. Use --variance cluster without --cluster.")
        if unit_means and intercept is False:
            raise InputError(f"Option 'intercept' cannot be dropped for the {estimator} estimator: its unit effect has a mean, "
                             "which the intercept estimates. Leave out --no-intercept.")
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
        if write_residuals is not None and estimator not in ("within", "first-difference"):
            raise InputError(f"Option 'write_residuals' applies to within and first-difference fits, not {estimator} ones. "
                             "Use --estimator within or first-difference, or leave out --write-residuals.")
        weights = params.check("weights", weights)
        endog, instr = _instrument_terms(endogenous, instruments, terms)
        if weights is not None and (write_effects is not None or write_residuals is not None):
            raise InputError("Options 'write_effects' and 'write_residuals' do not take 'weights' yet (the effects written "
                             "would be unweighted means); fit without --weights to write them, or leave them out.")
        tests = params.check("test", test)
        from .hypotheses import check_syntax  # parsed here, matched to the terms once the design is known

        for text in tests:
            check_syntax(text)
        serial_test = bool(params.check("serial_test", serial_test))
        if serial_test and estimator not in ("within", "first-difference"):
            raise InputError(f"Option 'serial_test' applies to within and first-difference fits, not {estimator}. "
                             "Leave out --serial-test, or use --estimator within or first-difference.")
        if serial_test and any(e not in (unit, period) for e in eff):
            raise InputError(f"Option 'serial_test' takes effects on the unit and the period only; {echo(', '.join(eff))} "
                             "includes others, whose effects do not drop out of the differenced residuals. "
                             "Leave out --serial-test, or the other effects.")
        unweighted = "between and random-effects fits" if estimator in ("between", "random-effects") else (
            "the serial-correlation test" if serial_test else "")
        if unweighted and (weights is not None or endog):
            given = "'weights'" if not endog else "'endogenous' and 'instruments'"
            raise InputError(f"Options {given} are not available for {unweighted} yet; leave them out"
                             + (", or leave out --serial-test." if serial_test and estimator not in ("between", "random-effects")
                                else ", or use --estimator within, first-difference or pooled."))
        spec = cls(
            outcome=outcome, outcome_sql=outcome_sql, terms=terms, unit=unit, period=period, estimator=estimator,
            effects=eff, variance=variance, cluster=clus, intercept=bool(intercept), period_step=None if period_step is None else int(period_step),
            absorbed_levels=absorbed_levels, effects_tolerance=effects_tolerance, effects_iterations=effects_iterations,
            write_effects=write_effects, write_residuals=write_residuals, weights=weights, endogenous=endog,
            instruments=instr, tests=tests, serial_test=serial_test,
        )
        if spec.many_effects and (weights is not None or endog):
            given = "'weights'" if not endog else ("'endogenous' and 'instruments'" if weights is None
                                                    else "'weights', 'endogenous' and 'instruments'")
            raise InputError(f"Option 'effects' names effects beyond the unit and the period ({echo(', '.join(eff))}), "
                             f"which are removed by iteration, and that path does not take {given} yet; keep to unit and "
                             "period effects, or leave those options out.")
        return spec

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
    def all_terms(self) -> tuple[Term, ...]:
        """The regressors, then the endogenous terms and the excluded instruments."""
        return self.terms + self.endogenous + self.instruments

    @property
    def needs_order(self) -> bool:
        """True when rows must be ordered within units (differences or lags)."""
        return self.estimator == "first-difference" or any(t.kind == "lag" for t in self.all_terms)
