"""Moment requests: the sums an estimator asks of the data, as plain frozen values.

A request names its rows (the design columns after the row transform; the sample is the
rows on which every one of them is finite) and what to sum. The scan plan
(:mod:`bigpanel.plan`) collects requests, removes duplicates and groups them by sample;
the executor (:mod:`bigpanel.execute`) turns them into SQL and returns aggregates only.
"""

from __future__ import annotations

from dataclasses import dataclass

FOLDS = ("rows", "unit", "period", "unit+period", "sweeps", "unit-size")
LAYOUTS = ("plain", "constant", "within")
SCORE_KINDS = ("rows", "units", "nested", "groups")


@dataclass(frozen=True)
class Rows:
    """Design columns ``(sql, lag)``, outcome last, with the cluster columns carried.

    ``differenced``: first differences of consecutive periods within units;
    ``demeaned``: unit means subtracted in SQL (two passes, for data whose unit means
    dwarf their spread); ``weight``: the weight column (its name, quoted per engine by the builders) of a weighted fit: every
    sum carries it, unit means are weighted, rows of weight 0 are left out."""

    columns: tuple[tuple[str, int], ...]
    clusters: tuple[str, ...] = ()
    differenced: bool = False
    demeaned: bool = False
    effects: tuple[tuple[str, ...], ...] = ()  # absorbed effects' key columns (many effects: bigpanel.sweeps)
    weight: str | None = None

    @property
    def q(self) -> int:
        return len(self.columns)

    @property
    def weighted(self) -> bool:
        return self.weight is not None

    @property
    def has_lags(self) -> bool:
        return any(lag for _, lag in self.columns)


@dataclass(frozen=True)
class CrossProducts:
    """Cross-products of the design columns over the sample.

    ``fold``: ``rows`` (n, sums and products over all rows), ``unit`` (per-unit sums
    folded into the transformed cross-product in SQL), ``period`` (per-period sums) or
    ``unit+period`` (per-unit, per-presence-pattern and per-period sums), ``sweeps``
    (the rows' effects absorbed by iteration, :mod:`bigpanel.sweeps`) or ``unit-size`` (within
    and between sums of the units of each row count: between, random effects).
    ``layout`` of the unit fold: ``within`` (S_i - s_i s_i'/n_i), ``plain`` or
    ``constant`` (a constant column before the outcome).
    ``pilot``: coefficients around which the unit-cluster meat is expanded (unit fold).
    """

    rows: Rows
    fold: str
    layout: str = "plain"
    pilot: tuple[float, ...] | None = None
    head: bool = False  # the source's first rows only (the pilot's probe)
    sweeps: tuple = ()  # the sweeps fold: (tolerance, max iterations, unit column, effect labels)


@dataclass(frozen=True)
class Scores:
    """The meat of a sandwich variance at given coefficients (``values``: the
    parameters $b_j, $b_one, period effects $t_i, $g_i, $G_i_j).

    ``kind``: ``rows`` (sum of u^2 x x', HC1), ``units`` (clusters are units), ``nested``
    (clusters made of whole units) or ``groups`` (clusters cutting across units, one- or
    two-way). ``demean``: scores of unit-demeaned columns (within)."""

    rows: Rows
    kind: str
    constant: bool
    demean: bool
    n_periods: int
    values: tuple[tuple[str, float], ...] = ()


@dataclass(frozen=True)
class Nesting:
    """Is cluster column ``column`` of ``rows`` constant within every unit of the sample?"""

    rows: Rows
    column: int = 0
