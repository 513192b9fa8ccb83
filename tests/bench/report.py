"""The benchmark's targets, the figures derived from the raw runs, and their Markdown rendering."""

from __future__ import annotations

import hashlib
import importlib.metadata
import os
import platform
import subprocess

import psutil

# The owner's targets for this machine class (2 cores).
FLOOR_TARGETS = {"within": 1.5, "within-unit-period": 3.0, "first-difference": 2.5}  # wall time, at most x the floor
CASE_TARGETS = {"fit-many-10": ("within", 2.5)}  # wall time, at most x another case's on the same panel (issue 10)
VERSUS_ROWS = 10_000_000  # the comparisons with the in-memory ways are targets at this size
VERSUS_TARGETS = {"pandas": {"speedup_at_least": 5.0, "memory_share_at_most": 0.2},
                  "polars-lazy": {"speedup_at_least": 2.0}}  # for bigpanel within against each way
SCALING_CASES = ("pooled", "within", "first-difference")
SCALING_TARGETS = {"time_ratio_at_most": 11.0, "memory_ratio_at_most": 1.3}  # 10x the rows
AGREEMENT = 1e-6  # largest relative difference between two computations of the same estimate


def machine(repo) -> dict:
    model = "unknown"
    try:
        with open("/proc/cpuinfo") as f:
            model = next((line.split(":", 1)[1].strip() for line in f if line.startswith("model name")), model)
    except OSError:
        model = platform.processor() or model

    memory = psutil.virtual_memory()
    return {
        "cpu_model": model,
        "logical_cores": os.cpu_count(),
        "physical_cores": psutil.cpu_count(logical=False),
        "memory_bytes": memory.total,
        "memory_available_bytes_at_start": memory.available,
        "os": platform.platform(),
        "python": platform.python_version(),
        "versions": {name: importlib.metadata.version(name)
                     for name in ("bigpanel", "duckdb", "polars", "pandas", "numpy", "pyarrow")},
        **code_state(repo),
        "load_average_start": list(os.getloadavg()),
    }


def code_state(repo) -> dict:
    """The commit, and a digest of uncommitted changes in bigpanel/ and sql/ (None if none).

    The package is installed editable: every worker imports the working tree as it is at
    that moment, so a change in between makes runs of one case measure different code.
    """
    def git(*args):
        done = subprocess.run(["git", *args], cwd=repo, capture_output=True, text=True)
        return done.stdout.strip() if done.returncode == 0 else None

    changed = git("status", "--porcelain", "--", "bigpanel", "sql")
    diff = git("diff", "HEAD", "--", "bigpanel", "sql") or ""
    return {"git_commit": git("rev-parse", "--short", "HEAD"),
            "uncommitted_state": hashlib.sha256((changed + diff).encode()).hexdigest()[:12]
            if changed else None}


def combine(attempts: list[dict]) -> dict:
    """Best wall time and largest peak of a case's runs; the first failure if any failed."""
    failed = [a for a in attempts if a["status"] != "ok"]
    if failed or not attempts:
        return failed[0] if failed else {"status": "failed", "note": "no run"}
    out = {"status": "ok", "runs": len(attempts), "wall_s": min(a["wall_s"] for a in attempts),
           "walls_s": [a["wall_s"] for a in attempts],
           "peak_rss_bytes": max(a["peak_rss_bytes"] for a in attempts),
           "baseline_rss_bytes": max(a["baseline_rss_bytes"] for a in attempts)}
    if "received_bytes" in attempts[0]:  # what came back to Python from another engine
        out["received_bytes"], out["queries"] = attempts[0]["received_bytes"], attempts[0]["queries"]
    if "coefficients" in attempts[0]:
        out["coefficients"] = attempts[0]["coefficients"]
        out["std_errors"] = attempts[0]["std_errors"]
        out["run_to_run_rel_diff"] = max(_rel_diff(a["coefficients"], out["coefficients"]) for a in attempts)
    return out


def extrapolate(points: list[tuple[int, int]], rows: int) -> float:
    """Peak memory at `rows` on the line through the two largest measured (rows, peak) points.

    Give a (0, baseline) point (the process before the work) when one size was measured.
    """
    (n1, p1), (n2, p2) = sorted(points)[-2:]
    slope = max(p2 - p1, 0) / (n2 - n1)
    return p2 + slope * (rows - n2)


