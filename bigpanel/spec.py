"""The model specification: what to estimate, checked once, frozen.

Terms are written as SQL scalar expressions over the source's columns, plus two forms
of our own:

- ``lag(EXPR)`` or ``lag(EXPR, K)``: EXPR in the same unit K periods earlier; missing
  (and the row dropped) when that period is absent, so gaps are respected.
- ``levels(COLUMN)`` or ``levels(COLUMN, 'BASE')``: one 0/1 indicator per level of a
  categorical column except the base level (default: the first level in sort order).
"""

from __future__ import annotations

import re
from dataclasses import dataclass

from . import params
from .errors import InputError
from .params import split_top_level

_LAG = re.compile(r"^lag\s*\((.*)\)$", re.IGNORECASE | re.DOTALL)
_LEVELS = re.compile(r"^levels\s*\((.*)\)$", re.IGNORECASE | re.DOTALL)


@dataclass(frozen=True)
class Term:
    """One regressor as the user wrote it, and how to compute it.

    ``kind`` is ``expr`` (a SQL expression), ``lag`` (``expr`` K periods earlier) or
    ``levels`` (indicators for the categorical column ``expr`` against ``base``).
    """

    text: str
    kind: str
    expr: str
    lag: int = 0
    base: str | None = None


def parse_term(text: str) -> Term:
    text = text.strip()
    m = _LAG.match(text)
    if m:
        args = split_top_level(m.group(1))
        if len(args) not in (1, 2):
            raise InputError(f"Term '{text}' is not understood: write lag(EXPR) or lag(EXPR, K).")
        k = 1
        if len(args) == 2:
            if not args[1].isdigit() or int(args[1]) < 1:
                raise InputError(f"Term '{text}' has lag order '{args[1]}'. Give a whole number of periods, 1 or more.")
            k = int(args[1])
        return Term(text=text, kind="lag", expr=args[0], lag=k)
    m = _LEVELS.match(text)
    if m:
        args = split_top_level(m.group(1))
        if len(args) not in (1, 2):
            raise InputError(f"Term '{text}' is not understood: write levels(COLUMN) or levels(COLUMN, 'BASE').")
        base = None
        if len(args) == 2:
            raw = args[1]
            if not (len(raw) >= 2 and raw[0] == raw[-1] == "'"):
                raise InputError(f"Term '{text}': the base level must be a quoted value, like levels(kind, 'hub').")
            base = raw[1:-1].replace("''", "'")
        return Term(text=text, kind="levels", expr=args[0].strip('"'), base=base)
    return Term(text=text, kind="expr", expr=text)


@dataclass(frozen=True)
class FitSpec:
    """A checked model specification (see :func:`bigpanel.fit` for the meaning of each field)."""

    outcome: str
    terms: tuple[Term, ...]
    unit: str
    period: str
    estimator: str
    effects: tuple[str, ...]
    se: str
    cluster: tuple[str, ...]
    intercept: bool
    period_step: int = 1

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
        outcome = params.check("outcome", outcome)
        texts = params.check("regressors", regressors)
        unit, period = params.check("unit", unit), params.check("period", period)
        estimator = params.check("estimator", estimator)
        if len(set(texts)) != len(texts):
            dup = next(t for t in texts if texts.count(t) > 1)
            raise InputError(f"Option 'regressors' lists '{dup}' twice. Give each term once.")
        terms = tuple(parse_term(t) for t in texts)
        eff = params.check("effects", effects)
        if estimator == "within" and not eff:
            eff = (unit,)
        if estimator == "within" and unit not in eff:
            raise InputError(f"Option 'effects' must include the unit column '{unit}' for the within estimator (got {', '.join(eff)}).")
        if estimator == "pooled" and unit in eff:
            raise InputError(f"Option 'effects' names the unit '{unit}' for the pooled estimator; that is the within estimator. Use --estimator within.")
        for e in eff:
            if e not in (unit, period):
                raise InputError(f"Option 'effects' names '{e}': effects on columns other than the unit '{unit}' and the period '{period}' are not supported yet.")
        if estimator == "first-difference" and unit in eff:
            raise InputError(f"Option 'effects' names the unit '{unit}' for first differences, which already remove it. Use --effects {period} for period intercepts.")
        if se is None:
            se = "iid" if estimator == "pooled" and not cluster else "cluster"
        se = params.check("se", se)
        clus = params.check("cluster", cluster)
        if se == "cluster" and not clus:
            clus = (unit,)
        if se != "cluster" and clus:
            raise InputError(f"Option 'cluster' is given but 'se' is '{se}'. Use --se cluster, or drop --cluster.")
        if len(clus) > 2:
            raise InputError(f"Option 'cluster' names {len(clus)} columns; one- and two-way clustering are supported.")
        if intercept is None:
            intercept = estimator != "within"
        intercept = params.check("intercept", intercept)
        if estimator == "within" and intercept:
            raise InputError("Option 'intercept' cannot be used with the within estimator: the unit effects already remove it.")
        period_step = params.check("period_step", period_step)
        return cls(
            outcome=str(outcome).strip(), terms=terms, unit=unit, period=period, estimator=estimator,
            effects=eff, se=se, cluster=clus, intercept=bool(intercept), period_step=int(period_step),
        )

    @property
    def period_effects(self) -> bool:
        return self.period in self.effects

    @property
    def needs_order(self) -> bool:
        """True when rows must be ordered within units (differences or lags)."""
        return self.estimator == "first-difference" or any(t.kind == "lag" for t in self.terms)
