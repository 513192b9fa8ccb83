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

# Added for the estimators that keep the unit effect in the error (between, random effects).
ESTIMATOR_CAUTIONS = {
    "between": ("The between estimate compares units only: it assumes the unit effect is unrelated to the "
                "regressors."),
    "random-effects": ("Random effects assumes the unit effect is unrelated to the regressors in every period; the "
                       "Hausman and unit-means tests below check it, and a rejection points to within."),
}


def cautions(estimator: str) -> list[str]:
    """The cautions printed with a fit of ``estimator``."""
    return list(CAUTIONS) + ([ESTIMATOR_CAUTIONS[estimator]] if estimator in ESTIMATOR_CAUTIONS else [])


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
    # how it ran: {"threads": N, "version": "x.y.z"}, and another engine's run_facts() (its
    # name, and what it reports: Spark its master, PostgreSQL queries and bytes fetched)
    run: dict = field(default_factory=dict)
    # how the effects were absorbed: {"path": "exact" | "iterative", "method": ...}; iterative adds
    # effects and levels, iterations, tolerance, achieved, converged, singletons, redundancies
    absorption: dict = field(default_factory=dict)
    # files written back (bigpanel.writeback): {"effects": {column: path}, "normalisation": text,
    # "residuals": path}; empty when nothing was asked for
    written: dict = field(default_factory=dict)
    weights: str = ""  # the column of analytic weights ("" when unweighted)
    instrumented: tuple[str, ...] = ()  # terms estimated by two-stage least squares
    instruments: tuple[str, ...] = ()  # their excluded instruments
    first_stage: tuple = ()  # instruments.FirstStage per instrumented term
    covariance: dict = field(default_factory=dict)  # {"terms": [...], "matrix": [[...]]} of the reported coefficients
    tests: dict = field(default_factory=dict)  # joint, hausman, unit_means, serial_correlation (hypotheses.py; README)
    error_components: dict = field(default_factory=dict)  # random effects: sigma_u, sigma_e, theta_min, theta_max, ...

    def to_dict(self) -> dict:
        out = json_ready(self)
        out["variance"]["factor_rule"] = self.variance.factor_rule
        out["cautions"] = cautions(self.estimator) + list(_extra_cautions(self))
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
        """A plain-text report of our own design, at most :data:`WIDTH` columns wide: a
        header block (model, data, sample, variance), one line per term (never wrapped: a
        label too long for its column is shortened and written out in full below the
        table), then the fit statistics in words and the cautions. ``notes=False`` leaves
        out the notes (the command line prints each on stderr, once)."""
        return "\n".join(_header(self) + _term_rows(self.coefficients) + _test_lines(self) + _footer(self, notes))


WIDTH = 100  # the widest line of FitResult.table()
TITLES = {"pooled": "Pooled least squares", "within": "Within estimator (fixed effects)",
          "first-difference": "First differences", "between": "Between estimator (least squares on unit means)",
          "random-effects": "Random effects (generalized least squares, Swamy-Arora components)"}
_NUMBERS = (("estimate", 12), ("std. error", 11), ("t", 8), ("p", 8), ("low", 12), ("high", 12))
# a term's label may take what the number columns leave of WIDTH (indent 2, gaps of 2)
TERM_WIDTH = WIDTH - 2 - sum(w + 2 for _, w in _NUMBERS)


def _wrapped(label: str, text: str, hang: int = 0) -> list[str]:
    """A named line of prose, wrapped at WIDTH under its value (``hang`` more spaces on
    the continuation lines)."""
    import textwrap

    first = f"  {label:<9} " if label else "  "
    return textwrap.wrap(text, WIDTH, initial_indent=first, subsequent_indent=" " * (len(first) + hang),
                         break_on_hyphens=False) or [first.rstrip()]


def _variance_words(v: VarianceSummary) -> str:
    if v.type == "homoskedastic":
        kind = "homoskedastic (one error variance for all rows)"
    elif v.type == "hc1":
        kind = "hc1 (robust to unequal error variances)"
    elif len(v.cluster_columns) == 2:
        (a, b), (na, nb) = v.cluster_columns, v.n_clusters[:2]
        kind = f"cluster, two ways: by {a} ({na:,} clusters) and by {b} ({nb:,} clusters)"
    else:
        kind = f"cluster, by {', '.join(v.cluster_columns)} ({v.n_clusters[0]:,} clusters)"
    factor = f"; K'={v.k_prime:,} ({LEVEL_SHORT[v.absorbed_levels]})" if v.k_prime is not None else ""
    return f"{kind}; t tests with {_count(v.df)} df{factor}"


