"""Tests of the synthetic panel generator (datagen), on small panels."""

from functools import partial
import json
import subprocess
import sys

import numpy as np
import pyarrow.parquet as pq
import pytest

import datagen
from datagen import build, model
from datagen.__main__ import main

SMALL = dict(n_units=300, n_periods=12, seed=7)


def read_panel(folder):
    """Return the panel's columns as numpy arrays, files read in name order."""
    tables = [pq.read_table(path) for path in sorted(folder.glob("*.parquet"))]
    columns = {}
    for name in tables[0].column_names:
        parts = [table[name].to_numpy() if name != "depot_kind" else
                 np.asarray(table[name].to_pylist()) for table in tables]
        columns[name] = np.concatenate(parts)
    return columns


def spans(panel):
    """Per depot: first month, last month and row count."""
    depots, inverse = np.unique(panel["depot"], return_inverse=True)
    first = np.full(depots.size, np.iinfo(np.int64).max)
    last = np.zeros(depots.size, dtype=np.int64)
    np.minimum.at(first, inverse, panel["month"])
    np.maximum.at(last, inverse, panel["month"])
    return first, last, np.bincount(inverse)


@pytest.fixture
def small_blocks(monkeypatch):
    """Make blocks of 50 rows so that small panels span several blocks and spool files."""
    monkeypatch.setattr(build, "BLOCK_ROWS", 50)


@pytest.mark.parametrize("order", ["unit", "period"])
def test_same_seed_gives_identical_files(tmp_path, order):
    first = datagen.generate(tmp_path / "a", **SMALL, unbalanced=0.1, gaps=0.1, order=order)
    second = datagen.generate(tmp_path / "b", **SMALL, unbalanced=0.1, gaps=0.1, order=order)
    names = sorted(p.name for p in first.iterdir())
    assert names == sorted(p.name for p in second.iterdir())
    for name in names:
        assert (first / name).read_bytes() == (second / name).read_bytes(), name
    other = datagen.generate(tmp_path / "c", **{**SMALL, "seed": 8}, unbalanced=0.1, gaps=0.1)
    assert not np.array_equal(read_panel(first)["parcels"][:10], read_panel(other)["parcels"][:10])


def test_balanced_panel_has_every_depot_month(tmp_path):
    folder = datagen.generate(tmp_path / "p", **SMALL)
    panel = read_panel(folder)
    truth = datagen.load_truth(folder)
    assert panel["depot"].size == truth["n_rows"] == 300 * 12
    assert sum(f["rows"] for f in truth["files"]) == truth["n_rows"]
    assert truth["n_unbalanced_units"] == truth["n_gap_units"] == 0
    first, last, counts = spans(panel)
    assert np.all(first == 1) and np.all(last == 12) and np.all(counts == 12)


def test_unbalanced_and_gap_shares_as_requested(tmp_path):
    n_units, unbalanced, gaps = 4000, 0.2, 0.1
    folder = datagen.generate(tmp_path / "p", n_units=n_units, n_periods=12, unbalanced=unbalanced, gaps=gaps)
    panel = read_panel(folder)
    truth = datagen.load_truth(folder)
    first, last, counts = spans(panel)
    assert first.size == n_units  # every depot keeps at least one month
    moved = (first > 1) | (last < 12)
    holed = counts < last - first + 1
    assert truth["n_unbalanced_units"] == moved.sum()
    assert truth["n_gap_units"] == holed.sum()
    assert truth["n_rows"] == panel["depot"].size
    assert np.all(last[holed] - first[holed] + 1 - counts[holed] == 1)
    # Binomial counts: 4 standard deviations of the share (common practice).
    for share, wanted in ((moved.mean(), unbalanced), (holed.mean(), gaps)):
        assert abs(share - wanted) < 4 * np.sqrt(wanted * (1 - wanted) / n_units)


def test_missing_months_leave_other_values_unchanged(tmp_path):
    full = read_panel(datagen.generate(tmp_path / "full", **SMALL))
    holed = read_panel(datagen.generate(tmp_path / "holed", **SMALL, unbalanced=0.3, gaps=0.3))
    assert holed["depot"].size < full["depot"].size
    keep = np.isin((full["depot"] - 1) * 12 + full["month"], (holed["depot"] - 1) * 12 + holed["month"])
    for name in full:
        np.testing.assert_array_equal(full[name][keep], holed[name], err_msg=name)


