"""The panel checkup (bigpanel.panel.inspect_panel) against an independent computation:
pandas/numpy group-bys on the same rows (tests/checkup_data.reference_checkup)."""

from __future__ import annotations

import dataclasses
import datetime as dt
import json

import numpy as np
import pandas as pd
import polars as pl
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
import pytest

from bigpanel import InputError, open_source
from bigpanel import panel as panel_module
from bigpanel.panel import inspect_panel
from bigpanel.source import Session

from checkup_data import CHECKED, OFFSET, make_panel, reference_checkup

EPS = np.finfo(np.float64).eps
# Streaming (Welford/Chan) sums of squares have a relative error of order n * kappa * eps,
# kappa = |mean| / spread of the values summed (Chan, Golub and LeVeque 1983, from memory);
# the figures here come from sums over units and periods of at most this many rows.
MAX_GROUP_ROWS = 40


def rtol_for(mean: float, std: float) -> float:
    kappa = 1.0 + abs(mean) / std
    return 4 * MAX_GROUP_ROWS * kappa * EPS


def assert_matches(report, ref) -> None:
    for field in ("n_rows", "n_rows_missing_unit", "n_rows_missing_period", "n_rows_used", "n_units", "n_periods",
                  "first_period", "last_period", "n_grid_periods", "n_balanced_units", "n_singleton_units",
                  "periods_per_unit", "n_units_with_gaps", "n_missing_unit_periods", "n_duplicate_keys",
                  "n_duplicate_rows"):
        assert getattr(report, field) == ref[field], field
    assert [u for u, _, _ in report.duplicate_examples] == ref["duplicate_units"]
    checks = {c.name: c for c in report.columns}
    for name, expected in ref["columns"].items():
        got = checks[name]
        assert got.n_missing == expected["n_missing"], name
        if "mean" not in expected:
            assert not got.numeric and got.within_share is None
            continue
        # Mean and std: compensated sums of at most n_rows terms, one rounding each.
        assert got.mean == pytest.approx(expected["mean"], rel=8 * report.n_rows * EPS), name
        assert got.std == pytest.approx(expected["std"], rel=rtol_for(expected["mean"], expected["std"])), name
        assert (got.min, got.max) == (expected["min"], expected["max"]), name
        assert got.units_varying == expected["units_varying"], name
        if expected["within_share"] == 0.0:
            assert got.within_share == 0.0 and got.within_estimable is False, name
        else:
            # The within sum of squares is relative to the within spread (about 1 for
            # staff_hours, under an offset of 1e8), so kappa uses the overall std as a floor.
            tol = rtol_for(expected["mean"], min(expected["std"], 1.0))
            assert got.within_share == pytest.approx(expected["within_share"], rel=tol), name
            assert got.within_share + got.between_share == pytest.approx(1.0, abs=4 * EPS)
            assert got.within_estimable is True


@pytest.fixture(scope="module")
def panel() -> pa.Table:
    return make_panel(seed=7)


def test_checkup_matches_pandas_reference(panel):
    report = inspect_panel(open_source(panel), "depot", "month")
    ref = reference_checkup(panel.to_pandas(), "depot", "month", CHECKED)
    assert [c.name for c in report.columns] == CHECKED
    assert report.period_step == 1 and report.period_step_unit == "month"
    assert report.n_units_with_gaps > 0 and report.n_balanced_units < report.n_units  # the data sets the traps
    assert_matches(report, ref)
    assert report.not_estimable == ("region",)


def test_offset_column_keeps_its_digits(panel):
    """staff_hours sits on a 1e8 offset; the one-pass per-unit formula S - s^2/n loses every
    digit there, the checkup must not."""
    frame = panel.to_pandas()
    x = frame["staff_hours"].to_numpy()
    g = frame.groupby("depot")["staff_hours"]
    one_pass = float(np.sum(g.apply(lambda s: np.sum(s.to_numpy() ** 2) - s.sum() ** 2 / len(s))))
    two_pass = float(np.sum((x - g.transform("mean").to_numpy()) ** 2))
    assert abs(x.mean() - OFFSET) < 10 and abs(one_pass - two_pass) > 1e-3 * two_pass  # the trap is real here
    report = inspect_panel(open_source(panel), "depot", "month", ["staff_hours"])
    total = float(np.sum((x - x.mean()) ** 2))
    # The scans subtract a shift near the column mean, so the values summed lie within a few
    # depot-level spreads (sd 3) of zero: kappa of about 10 instead of OFFSET.
    assert report.columns[0].within_share == pytest.approx(two_pass / total, rel=4 * MAX_GROUP_ROWS * 10 * EPS)
    assert report.columns[0].std == pytest.approx(float(np.std(x, ddof=1)), rel=4 * MAX_GROUP_ROWS * 10 * EPS)


