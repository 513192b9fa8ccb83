"""Random effects: generalized least squares with Swamy-Arora variance components.

Model: y_it = x_it'b + a + u_i + e_it, with the unit effect u_i unrelated to the
regressors (the assumption within does not need; the Hausman test below checks it).

One scan, the ``unit-size`` fold of between.py: per unit size n, the within part W_n,
the between part B_n = sum s_i s_i'/n_i and the sums, over (regressors, constant,
outcome). From them, with W = sum W_n and B = sum B_n (Baltagi, Econometric Analysis of
Panel Data, the Swamy-Arora estimator; for unbalanced panels the version with the trace
term, Baltagi and Chang 1994):

- sigma_e^2 = RSS of the within regression / (N - units - K_within);
- the between regression on the rows' unit means (weights n_i): its RSS from B, and
  sigma_u^2 = (RSS_between - (units - K_between) sigma_e^2) / (N - tr(B^-1 sum_n n B_n)),
  set to zero when negative (then random effects is pooled least squares; a note says so);
- per unit theta_i = 1 - sqrt(sigma_e^2 / (n_i sigma_u^2 + sigma_e^2)): the
  quasi-demeaned rows z - theta_i zbar_i have the cross-product W + sum_n c_n B_n with
  c_n = (1 - theta)^2 = sigma_e^2 / (n sigma_u^2 + sigma_e^2). No more scans.

Variance: homoskedastic sigma_e^2 (Z*'Z*)^-1 (the GLS variance), or clustered by unit from
the quasi-demeaned regression's unit scores (one more scan, ``unit_mean_scores.sql``, which
in the same pass gives the scores of the correlated random-effects regression).

Tests reported with every fit (hypotheses.py): the Hausman statistic against within on
the common time-varying terms, with homoskedastic variances (sigma_e^2 W^-1 against the
GLS variance, one sigma_e^2 for both); and the correlated random-effects regression (the
unit means of the time-varying terms added) with those means tested jointly under the
fit's variance: with a cluster variance that is the test to read.
"""

from __future__ import annotations

import numpy as np

from .. import hypotheses, variance
from ..design import Design
from ..errors import EstimationError
from ..solve import solve_normal
from .base import Equations
from .between import Between, unit_sizes

NO_VARIATION = 1e-11  # as inference.NO_VARIATION: within/raw sum of squares of a time-invariant term
CANCELLATION_LIMIT = 1e6  # as fit.CANCELLATION_LIMIT: raw/within sum of squares above which 6 digits are lost


