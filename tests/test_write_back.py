"""Effects and residuals written back (``write_effects``, ``write_residuals``).

References: statsmodels OLS with indicator variables for the effects (dummy-variable least
squares, LSDV) on small generated panels: its fitted values and residuals, and its effect
coefficients after our documented normalisation (bigpanel.writeback: unit effects carry the
level; period effects centred, row-weighted mean zero within each connected group of
units and periods). First differences: statsmodels OLS on differences taken in pandas.
Tolerances: 1e-8 absolute on values of order 1-10 (the issue's requirement; the fits here
agree to ~1e-13, far above it is a real error, not rounding).
"""

from __future__ import annotations

import hashlib
import os
import signal
import subprocess
import sys
import time
import warnings
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
import statsmodels.api as sm

import bigpanel
from bigpanel.cli import main as cli_main
from bigpanel.errors import InputError
from panel_cases import differences, unbalanced_panel, write_parquet, write_parquet_parts

REPO = Path(__file__).resolve().parent.parent
TOL = 1e-8  # the tolerance for recovered effects and fitted values
PATIENCE = 120.0  # seconds before the interrupt test gives up waiting for the write to start


def _fit(*args, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # few clusters on small panels
        return bigpanel.fit(*args, **kwargs)


def _dummy_ols(df: pd.DataFrame, effects: list[str]):
    """statsmodels OLS of y on x1, x2, a constant and indicators of each effect but its
    first level (sorted): the base unit's effect is the constant, the base period's is 0."""
    parts = [df[["x1", "x2"]]]
    for e in effects:
        parts.append(pd.get_dummies(df[e], prefix=e, prefix_sep="=", drop_first=True, dtype=float))
    x = sm.add_constant(pd.concat(parts, axis=1))
    return sm.OLS(df["y"], x).fit()


def _ols_unit_effects(ols, df: pd.DataFrame) -> pd.Series:
    units = np.sort(df["unit"].unique())
    return pd.Series([ols.params["const"] + ols.params.get(f"unit={u}", 0.0) for u in units], index=units)


def _ols_period_effects(ols, df: pd.DataFrame) -> pd.Series:
    periods = np.sort(df["period"].unique())
    return pd.Series([ols.params.get(f"period={t}", 0.0) for t in periods], index=periods)


def _read(path) -> pd.DataFrame:
    return pq.read_table(path).to_pandas()


def _fitted_from_effects(df: pd.DataFrame, result, written: dict) -> pd.DataFrame:
    """x'b plus the sum of the written effects, per row of ``df``."""
    b = np.array([result.coef("x1").estimate, result.coef("x2").estimate])
    out = df.copy()
    out["rebuilt"] = df[["x1", "x2"]].to_numpy() @ b
    for column, path in written["effects"].items():
        effects = _read(path)
        assert list(effects.columns) == [column, "effect", "n_rows"]
        out = out.merge(effects[[column, "effect"]], on=column, how="left", validate="many_to_one")
        out["rebuilt"] += out.pop("effect")
    return out


@pytest.fixture(scope="module")
def panel() -> pd.DataFrame:
    return unbalanced_panel(seed=11, n_units=40, n_periods=7)


@pytest.fixture
def source(tmp_path, panel) -> str:
    """The panel in four Parquet files of unit ranges, in a folder of its own."""
    return write_parquet_parts(panel, tmp_path / "source", 4)


def test_unit_effects_reproduce_dummy_ols(tmp_path, panel, source):
    out = tmp_path / "out"
    r = _fit(source, "y", "x1, x2", "unit", "period", write_effects=str(out), write_residuals=str(out))
    ols = _dummy_ols(panel, ["unit"])  # reference: statsmodels LSDV
    assert set(r.written["effects"]) == {"unit"}
    units = _read(r.written["effects"]["unit"]).set_index("unit")
    expected = _ols_unit_effects(ols, panel)
    assert list(units.index) == list(expected.index)  # one row per unit, sorted
    np.testing.assert_allclose(units["effect"], expected, rtol=0, atol=TOL)
    assert (units["n_rows"] == panel.groupby("unit").size()).all()
    rebuilt = _fitted_from_effects(panel, r, r.written)
    np.testing.assert_allclose(rebuilt["rebuilt"], ols.fittedvalues, rtol=0, atol=TOL)


def test_unit_and_period_effects_reproduce_dummy_ols(tmp_path, panel, source):
    out = tmp_path / "out"
    r = _fit(source, "y", "x1, x2", "unit", "period", effects="unit,period", write_effects=str(out))
    ols = _dummy_ols(panel, ["unit", "period"])  # reference: statsmodels LSDV
    assert set(r.written["effects"]) == {"unit", "period"}
    periods = _read(r.written["effects"]["period"]).set_index("period")
    n_t = panel.groupby("period").size()
    # our normalisation applied to statsmodels' coefficients: period effects centred with
    # row weights, the unit effects taking the mean
    raw = _ols_period_effects(ols, panel)
    centre = float((raw * n_t).sum() / n_t.sum())
    np.testing.assert_allclose(periods["effect"], raw - centre, rtol=0, atol=TOL)
    assert (periods["n_rows"] == n_t).all()
    assert abs((periods["effect"] * periods["n_rows"]).sum()) < TOL
    units = _read(r.written["effects"]["unit"]).set_index("unit")
    np.testing.assert_allclose(units["effect"], _ols_unit_effects(ols, panel) + centre, rtol=0, atol=TOL)
    rebuilt = _fitted_from_effects(panel, r, r.written)
    np.testing.assert_allclose(rebuilt["rebuilt"], ols.fittedvalues, rtol=0, atol=TOL)


@pytest.mark.parametrize("effects", ["unit", "unit,period"])
def test_residuals_match_dummy_ols(tmp_path, panel, source, effects):
    r = _fit(source, "y", "x1, x2", "unit", "period", effects=effects, write_residuals=str(tmp_path / "res"))
    ols = _dummy_ols(panel, effects.split(","))  # reference: statsmodels LSDV
    res = _read(r.written["residuals"])
    assert list(res.columns) == ["unit", "period", "fitted", "residual"]
    assert len(res) == len(panel) == r.n_obs
    both = panel.assign(ref_fitted=ols.fittedvalues, ref_resid=ols.resid).merge(res, on=["unit", "period"],
                                                                                 validate="one_to_one")
    np.testing.assert_allclose(both["fitted"], both["ref_fitted"], rtol=0, atol=TOL)
    np.testing.assert_allclose(both["residual"], both["ref_resid"], rtol=0, atol=TOL)
    np.testing.assert_allclose(both["fitted"] + both["residual"], both["y"], rtol=0, atol=TOL)
    # the residuals' sums: zero over all rows and within every unit (unit effects), and
    # the sum of squares is statsmodels' residual sum of squares
    assert abs(res["residual"].sum()) < TOL
    assert res.groupby("unit")["residual"].sum().abs().max() < TOL
    assert (res["residual"] ** 2).sum() == pytest.approx(ols.ssr, rel=1e-10)


def test_disconnected_groups_are_centred_each(tmp_path):
    """Units 0-11 seen in periods 1-4 only, units 12-23 in periods 5-8 only: two groups
    with no period in common, so one more period effect is not identified. Each group's
    period effects are centred on their own; fitted values still match dummy OLS
    (statsmodels, pseudo-inverse of the rank-deficient design)."""
    rng = np.random.default_rng(5)
    frames = []
    for u in range(24):
        periods = np.arange(1, 5) if u < 12 else np.arange(5, 9)
        keep = periods[rng.random(4) < 0.85] if u % 3 else periods
        frames.append(pd.DataFrame({"unit": u, "period": keep}))
    df = pd.concat(frames, ignore_index=True)
    n = len(df)
    df["x1"] = rng.normal(size=n) + 0.1 * df["unit"]
    df["x2"] = rng.normal(size=n)
    df["y"] = 1.5 * df["x1"] - 0.7 * df["x2"] + 0.2 * df["unit"] + np.sin(df["period"]) + rng.normal(size=n)
    path = write_parquet(df, (tmp_path / "src").mkdir() or tmp_path / "src" / "two.parquet")
    r = _fit(path, "y", "x1, x2", "unit", "period", effects="unit,period", write_effects=str(tmp_path / "out"),
             write_residuals=str(tmp_path / "out"))
    assert any(t.startswith("period=") for t in r.terms_dropped)  # the fit found the groups' redundancy
    ols = _dummy_ols(df, ["unit", "period"])
    periods = _read(r.written["effects"]["period"])
    for group in (periods["period"] <= 4, periods["period"] > 4):
        assert abs((periods["effect"] * periods["n_rows"])[group].sum()) < TOL
    rebuilt = _fitted_from_effects(df, r, r.written)
    np.testing.assert_allclose(rebuilt["rebuilt"], ols.fittedvalues, rtol=0, atol=TOL)
    res = df.assign(ref=ols.resid).merge(_read(r.written["residuals"]), on=["unit", "period"])
    np.testing.assert_allclose(res["residual"], res["ref"], rtol=0, atol=TOL)


def test_date_periods_take_the_indicator_path(tmp_path, panel):
    """Weekly DATE periods: period effects are indicator columns inside the within fit;
    the written residuals and centred period effects match statsmodels LSDV all the same."""
    df = panel.assign(week=pd.to_datetime("2020-01-06") + pd.to_timedelta((panel.period - 1) * 7, unit="D"))
    path = write_parquet(df, (tmp_path / "src").mkdir() or tmp_path / "src" / "weeks.parquet")
    r = _fit(path, "y", "x1, x2", "unit", "week", effects="unit,week", write_effects=str(tmp_path / "o"),
             write_residuals=str(tmp_path / "o"))
    ols = _dummy_ols(panel, ["unit", "period"])
    res = df.assign(ref=ols.resid).merge(_read(r.written["residuals"]), on=["unit", "week"], validate="one_to_one")
    np.testing.assert_allclose(res["residual"], res["ref"], rtol=0, atol=TOL)
    weeks = _read(r.written["effects"]["week"])
    raw = _ols_period_effects(ols, panel).to_numpy()
    n_t = panel.groupby("period").size().to_numpy()
    np.testing.assert_allclose(weeks["effect"], raw - (raw * n_t).sum() / n_t.sum(), rtol=0, atol=TOL)


def test_first_difference_residuals_match_ols_on_differences(tmp_path, panel, source):
    r = _fit(source, "y", "x1, x2", "unit", "period", estimator="first-difference",
             write_residuals=str(tmp_path / "res"))
    d = differences(panel, ["x1", "x2", "y"])  # reference: pandas differences, statsmodels OLS
    ols = sm.OLS(d["y"], sm.add_constant(d[["x1", "x2"]])).fit()
    res = _read(r.written["residuals"])
    assert len(res) == len(d)
    both = d.assign(ref=ols.resid, ref_fitted=ols.fittedvalues).merge(res, on=["unit", "period"], validate="one_to_one")
    np.testing.assert_allclose(both["residual"], both["ref"], rtol=0, atol=TOL)
    np.testing.assert_allclose(both["fitted"], both["ref_fitted"], rtol=0, atol=TOL)


def test_fit_many_writes_each_models_files(tmp_path, panel, source):
    """A model of fit_many writes the same residuals as the same fit alone (statsmodels
    LSDV as the reference for both)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        results = bigpanel.fit_many(source, [dict(outcome="y", regressors="x1, x2", write_residuals=str(tmp_path / "a")),
                                             dict(outcome="y", regressors="x1", estimator="pooled")],
                                    unit="unit", period="period")
    assert results[1].written == {}
    res = _read(results[0].written["residuals"])
    ols = _dummy_ols(panel, ["unit"])
    both = panel.assign(ref=ols.resid).merge(res, on=["unit", "period"], validate="one_to_one")
    np.testing.assert_allclose(both["residual"], both["ref"], rtol=0, atol=TOL)


def _digest(folder: Path) -> dict:
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def test_source_unchanged_and_no_temporary_left(tmp_path, source):
    before = _digest(Path(source))
    out = tmp_path / "out"
    for _ in range(2):  # the second run replaces the first run's files
        r = _fit(source, "y", "x1, x2", "unit", "period", effects="unit,period", write_effects=str(out),
                 write_residuals=str(out))
    assert _digest(Path(source)) == before
    assert sorted(p.name for p in out.iterdir()) == ["effect_period.parquet", "effect_unit.parquet", "residuals.parquet"]
    assert r.written["residuals"] == str(out / "residuals.parquet")


@pytest.mark.parametrize("inside", ["source", "source/sub"])
def test_folder_among_the_sources_is_refused(tmp_path, source, inside):
    before = _digest(Path(source))
    with pytest.raises(InputError, match="never writes among its sources"):
        _fit(source, "y", "x1, x2", "unit", "period", write_effects=str(tmp_path / inside))
    assert _digest(Path(source)) == before
    assert not (tmp_path / "source" / "sub").exists()  # refused before anything is made


def test_folder_holding_the_source_file_is_refused(tmp_path, panel):
    path = write_parquet(panel, tmp_path / "panel.parquet")
    with pytest.raises(InputError, match="holds the source file"):
        _fit(path, "y", "x1, x2", "unit", "period", write_residuals=str(tmp_path))


def test_bad_targets_are_refused_with_one_sentence(tmp_path, source, capsys):
    blocker = tmp_path / "a-file"
    blocker.write_text("x")
    base = [source, "--unit", "unit", "--period", "period", "--outcome", "y", "--regressors", "x1, x2"]
    assert cli_main(["fit", *base, "--write-effects", str(blocker)]) == 2
    assert "Option --write-effects names" in capsys.readouterr().err
    assert cli_main(["fit", *base, "--estimator", "first-difference", "--write-effects", str(tmp_path / "o")]) == 2
    assert "needs the within estimator" in capsys.readouterr().err
    assert cli_main(["fit", *base, "--estimator", "pooled", "--write-residuals", str(tmp_path / "o")]) == 2
    assert "not pooled ones" in capsys.readouterr().err
    assert not (tmp_path / "o").exists()


def test_cli_writes_and_reports(tmp_path, source, capsys):
    out = tmp_path / "cli-out"
    code = cli_main(["fit", source, "--unit", "unit", "--period", "period", "--outcome", "y", "--regressors", "x1, x2",
                     "--effects", "unit,period", "--write-effects", str(out), "--write-residuals", str(out), "--json"])
    assert code == 0
    import json

    payload = json.loads(capsys.readouterr().out)
    assert payload["written"]["effects"]["period"] == str(out / "effect_period.parquet")
    assert "centred" in payload["written"]["normalisation"]
    assert len(_read(out / "residuals.parquet")) == payload["n_obs"]


def test_writer_instance_reaches_only_its_file(tmp_path, source):
    """The writer DuckDB instance can write its temporary file and nothing else: it can
    neither read the source nor write beside it."""
    from bigpanel.source import Engine, writer_connection

    target = tmp_path / "only.parquet"
    con = writer_connection(Engine(threads=1), [str(target)])
    try:
        con.execute(f"COPY (SELECT 1 AS a) TO '{target}' (FORMAT parquet)")
        assert target.exists()
        first = sorted(Path(source).iterdir())[0]
        for sql in (f"SELECT * FROM '{first}'", f"COPY (SELECT 1) TO '{tmp_path / 'other.parquet'}' (FORMAT parquet)",
                    "SET enable_external_access = true"):
            with pytest.raises(duckdb.Error):
                con.execute(sql)
    finally:
        con.close()
    assert not (tmp_path / "other.parquet").exists()


# ---------------------------------------------------------------- many effects (absorbed by iteration)


def _many_fit(tmp_path, df, effects: str):
    folder = tmp_path / "many-src"
    folder.mkdir(exist_ok=True)
    path = write_parquet(df, folder / "workers.parquet")
    out = tmp_path / "many-out"
    r = _fit(path, "y", "x1, x2", "worker", "year", effects=effects, write_effects=str(out), write_residuals=str(out))
    return r, out


def _worker_dummy_ols(rows: pd.DataFrame, effects: list[list[str]]):
    """statsmodels OLS of y on x1, x2, a constant and indicators of every effect's levels
    but the first (a cell effect: one indicator per combination), on the rows given."""
    parts = [rows[["x1", "x2"]]]
    for cols in effects:
        key = rows[cols].astype(str).agg("|".join, axis=1) if len(cols) > 1 else rows[cols[0]]
        parts.append(pd.get_dummies(key, prefix="=".join(cols), prefix_sep="=", drop_first=True, dtype=float))
    return sm.OLS(rows["y"], sm.add_constant(pd.concat(parts, axis=1))).fit()


def test_three_effects_reproduce_dummy_ols(tmp_path):
    from test_many_effects import without_singletons, worker_panel

    df = worker_panel(seed=3)  # workers moving between firms, with singletons in a cascade
    r, out = _many_fit(tmp_path, df, "worker,firm,year")
    effects = [["worker"], ["firm"], ["year"]]
    rows = without_singletons(df, effects).reset_index(drop=True)  # the rule, in pandas
    ols = _worker_dummy_ols(rows, effects)  # reference: statsmodels LSDV on the rows left
    assert r.absorption["path"] == "iterative" and r.absorption["converged"]
    assert set(r.written["effects"]) == {"worker", "firm", "year"}
    files = {c: _read(p) for c, p in r.written["effects"].items()}
    for column in ("worker", "firm", "year"):
        counts = rows.groupby(column).size()
        table = files[column].set_index(column)
        assert list(table.index) == list(counts.index)  # levels with rows after singletons, sorted
        assert (table["n_rows"] == counts).all()
    # our normalisation on statsmodels' coefficients: firm and year effects centred with row
    # weights (the mobility graph is connected here), the worker effects taking the means
    b = np.array([r.coef("x1").estimate, r.coef("x2").estimate])
    np.testing.assert_allclose(b, ols.params[["x1", "x2"]], rtol=0, atol=1e-8)
    means = {}
    for column in ("firm", "year"):
        coef = pd.Series({v: ols.params.get(f"{column}={v}", 0.0) for v in sorted(rows[column].unique())})
        n = rows.groupby(column).size()
        means[column] = float((coef * n).sum() / n.sum())
        assert abs((files[column]["effect"] * files[column]["n_rows"]).sum()) < TOL
        np.testing.assert_allclose(files[column].set_index(column)["effect"], coef - means[column], rtol=0, atol=1e-7)
    worker = pd.Series({v: ols.params["const"] + ols.params.get(f"worker={v}", 0.0) for v in sorted(rows.worker.unique())})
    np.testing.assert_allclose(files["worker"].set_index("worker")["effect"], worker + sum(means.values()), rtol=0, atol=1e-7)
    rebuilt = rows.copy()
    rebuilt["rebuilt"] = rows[["x1", "x2"]].to_numpy() @ b
    for column, table in files.items():
        rebuilt = rebuilt.merge(table[[column, "effect"]], on=column, validate="many_to_one")
        rebuilt["rebuilt"] += rebuilt.pop("effect")
    both = rows.assign(ref=ols.fittedvalues).merge(rebuilt[["worker", "year", "rebuilt"]], on=["worker", "year"])
    np.testing.assert_allclose(both["rebuilt"], both["ref"], rtol=0, atol=TOL)
    res = _read(r.written["residuals"])
    assert list(res.columns) == ["worker", "year", "firm", "fitted", "residual"]
    assert len(res) == len(rows) == r.n_obs
    joined = rows.assign(ref_fitted=ols.fittedvalues, ref_resid=ols.resid).merge(
        res, on=["worker", "year"], validate="one_to_one", suffixes=("", "_written"))
    assert (joined["firm"] == joined["firm_written"]).all()
    np.testing.assert_allclose(joined["fitted"], joined["ref_fitted"], rtol=0, atol=TOL)
    np.testing.assert_allclose(joined["residual"], joined["ref_resid"], rtol=0, atol=TOL)
    assert (res["residual"] ** 2).sum() == pytest.approx(ols.ssr, rel=1e-9)


def test_many_effects_disconnected_firms_centred_per_group(tmp_path):
    """Two groups of firms no worker moves between: firm effects are centred within each
    group; fitted values still match the dummy-variable fit (statsmodels, pseudo-inverse)."""
    from test_many_effects import worker_panel

    df = worker_panel(seed=8, groups=2, singletons=False)
    r, _ = _many_fit(tmp_path, df, "worker,firm,year")
    firms = _read(r.written["effects"]["firm"])
    half = df.firm.max() // 2 + 1  # worker_panel gives group g the firms g*9 .. g*9+8
    for group in (firms["firm"] < half, firms["firm"] >= half):
        assert group.any() and abs((firms["effect"] * firms["n_rows"])[group].sum()) < TOL
    ols = _worker_dummy_ols(df, [["worker"], ["firm"], ["year"]])
    res = df.assign(ref=ols.fittedvalues).merge(_read(r.written["residuals"]), on=["worker", "year"])
    np.testing.assert_allclose(res["fitted"], res["ref"], rtol=0, atol=TOL)


def test_cell_effect_written_with_both_columns(tmp_path):
    from test_many_effects import worker_panel

    df = worker_panel(seed=5, singletons=False)
    df = df[df.groupby(["firm", "year"]).worker.transform("size") > 1].reset_index(drop=True)  # no singleton cells
    r, out = _many_fit(tmp_path, df, "worker, cell(firm, year)")
    assert r.written["effects"]["cell(firm, year)"] == str(out / "effect_firm_year.parquet")
    cells = _read(out / "effect_firm_year.parquet")
    assert list(cells.columns) == ["firm", "year", "effect", "n_rows"]
    ols = _worker_dummy_ols(df, [["worker"], ["firm", "year"]])
    res = df.assign(ref=ols.resid).merge(_read(r.written["residuals"]), on=["worker", "year"], validate="one_to_one")
    np.testing.assert_allclose(res["residual"], res["ref"], rtol=0, atol=TOL)
    rebuilt = (df.merge(_read(r.written["effects"]["worker"]).rename(columns={"effect": "a"}), on="worker")
               .merge(cells.rename(columns={"effect": "c"}), on=["firm", "year"]))
    b = np.array([r.coef("x1").estimate, r.coef("x2").estimate])
    fitted = rebuilt[["x1", "x2"]].to_numpy() @ b + rebuilt["a"] + rebuilt["c"]
    both = df.assign(ref=ols.fittedvalues).merge(rebuilt[["worker", "year"]].assign(g=fitted.to_numpy()), on=["worker", "year"])
    np.testing.assert_allclose(both["g"], both["ref"], rtol=0, atol=TOL)


# ---------------------------------------------------------------- an interrupted write

BIG_QUERY = ("SELECT i // 10 AS unit, i % 10 AS period, hash(i) % 1000 * 1.0 AS x1, "
             "hash(i + 1) % 997 * 1.0 + i % 10 AS y FROM range(1000000) t(i)")


def _launch(tmp: Path, out: Path) -> subprocess.Popen:
    env = dict(os.environ, PYTHONPATH=str(REPO), TMPDIR=str(tmp))
    args = ["fit", "--query", BIG_QUERY, "--unit", "unit", "--period", "period", "--outcome", "y",
            "--regressors", "x1", "--write-residuals", str(out)]
    return subprocess.Popen([sys.executable, "-m", "bigpanel", *args], cwd=tmp, env=env, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)


def _wait_for_write(proc: subprocess.Popen, out: Path) -> None:
    """Until the residuals' temporary file exists in the private folder inside ``out``."""
    deadline = time.monotonic() + PATIENCE
    while not any(out.glob("bigpanel-*/residuals.parquet")):
        assert proc.poll() is None, f"exited early with {proc.returncode}: {proc.stderr.read()}"
        assert time.monotonic() < deadline, "the write never started"
        time.sleep(0.002)


@pytest.mark.parametrize("how", [signal.SIGTERM, signal.SIGKILL])
def test_a_killed_write_leaves_no_partial_file(tmp_path, how):
    out = tmp_path / "out"
    proc = _launch(tmp_path, out)
    _wait_for_write(proc, out)
    proc.send_signal(how)
    proc.communicate(timeout=PATIENCE)
    assert not (out / "residuals.parquet").exists()  # never a file under its final name
    if how == signal.SIGTERM:  # caught: the run ends cleanly and removes its private folder
        assert proc.returncode == 143
        assert list(out.iterdir()) == []
    else:  # not catchable: only the private (mode 0700) staging folder may remain
        assert proc.returncode == -signal.SIGKILL
        assert all(p.name.startswith("bigpanel-") and p.is_dir() for p in out.iterdir())