def test_missing_keys_are_counted_and_left_out():
    table = make_panel(seed=3, missing_keys=True)
    report = inspect_panel(open_source(table), "depot", "month")
    ref = reference_checkup(table.to_pandas(), "depot", "month", CHECKED)
    assert (report.n_rows_missing_unit, report.n_rows_missing_period) == (2, 2)
    assert report.n_rows_used == report.n_rows - 3
    assert_matches(report, ref)


def test_duplicate_keys_are_found_and_listed():
    table = make_panel(seed=5, duplicates=True)
    report = inspect_panel(open_source(table), "depot", "month")
    ref = reference_checkup(table.to_pandas(), "depot", "month", CHECKED)
    assert_matches(report, ref)
    assert (report.n_duplicate_keys, report.n_duplicate_rows) == (2, 3)
    frame = table.to_pandas()
    first = frame.iloc[5]
    assert report.duplicate_examples[0] == (first["depot"], first["month"], 3)
    sentence = report.duplicate_problem()
    assert sentence.count(". ") == 0 and f"({first['depot']}, {first['month'].isoformat()})" in sentence


def assert_same_report(a, b) -> None:
    """Counts equal; floats equal up to the last bits, which DuckDB's parallel aggregation
    may combine in a different order from run to run. Reordering a sum of n terms moves it
    by about n * eps relative when the terms are near zero, as the shifts make them."""
    tol = a.n_rows * EPS
    columns_a, columns_b = a.columns, b.columns
    assert dataclasses.replace(a, columns=()) == dataclasses.replace(b, columns=())
    assert len(columns_a) == len(columns_b)
    for x, y in zip(columns_a, columns_b):
        for field in dataclasses.fields(x):
            u, v = getattr(x, field.name), getattr(y, field.name)
            if isinstance(u, float):
                assert u == pytest.approx(v, rel=tol, abs=tol), field.name
            else:
                assert u == v, field.name


def test_reruns_agree(panel):
    source = open_source(panel)
    assert_same_report(inspect_panel(source, "depot", "month"), inspect_panel(source, "depot", "month"))


def test_long_grid_counts_distinct_periods_without_the_bitmap(monkeypatch):
    """Grids longer than BITMAP_MAX_SLOTS use COUNT(DISTINCT): same figures."""
    table = make_panel(seed=5, duplicates=True)
    with_bitmap = inspect_panel(open_source(table), "depot", "month")
    monkeypatch.setattr(panel_module, "BITMAP_MAX_SLOTS", 4)
    assert_same_report(inspect_panel(open_source(table), "depot", "month"), with_bitmap)


def test_filter_applies_to_every_figure(panel):
    report = inspect_panel(open_source(panel, where="region <> 2 AND month >= DATE '2021-03-01'"), "depot", "month")
    frame = panel.to_pandas()
    kept = frame[(frame["region"] != 2) & (pd.to_datetime(frame["month"]) >= "2021-03-01")]
    assert_matches(report, reference_checkup(kept, "depot", "month", CHECKED))
    assert report.where.startswith("region")


def _frame(periods, units=(1, 2, 3)) -> pa.Table:
    rows = [(u, p, float(u * 10 + i)) for u in units for i, p in enumerate(periods)]
    return pa.table({"unit": [r[0] for r in rows], "when": [r[1] for r in rows], "x": [r[2] for r in rows]})


D, T = dt.date, dt.datetime


@pytest.mark.parametrize(
    ("periods", "step", "step_unit", "grid"),
    [
        # the grid step is the gcd of the gaps between consecutive distinct periods (its definition)
        ([2, 4, 8], 2, None, 4),
        ([-3, 0, 6], 3, None, 4),
        ([D(2020, 1, 1), D(2020, 2, 1), D(2020, 4, 1)], 1, "month", 4),
        ([D(2020, 1, 31), D(2020, 2, 29), D(2020, 3, 31)], 1, "month", 3),  # month ends
        ([D(2020, 3, 15), D(2020, 6, 15), D(2021, 3, 15)], 1, "quarter", 5),
        ([D(2019, 1, 1), D(2020, 1, 1), D(2023, 1, 1)], 1, "year", 5),
        ([D(2020, 1, 6), D(2020, 1, 13), D(2020, 1, 27)], 1, "week", 4),
        ([D(2020, 1, 30), D(2020, 2, 2), D(2020, 2, 8)], 3, "day", 4),
        ([T(2020, 1, 1, 9), T(2020, 1, 1, 11), T(2020, 1, 1, 15)], 2, "hour", 4),
        ([T(2020, 1, 1, 6), T(2020, 2, 1, 6), T(2020, 3, 1, 6)], 1, "month", 3),
        ([D(2020, 5, 1)], None, None, 1),
    ],
)
def test_period_grid(periods, step, step_unit, grid):
    report = inspect_panel(open_source(_frame(periods)), "unit", "when")
    assert (report.period_step, report.period_step_unit, report.n_grid_periods) == (step, step_unit, grid)
    assert report.n_empty_periods == grid - len(periods)
    # every unit has every period present, so the grid's empty periods are its only holes
    assert report.n_missing_unit_periods == 3 * (grid - len(periods))
    assert report.first_period == periods[0] and report.last_period == periods[-1]


