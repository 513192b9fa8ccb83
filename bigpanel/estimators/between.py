"""Between: least squares on unit means, one observation per unit, with an intercept.

Request: the ``unit-size`` fold (``unit_size_pass.sql``, one scan): per unit n_i, s_i and
S_i, then summed over the units of each size n: the within part sum (S_i - s_i s_i'/n_i),
the between part sum s_i s_i'/n_i and the sums s_i. The means' cross-product is
sum_n B_n / n (B_n: the between part of size n), with the constant column's entries from
the counts and sums. The same sums serve random effects (random_effects.py), whose
weights depend on a unit's size only.

Variance: homoskedastic over units (N = units, K = terms and intercept); hc1 and cluster
by unit both take each unit's score (unit means times the mean residual) from one more
scan (``unit_mean_scores.sql``); with one observation per unit they differ only in the
factor (N/(N-K) against G/(G-1) (N-1)/(N-K), N = G).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .. import moments, variance
from ..design import Design
from ..requests import CrossProducts
from .base import Equations, Estimator


@dataclass
class UnitSizes:
    """The ``unit-size`` fold added over chunks, over (regressors, constant, outcome)."""

    size: np.ndarray  # (G,) rows per unit
    units: np.ndarray  # (G,) units of that size
    within: np.ndarray  # (G, d, d) sum of S_i - s_i s_i'/n_i (the constant's entries are zero)
    between: np.ndarray  # (G, d, d) sum of s_i s_i'/n_i, constant included (its s_i is n_i)
    raw: np.ndarray  # (d,) raw sums of squares (the constant's: the row count)
    t_min: object
    t_max: object

    @property
    def n_obs(self) -> int:
        return int(np.sum(self.size * self.units))

    @property
    def n_units(self) -> int:
        return int(np.sum(self.units))


def unit_sizes(chunks: list[list[dict]], q: int) -> UnitSizes:
    """Add the chunks' rows (one per unit size, in chunk order) and insert the constant
    column before the outcome."""
    k = q - 1
    d = q + 1
    at = list(range(k)) + [k + 1]  # where each design column goes; the constant is at k
    groups: dict[int, list] = {}
    lo, hi = [], []
    for rows in chunks:
        for r in rows:
            n = int(r["n"])
            w, b = moments.symmetric(r, "w", q), moments.symmetric(r, "b", q)
            s = np.array([r[f"m{j}"] or 0.0 for j in range(q)])
            raw = np.array([r[f"r{j}"] or 0.0 for j in range(q)])
            acc = groups.setdefault(n, [0, np.zeros((q, q)), np.zeros((q, q)), np.zeros(q), np.zeros(q)])
            acc[0] += int(r["n_units"])
            acc[1] += w
            acc[2] += b
            acc[3] += s
            acc[4] += raw
            if r["t_min"] is not None:
                lo.append(r["t_min"])
                hi.append(r["t_max"])
    sizes = sorted(groups)
    g = len(sizes)
    within, between = np.zeros((g, d, d)), np.zeros((g, d, d))
    raw = np.zeros(d)
    for i, n in enumerate(sizes):
        units, w, b, s, r = groups[n]
        within[i][np.ix_(at, at)] = w
        between[i][np.ix_(at, at)] = b
        between[i][k, at] = between[i][at, k] = s
        between[i][k, k] = n * units
        raw[at] += r
        raw[k] += n * units
    return UnitSizes(np.array(sizes, dtype=float), np.array([groups[n][0] for n in sizes], dtype=float), within,
                     between, raw, min(lo) if lo else None, max(hi) if hi else None)


class Between(Estimator):
    name = "between"
    r2_kind = "between, unit means"

    def first_pass(self, design: Design, pilot: np.ndarray | None = None) -> CrossProducts:
        return CrossProducts(self.rows(design), "unit-size")

    def equations(self, design: Design, request: CrossProducts, chunks: list[list[dict]], executor) -> Equations:
        u = unit_sizes(chunks, design.q)
        if not u.size.size:
            return Equations(np.zeros((design.q + 1,) * 2), np.zeros(design.q + 1), 0, 0)
        means = np.einsum("g,gij->ij", 1.0 / u.size, u.between)  # sum over units of (zbar_i zbar_i')
        return Equations(means, np.diag(means).copy(), u.n_obs, u.n_units, t_min=u.t_min, t_max=u.t_max,
                         parts={"sizes": u})

    def own_variance(self, executor, rows, params, eq, sol, rss, n_kept, notes):
        units = eq.n_units
        if self.spec.variance == "homoskedastic":
            return variance.homoskedastic(sol.inverse, rss, units, n_kept, 0)
        k = len(sol.coef)
        values = {f"b0_{j}": float(sol.coef[j]) for j in range(k - 1)} | {"a0": float(sol.coef[k - 1]),
                                                                       "re_e": 1.0, "re_u": 0.0}
        meats, groups = executor.unit_mean_meats(rows, ("between",), values, params)
        if self.spec.variance == "hc1":
            return variance.hc1(sol.inverse, meats[0], units, n_kept, 0)
        return variance.cluster(sol.inverse, meats[0], groups, units, n_kept)
