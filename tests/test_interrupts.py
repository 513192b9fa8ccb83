"""Stop signals end a run promptly and cleanly: exit 130 (SIGINT) or 143 (SIGTERM), exactly
"Interrupted." on stderr, no traceback, and no spill folder left behind.

Each case runs ``python -m bigpanel`` (the console script's own entry) in a subprocess
whose system temporary folder (TMPDIR) is a fresh test folder, so the private spill folder
can be watched: it appears when the session opens (``bigpanel-*``; its ``single``
subfolder when the chunk queries start) and must be gone after the signal. Signals are
sent at known moments: while a long query runs, while chunk queries run in parallel, and
during start-up just after the handlers are in place (read from /proc: the process
catches SIGTERM), while the heavy modules are still being imported.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

REPO = Path(__file__).resolve().parent.parent
PATIENCE = 60.0  # seconds before a test gives up waiting (a hang is the failure, not slowness)

# A source that takes many seconds to scan and needs no file: a fit over it is surely
# still running when the signal comes.
SLOW_QUERY = ("SELECT i // 10 AS depot, i % 10 AS month, hash(i) % 1000 * 1.0 AS parcels, "
              "hash(i + 1) % 997 * 1.0 AS vans FROM range(200000000) t(i)")
FIT_ON_QUERY = ["fit", "--query", SLOW_QUERY, "--unit", "depot", "--period", "month",
                "--outcome", "parcels", "--regressors", "vans"]
CHECKUP_ON_QUERY = ["checkup", "--query", SLOW_QUERY, "--unit", "depot", "--period", "month"]


@pytest.fixture(scope="module")
def sorted_panel(tmp_path_factory) -> Path:
    """3M rows sorted by unit in 100k-row groups: a fit on it runs chunk queries in parallel."""
    rng = np.random.default_rng(7)
    units, periods = 300_000, 10
    x = rng.normal(size=units * periods)
    table = pa.table({
        "depot": np.repeat(np.arange(units), periods), "month": np.tile(np.arange(periods), units),
        "vans": x, "parcels": 2 * x + rng.normal(size=units * periods),
        # more columns make each chunk query of the checkup longer, so the signal lands
        # inside the parallel phase even on a quiet machine
        **{f"extra_{j}": rng.normal(size=units * periods) for j in range(4)},
    })
    path = tmp_path_factory.mktemp("interrupts") / "depots.parquet"
    pq.write_table(table, path, row_group_size=100_000)
    return path


def launch(args: list[str], tmp: Path) -> subprocess.Popen:
    (tmp / "system-temp").mkdir(exist_ok=True)
    env = dict(os.environ, PYTHONPATH=str(REPO), TMPDIR=str(tmp / "system-temp"))
    return subprocess.Popen([sys.executable, "-m", "bigpanel", *args], cwd=tmp, env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def wait_for(condition, proc: subprocess.Popen) -> None:
    deadline = time.monotonic() + PATIENCE
    while not condition():
        assert proc.poll() is None, f"exited early with {proc.returncode}: {proc.stderr.read()}"
        assert time.monotonic() < deadline, "the moment to signal never came"
        time.sleep(0.005)


def spill_folders(tmp: Path) -> list[Path]:
    return list((tmp / "system-temp").glob("bigpanel-*"))


def catches_sigterm(pid: int) -> bool:
    """True once the process has its own SIGTERM handler (Linux /proc: SigCgt bit 15)."""
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("SigCgt:"):
            return bool(int(line.split()[1], 16) & (1 << (signal.SIGTERM - 1)))
    return False


def assert_interrupted(proc: subprocess.Popen, signum: int, tmp: Path) -> None:
    proc.send_signal(signum)
    _, err = proc.communicate(timeout=PATIENCE)
    assert (proc.returncode, err) == (128 + signum, "Interrupted.\n")
    assert list((tmp / "system-temp").iterdir()) == []
    assert sorted(p.name for p in tmp.iterdir()) == ["system-temp"]  # nothing in the working folder either


SIGNALS = [pytest.param(signal.SIGINT, id="SIGINT"), pytest.param(signal.SIGTERM, id="SIGTERM")]


@pytest.mark.parametrize("signum", SIGNALS)
@pytest.mark.parametrize("command", [FIT_ON_QUERY, CHECKUP_ON_QUERY], ids=["fit", "checkup"])
def test_signal_while_a_query_runs(tmp_path, command, signum):
    proc = launch(command, tmp_path)
    wait_for(lambda: spill_folders(tmp_path), proc)
    time.sleep(0.3)  # past set-up: the scan is running
    assert_interrupted(proc, signum, tmp_path)


@pytest.mark.parametrize("signum", SIGNALS)
@pytest.mark.parametrize("command", ["fit", "checkup"])
def test_signal_while_chunk_queries_run_in_parallel(tmp_path, sorted_panel, command, signum):
    args = [command, str(sorted_panel), "--unit", "depot", "--period", "month"]
    if command == "fit":
        args += ["--outcome", "parcels", "--regressors", "vans", "--estimator", "first-difference"]
    proc = launch(args, tmp_path)
    wait_for(lambda: any((f / "single").exists() for f in spill_folders(tmp_path)), proc)
    assert_interrupted(proc, signum, tmp_path)


@pytest.mark.parametrize("delay", [0.0, 0.02, 0.05, 0.1, 0.2, 0.4])
@pytest.mark.parametrize("signum", SIGNALS)
def test_signal_during_start_up(tmp_path, signum, delay):
    proc = launch(FIT_ON_QUERY, tmp_path)
    wait_for(lambda: catches_sigterm(proc.pid), proc)
    time.sleep(delay)
    if delay == 0.0:
        assert spill_folders(tmp_path) == []  # still importing: the session is not open yet
    assert_interrupted(proc, signum, tmp_path)


def test_a_second_signal_during_clean_up_changes_nothing(tmp_path):
    proc = launch(FIT_ON_QUERY, tmp_path)
    wait_for(lambda: spill_folders(tmp_path), proc)
    time.sleep(0.3)
    proc.send_signal(signal.SIGTERM)
    time.sleep(0.05)  # (sent together, both are pending and Python runs SIGINT's handler first)
    proc.send_signal(signal.SIGINT)
    _, err = proc.communicate(timeout=PATIENCE)
    assert (proc.returncode, err) == (143, "Interrupted.\n")
    assert list((tmp_path / "system-temp").iterdir()) == []
