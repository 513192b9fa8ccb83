"""Many fixed effects absorbed by iteration (bigpanel/sweeps.py, estimators/many_effects.py).

References: statsmodels OLS with one indicator column per level of every effect (the
dummy-variable fit) on the rows left after singletons are dropped, with the
``sandwich_covariance`` functions for HC1 and cluster meats (no small-sample correction
of theirs: the documented factor is applied here, ESTIMATION.md); numpy's matrix rank of
the indicator matrix for the redundant levels. The singleton rule (drop rows whose level
of some effect holds one row, repeatedly) is implemented again here in pandas (common
practice; issue 11). Panels are invented (workers, firms and years; a long chain of
movers for slow convergence).
"""

from __future__ import annotations

import hashlib
import os
import warnings

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from statsmodels.stats import sandwich_covariance as sw

import bigpanel
from bigpanel import sweeps
from bigpanel.errors import InputError
from panel_cases import write_parquet

pytestmark = pytest.mark.filterwarnings("ignore::bigpanel.errors.BigpanelWarning")

SLOPE_TOL = 1e-8  # issue 11: slopes agree with the dummy-variable fit to 1e-8 at the default tolerance
SE_TOL = 1e-8  # and standard errors once the small-sample factor is matched


def worker_panel(seed: int, n_workers: int = 140, n_firms: int = 18, n_years: int = 7, groups: int = 1,
                 singletons: bool = True) -> pd.DataFrame:
    """Workers moving between firms over years, unbalanced (rows missing at random).

    ``groups``: firms split into groups no worker moves between (disconnected). With
    ``singletons``: a worker seen once, a firm seen once, and a worker whose second row is
    in a firm seen once (dropping that firm's row leaves the worker alone: a second round).
    Columns: worker, firm, year, team (a fourth effect), region (firms' group of three), x1, x2, y.
    """
    rng = np.random.default_rng(seed)
    per_group = n_firms // groups
    rows = []
    for w in range(n_workers):
        g = w % groups
        firm = g * per_group + rng.integers(0, per_group)
        for t in range(n_years):
            if rng.random() < 0.25:
                firm = g * per_group + rng.integers(0, per_group)
            if rng.random() < 0.8:
                rows.append((w, firm, t))
    if singletons:
        rows += [(n_workers, 0, 0)]  # a worker seen once
        rows += [(0, n_firms, 3)] if (0, n_firms, 3) not in rows else []  # a firm seen once
        rows += [(n_workers + 1, 1, 1), (n_workers + 1, n_firms + 1, 2)]  # a cascade: firm n+1 once, then worker
    df = pd.DataFrame(rows, columns=["worker", "firm", "year"]).drop_duplicates(["worker", "year"])
    n = len(df)
    a_w = rng.normal(0, 1, df.worker.max() + 1)
    a_f = rng.normal(0, 1, df.firm.max() + 1)
    a_t = rng.normal(0, 0.5, n_years)
    df["team"] = rng.integers(0, 6, n)
    df["region"] = df["firm"] % 3
    df["x1"] = rng.normal(0, 1, n) + 0.7 * a_w[df.worker]
    df["x2"] = rng.normal(0, 1, n) + 0.5 * a_f[df.firm] + 0.1 * df.year
    noise = rng.normal(0, 1, n) * (1 + 0.4 * np.abs(df.x1))
    df["y"] = 1.5 * df.x1 - 0.7 * df.x2 + a_w[df.worker] + a_f[df.firm] + a_t[df.year] + 0.3 * df.team + noise
    return df.reset_index(drop=True)


def without_singletons(df: pd.DataFrame, effects: list[list[str]]) -> pd.DataFrame:
    """Drop rows alone in a level of some effect until none remain (the rule, in pandas)."""
    while True:
        alone = np.zeros(len(df), dtype=bool)
        for cols in effects:
            alone |= (df.groupby(cols)[cols[0]].transform("size") == 1).to_numpy()
        if not alone.any():
            return df
        df = df[~alone]


def indicators(df: pd.DataFrame, effects: list[list[str]]) -> np.ndarray:
    """One 0/1 column per level of every effect (all levels: the redundant ones too)."""
    blocks = []
    for cols in effects:
        key = df[cols].astype(str).agg("/".join, axis=1)
        blocks.append(pd.get_dummies(key).to_numpy(dtype=float))
    return np.hstack(blocks)


