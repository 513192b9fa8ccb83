"""The model specification: what to estimate, checked once, frozen.

Terms are written as SQL scalar expressions over the source's columns, plus two forms
of our own:

- ``lag(EXPR)`` or ``lag(EXPR, K)``: EXPR in the same unit K periods earlier; missing
  (and the row dropped) when that period is absent, so gaps are respected.
- ``levels(COLUMN)`` or ``levels(COLUMN, 'BASE')``: one 0/1 indicator per level of a
  categorical column except the base level (default: the first level in sort order).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .errors import InputError, echo
from .expressions import Term, expression_sql, parse_terms, split_top_level

ESTIMATORS = ("pooled", "within", "first-difference")
VARIANCES = ("iid", "hc1", "cluster")
MAX_PERIOD_STEP = 2**53
"""Largest period step: a whole number a double holds exactly, and far enough below the
BIGINT limit (9.2e18) that period + step cannot overflow for any practical period value."""


def _as_list(value: str | list[str] | tuple[str, ...] | None) -> tuple[str, ...]:
    if value is None:
        return ()
    if isinstance(value, str):
        return tuple(split_top_level(value))
    return tuple(str(v).strip() for v in value if str(v).strip())


@dataclass(frozen=True)
class FitSpec:
    """A checked model specification (see :func:`bigpanel.fit` for the meaning of each field)."""

    outcome: str
    outcome_sql: str  # rendered from the outcome's checked parse tree
    terms: tuple[Term, ...]
    unit: str
    period: str
    estimator: str
    effects: tuple[str, ...]
    se: str
    cluster: tuple[str, ...]
    intercept: bool
    period_step: int = 1
    warnings: tuple[str, ...] = field(default=(), compare=False)

    @classmethod
    def build(
        cls,
        outcome: str,
        regressors: str | list[str] | tuple[str, ...],
        unit: str,
        period: str,
        estimator: str = "within",
        effects: str | list[str] | None = None,
        se: str | None = None,
        cluster: str | list[str] | None = None,
        intercept: bool | None = None,
        period_step: int = 1,
    ) -> "FitSpec":
        if estimator not in ESTIMATORS:
            raise InputError(f"Option 'estimator' must be one of {', '.join(ESTIMATORS)}; got '{echo(estimator)}'.")
        if not outcome or not str(outcome).strip():
            raise InputError("Option 'outcome' is empty. Name the outcome column or expression.")
        terms = parse_terms(regressors)
        if not terms:
            raise InputError("Option 'regressors' is empty. Give at least one term, separated by commas.")
        texts = [t.text for t in terms]
        if len(set(texts)) != len(texts):
            dup = next(t for t in texts if texts.count(t) > 1)
            raise InputError(f"Option 'regressors' lists '{echo(dup)}' twice. Give each term once.")
        outcome_sql = expression_sql(outcome, "Outcome")
        eff = _as_list(effects)
        if estimator == "within" and not eff:
            eff = (unit,)
        if estimator == "within" and unit not in eff:
            raise InputError(f"Option 'effects' must include the unit column '{echo(unit)}' for the within estimator (got {echo(', '.join(eff))}); "
                             f"write --effects {echo(unit)} or --effects {echo(unit)},{echo(period)}.")
        if estimator == "pooled" and unit in eff:
            raise InputError(f"Option 'effects' names the unit '{echo(unit)}' for the pooled estimator; that is the within estimator. Use --estimator within.")
        for e in eff:
            if e not in (unit, period):
                raise InputError(f"Option 'effects' names '{echo(e)}': effects on columns other than the unit '{echo(unit)}' and the period '{echo(period)}' are not supported yet.")
        if estimator == "first-difference" and unit in eff:
            raise InputError(f"Option 'effects' names the unit '{echo(unit)}' for first differences, which already remove it. Use --effects {echo(period)} for period intercepts.")
        if se is None:
            se = "iid" if estimator == "pooled" and not cluster else "cluster"
        if se not in VARIANCES:
            raise InputError(f"Option 'se' must be one of {', '.join(VARIANCES)}; got '{echo(se)}'.")
        clus = _as_list(cluster)
        if se == "cluster" and not clus:
            clus = (unit,)
        if se != "cluster" and clus:
            raise InputError(f"Option 'cluster' is given but 'se' is '{echo(se)}'. Use --se cluster, or drop --cluster.")
        if len(clus) > 2:
            raise InputError(f"Option 'cluster' names {len(clus)} columns; one- and two-way clustering are supported, so give one or two.")
        if len(set(clus)) != len(clus):
            raise InputError(f"Option 'cluster' names '{echo(clus[0])}' twice. Give two different columns for two-way clustering, or one.")
        if intercept is None:
            intercept = estimator != "within"
        if estimator == "within" and intercept:
            raise InputError("Option 'intercept' cannot be used with the within estimator: the unit effects already remove it.")
        whole = isinstance(period_step, (int, np.integer)) or (isinstance(period_step, float) and period_step.is_integer())
        if isinstance(period_step, bool) or not whole:
            raise InputError(f"Option 'period_step' must be a whole number, got {echo(repr(period_step), 40)}.")
        if not 1 <= int(period_step) <= MAX_PERIOD_STEP:
            raise InputError(f"Option 'period_step' must be a whole number from 1 to 2**53 ({MAX_PERIOD_STEP:,}), "
                             f"got {echo(period_step, 40)}. Give the distance between consecutive periods.")
        return cls(
            outcome=str(outcome).strip(), outcome_sql=outcome_sql, terms=terms, unit=unit, period=period, estimator=estimator,
            effects=eff, se=se, cluster=clus, intercept=bool(intercept), period_step=int(period_step),
        )

    @property
    def period_effects(self) -> bool:
        return self.period in self.effects

    @property
    def needs_order(self) -> bool:
        """True when rows must be ordered within units (differences or lags)."""
        return self.estimator == "first-difference" or any(t.kind == "lag" for t in self.terms)
