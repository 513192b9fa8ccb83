"""Joint Wald tests of linear restrictions (``test=``, ``--test``) and the covariance in the
result.

Sources: statsmodels' ``wald_test`` (statsmodels.base.model.LikelihoodModelResults) given
the same covariance through ``cov_p`` and the restrictions as text, parsed by statsmodels'
own constraint parser (an independent reading of "2*x1 - x2/3 = 0.1"), on a dummy-variable
(LSDV) fit whose slopes equal the within slopes; the t statistic of a single term (a
one-restriction F is t squared, common practice).
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import scipy.stats
import statsmodels.api as sm

import bigpanel
from bigpanel.cli import main
from bigpanel.errors import InputError
from panel_cases import dummies, unbalanced_panel, write_parquet

pytestmark = pytest.mark.filterwarnings("ignore::bigpanel.errors.BigpanelWarning")

TESTS = ["x1 = 0, x2 = 0", "x1 = x2", "2*x1 - x2/3 = 0.1", "-(x2) + 0.5 * x1 = 1 - x1"]


@pytest.fixture(scope="module")
def panel():
    return unbalanced_panel(seed=21, n_units=50, n_periods=6).sort_values(["unit", "period"]).reset_index(drop=True)


@pytest.fixture(scope="module")
def panel_file(panel, tmp_path_factory):
    return write_parquet(panel, tmp_path_factory.mktemp("joint") / "panel.parquet")


def lsdv_results(panel):
    """statsmodels OLS with unit indicators, exog named so that its constraint parser reads x1, x2."""
    exog = pd.concat([panel[["x1", "x2"]].reset_index(drop=True),
                      pd.DataFrame(dummies(panel["unit"], drop_first=False)).add_prefix("u")], axis=1)
    return sm.OLS(panel["y"].reset_index(drop=True), exog).fit()


@pytest.mark.parametrize("variance", ["homoskedastic", "cluster"])
def test_wald_tests_against_statsmodels_wald_test(panel, panel_file, variance):
    res = bigpanel.fit(panel_file, "y", "x1, x2", "unit", "period", variance=variance, test=TESTS)
    ols = lsdv_results(panel)
    assert ols.params["x1"] == pytest.approx(res.coef("x1").estimate, rel=1e-9)
    full = np.zeros((len(ols.params),) * 2)  # the fit's covariance in the slope block
    terms = res.covariance["terms"]
    assert terms == ["x1", "x2"]
    full[:2, :2] = np.array(res.covariance["matrix"])
    for text, ours in zip(TESTS, res.tests["joint"]):
        f = ols.wald_test(text.replace("-(x2)", "-x2"), cov_p=full, use_f=True, scalar=True)
        chi = ols.wald_test(text.replace("-(x2)", "-x2"), cov_p=full, use_f=False, scalar=True)
        assert ours["hypothesis"] == text and ours["unavailable"] == ""
        assert ours["f"] == pytest.approx(float(f.statistic), rel=1e-8), text
        assert ours["chi_square"] == pytest.approx(float(chi.statistic), rel=1e-8), text
        assert ours["p_value_chi_square"] == pytest.approx(float(chi.pvalue), rel=1e-7), text
        q = ours["restrictions"]
        assert ours["df"] == [q, res.variance.df]
        assert ours["p_value"] == pytest.approx(scipy.stats.f.sf(ours["f"], q, res.variance.df), rel=1e-7)
        if variance == "homoskedastic":  # the same residual df: statsmodels' F p-value too
            assert ours["p_value"] == pytest.approx(float(f.pvalue), rel=1e-7), text


def test_covariance_in_json_matches_the_standard_errors(panel_file):
    res = bigpanel.fit(panel_file, "y", "x1, x2", "unit", "period", estimator="pooled")
    out = json.loads(res.to_json())
    cov = np.array(out["covariance"]["matrix"])
    assert out["covariance"]["terms"] == ["x1", "x2", "(intercept)"]
    np.testing.assert_allclose(np.sqrt(np.diag(cov)), [c["std_error"] for c in out["coefficients"]], rtol=1e-12)
    np.testing.assert_allclose(cov, cov.T, rtol=0, atol=0)
    assert np.all(np.linalg.eigvalsh(cov) > 0)


def test_terms_written_as_expressions_and_lags_are_read_whole(panel_file):
    # one restriction on one term: F is that term's t squared (common practice)
    res = bigpanel.fit(panel_file, "y", "x1, lag(x1), ln(1 + x2 * x2)", "unit", "period",
                       test=["lag(x1) = 0", "ln(1 + x2 * x2) = 0", "\"lag(x1)\" = 0, x1 = 0"])
    lag, expr, both = res.tests["joint"]
    assert lag["f"] == pytest.approx(res.coef("lag(x1)").t_stat ** 2, rel=1e-10)
    assert expr["f"] == pytest.approx(res.coef("ln(1 + x2 * x2)").t_stat ** 2, rel=1e-10)
    assert both["restrictions"] == 2 and both["f"] is not None


def test_intercept_can_be_restricted_in_a_pooled_fit_by_its_label(panel_file):
    res = bigpanel.fit(panel_file, "y", "x1, x2", "unit", "period", estimator="pooled", test='"(intercept)" = 0')
    assert res.tests["joint"][0]["f"] == pytest.approx(res.coef("(intercept)").t_stat ** 2, rel=1e-10)


def test_unavailable_tests_say_why(panel_file, panel):
    res = bigpanel.fit(panel_file, "y", "x1, x2, region", "unit", "period",
                       test=["region = 0", "x1 = 0, 2*x1 = 0", "x1 = 0, x2 = 0"])
    dropped, repeated, fine = res.tests["joint"]
    assert dropped["f"] is None and "region (no variation within units)" in dropped["unavailable"]
    assert repeated["f"] is None and "repeat or contradict" in repeated["unavailable"]
    assert fine["f"] is not None
    # two clusters give a variance of rank 1: no joint test of two restrictions
    two = panel[panel["region"].isin(panel["region"].unique()[:2])]
    few = bigpanel.fit(two, "y", "x1, x2", "unit", "period", cluster="region", test="x1 = 0, x2 = 0")
    assert few.tests["joint"][0]["f"] is None and "rank at most 1" in few.tests["joint"][0]["unavailable"]
    text = res.table()
    assert "  test      region = 0\n            not available (terms left out of the fit: region" in text


@pytest.mark.parametrize("test, message", [
    ("nosuch = 0", "Test 'nosuch = 0' names 'nosuch', which is neither a number nor a term of the model."),
    ("x1 * x2 = 0", "Test 'x1 * x2 = 0' is not linear in the terms"),
    ("x1 > 0", "Test 'x1 > 0' has a part that is not an equation."),
    ("x1 = 0; DROP TABLE t", "Test 'x1 = 0; DROP TABLE t' is not valid SQL"),
    ("1 = 1", "Test '1 = 1' has a restriction without a term"),
    ("x1 / 0 = 1", "Test 'x1 / 0 = 1' divides by zero."),
])
def test_bad_restrictions_are_one_sentence_before_any_scan(panel_file, test, message):
    with pytest.raises(InputError) as err:
        bigpanel.fit(panel_file, "y", "x1, x2", "unit", "period", test=test)
    assert str(err.value).startswith(message)


def test_cli_takes_repeated_tests(panel_file, capsys):
    code = main(["fit", panel_file, "--outcome", "y", "--regressors", "x1, x2", "--unit", "unit", "--period", "period",
                 "--test", "x1 = 0", "--test", "x1 = 0, x2 = 0", "--json"])
    out, err = capsys.readouterr()
    assert code == 0, err
    joint = json.loads(out)["tests"]["joint"]
    assert [j["hypothesis"] for j in joint] == ["x1 = 0", "x1 = 0, x2 = 0"]
    code = main(["fit", panel_file, "--outcome", "y", "--regressors", "x1, x2", "--unit", "unit", "--period", "period",
                 "--test", "x1 = 0, x2 = 0"])
    out, _ = capsys.readouterr()
    lines = out.splitlines()
    at = next(i for i, line in enumerate(lines) if line == "  test      x1 = 0, x2 = 0")
    assert lines[at + 1].startswith("            F = ")
    assert at > next(i for i, line in enumerate(lines) if line.startswith("  x2 "))  # below the coefficients


def test_fit_many_models_and_spec_keys_take_tests(panel_file):
    # the parameter table gives fit_many (and spec files) the same key: a shared-scan model's
    # test equals its own fit's (sums in another order: agreement to rounding)
    alone = bigpanel.fit(panel_file, "y", "x1, x2", "unit", "period", test="x1 = 2*x2")
    many = bigpanel.fit_many(panel_file, [dict(outcome="y", regressors="x1, x2", test=["x1 = 2*x2"]),
                                          dict(outcome="y", regressors="x1", estimator="pooled")], "unit", "period")
    assert many[0].tests["joint"][0]["f"] == pytest.approx(alone.tests["joint"][0]["f"], rel=1e-9)
    assert "joint" not in many[1].tests
