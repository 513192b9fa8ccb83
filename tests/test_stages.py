"""Direct tests of the pipeline's stages: the solver, the variance formulas, the expanded
unit-cluster meat, the estimation query builders and the parameter table.

References: numpy (lstsq, matrix_rank, dense sums), statsmodels OLS robust covariances
(HC1 and one-way cluster with its default small-sample correction), pandas group-bys.
"""

from __future__ import annotations

import duckdb
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from statsmodels.stats import sandwich_covariance as sw

from bigpanel import moments, params, solve, sqlbuild, variance
from bigpanel.errors import InputError

EPS = np.finfo(float).eps


@pytest.fixture
def regression():
    """A seeded regression: 300 rows, 4 columns with different scales, 23 clusters."""
    rng = np.random.default_rng(7)
    n, k = 300, 4
    x = rng.normal(size=(n, k)) * np.array([1.0, 10.0, 0.01, 3.0])
    groups = rng.integers(0, 23, size=n)
    y = x @ np.array([0.5, -0.2, 30.0, 1.0]) + rng.normal(size=n) * (1 + np.abs(x[:, 0]))
    return x, y, groups


# ------------------------------------------------------------------ solver


def test_solver_matches_dense_least_squares(regression):
    # Reference: numpy.linalg.lstsq on the rows. Bound: cond * eps * 2^6 (common practice).
    x, y, _ = regression
    sol = solve.solve_normal(x.T @ x, x.T @ y)
    ref = np.linalg.lstsq(x, y, rcond=None)[0]
    assert sol.kept.all()
    np.testing.assert_allclose(sol.coef, ref, rtol=2**6 * sol.condition * EPS)
    ref_inv = np.linalg.inv(x.T @ x)
    scale = np.sqrt(np.outer(np.diag(ref_inv), np.diag(ref_inv)))  # entries relative to their row and column
    assert (np.abs(sol.inverse - ref_inv) <= 2**6 * sol.condition * EPS * scale).all()


def test_solver_drops_a_dependent_column_by_position(regression):
    # Reference: numpy.linalg.matrix_rank of the design; the dependent column is dropped,
    # the others keep the least-squares solution of the reduced design.
    x, y, _ = regression
    xd = np.column_stack([x, x[:, 0] - 2 * x[:, 3]])
    sol = solve.solve_normal(xd.T @ xd, xd.T @ y)
    assert sol.kept.sum() == np.linalg.matrix_rank(xd) == 4
    kept = np.flatnonzero(sol.kept)
    ref = np.linalg.lstsq(xd[:, kept], y, rcond=None)[0]
    np.testing.assert_allclose(sol.coef[kept], ref, rtol=1e-9)
    assert (sol.coef[~sol.kept] == 0).all() and (sol.inverse[~sol.kept] == 0).all()


def test_solver_is_scale_free(regression):
    # Common practice: a column multiplied by 1e-150 carries the same information.
    x, y, _ = regression
    xs = x * np.array([1.0, 1e-150, 1.0, 1.0])
    sol = solve.solve_normal(xs.T @ xs, xs.T @ y)
    base = solve.solve_normal(x.T @ x, x.T @ y)
    assert sol.kept.all()
    np.testing.assert_allclose(sol.coef * np.array([1.0, 1e-150, 1.0, 1.0]), base.coef, rtol=1e-10)


def test_solver_honours_zero_variation():
    h = np.array([[2.0, 0.5], [0.5, 1.0]])
    sol = solve.solve_normal(h, np.array([1.0, 1.0]), zero_variation=np.array([True, False]))
    assert list(sol.kept) == [False, True] and sol.coef[1] == pytest.approx(1.0, rel=1e-15)


# ------------------------------------------------------------------ variance formulas


