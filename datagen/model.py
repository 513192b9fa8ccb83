"""The invented scenario, delivery depots observed by month, and its true model.

parcels_it = sum_j beta_j x_jit + a_i + g_t + u_it, with
u_it = e_it + w_rt, e_it = rho e_i,t-1 + innovation (stationary AR(1) within depot),
w_rt a shock shared by all depots of region r in month t.
The depot effect a_i rises with the depot's size, which also raises its staff hours,
so pooled least squares overstates the staff_hours slope; within and first-difference
estimators do not.
"""

from dataclasses import dataclass

import numpy as np

COEFFICIENTS = {"staff_hours": 2.0, "vans": 15.0, "fuel_price": -3.0, "rain_mm": -0.4, "promo": 25.0}
REGRESSORS = tuple(COEFFICIENTS)
VALUE_COLUMNS = ("parcels",) + REGRESSORS
ERROR_RHO = 0.5
INNOVATION_SD = 20.0
REGION_SHOCK_SD = 8.0
DEPOT_NOISE_SD = 25.0
STAFF_RHO = 0.6
DEPOTS_PER_REGION = 1000
MIN_REGIONS = 50
DEPOT_KINDS = ("hub", "city", "rural")
_KIND_SHARES = (0.1, 0.5, 0.4)
_KIND_EFFECT = np.array([150.0, 0.0, -80.0])
_KIND_STAFF = np.array([40.0, 0.0, -20.0])
_KIND_VANS = np.array([4.0, 0.0, -1.0])
_KIND_PROMO = np.array([0.12, 0.25, 0.12])

_COLUMNS = {
    "depot": ("BIGINT", "depot id (the unit), 1..n_units"),
    "month": ("BIGINT", "month number (the period), 1..n_periods"),
    "region": ("BIGINT", "region id, constant within depot (cluster above the unit)"),
    "parcels": ("DOUBLE", "parcels delivered in the month (the outcome)"),
    "staff_hours": ("DOUBLE", "staff hours worked, in quarter hours; its depot mean rises with the depot effect"),
    "vans": ("DOUBLE", "vans in service (whole numbers)"),
    "fuel_price": ("DOUBLE", "diesel price paid by the depot, euro cents per litre; common, regional and local movements"),
    "rain_mm": ("DOUBLE", "rainfall in mm; seasonal and regional"),
    "promo": ("DOUBLE", "1 if a sender promotion ran that month, else 0"),
    "depot_kind": ("VARCHAR", "'hub', 'city' or 'rural'; constant within depot"),
    "opened_year": ("BIGINT", "year the depot opened; constant within depot (time-invariant)"),
}


def describe(n_periods):
    """Return the scenario's fixed description for truth.json: columns, formulas, true values."""
    return {
        "scenario": "delivery depots observed by month (invented)",
        "unit": "depot",
        "period": "month",
        "cluster": "region",
        "outcome": "parcels",
        "regressors": list(REGRESSORS),
        "time_invariant": ["region", "depot_kind", "opened_year"],
        "model": ("parcels = sum_j beta_j * x_j + depot_effect + month_effect + u; "
                  "u = e + region_shock; e = rho * e(previous month) + innovation"),
        "coefficients": dict(COEFFICIENTS),
        "error": {
            "rho": ERROR_RHO,
            "innovation_sd": INNOVATION_SD,
            "stationary_sd": INNOVATION_SD / np.sqrt(1 - ERROR_RHO**2),
            "region_shock_sd": REGION_SHOCK_SD,
        },
        "depot_effect": {
            "formula": (f"600 + 60 * size + kind effect {_by_kind(_KIND_EFFECT)} - 2 * (opened_year - 2005) "
                        f"+ normal(0, {DEPOT_NOISE_SD:g}), size standard normal; depot mean of staff_hours "
                        f"about 160 + 30 * size + kind shift {_by_kind(_KIND_STAFF)}"),
        },
        "month_effects": month_effects(n_periods).tolist(),
        "columns": {name: {"type": kind, "description": text} for name, (kind, text) in _COLUMNS.items()},
    }


def _by_kind(values):
    return "(" + ", ".join(f"{kind} {value:g}" for kind, value in zip(DEPOT_KINDS, values)) + ")"


