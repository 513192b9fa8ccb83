"""fit_many: many models on one source from shared scans, each equal to its own fit.

References: bigpanel.fit on each model alone (its own passes; itself checked against
statsmodels LSDV in test_fit_lsdv.py) to 1e-12 relative, the issue's bar; pandas counts
of each model's complete rows (each model keeps its own sample).
"""

from __future__ import annotations

import numpy as np
import pytest

import bigpanel
from bigpanel.errors import InputError
from panel_cases import unbalanced_panel, write_parquet

pytestmark = pytest.mark.filterwarnings("ignore::bigpanel.errors.BigpanelWarning")

RTOL = 1e-12  # the bar: every model equals its own fit


@pytest.fixture(scope="module")
def gappy(tmp_path_factory):
    """An unbalanced panel whose terms miss different rows: x1 every 11th, x2 every 7th,
    x3 (a new term) every 5th row."""
    df = unbalanced_panel(41, 60, 9)
    rng = np.random.default_rng(41)
    df["x3"] = rng.normal(size=len(df)) + 0.3 * df["x1"]
    df.loc[df.index[::11], "x1"] = np.nan
    df.loc[df.index[::7], "x2"] = np.nan
    df.loc[df.index[::5], "x3"] = np.nan
    return df, write_parquet(df, tmp_path_factory.mktemp("many") / "panel.parquet")


TEN = [
    dict(outcome="y", regressors=["x1", "x2"]),
    dict(outcome="y", regressors=["x1"], variance="hc1"),
    dict(outcome="y", regressors=["x2", "x3"], cluster="region"),
    dict(outcome="y", regressors=["x1", "x2", "x3"], cluster=["unit", "period"]),
    dict(outcome="y", regressors=["x3", "x1"], cluster="shift"),
    dict(outcome="y", regressors="x1, x2", variance="homoskedastic"),
    dict(outcome="y", regressors=["x1", "x2"], estimator="pooled"),
    dict(outcome="y", regressors=["x3"], estimator="pooled", variance="cluster"),
    dict(outcome="y", regressors=["x1", "x2", "x3"], estimator="pooled", variance="hc1", cluster=None),
    dict(outcome="y", regressors=["x1", "x2"], estimator="pooled", intercept=False, variance="cluster", cluster="region"),
]


def assert_same(many, alone):
    assert [c.term for c in many.coefficients] == [c.term for c in alone.coefficients]
    for a, b in zip(many.coefficients, alone.coefficients):
        np.testing.assert_allclose(a.estimate, b.estimate, rtol=RTOL)
        np.testing.assert_allclose(a.std_error, b.std_error, rtol=RTOL)
    assert (many.n_obs, many.n_units, many.rows_dropped) == (alone.n_obs, alone.n_units, alone.rows_dropped)
    assert (many.n_periods, many.period_first, many.period_last) == (alone.n_periods, alone.period_first, alone.period_last)
    assert many.variance.n_clusters == alone.variance.n_clusters
    np.testing.assert_allclose(many.variance.small_sample_factors, alone.variance.small_sample_factors, rtol=RTOL)
    np.testing.assert_allclose(many.r_squared, alone.r_squared, rtol=RTOL)


def test_ten_within_and_pooled_models_take_two_scans(gappy):
    df, path = gappy
    results = bigpanel.fit_many(path, TEN, unit="unit", period="period")
    assert results.scans <= 2
    assert len(results) == len(TEN)
    for model, res in zip(TEN, results):
        assert_same(res, bigpanel.fit(path, unit="unit", period="period", **model))


def test_each_model_keeps_its_own_sample(gappy):
    # Reference: pandas, rows where the model's own columns are all present.
    df, path = gappy
    models = [dict(outcome="y", regressors=["x1"], estimator="pooled"),
              dict(outcome="y", regressors=["x2"], estimator="pooled"),
              dict(outcome="y", regressors=["x1", "x3"], estimator="pooled")]
    results = bigpanel.fit_many(path, models, unit="unit", period="period")
    for model, res in zip(models, results):
        assert res.n_obs == len(df.dropna(subset=["y", *model["regressors"]]))
    assert len({r.n_obs for r in results}) == 3


def test_differences_share_one_differenced_scan(gappy):
    df, path = gappy
    models = [dict(outcome="y", regressors=["x1", "x2"], estimator="first-difference"),
              dict(outcome="y", regressors=["x3"], estimator="first-difference", variance="hc1"),
              dict(outcome="y", regressors=["x1", "x3"], estimator="first-difference", intercept=False, variance="homoskedastic")]
    results = bigpanel.fit_many(path, models, unit="unit", period="period")
    assert results.scans <= 2  # one differenced scan for the sums, one for the scores
    for model, res in zip(models, results):
        assert_same(res, bigpanel.fit(path, unit="unit", period="period", **model))


def test_models_with_period_effects_run_alone_and_agree(gappy):
    df, path = gappy
    models = [dict(outcome="y", regressors=["x1", "x2"]),
              dict(outcome="y", regressors=["x1", "x2"], effects=["unit", "period"]),
              dict(outcome="y", regressors=["x2"], estimator="first-difference", effects="period")]
    results = bigpanel.fit_many(path, models, unit="unit", period="period")
    for model, res in zip(models, results):
        assert_same(res, bigpanel.fit(path, unit="unit", period="period", **model))