def test_variance_formulas_match_statsmodels(regression):
    # Reference: statsmodels OLS nonrobust; sandwich_covariance.cov_hc1 and cov_cluster
    # (G/(G-1) (N-1)/(N-K)).
    x, y, groups = regression
    n, k = x.shape
    inv = np.linalg.inv(x.T @ x)
    b = inv @ x.T @ y
    u = y - x @ b
    ols = sm.OLS(y, x)
    homoskedastic = variance.homoskedastic(inv, float(u @ u), n, k, 0)
    np.testing.assert_allclose(np.sqrt(np.diag(homoskedastic.vcov)), ols.fit().bse, rtol=1e-10)
    hc1 = variance.hc1(inv, (x * u[:, None] ** 2).T @ x, n, k, 0)
    np.testing.assert_allclose(np.sqrt(np.diag(hc1.vcov)), np.sqrt(np.diag(sw.cov_hc1(ols.fit()))), rtol=1e-10)
    scores = np.array([(x[groups == g] * u[groups == g, None]).sum(axis=0) for g in np.unique(groups)])
    cl = variance.cluster(inv, scores.T @ scores, len(scores), n, k)
    ref = sw.cov_cluster(ols.fit(), groups)
    np.testing.assert_allclose(np.sqrt(np.diag(cl.vcov)), np.sqrt(np.diag(ref)), rtol=1e-10)
    assert (cl.df, cl.n_clusters) == (len(scores) - 1, len(scores))


def test_two_way_is_the_sum_of_its_components(regression):
    # Reference: the definition V_A + V_B - V_AB (Cameron, Gelbach and Miller 2011),
    # each component a one-way CR1 computed here with its own factor.
    x, y, groups = regression
    other = np.arange(len(y)) % 7
    inv = np.linalg.inv(x.T @ x)
    u = y - x @ (inv @ x.T @ y)

    def meat(g):
        s = np.array([(x[g == v] * u[g == v, None]).sum(axis=0) for v in np.unique(g)])
        return s.T @ s, len(s)

    cell = groups * 100 + other
    (ma, ga), (mb, gb), (mab, gab) = meat(groups), meat(other), meat(cell)
    n, k = x.shape
    two = variance.two_way(inv, (ma, mb, mab), (ga, gb, gab), n, (k, k, k))
    parts = [variance.cluster(inv, m, g, n, k).vcov for m, g in ((ma, ga), (mb, gb), (mab, gab))]
    direct = parts[0] + parts[1] - parts[2]
    if two.clipped_eigenvalues == 0:
        np.testing.assert_allclose(two.vcov, direct, rtol=1e-12, atol=1e-14 * np.abs(direct).max())
    assert two.df == min(ga, gb) - 1


# ------------------------------------------------------------------ cluster-meat expansion


def test_expanded_meat_equals_the_direct_sum_of_unit_scores():
    # Reference: sum_i s_i s_i' with s_i = a_i - B_i b, summed directly in numpy. The
    # expansion is exact for any pilot q; q near b keeps digits (moments.py).
    rng = np.random.default_rng(3)
    k, n_units = 3, 50
    blocks = []
    for _ in range(n_units):
        xi = rng.normal(size=(6, k))
        blocks.append((xi.T @ xi, xi.T @ rng.normal(size=6)))
    pilot, b = rng.normal(size=k), rng.normal(size=k)
    row = {}
    idx = moments.pairs(k)
    e = np.array([a - bb @ pilot for bb, a in blocks])
    for j in range(k):
        for m in range(j, k):
            row[f"rr{j}_{m}"] = float(e[:, j] @ e[:, m])
        for (a, c) in idx:
            row[f"rb{j}_{a}_{c}"] = float(sum(e[i, j] * blocks[i][0][a, c] for i in range(n_units)))
    for u, (a, c) in enumerate(idx):
        for v in range(u, len(idx)):
            d, f = idx[v]
            row[f"bb{u}_{v}"] = float(sum(bb[a, c] * bb[d, f] for bb, _ in blocks))
    meat, ratio = moments.expanded_meat(row, k, pilot, b)
    scores = np.array([a - bb @ b for bb, a in blocks])
    np.testing.assert_allclose(meat, scores.T @ scores, rtol=1e-11)
    assert ratio >= 1.0


# ------------------------------------------------------------------ estimation builders


