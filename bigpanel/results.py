"""The frozen result of a fit and its renderings (dict/JSON, polars, terminal table)."""

from __future__ import annotations

import json
import math
from dataclasses import asdict, dataclass, field

from .convert import json_ready

CAUTIONS = (
    "Causal reading assumes strict exogeneity: the time-varying error is unrelated to the regressors in every period.",
    "The unit effect removed by within or first differences must be constant over time.",
    "Each regressor needs enough variation within units; terms without it cannot be estimated.",
    "Cluster-robust errors assume independence across clusters and enough clusters (about 40 or more).",
)


CAUTION_SHORT = (
    "strict exogeneity of the time-varying error",
    "a unit effect constant over time",
    "enough variation within units",
    "independent clusters",
)


@dataclass(frozen=True)
class Coefficient:
    term: str
    estimate: float
    std_error: float
    t_stat: float
    p_value: float
    ci_lower: float
    ci_upper: float


@dataclass(frozen=True)
class VarianceSummary:
    """The variance used, with fields of one shape whatever the flags: one small-sample
    factor per component (two-way clustering: A, B, A-and-B) and one cluster count per
    component (empty without clusters)."""

    type: str
    df: float
    small_sample_factors: tuple[float, ...]
    n_clusters: tuple[int, ...]
    cluster_columns: tuple[str, ...]
    clipped_eigenvalues: int = 0
    absorbed_levels: str = ""  # K' rule of the cluster factor: "not-nested" or "all" (empty without clusters)
    k_prime: int | None = None  # K' of the cluster factor, one for every component

    @property
    def factor_rule(self) -> str:
        """The cluster small-sample factor's rule in words (empty without clusters)."""
        return LEVEL_RULES.get(self.absorbed_levels, "")


# The K' rules of the cluster small-sample factor G/(G-1) (N-1)/(N-K'), by parameter value.
LEVEL_RULES = {
    "not-nested": "K' = slopes + absorbed levels not nested in a cluster dimension, one K' for every component",
    "all": "K' = slopes + every absorbed level (dummy-variable convention), one K' for every component",
}
LEVEL_SHORT = {"not-nested": "effects nested in clusters left out", "all": "every absorbed level"}


@dataclass(frozen=True)
class FitResult:
    """Everything a fit produced. Convert with :meth:`to_dict`, :meth:`to_json`,
    :meth:`to_polars`; print with :meth:`table`."""

    estimator: str
    outcome: str
    coefficients: tuple[Coefficient, ...]
    n_obs: int
    n_units: int
    n_periods: int | None
    period_first: object
    period_last: object
    period_step: str  # the step between consecutive periods and where it came from: "10 (detected)", "3 (given)"
    effects: tuple[str, ...]
    variance: VarianceSummary
    r_squared: float
    r_squared_kind: str
    f_stat: float
    f_df: tuple[float, float]
    f_p_value: float
    rows_dropped: dict
    terms_dropped: dict
    singletons_dropped: int
    absorbed: int
    condition_number: float
    accumulation: str
    source: str
    where: str | None
    warnings: tuple[str, ...] = field(default=())
    f_unavailable: str = ""  # why there is no joint test (f_stat and f_p_value are then NaN)
    run: dict = field(default_factory=dict)  # how it ran: {"threads": N, "version": "x.y.z"}

    def to_dict(self) -> dict:
        out = json_ready(self)
        out["variance"]["factor_rule"] = self.variance.factor_rule
        out["cautions"] = list(CAUTIONS)
        return out

    def to_json(self, indent: int | None = 2) -> str:
        return json.dumps(self.to_dict(), indent=indent)

    def to_polars(self):
        """One row per coefficient."""
        import polars as pl

        return pl.DataFrame([asdict(c) for c in self.coefficients])

    def coef(self, term: str) -> Coefficient:
        for c in self.coefficients:
            if c.term == term:
                return c
        raise KeyError(term)

    def table(self, notes: bool = True) -> str:
        """A plain-text report of our own design; ``notes=False`` leaves out the notes (the
        command line prints each on stderr, once)."""
        v = self.variance
        title = {"pooled": "Pooled least squares", "within": "Within (fixed effects)",
                 "first-difference": "First differences"}[self.estimator]
        lines = [f"{title}: {self.outcome}", f"  source {self.source}" + (f"  where {self.where}" if self.where else "")]
        eff = f"  effects: {', '.join(self.effects)}" if self.effects else ""
        step = f", step {self.period_step}" if self.period_step else ""
        lines.append(f"  {self.n_obs:,} rows used, {self.n_units:,} units" + (f", {self.n_periods} periods{step}" if self.n_periods else "") + eff)
        vline = f"  variance: {v.type}, t with {v.df:g} df"
        if v.n_clusters:
            vline += f", clusters {' / '.join(map(str, v.n_clusters))}"
        if v.k_prime is not None:
            vline += f", K' {v.k_prime:,} ({LEVEL_SHORT[v.absorbed_levels]})"
        lines.append(vline)
        lines.append("")
        width = max([len(c.term) for c in self.coefficients] + [4])
        head = f"  {'term':<{width}}  {'estimate':>12}  {'std.err':>11}  {'t':>8}  {'p':>7}  {'95% interval':>27}"
        lines += [head, "  " + "-" * (len(head) - 2)]
        for c in self.coefficients:
            lines.append(
                f"  {c.term:<{width}}  {_num(c.estimate):>12}  {_num(c.std_error):>11}  {c.t_stat:>8.2f}  "
                f"{_p(c.p_value):>7}  [{_num(c.ci_lower):>12}, {_num(c.ci_upper):>12}]"
            )
        lines.append("")
        if self.f_unavailable:
            lines.append(f"  R^2 ({self.r_squared_kind}) {self.r_squared:.4f}")
            lines.append(f"  Wald F not available: {self.f_unavailable}")
        else:
            lines.append(f"  R^2 ({self.r_squared_kind}) {self.r_squared:.4f}   Wald F({self.f_df[0]:g}, {self.f_df[1]:g}) = "
                         f"{self.f_stat:.3f}, p {_p(self.f_p_value)}")
        dropped = {k: n for k, n in self.rows_dropped.items() if n}
        if dropped or self.singletons_dropped:
            parts = [f"{n:,} {k.replace('_', ' ')}" for k, n in dropped.items()]
            if self.singletons_dropped:
                parts.append(f"{self.singletons_dropped:,} singleton units")
            lines.append("  rows left out: " + "; ".join(parts))
        for term, why in self.terms_dropped.items():
            lines.append(f"  term left out: {term} ({why})")
        for w in self.warnings if notes else ():
            lines.append(f"  note: {w}")
        lines.append("  Read causally only under: " + "; ".join(CAUTION_SHORT) + ".")
        return "\n".join(lines)


def run_record(threads: int) -> dict:
    """The ``run`` entry of a result's JSON: the thread count and the tool's version. The
    numbers do not depend on the threads (moments.plan_chunks); the entry says how the
    run was made, and is the one field that two runs with other threads may differ in."""
    from . import __version__

    return {"threads": int(threads), "version": __version__}


def _num(x: float) -> str:
    if not math.isfinite(x):
        return "nan"
    return f"{x:.6g}" if abs(x) >= 1e-4 or x == 0 else f"{x:.4e}"


def _p(p: float) -> str:
    if not math.isfinite(p):
        return "nan"
    return "<0.0001" if p < 1e-4 else f"{p:.4f}"
