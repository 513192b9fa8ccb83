"""The command line: exit codes, one-sentence errors naming the culprit, no tracebacks.

Most cases run ``bigpanel.cli.main`` in-process (the console script's own entry point);
two run ``python -m bigpanel`` in a subprocess to cover the real process boundary."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import duckdb
import pyarrow.parquet as pq
import pytest

from bigpanel.cli import main

from checkup_data import make_panel

REPO = Path(__file__).resolve().parent.parent


@pytest.fixture(scope="module")
def data(tmp_path_factory) -> Path:
    root = tmp_path_factory.mktemp("cli")
    pq.write_table(make_panel(seed=2), root / "depots.parquet")
    pq.write_table(make_panel(seed=2, duplicates=True), root / "doubled.parquet")
    (root / "empty").mkdir()
    (root / "empty" / "readme.txt").write_text("no data here\n")
    (root / "corrupt.parquet").write_bytes(b"PAR1 this is not really a Parquet file")
    (root / "broken.duckdb").write_text("not a database\n")
    con = duckdb.connect(str(root / "depots.duckdb"))
    con.execute(f"CREATE TABLE depots AS SELECT * FROM read_parquet('{root / 'depots.parquet'}')")
    con.close()
    return root


def run(capsys, *args: str) -> tuple[int, str, str]:
    code = main([str(a) for a in args])
    out, err = capsys.readouterr()
    return code, out, err


def assert_one_sentence(err: str, *names: str) -> None:
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert "Traceback" not in err
    assert lines[0].endswith("."), err
    for name in names:
        assert name in lines[0], (name, err)


KEYS = ("--unit", "depot", "--period", "month")


def test_checkup_text_and_json(data, capsys):
    code, out, err = run(capsys, "checkup", data / "depots.parquet", *KEYS)
    assert (code, err) == (0, "")
    assert out.startswith("Panel checkup of depots.parquet") and "\x1b[" not in out
    code, out, _ = run(capsys, "checkup", data / "depots.parquet", *KEYS, "--columns", "parcels,region", "--json")
    payload = json.loads(out)
    assert code == 0 and [c["name"] for c in payload["columns"]] == ["parcels", "region"]
    assert payload["not_estimable"] == ["region"]


def test_shared_source_options_reach_the_engine(data, capsys, tmp_path):
    code, out, _ = run(capsys, "checkup", data / "depots.duckdb", "--table", "depots", *KEYS, "--where", "region = 1",
                       "--threads", "1", "--memory-limit", "200MB", "--temp-directory", tmp_path, "--json")
    assert code == 0
    assert json.loads(out)["where"] == "region = 1"


def test_duplicate_keys_exit_1_after_the_report(data, capsys):
    code, out, err = run(capsys, "checkup", data / "doubled.parquet", *KEYS)
    assert code == 1
    assert "duplicate keys    2" in out
    assert_one_sentence(err, "doubled.parquet", "2 duplicate (depot, month) keys", "first (")


@pytest.mark.parametrize(
    ("args", "names"),
    [
        pytest.param(["missing.parquet", *KEYS], ["missing.parquet", "does not exist"], id="missing-file"),
        pytest.param(["empty", *KEYS], ["empty", "holds no Parquet files"], id="folder-without-parquet"),
        pytest.param(["corrupt.parquet", *KEYS], ["corrupt.parquet", "not a readable Parquet file"], id="corrupt-parquet"),
        pytest.param(["depots.parquet", "--unit", "depo", "--period", "month"],
                     ["Column 'depo' not found", "Did you mean 'depot'"], id="unknown-column"),
        pytest.param(["depots.parquet", *KEYS, "--columns", "parcels,staf_hours"],
                     ["'staf_hours' not found", "'staff_hours'"], id="unknown-checked-column"),
        pytest.param(["depots.parquet", *KEYS, "--columns", "depot_kind"],
                     ["'depot_kind'", "VARCHAR, not a number"], id="string-column-for-variance"),
        pytest.param(["depots.parquet", "--unit", "depot", "--period", "depot_kind"],
                     ["'depot_kind'", "cannot be a period"], id="string-period"),
        pytest.param(["broken.duckdb", "--table", "depots", *KEYS], ["broken.duckdb", "could not be opened"], id="unreadable-duckdb"),
        pytest.param(["depots.duckdb", *KEYS], ["depots.duckdb", "--table"], id="duckdb-without-table"),
        pytest.param(["depots.parquet", *KEYS, "--where", "parcels >>> 3 AND"], ["Filter 'parcels >>> 3 AND'"], id="filter-not-sql"),
        pytest.param(["depots.parquet", *KEYS, "--where", "region > 99"],
                     ["depots.parquet", "no rows after the filter 'region > 99'"], id="empty-after-filter"),
        pytest.param(["depots.parquet", *KEYS, "--memory-limit", "lots"], ["--memory-limit", "'lots'"], id="bad-memory-limit"),
        pytest.param(["depots.parquet", *KEYS, "--csv-types", "month"], ["--csv-types", "'month'"], id="bad-csv-types"),
    ],
)
def test_bad_input_exits_2_with_one_sentence(data, capsys, monkeypatch, args, names):
    monkeypatch.chdir(data)
    code, out, err = run(capsys, "checkup", *args)
    assert code == 2
    assert out == ""
    assert_one_sentence(err, *names)


def test_usage_errors_keep_their_exit_code(capsys):
    code, _, err = run(capsys, "checkup", "x.parquet", "--unit", "depot")
    assert code == 2 and "Missing option '--period'" in err and "Traceback" not in err
    code, _, err = run(capsys, "tally", "x.parquet")
    assert code == 2 and "No such command" in err
    code, out, _ = run(capsys, "checkup", "--help")
    assert code == 0 and "--memory-limit" in out


def _module_cli(*args: str, cwd: Path) -> subprocess.CompletedProcess:
    env = {k: v for k, v in os.environ.items() if k != "BIGPANEL_TRACEBACK"}
    env["PYTHONPATH"] = str(REPO)
    return subprocess.run([sys.executable, "-m", "bigpanel", *args], capture_output=True, text=True, cwd=cwd, env=env, timeout=120)


def test_python_dash_m_bigpanel(data):
    done = _module_cli("checkup", "depots.parquet", *KEYS, cwd=data)
    assert done.returncode == 0 and "Panel checkup of depots.parquet" in done.stdout
    assert "\x1b[" not in done.stdout  # not a terminal: no colour
    done = _module_cli("checkup", "corrupt.parquet", *KEYS, cwd=data)
    assert done.returncode == 2 and done.stdout == ""
    assert_one_sentence(done.stderr, "corrupt.parquet")


@pytest.mark.filterwarnings("ignore::bigpanel.errors.DroppedRowsWarning")
def test_fit_json_matches_the_python_api(data, capsys):
    # Reference: bigpanel.fit on the same file (the CLI is a thin layer over it); the JSON
    # must parse and carry the same numbers, with no notes on stdout.
    import bigpanel

    code, out, err = run(capsys, "fit", data / "depots.parquet", "--outcome", "parcels", "--regressors",
                         "staff_hours", *KEYS, "--variance", "hc1", "--json")
    assert code == 0, err
    payload = json.loads(out)
    ref = bigpanel.fit(str(data / "depots.parquet"), "parcels", ["staff_hours"], "depot", "month", variance="hc1")
    assert payload["estimator"] == "within" and payload["variance"]["type"] == "hc1"
    assert payload["n_obs"] == ref.n_obs
    (coef,) = payload["coefficients"]
    assert coef["term"] == "staff_hours"
    assert coef["estimate"] == ref.coefficients[0].estimate and coef["std_error"] == ref.coefficients[0].std_error


def test_fit_bad_option_value_exits_2(data, capsys):
    code, out, err = run(capsys, "fit", data / "depots.parquet", "--outcome", "parcels", "--regressors",
                         "staff_hours", *KEYS, "--estimator", "fe")
    assert code == 2 and out == "" and "'fe' is not one of" in err
