"""Smoke test of the benchmark command (tests/bench/run.py) on a tiny panel.

It runs the real machinery (datagen, one process per case, the report) and checks the shape
of the JSON and Markdown outputs, and that the in-memory within computations (pandas and
polars with numpy, written independently of bigpanel in tests/bench/worker.py) agree with
bigpanel's within fit. No timing is asserted: timings on a shared machine are not test results.
"""

import json
import subprocess
import sys
from pathlib import Path

import pytest

RUN = Path(__file__).parent / "bench" / "run.py"
CASES = ["floor", "within", "first-difference", "pandas", "polars-eager", "polars-lazy"]


def bench(*args):
    return subprocess.run([sys.executable, str(RUN), *args], capture_output=True, text=True, timeout=600)


@pytest.fixture(scope="module")
def outputs(tmp_path_factory):
    root = tmp_path_factory.mktemp("bench")
    done = bench("--sizes", "20k", "--period-sorted", "20k", "--cases", ",".join(CASES), "--repeat", "1",
                 "--threads", "1", "--memory-budget", "4GB", "--data-dir", str(root / "data"),
                 "--out-dir", str(root / "out"))
    assert done.returncode == 0, done.stderr
    summary = json.loads((root / "out" / "latest.json").read_text())
    return summary, (root / "out" / "latest.md").read_text(), done.stdout


def test_json_describes_machine_and_settings(outputs):
    summary, _, _ = outputs
    machine = summary["machine"]
    assert {"cpu_model", "logical_cores", "memory_bytes", "python", "git_commit"} <= machine.keys()
    assert {"duckdb", "polars", "pandas", "numpy", "bigpanel"} <= machine["versions"].keys()
    assert summary["settings"]["repeat"] == 1
    assert summary["settings"]["threads"] == 1
    assert summary["problems"] == []


def test_every_case_has_its_figures(outputs):
    summary, _, _ = outputs
    rows = {(r["panel"], r["case"]): r for r in summary["results"]}
    # 20k: every case; 2k: the scaling companion (floor, within, first differences);
    # "20k by period": the floor and the bigpanel cases.
    expected = {("20k", c) for c in CASES} | {("2k", c) for c in ("floor", "within", "first-difference")}
    expected |= {("20k by period", c) for c in ("floor", "within", "first-difference")}
    assert rows.keys() == expected
    for row in rows.values():
        assert row["status"] == "ok", row
        assert row["wall_s"] > 0 and row["peak_rss_bytes"] > 0 and row["rows_per_s"] > 0
        assert row["ratio_to_floor"] == pytest.approx(row["wall_s"] / rows[(row["panel"], "floor")]["wall_s"])
    assert rows[("20k", "within")]["target"]["ratio_to_floor_at_most"] == 1.5
    assert rows[("20k", "first-difference")]["target"]["ratio_to_floor_at_most"] == 2.5


@pytest.mark.parametrize("way", ["pandas", "polars-eager", "polars-lazy"])
def test_in_memory_ways_agree_with_bigpanel_within(outputs, way):
    """Reference: the same within estimate and CR1 errors computed in memory with pandas or
    polars and numpy (tests/bench/worker.py); 1e-6 relative is the benchmark's own tolerance,
    far above the ~1e-14 that two exact computations in double precision differ by."""
    summary, _, _ = outputs
    row = next(r for r in summary["results"] if r["panel"] == "20k" and r["case"] == way)
    assert row["check"]["agrees"], row["check"]
    assert row["check"]["coef_rel_diff"] <= 1e-6 and row["check"]["se_rel_diff"] <= 1e-6


def test_period_sorted_copy_gives_the_same_estimates(outputs):
    summary, _, _ = outputs
    for row in summary["results"]:
        if row["role"] == "period-sorted" and row["case"] != "floor":
            assert row["check"]["agrees"], row


def test_scaling_versus_and_budget_sections(outputs):
    summary, _, _ = outputs
    assert [c["case"] for c in summary["scaling"]] == ["within", "first-difference"]
    for c in summary["scaling"]:
        assert (c["small"], c["large"]) == ("2k", "20k")
        assert {"time_ratio", "memory_ratio", "targets"} <= c.keys()
    assert [v["way"] for v in summary["versus"]] == ["pandas", "polars-eager", "polars-lazy"]
    assert all({"speedup", "memory_share"} <= v.keys() for v in summary["versus"])
    assert [b["way"] for b in summary["memory_budget"]] == ["pandas", "polars-eager", "polars-lazy"]
    assert all(b["largest_fitting"] == "20k" for b in summary["memory_budget"])


def test_markdown_has_the_tables(outputs):
    _, markdown, stdout = outputs
    assert stdout.strip() == markdown.strip()
    for heading in ("## Machine", "## Cases", "## bigpanel within against the in-memory ways", "## Scaling",
                    "## In-memory ways against the 4 GB budget", "## Problems"):
        assert heading in markdown
    cases = markdown.split("## Cases")[1].split("##")[0]
    table = [line for line in cases.splitlines() if line.startswith("| 20k |")]
    assert [line.split("|")[2].strip() for line in table] == CASES
    assert "agrees with bigpanel within on 20k" in markdown


@pytest.mark.parametrize("args, message", [
    (["--cases", "within,fe"], "'fe' is not one of"),
    (["--sizes", "15"], "must be a multiple of 10 rows"),
    (["--memory-budget", "lots"], "not a memory size"),
])
def test_bad_options_exit_2_with_one_sentence(args, message):
    done = bench(*args)
    assert done.returncode == 2
    assert message in done.stderr and "Traceback" not in done.stderr
    assert len(done.stderr.strip().splitlines()) == 1