def _header(r: "FitResult") -> list[str]:
    lines = [f"{TITLES[r.estimator]} of {r.outcome}" + (", two-stage least squares" if r.instrumented else "")]
    lines += _wrapped("data", r.source + (f", rows where {r.where}" if r.where else ""))
    sample = f"{r.n_obs:,} rows, {r.n_units:,} units"
    if r.n_periods:
        sample += f", {r.n_periods:,} periods"
        if r.period_first is not None and r.period_last is not None:
            sample += f" ({r.period_first} to {r.period_last})"
        if r.period_step:
            sample += f", step {r.period_step}"
    if r.effects:
        sample += f"; effects: {', '.join(r.effects)}"
    lines += _wrapped("sample", sample)
    if r.absorption.get("path") == "iterative":
        lines += _wrapped("effects", _absorption_words(r.absorption))
    if r.weights:
        zero = r.rows_dropped.get("zero_weight", 0)
        lines += _wrapped("weights", f"{r.weights} (analytic; weighted sums and unit means"
                          + (f"; {zero:,} rows of weight 0 left out)" if zero else ")"))
    if r.instrumented:
        lines += _wrapped("iv terms", f"{', '.join(r.instrumented)}; excluded instruments: {', '.join(r.instruments)}")
    lines += _wrapped("variance", _variance_words(r.variance))
    c = r.error_components
    if c:
        lines += _wrapped("unit part", f"sd of the unit effect {_num(c['sigma_u'])}, of the remaining error "
                          f"{_num(c['sigma_e'])}; theta from {c['theta_min']:.4f} to {c['theta_max']:.4f} "
                          "(the share of each unit's mean taken out)")
    return lines + [""]


def _absorption_words(a: dict) -> str:
    """The many-effects line: effects and levels, sweeps, tolerance reached, redundancies."""
    effects = ", ".join(f"{e['effect']} ({e['levels']:,} levels)" for e in a["effects"])
    status = "converged" if a["converged"] else "NOT CONVERGED: estimates are unreliable"
    kind = "exact" if a["redundancies_exact"] else "lower bound"
    return (f"absorbed by iteration: {effects}; {a['iterations']:,} sweeps, remaining level means {a['achieved']:.2g} "
            f"against tolerance {a['tolerance']:.2g}, {status}; {a['redundancies']:,} redundant levels ({kind})")


def _test_lines(r: "FitResult") -> list[str]:
    """The tests below the coefficients, in words (hypotheses.py computes them)."""
    t = r.tests
    if not t:
        return []
    lines = [""]
    for j in t.get("joint", []):  # the restrictions, then the statistics on a line of their own
        lines += _wrapped("test", j["hypothesis"]) + _wrapped(" ", _f_words(j), hang=2)
    h = t.get("hausman")
    if h:
        words = (f"chi-square {_stat(h['statistic'])} on {h['df']} df, p {_p_words(h['p_value'])}" if h["statistic"] is not None
                 else "not available (" + h["unavailable"] + ")")
        lines += _wrapped("test", f"random effects against within on {', '.join(h['terms']) or 'no common terms'} "
                          "(Hausman; assumes homoskedastic errors)", hang=2) + _wrapped(" ", words, hang=2)
    m = t.get("unit_means")
    if m:
        lines += _wrapped("test", f"unit means of the time-varying terms jointly zero in the correlated random-effects "
                          f"regression ({m['variance']} variance; a rejection favours within)", hang=2)
        lines += _wrapped(" ", _f_words(m), hang=2)
    sc = t.get("serial_correlation")
    if sc:
        lines += _wrapped("test", "serial correlation: differenced residuals regressed on their lag within units "
                          "(-0.5 without serial correlation in the level errors)", hang=2)
        if sc["coefficient"] is None:
            lines += _wrapped(" ", "not available (" + sc["unavailable"] + ")", hang=2)
        else:
            lines += _wrapped(" ", f"coefficient {_num(sc['coefficient'])}, std. error {_num(sc['std_error'])}, "
                              f"t = {_t(sc['t_stat'])} on {_count(sc['df'])} df, p {_p_words(sc['p_value'])}", hang=2)
            lines += _wrapped(" ", sc["reading"], hang=2)
    return lines


def _f_words(j: dict) -> str:
    if j.get("f") is None:
        return "not available (" + (j.get("unavailable") or "no statistic") + ")"
    q, df = j["df"]
    return (f"F = {_stat(j['f'])} on {_count(q)} and {_count(df)} df, p {_p_words(j['p_value'])}; "
            f"chi-square {_stat(j['chi_square'])} on {_count(q)} df, p {_p_words(j['p_value_chi_square'])}")


