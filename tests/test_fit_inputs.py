"""bigpanel.fit on awkward inputs: gaps, lags, levels(), missing and non-finite values,
duplicate keys, few clusters, SQL expressions (accepted and refused), awkward column
names, and every kind of source.

References: statsmodels OLS on columns computed by hand in pandas, or the same fit on
cleaned data; each check names its source.
"""

from __future__ import annotations

import duckdb
import numpy as np
import pandas as pd
import polars as pl
import pyarrow as pa
import pytest
import statsmodels.api as sm
from statsmodels.stats import sandwich_covariance as sw

import bigpanel
from bigpanel.errors import DroppedRowsWarning, FewClustersWarning, InputError
from panel_cases import differences, unbalanced_panel, write_parquet, write_parquet_parts

pytestmark = pytest.mark.filterwarnings("ignore::bigpanel.errors.BigpanelWarning")

SLOPE_RTOL = 1e-9
SE_RTOL = 1e-8
REGRESSORS = ["x1", "x2"]


@pytest.fixture(scope="module")
def gappy():
    """A 20-unit, 8-period panel with gaps (seeded here); the first 5 units are full."""
    return unbalanced_panel(seed=31, n_units=20, n_periods=8, n_full=5)


@pytest.fixture(scope="module")
def gappy_file(gappy, tmp_path_factory):
    return write_parquet(gappy, tmp_path_factory.mktemp("gappy") / "gappy.parquet")


def estimates(result, terms):
    return np.array([result.coef(t).estimate for t in terms])


def std_errors(result, terms):
    return np.array([result.coef(t).std_error for t in terms])


# ------------------------------------------------------------------ gaps and lags


def test_first_differences_skip_gaps_and_count_them(gappy, gappy_file):
    # Source: ESTIMATION.md (no difference across a gap; count the rows lost), counted
    # by hand in pandas.
    ordered = gappy.sort_values(["unit", "period"])
    step = ordered.groupby("unit")["period"].diff()
    after_gap = int((step > 1).sum())
    assert after_gap > 0  # the trap is set
    res = bigpanel.fit(gappy_file, "y", REGRESSORS, "unit", "period", estimator="first-difference")
    assert res.rows_dropped["after_gap"] == after_gap
    assert res.rows_dropped["first_period_of_unit"] == gappy["unit"].nunique()
    assert res.n_obs == int((step == 1).sum()) == len(differences(gappy, ["y"]))


@pytest.mark.parametrize("order", [1, 2])
def test_lag_respects_gaps(gappy, gappy_file, order):
    # Source: statsmodels OLS with a constant on a lag made by hand in pandas: the
    # value of the same unit exactly `order` periods earlier, missing when that period
    # is absent (not simply the previous row).
    earlier = gappy[["unit", "period", "x1"]].copy()
    earlier["period"] = earlier["period"] + order
    merged = gappy.merge(earlier.rename(columns={"x1": "x1_lag"}), on=["unit", "period"], how="left")
    shifted_rows = gappy.sort_values(["unit", "period"]).groupby("unit")["x1"].shift(order)
    assert shifted_rows.notna().sum() > merged["x1_lag"].notna().sum()  # a row shift would be wrong
    used = merged.dropna(subset=["x1_lag"])
    ref = sm.OLS(used["y"], sm.add_constant(used[["x1", "x1_lag"]], prepend=False)).fit()
    term = "lag(x1)" if order == 1 else f"lag(x1, {order})"
    with pytest.warns(DroppedRowsWarning):
        res = bigpanel.fit(gappy_file, "y", ["x1", term], "unit", "period", estimator="pooled")
    np.testing.assert_allclose(estimates(res, ["x1", term, "(intercept)"]), ref.params, rtol=SLOPE_RTOL)
    np.testing.assert_allclose(std_errors(res, ["x1", term, "(intercept)"]), ref.bse, rtol=SE_RTOL)
    assert res.n_obs == len(used)
    assert sum(res.rows_dropped.values()) == len(gappy) - len(used)


