"""lead(EXPR[, K]): EXPR in the same unit K periods later, missing across a gap.

Failed before (issue 9, item 8): lead() was not a recognised form; the term was refused
as a window function call. References: pandas shift(-K) within units on the full period
grid (so a gap leaves the lead missing), then statsmodels OLS with unit dummies (within)
or with a constant on hand-made differences (first differences).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

import bigpanel
from bigpanel.errors import InputError
from bigpanel.expressions import parse_term

STEP = 3  # periods 3, 6, 9, ...: the lead of K reads K * STEP later


@pytest.fixture(scope="module")
def gappy(tmp_path_factory):
    rng = np.random.default_rng(8)
    n_units, n_periods = 30, 9
    df = pd.DataFrame({"unit": np.repeat(np.arange(n_units), n_periods),
                       "period": np.tile(np.arange(1, n_periods + 1) * STEP, n_units)})
    df["x1"] = rng.normal(size=len(df)) + 0.1 * df["unit"]
    df["x2"] = rng.normal(size=len(df))
    df["y"] = 0.7 * df["x1"] - 0.3 * df["x2"] + 0.05 * df["unit"] + rng.normal(size=len(df))
    keep = rng.random(len(df)) > 0.2  # gaps inside units
    df = df[keep].reset_index(drop=True)
    path = tmp_path_factory.mktemp("lead") / "gappy.parquet"
    df.to_parquet(path)
    return df, str(path)


def _on_grid(df: pd.DataFrame) -> pd.DataFrame:
    """Every unit on the full period grid (rows absent from the source are NaN)."""
    periods = np.arange(df["period"].min(), df["period"].max() + STEP, STEP)
    index = pd.MultiIndex.from_product([sorted(df["unit"].unique()), periods], names=["unit", "period"])
    return df.set_index(["unit", "period"]).reindex(index)


def _with_leads(df: pd.DataFrame) -> pd.DataFrame:
    grid = _on_grid(df)
    by_unit = grid.groupby(level="unit")
    grid["lead1"] = by_unit["x1"].shift(-1)  # pandas shift(-K) within units
    grid["lead2"] = by_unit["x2"].shift(-2)
    return grid


def test_lead_parses_like_lag():
    # Source: common practice (a lead is a lag of minus K periods).
    assert parse_term("lead(x1)").lag == -1 and parse_term("lead(x1, 3)").lag == -3
    assert parse_term("lag(x1, 3)").lag == 3
    for bad in ("lead(x1, 0)", "lead(x1, -1)", "lead(x1, 1, 2)", "1 + lead(x1)"):
        with pytest.raises(InputError):
            parse_term(bad)


def test_within_with_leads_matches_pandas_shift(gappy):
    # Source: pandas shift(-K) within units on the full grid; statsmodels OLS with unit
    # dummies on the complete rows (estimates and homoskedastic standard errors).
    df, path = gappy
    terms = ["x1", "lead(x1)", "lead(x2, 2)"]
    with pytest.warns(bigpanel.errors.BigpanelWarning, match="Rows left out"):
        res = bigpanel.fit(path, "y", terms, "unit", "period", variance="homoskedastic", period_step=STEP)
    grid = _with_leads(df).reset_index()
    used = grid.dropna(subset=["y", "x1", "lead1", "lead2"])
    dummies = pd.get_dummies(used["unit"], dtype=float)
    x = pd.concat([used[["x1", "lead1", "lead2"]], dummies], axis=1).to_numpy()
    ref = sm.OLS(used["y"].to_numpy(), x).fit()
    counts = used.groupby("unit")["y"].transform("size")
    assert res.n_obs == int((counts > 1).sum())  # units with one complete row are left out
    np.testing.assert_allclose([res.coef(t).estimate for t in terms], ref.params[:3], rtol=1e-9)
    np.testing.assert_allclose([res.coef(t).std_error for t in terms], ref.bse[:3], rtol=1e-9)


def test_first_differences_with_a_lead_match_pandas(gappy):
    # Source: pandas shift(-1) and diff within units on the full grid (no difference across
    # a gap); statsmodels OLS with a constant on the differences.
    df, path = gappy
    res = bigpanel.fit(path, "y", ["x1", "lead(x1)"], "unit", "period", estimator="first-difference",
                       variance="homoskedastic", period_step=STEP)
    grid = _with_leads(df)
    by_unit = grid.groupby(level="unit")
    diffs = pd.DataFrame({c: grid[c] - by_unit[c].shift(1) for c in ("y", "x1", "lead1")}).dropna()
    ref = sm.OLS(diffs["y"].to_numpy(), sm.add_constant(diffs[["x1", "lead1"]].to_numpy())).fit()
    assert res.n_obs == len(diffs)
    np.testing.assert_allclose([res.coef(t).estimate for t in ("x1", "lead(x1)", "(intercept)")],
                               [ref.params[1], ref.params[2], ref.params[0]], rtol=1e-9)
    np.testing.assert_allclose([res.coef(t).std_error for t in ("x1", "lead(x1)")], ref.bse[1:], rtol=1e-9)
