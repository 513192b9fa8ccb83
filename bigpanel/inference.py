"""From equations to the result: solve, variance from score moments, tests.

Common to every estimator: the solver drops dependent and (for estimators that remove
the unit effect) time-invariant columns by name; the variance is chosen from the
specification (homoskedastic, HC1, clusters of units, of whole units, cutting across units, two-way)
and its meat is requested from the executor when the first pass did not already give it.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
import scipy.special  # t and F tails; scipy.stats alone takes ~0.8 s to import

from . import moments, variance
from .errors import (
    DroppedRowsWarning, DroppedTermsWarning, EstimationError, FewClustersWarning, InputError, echo, shown,
)  # fmt: skip
from .estimators.base import Equations, Estimator
from .requests import Nesting, Rows, Scores
from .results import Coefficient, FitResult, VarianceSummary, run_record
from .solve import overflowing_columns, solve_normal, unscale

MAX_EXPANDED = 8  # largest model whose unit-cluster meat is summed in the first pass (k^4/4 sums)
EXPANSION_LIMIT = 1e6  # largest-term/result ratio above which the expanded meat is recomputed
NO_VARIATION = 1e-11  # transformed/raw sum of squares below which a column is constant
FEW_CLUSTERS = 40  # common practice: below ~40 clusters CR1 is unreliable


@dataclass
class Notes:
    """The one warning channel of a fit: (category, message) pairs, each once, warned by
    the public entry point at its caller and kept on the result."""

    items: list

    def add(self, category, message: str) -> None:
        if (category, message) not in self.items:
            self.items.append((category, message))

    @property
    def texts(self) -> tuple[str, ...]:
        """The notes kept on the result (not the dropped rows and terms, which have fields)."""
        return tuple(m for c, m in self.items if c not in (DroppedRowsWarning, DroppedTermsWarning))


def score_values(eq: Equations, sol, kx: int, constant: bool) -> dict:
    """Coefficients and (with period effects) the effects and the projections Gamma of
    the regressors on the kept effect columns (Frisch-Waugh-Lovell), as parameters."""
    p = {f"b{j}": float(sol.coef[j]) for j in range(kx)}
    if constant:
        p["b_one"] = float(sol.coef[kx])
    if eq.effect_rows is not None:
        e = eq.effect_rows.shape[1]
        kept = np.flatnonzero(sol.kept[kx:kx + e])
        dd = eq.total[kx:kx + e, kx:kx + e][np.ix_(kept, kept)]
        dx = eq.total[kx:kx + e, :kx][kept]
        projection = np.zeros((e, kx))
        if kept.size:
            projection[kept] = np.linalg.lstsq(dd, dx, rcond=None)[0]
        gamma = eq.effect_rows @ sol.coef[kx:kx + e]
        big_gamma = eq.effect_rows @ projection
        for i, value in enumerate(eq.effect_values):
            p[f"t{i}"] = value
            p[f"g{i}"] = float(gamma[i])
            p.update({f"G{i}_{j}": float(big_gamma[i, j]) for j in range(kx)})
    return p


def choose_variance(est: Estimator, executor, rows: Rows, params: dict, eq: Equations, sol, rss: float,
                    n_kept: int, absorbed: int, notes: Notes, period_levels: int = 0) -> variance.Variance:
    """The variance the specification asks for, with its meat from the first pass or a score pass.

    ``period_levels``: the kept period-effect columns among the ``n_kept`` (the rest are
    slope terms and the intercept). Cluster variances use one K' for every component
    (:func:`k_prime`)."""
    spec = est.spec
    n_obs = eq.n_obs
    if spec.variance == "homoskedastic":
        return variance.homoskedastic(sol.inverse, rss, n_obs, n_kept, absorbed)
    constant = est.constant_in_scores()
    kx = rows.q - 1
    k = kx + (1 if constant else 0)  # score columns: regressors [, constant]
    inverse = sol.inverse[:k, :k]  # with period effects: the regressor block (Frisch-Waugh-Lovell)
    values = score_values(eq, sol, kx, constant)

    def request(kind: str) -> Scores:
        return Scores(rows, kind, constant, est.absorbs_units, len(eq.effect_values), tuple(values.items()))

    dim = len(sol.coef)
    if spec.variance == "hc1":
        meats, _ = executor.meats(request("rows"), params, k, 0)
        return _embed(variance.hc1(inverse, meats[0], n_obs, n_kept, absorbed), dim)
    counted = est.levels_in_k_prime(executor, rows, eq)  # many effects: the estimator counts its own
    if counted is not None:
        kp = n_kept - period_levels + counted
    else:
        kp = k_prime(spec, lambda i: executor.nested(Nesting(rows, i), params), n_kept - period_levels, absorbed,
                     period_levels)
    if spec.cluster == (spec.unit,) and eq.expansion is not None:
        meat, worst = np.zeros((k, k)), 0.0
        for row in eq.expansion:
            part, ratio = moments.expanded_meat(row, k, eq.pilot, sol.coef)
            meat, worst = meat + part, max(worst, ratio)
        if worst < EXPANSION_LIMIT:
            return _embed(variance.cluster(inverse, meat, eq.n_units, n_obs, kp), dim)
        notes.add(None, "the one-pass cluster meat cancelled too many digits; scores were recomputed in a second pass")
    if len(spec.cluster) == 1:
        by_unit = spec.cluster[0] == spec.unit
        kind = "units" if by_unit else ("groups" if rows.effects or not executor.nested(Nesting(rows), params) else "nested")
        meats, counts = executor.meats(request(kind), params, k, 1)
        return _embed(variance.cluster(inverse, meats[0], counts[0], n_obs, kp), dim)
    meats, counts = executor.meats(request("groups"), params, k, 2)
    return _embed(variance.two_way(inverse, tuple(meats), tuple(counts), n_obs, (kp, kp, kp)), dim)


def k_prime(spec, nested_in_units, slopes: int, unit_levels: int, period_levels: int) -> int:
    """K' of the CR1 factor, one for every component of a multi-way variance
    (ESTIMATION.md): the slope terms (and intercept) plus the absorbed levels, leaving out
    (``absorbed_levels="not-nested"``) the effects nested in at least one cluster
    dimension: unit effects in a cluster of whole units (``nested_in_units(i)`` asks
    whether cluster column i is constant within units), period effects in a cluster on
    the period column. ``"all"`` counts every level (the dummy-variable convention)."""
    if spec.absorbed_levels == "all":
        return slopes + unit_levels + period_levels
    units_nested = unit_levels > 0 and any(c == spec.unit or nested_in_units(i) for i, c in enumerate(spec.cluster))
    periods_nested = spec.period in spec.cluster
    return slopes + (0 if units_nested else unit_levels) + (0 if periods_nested else period_levels)


def wald(var: variance.Variance, coef: np.ndarray, slopes: list[int]) -> tuple[float, float, str]:
    """The joint test that all slopes are zero: (F, p, "") or (nan, nan, why it is not
    available). A cluster-robust variance has rank at most G-1 (ESTIMATION.md), so with
    fewer clusters than slopes, or a singular slope variance, there is no Wald F."""
    nan = float("nan")
    if not slopes:
        return nan, nan, "no slope terms to test"
    m = len(slopes)
    if isinstance(var.n_clusters, (int, np.integer)) and var.n_clusters - 1 < m:  # one-way clusters
        g = int(var.n_clusters)
        return nan, nan, f"{g} clusters give a variance of rank at most {g - 1}, below the {m} slopes tested"
    # the Wald statistic does not change when columns are rescaled: take the scaled ones
    vs = var.vcov[np.ix_(slopes, slopes)]
    bs = coef[slopes]
    eig = np.linalg.eigvalsh(vs) if np.isfinite(vs).all() else np.array([nan])
    if not np.isfinite(eig).all() or eig[0] <= 1e-12 * max(eig[-1], 0.0) or eig[-1] <= 0:
        return nan, nan, "the variance of the slopes is singular"
    f_stat = float(bs @ np.linalg.solve(vs, bs) / m)
    if not (np.isfinite(f_stat) and f_stat >= 0):
        return nan, nan, "the variance of the slopes is too close to singular"
    return f_stat, float(scipy.special.fdtrc(m, var.df, f_stat)), ""


def _embed(var: variance.Variance, dim: int) -> variance.Variance:
    """Place a variance over the leading score columns into the full coefficient layout."""
    if var.vcov.shape[0] == dim:
        return var
    full = np.zeros((dim, dim))
    k = var.vcov.shape[0]
    full[:k, :k] = var.vcov
    return replace(var, vcov=full)


def _too_large(names: list[str], why: str) -> InputError:
    return InputError(f"Values of {', '.join(shown(n) for n in names)} are out of a double's reach for this fit ({why}). "
                      "Rescale the term or the outcome by a power of ten in the term or a query, and scale the estimate back.")


def finish(est: Estimator, executor, design, rows: Rows, shifts: np.ndarray, params: dict, eq: Equations,
           accumulation: str, notes: Notes) -> FitResult:
    """Solve the equations, estimate the variance and build the result."""
    spec = est.spec
    dim = eq.total.shape[0]
    k = dim - 1
    extra = eq.extra_labels or (["(intercept)"] if est.constant else [])
    labels = list(design.labels) + extra
    is_effect = list(design.is_effect) + (eq.extra_effect or [False] * len(extra))
    overflow = overflowing_columns(eq.total)
    if overflow:
        raise _too_large([(labels + [spec.outcome])[j] for j in overflow], "its sums of squares overflow")
    h, g, yy = eq.total[:k, :k], eq.total[:k, k], eq.total[k, k]
    terms_dropped: dict[str, str] = {}
    zero_var = np.zeros(k, dtype=bool)
    if est.checks_variation:
        raw = eq.raw_diag[:k]
        with np.errstate(divide="ignore", invalid="ignore"):
            zero_var = (np.diag(h) <= NO_VARIATION * np.maximum(raw, 1e-300)) | (np.diag(h) <= 0)
        if est.constant:
            zero_var[k - 1] = False
        for j in np.flatnonzero(zero_var):
            terms_dropped[labels[j]] = "no variation within units"
    sol = solve_normal(h, g, zero_variation=zero_var, first=np.array(is_effect[:k], dtype=bool))
    for j in np.flatnonzero(~sol.kept & ~zero_var):
        terms_dropped[labels[j]] = "collinear with the period effects" if sol.by_first[j] else "collinear with other terms"
    if terms_dropped:
        notes.add(DroppedTermsWarning, "Terms left out: " + ", ".join(f"{t} ({w})" for t, w in terms_dropped.items()))
    if not sol.kept.any():
        raise EstimationError("No term can be estimated: " + echo("; ".join(f"{t}: {w}" for t, w in terms_dropped.items()))
                              + ". Give terms that change within units and are not combinations of each other.")
    coef = sol.coef
    rss = max(float(yy - g @ coef), 0.0)
    tss = yy - eq.total[k - 1, k] ** 2 / eq.total[k - 1, k - 1] if est.constant else yy
    if (est.constant or est.checks_variation) and not tss > NO_VARIATION * max(float(eq.raw_diag[-1]), 1e-300):
        where = {"within": "within units", "first-difference": "between consecutive periods"}.get(est.name, "across rows")
        raise InputError(f"Outcome {shown(spec.outcome)} has no variation {where} in the rows used, so nothing "
                              "can be estimated; give an outcome that varies.")
    r2 = 1.0 - rss / tss if tss > 0 else float("nan")
    n_obs = eq.n_obs
    n_kept = int(sol.kept.sum())
    absorbed = est.absorbed(eq)
    period_levels = sum(1 for j in range(k) if sol.kept[j] and is_effect[j] and labels[j] != "(intercept)")
    var = choose_variance(est, executor, rows, params, eq, sol, rss, n_kept, absorbed, notes, period_levels)
    # columns were scaled by powers of two in SQL (solve.py); back to the user's units, with
    # the intercept moved back from the shifted columns:
    # y - c_y = b0' + sum b_j (x_j - c_j), so the intercept is b0' + c_y - c'b
    q = design.q
    col_scale = np.ones(k)
    col_scale[: q - 1] = [params[f"d{j}"] for j in range(q - 1)]
    y_scale = params[f"d{q - 1}"]
    if est.constant and not is_effect[k - 1]:
        c_all = est.intercept_shifts(shifts)
        c = np.r_[c_all[: k - 1], 0.0]
        estimate, std_error, overflow = unscale(coef, var.vcov, col_scale, y_scale, k - 1, c, c_all[-1])
    else:
        estimate, std_error, overflow = unscale(coef, var.vcov, col_scale, y_scale)
    overflow = [j for j in overflow if sol.kept[j] and not is_effect[j]]
    if overflow:
        raise _too_large([labels[j] for j in overflow], "its estimate or standard error is beyond a double's range")
    crit = float(scipy.special.stdtrit(var.df, 0.975)) if var.df > 0 else float("nan")
    coefs = []
    for j in range(k):
        if is_effect[j] or not sol.kept[j]:
            continue
        se = float(std_error[j])
        tval = estimate[j] / se if se > 0 else float("nan")
        p = 2 * float(scipy.special.stdtr(var.df, -abs(tval))) if var.df > 0 else float("nan")
        coefs.append(Coefficient(labels[j], float(estimate[j]), se, float(tval), float(p),
                                 float(estimate[j] - crit * se), float(estimate[j] + crit * se)))
    slopes = [j for j in range(k) if sol.kept[j] and not is_effect[j] and labels[j] != "(intercept)"]
    f_stat, f_p, f_missing = wald(var, coef, slopes)
    if var.n_clusters is not None:
        g_min = var.n_clusters if isinstance(var.n_clusters, int) else min(var.n_clusters)
        if g_min < FEW_CLUSTERS:
            notes.add(FewClustersWarning,
                      f"only {g_min} clusters: cluster-robust errors are unreliable with fewer than about {FEW_CLUSTERS}")
    if var.clipped_eigenvalues:
        notes.add(None, f"two-way variance was not positive semi-definite; {var.clipped_eigenvalues} negative eigenvalues set to zero")
    dropped = executor.dropped(rows, params, eq.n_obs, eq.n_units, eq.singleton_rows)
    lost = {k2: v for k2, v in dropped.items() if v and k2 != "first_period_of_unit"}
    if lost:
        notes.add(DroppedRowsWarning, "Rows left out: " + ", ".join(f"{v:,} {k2.replace('_', ' ')}" for k2, v in lost.items()))
    t_min, t_max = (eq.t_min, eq.t_max) if eq.t_min is not None else executor.period_bounds()
    t_min, t_max = executor.period_value(t_min), executor.period_value(t_max)
    n_periods = executor.n_periods()  # distinct periods, not the span
    for msg in executor.notes:
        notes.add(None, msg)
    # every column's estimate in the user's units (effects included, 0 when left out), for
    # the write-back of effects and residuals (bigpanel.writeback)
    executor.estimates = {"estimate": np.where(sol.kept, estimate, 0.0), "is_effect": is_effect[:k], "labels": labels[:k],
                          "kept": sol.kept, "effect_values": eq.effect_values, "effect_rows": eq.effect_rows,
                          "shifts": np.asarray(shifts, dtype=float), "scales": np.array([params[f"d{j}"] for j in range(q)]),
                          "absorption": eq.absorption}
    return FitResult(
        estimator=spec.estimator, outcome=spec.outcome, coefficients=tuple(coefs), n_obs=n_obs, n_units=eq.n_units,
        n_periods=n_periods, period_first=t_min, period_last=t_max, period_step=executor.step_text, effects=spec.effects,
        variance=VarianceSummary(var.kind, var.df, tuple(np.atleast_1d(var.small_sample_factor).tolist()),
                                 tuple(np.atleast_1d(var.n_clusters).tolist()) if var.n_clusters is not None else (),
                                 tuple(spec.cluster), var.clipped_eigenvalues,
                                 spec.absorbed_levels if var.k_prime is not None else "", var.k_prime),
        r_squared=float(r2), r_squared_kind=est.r2_kind, f_stat=f_stat, f_df=(float(len(slopes)), float(var.df)),
        f_p_value=f_p, f_unavailable=f_missing, rows_dropped=dropped, terms_dropped=terms_dropped, singletons_dropped=eq.singletons,
        absorbed=absorbed, condition_number=sol.condition, accumulation=accumulation, source=executor.label,
        absorption=est.absorption(eq),
        where=executor.engine.where, warnings=notes.texts,
        run=run_record(executor.engine.thread_count()) | getattr(executor.engine, "run_facts", dict)(),
    )