@pytest.mark.usefixtures("small_blocks")
def test_unit_order_sorts_by_depot_and_keeps_depots_whole(tmp_path):
    folder = datagen.generate(tmp_path / "p", **SMALL, gaps=0.2, rows_per_file=100)
    panel = read_panel(folder)
    keys = panel["depot"] * 100 + panel["month"]
    assert np.all(np.diff(keys) > 0)
    files = sorted(folder.glob("*.parquet"))
    ranges = [pq.read_table(path, columns=["depot"])["depot"].to_numpy() for path in files]
    assert len(files) > 10
    for before, after in zip(ranges, ranges[1:]):
        assert before.max() < after.min()


@pytest.mark.usefixtures("small_blocks")
def test_period_order_holds_the_same_rows_sorted_by_month(tmp_path):
    by_unit = read_panel(datagen.generate(tmp_path / "u", **SMALL, unbalanced=0.2, gaps=0.2))
    by_period = read_panel(datagen.generate(tmp_path / "t", **SMALL, unbalanced=0.2, gaps=0.2,
                                            order="period", rows_per_file=500))
    keys = by_period["month"] * 10_000 + by_period["depot"]
    assert np.all(np.diff(keys) > 0)
    order = np.lexsort((by_period["month"], by_period["depot"]))
    for name in by_unit:
        np.testing.assert_array_equal(by_unit[name], by_period[name][order], err_msg=name)


@pytest.mark.parametrize("order", ["unit", "period"])
def test_files_and_row_groups_respect_their_sizes(tmp_path, order):
    folder = datagen.generate(tmp_path / "p", **SMALL, gaps=0.2, order=order, rows_per_file=700,
                              row_group_size=128)
    for path in sorted(folder.glob("*.parquet")):
        meta = pq.ParquetFile(path).metadata
        sizes = [meta.row_group(i).num_rows for i in range(meta.num_row_groups)]
        assert meta.num_rows <= 700
        assert all(size == 128 for size in sizes[:-1]) and 0 < sizes[-1] <= 128


def test_truth_json_describes_the_panel(tmp_path):
    folder = datagen.generate(tmp_path / "p", **SMALL, unbalanced=0.1, order="period", compression="zstd")
    truth = json.loads((folder / "truth.json").read_text())
    assert truth["options"] == {"n_units": 300, "n_periods": 12, "seed": 7, "unbalanced": 0.1, "gaps": 0.0,
                                "order": "period", "rows_per_file": 2_000_000, "row_group_size": 100_000,
                                "compression": "zstd"}
    assert truth["coefficients"] == {"staff_hours": 2.0, "vans": 15.0, "fuel_price": -3.0,
                                     "rain_mm": -0.4, "promo": 25.0}
    assert truth["error"]["rho"] == 0.5
    assert truth["error"]["stationary_sd"] == pytest.approx(20.0 / np.sqrt(0.75), rel=1e-15)
    assert len(truth["month_effects"]) == 12
    assert truth["depot_effect"]["corr_with_depot_mean_staff_hours"] > 0.5
    assert truth["n_regions"] == 50
    assert list(truth["columns"]) == pq.read_schema(folder / "part-00000.parquet").names
    assert [f["name"] for f in truth["files"]] == sorted(p.name for p in folder.glob("*.parquet"))


def test_depot_attributes_are_constant_within_depot(tmp_path):
    panel = read_panel(datagen.generate(tmp_path / "p", **SMALL, unbalanced=0.2))
    for name in ("region", "depot_kind", "opened_year"):
        pairs = np.unique(np.rec.fromarrays([panel["depot"], panel[name]]))
        assert pairs.size == SMALL["n_units"], name
    assert set(panel["depot_kind"]) == {"hub", "city", "rural"}
    assert np.unique(panel["region"]).size == model.n_regions(SMALL["n_units"]) == 50


def _cluster_robust(x, y, clusters):
    """OLS slopes and CR1 standard errors (Cameron and Miller 2015, see shared ESTIMATION.md)."""
    beta = np.linalg.lstsq(x, y, rcond=None)[0]
    resid = y - x @ beta
    bread = np.linalg.inv(x.T @ x)
    _, group = np.unique(clusters, return_inverse=True)
    scores = np.zeros((group.max() + 1, x.shape[1]))
    np.add.at(scores, group, x * resid[:, None])
    n, k, g = x.shape[0], x.shape[1], scores.shape[0]
    vcov = bread @ (scores.T @ scores) @ bread * g / (g - 1) * (n - 1) / (n - k)
    return beta, np.sqrt(np.diag(vcov))