@pytest.fixture
def rows_table():
    rng = np.random.default_rng(11)
    df = pd.DataFrame({"u": np.repeat(np.arange(8), 5), "t": np.tile(np.arange(5), 8)})
    df["x"] = rng.normal(size=len(df)) + df["u"]
    df["y"] = 2 * df["x"] + rng.normal(size=len(df))
    df.loc[3, "x"] = np.nan
    con = duckdb.connect()
    con.register("panel", df)
    return con, df


def _used(con_df, differenced=False):
    rows = sqlbuild.design_rows_sql("panel", "u", "t", [], [('"x"', 0), ('"y"', 0)], 1)
    if differenced:
        rows = sqlbuild.differenced_rows_sql(rows, 0, 2)
    return sqlbuild.used_rows_sql(rows, sqlbuild.valid_predicate(2, differenced, 1))


def test_pooled_moments_builder_matches_numpy(rows_table):
    # Reference: numpy sums over the complete rows.
    con, df = rows_table
    sql = sqlbuild.pooled_moments_sql(_used(rows_table), 2, "fsum")
    row = con.execute(sql, {"s0": 0.0, "s1": 0.0, "d0": 1.0, "d1": 1.0}).fetchdf().iloc[0]
    ok = df.dropna()
    assert row["n"] == len(ok) and row["n_units"] == ok["u"].nunique()
    assert row["p0_1"] == pytest.approx(float(ok["x"] @ ok["y"]), rel=1e-14)
    assert row["s0"] == pytest.approx(float(ok["x"].sum()), rel=1e-14)


def test_unit_pass_builder_gives_the_within_cross_product(rows_table):
    # Reference: pandas demeaning by unit, then the dense cross-product.
    con, df = rows_table
    units = sqlbuild.unit_moments_sql(_used(rows_table), 2, "fsum")
    row = con.execute(sqlbuild.unit_pass_sql(units, 2, "within", False, "fsum"), {"s0": 1.0, "s1": -2.0, "d0": 1.0, "d1": 1.0}).fetchdf().iloc[0]
    ok = df.dropna()
    dm = ok[["x", "y"]] - ok.groupby("u")[["x", "y"]].transform("mean")
    assert row["w0_0"] == pytest.approx(float(dm["x"] @ dm["x"]), rel=1e-12)
    assert row["w0_1"] == pytest.approx(float(dm["x"] @ dm["y"]), rel=1e-12)
    assert (row["n_obs"], row["n_units"]) == (len(ok), ok["u"].nunique())


def test_differenced_rows_builder_matches_pandas(rows_table):
    # Reference: pandas diff within units over consecutive periods.
    con, df = rows_table
    got = con.execute(f"SELECT k_unit, k_period, z0 FROM ({_used(rows_table, True)}) ORDER BY 1, 2",
                      {"s0": 0.0, "s1": 0.0, "d0": 1.0, "d1": 1.0}).fetchdf()
    d = df.sort_values(["u", "t"]).assign(dx=lambda f: f.groupby("u")["x"].diff(), dy=lambda f: f.groupby("u")["y"].diff())
    ref = d.dropna(subset=["dx", "dy"])
    np.testing.assert_allclose(got["z0"].to_numpy(), ref["dx"].to_numpy(), rtol=1e-14)


@pytest.mark.parametrize(("differenced", "expected"), [
    (False, "k_unit IS NOT NULL AND (z0 * 0 + z1 * 0) = 0"),
    (True, "k_prev_unit = k_unit AND k_prev = k_period - 2 AND k_unit IS NOT NULL AND (z0 * 0 + z1 * 0) = 0"),
])
def test_valid_predicate_text(differenced, expected):
    assert sqlbuild.valid_predicate(2, differenced, 2) == expected


# ------------------------------------------------------------------ parameter table


@pytest.mark.parametrize(("name", "value", "message"), [
    ("estimator", "fe", "Option 'estimator' must be one of pooled, within, first-difference, between, random-effects; got 'fe'."),
    ("variance", "robust", "Option 'variance' must be one of homoskedastic, hc1, cluster; got 'robust'."),
    ("period_step", 0, "Option 'period_step' must be a whole number from 1 to 2**53 (9,007,199,254,740,992), got 0."),
    ("regressors", "", "Option 'regressors' is empty."),
])
def test_parameter_errors_come_from_the_table(name, value, message):
    with pytest.raises(InputError) as err:
        params.check(name, value)
    assert str(err.value).startswith(message)