def dummy_fit(df: pd.DataFrame, effects: list[list[str]]):
    """statsmodels OLS of y on x1, x2 and every level's indicator (rank-deficient: pinv)."""
    x = np.hstack([df[["x1", "x2"]].to_numpy(), indicators(df, effects)])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = sm.OLS(df["y"].to_numpy(), x).fit()
    return res, int(np.linalg.matrix_rank(x))


def cr1(n_groups: int, n: int, k_prime: int) -> float:
    return n_groups / (n_groups - 1) * (n - 1) / (n - k_prime)  # ESTIMATION.md, "Variance estimators"


EFFECTS_3 = [["worker"], ["firm"], ["year"]]
EFFECTS_4 = [["worker"], ["firm"], ["year"], ["team"]]


@pytest.fixture(scope="module")
def panel(tmp_path_factory):
    df = worker_panel(11)
    return df, write_parquet(df, tmp_path_factory.mktemp("many") / "workers.parquet")


@pytest.mark.parametrize("effects", [EFFECTS_3, EFFECTS_4], ids=["three", "four"])
@pytest.mark.parametrize("variance", ["homoskedastic", "hc1"])
def test_slopes_and_errors_match_the_dummy_variable_fit(panel, effects, variance):
    # Reference: statsmodels OLS with indicators for every level, on the rows left after
    # singletons (pandas, above); homoskedastic errors with N - rank df, HC1 from
    # sandwich_covariance.cov_hc0 times N/(N - rank). The fit's absorbed levels are exact
    # here, so the factors are the same.
    df, path = panel
    kept = without_singletons(df, effects)
    ref, rank = dummy_fit(kept, effects)
    res = bigpanel.fit(path, "y", "x1, x2", "worker", "year", effects=",".join(c[0] for c in effects), variance=variance)
    n = len(kept)
    assert res.n_obs == n and res.singletons_dropped == len(df) - n
    assert res.absorption["path"] == "iterative" and res.absorption["converged"]
    assert res.absorbed + 2 == rank  # levels with rows minus redundancies = the indicators' rank, less the slopes
    got = np.array([res.coef("x1").estimate, res.coef("x2").estimate])
    np.testing.assert_allclose(got, ref.params[:2], rtol=SLOPE_TOL)
    if variance == "homoskedastic":
        expected = ref.bse[:2]
    else:
        expected = np.sqrt(np.diag(sw.cov_hc0(ref))[:2] * n / (n - rank))
    se = np.array([res.coef("x1").std_error, res.coef("x2").std_error])
    np.testing.assert_allclose(se, expected, rtol=SE_TOL)
    assert res.variance.df == n - rank


@pytest.mark.parametrize("rule", ["all", "not-nested"])
def test_one_way_cluster_errors_match_with_the_documented_factor(panel, rule):
    # Reference: sandwich_covariance.cov_cluster (use_correction=False) on the dummy-variable
    # fit times G/(G-1) (N-1)/(N-K'). "all": K' = the fit's rank. "not-nested": clusters are
    # firms, so the firm effects (nested in them) leave K': K' = rank - firms.
    df, path = panel
    kept = without_singletons(df, EFFECTS_3)
    ref, rank = dummy_fit(kept, EFFECTS_3)
    res = bigpanel.fit(path, "y", "x1, x2", "worker", "year", effects="worker,firm,year", cluster="firm",
                       absorbed_levels=rule)
    n, g = len(kept), kept.firm.nunique()
    k_prime = rank if rule == "all" else rank - g
    assert res.variance.k_prime == k_prime and res.variance.n_clusters == (g,)
    expected = np.sqrt(np.diag(sw.cov_cluster(ref, kept.firm.to_numpy(), use_correction=False))[:2] * cr1(g, n, k_prime))
    np.testing.assert_allclose([res.coef("x1").std_error, res.coef("x2").std_error], expected, rtol=SE_TOL)