def test_dummy_variable_least_squares_recovers_true_slopes(tmp_path):
    folder = datagen.generate(tmp_path / "p", n_units=200, n_periods=12, seed=3, unbalanced=0.1, gaps=0.1)
    panel = read_panel(folder)
    truth = datagen.load_truth(folder)
    names = list(truth["coefficients"])
    x = np.column_stack([panel[name] for name in names])
    y = panel["parcels"]
    # Reference: numpy.linalg.lstsq with depot and month indicator columns (dense dummy-variable
    # regression); by Frisch-Waugh-Lovell the slopes equal those on the residualised columns.
    depot_codes = np.unique(panel["depot"], return_inverse=True)[1]
    dummies = np.zeros((y.size, depot_codes.max() + 12))
    dummies[np.arange(y.size), depot_codes] = 1.0
    later = panel["month"] > 1
    dummies[later, depot_codes.max() + panel["month"][later] - 1] = 1.0
    fitted = dummies @ np.linalg.lstsq(dummies, np.column_stack([x, y]), rcond=None)[0]
    resid = np.column_stack([x, y]) - fitted
    beta, se = _cluster_robust(resid[:, :-1], resid[:, -1], panel["region"])
    true = np.array([truth["coefficients"][name] for name in names])
    assert np.all(np.abs(beta - true) < 4 * se), (beta, se)
    # Pooled least squares ignores the depot effect, which rises with staff hours: biased upward.
    pooled, pooled_se = _cluster_robust(np.column_stack([np.ones(y.size), x]), y, panel["region"])
    assert pooled[1] - true[0] > 4 * pooled_se[1]


def test_error_is_ar1_within_depot_plus_a_region_shock(tmp_path):
    n_units, n_periods = 5000, 12
    folder = datagen.generate(tmp_path / "p", n_units=n_units, n_periods=n_periods, seed=11)
    panel = read_panel(folder)
    truth = datagen.load_truth(folder)
    rho, innovation_sd = truth["error"]["rho"], truth["error"]["innovation_sd"]
    region_sd = truth["error"]["region_shock_sd"]
    # With the true slopes and month effects removed, r = depot effect + e + region shock.
    slopes = sum(beta * panel[name] for name, beta in truth["coefficients"].items())
    r = (panel["parcels"] - slopes - np.array(truth["month_effects"])[panel["month"] - 1])
    r = r.reshape(n_units, n_periods)
    region = panel["region"].reshape(n_units, n_periods)[:, 0] - 1
    per_region = np.bincount(region)
    region_means = np.zeros((per_region.size, n_periods))
    np.add.at(region_means, region, r)
    region_means /= per_region[:, None]
    # Differences of an AR(1): corr(de_t, de_t-1) = -(1 - rho) / 2, var(de) = 2 s^2 / (1 + rho)
    # (standard AR(1) algebra, common practice); region-month means remove the shared shock.
    de = np.diff(r - region_means[region], axis=1)
    assert np.corrcoef(de[:, 1:].ravel(), de[:, :-1].ravel())[0, 1] == pytest.approx(-(1 - rho) / 2, abs=0.03)
    shrink = 1 - 1 / per_region.mean()  # a depot's own share of its region mean
    assert de.var() == pytest.approx(2 * innovation_sd**2 / (1 + rho) * shrink, rel=0.05)
    # Differences of region-month means: 2 * region_sd^2 plus the averaged depot errors.
    noise = 2 * innovation_sd**2 / (1 + rho) / per_region.mean()
    assert np.diff(region_means, axis=1).var() == pytest.approx(2 * region_sd**2 + noise, rel=0.3)


@pytest.mark.usefixtures("small_blocks")
def test_failed_run_leaves_nothing_behind(tmp_path, monkeypatch):
    calls = []

    def failing(*args):
        calls.append(1)
        if len(calls) == 3:
            raise RuntimeError("disk on fire")
        return simulate(*args)

    simulate = model.simulate_block
    monkeypatch.setattr(model, "simulate_block", failing)
    with pytest.raises(RuntimeError):
        datagen.generate(tmp_path / "p", **SMALL)
    assert list(tmp_path.iterdir()) == []


