"""bigpanel.fit against dense statsmodels OLS on small unbalanced panels with gaps.

Reference: statsmodels OLS with indicator columns (LSDV) or on differences computed in
pandas (tests/panel_cases.py); robust variances from statsmodels' sandwich_covariance
module (cov_hc1, cov_cluster, cov_cluster_2groups) applied to the plain OLS fit.
Slopes agree to 1e-9 relative (1e-10 for the two-way effects design); standard errors
to 1e-8 once the small-sample factors are matched: statsmodels counts every dummy
column in K, bigpanel follows ESTIMATION.md (unit effects nested in the clusters do
not count in CR1's K'), so each test computes both factors from N, K and G and
rescales.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from statsmodels.stats import sandwich_covariance as sw

import bigpanel
from panel_cases import codes, cr1_factor, differences, lsdv, unbalanced_panel, write_parquet

pytestmark = pytest.mark.filterwarnings("ignore::bigpanel.errors.BigpanelWarning")

SLOPE_RTOL = 1e-9  # the bar for slopes against the dense solve
SE_RTOL = 1e-8  # the bar for standard errors with matched factors
TWO_EFFECTS_RTOL = 1e-10  # the bar for unit+period effects against LSDV
REGRESSORS = ["x1", "x2"]


@pytest.fixture(scope="module", params=[(11, 25, 6), (12, 40, 9), (13, 14, 4)], ids=lambda p: f"seed{p[0]}-{p[1]}u-{p[2]}t")
def panel(request, tmp_path_factory):
    """An unbalanced panel with gaps (seeded here), and its Parquet file."""
    seed, n_units, n_periods = request.param
    df = unbalanced_panel(seed, n_units, n_periods)
    path = write_parquet(df, tmp_path_factory.mktemp("lsdv") / "panel.parquet")
    return df, path


def ours(result, terms=REGRESSORS):
    est = np.array([result.coef(t).estimate for t in terms])
    se = np.array([result.coef(t).std_error for t in terms])
    return est, se


def std_errors(vcov):
    return np.sqrt(np.diag(vcov))


# ------------------------------------------------------------------ within, one-way


def test_within_iid_matches_lsdv(panel):
    # Source: statsmodels OLS on x1, x2 and one indicator per unit (LSDV).
    df, path = panel
    model, k_dense = lsdv(df, REGRESSORS)
    ref = model.fit()
    res = bigpanel.fit(path, "y", REGRESSORS, "unit", "period", variance="homoskedastic")
    est, se = ours(res)
    np.testing.assert_allclose(est, ref.params[:2], rtol=SLOPE_RTOL)
    # homoskedastic: s^2 = RSS/(N - K - absorbed) here, RSS/(N - K_dense) in statsmodels: the same
    # number because K_dense = K + units; computed explicitly all the same.
    n, g = len(df), df["unit"].nunique()
    ratio = (n - k_dense) / (n - len(REGRESSORS) - g)
    np.testing.assert_allclose(se, ref.bse[:2] * np.sqrt(ratio), rtol=SE_RTOL)
    assert res.n_obs == n and res.n_units == g
    assert res.variance.df == n - len(REGRESSORS) - g


def test_within_hc1_matches_lsdv(panel):
    # Source: statsmodels OLS (LSDV) and sandwich_covariance.cov_hc1. By
    # Frisch-Waugh-Lovell the slope block of the dense HC0 sandwich equals the within
    # one; HC1 multiplies by N/(N - K_dense) there and by N/(N - K - absorbed) here.
    df, path = panel
    model, k_dense = lsdv(df, REGRESSORS)
    ref = model.fit()
    ref_se = std_errors(sw.cov_hc1(ref))
    res = bigpanel.fit(path, "y", REGRESSORS, "unit", "period", variance="hc1")
    est, se = ours(res)
    np.testing.assert_allclose(est, ref.params[:2], rtol=SLOPE_RTOL)
    n, g = len(df), df["unit"].nunique()
    ours_factor = n / (n - len(REGRESSORS) - g)
    sm_factor = n / (n - k_dense)
    np.testing.assert_allclose(se, ref_se[:2] * np.sqrt(ours_factor / sm_factor), rtol=SE_RTOL)
    assert res.variance.small_sample_factors[0] == pytest.approx(ours_factor, rel=1e-14)


def test_within_cr1_unit_clusters_matches_lsdv(panel):
    # Source: statsmodels OLS (LSDV) and sandwich_covariance.cov_cluster with
    # use_correction=True (CR1 with K_dense, every dummy counted); ESTIMATION.md /
    # Cameron and Miller (2015): unit effects nested in unit clusters do not count in K'.
    df, path = panel
    model, k_dense = lsdv(df, REGRESSORS)
    ref = model.fit()
    ref_se = std_errors(sw.cov_cluster(ref, codes(df["unit"]), use_correction=True))
    res = bigpanel.fit(path, "y", REGRESSORS, "unit", "period", variance="cluster", cluster="unit")
    est, se = ours(res)
    np.testing.assert_allclose(est, ref.params[:2], rtol=SLOPE_RTOL)
    n, g = len(df), df["unit"].nunique()
    ours_factor = cr1_factor(g, n, len(REGRESSORS))
    sm_factor = cr1_factor(g, n, k_dense)
    np.testing.assert_allclose(se, ref_se[:2] * np.sqrt(ours_factor / sm_factor), rtol=SE_RTOL)
    assert res.variance.n_clusters == (g,)
    assert res.variance.df == g - 1
    assert res.variance.small_sample_factors[0] == pytest.approx(ours_factor, rel=1e-14)


def test_within_cr1_clusters_across_units_matches_lsdv(panel):
    # Source: statsmodels OLS (LSDV), sandwich_covariance.cov_cluster
    # (use_correction=True) on a column that varies within units ("shift"): the unit
    # effects are not nested in these clusters, so K' counts them (ESTIMATION.md) and
    # both factors use K + units.
    df, path = panel
    model, k_dense = lsdv(df, REGRESSORS)
    ref = model.fit()
    ref_se = std_errors(sw.cov_cluster(ref, codes(df["shift"]), use_correction=True))
    res = bigpanel.fit(path, "y", REGRESSORS, "unit", "period", variance="cluster", cluster="shift")
    est, se = ours(res)
    np.testing.assert_allclose(est, ref.params[:2], rtol=SLOPE_RTOL)
    n, g_units, g = len(df), df["unit"].nunique(), df["shift"].nunique()
    ours_factor = cr1_factor(g, n, len(REGRESSORS) + g_units)
    sm_factor = cr1_factor(g, n, k_dense)
    np.testing.assert_allclose(se, ref_se[:2] * np.sqrt(ours_factor / sm_factor), rtol=SE_RTOL)
    assert res.variance.n_clusters == (g,)


def test_within_cr1_clusters_nesting_units_matches_lsdv(panel):
    # Source: statsmodels OLS (LSDV), sandwich_covariance.cov_cluster
    # (use_correction=True) on "region", a group of units: every unit lies inside one
    # region, so the unit effects are nested in the clusters and do not count in K'
    # (Cameron and Miller 2015, as ESTIMATION.md states).
    df, path = panel
    model, k_dense = lsdv(df, REGRESSORS)
    ref = model.fit()
    ref_se = std_errors(sw.cov_cluster(ref, codes(df["region"]), use_correction=True))
    res = bigpanel.fit(path, "y", REGRESSORS, "unit", "period", variance="cluster", cluster="region")
    est, se = ours(res)
    np.testing.assert_allclose(est, ref.params[:2], rtol=SLOPE_RTOL)
    n, g = len(df), df["region"].nunique()
    ours_factor = cr1_factor(g, n, len(REGRESSORS))
    sm_factor = cr1_factor(g, n, k_dense)
    assert res.variance.small_sample_factors[0] == pytest.approx(ours_factor, rel=1e-12)
    np.testing.assert_allclose(se, ref_se[:2] * np.sqrt(ours_factor / sm_factor), rtol=SE_RTOL)


def test_within_two_way_clusters_matches_statsmodels(panel):
    # Source: statsmodels OLS (LSDV) and sandwich_covariance.cov_cluster with
    # use_correction=False for each grouping (Cameron, Gelbach and Miller 2011:
    # V_unit + V_period - V_intersection), each times its own G/(G-1) and one (N-1)/(N-K')
    # for all three components (ESTIMATION.md): K' = the slope terms, since the unit
    # effects are nested in the unit clusters (one of the two dimensions).
    df, path = panel
    model, k_dense = lsdv(df, REGRESSORS)
    unit_codes, period_codes = codes(df["unit"]), codes(df["period"])
    ref = model.fit()
    res = bigpanel.fit(path, "y", REGRESSORS, "unit", "period", variance="cluster", cluster=["unit", "period"])
    est, se = ours(res)
    np.testing.assert_allclose(est, ref.params[:2], rtol=SLOPE_RTOL)
    n, k = len(df), len(REGRESSORS)
    cell_codes = codes(df["unit"].astype(str) + "/" + df["period"].astype(str))
    g_unit, g_period = df["unit"].nunique(), df["period"].nunique()
    g_cell = len(df[["unit", "period"]].drop_duplicates())
    factors = [cr1_factor(g_unit, n, k), cr1_factor(g_period, n, k), cr1_factor(g_cell, n, k)]
    parts = [sw.cov_cluster(ref, c, use_correction=False)[:2, :2] for c in (unit_codes, period_codes, cell_codes)]
    expected = factors[0] * parts[0] + factors[1] * parts[1] - factors[2] * parts[2]
    # ESTIMATION.md: a two-way variance that is not positive semi-definite has its
    # negative eigenvalues set to zero, and the result says so (the 4-period panel).
    eigval, eigvec = np.linalg.eigh(expected)
    clipped = int(np.sum(eigval < 0))
    expected = (eigvec * np.clip(eigval, 0, None)) @ eigvec.T
    np.testing.assert_allclose(se, np.sqrt(np.diag(expected)), rtol=SE_RTOL)
    assert any("negative eigenvalue" in w for w in res.warnings) == bool(clipped)
    assert res.variance.n_clusters == (g_unit, g_period, g_cell)
    np.testing.assert_allclose(res.variance.small_sample_factors, factors, rtol=1e-12)
    assert res.variance.df == min(g_unit, g_period) - 1


# ------------------------------------------------------------------ within, two-way effects


def test_within_unit_and_period_effects_matches_lsdv(panel):
    # Source: statsmodels OLS with one indicator per unit and per period but the first
    # (LSDV with both sets), on an unbalanced panel with gaps.
    df, path = panel
    model, k_dense = lsdv(df, REGRESSORS, period_dummies=True)
    ref = model.fit()
    res = bigpanel.fit(path, "y", REGRESSORS, "unit", "period", effects="unit,period", variance="homoskedastic")
    est, se = ours(res)
    np.testing.assert_allclose(est, ref.params[:2], rtol=TWO_EFFECTS_RTOL)
    # homoskedastic with every effect level counted on both sides: the factors agree.
    np.testing.assert_allclose(se, ref.bse[:2], rtol=SE_RTOL)
    assert [c.term for c in res.coefficients] == REGRESSORS  # period effects are not reported


def test_within_unit_and_period_effects_cr1_matches_lsdv(panel):
    # Source: statsmodels OLS (LSDV, both sets), sandwich_covariance.cov_cluster
    # (use_correction=True) by unit. K' here counts the slopes and the period
    # indicators, not the unit effects (nested).
    df, path = panel
    model, k_dense = lsdv(df, REGRESSORS, period_dummies=True)
    ref = model.fit()
    ref_se = std_errors(sw.cov_cluster(ref, codes(df["unit"]), use_correction=True))
    res = bigpanel.fit(path, "y", REGRESSORS, "unit", "period", effects=["unit", "period"])
    est, se = ours(res)
    np.testing.assert_allclose(est, ref.params[:2], rtol=TWO_EFFECTS_RTOL)
    n, g, t = len(df), df["unit"].nunique(), df["period"].nunique()
    ours_factor = cr1_factor(g, n, len(REGRESSORS) + t - 1)
    sm_factor = cr1_factor(g, n, k_dense)
    np.testing.assert_allclose(se, ref_se[:2] * np.sqrt(ours_factor / sm_factor), rtol=SE_RTOL)


# ------------------------------------------------------------------ pooled


@pytest.mark.parametrize("se", ["homoskedastic", "hc1", "cluster"])
def test_pooled_matches_ols_with_constant(panel, se):
    # Source: statsmodels OLS with a constant (plain pooled least squares): homoskedastic errors
    # from its bse, hc1 and cluster from sandwich_covariance.cov_hc1 and cov_cluster
    # (use_correction=True); no effects are absorbed, so K is the same on both sides and
    # the factors agree.
    df, path = panel
    model, _ = lsdv(df, REGRESSORS, unit_dummies=False, constant=True)
    ref = model.fit()
    ref_se = {
        "homoskedastic": ref.bse,
        "hc1": std_errors(sw.cov_hc1(ref)),
        "cluster": std_errors(sw.cov_cluster(ref, codes(df["unit"]), use_correction=True)),
    }[se]
    res = bigpanel.fit(path, "y", REGRESSORS, "unit", "period", estimator="pooled", variance=se)
    terms = REGRESSORS + ["(intercept)"]
    est, errs = ours(res, terms)
    np.testing.assert_allclose(est, ref.params, rtol=SLOPE_RTOL)
    np.testing.assert_allclose(errs, ref_se, rtol=SE_RTOL)
    assert res.n_obs == len(df)


# ------------------------------------------------------------------ first differences


def test_first_difference_matches_ols_on_differences(panel):
    # Source: statsmodels OLS with a constant on differences computed by hand in pandas
    # (consecutive periods only), cluster-robust by unit through
    # sandwich_covariance.cov_cluster (use_correction=True). K = slopes + constant on both
    # sides; G = units with at least one difference.
    df, path = panel
    d = differences(df, ["y", *REGRESSORS])
    x = sm.add_constant(d[REGRESSORS].to_numpy(), prepend=False)
    ref = sm.OLS(d["y"].to_numpy(), x).fit()
    ref_se = std_errors(sw.cov_cluster(ref, codes(d["unit"]), use_correction=True))
    res = bigpanel.fit(path, "y", REGRESSORS, "unit", "period", estimator="first-difference")
    terms = REGRESSORS + ["(intercept)"]
    est, se = ours(res, terms)
    np.testing.assert_allclose(est, ref.params, rtol=SLOPE_RTOL)
    n, g = len(d), d["unit"].nunique()
    ratio = cr1_factor(g, n, len(terms)) / cr1_factor(g, n, x.shape[1])
    np.testing.assert_allclose(se, ref_se * np.sqrt(ratio), rtol=SE_RTOL)
    assert res.n_obs == n
    assert res.variance.n_clusters == (g,)


def test_first_difference_iid_matches_ols_on_differences(panel):
    # Source: statsmodels OLS with a constant on hand-made differences, homoskedastic errors.
    df, path = panel
    d = differences(df, ["y", *REGRESSORS])
    ref = sm.OLS(d["y"].to_numpy(), sm.add_constant(d[REGRESSORS].to_numpy(), prepend=False)).fit()
    res = bigpanel.fit(path, "y", REGRESSORS, "unit", "period", estimator="first-difference", variance="homoskedastic")
    est, se = ours(res, REGRESSORS + ["(intercept)"])
    np.testing.assert_allclose(est, ref.params, rtol=SLOPE_RTOL)
    np.testing.assert_allclose(se, ref.bse, rtol=SE_RTOL)


def test_first_difference_with_period_effects_matches_ols(panel):
    # Source: statsmodels OLS on hand-made differences with a constant and one
    # indicator per differenced period but the first (period intercepts in the
    # differenced equation), cluster-robust by unit through
    # sandwich_covariance.cov_cluster (use_correction=True); K counts the indicators on
    # both sides.
    df, path = panel
    d = differences(df, ["y", *REGRESSORS])
    periods = pd.get_dummies(d["period"], drop_first=True, dtype=float).to_numpy()
    x = np.column_stack([d[REGRESSORS].to_numpy(), np.ones(len(d)), periods])
    ref = sm.OLS(d["y"].to_numpy(), x).fit()
    ref_se = std_errors(sw.cov_cluster(ref, codes(d["unit"]), use_correction=True))
    res = bigpanel.fit(path, "y", REGRESSORS, "unit", "period", estimator="first-difference", effects="period")
    est, se = ours(res)
    np.testing.assert_allclose(est, ref.params[:2], rtol=SLOPE_RTOL)
    np.testing.assert_allclose(se, ref_se[:2], rtol=SE_RTOL)  # same K, N, G: same factor
    assert res.n_obs == len(d)
