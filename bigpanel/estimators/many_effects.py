"""Many fixed effects: least squares on columns with every effect absorbed by iteration.

For a within fit whose effects go beyond the unit and the period (worker, firm and year;
``cell(firm, year)``; any number, each with any number of levels, unbalanced). Request:
the ``sweeps`` fold (:mod:`bigpanel.sweeps`): the sample is copied once to a private
scratch folder with compact integer level indices, singletons are dropped until none
remain, the effects are absorbed from every design column by conjugate-gradient sweeps to
the tolerance, and the transformed cross-product comes back as the one aggregate row.
Scores (HC1, one- and two-way clusters) are summed over the same transformed rows, so
:mod:`bigpanel.inference` works unchanged. Degrees of freedom: levels with rows minus
redundancies (exact or a stated bound, see :func:`bigpanel.sweeps.redundancies`).
"""

from __future__ import annotations

import numpy as np

from ..design import Design
from ..requests import CrossProducts, Rows
from .base import Equations
from .within import Within


class ManyEffects(Within):
    name = "within"
    demeaned_retry = False  # rows are absorbed one by one, no one-pass formula to lose digits
    expands = False
    shares = False  # the many-effects fold runs alone

    def extend_design(self, executor, design: Design) -> Design:
        return design  # the period, if listed, is absorbed like every other effect

    def rows(self, design: Design) -> Rows:
        return Rows(design.sql_columns, tuple(self.spec.cluster), effects=self.spec.effect_columns)

    def first_pass(self, design: Design, pilot: np.ndarray | None = None) -> CrossProducts:
        spec = self.spec
        return CrossProducts(self.rows(design), "sweeps", "within",
                             sweeps=(spec.effects_tolerance, spec.effects_iterations, spec.unit, spec.effects))

    def equations(self, design: Design, request: CrossProducts, chunks: list[list[dict]], executor) -> Equations:
        row = chunks[0][0]
        q = design.q
        total = np.zeros((q, q))
        for j in range(q):
            for m in range(j, q):
                total[j, m] = total[m, j] = row[f"w{j}_{m}"]
        found = row["absorption"]
        eq = Equations(total, np.array([row[f"r{j}"] for j in range(q)]), int(row["n_obs"]), int(row["n_units"]),
                       singletons=int(row["singletons"]), singleton_rows=int(row["singleton_rows"]))
        eq.absorption = found
        s = found.solution
        if not s.converged:
            executor.notes.append(
                f"the effects' absorption did NOT converge: after {s.iterations:,} sweeps the remaining level means are "
                f"{s.achieved:.2g}, above the tolerance {s.tolerance:.2g}; estimates and standard errors are unreliable. "
                "Raise --effects-iterations (or loosen --effects-tolerance knowingly)")
        return eq

    def absorbed(self, eq: Equations) -> int:
        return eq.absorption.absorbed

    def levels_in_k_prime(self, executor, rows: Rows, eq: Equations) -> int:
        """Absorbed levels counted in K' of the cluster factor: all of them, or (the
        default rule) those not nested in a cluster dimension."""
        if self.spec.absorbed_levels == "all":
            return eq.absorption.absorbed
        return eq.absorption.levels_not_nested(len(self.spec.cluster))

    def accumulation(self, eq: Equations) -> str:
        return "effects absorbed by iteration over a scratch copy (numpy sweeps over integer level indices)"

    def absorption(self, eq: Equations) -> dict:
        return eq.absorption.report()