def test_lag_under_within_matches_lsdv(gappy, gappy_file):
    # Source: statsmodels OLS with unit indicators (LSDV) on the rows whose one-period
    # lag exists (hand-made in pandas), units left with one such row removed (they are
    # singletons for the within estimator).
    earlier = gappy[["unit", "period", "x1"]].assign(period=gappy["period"] + 1).rename(columns={"x1": "x1_lag"})
    used = gappy.merge(earlier, on=["unit", "period"]).copy()
    used = used[used.groupby("unit")["unit"].transform("size") > 1]
    x = np.column_stack([used[["x1", "x1_lag"]], pd.get_dummies(used["unit"], dtype=float)])
    ref = sm.OLS(used["y"].to_numpy(), x).fit()
    res = bigpanel.fit(gappy_file, "y", ["x1", "lag(x1)"], "unit", "period", variance="homoskedastic")
    np.testing.assert_allclose(estimates(res, ["x1", "lag(x1)"]), ref.params[:2], rtol=SLOPE_RTOL)
    np.testing.assert_allclose(std_errors(res, ["x1", "lag(x1)"]), ref.bse[:2], rtol=SE_RTOL)
    assert res.n_obs == len(used)


# ------------------------------------------------------------------ levels()


def test_levels_expand_like_get_dummies_with_named_base(gappy, tmp_path):
    # Source: statsmodels OLS with a constant and pandas.get_dummies indicators, the
    # named base level's column removed; HC1 errors from statsmodels' sandwich_covariance
    # module (cov_hc1, factor N/(N - K)).
    rng = np.random.default_rng(32)
    df = gappy.copy()
    df["kind"] = rng.choice(["hub", "kiosk", "van", "baker's van"], size=len(df))
    df["y"] = df["y"] + df["kind"].map({"hub": 0.0, "kiosk": 1.0, "van": -2.0, "baker's van": 0.5})
    path = write_parquet(df, tmp_path / "kinds.parquet")
    ind = pd.get_dummies(df["kind"], dtype=float).drop(columns="kiosk")
    x = pd.concat([df[["x1"]], ind, pd.Series(1.0, index=df.index, name="const")], axis=1)
    ref = sm.OLS(df["y"], x).fit()
    res = bigpanel.fit(path, "y", ["x1", "levels(kind, 'kiosk')"], "unit", "period", estimator="pooled", variance="hc1")
    labels = ["x1"] + [f"kind={level}" for level in ind.columns] + ["(intercept)"]
    assert sorted(c.term for c in res.coefficients) == sorted(labels)
    np.testing.assert_allclose(estimates(res, labels), ref.params, rtol=SLOPE_RTOL)
    # cov_hc1 indexes the residuals as an array, so the same design goes in as numpy.
    dense = sm.OLS(df["y"].to_numpy(dtype=float), x.to_numpy(dtype=float)).fit()
    ref_hc1 = np.sqrt(np.diag(sw.cov_hc1(dense)))
    np.testing.assert_allclose(std_errors(res, labels), ref_hc1, rtol=SE_RTOL)


def test_levels_default_base_is_first_in_sort_order(gappy, tmp_path):
    # Source: spec.py's documented default (the first level in sort order), checked
    # against get_dummies(drop_first=True), which also drops the first sorted level.
    rng = np.random.default_rng(33)
    df = gappy.assign(kind=rng.choice(["van", "hub", "kiosk"], size=len(gappy)))
    path = write_parquet(df, tmp_path / "kinds.parquet")
    ind = pd.get_dummies(df["kind"], drop_first=True, dtype=float)
    res = bigpanel.fit(path, "y", ["x1", "levels(kind)"], "unit", "period", estimator="pooled")
    assert [c.term for c in res.coefficients] == ["x1", "kind=kiosk", "kind=van", "(intercept)"]
    ref = sm.OLS(df["y"], pd.concat([df[["x1"]], ind], axis=1).assign(const=1.0)).fit()
    np.testing.assert_allclose(estimates(res, ["x1", "kind=kiosk", "kind=van", "(intercept)"]), ref.params,
                               rtol=SLOPE_RTOL)


# ------------------------------------------------------------------ missing values


