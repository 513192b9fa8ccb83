"""One small module per estimator; :func:`select` picks the one a specification needs."""

from __future__ import annotations

from ..design import integer_period
from ..spec import FitSpec
from .many_effects import ManyEffects
from .base import Equations, Estimator
from .between import Between
from .first_difference import FirstDifference
from .pooled import Pooled
from .random_effects import ErrorComponents
from .unit_period import UnitPeriod
from .within import Within

__all__ = ["Between", "Equations", "ErrorComponents", "Estimator", "FirstDifference", "ManyEffects", "Pooled", "UnitPeriod",
           "Within", "select"]


def select(spec: FitSpec, engine) -> Estimator:
    """The estimator for ``spec`` (unit and period effects on whole-number periods take
    the exact two-way path; on other periods, and in weighted fits, whose presence
    patterns would need each unit's weights, indicator columns inside within; any other
    effect makes every effect absorbed by iteration)."""
    if spec.estimator == "within":
        if spec.many_effects:  # effects beyond the unit and the period: absorbed by iteration
            return ManyEffects(spec)
        if spec.period_effects and not spec.weights and integer_period(engine, spec) and getattr(engine, "twoway_pass", True):
            return UnitPeriod(spec)
        return Within(spec)
    if spec.estimator == "first-difference":
        return FirstDifference(spec)
    if spec.estimator == "between":
        return Between(spec)
    if spec.estimator == "random-effects":
        return ErrorComponents(spec)
    return Pooled(spec)
