"""PostgreSQL benchmark: within and first differences inside PostgreSQL against its own floor.

    python tests/bench/postgres.py --rows 10m [--repeat 2] [--data-dir /tmp/bigpanel-data]

Uses the server in BIGPANEL_TEST_PG (an admin URI) or starts a throwaway one with
.ci/pg-server (stopped at exit); generates (once, cached like run.py's panels) the depots
panel of that many rows, loads it into the table bench.depots in file order, then in the
same run measures, in this order per repetition:

- floor: one bare aggregate query with the pooled sums (count, sums and products of the
  outcome and the regressors), on a session set up as bigpanel's (read-only, no parallel
  workers), fetched through ADBC;
- within and first differences (unit clusters) with bigpanel on the same table.

It prints wall times (best of the repetitions), the ratio of each to the floor, the bytes
of Arrow data each returned to Python and the load average before and after; ``--json
PATH`` also writes them. Timing figures are for README, never for assertions.
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

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

OUTCOME = "parcels"
REGRESSORS = ["staff_hours", "vans", "fuel_price", "rain_mm", "promo"]
UNIT, PERIOD = "depot", "month"
PERIODS = 10
TABLE = "bench.depots"


def rows_count(text: str) -> int:
    text = text.strip().lower()
    scale = {"k": 10**3, "m": 10**6}.get(text[-1], 1)
    return int(float(text[:-1] if text[-1] in "km" else text) * scale)


def start_server() -> tuple[str, str]:
    folder = tempfile.mkdtemp(prefix="bigpanel-bench-pg-")
    out = subprocess.run([str(ROOT / ".ci" / "pg-server"), "start", folder, "54331"], capture_output=True, text=True, check=True)
    return out.stdout.strip(), folder


def load(uri: str, folder: Path) -> float:
    """Stream the panel's Parquet files into TABLE (file order kept); seconds taken."""
    import adbc_driver_postgresql.dbapi as driver
    import pyarrow as pa
    import pyarrow.parquet as pq

    files = sorted(folder.glob("*.parquet"))
    schema = pq.read_schema(files[0])
    keep = [f.name for f in schema if not pa.types.is_dictionary(f.type)]

    def batches():
        for f in files:
            yield from pq.ParquetFile(f).iter_batches(batch_size=200_000, columns=keep)

    reader = pa.RecordBatchReader.from_batches(pa.schema([schema.field(k) for k in keep]), batches())
    started = time.perf_counter()
    with driver.connect(uri, autocommit=True) as con, con.cursor() as cur:
        cur.execute("CREATE SCHEMA IF NOT EXISTS bench")
        cur.execute(f"DROP TABLE IF EXISTS {TABLE}")
        cur.adbc_ingest("depots", reader, mode="create", db_schema_name="bench")
        cur.execute(f"VACUUM ANALYZE {TABLE}")  # hint bits set once, as in a warehouse table
    return time.perf_counter() - started


def floor(uri: str) -> dict:
    """The bare aggregate query, on a session set up as bigpanel's."""
    import adbc_driver_postgresql.dbapi as driver

    from bigpanel import pg, sqlbuild

    cols = [sqlbuild.quote_ident(c) for c in [OUTCOME, *REGRESSORS]]
    sums = ["count(*)"] + [f"sum({c})" for c in cols] + [f"sum({a} * {b})" for i, a in enumerate(cols) for b in cols[i:]]
    sql = f"SELECT {', '.join(sums)} FROM {TABLE}"
    with driver.connect(uri, autocommit=True) as con, con.cursor() as cur:
        for name, value in pg.SETTINGS:
            cur.execute(sqlbuild.setting_sql(name, value))
        started = time.perf_counter()
        cur.execute(sql)
        table = cur.fetch_arrow_table()
        seconds = time.perf_counter() - started
    return {"seconds": seconds, "fetched_bytes": table.nbytes, "queries": 1}


def fit(uri: str, estimator: str) -> dict:
    import warnings

    import bigpanel

    started = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = bigpanel.fit(uri, OUTCOME, REGRESSORS, UNIT, PERIOD, table=TABLE, estimator=estimator,
                              variance="cluster", cluster=UNIT)
    seconds = time.perf_counter() - started
    return {"seconds": seconds, "fetched_bytes": result.run["fetched_bytes"], "queries": result.run["queries"],
            "n_obs": result.n_obs}


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--rows", default="10m")
    p.add_argument("--repeat", type=int, default=1)
    p.add_argument("--data-dir", type=Path, default=Path(tempfile.gettempdir()) / "bigpanel-data")
    p.add_argument("--json", type=Path)
    args = p.parse_args(argv)

    import datagen
    from tests.bench.run import count_label

    rows = rows_count(args.rows)
    folder = args.data_dir / f"depots_{count_label(rows // PERIODS)}_x{PERIODS}"
    datagen.ensure(folder, n_units=rows // PERIODS, n_periods=PERIODS, order="unit")
    uri, server_folder = os.environ.get("BIGPANEL_TEST_PG"), None
    if not uri:
        uri, server_folder = start_server()
    try:
        load_before = os.getloadavg()
        loaded = load(uri, folder)
        print(f"loaded {rows:,} rows into {TABLE} in {loaded:.1f} s", file=sys.stderr)
        runs: dict[str, list[dict]] = {"floor": [], "within": [], "first-difference": []}
        for _ in range(args.repeat):
            runs["floor"].append(floor(uri))
            runs["within"].append(fit(uri, "within"))
            runs["first-difference"].append(fit(uri, "first-difference"))
            print({k: round(v[-1]["seconds"], 2) for k, v in runs.items()}, file=sys.stderr)
        load_after = os.getloadavg()
    finally:
        if server_folder:
            subprocess.run([str(ROOT / ".ci" / "pg-server"), "stop", server_folder], capture_output=True)
    best = {k: min(v, key=lambda r: r["seconds"]) for k, v in runs.items()}
    base = best["floor"]["seconds"]
    lines = [f"PostgreSQL 15, {rows:,} rows ({rows // PERIODS:,} depots x {PERIODS} months), best of {args.repeat}; "
             f"load average {load_before[0]:.1f} before, {load_after[0]:.1f} after (1 min)",
             "", "| case | seconds | x floor | bytes to Python | queries |", "| --- | ---: | ---: | ---: | ---: |"]
    for name, r in best.items():
        lines.append(f"| {name} | {r['seconds']:.1f} | {r['seconds'] / base:.1f} | {r['fetched_bytes']:,} | {r['queries']} |")
    print("\n".join(lines))
    if args.json:
        args.json.write_text(json.dumps({"rows": rows, "load_average": [load_before, load_after], "load_seconds": loaded,
                                         "runs": runs}, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