@pytest.mark.parametrize("estimator", ["within", "pooled"])
def test_missing_and_non_finite_values_are_dropped_and_counted(gappy, tmp_path, estimator):
    # Source: the same fit on the rows without them (common practice: listwise
    # deletion). Bad values sit in the five full units so no unit becomes a singleton.
    df = gappy.copy()
    full_rows = df.index[df["unit"].isin(df["unit"].unique()[:5])]
    bad = {"y": [np.nan, np.inf], "x1": [None, -np.inf], "x2": [np.nan]}
    picked = iter(full_rows[::4])
    spoiled = []
    for column, values in bad.items():
        for v in values:
            row = next(picked)
            df.loc[row, column] = v
            spoiled.append(row)
    path = write_parquet(df, tmp_path / "spoiled.parquet")
    clean = write_parquet(df.drop(index=spoiled), tmp_path / "clean.parquet")
    with pytest.warns(DroppedRowsWarning):
        res = bigpanel.fit(path, "y", REGRESSORS, "unit", "period", estimator=estimator)
    ref = bigpanel.fit(clean, "y", REGRESSORS, "unit", "period", estimator=estimator)
    assert res.rows_dropped["missing_or_not_finite"] == len(spoiled)
    assert res.n_obs == len(df) - len(spoiled)
    np.testing.assert_allclose(estimates(res, REGRESSORS), estimates(ref, REGRESSORS), rtol=1e-12)
    np.testing.assert_allclose(std_errors(res, REGRESSORS), std_errors(ref, REGRESSORS), rtol=1e-12)


# ------------------------------------------------------------------ duplicate keys


@pytest.mark.parametrize("estimator, terms", [
    ("first-difference", ["x1"]),
    ("pooled", ["x1", "lag(x1)"]),
    ("within", ["lag(x1)"]),
], ids=["first differences", "lag under pooled", "lag under within"])
def test_duplicate_keys_are_an_error_for_differences_and_lags(gappy, tmp_path, estimator, terms):
    # Source: ESTIMATION.md ("Duplicate (unit, period) keys: an error for first
    # differences and lags"); the message names both columns.
    df = pd.concat([gappy, gappy.iloc[[7]]], ignore_index=True)
    path = write_parquet(df, tmp_path / "dupes.parquet")
    with pytest.raises(InputError, match=r"'unit'.*'period'|'period'.*'unit'"):
        bigpanel.fit(path, "y", terms, "unit", "period", estimator=estimator)


def test_duplicate_keys_are_fine_for_within_without_lags(gappy, tmp_path):
    # Source: common practice (the within estimator needs no order inside a unit).
    df = pd.concat([gappy, gappy.iloc[[7]]], ignore_index=True)
    path = write_parquet(df, tmp_path / "dupes.parquet")
    res = bigpanel.fit(path, "y", REGRESSORS, "unit", "period")
    assert res.n_obs == len(df)


# ------------------------------------------------------------------ clusters


def test_few_clusters_warn(gappy_file):
    # Source: ESTIMATION.md / Cameron and Miller (2015): under ~40 clusters CR1 is
    # unreliable; 20 units here.
    with pytest.warns(FewClustersWarning):
        res = bigpanel.fit(gappy_file, "y", REGRESSORS, "unit", "period", variance="cluster")
    assert res.variance.n_clusters == (20,)
    assert any("clusters" in w for w in res.warnings)


def test_one_cluster_warns_and_gives_no_standard_error(gappy, tmp_path):
    # Source: common practice: with G = 1 the CR1 factor G/(G-1) is undefined; a
    # number would be noise.
    path = write_parquet(gappy.assign(country=1), tmp_path / "one.parquet")
    with pytest.warns(FewClustersWarning):
        res = bigpanel.fit(path, "y", REGRESSORS, "unit", "period", variance="cluster", cluster="country")
    assert res.variance.n_clusters == (1,)
    assert all(np.isnan(c.std_error) for c in res.coefficients)


# ------------------------------------------------------------------ SQL expressions


@pytest.fixture(scope="module")
def shop(tmp_path_factory):
    """Bakery-by-week sales with price and promotion (seeded here)."""
    rng = np.random.default_rng(34)
    n_units, n_periods = 15, 6
    df = pd.DataFrame({"bakery": np.repeat(np.arange(n_units), n_periods),
                       "week": np.tile(np.arange(1, n_periods + 1), n_units)})
    df["price"] = rng.uniform(1, 5, len(df))
    df["promo"] = rng.integers(0, 2, len(df)).astype(float)
    df["staff"] = rng.uniform(2, 9, len(df))
    df["sales"] = np.exp(1 + 0.2 * df["staff"] - 0.3 * df["price"] + rng.normal(0, 0.3, len(df)))
    return df, write_parquet(df, tmp_path_factory.mktemp("shop") / "shop.parquet")


