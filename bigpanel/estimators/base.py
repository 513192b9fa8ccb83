"""What every estimator shares: the equations it hands to the solver, and its interface.

An estimator is a small stateless object made from the specification. It declares

- its row transform (levels or first differences) and whether it absorbs the units;
- its first moment request (:meth:`Estimator.first_pass`);
- its algebra: the aggregates of that request become :class:`Equations`, the
  cross-product over (regressors, absorbed effect columns, [constant], outcome).

Everything after the equations (solve, variance, result) is common: :mod:`bigpanel.inference`.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .. import moments, sqlbuild
from ..design import Design
from ..requests import CrossProducts, Rows
from ..spec import FitSpec


@dataclass
class Equations:
    """The normal equations of one model, with the counts behind them.

    ``total`` is (k+1)-by-(k+1) over (design regressors, extra columns, outcome); the
    extra columns are absorbed period effects and the constant (labels ``extra_labels``).
    """

    total: np.ndarray
    raw_diag: np.ndarray  # the diagonal before demeaning (for the digit-loss check)
    n_obs: int
    n_units: int
    singletons: int = 0
    singleton_rows: int = 0
    t_min: object = None
    t_max: object = None
    expansion: list | None = None  # per-chunk sums for the unit-cluster meat (moments.py)
    pilot: np.ndarray | None = None
    extra_labels: list = field(default_factory=list)
    extra_effect: list = field(default_factory=list)
    effect_values: list = field(default_factory=list)  # every period with an effect (base included)
    effect_rows: np.ndarray | None = None  # each period's indicator row over the extra columns
    absorption: object = None  # many effects: the bigpanel.sweeps.Absorption behind the equations
    components: dict = field(default_factory=dict)  # random effects: sigma_u, sigma_e, theta range (reported)
    parts: dict = field(default_factory=dict)  # an estimator's own algebra kept for its variance and tests

    def cancellation(self) -> float:
        """Largest ratio of raw to transformed sum of squares (digits lost by one pass)."""
        diag = np.diag(self.total)
        with np.errstate(divide="ignore", invalid="ignore"):
            r = np.where(diag > 0, self.raw_diag / diag, 1.0)
        return float(np.max(r)) if r.size else 1.0


class Estimator:
    """The interface; subclasses set the class attributes and the two methods."""

    name = ""
    differenced = False  # rows are first differences within units
    absorbs_units = False  # unit effects absorbed: counted in the df, scores demeaned
    demeaned_retry = False  # redo the pass with unit means subtracted when digits cancel
    checks_variation = False  # terms without variation within units are dropped by name
    no_variation = "no variation within units"  # why such a term was left out
    r2_kind = ""
    expands = False  # the unit-cluster meat can be expanded in the first pass
    shares = False  # the first request can be served by a shared scan (bigpanel.plan)

    def __init__(self, spec: FitSpec):
        self.spec = spec

    # ---- design and rows
    def extend_design(self, executor, design: Design) -> Design:
        return design

    def rows(self, design: Design) -> Rows:
        return Rows(design.sql_columns, tuple(self.spec.cluster), self.differenced, weight=self.spec.weights or None)

    @property
    def constant(self) -> bool:
        """A constant column sits before the outcome (pooled and differenced intercepts)."""
        return not self.absorbs_units and self.spec.intercept

    def shifted(self) -> bool:
        """Whether columns are shifted before summing (needs a constant or unit effects)."""
        return self.absorbs_units or self.spec.intercept

    def intercept_shifts(self, shifts: np.ndarray) -> np.ndarray:
        """The shifts the intercept is restored with (levels: the shifts themselves)."""
        return shifts

    def absorbed(self, eq: Equations) -> int:
        return eq.n_units if self.absorbs_units else 0

    def constant_in_scores(self) -> bool:
        """The constant is a score column (not absorbed into period effects)."""
        return self.constant

    def levels_in_k_prime(self, executor, rows: Rows, eq: Equations) -> int | None:
        """Absorbed levels counted in K' of the cluster factor; None: the unit and period
        rule of :func:`bigpanel.inference.k_prime`."""
        return None

    def accumulation(self, eq: Equations) -> str | None:
        """How the cross-product was accumulated, when the estimator says (else the fit's default)."""
        return None

    def absorption(self, eq: Equations) -> dict:
        """How the effects were absorbed (the result's ``absorption``): the path and its method."""
        if not self.absorbs_units:
            return {}
        if self.spec.period_effects:
            return {"path": "exact", "method": "unit effects by per-unit sums, period effects as indicator columns (no iteration)"}
        return {"path": "exact", "method": "unit effects by per-unit sums (no iteration)"}

    def own_variance(self, executor, rows: Rows, params: dict, eq: Equations, sol, rss: float, n_kept: int, notes):
        """A variance of the estimator's own (between, random effects), or None for the common choice."""
        return None

    def extra_tests(self, executor, rows: Rows, params: dict, eq: Equations, sol, var, notes) -> dict:
        """Tests the estimator reports with every fit (``FitResult.tests``), by key."""
        return {}

    # ---- moments
    def first_pass(self, design: Design, pilot: np.ndarray | None = None) -> CrossProducts:
        raise NotImplementedError

    def equations(self, design: Design, request: CrossProducts, chunks: list[list[dict]], executor) -> Equations:
        raise NotImplementedError

    def shared_equations(self, totals: dict, sample: int, columns: tuple[int, ...]) -> Equations:
        """Equations from a shared scan's totals (``shared_moments.sql``) for a model whose
        columns are ``columns`` (union indices, outcome last) on sample ``sample``."""
        raise NotImplementedError


def sample_sums(totals: dict, s: int, columns: tuple[int, ...], kind: str) -> np.ndarray:
    """The sample's matrix ``kind`` (``p`` raw products or ``w`` within) over ``columns``."""
    q = len(columns)
    out = np.zeros((q, q))
    for a in range(q):
        for b in range(a, q):
            j, l = sorted((columns[a], columns[b]))
            out[a, b] = out[b, a] = totals[f"tot_{kind}{s}_{j}_{l}"] or 0.0
    return out


def add_unit_rows(rows: list[dict], q: int, dim: int) -> Equations:
    """Add the unit fold's chunk rows (unit_pass.sql) in chunk order."""
    eq = Equations(total=np.zeros((dim, dim)), raw_diag=np.zeros(q), n_obs=0, n_units=0)
    for row in rows:
        eq.total += moments.symmetric(row, "w", dim)
        eq.raw_diag += [row[f"r{j}"] or 0.0 for j in range(q)]
        eq.n_obs += int(row["n_obs"])
        eq.n_units += int(row["n_units"])
        eq.singletons += int(row["singletons"])
        eq.singleton_rows += int(row["singleton_rows"])
    lo = [r["t_min"] for r in rows if r["t_min"] is not None]
    hi = [r["t_max"] for r in rows if r["t_max"] is not None]
    eq.t_min, eq.t_max = (min(lo), max(hi)) if lo else (None, None)
    return eq


def unit_fold(request: CrossProducts, chunks: list[list[dict]], q: int) -> Equations:
    """Equations from the unit fold, with the expansion sums when a pilot was given."""
    constant = request.layout == "constant"
    dim = q + (1 if constant else 0)
    rows = [c[0] for c in chunks]
    eq = add_unit_rows(rows, q, dim)
    if constant:
        eq.raw_diag = np.r_[eq.raw_diag[:-1], eq.n_obs, eq.raw_diag[-1]]
    if request.pilot is not None:
        eq.expansion = [{key: r[key] for key in r if key.startswith(("rr", "rb", "bb"))} for r in rows]
        eq.pilot = np.array(request.pilot)
    return eq


def set_effects(eq: Equations, period: str, values: list, effects: list, with_constant: bool, shown=None) -> None:
    """Label the period-effect columns (then the constant when there is one) and record
    each period's indicator row over them; ``shown`` maps a period as summed (a slot on
    the grid) to the user's value."""
    shown = shown or (lambda v: v)
    eq.extra_labels = [f"{period}={shown(v)}" for v in effects] + (["(intercept)"] if with_constant else [])
    eq.extra_effect = [True] * len(eq.extra_labels)
    rows = np.zeros((len(values), len(eq.extra_labels)))
    for i, v in enumerate(values):
        if v in effects:
            rows[i, effects.index(v)] = 1.0
        if with_constant:
            rows[i, -1] = 1.0
    eq.effect_values, eq.effect_rows = list(values), rows