def n_regions(n_units):
    """Return the number of regions for a panel of `n_units` depots."""
    return max(MIN_REGIONS, n_units // DEPOTS_PER_REGION)


def month_effects(n_periods):
    """Return g_t, shape (n_periods,): a yearly season on a slow upward trend."""
    month = np.arange(1, n_periods + 1)
    return 40.0 * np.sin(2 * np.pi * month / 12) + 1.5 * month


@dataclass(frozen=True)
class Regions:
    """Region-by-month tables shared by all blocks, each of shape (n_regions, n_periods)."""

    fuel_price: np.ndarray
    rain_mm: np.ndarray
    shock: np.ndarray


def simulate_regions(rng, n_regions, n_periods):
    """Draw the region-by-month fuel prices, rainfall and error shocks.

    Parameters
    ----------
    rng : numpy.random.Generator
    n_regions, n_periods : int

    Returns
    -------
    Regions
    """
    national = np.empty(n_periods)
    level = 0.0
    for t in range(n_periods):
        level = 0.9 * level + rng.normal(0.0, 3.0)
        national[t] = 165.0 + level
    shape = (n_regions, n_periods)
    fuel = national + rng.normal(0.0, 8.0, (n_regions, 1)) + rng.normal(0.0, 4.0, shape)
    season = 70.0 + 30.0 * np.cos(2 * np.pi * np.arange(1, n_periods + 1) / 12)
    rain = season * rng.lognormal(-0.08, 0.4, (n_regions, 1)) * rng.gamma(4.0, 0.25, shape)
    return Regions(fuel, rain, rng.normal(0.0, REGION_SHOCK_SD, shape))


@dataclass(frozen=True)
class Block:
    """A block of consecutive depots with all their months.

    Attributes
    ----------
    depot, region, kind, opened_year, effect : ndarray of shape (n_depots,)
        Depot id, region id (1-based), index into DEPOT_KINDS, opening year, a_i.
    values : dict of str to ndarray of shape (n_depots, n_periods)
        parcels and the regressors, for every month.
    present : ndarray of bool, shape (n_depots, n_periods)
        Which depot-months are in the panel.
    """

    depot: np.ndarray
    region: np.ndarray
    kind: np.ndarray
    opened_year: np.ndarray
    effect: np.ndarray
    values: dict
    present: np.ndarray


def simulate_block(rng, mask_rng, first_depot, n_depots, n_periods, regions, unbalanced, gaps):
    """Draw the depots ``first_depot .. first_depot + n_depots - 1``, vectorised over depots.

    Parameters
    ----------
    rng : numpy.random.Generator
        Stream for the depots' values.
    mask_rng : numpy.random.Generator
        Separate stream for which months are missing, so that the values of the rows
        kept do not depend on `unbalanced` and `gaps`.
    first_depot, n_depots, n_periods : int
    regions : Regions
    unbalanced, gaps : float
        Share of depots that enter late or leave early; share with one month missing
        inside their span (only depots observed for at least 3 months can have one).

    Returns
    -------
    Block
    """
    size = rng.standard_normal(n_depots)
    kind = rng.choice(len(DEPOT_KINDS), n_depots, p=_KIND_SHARES).astype(np.int8)
    opened_year = rng.integers(1985, 2023, n_depots)
    region = rng.integers(0, regions.shock.shape[0], n_depots)
    effect = (600.0 + 60.0 * size + _KIND_EFFECT[kind] - 2.0 * (opened_year - 2005)
              + rng.normal(0.0, DEPOT_NOISE_SD, n_depots))
    staff_level = 160.0 + 30.0 * size + _KIND_STAFF[kind]
    van_level = 4.0 + 1.2 * size + _KIND_VANS[kind]
    promo_rate = _KIND_PROMO[kind]
    g = month_effects(n_periods)

    values = {name: np.empty((n_depots, n_periods)) for name in VALUE_COLUMNS}
    staff_state = rng.standard_normal(n_depots)
    error = rng.normal(0.0, INNOVATION_SD / np.sqrt(1 - ERROR_RHO**2), n_depots)
    for t in range(n_periods):
        if t:
            staff_state = STAFF_RHO * staff_state + np.sqrt(1 - STAFF_RHO**2) * rng.standard_normal(n_depots)
            error = ERROR_RHO * error + rng.normal(0.0, INNOVATION_SD, n_depots)
        x = {
            "staff_hours": np.maximum(8.0, np.round(4.0 * (staff_level + 12.0 * staff_state)) / 4.0),
            "vans": np.maximum(1.0, np.round(van_level + 0.6 * rng.standard_normal(n_depots))),
            "fuel_price": np.round(regions.fuel_price[region, t] + rng.normal(0.0, 5.0, n_depots), 1),
            "rain_mm": np.round(regions.rain_mm[region, t] * rng.lognormal(-0.045, 0.3, n_depots), 1),
            "promo": (rng.random(n_depots) < promo_rate).astype(np.float64),
        }
        parcels = effect + g[t] + error + regions.shock[region, t]
        for name, beta in COEFFICIENTS.items():
            parcels += beta * x[name]
            values[name][:, t] = x[name]
        values["parcels"][:, t] = parcels
    depot = np.arange(first_depot, first_depot + n_depots, dtype=np.int64)
    present = _presence(mask_rng, n_depots, n_periods, unbalanced, gaps)
    return Block(depot, region + 1, kind, opened_year, effect, values, present)


def _presence(rng, n_depots, n_periods, unbalanced, gaps):
    """Mark late entries, early exits and one-month gaps; every depot keeps at least one month."""
    present = np.ones((n_depots, n_periods), dtype=bool)
    start = np.zeros(n_depots, dtype=np.int64)
    length = np.full(n_depots, n_periods, dtype=np.int64)
    months = np.arange(n_periods)
    if unbalanced > 0:
        moved = np.flatnonzero(rng.random(n_depots) < unbalanced)
        length[moved] = rng.integers(max(1, n_periods // 2), n_periods, moved.size)
        start[moved] = rng.integers(0, n_periods - length[moved] + 1)
        present[moved] = (months >= start[moved, None]) & (months < (start + length)[moved, None])
    if gaps > 0:
        holed = np.flatnonzero((length >= 3) & (rng.random(n_depots) < gaps))
        present[holed, start[holed] + 1 + rng.integers(0, length[holed] - 2)] = False
    return present