def test_two_way_cluster_errors_match_with_one_k_prime(panel):
    # Reference: cov_cluster (no correction) per grouping: worker, year, worker-and-year
    # cells, each times its own G/(G-1) and one (N-1)/(N-K') (Cameron, Gelbach and Miller
    # 2011; ESTIMATION.md). Worker effects nest in worker clusters and year effects in
    # year clusters: K' = rank - rank of (worker, year) indicators.
    df, path = panel
    kept = without_singletons(df, EFFECTS_3)
    ref, rank = dummy_fit(kept, EFFECTS_3)
    res = bigpanel.fit(path, "y", "x1, x2", "worker", "year", effects="worker,firm,year", cluster="worker,year")
    n = len(kept)
    nested_rank = int(np.linalg.matrix_rank(indicators(kept, [["worker"], ["year"]])))
    k_prime = rank - nested_rank
    assert res.variance.k_prime == k_prime
    cell = pd.factorize(kept.worker.astype(str) + "/" + kept.year.astype(str))[0]
    expected = np.zeros((2, 2))
    for groups, sign in ((kept.worker.to_numpy(), 1), (kept.year.to_numpy(), 1), (cell, -1)):
        g = len(np.unique(groups))
        expected += sign * cr1(g, n, k_prime) * sw.cov_cluster(ref, groups, use_correction=False)[:2, :2]
    np.testing.assert_allclose([res.coef("x1").std_error, res.coef("x2").std_error], np.sqrt(np.diag(expected)),
                               rtol=SE_TOL)


def test_cell_effect_is_one_effect_per_combination(panel):
    # Reference: the dummy-variable fit with one indicator per (firm, year) pair, plus workers.
    df, path = panel
    effects = [["worker"], ["firm", "year"]]
    kept = without_singletons(df, effects)
    ref, rank = dummy_fit(kept, effects)
    res = bigpanel.fit(path, "y", "x1, x2", "worker", "year", effects="worker, cell(firm, year)", variance="homoskedastic")
    assert res.effects == ("worker", "cell(firm, year)")
    assert res.absorbed + 2 == rank and res.absorption["redundancies_exact"]
    np.testing.assert_allclose([res.coef("x1").estimate, res.coef("x2").estimate], ref.params[:2], rtol=SLOPE_TOL)
    np.testing.assert_allclose([res.coef("x1").std_error, res.coef("x2").std_error], ref.bse[:2], rtol=SE_TOL)


@pytest.mark.parametrize("effects", [[["worker"], ["firm"]], EFFECTS_3, EFFECTS_4], ids=["two", "three", "four"])
def test_redundancies_equal_the_rank_deficiency_with_disconnected_firms(tmp_path, effects):
    # Reference: numpy matrix_rank of the indicator matrix (every level of every effect).
    # Two groups of firms no worker moves between: the worker-firm graph has two parts.
    df = worker_panel(5, n_workers=90, n_firms=12, groups=2)
    path = write_parquet(df, tmp_path / "two_groups.parquet")
    kept = without_singletons(df, effects)
    d = indicators(kept, effects)
    deficiency = d.shape[1] - int(np.linalg.matrix_rank(d))
    res = bigpanel.fit(path, "y", "x1, x2", "worker", "year", effects=",".join(c[0] for c in effects),
                       variance="homoskedastic")
    assert res.absorption["redundancies"] == deficiency and res.absorption["redundancies_exact"]
    if len(effects) == 2:
        assert deficiency == 2  # the two groups
        assert "connected components" in res.absorption["redundancy_method"]


def test_the_bound_for_many_levels_never_exceeds_the_deficiency(tmp_path, monkeypatch):
    # Past EXACT_RANK_LEVELS the count is the components of every effect's graph with the
    # largest effect: a lower bound on redundancies (numpy matrix_rank gives the truth),
    # equal to it here, where the only dependencies are the groups and the years.
    df = worker_panel(5, n_workers=90, n_firms=12, groups=2)
    path = write_parquet(df, tmp_path / "two_groups.parquet")
    monkeypatch.setattr(sweeps, "EXACT_RANK_LEVELS", 0)
    for effects in (EFFECTS_3, EFFECTS_4):
        kept = without_singletons(df, effects)
        d = indicators(kept, effects)
        deficiency = d.shape[1] - int(np.linalg.matrix_rank(d))
        res = bigpanel.fit(path, "y", "x1, x2", "worker", "year", effects=",".join(c[0] for c in effects),
                           variance="homoskedastic")
        assert not res.absorption["redundancies_exact"] and "lower bound" in res.absorption["redundancy_method"]
        assert res.absorption["redundancies"] <= deficiency
        assert res.absorption["redundancies"] == deficiency == (3 if len(effects) == 3 else 4)


