"""Benchmark bigpanel against a bare DuckDB scan (the floor) and the in-memory ways.

Run from the repository root with the development environment (it has pandas and psutil):

    .venv/bin/python tests/bench/run.py                          # 1m, 10m and 50m rows
    .venv/bin/python tests/bench/run.py --sizes 1m,10m --repeat 1
    .venv/bin/python tests/bench/run.py --sizes 1m,10m,50m,100m  # adds the 100M-row panel

Panels are depots by 10 months made by datagen and cached in --data-dir (reused when their
options match). The largest size L also gets a panel of L/10 rows for the scaling check, and
the --period-sorted size is measured again in a copy sorted by month. Every case and
repetition runs in a fresh process (worker.py), repetitions interleaved across cases; the
wall time reported is the best of --repeat runs (interference from other jobs only ever adds
time), the peak memory the largest. An in-memory case is skipped, and reported as not
fitting, when its peak extrapolated from the smaller sizes exceeds --memory-budget; any case
whose resident memory passes the budget while running is stopped.

Writes bench-results/latest.json and latest.md (--out-dir) and prints the Markdown. Exit
code 0 when every case ran and all estimates agree, 1 otherwise, 2 for bad options.
"""

from __future__ import annotations

import argparse
import json
import os
import re
import subprocess
import sys
import threading
import time
from dataclasses import dataclass
from pathlib import Path

import psutil

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))  # worker.py and report.py sit beside this file

import report  # noqa: E402
from worker import CASES  # noqa: E402

REPO = HERE.parents[1]
PERIODS = 10  # months per depot in every generated panel
YEARS, COURIERS_PER_DEPOT = 20, 20  # the couriers scenario: 20M rows are 1M couriers, 50k depots, 20 years
DEFAULT_SIZES = "1m,10m,50m"
BYTES = {"": 1, "b": 1, "kb": 10**3, "mb": 10**6, "gb": 10**9, "tb": 10**12,
         "kib": 2**10, "mib": 2**20, "gib": 2**30, "tib": 2**40}  # "GB" as DuckDB reads it: 10^9
POLL_S = 0.2


@dataclass(frozen=True)
class Panel:
    label: str  # "10m" or "10m by period"
    rows: int
    order: str  # "unit" | "period"
    role: str  # "main" | "scaling" (companion of the largest size) | "period-sorted"
    folder: Path
    cases: tuple[str, ...]


class _Parser(argparse.ArgumentParser):
    """Usage errors as one sentence on stderr with exit code 2."""

    def error(self, message):
        self.exit(2, f"{self.prog}: {message}.\n")


def parse_rows(text: str) -> int:
    match = re.fullmatch(r"(\d+(?:\.\d+)?)([kmg]?)", text.strip().lower())
    if not match:
        raise ValueError(f"'{text}' is not a row count such as 20k, 1m or 50m")
    rows = round(float(match[1]) * {"": 1, "k": 10**3, "m": 10**6, "g": 10**9}[match[2]])
    if rows < 2 * PERIODS or rows % PERIODS:
        raise ValueError(f"'{text}' must be a multiple of {PERIODS} rows (depots x {PERIODS} months), at least {2 * PERIODS}")
    return rows


def parse_bytes(text: str) -> int:
    match = re.fullmatch(r"(\d+(?:\.\d+)?)\s*([kmgt]i?b|b)?", text.strip().lower())
    if not match:
        raise ValueError(f"'{text}' is not a memory size such as 8GB or 512MiB")
    return round(float(match[1]) * BYTES[match[2] or ""])


def count_label(n: int) -> str:
    for size, suffix in ((10**9, "g"), (10**6, "m"), (10**3, "k")):
        if n % size == 0:
            return f"{n // size}{suffix}"
    return str(n)


def _parser() -> _Parser:
    p = _Parser(prog="tests/bench/run.py", description=__doc__.split("\n\n")[0])
    p.add_argument("--sizes", default=DEFAULT_SIZES, help=f"panel sizes in rows (default {DEFAULT_SIZES}; add 100m for the large run)")
    p.add_argument("--cases", default=",".join(CASES),
                   help="cases to run (the floor always runs; spark-* cases add Spark's own floor); default: all of "
                        "the scenario's but the Spark cases")
    p.add_argument("--repeat", type=int, default=3, help="runs per case; the best wall time is reported (default 3)")
    p.add_argument("--threads", type=int, help="threads for DuckDB, polars and BLAS (default: all cores)")
    p.add_argument("--memory-limit", help="DuckDB memory_limit for the floor and bigpanel cases, e.g. 4GB")
    p.add_argument("--memory-budget", default="8GB", help="largest peak memory any case may use (default 8GB)")
    p.add_argument("--period-sorted", default="10m", help="size also measured sorted by month, or 'none' (default 10m)")
    p.add_argument("--data-dir", type=Path, default=Path("/tmp/bigpanel-data"), help="panel cache folder")
    p.add_argument("--out-dir", type=Path, default=REPO / "bench-results", help="where latest.json and latest.md go")
    p.add_argument("--timeout", type=float, default=3600, help="seconds before a case is stopped (default 3600)")
    p.add_argument("--scenario", choices=("depots", "couriers"), default="depots",
                   help="depots by 10 months (default), or couriers by 20 years with courier, depot and year "
                        "effects (one panel per size, a depot per 20 couriers, a tenth moving each year)")
    return p