def test_existing_folder_is_kept_unless_overwrite(tmp_path):
    folder = datagen.generate(tmp_path / "p", **SMALL)
    with pytest.raises(datagen.DatagenError, match="already exists"):
        datagen.generate(folder, **SMALL)
    datagen.generate(folder, **{**SMALL, "n_units": 10}, overwrite=True)
    assert datagen.load_truth(folder)["n_rows"] == 120
    assert sorted(p.name for p in tmp_path.iterdir()) == ["p"]


def test_ensure_reuses_a_matching_folder_and_rebuilds_otherwise(tmp_path, monkeypatch):
    folder = datagen.ensure(tmp_path / "p", **SMALL)
    made = (folder / "part-00000.parquet").stat().st_mtime_ns

    def refuse(*args, **kwargs):
        raise AssertionError("generate called for a matching folder")

    monkeypatch.setattr(build, "generate", refuse)
    assert datagen.ensure(folder, **SMALL) == folder
    assert (folder / "part-00000.parquet").stat().st_mtime_ns == made
    monkeypatch.undo()
    datagen.ensure(folder, **{**SMALL, "gaps": 0.1})
    assert datagen.load_truth(folder)["options"]["gaps"] == 0.1


@pytest.mark.parametrize("make", [datagen.ensure, partial(datagen.generate, overwrite=True)])
def test_a_foreign_folder_is_left_alone(tmp_path, make):
    (tmp_path / "mine").mkdir()
    (tmp_path / "mine" / "notes.txt").write_text("keep")
    with pytest.raises(datagen.DatagenError, match="is not empty and has no truth.json"):
        make(tmp_path / "mine", **SMALL)
    assert (tmp_path / "mine" / "notes.txt").read_text() == "keep"
    (tmp_path / "file").write_text("keep")
    with pytest.raises(datagen.DatagenError, match="is a file, not a folder"):
        make(tmp_path / "file", **SMALL)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["file", "mine"]


def test_an_empty_folder_is_filled(tmp_path):
    (tmp_path / "p").mkdir()
    assert datagen.load_truth(datagen.generate(tmp_path / "p", **SMALL))["n_rows"] == 300 * 12


@pytest.mark.parametrize("options, message", [
    ({"n_units": 0}, "The n_units option (--units) must be an integer >= 1; got 0."),
    ({"n_periods": 2.5}, "The n_periods option (--periods) must be an integer >= 1; got 2.5."),
    ({"seed": -1}, "The seed option (--seed) must be an integer >= 0; got -1."),
    ({"unbalanced": 1.5}, "The unbalanced option (--unbalanced) must be a share in [0, 1]; got 1.5."),
    ({"gaps": float("nan")}, "The gaps option (--gaps) must be a share in [0, 1]; got nan."),
    ({"order": "depot"}, "The order option (--order) must be one of 'unit', 'period'; got 'depot'."),
    ({"row_group_size": True}, "The row_group_size option (--row-group-size) must be an integer >= 1"),
    ({"n_periods": 2, "gaps": 0.1}, "The gaps option (--gaps) needs n_periods >= 3"),
    ({"n_periods": 1, "unbalanced": 0.1}, "The unbalanced option (--unbalanced) needs n_periods >= 2"),
])
def test_bad_options_are_named(tmp_path, options, message):
    with pytest.raises(datagen.DatagenError) as error:
        datagen.generate(tmp_path / "p", **{**SMALL, **options})
    assert str(error.value).startswith(message)
    assert not (tmp_path / "p").exists()


def test_cli_writes_a_panel(tmp_path, capsys):
    assert main([str(tmp_path / "p"), "--units", "20", "--periods", "5", "--order", "period"]) == 0
    assert capsys.readouterr().out == f"{tmp_path / 'p'}: 100 rows in 1 Parquet file\n"
    assert datagen.load_truth(tmp_path / "p")["options"]["order"] == "period"


