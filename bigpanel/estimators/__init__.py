"""One small module per estimator; :func:`select` picks the one a specification needs."""

from __future__ import annotations

from ..design import integer_period
from ..spec import FitSpec
from .base import Equations, Estimator
from .first_difference import FirstDifference
from .pooled import Pooled
from .unit_period import UnitPeriod
from .within import Within

__all__ = ["Equations", "Estimator", "FirstDifference", "Pooled", "UnitPeriod", "Within", "select"]


def select(spec: FitSpec, engine) -> Estimator:
    """The estimator for ``spec`` (unit and period effects on whole-number periods take
    the exact two-way path; on other periods, indicator columns inside within)."""
    if spec.estimator == "within":
        if spec.period_effects and integer_period(engine, spec) and getattr(engine, "twoway_pass", True):
            return UnitPeriod(spec)
        return Within(spec)
    if spec.estimator == "first-difference":
        return FirstDifference(spec)
    return Pooled(spec)
