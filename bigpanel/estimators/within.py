"""Within (unit fixed effects): least squares on unit-demeaned columns.

Request: the unit fold, per-unit n_i, s_i, S_i summed as W = sum_i (S_i - s_i s_i'/n_i)
in SQL (one scan), with the unit-cluster meat expanded in the same pass for small models.
When the one-pass formula cancelled too many digits, the pass is redone on rows with unit
means subtracted in SQL. Period effects on periods that are not whole numbers become
indicator columns; on whole numbers the unit-and-period estimator takes over.
"""

from __future__ import annotations

import numpy as np

from ..design import Design, period_indicators
from ..requests import CrossProducts
from .base import Equations, Estimator, sample_sums, unit_fold


class Within(Estimator):
    name = "within"
    absorbs_units = True
    demeaned_retry = True
    checks_variation = True
    r2_kind = "within"
    expands = True

    @property
    def shares(self) -> bool:
        return not self.spec.period_effects

    def extend_design(self, executor, design: Design) -> Design:
        if self.spec.period_effects:
            return design.with_effects(period_indicators(executor, self.spec))
        return design

    def first_pass(self, design: Design, pilot: np.ndarray | None = None) -> CrossProducts:
        return CrossProducts(self.rows(design), "unit", "within", None if pilot is None else tuple(float(v) for v in pilot))

    def equations(self, design: Design, request: CrossProducts, chunks: list[list[dict]], executor) -> Equations:
        return unit_fold(request, chunks, design.q)

    def shared_equations(self, totals: dict, sample: int, columns: tuple[int, ...]) -> Equations:
        s = sample
        raw = np.diag(sample_sums(totals, s, columns, "p")).copy()
        return Equations(sample_sums(totals, s, columns, "w"), raw, int(totals[f"wn{s}"] or 0),
                         int(totals[f"wunits{s}"]), singletons=int(totals[f"single{s}"]),
                         singleton_rows=int(totals[f"single_rows{s}"] or 0), t_min=totals[f"wtlo{s}"],
                         t_max=totals[f"wthi{s}"])