class ErrorComponents(Between):
    name = "random-effects"
    r2_kind = "quasi-demeaned"

    def equations(self, design: Design, request, chunks: list[list[dict]], executor) -> Equations:
        u = unit_sizes(chunks, design.q)
        d = design.q + 1
        if not u.size.size:
            return Equations(np.zeros((d, d)), np.zeros(d), 0, 0)
        k = d - 1  # regressors and constant
        kx = k - 1
        w_all, b_all = u.within.sum(axis=0), u.between.sum(axis=0)
        n_obs, n_units = u.n_obs, u.n_units
        # the within regression (regressors only; terms constant within units are left out)
        wx = w_all[:kx, :kx]
        with np.errstate(divide="ignore", invalid="ignore"):
            still = (np.diag(wx) <= NO_VARIATION * np.maximum(u.raw[:kx], 1e-300)) | (np.diag(wx) <= 0)
        within = solve_normal(wx, w_all[:kx, k], zero_variation=still)
        with np.errstate(divide="ignore", invalid="ignore"):
            lost = np.where(~still, u.raw[:kx] / np.diag(wx), 1.0)
        if lost.size and np.nanmax(lost) > CANCELLATION_LIMIT:  # no demeaned retry: it would lose the between part
            executor.notes.append("the within part of the random-effects sums lost more than 6 digits to the terms' unit "
                                  "means (one pass); center the terms (subtract a typical value) for more accurate components")
        k_within = int(within.kept.sum())
        df_e = n_obs - n_units - k_within
        if df_e <= 0:
            raise EstimationError(f"Random effects needs units observed more than once: {n_obs:,} rows in {n_units:,} units "
                                  f"leave no degrees of freedom for the error variance within units.")
        sigma_e2 = max(float(w_all[k, k] - w_all[:kx, k] @ within.coef), 0.0) / df_e
        # the between regression on the rows' unit means, and the trace term
        between = solve_normal(b_all[:k, :k], b_all[:k, k])
        k_between = int(between.kept.sum())
        rss_b = max(float(b_all[k, k] - b_all[:k, k] @ between.coef), 0.0)
        weighted = np.einsum("g,gij->ij", u.size, u.between)[:k, :k]  # sum over units of s_i s_i'
        trace = float(np.trace(between.inverse @ weighted))
        if n_units - k_between <= 0 or n_obs - trace <= 0:
            raise EstimationError(f"Random effects needs more units than terms: {n_units:,} units for {k_between} "
                                  "coefficients of the between regression. Use fewer terms or more units.")
        sigma_u2 = (rss_b - (n_units - k_between) * sigma_e2) / (n_obs - trace)
        negative = sigma_u2 < 0
        sigma_u2 = max(sigma_u2, 0.0)
        keep = 1.0 / (1.0 + u.size * sigma_u2 / sigma_e2) if sigma_e2 > 0 else np.ones_like(u.size)  # (1 - theta)^2
        total = w_all + np.einsum("g,gij->ij", keep, u.between)
        theta = 1.0 - np.sqrt(keep)
        eq = Equations(total, np.diag(total).copy(), n_obs, n_units, t_min=u.t_min, t_max=u.t_max)
        eq.parts = {"sizes": u, "keep": keep, "within": within, "w": w_all, "sigma_e2": sigma_e2, "sigma_u2": sigma_u2,
                    "negative": negative}
        eq.parts["labels"] = list(design.labels)
        eq.components = {"sigma_u": None, "sigma_e": None,  # in the user's units: own_variance
                         "theta_min": float(theta.min()), "theta_max": float(theta.max()),
                         "unit_share": float(sigma_u2 / (sigma_u2 + sigma_e2)) if sigma_u2 + sigma_e2 > 0 else None,
                         "method": "Swamy-Arora"}
        return eq

    # ---- the correlated random-effects regression (unit means of the time-varying terms added)
    def _with_means(self, eq: Equations):
        """Its cross-product over (regressors, means of the time-varying ones, constant,
        outcome) from the unit-size sums, the mean columns' positions, and its solution."""
        p = eq.parts
        u, keep = p["sizes"], p["keep"]
        d = eq.total.shape[0]
        k = d - 1
        kx = k - 1
        varying = np.flatnonzero(p["within"].kept)
        bc = np.einsum("g,gij->ij", keep, u.between)  # sum c_n B_n over (x, 1, y)
        m = len(varying)
        order = list(range(kx)) + [kx + m, kx + m + 1]  # x, constant, outcome in the larger layout
        means = kx + np.arange(m)
        big = np.zeros((d + m, d + m))
        big[np.ix_(order, order)] = eq.total
        big[np.ix_(means, means)] = bc[np.ix_(varying, varying)]
        for j in range(d):  # a mean column meets x, the constant and the outcome as (1 - theta)^2 B does
            big[means, order[j]] = big[order[j], means] = bc[varying, j]
        sol = solve_normal(big[:-1, :-1], big[:-1, -1])
        return big, means, varying, sol

    def own_variance(self, executor, rows, params, eq, sol, rss, n_kept, notes):
        p = eq.parts
        y_scale = params[f"d{rows.q - 1}"]
        eq.components["sigma_u"] = float(np.sqrt(p["sigma_u2"])) / y_scale  # found on the scaled outcome
        eq.components["sigma_e"] = float(np.sqrt(p["sigma_e2"])) / y_scale
        if p["negative"]:
            notes.add(None, "the unit effect's variance came out negative (Swamy-Arora) and was set to zero: "
                            "random effects is then pooled least squares")
        sigma_e2 = p["sigma_e2"]
        k = len(sol.coef)
        big, means, varying, with_means = self._with_means(eq)
        p["means"] = (big, means, varying, with_means)
        if self.spec.variance == "homoskedastic":
            return variance.Variance(sigma_e2 * sol.inverse, "homoskedastic", float(eq.n_obs - n_kept), 1.0, None)
        kx = k - 1
        km = len(means)
        g_full = np.zeros(kx)
        g_full[varying] = with_means.coef[means]
        values = {f"b0_{j}": float(sol.coef[j]) for j in range(kx)} | {"a0": float(sol.coef[kx])}
        values |= {f"b1_{j}": float(with_means.coef[j]) for j in range(kx)} | {f"g1_{j}": float(g_full[j]) for j in range(kx)}
        values |= {"a1": float(with_means.coef[kx + km]), "re_e": sigma_e2, "re_u": p["sigma_u2"]}
        meats, groups = executor.unit_mean_meats(rows, ("random", "means"), values, params)
        at = list(range(kx)) + [kx + j for j in varying] + [2 * kx]  # the means set's columns in use
        p["means_meat"] = (meats[1][np.ix_(at, at)], groups)
        return variance.cluster(sol.inverse, meats[0], groups, eq.n_obs, n_kept)

    def extra_tests(self, executor, rows, params, eq, sol, var, notes) -> dict:
        p = eq.parts
        sigma_e2 = p["sigma_e2"]
        within = p["within"]
        kx = len(sol.coef) - 1
        common = [j for j in range(kx) if within.kept[j] and sol.kept[j]]
        hausman = hypotheses.hausman(within.coef[common], sigma_e2 * within.inverse[np.ix_(common, common)],
                                     sol.coef[common], var_re_homoskedastic(sigma_e2, sol)[np.ix_(common, common)])
        labels = p.get("labels", [])
        hausman["terms"] = [labels[j] for j in common] if labels else []
        big, means, varying, with_means = p["means"]
        if self.spec.variance == "homoskedastic":
            vm = sigma_e2 * with_means.inverse
            kind, n_clusters, df = "homoskedastic", None, float(eq.n_obs - int(with_means.kept.sum()))
        else:
            meat, groups = p["means_meat"]
            vm = variance.cluster(with_means.inverse, meat, groups, eq.n_obs, int(with_means.kept.sum()))
            kind, n_clusters, df = "cluster", groups, vm.df
            vm = vm.vcov
        unit_means = hypotheses.zero_block(with_means.coef, vm, means, with_means.kept, df, n_clusters)
        unit_means.update(variance=kind, terms=[labels[j] for j in varying] if labels else [])
        return {"hausman": hausman, "unit_means": unit_means}


def var_re_homoskedastic(sigma_e2: float, sol) -> np.ndarray:
    return sigma_e2 * sol.inverse
