"""Small invented panels for the fit tests, and the dense references they are checked against.

The panels are generated from a seed the caller passes (tests seed them inside their
fixtures). The references are statsmodels OLS on dummy-variable (LSDV) designs and on
differences computed here in pandas: independent dense computations of the same
estimators (see ../../shared/ESTIMATION.md, "Checks that catch real mistakes").
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import statsmodels.api as sm

SLOPES = {"x1": 1.5, "x2": -0.7}


def unbalanced_panel(seed: int, n_units: int, n_periods: int, n_full: int = 3) -> pd.DataFrame:
    """A panel with unequal spans and gaps: every unit has at least two rows, the first
    ``n_full`` units are observed in every period (so every period has differences).

    Columns: unit (sparse integer ids), period (1..n_periods), x1 (correlated with the
    unit effect), x2, y (heteroskedastic, serially correlated errors), region (a group
    of units: constant within a unit), shift (varies across rows of a unit).
    """
    rng = np.random.default_rng(seed)
    frames = []
    for i in range(n_units):
        if i < n_full:
            periods = np.arange(1, n_periods + 1)
        else:
            size = rng.integers(2, n_periods + 1)
            periods = np.sort(rng.choice(np.arange(1, n_periods + 1), size=size, replace=False))
        frames.append(pd.DataFrame({"unit": 1000 + 7 * i, "period": periods, "effect": rng.normal(0, 2)}))
    df = pd.concat(frames, ignore_index=True)
    n = len(df)
    period_effect = rng.normal(0, 1, n_periods + 1)[df["period"]]
    df["x1"] = 0.6 * df["effect"] + rng.normal(0, 1, n)
    df["x2"] = rng.normal(0, 1, n) + 0.3 * df["period"]
    unit_shock = df.groupby("unit")["effect"].transform(lambda s: rng.normal(0, 0.8))
    noise = rng.normal(0, 1, n) * (1 + 0.5 * np.abs(df["x1"])) + unit_shock
    df["y"] = SLOPES["x1"] * df["x1"] + SLOPES["x2"] * df["x2"] + df["effect"] + period_effect + noise
    df["region"] = (df["unit"] // 7 % 9).astype(np.int64)
    df["shift"] = rng.integers(0, 11, n).astype(np.int64)
    return df.drop(columns="effect")


def write_parquet(df: pd.DataFrame, path) -> str:
    pq.write_table(pa.Table.from_pandas(df, preserve_index=False), path)
    return str(path)


def write_parquet_parts(df: pd.DataFrame, folder, n_files: int, unit: str = "unit") -> str:
    """Write ``df`` sorted by unit into ``n_files`` files holding disjoint unit ranges."""
    folder.mkdir(parents=True, exist_ok=True)
    ordered = df.sort_values([unit, "period"], kind="stable")
    units = ordered[unit].unique()
    for j, block in enumerate(np.array_split(units, n_files)):
        write_parquet(ordered[ordered[unit].isin(block)], folder / f"part-{j:03d}.parquet")
    return str(folder)


def dummies(values: pd.Series, drop_first: bool) -> np.ndarray:
    return pd.get_dummies(values, drop_first=drop_first, dtype=float).to_numpy()


def effect_block(df: pd.DataFrame, estimator: str, period_effects: bool) -> np.ndarray:
    """The dense columns an estimator's effects take: unit dummies (within) or a constant,
    then period dummies but the first."""
    parts = [dummies(df["unit"], drop_first=False) if estimator == "within" else np.ones((len(df), 1))]
    if period_effects:
        parts.append(dummies(df["period"], drop_first=True))
    return np.hstack(parts)


def codes(values: pd.Series) -> np.ndarray:
    return pd.factorize(values)[0]


def lsdv(df: pd.DataFrame, regressors: list[str], unit_dummies: bool = True, period_dummies: bool = False,
         constant: bool = False, outcome: str = "y"):
    """statsmodels OLS of ``outcome`` on the regressors and indicator columns.

    Returns the unfitted model and the number of columns (K of the dense design).
    """
    parts = [df[regressors].to_numpy(dtype=float)]
    if constant:
        parts.append(np.ones((len(df), 1)))
    if unit_dummies:
        parts.append(dummies(df["unit"], drop_first=False))
    if period_dummies:
        parts.append(dummies(df["period"], drop_first=unit_dummies or constant))
    x = np.hstack(parts)
    return sm.OLS(df[outcome].to_numpy(dtype=float), x), x.shape[1]


def differences(df: pd.DataFrame, columns: list[str]) -> pd.DataFrame:
    """First differences between consecutive periods of the same unit, by hand.

    A row whose previous row in the unit is not exactly one period earlier (a gap) or
    that is the unit's first row yields no difference.
    """
    ordered = df.sort_values(["unit", "period"], kind="stable").reset_index(drop=True)
    prev = ordered.groupby("unit").shift(1)
    keep = (ordered["period"] - prev["period"]) == 1
    out = ordered.loc[keep, ["unit", "period"]].copy()
    for c in columns:
        out[c] = (ordered[c] - prev[c])[keep]
    return out.reset_index(drop=True)


def cr1_factor(n_clusters: int, n_obs: int, k_prime: int) -> float:
    """Liang-Zeger CR1 small-sample factor G/(G-1) * (N-1)/(N-K') (Cameron and Miller
    2015, "A Practitioner's Guide to Cluster-Robust Inference", section VI.B)."""
    return n_clusters / (n_clusters - 1) * (n_obs - 1) / (n_obs - k_prime)


def log_relative_error(estimate: float, certified: float) -> float:
    """NIST StRD's log relative error: -log10(|est - cert| / |cert|), capped at 15 digits."""
    err = abs(estimate - certified)
    if err == 0:
        return 15.0
    return min(15.0, -np.log10(err / abs(certified)))
