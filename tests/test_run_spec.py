"""Batch runs from a spec file (``bigpanel run``, ``bigpanel.run_spec``): validation,
outputs, the manifest, failures, resume after SIGKILL, the folder lock, exit codes.

References: each model's JSON against ``bigpanel.fit`` of that model alone (itself checked
against statsmodels in test_fit_lsdv.py and test_fit_wagepan.py) to 1e-12 relative, as
fit_many is (test_fit_many.py); the baseline's coefficients against statsmodels OLS on
pandas-demeaned data (Frisch-Waugh-Lovell, common practice); Python's json and tomllib
parsers for every file written; the process table (os.kill) for the lock's owner.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

import bigpanel
from bigpanel.batch import SpecError
from bigpanel.batch.files import LOCK_NAME, RunLock, write_atomic

pytestmark = pytest.mark.filterwarnings("ignore::bigpanel.errors.BigpanelWarning")

REPO = Path(__file__).resolve().parents[1]
EXAMPLE = REPO / "datagen" / "examples" / "depots.toml"
RTOL = 1e-12  # as fit_many: a model from a shared scan equals its own fit to rounding
TERMS = ["staff_hours", "vans", "fuel_price", "rain_mm", "promo"]


@pytest.fixture(scope="module")
def depots(tmp_path_factory) -> Path:
    """The demo's synthetic depots panel, small: 600 depots x 24 months (50 regions), in
    the layout the example spec expects (.cache/demo-depots two folders above it)."""
    import datagen

    root = tmp_path_factory.mktemp("repo")
    datagen.generate(root / ".cache" / "demo-depots", 600, 24, seed=3, unbalanced=0.15, gaps=0.05,
                     rows_per_file=4000, row_group_size=1000)
    (root / "datagen" / "examples").mkdir(parents=True)
    shutil.copy(EXAMPLE, root / "datagen" / "examples" / "depots.toml")
    return root


def panel(depots: Path) -> Path:
    return depots / ".cache" / "demo-depots"


def write_spec(folder: Path, depots: Path, models: str, extra: str = "") -> Path:
    path = folder / "spec.toml"
    path.write_text(f'[source]\npath = "{panel(depots)}"\nunit = "depot"\nperiod = "month"\n{extra}\n'
                    '[defaults]\noutcome = "parcels"\ncluster = ["region"]\n\n' + models)
    return path


def cli(*args, cwd=None, **kw) -> subprocess.Popen:
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    return subprocess.Popen([sys.executable, "-m", "bigpanel", "run", *map(str, args)], cwd=cwd, env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, **kw)


def finish(proc: subprocess.Popen, timeout: float = 120) -> tuple[int, str, str]:
    out, err = proc.communicate(timeout=timeout)
    return proc.returncode, out, err


def manifest(folder: Path) -> dict:
    return json.loads((folder / "manifest.json").read_text())


def every_file_parses(folder: Path) -> list[Path]:
    """Every output present parses as JSON (temporary files of a killed write aside:
    they carry the temporary mark and are removed by the next run)."""
    seen = []
    for path in sorted(folder.rglob("*")):
        if path.is_file() and ".tmp-" not in path.name and path.suffix == ".json":
            json.loads(path.read_text())
            seen.append(path)
    return seen


# ---------------------------------------------------------------- the example spec


def test_example_spec_runs_and_each_model_equals_its_own_fit(depots, tmp_path):
    spec = depots / "datagen" / "examples" / "depots.toml"
    report = bigpanel.run_spec(spec, out=tmp_path / "run")
    assert report.exit_code == 0
    m = report.manifest
    assert len(m["models"]) >= 6 and all(e["status"] == "done" for e in m["models"].values())
    estimators = {json.loads((tmp_path / "run" / e["file"]).read_text())["estimator"] for e in m["models"].values()}
    assert estimators == {"pooled", "within", "first-difference"}
    tables = ["comparison.csv", "comparison.html", "comparison.md", "comparison.tex"]
    assert m["comparison"] == tables and all((tmp_path / "run" / t).stat().st_size > 0 for t in tables)
    header = (tmp_path / "run" / "comparison.md").read_text().splitlines()[2]
    assert [c.strip() for c in header.strip("|").split("|")][1:] == list(m["models"])  # the spec's order
    import tomllib

    doc = tomllib.loads(spec.read_text())
    for name, table in doc["models"].items():
        given = {**doc["defaults"], **table}
        given.pop("outcome")
        where = given.pop("where", None)
        alone = bigpanel.fit(panel(depots), doc["defaults"]["outcome"], given.pop("regressors"), "depot", "month",
                             where=where, **given)
        saved = json.loads((tmp_path / "run" / "models" / f"{name}.json").read_text())
        assert saved["n_obs"] == alone.n_obs == m["models"][name]["rows_used"]
        assert [c["term"] for c in saved["coefficients"]] == [c.term for c in alone.coefficients]
        for c, a in zip(saved["coefficients"], alone.coefficients):
            np.testing.assert_allclose(c["estimate"], a.estimate, rtol=RTOL)
            np.testing.assert_allclose(c["std_error"], a.std_error, rtol=RTOL)
        mine = alone.to_dict()
        # the same document as `fit --json`: the same fields, the same conversion
        assert set(saved) == set(mine) and saved["variance"].keys() == mine["variance"].keys()


def test_baseline_against_statsmodels_on_demeaned_rows(depots, tmp_path):
    import pandas as pd
    import statsmodels.api as sm

    spec = depots / "datagen" / "examples" / "depots.toml"
    bigpanel.run_spec(spec, out=tmp_path / "run", models="baseline")
    saved = json.loads((tmp_path / "run" / "models" / "baseline.json").read_text())
    df = pd.concat([pd.read_parquet(f) for f in sorted(panel(depots).glob("*.parquet"))])
    cols = ["parcels", "staff_hours", "vans"]
    demeaned = df[cols] - df.groupby("depot")[cols].transform("mean")  # Frisch-Waugh-Lovell: within = OLS on these
    ols = sm.OLS(demeaned["parcels"], demeaned[["staff_hours", "vans"]]).fit()
    for c in saved["coefficients"]:
        np.testing.assert_allclose(c["estimate"], ols.params[c["term"]], rtol=1e-9)  # two summation orders of 14k rows


def test_model_json_is_what_fit_json_prints(depots, tmp_path):
    """Same text as `bigpanel fit --json` for a model that runs alone (its own passes,
    as fit's), the run entry aside."""
    spec = write_spec(tmp_path, depots, '[models.two_way]\nregressors = ["staff_hours", "vans"]\n'
                      'effects = ["depot", "month"]\n')
    bigpanel.run_spec(spec, out=tmp_path / "run")
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    printed = subprocess.run([sys.executable, "-m", "bigpanel", "fit", str(panel(depots)), "--outcome", "parcels",
                              "--regressors", "staff_hours,vans", "--unit", "depot", "--period", "month",
                              "--effects", "depot,month", "--cluster", "region", "--json"],
                             capture_output=True, text=True, env=env, check=True).stdout
    assert (tmp_path / "run" / "models" / "two_way.json").read_text() == printed


# ---------------------------------------------------------------- validation


def test_spec_errors_are_all_reported_at_once_before_reading(depots, tmp_path, monkeypatch):
    from bigpanel.source import Session

    def no_rows(*args, **kwargs):
        raise AssertionError("a row was read while checking the spec")

    monkeypatch.setattr(Session, "run", no_rows)
    spec = tmp_path / "bad.toml"
    spec.write_text(f"""
colour = 1
[source]
path = "{panel(depots)}"
unit = "depot"
period = "month"
wher = "vans > 1"
[defaults]
outcome = "parcels"
varience = "cluster"
[models.a]
regresors = ["staff_hours"]
[models.b]
regressors = ["staf_hours", "vans"]
[models.c]
regressors = ["staff_hours"]
estimator = "fe"
[models.d]
regressors = ["staff_hours", "ln(fuel_prise)"]
cluster = ["regoin"]
[models.e]
regressors = ["staff_hours"]
source = "sorce"
[models.f]
regressors = ["staff_hours"]
weights = "van"
[models.g]
regressors = ["vans"]
endogenous = ["staff_hours"]
instruments = ["lag(staf_hours)"]
""")
    with pytest.raises(SpecError) as info:
        bigpanel.run_spec(spec, out=tmp_path / "out")
    problems = info.value.problems
    expected = [
        "bad.toml: the top level has an unknown key 'colour'",
        "bad.toml, source 'source' has an unknown key 'wher'. Did you mean 'where'?",
        "bad.toml, [defaults] has an unknown key 'varience'. Did you mean 'variance'?",
        "bad.toml, model 'a' has an unknown key 'regresors'. Did you mean 'regressors'?",
        "bad.toml, model 'c', key 'estimator': Option 'estimator' must be one of pooled, within, first-difference, between, random-effects; got 'fe'.",
        "bad.toml, model 'e', key 'source': 'sorce' is not a source of this file. Did you mean 'source'?",
        "bad.toml, model 'b', key 'regressors': Column 'staf_hours' not found in demo-depots. Did you mean 'staff_hours'?",
        "bad.toml, model 'd', key 'cluster': Column 'regoin' not found in demo-depots. Did you mean 'region'",
        "bad.toml, model 'd', key 'regressors': Column 'fuel_prise' not found in demo-depots. Did you mean 'fuel_price'?",
        "bad.toml, model 'f', key 'weights': Column 'van' not found in demo-depots. Did you mean 'vans'?",
        "bad.toml, model 'g', key 'instruments': Column 'staf_hours' not found in demo-depots. Did you mean 'staff_hours'?",
    ]
    assert len(problems) == len(expected)
    for want, got in zip(expected, problems):
        assert got.startswith(want), got
    assert not (tmp_path / "out").exists()  # nothing written


def test_bad_spec_exits_2_with_every_problem_and_no_traceback(depots, tmp_path):
    spec = write_spec(tmp_path, depots, '[models.a]\nregressors = ["staff_hour"]\n[models.b]\nregressors = "vans"\n'
                      'variance = "robust"\n')
    code, out, err = finish(cli(spec, "--out", tmp_path / "out"))
    assert code == 2 and out == ""
    assert "2 problems" in err and "Did you mean 'staff_hours'?" in err and "got 'robust'" in err
    assert "Traceback" not in err and not (tmp_path / "out").exists()


def test_unreadable_toml_and_unknown_model_names(depots, tmp_path):
    spec = tmp_path / "broken.toml"
    spec.write_text("[source\npath = 1\n")
    with pytest.raises(bigpanel.InputError, match=r"Spec file broken.toml is not valid TOML \(.*line 1"):
        bigpanel.run_spec(spec, out=tmp_path / "out")
    spec = write_spec(tmp_path, depots, '[models.baseline]\nregressors = ["vans"]\n')
    with pytest.raises(bigpanel.InputError, match="names 'baselin', which is not a model of spec.toml. "
                                                   "Did you mean 'baseline'?"):
        bigpanel.run_spec(spec, out=tmp_path / "out", models="baselin")


# ---------------------------------------------------------------- failures and scans


def test_one_model_failing_exits_1_and_the_others_are_written(depots, tmp_path):
    spec = write_spec(tmp_path, depots, '[models.good]\nregressors = ["staff_hours", "vans"]\n'
                      '[models.empty]\nregressors = ["vans"]\nwhere = "depot < 0"\n'
                      '[models.also_good]\nregressors = ["vans"]\nestimator = "first-difference"\n')
    code, out, err = finish(cli(spec, "--out", tmp_path / "out"))
    assert code == 1, err
    m = manifest(tmp_path / "out")
    assert m["status"] == "failed" and m["exit_code"] == 1
    assert m["models"]["good"]["status"] == m["models"]["also_good"]["status"] == "done"
    failed = m["models"]["empty"]
    assert failed["status"] == "failed" and failed["error"].startswith("No usable rows in demo-depots after the filter "
                                                                       "'depot < 0'")
    assert sorted(p.name for p in (tmp_path / "out" / "models").iterdir()) == ["also_good.json", "good.json"]
    table = (tmp_path / "out" / "comparison.md").read_text()
    assert "| good | also_good |" in table and "empty" not in table  # failed models are left out
    assert "model_failed: Model empty: failed: No usable rows" in err


def test_ten_model_family_takes_at_most_two_scans(depots, tmp_path):
    variants = [("within", '["staff_hours"]', ""), ("within", '["staff_hours", "vans"]', ""),
                ("within", '["staff_hours", "vans", "promo"]', 'variance = "hc1"\ncluster = []'),
                ("within", '["vans", "fuel_price"]', 'cluster = ["depot"]'),
                ("within", '["staff_hours", "rain_mm"]', 'variance = "homoskedastic"\ncluster = []'),
                ("within", '["staff_hours", "vans", "fuel_price", "rain_mm", "promo"]', ""),
                ("pooled", '["staff_hours", "vans"]', ""),
                ("pooled", '["staff_hours", "vans", "promo"]', 'variance = "hc1"\ncluster = []'),
                ("pooled", '["fuel_price"]', 'cluster = ["depot"]'),
                ("within", '["promo", "lag(staff_hours)"]', "")]
    models = "".join(f'[models.m{i}]\nestimator = "{e}"\nregressors = {r}\n{x}\n' for i, (e, r, x) in enumerate(variants))
    report = bigpanel.run_spec(write_spec(tmp_path, depots, models), out=tmp_path / "out")
    assert report.exit_code == 0 and len(report.models) == 10
    assert report.manifest["scans"] == {"source": 2}
    assert all(len(e["shared_scan_with"]) == 10 for e in report.models.values())


# ---------------------------------------------------------------- resume, kills, locks


def slow_family(tmp_path: Path, depots: Path, n: int = 8) -> Path:
    """n models, each on its own filter (its own session and scans), so a run takes a while
    and finishes models one at a time."""
    models = "".join(f'[models.part{i:02d}]\nregressors = ["staff_hours", "vans", "promo"]\n'
                     f'where = "depot % {n} <> {i}"\neffects = ["depot", "month"]\n' for i in range(n))
    return write_spec(tmp_path, depots, models)


def test_sigkill_mid_run_leaves_parseable_files_and_resume_completes(depots, tmp_path):
    spec, out = slow_family(tmp_path, depots), tmp_path / "out"
    proc = cli(spec, "--out", out)
    done: list[str] = []
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline and proc.poll() is None:
        try:
            models = manifest(out)["models"]
        except (OSError, ValueError):  # not there yet (a half-written manifest is never visible)
            time.sleep(0.01)
            continue
        done = [n for n, e in models.items() if e["status"] == "done"]
        if done:
            break
        time.sleep(0.01)
    proc.send_signal(signal.SIGKILL)
    finish(proc)
    assert proc.returncode == -signal.SIGKILL, "the run ended before it could be killed mid-way"
    files = every_file_parses(out)
    assert out / "manifest.json" in files
    m = manifest(out)
    assert m["status"] == "running" and m["finished"] is None
    finished = {n for n, e in m["models"].items() if e["status"] == "done"}
    assert finished and len(finished) < 8
    assert {p.stem for p in (out / "models").glob("*.json")} >= finished
    stamps = {n: (out / "models" / f"{n}.json").stat().st_mtime_ns for n in finished}
    assert (out / LOCK_NAME).exists()  # the killed run's lock is left behind: stale

    code, _, err = finish(cli(spec, "--out", out, "--resume"))
    assert code == 0, err
    assert "stale_lock: Took over the lock of a run that no longer runs" in err
    m = manifest(out)
    assert m["status"] == "done" and m["exit_code"] == 0
    for name, e in m["models"].items():
        assert e["status"] == ("skipped" if name in finished else "done"), name
    assert {n: (out / "models" / f"{n}.json").stat().st_mtime_ns for n in finished} == stamps  # not redone
    assert not [p for p in out.rglob("*") if ".tmp-" in p.name] and not (out / LOCK_NAME).exists()
    assert len(every_file_parses(out)) == 9


def test_resume_reruns_what_changed(depots, tmp_path):
    spec = write_spec(tmp_path, depots, '[models.a]\nregressors = ["vans"]\n[models.b]\nregressors = ["promo"]\n')
    bigpanel.run_spec(spec, out=tmp_path / "out")
    again = bigpanel.run_spec(spec, out=tmp_path / "out", resume=True)
    assert {n: e["status"] for n, e in again.models.items()} == {"a": "skipped", "b": "skipped"}
    spec.write_text(spec.read_text().replace('["promo"]', '["promo", "vans"]'))
    again = bigpanel.run_spec(spec, out=tmp_path / "out", resume=True)
    assert {n: e["status"] for n, e in again.models.items()} == {"a": "skipped", "b": "done"}
    first = sorted(panel(depots).glob("*.parquet"))[0]
    os.utime(first, ns=(first.stat().st_atime_ns, first.stat().st_mtime_ns + 1))  # an input looks refreshed
    again = bigpanel.run_spec(spec, out=tmp_path / "out", resume=True)
    assert {n: e["status"] for n, e in again.models.items()} == {"a": "done", "b": "done"}
    again = bigpanel.run_spec(spec, out=tmp_path / "out")  # without --resume everything runs
    assert {n: e["status"] for n, e in again.models.items()} == {"a": "done", "b": "done"}


def test_a_live_lock_refuses_a_second_run(depots, tmp_path):
    spec = write_spec(tmp_path, depots, '[models.a]\nregressors = ["vans"]\n')
    out = tmp_path / "out"
    out.mkdir()
    with RunLock(out):
        code, _, err = finish(cli(spec, "--out", out))
        with pytest.raises(bigpanel.InputError, match=f"is in use by another run \\(pid {os.getpid()} on"):
            bigpanel.run_spec(spec, out=out)
    assert code == 2 and f"pid {os.getpid()}" in err and "Traceback" not in err
    assert not (out / "manifest.json").exists() and not (out / LOCK_NAME).exists()


def test_a_stale_lock_is_taken_over(depots, tmp_path, caplog):
    spec = write_spec(tmp_path, depots, '[models.a]\nregressors = ["vans"]\n')
    out = tmp_path / "out"
    out.mkdir()
    gone = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    pid = int(gone.stdout)
    import socket

    (out / LOCK_NAME).write_text(json.dumps({"pid": pid, "host": socket.gethostname(), "process_start": None,
                                             "started": "2026-01-01T00:00:00Z"}))
    with caplog.at_level("INFO", logger="bigpanel.batch"):
        report = bigpanel.run_spec(spec, out=out)
    assert report.exit_code == 0
    assert any(getattr(r, "event", "") == "stale_lock" and f"pid {pid}" in r.getMessage() for r in caplog.records)
    assert not (out / LOCK_NAME).exists()


def test_two_concurrent_runs_on_one_folder(depots, tmp_path):
    spec, out = slow_family(tmp_path, depots, n=4), tmp_path / "out"
    procs = [cli(spec, "--out", out) for _ in range(2)]
    results = [finish(p) for p in procs]
    codes = sorted(code for code, _, _ in results)
    assert codes == [0, 2], [r[2][-300:] for r in results]
    loser = next(err for code, _, err in results if code == 2)
    assert "is in use by another run" in loser and "Traceback" not in loser
    m = manifest(out)
    assert m["status"] == "done" and all(e["status"] == "done" for e in m["models"].values())
    assert len(every_file_parses(out)) == 5


def test_sigterm_exits_143_and_records_the_interruption(depots, tmp_path):
    spec, out = slow_family(tmp_path, depots), tmp_path / "out"
    proc = cli(spec, "--out", out)
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline and proc.poll() is None:
        try:
            if any(e["status"] == "done" for e in manifest(out)["models"].values()):
                break
        except (OSError, ValueError):
            pass
        time.sleep(0.01)
    proc.send_signal(signal.SIGTERM)
    code, _, err = finish(proc)
    assert code == 143 and err.rstrip().endswith("Interrupted.")
    m = manifest(out)
    assert m["status"] == "interrupted" and m["finished"] is not None
    assert {e["status"] for e in m["models"].values()} <= {"done", "not run"}
    assert not (out / LOCK_NAME).exists() and not [p for p in out.rglob("*") if ".tmp-" in p.name]


# ---------------------------------------------------------------- the command line


def test_dry_run_prints_models_scans_and_sql_without_reading_rows(depots, tmp_path, monkeypatch):
    from bigpanel.source import Session

    def no_rows(*args, **kwargs):
        raise AssertionError("a row was read by the dry run")

    monkeypatch.setattr(Session, "run", no_rows)
    spec = write_spec(tmp_path, depots, '[models.a]\nregressors = ["vans"]\n[models.b]\nregressors = ["vans", "promo"]\n'
                      '[models.c]\nregressors = ["vans"]\nestimator = "first-difference"\n'
                      '[models.d]\nregressors = ["vans"]\neffects = ["depot", "month"]\n')
    plan = bigpanel.run_spec(spec, out=tmp_path / "out", dry_run=True)
    text = plan.text()
    assert "model a: within, variance cluster by region; shared scan 1" in text
    assert "model c: first-difference, variance cluster by region; shared scan 2" in text
    assert "model d: within, variance cluster by region; own passes (period effects)" in text
    assert text.count("read_parquet(") == 2 and "$unit_low" in text
    assert not (tmp_path / "out").exists()


def test_log_json_lines_and_no_progress_off_a_terminal(depots, tmp_path):
    spec = write_spec(tmp_path, depots, '[models.a]\nregressors = ["vans"]\n')
    code, out, err = finish(cli(spec, "--out", tmp_path / "out", "--log-json", "--fingerprint"))
    assert code == 0 and out == ""
    lines = [json.loads(line) for line in err.splitlines()]
    assert [r["event"] for r in lines][0] == "run_started" and lines[-1]["event"] == "run_finished"
    assert {r["level"] for r in lines} <= {"info", "warning"} and all("time" in r for r in lines)
    code, _, err = finish(cli(spec, "--out", tmp_path / "out2"))
    assert "\r" not in err and all(" info " in line or " warning " in line for line in err.splitlines())
    m = manifest(tmp_path / "out")
    import hashlib

    for f in m["inputs"]["source"]:
        assert f["sha256"] == hashlib.sha256(Path(f["path"]).read_bytes()).hexdigest()
        assert f["size"] == Path(f["path"]).stat().st_size
    assert m["spec"]["sha256"] == hashlib.sha256(spec.read_bytes()).hexdigest()
    assert m["tool"]["version"] == bigpanel.__version__ and m["libraries"]["duckdb"]
    assert m["scans"]["source"] >= 1 and any("read_parquet(" in q["sql"] for q in m["sql"]["source"])


def test_write_atomic_keeps_the_old_file_when_writing_fails(tmp_path, monkeypatch):
    target = tmp_path / "manifest.json"
    target.write_text('{"old": true}\n')

    def broken(*args):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(os, "replace", broken)
    with pytest.raises(OSError):
        write_atomic(target, '{"new": true}\n')
    assert json.loads(target.read_text()) == {"old": True}
    assert [p.name for p in tmp_path.iterdir()] == ["manifest.json"]


def test_a_subset_run_keeps_the_other_models_results_usable(depots, tmp_path):
    spec = write_spec(tmp_path, depots, '[models.a]\nregressors = ["vans"]\n[models.b]\nregressors = ["promo"]\n')
    bigpanel.run_spec(spec, out=tmp_path / "out")
    before = (tmp_path / "out" / "models" / "a.json").stat().st_mtime_ns
    part = bigpanel.run_spec(spec, out=tmp_path / "out", models="b")
    assert part.models["a"]["status"] == "skipped" and part.models["a"]["reason"] == "not chosen by --models"
    assert part.models["a"]["file"] == "models/a.json" and part.models["b"]["status"] == "done"
    assert (tmp_path / "out" / "models" / "a.json").stat().st_mtime_ns == before
    assert "| a | b |" in (tmp_path / "out" / "comparison.md").read_text()
    again = bigpanel.run_spec(spec, out=tmp_path / "out", resume=True)
    assert {n: e["status"] for n, e in again.models.items()} == {"a": "skipped", "b": "skipped"}


def test_several_sources_in_one_spec(depots, tmp_path):
    """A Parquet source and a CSV copy of its rows (with 'NA' for missing promo values):
    the same model on each gives the same numbers (pandas wrote the CSV)."""
    import pandas as pd

    df = pd.concat([pd.read_parquet(f) for f in sorted(panel(depots).glob("*.parquet"))])
    df = df[df["depot"] <= 200]
    df.to_csv(tmp_path / "depots.csv", index=False, na_rep="NA")
    spec = tmp_path / "two.toml"
    spec.write_text(f"""
[sources.files]
path = "{panel(depots)}"
where = "depot <= 200"
unit = "depot"
period = "month"
[sources.text]
path = "depots.csv"
csv_nulls = ["NA"]
csv_options = {{ delim = "," }}
unit = "depot"
period = "month"
[defaults]
outcome = "parcels"
regressors = ["staff_hours", "vans", "promo"]
[models.on_files]
source = "files"
[models.on_text]
source = "text"
""")
    report = bigpanel.run_spec(spec, out=tmp_path / "out")
    assert report.exit_code == 0 and set(report.scans) == {"files", "text"}
    a, b = (json.loads((tmp_path / "out" / "models" / f"{n}.json").read_text()) for n in ("on_files", "on_text"))
    assert a["n_obs"] == b["n_obs"] == len(df)
    for x, y in zip(a["coefficients"], b["coefficients"]):
        np.testing.assert_allclose(x["estimate"], y["estimate"], rtol=1e-9)  # CSV text round-trips doubles to ~1e-15
        np.testing.assert_allclose(x["std_error"], y["std_error"], rtol=1e-9)
    assert [f["path"] for f in report.manifest["inputs"]["text"]] == [str(tmp_path / "depots.csv")]


def test_effect_columns_are_checked_and_folders_read_relative_to_the_spec(depots, tmp_path, monkeypatch):
    spec = write_spec(tmp_path, depots, '[models.a]\nregressors = ["staff_hours"]\neffects = ["depot", "month", "regon"]\n')
    with pytest.raises(SpecError, match="model 'a', key 'effects': Column 'regon' not found in demo-depots. "
                                        "Did you mean 'region'"):
        bigpanel.run_spec(spec, out=tmp_path / "out")
    spec = write_spec(tmp_path, depots, '[models.a]\nregressors = ["staff_hours"]\nwrite_effects = "effects"\n')
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)
    report = bigpanel.run_spec(spec, out=tmp_path / "out")
    assert report.exit_code == 0 and (tmp_path / "effects" / "effect_depot.parquet").is_file()
    assert not (elsewhere / "effects").exists()


