"""Unit and period effects, exact on unbalanced panels, in one pass.

Period indicators inside the unit-demeaned model (Frisch-Waugh-Lovell; ESTIMATION.md):
D'Z = per-period sums of z minus, per presence pattern, the sums of unit means;
D'D = diag(n_t) - sum over patterns of (sum 1/n_i) c c'. Request: the ``unit+period``
fold (per-unit sums, presence patterns as bit strings, per-period sums; one scan).
"""

from __future__ import annotations

import numpy as np

from ..design import Design
from ..requests import CrossProducts
from .base import Equations, add_unit_rows, set_effects
from .within import Within


class UnitPeriod(Within):
    name = "within"
    expands = False
    shares = False

    def extend_design(self, executor, design: Design) -> Design:
        return design

    def absorption(self, eq: Equations) -> dict:
        return {"path": "exact", "method": "unit and period effects: per-unit sums and presence patterns, exact on "
                "unbalanced panels (Frisch-Waugh-Lovell; no iteration)"}

    def first_pass(self, design: Design, pilot: np.ndarray | None = None) -> CrossProducts:
        return CrossProducts(self.rows(design), "unit+period", "within")

    def equations(self, design: Design, request: CrossProducts, chunks: list[list[dict]], executor) -> Equations:
        q = design.q
        first, _ = executor.period_range()
        totals, patterns, periods = [], {}, {}
        for rows in chunks:
            for row in rows:
                if row["kind"] == "total":
                    totals.append(row)
                elif row["kind"] == "pattern":
                    vec = np.array([row["pattern_units"], row["inv_n"]] + [row[f"m{j}"] for j in range(q)], dtype=float)
                    patterns[row["pattern"]] = patterns.get(row["pattern"], 0) + vec
                else:
                    vec = np.array([row["period_n"]] + [row[f"s{j}"] for j in range(q)], dtype=float)
                    periods[row["period"]] = periods.get(row["period"], 0) + vec
        eq = add_unit_rows(totals, q, q)
        values = sorted(periods)
        index = {v: i for i, v in enumerate(values)}
        n_t = np.array([periods[v][0] for v in values])
        sums = np.array([periods[v][1:] for v in values]).reshape(len(values), q)
        presence = np.zeros((len(patterns), len(values)))
        weights, mean_sums = np.zeros(len(patterns)), np.zeros((len(patterns), q))
        for r, (bits, vec) in enumerate(patterns.items()):
            for offset in (i for i, b in enumerate(bits) if b == "1"):
                presence[r, index[first + offset]] = 1.0
            weights[r], mean_sums[r] = vec[1], vec[2:]
        dup = sum(int(vec[0]) for bits, vec in patterns.items() if abs(bits.count("1") * vec[1] - vec[0]) > 1e-9 * vec[0])
        if dup:
            executor.duplicates(reason="unit and period effects")
        dz = sums - presence.T @ mean_sums  # D'Z (periods x q)
        dd = np.diag(n_t) - presence.T @ (weights[:, None] * presence)  # D'D
        eff = list(range(1, len(values)))  # the first period is the base
        kx, e = q - 1, len(eff)
        full = np.zeros((kx + e + 1, kx + e + 1))
        w = eq.total
        full[:kx, :kx] = w[:kx, :kx]
        full[:kx, -1] = full[-1, :kx] = w[:kx, -1]
        full[-1, -1] = w[-1, -1]
        full[kx:kx + e, :kx] = dz[eff, :kx]
        full[:kx, kx:kx + e] = dz[eff, :kx].T
        full[kx:kx + e, kx:kx + e] = dd[np.ix_(eff, eff)]
        full[kx:kx + e, -1] = full[-1, kx:kx + e] = dz[eff, -1]
        eq.total = full
        eq.raw_diag = np.r_[eq.raw_diag[:kx], n_t[eff], eq.raw_diag[-1]]
        set_effects(eq, self.spec.period, values, values[1:], with_constant=False, shown=executor.period_value)
        return eq