def test_sql_scalar_expressions_match_columns_computed_in_pandas(shop):
    # Source: statsmodels OLS with a constant on the same quantities computed by
    # numpy/pandas. DuckDB's ln() is the natural logarithm and log() is base 10.
    df, path = shop
    terms = ["log(sales)", "price * promo", "CASE WHEN promo > 0 THEN staff ELSE 0 END", "sqrt(price)"]
    x = pd.DataFrame({"a": np.log10(df["sales"]), "b": df["price"] * df["promo"],
                      "c": np.where(df["promo"] > 0, df["staff"], 0.0), "d": np.sqrt(df["price"])})
    ref = sm.OLS(np.log(df["staff"]), sm.add_constant(x, prepend=False)).fit()
    res = bigpanel.fit(path, "ln(staff)", terms, "bakery", "week", estimator="pooled")
    np.testing.assert_allclose(estimates(res, [*terms, "(intercept)"]), ref.params, rtol=SLOPE_RTOL)
    np.testing.assert_allclose(std_errors(res, [*terms, "(intercept)"]), ref.bse, rtol=SE_RTOL)


def test_filter_is_a_sql_predicate(shop, tmp_path):
    # Source: the same fit on the rows pandas keeps (common practice).
    df, path = shop
    kept = write_parquet(df[(df["week"] >= 2) & (df["price"] < 4.5)], tmp_path / "kept.parquet")
    res = bigpanel.fit(path, "ln(sales)", ["price", "promo"], "bakery", "week", where="week >= 2 AND price < 4.5")
    ref = bigpanel.fit(kept, "ln(sales)", ["price", "promo"], "bakery", "week")
    np.testing.assert_allclose(estimates(res, ["price", "promo"]), estimates(ref, ["price", "promo"]), rtol=1e-12)
    assert res.n_obs == ref.n_obs


REFUSED = {
    "subquery": "(SELECT max(price) FROM read_parquet('elsewhere.parquet'))",
    "scalar subquery in arithmetic": "price + (SELECT 1)",
    "second statement": "price; DROP TABLE src",
    "table function": "read_csv('x')",
    "aggregate": "sum(price)",
    "aggregate inside arithmetic": "price - avg(price)",
    "window": "lag(price) OVER ()",
    "window inside arithmetic": "price - sum(price) OVER (PARTITION BY bakery)",
}


@pytest.mark.parametrize("expression", REFUSED.values(), ids=REFUSED.keys())
def test_non_scalar_terms_are_refused(shop, expression):
    # Source: the issue (terms are single scalar SQL expressions over the row).
    _, path = shop
    with pytest.raises(InputError):
        bigpanel.fit(path, "sales", ["promo", expression], "bakery", "week", estimator="pooled")


@pytest.mark.parametrize("where", ["outcome", "filter"])
@pytest.mark.parametrize("expression", [REFUSED["subquery"], REFUSED["second statement"], REFUSED["aggregate"]],
                         ids=["subquery", "second statement", "aggregate"])
def test_non_scalar_outcome_or_filter_is_refused(shop, where, expression):
    # Source: the issue (the outcome is a scalar expression; the filter a predicate).
    _, path = shop
    predicate = f"({expression}) > 0"
    with pytest.raises(InputError):
        if where == "outcome":
            bigpanel.fit(path, expression, ["promo"], "bakery", "week", estimator="pooled")
        else:
            bigpanel.fit(path, "sales", ["promo"], "bakery", "week", estimator="pooled", where=predicate)