@pytest.mark.parametrize(("models", "message"), [
    ([dict(outcome="y", regresors=["x1"])], "Model 1 of fit_many has an unknown key 'regresors'. Did you mean 'regressors'?"),
    ([dict(outcome="y", regressors=["x1"]), dict(outcome="y", regressors=["x1"], unit="region")],
     "Model 2 of fit_many sets 'unit' to 'region'"),
    ([dict(outcome="y", regressors=["x1"], estimator="fe")], "Option 'estimator' must be one of"),
])
def test_bad_models_are_refused_before_reading(gappy, models, message):
    with pytest.raises(InputError) as err:
        bigpanel.fit_many(gappy[1], models, unit="unit", period="period")
    assert str(err.value).startswith(message)


def test_shared_queries_read_the_rows_once(gappy, monkeypatch):
    # The scan count is honest: each query fit_many runs over all rows plans exactly one
    # read of the file (DuckDB's EXPLAIN), so two queries are two passes.
    import duckdb

    from bigpanel import source

    seen = []
    real_run = source.Session.run

    def recording_run(self, sql, params=None, con=None):
        seen.append((sql, params))
        return real_run(self, sql, params, con)

    monkeypatch.setattr(source.Session, "run", recording_run)
    results = bigpanel.fit_many(gappy[1], TEN, unit="unit", period="period")
    # the shift probe reads the first rows only; the duplicate-key probe (and, when it finds
    # one, the listing with its LIMIT) is a check of the keys, not counted in scans (DEVELOPERS.md)
    full = [(sql, p) for sql, p in seen if "LIMIT" not in sql and "units_with_duplicates" not in sql]
    assert len(full) == results.scans
    con = duckdb.connect()
    for sql, p in full:
        plan = "\n".join(row[1] for row in con.execute("EXPLAIN " + sql, p).fetchall())
        assert plan.count("READ_PARQUET") + plan.count("PARQUET_SCAN") == 1


def test_chunked_shared_scan_equals_one_query(gappy, tmp_path, monkeypatch):
    # Reference: the same models on one file (one query per scan); files cut by unit run
    # the shared cross-product scan chunk by chunk (sums in another order: 1e-12).
    import bigpanel.moments
    from panel_cases import write_parquet_parts

    df, path = gappy
    one = bigpanel.fit_many(path, TEN, unit="unit", period="period")
    parts = write_parquet_parts(df, tmp_path / "parts", 3)
    monkeypatch.setattr(bigpanel.moments, "CHUNK_ROWS", 1)
    many = bigpanel.fit_many(parts, TEN, unit="unit", period="period")
    assert many.scans <= 2
    for a, b in zip(many, one):
        assert_same(a, b)


def test_chunked_shared_scores_equal_one_query(gappy, tmp_path, monkeypatch):
    # Reference: the same unit-cluster and HC1 models on one file (one query per scan);
    # their score sums add up over unit chunks (sums in another order: 1e-12).
    import bigpanel.moments
    from panel_cases import write_parquet_parts

    df, path = gappy
    models = [m for m in TEN if m.get("se") in ("hc1", "homoskedastic") or m.get("cluster") in (None, "unit")]
    one = bigpanel.fit_many(path, models, unit="unit", period="period")
    parts = write_parquet_parts(df, tmp_path / "parts", 3)
    monkeypatch.setattr(bigpanel.moments, "CHUNK_ROWS", 1)
    many = bigpanel.fit_many(parts, models, unit="unit", period="period")
    assert many.scans <= 2 and len(models) >= 5
    for a, b in zip(many, one):
        assert_same(a, b)


UNIT_AND_ROWS = [  # every meat a sum over units or over all rows: the per-unit score scan
    dict(outcome="y", regressors=["x1", "x2"]),
    dict(outcome="y", regressors=["x1", "x2", "x3"], variance="hc1"),
    dict(outcome="y", regressors=["x3"]),
    dict(outcome="y", regressors=["x2", "x3"], estimator="pooled", variance="hc1"),
    dict(outcome="y", regressors=["x1"], estimator="pooled", variance="cluster"),
    dict(outcome="y", regressors=["x1", "x3"], estimator="pooled", intercept=False, variance="hc1"),
]


def test_unit_and_row_meats_equal_each_models_fit(gappy):
    # Units whose rows fall in different samples (x1, x2, x3 missing on different rows)
    # are summed per sample; the others read as one cell. Reference: each model's own fit.
    df, path = gappy
    results = bigpanel.fit_many(path, UNIT_AND_ROWS, unit="unit", period="period")
    assert results.scans == 2
    for model, res in zip(UNIT_AND_ROWS, results):
        assert_same(res, bigpanel.fit(path, unit="unit", period="period", **model))


def test_complete_rows_share_one_cell_per_unit(tmp_path):
    # No missing values: every unit has one row pattern (the fast path of both scans).
    # Reference: each model's own fit.
    df = unbalanced_panel(43, 50, 7)
    df["x3"] = df["x1"] * 0.5 + df["period"] * 0.1
    path = write_parquet(df, tmp_path / "complete.parquet")
    results = bigpanel.fit_many(path, UNIT_AND_ROWS, unit="unit", period="period")
    for model, res in zip(UNIT_AND_ROWS, results):
        assert_same(res, bigpanel.fit(path, unit="unit", period="period", **model))