def rows_at(points: list[tuple[int, int]], budget: int) -> float | None:
    """Rows at which the same line reaches the budget (None when it does not rise)."""
    (n1, p1), (n2, p2) = sorted(points)[-2:]
    return n2 + (budget - p2) * (n2 - n1) / (p2 - p1) if p2 > p1 else None


def memory_points(rows: list[dict]) -> list[tuple[int, int]]:
    """(rows, peak) of measured runs, plus (0, the baseline before the work) of the smallest."""
    points = sorted((r["rows"], r["peak_rss_bytes"]) for r in rows)
    first = min(rows, key=lambda r: r["rows"])
    return [(0, first["baseline_rss_bytes"])] + points


def _rel_diff(values, reference) -> float:
    return max(abs(v - r) / abs(r) if r else abs(v) for v, r in zip(values, reference))


def _agreement(row: dict, reference: dict, against: str) -> dict:
    coef = _rel_diff(row["coefficients"], reference["coefficients"])
    se = _rel_diff(row["std_errors"], reference["std_errors"])
    return {"against": against, "coef_rel_diff": coef, "se_rel_diff": se, "tolerance": AGREEMENT,
            "agrees": coef <= AGREEMENT and se <= AGREEMENT}


def summarize(results: list[dict], settings: dict, machine: dict) -> dict:
    """Ratios to the floor, agreement checks, targets, comparisons and scaling, from the raw rows."""
    ok = {(r["panel"], r["case"]): r for r in results if r["status"] == "ok"}
    problems, notes = [], []
    for r in results:
        if r["status"] in ("failed", "timed-out") or (r["status"] == "over-budget" and r["group"] != "in-memory"):
            problems.append(f"{r['panel']} {r['case']}: {r['status']}: {r.get('note', '')}")
        if r["status"] != "ok":
            continue
        r["rows_per_s"] = r["rows"] / r["wall_s"]
        floor = ok.get((r["panel"], "spark-floor" if r["group"] == "spark" else "floor"))  # each engine's own floor
        r["ratio_to_floor"] = r["wall_s"] / floor["wall_s"] if floor else None
        limit = FLOOR_TARGETS.get(r["case"])
        if limit is not None and r["ratio_to_floor"] is not None:
            r["target"] = {"ratio_to_floor_at_most": limit, "met": r["ratio_to_floor"] <= limit}
        if r["case"] in CASE_TARGETS:
            other, most = CASE_TARGETS[r["case"]]
            base = ok.get((r["panel"], other))
            if base:
                ratio = r["wall_s"] / base["wall_s"]
                r["target"] = {"ratio_to_case_at_most": most, "case": other, "ratio_to_case": ratio, "met": ratio <= most}
        if r.get("run_to_run_rel_diff"):
            notes.append(f"{r['panel']} {r['case']}: estimates differ between runs of the same data by up to "
                         f"{r['run_to_run_rel_diff']:.1e} (relative)")
        reference, against = None, None
        if r["group"] == "in-memory":
            reference, against = ok.get((r["panel"], "within")), f"bigpanel within on {r['panel']}"
        elif r["group"] == "spark" and "coefficients" in r and r["role"] == "main":
            twin = r["case"].removeprefix("spark-")
            if (r["panel"], twin) in ok:
                reference, against = ok[(r["panel"], twin)], f"{twin} on DuckDB"
        elif r["role"] == "period-sorted" and "coefficients" in r:
            twin = r["panel"].removesuffix(" by period")
            reference, against = ok.get((twin, r["case"])), f"{r['case']} on {twin} (unit-sorted)"
        if against and reference is None:
            r["check"] = {"against": None, "note": f"not checked: {against} did not run"}
        elif against:
            r["check"] = _agreement(r, reference, against)
            if not r["check"]["agrees"]:
                problems.append(f"MISMATCH {r['panel']} {r['case']}: estimates differ from {against} by "
                                f"{r['check']['coef_rel_diff']:.2e} (coefficients) and {r['check']['se_rel_diff']:.2e} "
                                f"(standard errors), tolerance {AGREEMENT:g}")
    if (machine.get("git_commit_end"), machine.get("uncommitted_state_end")) != (
            machine["git_commit"], machine["uncommitted_state"]):
        notes.append("the code changed while the benchmark ran (commit or uncommitted changes in bigpanel/ or sql/ "
                     "differ between start and end): runs of one case may have measured different code")
    return {"machine": machine, "settings": settings, "results": results, "versus": _versus(results, ok),
            "scaling": _scaling(results, ok), "memory_budget": _budget(results, settings["memory_budget_bytes"]),
            "problems": problems, "notes": notes}