def _options(argv):
    parser = _parser()
    args = parser.parse_args(argv)
    try:
        args.sizes = sorted({parse_rows(s) for s in args.sizes.split(",") if s.strip()})
        args.memory_budget = parse_bytes(args.memory_budget)
        if args.memory_limit is not None:
            parse_bytes(args.memory_limit)
        args.period_sorted = None if args.period_sorted.lower() == "none" else parse_rows(args.period_sorted)
    except ValueError as exc:
        parser.error(f"invalid size: {exc}")
    wanted = [c.strip() for c in args.cases.split(",") if c.strip()]
    unknown = [c for c in wanted if c not in CASES]
    if unknown:
        parser.error(f"invalid value for --cases: '{unknown[0]}' is not one of {', '.join(CASES)}")
    if args.cases == ",".join(CASES):  # the default: every case of the scenario
        wanted = [c for c in CASES if CASES[c].scenario == args.scenario and CASES[c].group != "spark"]
    other = [c for c in wanted if c != "floor" and CASES[c].scenario != args.scenario]
    if other:
        parser.error(f"invalid value for --cases: '{other[0]}' runs on the {CASES[other[0]].scenario} panels, "
                     f"not with --scenario {args.scenario}")
    if any(CASES[c].group == "spark" for c in wanted):
        wanted.append("spark-floor")
    args.cases = ["floor"] + [c for c in CASES if c in wanted and c != "floor"]
    if not args.sizes:
        parser.error("--sizes names no size")
    if args.repeat < 1 or (args.threads is not None and args.threads < 1):
        parser.error("--repeat and --threads must be at least 1")
    return args


def plan(args) -> list[Panel]:
    """The panels to measure, smallest first, each period-sorted copy after its twin."""
    def folder(rows, order):
        name = f"depots_{count_label(rows // PERIODS)}_x{PERIODS}" + ("_by_period" if order == "period" else "")
        return args.data_dir / name

    if args.scenario == "couriers":
        return [Panel(count_label(n), n, "unit", "main", args.data_dir / f"couriers_{count_label(n // YEARS)}_x{YEARS}",
                      tuple(args.cases)) for n in args.sizes]
    bigpanel_cases = tuple(c for c in args.cases if CASES[c].group in ("floor", "bigpanel"))
    panels = [Panel(count_label(n), n, "unit", "main", folder(n, "unit"), tuple(args.cases)) for n in args.sizes]
    companion = args.sizes[-1] // 10
    if companion not in args.sizes and companion % PERIODS == 0 and companion >= 2 * PERIODS:
        cases = tuple(c for c in bigpanel_cases if c == "floor" or c in report.SCALING_CASES)
        panels.append(Panel(count_label(companion), companion, "unit", "scaling", folder(companion, "unit"), cases))
    if args.period_sorted is not None:
        if args.period_sorted in args.sizes:
            n = args.period_sorted
            panels.append(Panel(f"{count_label(n)} by period", n, "period", "period-sorted", folder(n, "period"), bigpanel_cases))
        else:
            print(f"note: no period-sorted run: --period-sorted {count_label(args.period_sorted)} is not in --sizes.", file=sys.stderr)
    return sorted(panels, key=lambda p: (p.rows, p.order != "unit"))


