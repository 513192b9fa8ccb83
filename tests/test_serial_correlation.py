"""The serial-correlation test of within and first-difference fits (``serial_test=True``).

Method: Wooldridge, Econometric Analysis of Cross Section and Panel Data, section 10.6
(from memory): regress the differenced residuals on their own lag within units; with
serially uncorrelated level errors the slope is -0.5; t of (slope + 0.5) clustered by unit.

Sources: statsmodels OLS of the residuals (computed here in pandas from a statsmodels
dummy-variable or differenced fit) on their lag, with ``sandwich_covariance.cov_cluster``
by unit; a small simulation of panels with AR(1) level errors for the size and power of
the decision, with the residual sums computed in numpy and read by the same function the
fit uses (the fit's SQL sums are checked against numpy on one of those panels).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from statsmodels.stats.sandwich_covariance import cov_cluster

import bigpanel
from bigpanel.errors import InputError
from bigpanel.hypotheses import serial_result
from panel_cases import differences, lsdv, unbalanced_panel, write_parquet

pytestmark = pytest.mark.filterwarnings("ignore::bigpanel.errors.BigpanelWarning")


@pytest.fixture(scope="module")
def panel():
    return unbalanced_panel(seed=31, n_units=60, n_periods=9).sort_values(["unit", "period"]).reset_index(drop=True)


@pytest.fixture(scope="module")
def panel_file(panel, tmp_path_factory):
    return write_parquet(panel, tmp_path_factory.mktemp("serial") / "panel.parquet")


def reference(resid: pd.DataFrame) -> dict:
    """statsmodels: e_t on (1, e_{t-1}) over consecutive periods, clustered by unit. ``resid``
    holds unit, period and the differenced residual e (rows only where it was formed)."""
    r = resid.sort_values(["unit", "period"]).reset_index(drop=True)
    prev = r.groupby("unit").shift(1)
    keep = (r["period"] - prev["period"]) == 1
    e, lag, units = r.loc[keep, "e"].to_numpy(), prev.loc[keep, "e"].to_numpy(), r.loc[keep, "unit"].to_numpy()
    ols = sm.OLS(e, sm.add_constant(lag)).fit()
    se = float(np.sqrt(cov_cluster(ols, pd.factorize(units)[0])[1, 1]))
    return {"coefficient": float(ols.params[1]), "std_error": se, "pairs": int(keep.sum())}


def test_first_difference_serial_test_against_statsmodels(panel, panel_file):
    res = bigpanel.fit(panel_file, "y", "x1, x2", "unit", "period", estimator="first-difference", serial_test=True)
    d = differences(panel, ["x1", "x2", "y"])
    ols = sm.OLS(d["y"], sm.add_constant(d[["x1", "x2"]])).fit()  # the differenced equation with an intercept
    d["e"] = ols.resid
    ref = reference(d)
    sc = res.tests["serial_correlation"]
    assert sc["pairs"] == ref["pairs"]
    assert sc["coefficient"] == pytest.approx(ref["coefficient"], rel=1e-8)
    assert sc["std_error"] == pytest.approx(ref["std_error"], rel=1e-8)
    assert sc["t_stat"] == pytest.approx((ref["coefficient"] + 0.5) / ref["std_error"], rel=1e-8)
    assert sc["df"] == sc["units"] - 1


def test_within_serial_test_against_statsmodels(panel, panel_file):
    res = bigpanel.fit(panel_file, "y", "x1, x2", "unit", "period", serial_test=True)
    model, _ = lsdv(panel, ["x1", "x2"])
    fitted = model.fit()
    level = panel[["unit", "period"]].copy()
    level["e"] = fitted.resid  # the unit effect drops out of the differences
    d = differences(level, ["e"])
    ref = reference(d)
    sc = res.tests["serial_correlation"]
    assert sc["coefficient"] == pytest.approx(ref["coefficient"], rel=1e-8)
    assert sc["std_error"] == pytest.approx(ref["std_error"], rel=1e-8)


def test_serial_test_with_period_effects_against_statsmodels(panel, panel_file):
    # unit and period effects: the period effects' differences leave the residuals too
    res = bigpanel.fit(panel_file, "y", "x1, x2", "unit", "period", effects="unit,period", serial_test=True)
    model, _ = lsdv(panel, ["x1", "x2"], period_dummies=True)
    level = panel[["unit", "period"]].copy()
    level["e"] = model.fit().resid
    ref = reference(differences(level, ["e"]))
    sc = res.tests["serial_correlation"]
    assert sc["coefficient"] == pytest.approx(ref["coefficient"], rel=1e-8)
    assert sc["std_error"] == pytest.approx(ref["std_error"], rel=1e-8)


# ------------------------------------------------------------------ size and power


def ar1_panel(rng, n_units: int, n_periods: int, rho: float) -> pd.DataFrame:
    """y = x + a_i + u_it, u an AR(1) with coefficient rho started from its stationary law."""
    u = np.zeros((n_units, n_periods))
    u[:, 0] = rng.normal(size=n_units) / np.sqrt(1 - rho ** 2)
    for t in range(1, n_periods):
        u[:, t] = rho * u[:, t - 1] + rng.normal(size=n_units)
    x = rng.normal(size=(n_units, n_periods)) + rng.normal(size=(n_units, 1))
    y = x + rng.normal(size=(n_units, 1)) * 2 + u
    return pd.DataFrame({"unit": np.repeat(np.arange(n_units), n_periods), "period": np.tile(np.arange(n_periods), n_units),
                         "x": x.ravel(), "y": y.ravel()})


def numpy_sums(df: pd.DataFrame) -> dict:
    """The sums of serial_pass.sql in numpy: within residuals, differenced, paired with their lag."""
    n_units = df["unit"].nunique()
    shape = (n_units, len(df) // n_units)
    x, y = df["x"].to_numpy().reshape(shape), df["y"].to_numpy().reshape(shape)
    xd, yd = x - x.mean(axis=1, keepdims=True), y - y.mean(axis=1, keepdims=True)
    b = float((xd * yd).sum() / (xd * xd).sum())
    de = np.diff(yd - b * xd, axis=1)
    e, lag = de[:, 1:], de[:, :-1]
    per = {"n": np.full(n_units, e.shape[1], float), "a": lag.sum(1), "b": (lag * lag).sum(1), "c": e.sum(1),
           "d": (lag * e).sum(1), "ee": (e * e).sum(1)}
    out = {"n_groups": n_units} | {f"t_{k}": float(v.sum()) for k, v in per.items()}
    names = ["n", "a", "b", "c", "d"]
    out |= {f"x_{p}_{q}": float((per[p] * per[q]).sum()) for i, p in enumerate(names) for q in names[i:]}
    return out


def test_fit_sums_equal_the_numpy_sums_on_a_simulated_panel(tmp_path):
    df = ar1_panel(np.random.default_rng(5), 30, 7, 0.8)
    res = bigpanel.fit(write_parquet(df, tmp_path / "ar1.parquet"), "y", "x", "unit", "period", serial_test=True)
    ours, mine = res.tests["serial_correlation"], serial_result(numpy_sums(df))
    assert ours["coefficient"] == pytest.approx(mine["coefficient"], rel=1e-9)
    assert ours["std_error"] == pytest.approx(mine["std_error"], rel=1e-8)


def test_size_and_power_in_a_small_simulation():
    # 200 panels of 40 units by 8 periods per rho, within fits, the decision at the 5% level.
    # Measured with this seed: rejections 5.0% at rho = 0 (size; 5% nominal) and 100% at
    # rho = 0.8 (power: the differenced errors then correlate at -(1 - rho)/2 = -0.1, far from
    # -0.5); mean slopes -0.501 and -0.099.
    rng = np.random.default_rng(2026)
    rates = {}
    for rho, slope in ((0.0, -0.5), (0.8, -(1 - 0.8) / 2)):
        results = [serial_result(numpy_sums(ar1_panel(rng, 40, 8, rho))) for _ in range(200)]
        rates[rho] = np.mean([r["p_value"] < 0.05 for r in results])
        assert np.mean([r["coefficient"] for r in results]) == pytest.approx(slope, abs=0.02)
    assert rates[0.0] <= 0.10  # size near 5%: 200 draws put 3 standard errors at about 0.096
    assert rates[0.8] >= 0.95
    assert rates[0.8] > rates[0.0]


def test_serial_test_reading_and_refusals(panel_file):
    res = bigpanel.fit(panel_file, "y", "x1, x2", "unit", "period", serial_test=True)
    sc = res.tests["serial_correlation"]
    assert sc["reading"] and "serial correlation: differenced residuals regressed on their lag" in res.table()
    assert "serial_correlation" not in bigpanel.fit(panel_file, "y", "x1, x2", "unit", "period").tests  # on request
    with pytest.raises(InputError) as err:
        bigpanel.fit(panel_file, "y", "x1, x2", "unit", "period", estimator="pooled", serial_test=True)
    assert str(err.value).startswith("Option 'serial_test' applies to within and first-difference fits, not pooled.")