def test_parameter_table_normalises_lists():
    assert params.check("regressors", "x, lag(x, 2), levels(k, 'a,b')") == ("x", "lag(x, 2)", "levels(k, 'a,b')")
    assert params.check("cluster", ["unit", " period "]) == ("unit", "period")
    assert params.PARAMETERS["variance"].option == "--variance" and params.PARAMETERS["intercept"].option == "--no-intercept"


# ------------------------------------------------------------------ the numpy unit fold


@pytest.mark.parametrize("layout", ["within", "plain", "constant"])
@pytest.mark.parametrize("expand", [False, True])
def test_numpy_fold_equals_the_sql_fold(layout, expand):
    # Reference: unit_pass.sql over unit_moments.sql in DuckDB (fsum) on the same rows,
    # streamed to numpy in batches that cut units in two.
    import pyarrow as pa

    from bigpanel.fold import NotConsecutive, fold_units

    rng = np.random.default_rng(5)
    units = np.repeat(np.arange(60), rng.integers(1, 8, 60))
    periods = np.concatenate([np.arange(c) for c in np.bincount(units)])
    z = rng.normal(size=(len(units), 3)) + 50.0
    table = pa.table({"k_unit": units, "k_period": periods, "z0": z[:, 0], "z1": z[:, 1], "z2": z[:, 2]})
    con = duckdb.connect()
    con.register("r", table)
    pilot = np.array([0.3, -0.2, 0.1][: 2 + (layout == "constant")]) if expand else None
    params = {f"q{j}": float(v) for j, v in enumerate(pilot)} if expand else None
    sql = sqlbuild.unit_pass_sql(sqlbuild.unit_moments_sql("SELECT * FROM r", 3, "fsum"), 3, layout, expand, "fsum")
    ref = con.execute(sql, params).fetchdf().iloc[0].to_dict()
    got = fold_units(table.to_batches(max_chunksize=17), 3, layout, pilot)
    assert set(got) == set(ref)
    for key, value in got.items():
        if isinstance(value, float):  # sums of 300 products of values near 50: 2^10 eps of the largest
            assert value == pytest.approx(ref[key], rel=2**10 * EPS, abs=2**10 * EPS * 2500 * len(units))
        else:
            assert value == ref[key], key
    shuffled = table.take(rng.permutation(len(units)))
    with pytest.raises(NotConsecutive):
        fold_units(shuffled.to_batches(max_chunksize=17), 3, layout, pilot)


@pytest.mark.filterwarnings("ignore::bigpanel.errors.BigpanelWarning")
def test_the_result_names_the_fold_that_ran(tmp_path, monkeypatch):
    # Reference: the same fit with the unit fold summed in SQL (to rounding: common practice).
    import bigpanel
    import bigpanel.execute
    from panel_cases import unbalanced_panel, write_parquet_parts

    monkeypatch.setattr(bigpanel.moments, "CHUNK_ROWS", 1)
    parts = write_parquet_parts(unbalanced_panel(9, 40, 6), tmp_path / "parts", 3)
    numpy_fold = bigpanel.fit(parts, "y", ["x1", "x2"], "unit", "period", estimator="pooled", variance="cluster")
    monkeypatch.setattr(bigpanel.execute, "NUMPY_FOLD_LAYOUTS", frozenset())
    sql_fold = bigpanel.fit(parts, "y", ["x1", "x2"], "unit", "period", estimator="pooled", variance="cluster")
    assert "numpy" in numpy_fold.accumulation and "numpy" not in sql_fold.accumulation
    for a, b in zip(numpy_fold.coefficients, sql_fold.coefficients):
        np.testing.assert_allclose([a.estimate, a.std_error], [b.estimate, b.std_error], rtol=1e-12)