def ensure_data(panels) -> None:
    import datagen

    for panel in panels:
        print(f"panel {panel.label}: {panel.folder}", file=sys.stderr)
        if panel.folder.name.startswith("couriers_"):
            datagen.ensure_couriers(panel.folder, n_couriers=panel.rows // YEARS,
                                    n_depots=max(2, panel.rows // (YEARS * COURIERS_PER_DEPOT)), n_years=YEARS)
            continue
        datagen.ensure(panel.folder, n_units=panel.rows // PERIODS, n_periods=PERIODS, order=panel.order)


def run_case(case: str, panel: Panel, args) -> dict:
    """One case in a fresh process, stopped if its resident memory passes the budget."""
    cmd = [sys.executable, str(HERE / "worker.py"), case, str(panel.folder),
           "--temp-directory", str(args.data_dir / ".spill")]
    env = dict(os.environ)
    if args.threads is not None:
        cmd += ["--threads", str(args.threads)]
        env.update({name: str(args.threads) for name in
                    ("POLARS_MAX_THREADS", "OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")})
    if args.memory_limit is not None:
        cmd += ["--memory-limit", args.memory_limit]
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env, cwd=REPO)
    seen = {"rss": 0, "over": False}

    def watch():
        try:
            process = psutil.Process(proc.pid)
            while proc.poll() is None:
                seen["rss"] = max(seen["rss"], process.memory_info().rss)
                if seen["rss"] > args.memory_budget:
                    seen["over"] = True
                    proc.kill()
                    return
                time.sleep(POLL_S)
        except psutil.NoSuchProcess:
            return

    watcher = threading.Thread(target=watch, daemon=True)
    watcher.start()
    try:
        out, err = proc.communicate(timeout=args.timeout)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.communicate()
        return {"status": "timed-out", "note": f"stopped after {args.timeout:g} s"}
    watcher.join()
    if seen["over"]:
        return {"status": "over-budget", "peak_rss_bytes": seen["rss"],
                "note": f"stopped at {seen['rss'] / 1e6:,.0f} MB resident, over the budget"}
    if proc.returncode != 0:
        lines = [line for line in err.strip().splitlines() if line.strip()]
        return {"status": "failed", "note": lines[-1] if lines else f"exit code {proc.returncode}"}
    return {"status": "ok", **json.loads(out.strip().splitlines()[-1])}


def does_not_fit(case: str, panel: Panel, done: list[dict], budget: int) -> dict | None:
    """A 'does not fit' record when the case's peak at smaller sizes, extrapolated linearly
    to this size, exceeds the budget (or a smaller size already did)."""
    earlier = [r for r in done if r["case"] == case and r["role"] == "main" and r["rows"] < panel.rows]
    if any(r["status"] in ("over-budget", "does-not-fit") for r in earlier):
        return {"status": "does-not-fit", "note": "a smaller size already exceeded the budget"}
    measured = [r for r in earlier if r["status"] == "ok"]
    if not measured:
        return None
    points = report.memory_points(measured)
    estimate = report.extrapolate(points, panel.rows)
    if estimate <= budget:
        return None
    sources = " and ".join(count_label(n) if n else "the baseline" for n, _ in points[-2:])
    return {"status": "does-not-fit", "estimated_peak_bytes": estimate,
            "note": f"does not fit {budget / 1e9:g} GB: about {estimate / 1e9:.1f} GB extrapolated from {sources}"}


def measure(panels, args) -> list[dict]:
    done = []
    total = sum(len(p.cases) for p in panels) * args.repeat
    step = 0
    for panel in panels:
        attempts = {case: [] for case in panel.cases}
        skipped = {}
        for case in panel.cases:
            if CASES[case].group == "in-memory":
                verdict = does_not_fit(case, panel, done, args.memory_budget)
                if verdict:
                    skipped[case] = verdict
        for repeat in range(args.repeat):
            for case in panel.cases:
                step += 1
                if case in skipped or any(a["status"] != "ok" for a in attempts[case]):
                    continue
                attempt = run_case(case, panel, args)
                attempts[case].append(attempt)
                what = (f"{attempt['wall_s']:.2f} s, {attempt['peak_rss_bytes'] / 1e6:,.0f} MB" if attempt["status"] == "ok"
                        else f"{attempt['status']}: {attempt.get('note', '')}")
                print(f"[{step}/{total}] {panel.label} {case} (run {repeat + 1}): {what}", file=sys.stderr)
        for case in panel.cases:
            base = {"panel": panel.label, "rows": panel.rows, "order": panel.order, "role": panel.role,
                    "case": case, "group": CASES[case].group}
            done.append({**base, **(skipped.get(case) or report.combine(attempts[case]))})
    return done


def main(argv=None) -> int:
    args = _options(argv)
    panels = plan(args)
    machine = report.machine(REPO)
    print(report.machine_markdown(machine), file=sys.stderr)
    try:
        ensure_data(panels)
    except Exception as exc:  # datagen's errors are one sentence already
        print(f"Could not prepare the panels in {args.data_dir}: {exc}", file=sys.stderr)
        return 2 if type(exc).__name__ == "DatagenError" else 1
    started = time.time()
    results = measure(panels, args)
    settings = {"sizes": [count_label(n) for n in args.sizes], "cases": args.cases, "repeat": args.repeat,
                "statistic": "best wall time of the runs; largest peak memory", "threads": args.threads,
                "memory_limit": args.memory_limit, "memory_budget_bytes": args.memory_budget,
                "periods_per_unit": YEARS if args.scenario == "couriers" else PERIODS, "data_dir": str(args.data_dir),
                "scenario": args.scenario,
                "started_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(started)),
                "elapsed_s": round(time.time() - started, 1)}
    machine["load_average_end"] = list(os.getloadavg())
    end = report.code_state(REPO)
    machine.update(git_commit_end=end["git_commit"], uncommitted_state_end=end["uncommitted_state"])
    summary = report.summarize(results, settings, machine)
    markdown = report.to_markdown(summary)
    write_atomic(args.out_dir / "latest.json", json.dumps(summary, indent=2) + "\n")
    write_atomic(args.out_dir / "latest.md", markdown)
    print(markdown)
    for problem in summary["problems"]:
        print(f"PROBLEM: {problem}", file=sys.stderr)
    return 1 if summary["problems"] else 0


def write_atomic(path: Path, text: str) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    temporary = path.with_name(f".{path.name}.partial-{os.getpid()}")
    temporary.write_text(text)
    os.replace(temporary, path)


if __name__ == "__main__":
    sys.exit(main())
