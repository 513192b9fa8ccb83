"""A second invented scenario: couriers working for depots, observed by year.

Three sets of effects at once, for the many-effects estimator and its benchmark:

    ln_pay_it = 0.002 shifts_it + 0.25 night_share_it + courier_i + depot_j(i,t) + year_t + e_it

with e_it independent normal noise (sd 0.08). Each courier starts at a depot and, each
later year, moves to another depot with probability ``move_share``; a mover draws two
depots at random and, if its own effect is above zero, joins the better-paying one (so
courier and depot effects are correlated, as sorting makes them). Shifts worked rise with
both effects, so leaving either out biases the shifts slope. Rows are sorted by courier,
then year; a courier's depot is a column. The true effects are drawn from the seed, and
truth.json gives the coefficients, the counts and the files.
"""

from dataclasses import asdict, dataclass
import json
from pathlib import Path

import numpy as np
import pyarrow as pa

from .build import TRUTH_FILE, _check_replaceable, _in_background, _rng, _staging, load_truth
from .files import PartWriter
from .options import COMPRESSIONS, _is_int, _is_share, check_rules

GENERATOR_VERSION = 1
SCENARIO = "couriers working for depots, observed by year (invented)"
COEFFICIENTS = {"shifts": 0.002, "night_share": 0.25}
FIRST_YEAR = 2001
NOISE_SD = 0.08
COURIER_SD = 0.25
DEPOT_SD = 0.12
BLOCK_ROWS = 1_000_000  # rows simulated at once
SCHEMA = pa.schema([pa.field(name, pa.int64(), nullable=False) for name in ("courier", "year", "depot")]
                   + [pa.field(name, pa.float64(), nullable=False) for name in ("ln_pay", "shifts", "night_share")])
_DICTIONARY_COLUMNS = ["year"]
_COLUMNS = {
    "courier": ("BIGINT", "courier id (the unit), 1..n_couriers"),
    "year": ("BIGINT", f"calendar year (the period), {FIRST_YEAR}.."),
    "depot": ("BIGINT", "depot the courier works for that year (a second effect), 1..n_depots"),
    "ln_pay": ("DOUBLE", "log of the year's pay (the outcome)"),
    "shifts": ("DOUBLE", "shifts worked in the year; rises with the courier's and the depot's effects"),
    "night_share": ("DOUBLE", "share of the shifts worked at night"),
}

_RULES = {
    "n_couriers": ("--units", lambda v: _is_int(v) and v >= 1, "an integer >= 1"),
    "n_depots": ("--depots", lambda v: _is_int(v) and v >= 2, "an integer >= 2"),
    "n_years": ("--periods", lambda v: _is_int(v) and v >= 1, "an integer >= 1"),
    "seed": ("--seed", lambda v: _is_int(v) and v >= 0, "an integer >= 0"),
    "move_share": ("--move-share", _is_share, "a share in [0, 1]"),
    "rows_per_file": ("--rows-per-file", lambda v: _is_int(v) and v >= 1, "an integer >= 1"),
    "row_group_size": ("--row-group-size", lambda v: _is_int(v) and v >= 1, "an integer >= 1"),
    "compression": ("--compression", lambda v: v in COMPRESSIONS, "one of 'snappy', 'zstd', 'none'"),
}


@dataclass(frozen=True)
class CourierOptions:
    """Validated options of the couriers scenario (see `generate_couriers`)."""

    n_couriers: int
    n_depots: int
    n_years: int
    seed: int = 0
    move_share: float = 0.1
    rows_per_file: int = 2_000_000
    row_group_size: int = 100_000
    compression: str = "snappy"

    def __post_init__(self):
        check_rules(self, _RULES)
        for name in ("n_couriers", "n_depots", "n_years", "seed", "rows_per_file", "row_group_size"):
            object.__setattr__(self, name, int(getattr(self, name)))
        object.__setattr__(self, "move_share", float(self.move_share))

    def as_dict(self):
        return {"scenario": "couriers", **asdict(self)}


def generate_couriers(out_dir, n_couriers, n_depots, n_years, *, seed=0, move_share=0.1,
                      rows_per_file=2_000_000, row_group_size=100_000, compression="snappy", overwrite=False):
    """Write a synthetic couriers-by-year panel with courier, depot and year effects.

    Parameters
    ----------
    out_dir : str or Path
        Folder to create, written under a temporary name and renamed when complete.
    n_couriers, n_depots, n_years : int
        Couriers (the units), depots and years; every courier is seen every year
        (n_couriers * n_years rows).
    seed : int, default 0
    move_share : float, default 0.1
        Share of couriers moving to another depot each year after the first.
    rows_per_file, row_group_size, compression, overwrite
        As in `datagen.generate`.

    Returns
    -------
    Path
        The folder, holding part-00000.parquet, ... and truth.json.
    """
    options = CourierOptions(n_couriers, n_depots, n_years, seed, move_share, rows_per_file, row_group_size,
                             compression)
    out = Path(out_dir)
    _check_replaceable(out, overwrite)
    with _staging(out) as folder:
        writer = PartWriter(folder, rows_per_file, row_group_size, compression, SCHEMA, _DICTIONARY_COLUMNS)
        depots = _depot_effects(options)
        tally = {"rows": 0, "moves": 0}

        def tables():
            for block in _blocks(options, depots):
                tally["rows"] += block.num_rows
                tally["moves"] += block.moves
                yield block.table

        _in_background(tables(), writer.write)
        files = writer.close()
        truth = {"generator_version": GENERATOR_VERSION, "options": options.as_dict(), **describe(options),
                 "n_rows": tally["rows"], "n_moves": tally["moves"],
                 "files": [{"name": name, "rows": rows} for name, rows in files]}
        (folder / TRUTH_FILE).write_text(json.dumps(truth, indent=2) + "\n")
    return out