def chain_panel(n_firms: int, seed: int = 3) -> pd.DataFrame:
    """Firms linked in one long chain: worker i moves from firm i to firm i+1 halfway, and
    a few stayers per firm; information crosses the chain one link per sweep."""
    rng = np.random.default_rng(seed)
    rows = []
    for f in range(n_firms - 1):
        rows += [(f, f, t) for t in range(4)] + [(f, f + 1, t) for t in range(4, 8)]
    w = n_firms
    for f in range(n_firms):
        for _ in range(2):
            rows += [(w, f, t) for t in range(8)]
            w += 1
    df = pd.DataFrame(rows, columns=["worker", "firm", "year"])
    n = len(df)
    a_f = np.linspace(-3, 3, n_firms)
    df["x1"] = rng.normal(0, 1, n) + 0.5 * a_f[df.firm]
    df["x2"] = rng.normal(0, 1, n)
    df["y"] = 1.5 * df.x1 - 0.7 * df.x2 + a_f[df.firm] + 0.1 * df.year + rng.normal(0, 1, n)
    return df


def test_slow_convergence_reports_its_sweeps_and_meets_the_tolerance(tmp_path):
    # A chain of 120 firms: many sweeps, and still the dummy-variable slopes (statsmodels)
    # to 1e-8, with the verified remaining level means below the tolerance.
    df = chain_panel(120)
    path = write_parquet(df, tmp_path / "chain.parquet")
    res = bigpanel.fit(path, "y", "x1, x2", "worker", "year", effects="worker,firm,year", variance="homoskedastic")
    a = res.absorption
    assert a["converged"] and a["achieved"] <= a["tolerance"] == 1e-10
    assert a["iterations"] >= 50  # a short chain converges in ~20; this one needs many more
    ref, rank = dummy_fit(df, EFFECTS_3)
    np.testing.assert_allclose([res.coef("x1").estimate, res.coef("x2").estimate], ref.params[:2], rtol=SLOPE_TOL)
    assert res.absorbed + 2 == rank
    text = " ".join(res.table().split())
    assert f"{a['iterations']:,} sweeps" in text and "converged" in text


def test_stopping_short_of_the_tolerance_is_loud(tmp_path):
    df = chain_panel(120)
    path = write_parquet(df, tmp_path / "chain.parquet")
    with pytest.warns(bigpanel.errors.BigpanelWarning, match="did NOT converge"):
        res = bigpanel.fit(path, "y", "x1, x2", "worker", "year", effects="worker,firm,year", effects_iterations=3)
    assert not res.absorption["converged"] and res.absorption["iterations"] == 3
    assert res.absorption["achieved"] > res.absorption["tolerance"]
    assert "NOT CONVERGED" in " ".join(res.table().split())


def test_unit_and_period_keep_their_exact_path(panel):
    df, path = panel
    res = bigpanel.fit(path, "y", "x1, x2", "worker", "year", effects="worker,year", variance="homoskedastic")
    assert res.absorption["path"] == "exact" and "no iteration" in res.absorption["method"]
    many = bigpanel.fit(path, "y", "x1, x2", "worker", "year", effects="worker,year,firm", variance="homoskedastic")
    assert many.absorption["path"] == "iterative"
    assert bigpanel.fit(path, "y", "x1", "worker", "year", estimator="pooled").absorption == {}


def test_fit_many_runs_a_many_effects_model_alone(panel):
    df, path = panel
    models = [dict(outcome="y", regressors="x1, x2", effects="worker,firm,year", variance="hc1"),
              dict(outcome="y", regressors="x1, x2")]
    out = bigpanel.fit_many(path, models, "worker", "year")
    alone = bigpanel.fit(path, "y", "x1, x2", "worker", "year", effects="worker,firm,year", variance="hc1")
    assert out[0].coefficients == alone.coefficients


def _digest(folder) -> dict:
    return {p: hashlib.sha256(open(os.path.join(folder, p), "rb").read()).hexdigest() for p in sorted(os.listdir(folder))}


