"""Trap panels for bigpanel.fit: large offsets, near and exact collinearity, terms without
variation within units, singletons, T = 2, and bitwise reproducibility.

References: statsmodels OLS with indicator columns (LSDV), the same fit on transformed
data, or a standard identity ("common practice"), named at each check.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import bigpanel
import bigpanel.moments
from bigpanel.errors import DroppedTermsWarning
from panel_cases import lsdv, unbalanced_panel, write_parquet, write_parquet_parts

pytestmark = pytest.mark.filterwarnings("ignore::bigpanel.errors.BigpanelWarning")

EPS = np.finfo(float).eps
REGRESSORS = ["x1", "x2"]


@pytest.fixture(scope="module")
def base_panel():
    """A 30-unit, 7-period unbalanced panel with gaps (seeded here)."""
    return unbalanced_panel(seed=21, n_units=30, n_periods=7)


def slopes(result, terms=REGRESSORS):
    return np.array([result.coef(t).estimate for t in terms])


def errors(result, terms=REGRESSORS):
    return np.array([result.coef(t).std_error for t in terms])


# ------------------------------------------------------------------ large offsets


@pytest.mark.parametrize("estimator", ["within", "first-difference", "pooled"])
def test_large_offsets_leave_slopes_unchanged(base_panel, tmp_path, estimator):
    # Source: common practice (adding a constant to every column changes no slope of a
    # model with unit effects, differences or an intercept); ESTIMATION.md measures
    # what a one-pass formula loses here. Bar from the issue: 1e-9 relative at 1e6.
    plain = write_parquet(base_panel, tmp_path / "plain.parquet")
    shifted = base_panel.copy()
    for c in ["y", "x1", "x2"]:
        shifted[c] = shifted[c] + 1e6
    far = write_parquet(shifted, tmp_path / "offset.parquet")
    a = bigpanel.fit(plain, "y", REGRESSORS, "unit", "period", estimator=estimator)
    b = bigpanel.fit(far, "y", REGRESSORS, "unit", "period", estimator=estimator)
    np.testing.assert_allclose(slopes(b), slopes(a), rtol=1e-9)
    np.testing.assert_allclose(errors(b), errors(a), rtol=1e-7)


# ------------------------------------------------------------------ collinearity


def test_near_collinear_terms_match_lsdv_within_condition_bound(base_panel, tmp_path):
    # Source: statsmodels OLS with unit indicators (LSDV). x3 = x1 + 1e-4 * noise makes
    # the within cross-product's scaled condition number ~1e9; solving normal equations
    # loses about cond * eps relative, so the bar is 64 * cond * eps (64: a margin for
    # the summation error of the cross-products, a few hundred rows).
    rng = np.random.default_rng(22)
    df = base_panel.copy()
    df["x3"] = df["x1"] + 1e-4 * rng.normal(size=len(df))
    path = write_parquet(df, tmp_path / "near.parquet")
    terms = ["x1", "x2", "x3"]
    res = bigpanel.fit(path, "y", terms, "unit", "period", variance="homoskedastic")
    assert not res.terms_dropped
    model, _ = lsdv(df, terms)
    ref = model.fit()
    demeaned = df[terms] - df.groupby("unit")[terms].transform("mean")
    h = demeaned.to_numpy().T @ demeaned.to_numpy()
    d = 1 / np.sqrt(np.diag(h))
    cond = np.linalg.cond(h * d[:, None] * d[None, :])
    assert cond > 1e6  # the trap is set
    np.testing.assert_allclose(slopes(res, terms), ref.params[:3], rtol=64 * cond * EPS)
    np.testing.assert_allclose(errors(res, terms), ref.bse[:3], rtol=64 * cond * EPS)
    assert res.condition_number == pytest.approx(cond, rel=1e-3)


def test_nearly_exact_collinearity_is_dropped_by_name(base_panel, tmp_path):
    # Source: ESTIMATION.md ("detect with a pivoted factorization ... and drop by
    # name"). At 1e-12 relative noise, x3 is x1 to within the rounding of the sums:
    # the answer would be noise, so one of the pair must be left out and named.
    rng = np.random.default_rng(23)
    df = base_panel.copy()
    df["x3"] = df["x1"] * (1 + 1e-12 * rng.normal(size=len(df)))
    path = write_parquet(df, tmp_path / "nearly.parquet")
    with pytest.warns(DroppedTermsWarning):
        res = bigpanel.fit(path, "y", ["x1", "x2", "x3"], "unit", "period")
    dropped = set(res.terms_dropped)
    assert dropped in ({"x1"}, {"x3"})
    assert res.terms_dropped[dropped.pop()] == "collinear with other terms"


def test_exactly_collinear_term_is_dropped_and_recorded(base_panel, tmp_path):
    # Source: statsmodels OLS with unit indicators (LSDV) on the terms that remain;
    # ESTIMATION.md: collinear terms are dropped by name and recorded.
    df = base_panel.copy()
    df["x3"] = df["x1"] - 2.0 * df["x2"]
    path = write_parquet(df, tmp_path / "exact.parquet")
    terms = ["x1", "x2", "x3"]
    with pytest.warns(DroppedTermsWarning, match="collinear"):
        res = bigpanel.fit(path, "y", terms, "unit", "period", variance="homoskedastic")
    assert len(res.terms_dropped) == 1
    (gone, why), = res.terms_dropped.items()
    assert gone in terms and why == "collinear with other terms"
    kept = [t for t in terms if t != gone]
    assert [c.term for c in res.coefficients] == kept
    ref = lsdv(df, kept)[0].fit()
    np.testing.assert_allclose(slopes(res, kept), ref.params[:2], rtol=1e-9)
    np.testing.assert_allclose(errors(res, kept), ref.bse[:2], rtol=1e-8)
    assert "collinear" in res.table()


@pytest.mark.parametrize("estimator", ["within", "first-difference"])
def test_time_invariant_term_is_named_not_estimated(base_panel, tmp_path, estimator):
    # Source: common practice (within and first differences remove anything constant
    # within a unit); ESTIMATION.md: name it, do not return noise. The other slopes
    # equal the fit without the term.
    df = base_panel.copy()
    df["depot_size"] = (df["unit"] % 13).astype(float) * 2.5 + 1e3  # constant within each unit
    path = write_parquet(df, tmp_path / "invariant.parquet")
    with pytest.warns(DroppedTermsWarning, match="depot_size"):
        res = bigpanel.fit(path, "y", ["x1", "depot_size", "x2"], "unit", "period", estimator=estimator)
    assert res.terms_dropped == {"depot_size": "no variation within units"}
    assert "depot_size" not in [c.term for c in res.coefficients]
    without = bigpanel.fit(path, "y", REGRESSORS, "unit", "period", estimator=estimator)
    np.testing.assert_allclose(slopes(res), slopes(without), rtol=1e-12)
    np.testing.assert_allclose(errors(res), errors(without), rtol=1e-12)


# ------------------------------------------------------------------ singletons


def test_singleton_units_are_dropped_and_counted(base_panel, tmp_path):
    # Source: ESTIMATION.md (singletons carry no information and are dropped before
    # estimating); statsmodels LSDV on the panel without them gives the slopes, and the
    # fit without them gives every number.
    extra = base_panel.groupby("unit").head(1).head(5).copy()
    extra["unit"] = extra["unit"] + 100_000  # five new units with one row each
    df = pd.concat([base_panel, extra], ignore_index=True)
    with_single = write_parquet(df, tmp_path / "singles.parquet")
    without = write_parquet(base_panel, tmp_path / "plain.parquet")
    res = bigpanel.fit(with_single, "y", REGRESSORS, "unit", "period")
    clean = bigpanel.fit(without, "y", REGRESSORS, "unit", "period")
    assert res.singletons_dropped == 5
    assert res.n_obs == len(base_panel) and res.n_units == base_panel["unit"].nunique()
    np.testing.assert_allclose(slopes(res), slopes(clean), rtol=1e-12)
    np.testing.assert_allclose(errors(res), errors(clean), rtol=1e-12)
    assert res.variance.n_clusters == clean.variance.n_clusters
    ref = lsdv(base_panel, REGRESSORS)[0].fit()
    np.testing.assert_allclose(slopes(res), ref.params[:2], rtol=1e-9)


# ------------------------------------------------------------------ T = 2


@pytest.fixture
def two_periods(tmp_path):
    """A balanced 40-unit panel with two periods (seeded here)."""
    df = unbalanced_panel(seed=24, n_units=40, n_periods=2, n_full=40)
    return write_parquet(df, tmp_path / "two.parquet")


def test_first_differences_equal_within_at_two_periods(two_periods):
    # Source: standard identity, common practice (ESTIMATION.md): with T = 2 and no
    # gaps, first differences without an intercept and within give the same slopes;
    # homoskedastic standard errors agree too (the differenced RSS and cross-product are both
    # twice the within ones, and both have N/2 - K degrees of freedom).
    fd = bigpanel.fit(two_periods, "y", REGRESSORS, "unit", "period", estimator="first-difference",
                      intercept=False, variance="homoskedastic")
    within = bigpanel.fit(two_periods, "y", REGRESSORS, "unit", "period", variance="homoskedastic")
    np.testing.assert_allclose(slopes(fd), slopes(within), rtol=1e-12)
    np.testing.assert_allclose(errors(fd), errors(within), rtol=1e-12)
    assert fd.n_obs == 40 and within.n_obs == 80


def test_first_differences_with_intercept_equal_two_way_within_at_two_periods(two_periods):
    # Source: the same identity with a period effect (common practice): at T = 2 the
    # differenced equation's intercept is the second period's effect.
    fd = bigpanel.fit(two_periods, "y", REGRESSORS, "unit", "period", estimator="first-difference", variance="homoskedastic")
    within = bigpanel.fit(two_periods, "y", REGRESSORS, "unit", "period", effects="unit,period", variance="homoskedastic")
    np.testing.assert_allclose(slopes(fd), slopes(within), rtol=1e-12)
    np.testing.assert_allclose(errors(fd), errors(within), rtol=1e-12)


# ------------------------------------------------------------------ reproducibility


@pytest.fixture(scope="module")
def repro_sources(tmp_path_factory):
    df = unbalanced_panel(seed=25, n_units=400, n_periods=10)
    root = tmp_path_factory.mktemp("repro")
    return {"single file": write_parquet(df, root / "one.parquet"),
            "folder of 4 files": write_parquet_parts(df, root / "parts", 4)}


VARIANCES = {"unit clusters": dict(variance="cluster"), "hc1": dict(variance="hc1"),
             "two-way clusters": dict(variance="cluster", cluster=["unit", "period"])}


@pytest.mark.parametrize("variance", VARIANCES.keys())
@pytest.mark.parametrize("kind, chunk_rows", [("single file", None), ("folder of 4 files", None),
                                              ("folder of 4 files", 1)],
                         ids=["single file", "folder, one query", "folder, one query per file"])
def test_same_fit_twice_is_bitwise_identical(repro_sources, kind, chunk_rows, variance, monkeypatch):
    # Source: common practice for batch jobs (a rerun on the same extract must give the
    # same digits); moments.py promises sums whose result does not depend on the
    # threads' timing on every path.
    if chunk_rows is not None:
        monkeypatch.setattr(bigpanel.moments, "CHUNK_ROWS", chunk_rows)
    runs = [bigpanel.fit(repro_sources[kind], "y", REGRESSORS, "unit", "period", **VARIANCES[variance])
            for _ in range(2)]
    first, second = ([(c.estimate, c.std_error) for c in r.coefficients] for r in runs)
    assert first == second  # exact equality of floats
    assert runs[0].r_squared == runs[1].r_squared


# ------------------------------------------------------------------ counts


def test_pooled_reports_its_units(base_panel, tmp_path):
    # Source: ESTIMATION.md ("Report N used, units, periods, clusters"): the pooled
    # estimator also reports how many units its rows come from.
    path = write_parquet(base_panel, tmp_path / "pooled.parquet")
    res = bigpanel.fit(path, "y", REGRESSORS, "unit", "period", estimator="pooled")
    assert res.n_units == base_panel["unit"].nunique()