def _versus(results, ok) -> list[dict]:
    out = []
    for r in results:
        within = ok.get((r["panel"], "within"))
        if r["group"] != "in-memory" or r["role"] != "main" or within is None:
            continue
        row = {"panel": r["panel"], "rows": r["rows"], "way": r["case"], "status": r["status"],
               "within_wall_s": within["wall_s"], "within_peak_rss_bytes": within["peak_rss_bytes"]}
        if r["status"] == "ok":
            row.update(way_wall_s=r["wall_s"], way_peak_rss_bytes=r["peak_rss_bytes"],
                       speedup=r["wall_s"] / within["wall_s"],
                       memory_share=within["peak_rss_bytes"] / r["peak_rss_bytes"])
            targets = VERSUS_TARGETS.get(r["case"], {}) if r["rows"] == VERSUS_ROWS else {}
            row["targets"] = dict(targets)
            if "speedup_at_least" in targets:
                row["targets"]["speedup_met"] = row["speedup"] >= targets["speedup_at_least"]
            if "memory_share_at_most" in targets:
                row["targets"]["memory_share_met"] = row["memory_share"] <= targets["memory_share_at_most"]
        out.append(row)
    return out


def _scaling(results, ok) -> list[dict]:
    sizes = sorted({r["rows"] for r in results if r["order"] == "unit"})
    large = sizes[-1]
    small = large // 10
    if small not in sizes:
        return []
    out = []
    for case in SCALING_CASES:
        a = next((r for r in ok.values() if r["case"] == case and r["rows"] == small and r["order"] == "unit"), None)
        b = next((r for r in ok.values() if r["case"] == case and r["rows"] == large and r["order"] == "unit"), None)
        if a is None or b is None:
            continue
        time_ratio, memory_ratio = b["wall_s"] / a["wall_s"], b["peak_rss_bytes"] / a["peak_rss_bytes"]
        out.append({"case": case, "small": a["panel"], "large": b["panel"],
                    "small_wall_s": a["wall_s"], "large_wall_s": b["wall_s"], "time_ratio": time_ratio,
                    "small_peak_rss_bytes": a["peak_rss_bytes"], "large_peak_rss_bytes": b["peak_rss_bytes"],
                    "memory_ratio": memory_ratio, "targets": {
                        **SCALING_TARGETS, "time_met": time_ratio <= SCALING_TARGETS["time_ratio_at_most"],
                        "memory_met": memory_ratio <= SCALING_TARGETS["memory_ratio_at_most"]}})
    return out


def _budget(results, budget) -> list[dict]:
    """Per in-memory way: the largest size measured within the budget, the first that was not,
    and the size at which the measured peaks, extrapolated linearly, reach the budget."""
    out = []
    for case in dict.fromkeys(r["case"] for r in results if r["group"] == "in-memory"):
        rows = [r for r in results if r["case"] == case and r["role"] == "main"]
        fits = [r for r in rows if r["status"] == "ok"]
        over = [r for r in rows if r["status"] in ("does-not-fit", "over-budget")]
        entry = {"way": case, "budget_bytes": budget,
                 "largest_fitting": fits[-1]["panel"] if fits else None,
                 "largest_fitting_peak_rss_bytes": fits[-1]["peak_rss_bytes"] if fits else None,
                 "first_not_fitting": over[0]["panel"] if over else None,
                 "first_not_fitting_note": over[0].get("note") if over else None}
        if fits:
            entry["rows_at_budget_estimate"] = rows_at(memory_points(fits), budget)
        out.append(entry)
    return out


