"""Pooled least squares: one regression over all rows, with an intercept by default.

Requests: n, sums and products over the rows (``rows`` fold); with unit clusters, the
unit fold instead, whose per-unit sums also give the cluster meat in the same pass
(expansion around pilot coefficients, :mod:`bigpanel.moments`); with period effects, the
``period`` fold: indicator cross-products are per-period counts and sums.
"""

from __future__ import annotations

import numpy as np

from .. import moments
from ..design import Design
from ..requests import CrossProducts
from .base import Equations, Estimator, sample_sums, set_effects, unit_fold


class Pooled(Estimator):
    name = "pooled"
    r2_kind = "pooled"

    @property
    def expands(self) -> bool:
        return not self.spec.period_effects

    @property
    def shares(self) -> bool:
        return not self.spec.period_effects

    def constant_in_scores(self) -> bool:
        return self.constant and not self.spec.period_effects  # else the constant is an absorbed column

    def first_pass(self, design: Design, pilot: np.ndarray | None = None) -> CrossProducts:
        rows = self.rows(design)
        if self.spec.period_effects:
            return CrossProducts(rows, "period")
        if pilot is not None:
            return CrossProducts(rows, "unit", "constant" if self.constant else "plain", tuple(float(v) for v in pilot))
        return CrossProducts(rows, "rows")

    def equations(self, design: Design, request: CrossProducts, chunks: list[list[dict]], executor) -> Equations:
        q = design.q
        if request.fold == "unit":
            return unit_fold(request, chunks, q)
        if request.fold == "period":
            return self._period_fold(chunks, q, executor.period_value)
        rows = [c[0] for c in chunks]
        mat, raw, n = moments.pooled_matrix(rows, q, self.constant)
        lo = [r["t_min"] for r in rows if r["t_min"] is not None]
        hi = [r["t_max"] for r in rows if r["t_max"] is not None]
        n_units = sum(int(r["n_units"]) for r in rows)  # chunks hold disjoint units
        return Equations(mat, raw, n, n_units, t_min=min(lo) if lo else None, t_max=max(hi) if hi else None)

    def shared_equations(self, totals: dict, sample: int, columns: tuple[int, ...]) -> Equations:
        s, q = sample, len(columns)
        row = {"n": totals[f"n{s}"] or 0}
        row.update({f"s{a}": totals[f"tot_s{s}_{j}"] for a, j in enumerate(columns)})
        p = sample_sums(totals, s, columns, "p")
        row.update({f"p{a}_{b}": p[a, b] for a in range(q) for b in range(a, q)})
        mat, raw, n = moments.pooled_matrix([row], q, self.constant)
        return Equations(mat, raw, n, int(totals[f"units{s}"]), t_min=totals[f"tlo{s}"], t_max=totals[f"thi{s}"])

    def _period_fold(self, chunks: list[list[dict]], q: int, shown=None) -> Equations:
        """The whole matrix over (regressors, indicators but the first, [constant],
        outcome) from per-period counts and sums."""
        by_period: dict = {}
        units = 0  # chunks hold disjoint units, so their distinct counts add up
        for rows in chunks:
            for row in rows:
                if row["all_periods"]:
                    units += int(row["n_units"])
                    continue
                acc = by_period.setdefault(row["period"], {"n": 0, "nw": 0.0, "s": np.zeros(q), "p": np.zeros((q, q))})
                acc["n"] += int(row["n"])
                acc["nw"] += float(row["nw"] if "nw" in row else row["n"])  # weight total (weighted fits)
                acc["s"] += [row[f"s{j}"] for j in range(q)]
                acc["p"] += moments.symmetric(row, "p", q)
        if not by_period:
            return Equations(np.zeros((q, q)), np.zeros(q), 0, 0)
        values = sorted(by_period)
        constant = self.constant
        kx = q - 1
        effects = values[1:] if constant else values
        e = len(effects) + (1 if constant else 0)
        ys = kx + e  # layout: regressors, indicators, [constant], outcome
        full = np.zeros((ys + 1, ys + 1))
        z_index = list(range(kx)) + [ys]  # where the design columns (regressors, outcome) go
        for v in values:
            r = by_period[v]
            full[np.ix_(z_index, z_index)] += r["p"]
            cols = ([kx + effects.index(v)] if v in effects else []) + ([kx + e - 1] if constant else [])
            for c in cols:
                full[c, z_index] += r["s"]
                full[z_index, c] += r["s"]
                for c2 in cols:
                    full[c, c2] += r["nw"]
        n_obs = sum(by_period[v]["n"] for v in values)
        raw = np.r_[np.diag(full)[:kx + e], full[ys, ys]]
        eq = Equations(full, raw, n_obs, units, t_min=min(values), t_max=max(values))
        set_effects(eq, self.spec.period, values, effects, with_constant=constant, shown=shown)
        return eq
