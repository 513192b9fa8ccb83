"""Two-stage least squares from the cross-products of the moment plan.

The design of an instrumented model holds, in this order, the regressors, the endogenous
terms, the excluded instruments (then absorbed period effects or the constant) and the
outcome; the estimator's first request sums the cross-product M over all of them, after
its row transform (levels, unit-demeaned, differenced; weighted when asked). From M alone:

- instruments Z: the regressors, the excluded instruments and the absorbed columns;
  regressors X: the regressors, the endogenous terms and the absorbed columns;
- first stage Pi = (Z'Z)^-1 Z'X; H = X'P_Z X = Pi' Z'Z Pi; b = H^-1 Pi' Z'y;
- residual u = y - X b (the structural one, not the second stage's), u'u = (-b, 1)' M (-b, 1).

The sandwich variances need the scores of X^ = Z Pi, that is Pi' z u: the usual score
pass at b (zero on the excluded instruments) gives the meat over all design columns, and
:func:`TwoStage.meat_map` turns it into Pi' meat Pi (with absorbed period effects, the
score pass already works on columns net of them, and the block of Pi over the other
columns is the same: Frisch-Waugh-Lovell). Homoskedastic: s^2 H^-1, s^2 = u'u/(N - K - absorbed).

Per endogenous term, the first stage (the term on all instruments) is a least-squares fit
on the same M; its variance comes from the same code as any fit's (``inference.choose_variance``
on the permuted layout, one more score pass for a robust variance), and the first-stage F
is the Wald statistic of its excluded instruments over their number.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from . import moments
from .errors import BigpanelWarning, EstimationError, echo
from .requests import Rows
from .solve import Solution, solve_normal

WEAK_F = 10.0  # common practice: a first-stage F under 10 marks weak instruments


class WeakInstrumentsWarning(BigpanelWarning):
    """A first-stage F of the excluded instruments under :data:`WEAK_F`."""


@dataclass(frozen=True)
class FirstStage:
    """The first stage of one endogenous term: the F statistic of the excluded
    instruments (jointly zero) under the fit's variance, or why there is none."""

    term: str
    f_stat: float
    df: tuple[float, float]
    p_value: float
    unavailable: str = ""


@dataclass
class TwoStage:
    """What the inference needs besides the solution: the first-stage coefficients over
    the score columns (``pi``: instruments by regressors) and the layout's roles."""

    pi: np.ndarray
    endogenous: list[int]
    excluded: list[int]
    instrument_kept: np.ndarray  # layout columns kept as instruments (first stage)
    dropped: dict  # layout index -> why an instrument or regressor was left out

    def meat_map(self, meat: np.ndarray) -> np.ndarray:
        """The meat of the instruments' scores (z u) turned into that of X^ u."""
        k = meat.shape[0]
        p = self.pi[:k, :k]
        return p.T @ meat @ p


def two_stage(total: np.ndarray, endogenous: list[int], excluded: list[int], zero_variation: np.ndarray,
              is_effect: np.ndarray, labels: list[str]) -> tuple[Solution, TwoStage]:
    """Solve the two-stage least-squares equations from the cross-product ``total``
    (layout: columns ..., outcome last). ``zero_variation`` marks columns the estimator
    found constant (left out), ``is_effect`` the absorbed columns (kept first)."""
    k = total.shape[0] - 1
    m, y = total[:k, :k], total[:k, k]
    usable = (np.diag(m) > 0) & ~zero_variation
    in_z = np.array([j not in endogenous for j in range(k)])
    in_x = np.array([j not in excluded for j in range(k)])
    dropped: dict[int, str] = {}
    # instruments: a maximal independent set, absorbed columns first
    zsol = solve_normal(m, np.zeros(k), zero_variation=~(usable & in_z), first=is_effect)
    z_kept = zsol.kept
    for j in np.flatnonzero(in_z & usable & ~z_kept):
        dropped[j] = ("collinear with the period effects" if zsol.by_first is not None and zsol.by_first[j]
                      else "collinear with other terms or instruments")
    zk = np.flatnonzero(z_kept)
    x_cand = np.flatnonzero(in_x & usable & (z_kept | ~in_z))  # an exogenous column left out of Z leaves X too
    zz = m[np.ix_(zk, zk)]
    pi_k = np.linalg.solve(zz, m[np.ix_(zk, x_cand)])
    h_c = pi_k.T @ zz @ pi_k
    g_c = pi_k.T @ y[zk]
    h = np.zeros((k, k))
    g = np.zeros(k)
    h[np.ix_(x_cand, x_cand)] = (h_c + h_c.T) / 2
    g[x_cand] = g_c
    not_x = np.ones(k, dtype=bool)
    not_x[x_cand] = False
    # effects and exogenous regressors first: when X^ is short of rank, an endogenous term is the one left out
    sol = solve_normal(h, g, zero_variation=not_x, first=is_effect | (in_z & in_x))
    n_endog = sum(1 for j in endogenous if usable[j])
    n_excl = sum(1 for j in excluded if z_kept[j])
    if n_excl < n_endog:
        raise EstimationError(f"Only {n_excl} of the excluded instruments ({', '.join(_quoted(labels[i]) for i in excluded)}) "
                              f"can be used (the others are collinear or constant), fewer than the {n_endog} endogenous "
                              "terms, so the model is under-identified; give more instruments that vary.")
    for j in endogenous:
        if not sol.kept[j]:
            why = "it has no variation left" if not usable[j] else "its first-stage fit is collinear with the other regressors"
            raise EstimationError(f"Endogenous term {_quoted(labels[j])} is not identified: {why}; the excluded instruments "
                                  f"({', '.join(_quoted(labels[i]) for i in excluded)}) must move it beyond what the "
                                  "regressors and effects explain. Give relevant instruments, or leave the term out.")
    pi = np.zeros((k, k))
    pi[np.ix_(zk, x_cand)] = pi_k
    for j in np.flatnonzero(~sol.kept & in_x & usable & ~is_effect):
        dropped.setdefault(j, "collinear with other terms")
    return sol, TwoStage(pi, list(endogenous), list(excluded), z_kept, dropped)