def test_awkward_column_names_are_quoted(gappy, tmp_path):
    # Source: the same fit on plainly named columns (common practice: identifiers are
    # quoted, so reserved words and embedded quotes work).
    renamed = gappy.rename(columns={"unit": "group", "period": "order", "x1": 'a"b', "x2": "select"})
    path = write_parquet(renamed, tmp_path / "awkward.parquet")
    plain = bigpanel.fit(write_parquet(gappy, tmp_path / "plain.parquet"), "y", REGRESSORS, "unit", "period",
                         estimator="first-difference", effects="period")
    res = bigpanel.fit(path, "y", ['"a""b"', '"select"'], "group", "order", estimator="first-difference",
                       effects="order", cluster="group")
    assert [c.term for c in res.coefficients if c.term != "(intercept)"] == ['"a""b"', '"select"']
    np.testing.assert_allclose(estimates(res, ['"a""b"', '"select"']), estimates(plain, REGRESSORS), rtol=1e-12)
    np.testing.assert_allclose(std_errors(res, ['"a""b"', '"select"']), std_errors(plain, REGRESSORS), rtol=1e-12)
    within = bigpanel.fit(path, "y", ['"a""b"', "lag(\"select\")", "levels(region)"], "group", "order")
    assert within.n_obs > 0


# ------------------------------------------------------------------ kinds of source


@pytest.fixture(scope="module")
def every_source(gappy, tmp_path_factory):
    root = tmp_path_factory.mktemp("sources")
    parquet = write_parquet(gappy, root / "panel.parquet")
    gappy.to_csv(root / "panel.csv", index=False)
    con = duckdb.connect(str(root / "panel.duckdb"))
    con.register("frame", gappy)
    con.execute("CREATE TABLE deliveries AS SELECT * FROM frame")
    con.close()
    return {
        "parquet file": dict(source=parquet),
        "folder": dict(source=write_parquet_parts(gappy, root / "folder", 3)),
        "csv": dict(source=str(root / "panel.csv")),
        "duckdb table": dict(source=str(root / "panel.duckdb"), table="deliveries"),
        "duckdb query": dict(source=str(root / "panel.duckdb"), query="SELECT * FROM deliveries"),
        "query": dict(source=None, query=f"SELECT * FROM read_parquet('{parquet}')"),
        "pandas": dict(source=gappy),
        "polars": dict(source=pl.from_pandas(gappy)),
        "arrow": dict(source=pa.Table.from_pandas(gappy, preserve_index=False)),
    }


@pytest.mark.parametrize("kind", ["folder", "csv", "duckdb table", "duckdb query", "query", "pandas", "polars", "arrow"])
def test_every_kind_of_source_gives_the_parquet_answer(every_source, kind):
    # Source: the Parquet file's fit (itself checked against statsmodels elsewhere);
    # the data are the same rows, so only summation order may differ.
    spec = every_source[kind]
    ref = bigpanel.fit(every_source["parquet file"]["source"], "y", REGRESSORS, "unit", "period")
    options = {k: v for k, v in spec.items() if k != "source"}
    res = bigpanel.fit(spec["source"], "y", REGRESSORS, "unit", "period", **options)
    np.testing.assert_allclose(estimates(res, REGRESSORS), estimates(ref, REGRESSORS), rtol=1e-12)
    np.testing.assert_allclose(std_errors(res, REGRESSORS), std_errors(ref, REGRESSORS), rtol=1e-12)
    assert (res.n_obs, res.n_units) == (ref.n_obs, ref.n_units)


def test_terms_named_as_columns_are_those_columns(gappy, tmp_path):
    # Source: the same fit on plainly named columns (common practice: a term equal to a
    # column's name is that column, even a SQL keyword or a name with spaces and capitals).
    renamed = gappy.rename(columns={"unit": "group", "period": "year", "x1": "union", "x2": "Sales 2024", "y": "order"})
    path = write_parquet(renamed, tmp_path / "keywords.parquet")
    plain = bigpanel.fit(write_parquet(gappy, tmp_path / "plain.parquet"), "y", ["x1", "x2", "lag(x1)"], "unit", "period")
    res = bigpanel.fit(path, "order", 'union, Sales 2024, lag("union")', "group", "year")
    assert [c.term for c in res.coefficients] == ["union", "Sales 2024", 'lag("union")']
    np.testing.assert_allclose(estimates(res, ["union", "Sales 2024", 'lag("union")']),
                               estimates(plain, ["x1", "x2", "lag(x1)"]), rtol=1e-12)
    assert res.outcome == "order"