def test_query_paths_are_read_relative_to_the_spec(depots, tmp_path, monkeypatch):
    """A query's relative file paths (a table function's argument, a quoted table name, a
    glob) are read from the spec file's folder, whatever the working folder (a scheduler
    starts jobs in its own); the rows equal the source given by its absolute path."""
    data = tmp_path / "jobs" / "data"
    shutil.copytree(panel(depots), data)
    first = sorted(p.name for p in data.rglob("*.parquet"))[0]
    spec = tmp_path / "jobs" / "spec.toml"
    spec.write_text(f"""[sources.glob]
query = "SELECT * FROM read_parquet('data/**/*.parquet') WHERE month > 2"
unit = "depot"
period = "month"
[sources.file]
query = "SELECT * FROM 'data/{first}'"
unit = "depot"
period = "month"
[defaults]
outcome = "parcels"
regressors = ["staff_hours", "vans"]
[models.on_glob]
source = "glob"
[models.on_file]
source = "file"
""")
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)
    report = bigpanel.run_spec(spec, out=tmp_path / "out")
    assert report.exit_code == 0, report.manifest["models"]
    for name, path, where in (("on_glob", data, "month > 2"), ("on_file", data / first, None)):
        got = json.loads((tmp_path / "out" / "models" / f"{name}.json").read_text())
        want = bigpanel.fit(path, "parcels", "staff_hours, vans", "depot", "month", where=where)
        assert got["n_obs"] == want.n_obs
        np.testing.assert_allclose([c["estimate"] for c in got["coefficients"]],
                                   [c.estimate for c in want.coefficients], rtol=1e-12)


def test_rebased_reads_leave_table_names_alone(tmp_path):
    """Only names of files (or globs over folders) found in the spec's folder are rewritten."""
    from bigpanel.expressions import query_sql

    (tmp_path / "a.parquet").write_bytes(b"")
    (tmp_path / "depots").mkdir()
    sql = query_sql("SELECT * FROM depots JOIN 'a.parquet' USING (k) JOIN read_parquet('depots/*.parquet') USING (k) "
                    "JOIN read_csv('missing.csv') USING (k)", str(tmp_path))
    assert f"'{tmp_path / 'a.parquet'}'" in sql or f'"{tmp_path / "a.parquet"}"' in sql
    assert f"'{tmp_path / 'depots' / '*.parquet'}'" in sql
    assert "'missing.csv'" in sql and str(tmp_path / "missing.csv") not in sql
    assert "(depots INNER JOIN" in sql  # a table's name, though a folder of that name is there
