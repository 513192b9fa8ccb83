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
    the exact two-way path; on other periods, and in weighted fits, whose presence
    patterns would need each unit's weights, indicator columns inside within; any other
    effect makes every effect absorbed by iteration)."""
    if spec.estimator == "within":
        if spec.many_effects:  # effects beyond the unit and the period: absorbed by iteration
            return ManyEffects(spec)
        if spec.period_effects and not spec.weights and integer_period(engine, spec):
            return UnitPeriod(spec)
        return Within(spec)
    if spec.estimator == "first-difference":
        return FirstDifference(spec)
    return Pooled(spec)
