"""The sweep options for many effects, measured side by side (bigpanel/sweeps.py).

    .venv/bin/python tests/bench/sweep_options.py --rows 3m [--data-dir /tmp/bigpanel-data]

Generates (once, cached) an invented panel of couriers moving between depots over 20
months (a tenth of couriers move each month; columns courier, depot, month, x1, x2, x3, y)
and runs, each in its own process: the floor (one DuckDB query with the sums of products
of the four columns), one sweep in numpy over integer level indices in raw column files
(what bigpanel ships), one sweep as DuckDB SQL over a temporary table (the three effects'
vectors joined to the rows, GROUPING SETS over the three levels), and a whole fit with the
time of each stage. Prints seconds, the ratio to the floor and peak memory, and the load
average beside them (the machine is shared: compare ratios within one run).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

MONTHS = 20
Q = 4  # x1, x2, x3, y


def generate(path: Path, rows: int) -> None:
    import numpy as np
    import pyarrow as pa
    import pyarrow.parquet as pq

    couriers = rows // MONTHS
    depots = max(couriers // 20, 2)
    rng = np.random.default_rng(7)
    current = rng.integers(0, depots, couriers)
    depot = np.empty(couriers * MONTHS, dtype=np.int64)
    for m in range(MONTHS):
        move = rng.random(couriers) < 0.1
        current[move] = rng.integers(0, depots, int(move.sum()))
        depot[m::MONTHS] = current
    courier = np.repeat(np.arange(couriers), MONTHS)
    month = np.tile(np.arange(MONTHS), couriers)
    n = len(courier)
    a_c, a_d, a_m = rng.normal(size=couriers), rng.normal(size=depots), rng.normal(size=MONTHS)
    x1 = rng.normal(size=n) + 0.5 * a_c[courier]
    x2 = rng.normal(size=n) + 0.5 * a_d[depot]
    x3 = rng.normal(size=n)
    y = 1.5 * x1 - 0.7 * x2 + 0.2 * x3 + a_c[courier] + a_d[depot] + a_m[month] + rng.normal(size=n)
    table = pa.table({"courier": courier, "month": month, "depot": depot, "x1": x1, "x2": x2, "x3": x3, "y": y})
    tmp = path.with_suffix(".tmp")
    pq.write_table(table, tmp, row_group_size=100_000)
    os.replace(tmp, path)


def peak_mb() -> float:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
    return float("nan")


def case_floor(path: str) -> dict:
    import duckdb

    cols = ["x1", "x2", "x3", "y"]
    sums = ", ".join(f"sum({a} * {b})" for i, a in enumerate(cols) for b in cols[i:])
    con = duckdb.connect()
    best = float("inf")
    for _ in range(3):
        t = time.perf_counter()
        con.sql(f"SELECT count(*), {sums} FROM read_parquet($p)", params={"p": path}).fetchall()
        best = min(best, time.perf_counter() - t)
    return {"seconds": best}


def _levels(con, path: str) -> list[int]:
    return [int(con.sql(f"SELECT max({c}) + 1 FROM read_parquet($p)", params={"p": path}).fetchall()[0][0])
            for c in ("courier", "depot", "month")]


def case_numpy(path: str) -> dict:
    import duckdb
    import numpy as np

    from bigpanel import sweeps

    con = duckdb.connect()
    dtypes = {f"i{e}": np.dtype(np.int32) for e in range(3)} | {f"z{j}": np.dtype(np.float64) for j in range(Q)}
    with tempfile.TemporaryDirectory() as folder:
        store = sweeps.Store(folder, dtypes)
        writer = store.writer()
        t = time.perf_counter()
        sql = ("SELECT courier::INTEGER AS i0, depot::INTEGER AS i1, month::INTEGER AS i2, x1 AS z0, x2 AS z1, "
               "x3 AS z2, y AS z3 FROM read_parquet($p)")
        for batch in con.sql(sql, params={"p": path}).to_arrow_reader(131_072):
            writer.append({name: batch.column(name).to_numpy() for name in dtypes})
        writer.close()
        copy_s = time.perf_counter() - t
        n_levels = _levels(con, path)
        copy = sweeps.Copy(store, [sweeps.Effect(c, (c,)) for c in ("courier", "depot", "month")], [None] * 3,
                           n_levels, [], [], Q)
        rng = np.random.default_rng(0)
        p = [rng.random((Q, n)) for n in n_levels]
        best = float("inf")
        for _ in range(3):
            t = time.perf_counter()
            sweeps._apply(copy, p)
            best = min(best, time.perf_counter() - t)
    return {"seconds": best, "copy_seconds": copy_s}


def case_sql(path: str) -> dict:
    import duckdb

    with tempfile.TemporaryDirectory() as folder:
        con = duckdb.connect(config={"temp_directory": folder})
        t = time.perf_counter()
        con.execute("CREATE TEMP TABLE t AS SELECT courier::INTEGER AS i0, depot::INTEGER AS i1, month::INTEGER AS i2, "
                    "x1 AS z0, x2 AS z1, x3 AS z2, y AS z3 FROM read_parquet($p)", {"p": path})
        copy_s = time.perf_counter() - t
        for e, n in enumerate(_levels(con, path)):
            values = ", ".join(f"random() AS v{j}" for j in range(Q))
            con.execute(f"CREATE TEMP TABLE p{e} AS SELECT range::INTEGER AS i, {values} FROM range({n})")
        s = ", ".join(f"p0.v{j} + p1.v{j} + p2.v{j} AS s{j}" for j in range(Q))
        sums = ", ".join(f"sum(s{j})" for j in range(Q))
        sql = (f"WITH s AS (SELECT t.i0, t.i1, t.i2, {s} FROM t JOIN p0 ON t.i0 = p0.i JOIN p1 ON t.i1 = p1.i "
               f"JOIN p2 ON t.i2 = p2.i) SELECT i0, i1, i2, {sums} FROM s GROUP BY GROUPING SETS ((i0), (i1), (i2))")
        best = float("inf")
        for _ in range(3):
            t = time.perf_counter()
            con.sql(sql).fetchnumpy()
            best = min(best, time.perf_counter() - t)
    return {"seconds": best, "copy_seconds": copy_s}


def case_fit(path: str) -> dict:
    import bigpanel
    from bigpanel import sweeps

    spent: dict[str, float] = {}

    def timed(name, fn):
        def wrapper(*args, **kwargs):
            t = time.perf_counter()
            try:
                return fn(*args, **kwargs)
            finally:
                spent[name] = spent.get(name, 0.0) + time.perf_counter() - t
        return wrapper

    for name, attr in (("copy", "materialise"), ("right side", "_right_side"), ("sweeps", "_apply"),
                       ("final pass", "transformed_pass"), ("redundancies", "redundancies"), ("scores", "meats")):
        setattr(sweeps, attr, timed(name, getattr(sweeps, attr)))
    sweeps.Copy.drop_singletons = timed("singletons", sweeps.Copy.drop_singletons)
    t = time.perf_counter()
    res = bigpanel.fit(path, "y", "x1, x2, x3", "courier", "month", effects="courier,depot,month", cluster="courier")
    total = time.perf_counter() - t
    return {"seconds": total, "stages": {k: round(v, 2) for k, v in spent.items()},
            "iterations": res.absorption["iterations"], "achieved": res.absorption["achieved"],
            "estimates": [c.estimate for c in res.coefficients]}


CASES = {"floor": case_floor, "numpy": case_numpy, "sql": case_sql, "fit": case_fit}


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(prog="sweep_options.py")
    parser.add_argument("--rows", default="3m", help="panel rows, e.g. 3m (a multiple of 20)")
    parser.add_argument("--data-dir", default="/tmp/bigpanel-data")
    parser.add_argument("--case", choices=sorted(CASES), help=argparse.SUPPRESS)
    parser.add_argument("--path", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.case:  # one case, in this process
        out = CASES[args.case](args.path)
        print(json.dumps(out | {"peak_mb": peak_mb()}))
        return 0
    text = args.rows.lower()
    rows = int(float(text[:-1]) * {"k": 1e3, "m": 1e6}[text[-1]]) if text[-1] in "km" else int(text)
    path = Path(args.data_dir) / f"couriers_sweeps_{rows}.parquet"
    path.parent.mkdir(parents=True, exist_ok=True)
    if not path.exists():
        generate(path, rows)
    results = {}
    for case in ("floor", "numpy", "sql", "fit"):
        done = subprocess.run([sys.executable, __file__, "--case", case, "--path", str(path)], capture_output=True,
                              text=True, check=True, env=os.environ | {"PYTHONPATH": str(Path(__file__).parents[2])})
        results[case] = json.loads(done.stdout.strip().splitlines()[-1])
    floor = results["floor"]["seconds"]
    load = os.getloadavg()[0]
    print(f"{rows:,} rows, 3 effects (courier, depot, month); load average {load:.1f} on {os.cpu_count()} cores")
    for case in ("floor", "numpy", "sql"):
        r = results[case]
        extra = f", copy {r['copy_seconds']:.2f} s" if "copy_seconds" in r else ""
        print(f"  {case:<6} {r['seconds']:7.2f} s  {r['seconds'] / floor:5.2f}x floor  peak {r['peak_mb']:6.0f} MB{extra}")
    fit = results["fit"]
    per_sweep = fit["stages"].get("sweeps", 0.0) / max(fit["iterations"], 1)
    print(f"  fit    {fit['seconds']:7.2f} s  {fit['seconds'] / floor:5.2f}x floor  peak {fit['peak_mb']:6.0f} MB; "
          f"{fit['iterations']} sweeps, {per_sweep:.2f} s each ({per_sweep / floor:.2f}x floor); stages {fit['stages']}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