def test_timestamp_with_time_zone_period():
    table = pa.table({
        "unit": [1, 1, 2, 2],
        "when": pa.array([T(2020, 1, 1), T(2020, 1, 2), T(2020, 1, 1), T(2020, 1, 3)], pa.timestamp("us", tz="UTC")),
        "x": [1.0, 2.0, 3.0, 5.0],
    })  # fmt: skip
    report = inspect_panel(open_source(table), "unit", "when")
    assert (report.period_step, report.period_step_unit, report.n_units_with_gaps) == (1, "day", 1)


def test_too_many_periods_is_refused(monkeypatch):
    monkeypatch.setattr(panel_module, "MAX_PERIODS", 5)
    with pytest.raises(InputError, match="more than 5 distinct values"):
        inspect_panel(open_source(_frame(list(range(10)))), "unit", "when")


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"unit": "depot", "period": "depot"}, "same column 'depot'"),
        ({"unit": "depot", "period": "month", "columns": ["parcels", "depot"]}, "Column 'depot' is a key"),
        ({"unit": "depot", "period": "month", "columns": ["parcel"]}, "Did you mean 'parcels'"),
        ({"unit": "depot", "period": "month", "columns": ["depot_kind"]}, "'depot_kind' .* has type VARCHAR, not a number"),
        ({"unit": "depot", "period": "parcels"}, "'parcels' .* type DOUBLE, which cannot be a period"),
        ({"unit": "depot", "period": "month", "columns": "parcels"}, "must be a list"),
    ],
)
def test_bad_arguments(panel, kwargs, message):
    with pytest.raises(InputError, match=message):
        inspect_panel(open_source(panel), **kwargs)


def test_no_rows_after_filter(panel):
    with pytest.raises(InputError, match="has no rows after the filter 'region > 99'"):
        inspect_panel(open_source(panel, where="region > 99"), "depot", "month")


def test_conversions(panel):
    report = inspect_panel(open_source(panel), "depot", "month")
    payload = json.loads(json.dumps(report.to_dict()))
    assert payload["first_period"] == "2021-01-01"
    assert payload["not_estimable"] == ["region"]
    assert payload["columns"][0]["name"] == "parcels"
    assert payload["balanced_share"] == pytest.approx(report.n_balanced_units / report.n_units)
    table = report.to_polars()
    assert table.columns[:4] == ["name", "dtype", "numeric", "n_missing"]
    assert table.filter(pl.col("name") == "region")["within_estimable"].to_list() == [False]
    assert table.height == len(CHECKED)


def test_render_names_the_problems():
    report = inspect_panel(open_source(make_panel(seed=5, duplicates=True, missing_keys=True)), "depot", "month")
    text = report.render()
    assert "\x1b[" not in text
    assert "duplicate keys    2" in text and "without a unit or period" in text
    assert "constant within every unit): region." in text
    assert "\x1b[31m" in report.render(color=True)


@pytest.mark.parametrize("duplicates", [False, True], ids=["unique-keys", "duplicate-keys"])
def test_unit_sorted_parquet_runs_in_chunks(tmp_path, monkeypatch, duplicates):
    """A unit-sorted file with many row groups is read chunk by chunk (one thread each):
    same figures as the pandas reference, rows without a unit still counted, and every
    float identical on a rerun."""
    from bigpanel import moments

    table = make_panel(seed=9, duplicates=duplicates, missing_keys=True)
    # rows without a depot first, inside the first row group, so that it keeps its statistics
    valid = pc.is_valid(table["depot"])
    ordered = pa.concat_tables([table.filter(pc.invert(valid)),
                                table.filter(valid).sort_by([("depot", "ascending"), ("month", "ascending")])])
    path = tmp_path / "sorted.parquet"
    pq.write_table(ordered, path, row_group_size=10)
    monkeypatch.setattr(moments, "CHUNK_ROWS", 40)
    source = open_source(path)
    with Session(source) as session:
        assert len(moments.plan_chunks(session, "depot")) >= 3
    first = inspect_panel(source, "depot", "month")
    assert_matches(first, reference_checkup(table.to_pandas(), "depot", "month", CHECKED))
    assert first.n_rows_missing_unit == 2
    assert inspect_panel(source, "depot", "month") == first


def test_column_without_values():
    table = pa.table({"unit": [1, 1, 2, 2], "when": [1, 2, 1, 2], "x": pa.array([None] * 4, pa.float64())})
    report = inspect_panel(open_source(table), "unit", "when")
    (check,) = report.columns
    assert (check.n_missing, check.mean, check.within_share, check.within_estimable) == (4, None, None, False)
    assert "no values" in report.render()
