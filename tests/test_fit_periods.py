"""Periods as users have them: the panel's detected step (integers: the gcd of the gaps;
dates: month, quarter, year, ...), the count of distinct periods, DATE and TIMESTAMP
periods for differences and lags, and irregular spacing refused.

References: statsmodels OLS on differences and lags formed with pandas (shift within
units after sorting, kept only when the previous row is one step earlier), and
statsmodels OLS with dummy variables for the unit and period effects.
"""

from __future__ import annotations

import datetime as dt
import json

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

import bigpanel
from bigpanel.errors import InputError
from panel_cases import write_parquet

pytestmark = pytest.mark.filterwarnings("ignore::bigpanel.errors.BigpanelWarning")
RTOL = 1e-9  # the same least squares by two routes


def panel(periods, n_units=25, seed=3) -> pd.DataFrame:
    """A balanced test panel on the given periods (invented numbers, test data only)."""
    rng = np.random.default_rng(seed)
    df = pd.DataFrame([(u, t) for u in range(n_units) for t in periods], columns=["unit", "period"])
    df["x"] = rng.normal(size=len(df))
    df["y"] = 1.5 * df["x"] + 0.1 * df["unit"] + rng.normal(size=len(df))
    return df


def first_differences(df: pd.DataFrame, ordinal) -> pd.DataFrame:
    """pandas differences within units, kept where the previous row is one step earlier."""
    d = df.sort_values(["unit", "period"]).copy()
    o = d["period"].map(ordinal)
    steps = o.groupby(d["unit"]).diff()
    step = np.gcd.reduce(steps.dropna().astype(np.int64).unique())
    out = d[["x", "y"]].groupby(d["unit"]).diff()
    return out[steps == step]


def test_first_differences_on_periods_ten_apart(tmp_path):
    # Failed before the fix ("no usable rows": the step was taken as 1). Reference:
    # statsmodels OLS with an intercept on pandas differences of periods 80 and 90.
    df = panel([80, 90])
    path = write_parquet(df, tmp_path / "decades.parquet")
    res = bigpanel.fit(path, "y", "x", "unit", "period", estimator="first-difference", variance="homoskedastic")
    d = first_differences(df, int)
    ref = sm.OLS(d["y"], sm.add_constant(d["x"])).fit()
    assert res.coef("x").estimate == pytest.approx(ref.params["x"], rel=RTOL)
    assert res.coef("x").std_error == pytest.approx(ref.bse["x"], rel=RTOL)
    assert res.n_periods == 2 and res.period_step == "10 (detected)"
    assert json.loads(res.to_json())["period_step"] == "10 (detected)"


def test_lag_with_unit_and_period_effects_on_periods_three_apart(tmp_path):
    # Failed before the fix: the lag looked one period back, so "no usable rows" on this
    # balanced panel (the run ended in a ValueError, shapes (0,) and (0,4)); the
    # header of a plain fit said 7 periods. Reference: statsmodels OLS with unit
    # and period dummy variables on the rows whose lag (the unit's period 3 earlier) exists.
    df = panel([87, 90, 93])
    path = write_parquet(df, tmp_path / "every3.parquet")
    res = bigpanel.fit(path, "y", "x, lag(x)", "unit", "period", effects=["unit", "period"], variance="homoskedastic")
    d = df.sort_values(["unit", "period"]).copy()
    d["lag_x"] = d.groupby("unit")["x"].shift()
    d = d.dropna()
    dummies = pd.get_dummies(d[["unit", "period"]].astype(str), drop_first=True).astype(float)
    ref = sm.OLS(d["y"], sm.add_constant(pd.concat([d[["x", "lag_x"]], dummies], axis=1))).fit()
    np.testing.assert_allclose([res.coef("x").estimate, res.coef("lag(x)").estimate], ref.params[["x", "lag_x"]],
                               rtol=RTOL)
    np.testing.assert_allclose([res.coef("x").std_error, res.coef("lag(x)").std_error], ref.bse[["x", "lag_x"]],
                               rtol=RTOL)
    assert res.n_periods == 3  # distinct periods, not the span 87..93
    assert "3 periods (" in res.table() and "step 3 (detected)" in res.table()
    assert (res.period_first, res.period_last) == (90, 93)


@pytest.mark.parametrize("kind, periods, step", [
    ("monthly dates", [dt.date(2021, m, 1) for m in range(1, 7)], "1 month (detected)"),
    ("yearly timestamps", [dt.datetime(y, 1, 1) for y in range(2015, 2020)], "1 year (detected)"),
    ("quarterly month ends", [dt.date(2020, 3, 31), dt.date(2020, 6, 30), dt.date(2020, 9, 30), dt.date(2020, 12, 31)],
     "1 quarter (detected)"),
])
def test_first_differences_and_lags_on_dates(tmp_path, kind, periods, step):
    # Failed before the fix (DATE and TIMESTAMP periods refused for differences and lags).
    # Reference: statsmodels OLS on pandas differences of consecutive months or years
    # (the ordinal is year * 12 + month, so month ends count as one month apart).
    df = panel(periods)
    path = write_parquet(df, tmp_path / "dated.parquet")
    res = bigpanel.fit(path, "y", "x", "unit", "period", estimator="first-difference", variance="homoskedastic")
    d = first_differences(df, lambda t: t.year * 12 + t.month)
    ref = sm.OLS(d["y"], sm.add_constant(d["x"])).fit()
    assert res.coef("x").estimate == pytest.approx(ref.params["x"], rel=RTOL)
    assert res.coef("x").std_error == pytest.approx(ref.bse["x"], rel=RTOL)
    assert res.n_periods == len(periods) and res.period_step == step
    lagged = bigpanel.fit(path, "y", "x, lag(x)", "unit", "period", variance="homoskedastic")
    assert lagged.n_obs == len(df) - df["unit"].nunique()  # each unit's first period has no lag


def test_irregular_spacing_is_refused_naming_the_gaps(tmp_path):
    # Failed before the fix (periods 87, 90, 95 took step 1 and "no usable rows").
    # Common practice: with gaps of 3 and 5 no step separates consecutive periods.
    path = write_parquet(panel([87, 90, 95]), tmp_path / "irregular.parquet")
    with pytest.raises(InputError, match=r"spaced irregularly: consecutive periods are 3, 5 apart"):
        bigpanel.fit(path, "y", "x", "unit", "period", estimator="first-difference")
    # a given step is used as it is (periods 87 and 90 are one step of 3 apart)
    res = bigpanel.fit(path, "y", "x", "unit", "period", estimator="first-difference", period_step=3, variance="homoskedastic")
    assert res.n_obs == 25 and res.period_step == "3 (given)"