# ---------------------------------------------------------------------------- Markdown

def _mb(n) -> str:
    return "-" if n is None else f"{n / 1e6:,.0f}"


def _num(x, digits=2) -> str:
    return "-" if x is None else f"{x:,.{digits}f}"


def _verdict(met: bool | None) -> str:
    return "" if met is None else (": met" if met else ": MISSED")


def _rows_text(n: float) -> str:
    return f"{n / 1e6:,.1f}M" if n >= 1e6 else f"{n / 1e3:,.0f}k"


def _code(commit, changed) -> str:
    return f"commit {commit}" + (f" with uncommitted changes in bigpanel/ or sql/ (state {changed})" if changed else "")


def machine_markdown(m: dict) -> str:
    v = m["versions"]
    load = " / ".join(f"{x:.1f}" for x in m["load_average_start"])
    end = m.get("load_average_end")
    lines = [
        "## Machine",
        "",
        f"- CPU: {m['cpu_model']}; {m['logical_cores']} logical cores ({m['physical_cores']} physical)",
        f"- Memory: {m['memory_bytes'] / 2**30:.1f} GiB ({m['memory_available_bytes_at_start'] / 2**30:.1f} GiB available at start)",
        f"- {m['os']}; Python {m['python']}; " + ", ".join(f"{k} {x}" for k, x in v.items()),
        f"- Code: {_code(m['git_commit'], m['uncommitted_state'])} at start" + (
            f", {_code(m['git_commit_end'], m['uncommitted_state_end'])} at end" if "git_commit_end" in m else ""),
        f"- Load average (1 / 5 / 15 min) at start {load}" + (
            f", at end {' / '.join(f'{x:.1f}' for x in end)}" if end else "") + " (a shared machine: other jobs add time)",
    ]
    return "\n".join(lines) + "\n"


