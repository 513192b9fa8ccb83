"""Extreme values: NaN and infinities in the checkup; columns scaled by 1e-300 to 1e200 in
checkups and fits.

References: pandas/numpy on the same rows, with the non-finite values set missing
(tests/checkup_data.py's reference_checkup), for the checkup; statsmodels OLS with unit
indicators (LSDV) for the unscaled fit; and the unscaled fit itself for the scaled ones:
a column times c has slope / c (the outcome times c: slopes times c) and the same
t-statistics. Before the fix, 1e-300 was dropped as "no variation within units", 1e200 as
collinear (nan errors on the other terms), an outcome times 1e150 gave p = 1.0, and +inf
with -inf in one column stopped the checkup with a ValueError.
"""

from __future__ import annotations

import math
import sys
import warnings

import numpy as np
import pyarrow as pa
import pyarrow.compute  # noqa: F401 - pa.compute
import pytest

import bigpanel
from bigpanel import InputError
from bigpanel.panel import inspect_panel
from bigpanel.source import open_source

from checkup_data import make_panel, reference_checkup
from panel_cases import lsdv, unbalanced_panel

pytestmark = pytest.mark.filterwarnings("ignore::bigpanel.errors.BigpanelWarning")

SCALED_RTOL = 1e-9  # the scaled fit against the unscaled one: the same algebra, rounded differently
LSDV_RTOL = 1e-9  # slopes and homoskedastic errors against statsmodels' dense solve (as in test_fit_lsdv.py)


# ------------------------------------------------------------------ checkup


def _with_values(table: pa.Table, column: str, rows: list[int], values: list[float]) -> pa.Table:
    data = table.column(column).to_numpy(zero_copy_only=False).astype(float)  # nulls arrive as NaN
    valid = table.column(column).is_valid().to_numpy(zero_copy_only=False)
    data[rows] = values
    valid[rows] = True
    array = pa.array(data, mask=~valid)  # NaN stays a value, not a null
    return table.set_column(table.column_names.index(column), column, array)


@pytest.fixture(scope="module")
def not_finite_panel() -> pa.Table:
    table = make_panel(seed=5)
    table = _with_values(table, "staff_hours", [2, 30, 31, 77], [math.inf, -math.inf, math.nan, math.inf])
    return _with_values(table, "promo", [10], [-math.inf])


def test_not_finite_values_are_counted_apart_and_left_out(not_finite_panel):
    # Source: pandas/numpy on the same rows with every non-finite value set missing.
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no numpy warning may reach the user
        report = inspect_panel(open_source(not_finite_panel), "depot", "month")
    frame = not_finite_panel.to_pandas()
    numeric = ["parcels", "staff_hours", "region", "promo"]
    arrow_nulls = {c: int(not_finite_panel.column(c).null_count) for c in numeric}
    values = {c: not_finite_panel.column(c).to_numpy(zero_copy_only=False).astype(float) for c in numeric}
    not_finite = {c: int(np.sum(~np.isfinite(values[c]))) - arrow_nulls[c] for c in numeric}
    clean = frame.copy()
    for c in numeric:
        clean[c] = np.where(np.isfinite(values[c]), values[c], np.nan)
    ref = reference_checkup(clean, "depot", "month", numeric)
    checks = {c.name: c for c in report.columns}
    assert not_finite == {"parcels": 0, "staff_hours": 4, "region": 0, "promo": 1}
    for name in numeric:
        got, want = checks[name], ref["columns"][name]
        assert got.n_not_finite == not_finite[name], name
        assert got.n_missing == arrow_nulls[name], name
        assert got.n_missing + got.n_not_finite == want["n_missing"], name
        # tolerances: two-pass sums over a few hundred values, against pandas' own sums
        assert got.mean == pytest.approx(want["mean"], rel=1e-12, abs=1e-12), name
        assert got.std == pytest.approx(want["std"], rel=1e-10), name
        assert (got.min, got.max) == (want["min"], want["max"]), name
        assert got.within_share == pytest.approx(want["within_share"], rel=1e-9, abs=1e-12), name
        assert got.units_varying == want["units_varying"], name
    assert checks["staff_hours"].within_estimable is True
    text = report.render()
    assert "nan" not in text.lower().replace("nan or", "")
    assert "staff_hours (4)" in text and "promo (1)" in text
    assert report.to_dict()["columns"][1]["n_not_finite"] == 4


@pytest.mark.parametrize("factor", [1e-300, 1e-200, 1e200, 1e300])
def test_checkup_of_extreme_scales(factor):
    # Source: the same checkup on the unscaled column (a scale changes no share and scales
    # mean and std by the factor), itself checked against pandas in test_panel.py.
    table = make_panel(seed=3)
    scaled = table.set_column(3, "staff_hours", pa.compute.multiply(table.column("staff_hours"), factor))
    base = {c.name: c for c in inspect_panel(open_source(table), "depot", "month").columns}["staff_hours"]
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        got = {c.name: c for c in inspect_panel(open_source(scaled), "depot", "month").columns}["staff_hours"]
    assert got.within_estimable is True and got.too_large is False
    assert got.mean == pytest.approx(base.mean * factor, rel=1e-12)
    assert got.std == pytest.approx(base.std * factor, rel=1e-6)  # an offset of 1e8 under a spread of 1
    assert got.within_share == pytest.approx(base.within_share, rel=1e-6)


# ------------------------------------------------------------------ fits


@pytest.fixture(scope="module")
def panel():
    return unbalanced_panel(11, 25, 6)