def ensure_couriers(out_dir, **options):
    """Return `out_dir`, generating it only if it lacks a couriers panel made with these options."""
    wanted = CourierOptions(**options).as_dict()
    out = Path(out_dir)
    if (out / TRUTH_FILE).is_file():
        truth = load_truth(out)
        if truth.get("generator_version") == GENERATOR_VERSION and truth.get("options") == wanted:
            return out
    return generate_couriers(out, overwrite=True, **options)


def describe(options):
    """The scenario's fixed description for truth.json."""
    return {
        "scenario": SCENARIO, "unit": "courier", "period": "year", "effects": ["courier", "depot", "year"],
        "outcome": "ln_pay", "regressors": list(COEFFICIENTS), "coefficients": dict(COEFFICIENTS),
        "model": ("ln_pay = 0.002 * shifts + 0.25 * night_share + courier_effect + depot_effect + year_effect + e; "
                  f"e ~ normal(0, {NOISE_SD:g}); courier_effect ~ normal(0, {COURIER_SD:g}); "
                  f"depot_effect ~ normal(0, {DEPOT_SD:g})"),
        "year_effects": year_effects(options.n_years).tolist(),
        "n_couriers": options.n_couriers, "n_depots": options.n_depots, "n_years": options.n_years,
        "columns": {name: {"type": kind, "description": text} for name, (kind, text) in _COLUMNS.items()},
    }


def year_effects(n_years):
    t = np.arange(n_years)
    return 0.03 * t + 0.05 * np.sin(t)


def _depot_effects(options):
    return _rng(options.seed, 10).normal(0.0, DEPOT_SD, options.n_depots)


@dataclass(frozen=True)
class _Block:
    table: pa.Table
    num_rows: int
    moves: int


def _blocks(options, depot_effect):
    """The panel in blocks of consecutive couriers, each from its own random stream."""
    n_years, n_depots = options.n_years, options.n_depots
    per_block = max(1, BLOCK_ROWS // n_years)
    lam = year_effects(n_years)
    for index, first in enumerate(range(0, options.n_couriers, per_block)):
        n = min(per_block, options.n_couriers - first)
        rng = _rng(options.seed, 11, index)
        courier_effect = rng.normal(0.0, COURIER_SD, n)
        depot = np.empty((n, n_years), dtype=np.int64)
        depot[:, 0] = _choose(rng, courier_effect, depot_effect, n_depots)
        moves = 0
        for t in range(1, n_years):
            moving = rng.random(n) < options.move_share
            moves += int(moving.sum())
            depot[:, t] = np.where(moving, _choose(rng, courier_effect, depot_effect, n_depots), depot[:, t - 1])
        psi = depot_effect[depot]
        shifts = np.round(200.0 + 60.0 * courier_effect[:, None] + 80.0 * psi + rng.normal(0.0, 25.0, (n, n_years)))
        night = np.clip(rng.beta(2.0, 5.0, (n, n_years)) + 0.1 * courier_effect[:, None], 0.0, 1.0)
        ln_pay = (COEFFICIENTS["shifts"] * shifts + COEFFICIENTS["night_share"] * night + courier_effect[:, None]
                  + psi + lam + rng.normal(0.0, NOISE_SD, (n, n_years)))
        courier = np.repeat(np.arange(first + 1, first + n + 1, dtype=np.int64), n_years)
        year = np.tile(np.arange(FIRST_YEAR, FIRST_YEAR + n_years, dtype=np.int64), n)
        table = pa.Table.from_arrays([courier, year, depot.ravel() + 1, ln_pay.ravel(), shifts.ravel(), night.ravel()],
                                     schema=SCHEMA)
        yield _Block(table, n * n_years, moves)


def _choose(rng, courier_effect, depot_effect, n_depots):
    """A depot (0-based) per courier: two drawn at random, the better-paying one taken by
    couriers whose own effect is above zero."""
    a = rng.integers(0, n_depots, courier_effect.size)
    b = rng.integers(0, n_depots, courier_effect.size)
    better = np.where(depot_effect[a] >= depot_effect[b], a, b)
    return np.where(courier_effect > 0, better, a)
