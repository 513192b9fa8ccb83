"""One small module per estimator; :func:`select` picks the one a specification needs."""

from __future__ import annotations

from ..design import integer_period
from ..spec import FitSpec
from .many_effects import ManyEffects
from .base import Equations, Estimator
from .first_difference import FirstDifference
from .pooled import Pooled
from .unit_period import UnitPeriod
from .within import Within

__all__ = ["ManyEffects", "Equations", "Estimator", "FirstDifference", "Pooled", "UnitPeriod", "Within", "select"]


def select(spec: FitSpec, engine) -> Estimator:
    """The estimator for ``spec`` (unit and period effects on whole-number periods take
    the exact two-way path; on other periods, indicator columns inside within; any other
    effect makes every effect absorbed by iteration)."""
    refuse = getattr(engine, "refuse_model", None)  # what an engine cannot run yet (bigpanel.pg)
    if refuse is not None:
        refuse(spec)
    if spec.estimator == "within":
        if spec.many_effects:  # effects beyond the unit and the period: absorbed by iteration
            return ManyEffects(spec)
        if spec.period_effects and integer_period(engine, spec) and getattr(engine, "twoway_pass", True):
            return UnitPeriod(spec)
        return Within(spec)
    if spec.estimator == "first-difference":
        return FirstDifference(spec)
    return Pooled(spec)