def to_markdown(s: dict) -> str:
    st = s["settings"]
    threads = st["threads"] or "all cores"
    out = [
        "# bigpanel benchmark",
        "",
        machine_markdown(s["machine"]),
        "## Settings",
        "",
        (f"- Panels: couriers x {st['periods_per_unit']} years made by datagen (a depot per 20 couriers, a tenth "
         "of couriers moving each year), rows sorted by courier; 2 regressors; every fit with courier clusters"
         if st.get("scenario") == "couriers" else
         f"- Panels: depots x {st['periods_per_unit']} months made by datagen, rows sorted by depot unless marked "
         "\"by period\"; 5 regressors; every fit with unit clusters"),
        f"- {st['repeat']} run(s) per case, each in a fresh process: wall time is the best run, peak memory the "
        "largest resident set of the process (interpreter and imports included)",
        f"- Threads: {threads}; DuckDB memory limit: {st['memory_limit'] or 'default'}; memory budget "
        f"{st['memory_budget_bytes'] / 1e9:g} GB; started {st['started_utc']}, took {st['elapsed_s']:.0f} s",
        "- spark-* cases: bigpanel with --engine spark and Spark's own floor (one Spark SQL query with the same "
        "sums), in one process each (SparkSession started before the clock; the JVM's memory is not in peak MB)",
        "- \"x floor\": wall time over the floor's (one DuckDB query summing the pooled cross-products over "
        "the same files), measured in the same run",
        "",
        "## Cases",
        "",
        "| panel | case | wall s | x floor | target | peak MB | M rows/s | note |",
        "|---|---|--:|--:|---|--:|--:|---|",
    ]
    for r in s["results"]:
        target = r.get("target")
        target_text = ""
        if target and "ratio_to_floor_at_most" in target:
            target_text = f"<= {target['ratio_to_floor_at_most']:g}{_verdict(target['met'])}"
        elif target:
            target_text = (f"<= {target['ratio_to_case_at_most']:g}x {target['case']} "
                           f"({target['ratio_to_case']:.2f}x){_verdict(target['met'])}")
        note = r.get("note", "") if r["status"] != "ok" else ""
        check = r.get("check")
        if check and check.get("against"):
            word = "agrees with" if check["agrees"] else "MISMATCH with"
            note = f"{word} {check['against']} ({check['coef_rel_diff']:.0e})"
        elif check:
            note = check["note"]
        if "received_bytes" in r:
            note = (note + "; " if note else "") + f"{r['received_bytes']:,} bytes to Python in {r['queries']} queries"
        peak = r.get("peak_rss_bytes") or r.get("estimated_peak_bytes")
        peak_text = _mb(peak) if r["status"] == "ok" or peak is None else f"~{_mb(peak)}"
        rate = r["rows_per_s"] / 1e6 if "rows_per_s" in r else None
        out.append(f"| {r['panel']} | {r['case']} | {_num(r.get('wall_s'))} | {_num(r.get('ratio_to_floor'))} | "
                   f"{target_text} | {peak_text} | {_num(rate, 1)} | {note} |")
    if s["versus"]:
        out += ["", f"## bigpanel within against the in-memory ways (targets at {_rows_text(VERSUS_ROWS)} rows)", "",
                "| panel | way | way s | within s | within faster | target | way peak MB | within peak MB | "
                "within / way memory | target |",
                "|---|---|--:|--:|--:|---|--:|--:|--:|---|"]
        for v in s["versus"]:
            t = v.get("targets", {})
            speed_t = f">= {t['speedup_at_least']:g}x{_verdict(t['speedup_met'])}" if "speedup_at_least" in t else ""
            mem_t = f"<= {t['memory_share_at_most']:g}{_verdict(t['memory_share_met'])}" if "memory_share_at_most" in t else ""
            if v["status"] != "ok":
                out.append(f"| {v['panel']} | {v['way']} | {v['status']} | {_num(v['within_wall_s'])} | - | | - | "
                           f"{_mb(v['within_peak_rss_bytes'])} | - | |")
                continue
            out.append(f"| {v['panel']} | {v['way']} | {_num(v['way_wall_s'])} | {_num(v['within_wall_s'])} | "
                       f"{_num(v['speedup'], 1)}x | {speed_t} | {_mb(v['way_peak_rss_bytes'])} | "
                       f"{_mb(v['within_peak_rss_bytes'])} | {_num(v['memory_share'])} | {mem_t} |")
    if s["scaling"]:
        first = s["scaling"][0]
        out += ["", f"## Scaling: {first['large']} rows against {first['small']}", "",
                f"| case | {first['small']} s | {first['large']} s | time ratio | target | {first['small']} MB | "
                f"{first['large']} MB | memory ratio | target |",
                "|---|--:|--:|--:|---|--:|--:|--:|---|"]
        for c in s["scaling"]:
            t = c["targets"]
            out.append(f"| {c['case']} | {_num(c['small_wall_s'])} | {_num(c['large_wall_s'])} | {_num(c['time_ratio'], 1)} | "
                       f"<= {t['time_ratio_at_most']:g}{_verdict(t['time_met'])} | {_mb(c['small_peak_rss_bytes'])} | "
                       f"{_mb(c['large_peak_rss_bytes'])} | {_num(c['memory_ratio'])} | "
                       f"<= {t['memory_ratio_at_most']:g}{_verdict(t['memory_met'])} |")
    if s["memory_budget"]:
        out += ["", f"## In-memory ways against the {st['memory_budget_bytes'] / 1e9:g} GB budget", ""]
        for b in s["memory_budget"]:
            text = f"- {b['way']}: "
            if b["largest_fitting"]:
                text += f"ran at {b['largest_fitting']} rows with {_mb(b['largest_fitting_peak_rss_bytes'])} MB"
                if b.get("rows_at_budget_estimate"):
                    text += f"; reaches the budget at about {_rows_text(b['rows_at_budget_estimate'])} rows (linear extrapolation)"
            if b["first_not_fitting"]:
                text += f"; {b['first_not_fitting']}: {b['first_not_fitting_note']}"
            out.append(text)
    out += ["", "## Problems", ""] + ([f"- {p}" for p in s["problems"]] or ["- none"])
    if s["notes"]:
        out += ["", "## Notes", ""] + [f"- {n}" for n in s["notes"]]
    return "\n".join(out) + "\n"