def test_a_many_effects_fit_leaves_sources_untouched_and_its_scratch_private(panel, tmp_path):
    # The copy lives in the session's private spill folder (under --temp-directory when
    # given) and is removed with the session; the source folder is byte-identical.
    df, path = panel
    folder = os.path.dirname(path)
    before = _digest(folder)
    spill = tmp_path / "spill"
    spill.mkdir()
    seen = []
    real = sweeps.materialise

    def watch(*args, **kwargs):
        copy = real(*args, **kwargs)
        seen.append((copy.store.folder, sorted(os.listdir(copy.store.folder)), oct(os.stat(copy.store.folder).st_mode & 0o777)))
        return copy

    sweeps.materialise = watch
    try:
        res = bigpanel.fit(path, "y", "x1, x2", "worker", "year", effects="worker,firm,year",
                           engine=bigpanel.Engine(temp_directory=str(spill)))
    finally:
        sweeps.materialise = real
    assert res.absorption["converged"]
    (scratch, files, mode), = seen
    assert scratch.startswith(str(spill)) and mode == "0o700" and "z0.bin" in files
    assert _digest(folder) == before
    assert not os.path.exists(scratch) and os.listdir(spill) == []


@pytest.mark.parametrize("effects, message", [
    ("worker, cell(firm)", "cell() takes two or more column names"),
    ("worker, lower(firm)", "is not understood"),
    ("worker, firm, firm", "lists 'firm' twice"),
    ("worker, shop", "shop"),
])
def test_bad_effects_are_refused_with_a_sentence(panel, effects, message):
    _, path = panel
    with pytest.raises(InputError, match=message.replace("(", r"\(").replace(")", r"\)")):
        bigpanel.fit(path, "y", "x1", "worker", "year", effects=effects)


def test_other_estimators_refuse_effects_beyond_unit_and_period(panel):
    _, path = panel
    with pytest.raises(InputError, match="need the within estimator"):
        bigpanel.fit(path, "y", "x1", "worker", "year", estimator="first-difference", effects="year,firm")


@pytest.mark.parametrize("value", [0.0, 1.0, "abc", float("nan")])
def test_tolerance_out_of_range_is_refused(panel, value):
    _, path = panel
    with pytest.raises(InputError, match="effects_tolerance"):
        bigpanel.fit(path, "y", "x1", "worker", "year", effects="worker,firm", effects_tolerance=value)


def test_projection_gives_the_effects_and_residuals_of_the_dummy_variable_fit(panel):
    # sweeps.project on y - x'b (b from statsmodels' dummy-variable fit): the remainder is
    # that fit's residual, and the sum of the row's effects its fitted value less x'b (1e-8).
    from bigpanel.engine import DuckDBEngine
    from bigpanel.execute import Executor, Keys
    from bigpanel.requests import Rows
    from bigpanel.source import Session, as_source

    df, path = panel
    kept = without_singletons(df, EFFECTS_3)
    ref, _ = dummy_fit(kept, EFFECTS_3)
    b1, b2 = (float(v) for v in ref.params[:2])
    expression = f"y - ({b1!r}) * x1 - ({b2!r}) * x2"
    effects = [sweeps.Effect(c[0], (c[0],)) for c in EFFECTS_3]
    with Session(as_source(path)) as session:
        executor = Executor(DuckDBEngine(session), Keys("worker", "year"))
        rows = Rows(((expression, 0),), effects=tuple(e.columns for e in effects))
        proj = sweeps.project(executor, rows, {"s0": 0.0, "d0": 1.0}, effects)
        parts = list(proj.rows())
    keys = pd.DataFrame({"worker": np.concatenate([p[0]["k_unit"].to_numpy() for p in parts]),
                         "year": np.concatenate([p[0]["k_period"].to_numpy() for p in parts]),
                         "remainder": np.concatenate([p[1] - p[2] for p in parts])})
    expected = kept.assign(resid=ref.resid)[["worker", "year", "resid"]]
    both = keys.merge(expected, on=["worker", "year"], validate="one_to_one")
    assert len(both) == len(kept) == sum(len(p[1]) for p in parts)
    np.testing.assert_allclose(both.remainder, both.resid, atol=1e-8)
    firm = next(v for v in proj.effects if v.effect.label == "firm")
    assert firm.levels.column_names == ["k_e1_0"] and len(firm.value) == len(firm.rows) == firm.levels.num_rows
    assert proj.solution.converged
