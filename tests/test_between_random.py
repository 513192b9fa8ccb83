"""Between and random-effects fits, and the tests a random-effects fit reports.

Sources: Baltagi, Econometric Analysis of Panel Data, Table 2.1 (Grunfeld data from
statsmodels.datasets.grunfeld, Baltagi's 10 firms: American Steel left out; values in
reference_values.py, from memory); numpy generalized least squares on the quasi-demeaned
rows with the unbalanced Swamy-Arora components computed here from dummy matrices
(Baltagi, section 9.2, from memory); statsmodels OLS and its sandwich_covariance functions
for the robust variances; numpy for the Hausman statistic from the two fits' coefficients
and covariances.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import scipy.stats
import statsmodels.api as sm
import statsmodels.datasets.grunfeld
from statsmodels.stats.sandwich_covariance import cov_cluster, cov_hc1

import bigpanel
import reference_values as ref
from bigpanel.errors import InputError
from panel_cases import unbalanced_panel, write_parquet

pytestmark = pytest.mark.filterwarnings("ignore::bigpanel.errors.BigpanelWarning")


@pytest.fixture(scope="module")
def grunfeld_file(tmp_path_factory):
    df = statsmodels.datasets.grunfeld.load_pandas().data
    df = df[df["firm"] != "American Steel"].copy()  # Baltagi's 10 firms
    df["year"] = df["year"].astype("int64")
    return write_parquet(df, tmp_path_factory.mktemp("grunfeld") / "grunfeld.parquet")


@pytest.fixture(scope="module")
def panel():
    df = unbalanced_panel(seed=12, n_units=60, n_periods=8)
    return df.sort_values(["unit", "period"]).reset_index(drop=True)


@pytest.fixture(scope="module")
def panel_file(panel, tmp_path_factory):
    return write_parquet(panel, tmp_path_factory.mktemp("re") / "panel.parquet")


def shown(value: float, decimals: int) -> float:
    return round(value, decimals)


# ------------------------------------------------------------------ Baltagi Table 2.1


def test_grunfeld_between_matches_baltagi_table_2_1(grunfeld_file):
    # Baltagi, Table 2.1, between row (from memory), homoskedastic errors over the 10 firm means.
    res = bigpanel.fit(grunfeld_file, "invest", "value, capital", "firm", "year", estimator="between")
    assert res.variance.type == "homoskedastic" and res.variance.df == 10 - 3
    for term, (estimate, std_error) in ref.GRUNFELD_BETWEEN.items():
        c = res.coef(term)
        assert shown(c.estimate, ref.GRUNFELD_TABLE_DECIMALS) == pytest.approx(estimate, abs=1e-12), term
        assert shown(c.std_error, ref.GRUNFELD_TABLE_DECIMALS) == pytest.approx(std_error, abs=1e-12), term


def test_grunfeld_swamy_arora_matches_baltagi_table_2_1(grunfeld_file):
    # Baltagi, Table 2.1, Swamy-Arora row (from memory): slopes, standard errors, sigma_u, sigma_e.
    res = bigpanel.fit(grunfeld_file, "invest", "value, capital", "firm", "year", estimator="random-effects",
                       variance="homoskedastic")
    for term, (estimate, std_error) in ref.GRUNFELD_SWAMY_ARORA.items():
        c = res.coef(term)
        assert shown(c.estimate, ref.GRUNFELD_TABLE_DECIMALS) == pytest.approx(estimate, abs=1e-12), term
        assert shown(c.std_error, ref.GRUNFELD_TABLE_DECIMALS) == pytest.approx(std_error, abs=1e-12), term
    for key, value in ref.GRUNFELD_SWAMY_ARORA_SIGMA.items():
        assert shown(res.error_components[key], ref.GRUNFELD_SIGMA_DECIMALS) == pytest.approx(value, abs=1e-12), key
    # balanced: one theta for every firm
    assert res.error_components["theta_min"] == pytest.approx(res.error_components["theta_max"], rel=1e-14)


def test_between_robust_variances_against_statsmodels(grunfeld_file):
    # statsmodels OLS on the firm means; HC1 through sandwich_covariance.cov_hc1, and the unit
    # clusters (one observation per cluster) through cov_cluster.
    df = pd.read_parquet(grunfeld_file)
    means = df.groupby("firm")[["invest", "value", "capital"]].mean()
    ols = sm.OLS(means["invest"].to_numpy(), sm.add_constant(means[["value", "capital"]].to_numpy())).fit()
    hc1 = bigpanel.fit(grunfeld_file, "invest", "value, capital", "firm", "year", estimator="between", variance="hc1")
    cl = bigpanel.fit(grunfeld_file, "invest", "value, capital", "firm", "year", estimator="between", variance="cluster")
    order = ["(intercept)", "value", "capital"]
    ref_hc1 = np.sqrt(np.diag(cov_hc1(ols)))
    ref_cl = np.sqrt(np.diag(cov_cluster(ols, np.arange(len(means)))))
    for i, term in enumerate(order):
        assert hc1.coef(term).estimate == pytest.approx(ols.params[i], rel=1e-10)
        assert hc1.coef(term).std_error == pytest.approx(ref_hc1[i], rel=1e-9)
        assert cl.coef(term).std_error == pytest.approx(ref_cl[i], rel=1e-9)
    assert cl.variance.df == len(means) - 1


# ------------------------------------------------------------------ random effects against numpy


def swamy_arora(df: pd.DataFrame, xs: list[str], y: str, unit: str) -> dict:
    """Unbalanced Swamy-Arora components and GLS from rows, with dense dummy matrices."""
    n = len(df)
    codes, units = pd.factorize(df[unit])
    d = np.zeros((n, len(units)))
    d[np.arange(n), codes] = 1.0
    sizes = d.sum(axis=0)
    p = d @ np.diag(1 / sizes) @ d.T  # projection on unit means
    q = np.eye(n) - p
    x = df[xs].to_numpy(float)
    yy = df[y].to_numpy(float)
    varying = [j for j in range(len(xs)) if np.sum((q @ x[:, j]) ** 2) > 1e-9 * np.sum(x[:, j] ** 2)]
    xw = q @ x[:, varying]
    bw = np.linalg.lstsq(xw, q @ yy, rcond=None)[0]
    rw = q @ yy - xw @ bw
    s_e2 = rw @ rw / (n - len(units) - len(varying))
    z = np.c_[x, np.ones(n)]
    bb = np.linalg.lstsq(p @ z, p @ yy, rcond=None)[0]
    ub = p @ yy - p @ z @ bb
    zp = z.T @ p @ z
    zu = z.T @ d @ d.T @ z
    s_u2 = (ub @ ub - (len(units) - z.shape[1]) * s_e2) / (n - np.trace(np.linalg.solve(zp, zu)))
    theta = (1 - np.sqrt(s_e2 / (sizes * s_u2 + s_e2)))[codes]
    means = p @ np.c_[z, yy]
    star = np.c_[z, yy] - theta[:, None] * means
    return {"s_e2": s_e2, "s_u2": s_u2, "theta": theta, "zs": star[:, :-1], "ys": star[:, -1], "codes": codes,
            "bw": bw, "vw": s_e2 * np.linalg.inv(xw.T @ xw), "varying": varying, "means": means[:, :-2]}


def test_random_effects_against_numpy_gls_on_an_unbalanced_panel(panel, panel_file):
    # numpy GLS on rows quasi-demeaned with a per-unit theta (unequal unit sizes), the
    # components from the unbalanced Swamy-Arora formulas on dummy matrices; region is
    # constant within units (kept by random effects, left out of within).
    xs = ["x1", "x2", "region"]
    sa = swamy_arora(panel, xs, "y", "unit")
    gls = sm.OLS(sa["ys"], sa["zs"]).fit()
    homo = bigpanel.fit(panel_file, "y", xs, "unit", "period", estimator="random-effects", variance="homoskedastic")
    clus = bigpanel.fit(panel_file, "y", xs, "unit", "period", estimator="random-effects")
    assert homo.error_components["sigma_e"] == pytest.approx(np.sqrt(sa["s_e2"]), rel=1e-9)
    assert homo.error_components["sigma_u"] == pytest.approx(np.sqrt(sa["s_u2"]), rel=1e-9)
    assert homo.error_components["theta_min"] == pytest.approx(sa["theta"].min(), rel=1e-9)
    assert homo.error_components["theta_max"] == pytest.approx(sa["theta"].max(), rel=1e-9)
    assert sa["theta"].min() < sa["theta"].max()  # unbalanced: thetas differ
    v_homo = sa["s_e2"] * np.linalg.inv(sa["zs"].T @ sa["zs"])
    v_clus = cov_cluster(gls, sa["codes"])  # CR1: G/(G-1) (N-1)/(N-K)
    for i, term in enumerate(xs + ["(intercept)"]):
        assert homo.coef(term).estimate == pytest.approx(gls.params[i], rel=1e-9, abs=1e-10)
        assert homo.coef(term).std_error == pytest.approx(np.sqrt(v_homo[i, i]), rel=1e-9)
        assert clus.coef(term).std_error == pytest.approx(np.sqrt(v_clus[i, i]), rel=1e-9)
    cov = np.array(clus.covariance["matrix"])
    order = [clus.covariance["terms"].index(t) for t in xs + ["(intercept)"]]
    np.testing.assert_allclose(cov[np.ix_(order, order)], v_clus, rtol=1e-8, atol=1e-12)
    assert clus.variance.df == panel["unit"].nunique() - 1


def test_hausman_against_numpy_from_the_two_fits(panel_file):
    # numpy: H = d'(V_W - V_RE)^-1 d from the within and random-effects fits' coefficients and
    # covariances (both homoskedastic: the within s^2 is the random-effects sigma_e^2).
    xs = ["x1", "x2", "region"]
    within = bigpanel.fit(panel_file, "y", xs, "unit", "period", variance="homoskedastic")
    random = bigpanel.fit(panel_file, "y", xs, "unit", "period", estimator="random-effects", variance="homoskedastic")
    common = ["x1", "x2"]  # region does not vary within units
    h = random.tests["hausman"]
    assert h["terms"] == common and h["df"] == 2
    d = np.array([within.coef(t).estimate - random.coef(t).estimate for t in common])
    vw, vr = (np.array(r.covariance["matrix"])[np.ix_(*[[r.covariance["terms"].index(t) for t in common]] * 2)]
              for r in (within, random))
    stat = float(d @ np.linalg.solve(vw - vr, d))
    assert h["statistic"] == pytest.approx(stat, rel=1e-7)
    assert h["p_value"] == pytest.approx(scipy.stats.chi2.sf(stat, 2), rel=1e-7)
    assert stat > 10  # x1 is built correlated with the unit effect: random effects is rejected
    # with homoskedastic errors the unit-means (correlated random effects) test is the same statistic
    assert random.tests["unit_means"]["chi_square"] == pytest.approx(stat, rel=1e-7)


def test_unit_means_test_with_clusters_against_statsmodels(panel, panel_file):
    # the correlated random-effects regression: quasi-demeaned rows with the unit means of the
    # time-varying terms added; statsmodels OLS with cov_cluster by unit; Wald chi-square of the means.
    xs = ["x1", "x2", "region"]
    sa = swamy_arora(panel, xs, "y", "unit")
    theta = sa["theta"]
    means = sa["means"][:, sa["varying"]] * (1 - theta)[:, None]  # a unit-constant column, quasi-demeaned
    zs = np.c_[sa["zs"][:, :-1], means, sa["zs"][:, -1]]
    ols = sm.OLS(sa["ys"], zs).fit()
    v = cov_cluster(ols, sa["codes"])
    block = [3, 4]
    b = ols.params[block]
    chi2 = float(b @ np.linalg.solve(v[np.ix_(block, block)], b))
    res = bigpanel.fit(panel_file, "y", xs, "unit", "period", estimator="random-effects")
    m = res.tests["unit_means"]
    assert m["variance"] == "cluster" and m["terms"] == ["x1", "x2"]
    assert m["chi_square"] == pytest.approx(chi2, rel=1e-7)
    g = panel["unit"].nunique()
    assert m["df"] == [2, g - 1]
    assert m["p_value"] == pytest.approx(scipy.stats.f.sf(chi2 / 2, 2, g - 1), rel=1e-7)
    # the correlated random-effects slopes on x1, x2 are the within slopes (a known identity)
    within = bigpanel.fit(panel_file, "y", ["x1", "x2"], "unit", "period")
    assert ols.params[0] == pytest.approx(within.coef("x1").estimate, rel=1e-9)


def test_random_effects_needs_at_most_one_more_scan_than_within(panel_file):
    # the promise, counted by the executor: within with unit clusters takes its meat
    # from the first pass; random effects adds one scan for its unit scores.
    within = bigpanel.fit_many(panel_file, [{"outcome": "y", "regressors": "x1, x2"}], "unit", "period")
    random = bigpanel.fit_many(panel_file, [{"outcome": "y", "regressors": "x1, x2", "estimator": "random-effects"}],
                               "unit", "period")
    assert random.scans <= within.scans + 1
    assert random[0].tests["unit_means"]["f"] is not None


def test_random_effects_text_and_json(panel_file):
    res = bigpanel.fit(panel_file, "y", "x1, x2", "unit", "period", estimator="random-effects")
    text = res.table()
    assert "Random effects" in text and "theta from" in text and "Hausman" in text and "unit means" in text
    out = res.to_dict()
    assert set(out["error_components"]) >= {"sigma_u", "sigma_e", "theta_min", "theta_max"}
    assert set(out["tests"]) == {"hausman", "unit_means"}
    assert any("unit effect" in c and "unrelated" in c for c in out["cautions"])


@pytest.mark.parametrize("kwargs, message", [
    ({"effects": "unit"}, "Option 'effects' is given for the random-effects estimator"),
    ({"variance": "hc1"}, "The random-effects estimator takes variance homoskedastic or cluster"),
    ({"cluster": "region"}, "The random-effects estimator takes variance homoskedastic or cluster"),
    ({"intercept": False}, "Option 'intercept' cannot be dropped for the random-effects estimator"),
])
def test_random_effects_refuses_what_it_cannot_do(panel_file, kwargs, message):
    with pytest.raises(InputError) as err:
        bigpanel.fit(panel_file, "y", "x1, x2", "unit", "period", estimator="random-effects", **kwargs)
    assert str(err.value).startswith(message)