def _term_rows(coefficients) -> list[str]:
    """One line per term. Labels longer than TERM_WIDTH are cut and tagged ~1, ~2, ...;
    the full labels follow the table."""
    width = min(TERM_WIDTH, max([len(c.term) for c in coefficients] + [4]))
    head = f"  {'term':<{width}}" + "".join(f"  {name:>{w}}" for name, w in _NUMBERS)
    lines, full = [head, "  " + "-" * (len(head) - 2)], []
    for c in coefficients:
        label = c.term
        if len(label) > width:
            full.append(label)
            tag = f"~{len(full)}"
            label = label[: width - len(tag)] + tag
        cells = (_num(c.estimate), _num(c.std_error), _t(c.t_stat), _p(c.p_value), _num(c.ci_lower), _num(c.ci_upper))
        lines.append(f"  {label:<{width}}" + "".join(f"  {cell:>{w}}" for cell, (_, w) in zip(cells, _NUMBERS)))
    lines.append("  " + "-" * (len(head) - 2))
    lines.append("  low and high: the 95% confidence interval of each estimate.")
    for i, label in enumerate(full, 1):
        lines += _wrapped(f"~{i}", label)
    return lines


def _footer(r: "FitResult", notes: bool) -> list[str]:
    lines = [""]
    slopes, df = _count(r.f_df[0]), _count(r.f_df[1])
    if math.isfinite(r.f_stat) and r.f_stat >= 0:
        joint = f"F = {_stat(r.f_stat)} on {slopes} and {df} df, p {_p_words(r.f_p_value)}"
    else:
        joint = "not available" + (f" ({r.f_unavailable})" if r.f_unavailable else "")
    lines += _wrapped("", f"slopes jointly zero: {joint}")
    for s in r.first_stage:
        if math.isfinite(s.f_stat):
            test = f"F = {_stat(s.f_stat)} on {_count(s.df[0])} and {_count(s.df[1])} df, p {_p_words(s.p_value)}"
        else:
            test = "not available" + (f" ({s.unavailable})" if s.unavailable else "")
        lines += _wrapped("", f"first stage of {s.term}: excluded instruments jointly zero, {test}")
    lines += _wrapped("", f"share of variation explained ({r.r_squared_kind} R-squared): {r.r_squared:.4f}")
    dropped = {k: n for k, n in r.rows_dropped.items() if n}
    if dropped or r.singletons_dropped:
        parts = [f"{n:,} {k.replace('_', ' ')}" for k, n in dropped.items()]
        if r.singletons_dropped:
            iterative = r.absorption.get("path") == "iterative"
            parts.append(f"{r.singletons_dropped:,} " + ("rows alone in a level of an effect (singletons, dropped repeatedly)"
                                                          if iterative else "singleton units"))
        lines += _wrapped("", "rows left out: " + "; ".join(parts))
    for term, why in r.terms_dropped.items():
        lines += _wrapped("", f"term left out: {term} ({why})")
    for column, path in r.written.get("effects", {}).items():
        lines += _wrapped("", f"effects of {column} written to {path}")
    if r.written.get("residuals"):
        lines += _wrapped("", f"residuals written to {r.written['residuals']}")
    for w in r.warnings if notes else ():
        lines += _wrapped("", f"note: {w}")
    lines += ["", "  Read these estimates as causal effects only if:"]
    for caution in cautions(r.estimator) + list(_extra_cautions(r)):
        lines += _wrapped("", "- " + caution, hang=2)
    return lines


IV_CAUTION = ("The excluded instruments must be unrelated to the error (excluded) and move the instrumented terms "
              "(relevant: see each first-stage F).")
WEIGHTS_CAUTION = ("Weights change what is estimated: with effects that differ across rows, a weighted fit averages "
                   "them with the weights.")


def _extra_cautions(r: "FitResult") -> tuple[str, ...]:
    return (IV_CAUTION,) * bool(r.instrumented) + (WEIGHTS_CAUTION,) * bool(r.weights)


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


def _p_words(p: float | None) -> str:
    if p is None or not math.isfinite(p):
        return "not available"
    return "< 0.0001" if p < 1e-4 else f"= {p:.4f}"


def _t(t: float) -> str:
    return f"{t:.2f}" if math.isfinite(t) and abs(t) < 1e6 else _num(t)


def _stat(x: float) -> str:
    return f"{x:,.2f}" if x < 1e9 else f"{x:.4g}"


def _count(x: float) -> str:
    """A degrees-of-freedom figure: whole numbers with thousands separators."""
    return f"{int(x):,}" if float(x).is_integer() else f"{x:,.2f}"
