"""First differences: pooled least squares on differences of consecutive periods within
units (a difference across a gap is not formed, and counted). The differenced equation
keeps an intercept (a common trend in levels) unless told not to; period effects become
period intercepts. The algebra is the pooled estimator's; only the rows differ."""

from __future__ import annotations

import numpy as np

from .pooled import Pooled


class FirstDifference(Pooled):
    name = "first-difference"
    differenced = True
    checks_variation = True
    r2_kind = "differenced equation"

    def intercept_shifts(self, shifts: np.ndarray) -> np.ndarray:
        return np.zeros_like(shifts)  # shifts cancel in differences
