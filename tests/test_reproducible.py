"""The same command gives byte-identical JSON for any thread count (issue 7, item 5).

What may differ: exactly one field, ``run.threads``, which records the thread count; every
other byte of ``fit --json`` (and ``checkup --json``) must be the same for threads 1, 2,
3, 4, 8 and 16. Reference: the run with one thread (a fixed order of additions); the check
is equality of the JSON text, not a tolerance.

Two paths are covered:

- unit-sorted multi-file Parquet, cut into several chunks (moments.plan_chunks). The
  chunk constants are lowered here (CHUNK_ROWS, MIN_CHUNK_ROWS, monkeypatched) because the
  real ones need at least 500,000 rows before a source is cut at all, and 6 thread counts
  times 7 models on such a panel take minutes; with the lowered constants a 14,000-row
  panel is cut into about a dozen chunks, and the thread count would change the cut if
  the plan still depended on it (it did: 8 and 16 threads gave other last digits).
- a CSV file, which cannot be chunked: one query over all rows.

The panel's values are heavy-tailed (log-normal spreads of four orders of magnitude) so
that another order of additions shows in the last digits.
"""

from __future__ import annotations

import json

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest

import bigpanel
import bigpanel.moments
from bigpanel.cli import main
from bigpanel.source import open_source

THREADS = (1, 2, 3, 4, 8, 16)
N_UNITS, N_PERIODS = 350, 40
CSV_UNITS = 80  # the CSV holds the first units only: each query parses the whole file again

MODELS = {
    "within, unit clusters": [],
    "within, two-way clusters": ["--cluster", "unit,region"],
    "within, unit and period effects": ["--effects", "unit,period"],
    "pooled, homoskedastic": ["--estimator", "pooled"],
    "first differences, unit clusters": ["--estimator", "first-difference"],
    "first differences, period effects, HC1": ["--estimator", "first-difference", "--effects", "period", "--variance", "hc1"],
}


def _panel() -> pa.Table:
    """Seeded, unbalanced (5% of unit-periods missing), sorted by unit then period."""
    rng = np.random.default_rng(20260707)
    unit = np.repeat(np.arange(N_UNITS), N_PERIODS)
    period = np.tile(np.arange(1, N_PERIODS + 1), N_UNITS)
    keep = rng.random(unit.size) >= 0.05
    unit, period = unit[keep], period[keep]
    n = unit.size
    effect = rng.normal(0, 50, N_UNITS)[unit]
    x1 = rng.lognormal(0, 2.5, n) + 0.3 * effect
    x2 = rng.normal(0, 1, n) * 10.0 ** rng.uniform(-2, 2, n)
    x3 = rng.normal(1e4, 3, n)  # a large offset: the shifts must keep its digits
    y = 1.5 * x1 - 0.7 * x2 + 0.2 * x3 + effect + rng.lognormal(0, 2, n)
    return pa.table({"unit": unit, "period": period, "region": unit // 12, "x1": x1, "x2": x2, "x3": x3, "y": y})


@pytest.fixture(scope="module")
def sources(tmp_path_factory):
    folder = tmp_path_factory.mktemp("reproducible")
    table = _panel()
    parts = folder / "parts"
    parts.mkdir()
    units = table.column("unit").to_numpy()
    for j, block in enumerate(np.array_split(np.arange(N_UNITS), 4)):
        # row groups of whole units (as an extract sorted by unit has at its chunk cuts)
        with pq.ParquetWriter(parts / f"part-{j}.parquet", table.schema) as writer:
            for group in np.array_split(block, 6):
                writer.write_table(table.filter(pa.array((units >= group[0]) & (units <= group[-1]))))
    csv = folder / "panel.csv"
    pacsv.write_csv(table.filter(pa.array(units < CSV_UNITS)), csv)
    return {"parquet": str(parts), "csv": str(csv)}


@pytest.fixture
def small_chunks(monkeypatch):
    monkeypatch.setattr(bigpanel.moments, "CHUNK_ROWS", 2_000)
    monkeypatch.setattr(bigpanel.moments, "MIN_CHUNK_ROWS", 500)


def _json_run(argv: list[str], capsys) -> tuple[str, dict]:
    """Run the CLI in-process; return its JSON with run.threads taken out, and run."""
    code = main(argv)
    out, err = capsys.readouterr()
    assert code == 0, err
    payload = json.loads(out)
    run = payload["run"]
    payload["run"] = {k: v for k, v in run.items() if k != "threads"}  # the one field allowed to differ
    return json.dumps(payload, indent=2, ensure_ascii=False), run


def _same_for_all_threads(argv: list[str], capsys) -> None:
    texts = {}
    for threads in THREADS:
        text, run = _json_run([*argv, "--threads", str(threads)], capsys)
        assert run == {"threads": threads, "version": bigpanel.__version__}
        texts[threads] = text
    reference = texts[1]
    differing = [t for t, text in texts.items() if text != reference]
    assert not differing, f"JSON differs from threads=1 at threads {differing}"


def _fit_argv(source: str, extra: list[str]) -> list[str]:
    return ["fit", source, "--unit", "unit", "--period", "period", "--outcome", "y",
            "--regressors", "x1, x2, x3", "--json", *extra]


def test_plan_depends_on_the_files_not_the_threads(sources, small_chunks):
    plans = set()
    for threads in THREADS:
        source = open_source(sources["parquet"], engine=bigpanel.Engine(threads=threads))
        with bigpanel.source.Session(source) as session:
            plans.add(tuple(bigpanel.moments.plan_chunks(session, "unit")))
    assert len(plans) == 1
    assert len(next(iter(plans))) >= 6  # several chunks, so the chunked path is what is tested


@pytest.mark.parametrize("model", list(MODELS), ids=list(MODELS))
def test_fit_json_is_identical_for_any_threads_parquet(sources, small_chunks, model, capsys):
    _same_for_all_threads(_fit_argv(sources["parquet"], MODELS[model]), capsys)


# One query shape each (per-unit pass, the two-way pass, pooled sums, differences with
# per-period sums and the HC1 meat); each CSV fit re-parses the file. The cross-unit cluster
# scores run as one whole-source query for any source, so the Parquet case covers them.
CSV_MODELS = ["within, unit clusters", "within, unit and period effects", "pooled, homoskedastic",
              "first differences, period effects, HC1"]


@pytest.mark.parametrize("model", CSV_MODELS, ids=CSV_MODELS)
def test_fit_json_is_identical_for_any_threads_csv(sources, model, capsys):
    _same_for_all_threads(_fit_argv(sources["csv"], MODELS[model]), capsys)


@pytest.mark.parametrize("kind", ["parquet", "csv"])
def test_checkup_json_is_identical_for_any_threads(sources, small_chunks, kind, capsys):
    _same_for_all_threads(["checkup", sources[kind], "--unit", "unit", "--period", "period", "--json"], capsys)