@pytest.mark.parametrize("argv, message", [
    (["--units", "0", "--periods", "5"], "The n_units option (--units) must be an integer >= 1; got 0."),
    (["--units", "ten", "--periods", "5"], "python -m datagen: argument --units: invalid int value: 'ten'."),
    (["--units", "5", "--periods", "5", "--order", "depot"],
     "python -m datagen: argument --order: invalid choice: 'depot' (choose from"),
])
def test_cli_bad_options_exit_2_with_one_sentence(tmp_path, capsys, argv, message):
    with pytest.raises(SystemExit) as stop:
        sys.exit(main([str(tmp_path / "p"), *argv]))
    assert stop.value.code == 2
    err = capsys.readouterr().err
    assert err.startswith(message) and err.endswith(".\n") and err.count("\n") == 1
    assert not (tmp_path / "p").exists()


def test_cli_module_reports_without_traceback(tmp_path):
    folder = datagen.generate(tmp_path / "p", n_units=5, n_periods=3)
    done = subprocess.run([sys.executable, "-m", "datagen", str(folder), "--units", "5", "--periods", "3"],
                          capture_output=True, text=True)
    assert done.returncode == 2
    assert done.stderr == (f"Output folder {folder} already exists. Pass overwrite=True (--overwrite) "
                           "or choose another folder.\n")


def test_cli_write_failure_exits_1_with_one_sentence(tmp_path, capsys):
    (tmp_path / "file").write_text("keep")
    assert main([str(tmp_path / "file" / "p"), "--units", "5", "--periods", "3"]) == 1
    err = capsys.readouterr().err
    assert err.startswith(f"Could not write {tmp_path / 'file' / 'p'}: ") and err.count("\n") == 1
    assert sorted(p.name for p in tmp_path.iterdir()) == ["file"]


# ---------------------------------------------------------------- couriers by year (three effects)

COURIERS = dict(n_couriers=300, n_depots=25, n_years=6, seed=3)


def test_couriers_panel_is_complete_sorted_and_reproducible(tmp_path):
    first = datagen.generate_couriers(tmp_path / "a", **COURIERS)
    second = datagen.generate_couriers(tmp_path / "b", **COURIERS)
    assert (first / "part-00000.parquet").read_bytes() == (second / "part-00000.parquet").read_bytes()
    table = pq.read_table(first / "part-00000.parquet").to_pandas()
    assert len(table) == 300 * 6 == datagen.load_truth(first)["n_rows"]
    assert table.groupby("courier").size().eq(6).all()
    assert table[["courier", "year"]].equals(table[["courier", "year"]].sort_values(["courier", "year"]))
    assert set(table["depot"]) <= set(range(1, 26))


def test_couriers_move_at_the_asked_share(tmp_path):
    folder = datagen.generate_couriers(tmp_path / "m", n_couriers=4000, n_depots=50, n_years=5, move_share=0.3)
    table = pq.read_table(folder / "part-00000.parquet").to_pandas()
    changed = table.groupby("courier")["depot"].diff().fillna(0).ne(0).sum()
    moves = datagen.load_truth(folder)["n_moves"]
    # a mover may draw its own depot again (1 in 50): changes are a little below the moves
    assert 0.95 * moves <= changed <= moves
    assert moves / (4000 * 4) == pytest.approx(0.3, abs=0.02)  # binomial sd ~0.004


def test_couriers_truth_recovered_by_dummy_variable_least_squares(tmp_path):
    """statsmodels OLS with courier, depot and year indicators recovers the true slopes
    within four standard errors (a correct simulation of the stated model)."""
    import pandas as pd
    import statsmodels.api as sm

    folder = datagen.generate_couriers(tmp_path / "t", n_couriers=400, n_depots=30, n_years=6, seed=1)
    df = pq.read_table(folder / "part-00000.parquet").to_pandas()
    x = pd.concat([df[["shifts", "night_share"]]] + [pd.get_dummies(df[c], prefix=c, drop_first=True, dtype=float)
                                                     for c in ("courier", "depot", "year")], axis=1)
    ols = sm.OLS(df["ln_pay"], sm.add_constant(x)).fit()
    truth = datagen.load_truth(folder)["coefficients"]
    for name, value in truth.items():
        assert abs(ols.params[name] - value) < 4 * ols.bse[name], name


def test_couriers_options_are_checked(tmp_path):
    with pytest.raises(datagen.DatagenError, match="move_share"):
        datagen.generate_couriers(tmp_path / "x", 10, 5, 3, move_share=1.5)
    assert main([str(tmp_path / "y"), "--scenario", "couriers", "--units", "10", "--periods", "3"]) == 2