def _stage_sums(row: dict, k: int, outcome: int, cols: list) -> dict:
    """The expansion sums of a first stage (moments.expanded_meat with pilot 0: rr, rb, bb)
    from those of the fit: every one is a sum over units of products of two entries of the
    unit's transformed cross-product (bb), whose first-stage outcome ``outcome`` is one of
    the fit's columns. ``cols``: the fit's column behind each first-stage column (None:
    the fit's outcome, whose first-stage coefficient is 0 and whose meat row is not used)."""
    pos = {p: u for u, p in enumerate(moments.pairs(k))}

    def bb(a, b, c, d) -> float:
        if None in (a, b, c, d):
            return 0.0
        u, v = sorted((pos[(min(a, b), max(a, b))], pos[(min(c, d), max(c, d))]))
        return row[f"bb{u}_{v}"] or 0.0

    stage = moments.pairs(k)
    out = {f"rr{j}_{m}": bb(cols[j], outcome, cols[m], outcome) for j in range(k) for m in range(j, k)}
    out.update({f"rb{j}_{a}_{b}": bb(cols[j], outcome, cols[a], cols[b]) for j in range(k) for a, b in stage})
    out.update({f"bb{u}_{v}": bb(cols[a], cols[b], cols[c], cols[d]) for u, (a, b) in enumerate(stage)
                for v, (c, d) in enumerate(stage) if v >= u})
    return out


def _quoted(label: str) -> str:
    return f"'{echo(label, 60)}'"


def first_stages(choose_variance, wald, est, executor, design, rows: Rows, params: dict, eq, iv: TwoStage,
                 absorbed: int, notes, period_levels: int, is_effect: list[bool]) -> tuple[FirstStage, ...]:
    """The first stage of each endogenous term: least squares of the term on the kept
    instruments, over the same sample (the outcome stays among the columns, with a zero
    coefficient, so that its missing values leave the same rows out), with the fit's variance."""
    kx = design.q - 1
    k = eq.total.shape[0] - 1
    out = []
    for e in iv.endogenous:
        # layout: design regressors but e, the outcome (as a column), absorbed columns, e
        perm = [j for j in range(kx) if j != e] + [k] + list(range(kx, k)) + [e]
        design_perm = [j for j in range(kx) if j != e] + [kx, e]  # design columns (outcome at kx)
        total = eq.total[np.ix_(perm, perm)]
        stage_eq = replace(eq, total=total, raw_diag=eq.raw_diag[perm], expansion=None, pilot=None)
        if eq.expansion is not None:  # the unit-cluster meat of the first stage from the first pass's sums
            k_s = len(eq.pilot)
            cols = [j if j < k else None for j in perm[:k_s]]  # the outcome has no entries there (coefficient 0)
            stage_eq = replace(stage_eq, expansion=[_stage_sums(r, k_s, e, cols) for r in eq.expansion],
                               pilot=np.zeros(k_s))
        zero = np.array([not iv.instrument_kept[j] if j < k else True for j in perm[:-1]])
        first = np.array([j < k and is_effect[j] for j in perm[:-1]]) & ~zero
        sol = solve_normal(total[:k, :k], total[:k, k], zero_variation=zero, first=first)
        v = np.r_[-sol.coef, 1.0]
        rss = max(float(v @ total @ v), 0.0)
        stage_rows = replace(rows, columns=tuple(rows.columns[j] for j in design_perm))
        stage_params = {f"{p}{i}": params[f"{p}{j}"] for i, j in enumerate(design_perm) for p in ("s", "d")}
        var = choose_variance(est, executor, stage_rows, stage_params, stage_eq, sol, rss, int(sol.kept.sum()), absorbed,
                              notes, period_levels)
        tested = [perm.index(j) for j in iv.excluded if iv.instrument_kept[j]]
        f_stat, p_value, why = wald(var, sol.coef, tested)
        label = design.labels[e]
        out.append(FirstStage(label, f_stat, (float(len(tested)), float(var.df)), p_value, why))
        if np.isfinite(f_stat) and f_stat < WEAK_F:
            notes.add(WeakInstrumentsWarning, f"weak instruments for {label}: the first-stage F of the excluded instruments is "
                            f"{f_stat:.2f}, under {WEAK_F:g} (common practice); estimates and tests may be unreliable")
    return tuple(out)