def _fit(df, estimator, variance="cluster"):
    table = pa.Table.from_pandas(df, preserve_index=False)
    return bigpanel.fit(table, "y", ["x1", "x2"], "unit", "period", estimator=estimator, variance=variance)


def _scaled(df, column, factor):
    out = df.copy()
    out[column] = out[column] * factor
    return out


CASES = [("x1", 1e-300), ("x1", 1e200), ("y", 1e150), ("y", 1e-200), ("x2", 1e300)]


@pytest.mark.parametrize("estimator", ["within", "first-difference", "pooled"])
@pytest.mark.parametrize("column,factor", CASES, ids=[f"{c}x{f:g}" for c, f in CASES])
@pytest.mark.parametrize("se", ["homoskedastic", "cluster", "hc1"])
def test_scaled_columns_fit_like_the_unscaled_ones(panel, estimator, column, factor, se):
    # Source: the unscaled fit (itself checked against statsmodels below and in
    # test_fit_lsdv.py). A regressor times c: its slope / c; the outcome times c: every
    # estimate times c; t-statistics unchanged; nothing dropped.
    base = _fit(panel, estimator, se)
    got = _fit(_scaled(panel, column, factor), estimator, se)
    assert got.terms_dropped == {}
    assert [c.term for c in got.coefficients] == [c.term for c in base.coefficients]
    for b, g in zip(base.coefficients, got.coefficients):
        ratio = factor if column == "y" else (1 / factor if g.term == column else 1.0)
        if column != "y" and g.term == "(intercept)":
            ratio = 1.0
        assert g.estimate == pytest.approx(b.estimate * ratio, rel=SCALED_RTOL), g.term
        assert g.std_error == pytest.approx(b.std_error * ratio, rel=SCALED_RTOL), g.term
        assert g.t_stat == pytest.approx(b.t_stat, rel=SCALED_RTOL), g.term
        assert g.p_value == pytest.approx(b.p_value, rel=1e-6, abs=1e-300), g.term
    assert got.r_squared == pytest.approx(base.r_squared, rel=SCALED_RTOL)


@pytest.mark.parametrize("column,factor", CASES, ids=[f"{c}x{f:g}" for c, f in CASES])
def test_scaled_within_fit_matches_statsmodels(panel, column, factor):
    # Source: statsmodels OLS with unit indicators (LSDV) on the unscaled panel, its slopes
    # and homoskedastic errors scaled by hand (statsmodels' own dense solve cannot take 1e-300 columns).
    model, _ = lsdv(panel, ["x1", "x2"])
    ref = model.fit()
    got = _fit(_scaled(panel, column, factor), "within", "homoskedastic")
    for i, term in enumerate(["x1", "x2"]):
        ratio = factor if column == "y" else (1 / factor if term == column else 1.0)
        assert got.coef(term).estimate == pytest.approx(ref.params[i] * ratio, rel=LSDV_RTOL)
        assert got.coef(term).std_error == pytest.approx(ref.bse[i] * ratio, rel=LSDV_RTOL)
        assert got.coef(term).t_stat == pytest.approx(ref.tvalues[i], rel=LSDV_RTOL)


def test_answer_beyond_a_double_is_refused_by_name(panel):
    # common practice: a slope of about 1e600 has no double; the fit says which term
    df = _scaled(_scaled(panel, "x1", 1e-300), "y", 1e300)
    with pytest.raises(InputError, match=r"Values of 'x1' are out of a double's reach.*Rescale"):
        _fit(df, "within")


def test_sums_that_overflow_are_refused_by_name(panel, monkeypatch):
    # common practice: values near the top of the double range whose squares overflow even
    # after scaling by the first rows' magnitude (those rows are small) are refused
    monkeypatch.setattr(sys.modules["bigpanel.execute"], "PROBE_ROWS", 20)  # the scale comes from small rows only
    df = panel.copy()
    df.loc[df.index[-3:], "x2"] = 1e305
    df.loc[df.index[-1], "x2"] = -1e305
    with pytest.raises(InputError, match=r"'x2'"):
        _fit(df, "pooled")


DESIGNS = [
    dict(estimator="within", effects="unit,period"),
    dict(estimator="within", effects="unit,period", variance="hc1"),
    dict(estimator="within", cluster="unit,period"),
    dict(estimator="within", cluster="region"),
    dict(estimator="first-difference", effects="period"),
    dict(estimator="first-difference", intercept=False),
    dict(estimator="pooled", effects="period"),
    dict(estimator="pooled", intercept=False),
]


@pytest.mark.parametrize("design", DESIGNS, ids=lambda d: ",".join(f"{k}={v}" for k, v in d.items()))
def test_scaled_columns_in_every_design(design):
    # Source: the unscaled fit of the same design (period effects absorbed two ways,
    # two-way and nested clusters, no intercept): estimates scale, t-statistics do not.
    df = unbalanced_panel(12, 40, 9)
    table = lambda d: pa.Table.from_pandas(d, preserve_index=False)  # noqa: E731
    base = bigpanel.fit(table(df), "y", ["x1", "x2"], "unit", "period", **design)
    for column, factor in [("x1", 1e-300), ("x2", 1e200), ("y", 1e150)]:
        got = bigpanel.fit(table(_scaled(df, column, factor)), "y", ["x1", "x2"], "unit", "period", **design)
        for b in base.coefficients:
            ratio = factor if column == "y" else (1 / factor if b.term == column else 1.0)
            assert got.coef(b.term).estimate == pytest.approx(b.estimate * ratio, rel=SCALED_RTOL), (column, b.term)
            assert got.coef(b.term).t_stat == pytest.approx(b.t_stat, rel=SCALED_RTOL), (column, b.term)
