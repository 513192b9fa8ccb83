"""One benchmark case in a fresh process: ``python tests/bench/worker.py CASE FOLDER [options]``.

Started by run.py, once per case and repetition, so that each measurement has a process of
its own. Prints one JSON object on stdout: the wall time of the work (interpreter start and
imports excluded), the peak resident memory of this process, and the estimates.

CASES is the table of cases. A new estimator, or a batch run where one scan serves several
models, is one more entry: a function ``run(files, settings) -> dict`` that returns the
estimates it wants checked (or an empty dict) and a group that says how it is reported.
"""

from __future__ import annotations

import argparse
import importlib
import json
import sys
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

OUTCOME = "parcels"
REGRESSORS = ["staff_hours", "vans", "fuel_price", "rain_mm", "promo"]
UNIT, PERIOD = "depot", "month"


@dataclass(frozen=True)
class Settings:
    threads: int | None = None
    memory_limit: str | None = None  # DuckDB's memory_limit, e.g. "4GB"
    temp_directory: str | None = None  # DuckDB's spill folder


@dataclass(frozen=True)
class Case:
    name: str
    group: str  # "floor" | "bigpanel" | "in-memory" | "spark" (measured against "spark-floor")
    run: Callable[[list[str], Settings], dict]
    imports: tuple[str, ...]  # imported before the clock starts
    about: str
    scenario: str = "depots"  # the panels it runs on: "depots" (months) or "couriers" (years, three effects)
    setup: Callable[[], object] | None = None  # run before the clock starts (Spark's session)


def _quote(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


def _model(files) -> tuple[str, list[str], str, str]:
    """Outcome, regressors, unit and period of the panel (its truth.json; the depots' by default)."""
    truth = Path(files[0]).parent / "truth.json"
    if truth.is_file():
        t = json.loads(truth.read_text())
        return t["outcome"], list(t["regressors"]), t["unit"], t["period"]
    return OUTCOME, REGRESSORS, UNIT, PERIOD


def floor(files, settings):
    """The bare scan: count, sums and all sums of products of outcome and regressors."""
    import duckdb

    config = {k: v for k, v in (("threads", settings.threads), ("memory_limit", settings.memory_limit),
                                ("temp_directory", settings.temp_directory)) if v is not None}
    outcome, regressors, _, _ = _model(files)
    columns = [_quote(c) for c in [outcome, *regressors]]
    sums = ["count(*)"] + [f"sum({c})" for c in columns]
    sums += [f"sum({a} * {b})" for i, a in enumerate(columns) for b in columns[i:]]
    with duckdb.connect(config=config) as con:
        con.execute(f"SELECT {', '.join(sums)} FROM read_parquet($files)", {"files": files}).fetchall()
    return {}


def _bigpanel(estimator, effects=None, fold="as shipped"):
    """``fold="sql"`` sums the unit fold in SQL even where bigpanel would use numpy, so
    one run measures both paths (execute.NUMPY_FOLD_LAYOUTS)."""
    def run(files, settings):
        import bigpanel
        import bigpanel.execute

        if fold == "sql":
            bigpanel.execute.NUMPY_FOLD_LAYOUTS = frozenset()

        engine = bigpanel.Engine(threads=settings.threads, memory_limit=settings.memory_limit,
                                 temp_directory=settings.temp_directory)
        result = bigpanel.fit(str(Path(files[0]).parent), OUTCOME, REGRESSORS, UNIT, PERIOD, estimator=estimator,
                              effects=effects, variance="cluster", cluster=UNIT, engine=engine)
        return {"coefficients": [result.coef(term).estimate for term in REGRESSORS],
                "std_errors": [result.coef(term).std_error for term in REGRESSORS]}
    return run


def within_weighted(files, settings):
    """Weighted within (analytic weights: the depot's vans in service; months without vans
    weigh 0 and are left out), unit clusters."""
    import bigpanel

    engine = bigpanel.Engine(threads=settings.threads, memory_limit=settings.memory_limit,
                             temp_directory=settings.temp_directory)
    result = bigpanel.fit(str(Path(files[0]).parent), OUTCOME, REGRESSORS, UNIT, PERIOD, variance="cluster", cluster=UNIT,
                          weights="vans", engine=engine)
    return {"coefficients": [result.coef(term).estimate for term in REGRESSORS],
            "std_errors": [result.coef(term).std_error for term in REGRESSORS]}


def within_instrumented(files, settings):
    """Within by two-stage least squares: staff_hours instrumented by last month's staff
    hours (one excluded instrument, a lag), unit clusters, with its first-stage F."""
    import bigpanel

    engine = bigpanel.Engine(threads=settings.threads, memory_limit=settings.memory_limit,
                             temp_directory=settings.temp_directory)
    result = bigpanel.fit(str(Path(files[0]).parent), OUTCOME, REGRESSORS[1:], UNIT, PERIOD, variance="cluster",
                          cluster=UNIT, endogenous=REGRESSORS[0], instruments=f"lag({REGRESSORS[0]})", engine=engine)
    return {"coefficients": [result.coef(term).estimate for term in REGRESSORS],
            "std_errors": [result.coef(term).std_error for term in REGRESSORS]}


def within_lag_regressor(files, settings):
    """Within with last month's staff hours added as a regressor (no instrument): the same
    columns and lag window as ``within-iv``, so the two differ by the two-stage work alone."""
    import bigpanel

    engine = bigpanel.Engine(threads=settings.threads, memory_limit=settings.memory_limit,
                             temp_directory=settings.temp_directory)
    result = bigpanel.fit(str(Path(files[0]).parent), OUTCOME, REGRESSORS + [f"lag({REGRESSORS[0]})"], UNIT, PERIOD,
                          variance="cluster", cluster=UNIT, engine=engine)
    return {"coefficients": [result.coef(term).estimate for term in REGRESSORS],
            "std_errors": [result.coef(term).std_error for term in REGRESSORS]}


def _couriers(effects: str, write: bool = False):
    """A fit on the couriers panel (courier, depot and year effects available), clustered by
    courier; ``write``: effects and residuals written back into a folder beside the panel's."""
    def run(files, settings):
        import shutil

        import bigpanel

        outcome, regressors, unit, period = _model(files)
        engine = bigpanel.Engine(threads=settings.threads, memory_limit=settings.memory_limit,
                                 temp_directory=settings.temp_directory)
        folder = Path(files[0]).parent
        target = folder.parent / f".{folder.name}-written" if write else None
        if target is not None:
            shutil.rmtree(target, ignore_errors=True)
        result = bigpanel.fit(str(folder), outcome, regressors, unit, period, effects=effects, variance="cluster",
                              cluster=unit, engine=engine, write_effects=target and str(target),
                              write_residuals=target and str(target))
        out = {"coefficients": [result.coef(term).estimate for term in regressors],
               "std_errors": [result.coef(term).std_error for term in regressors]}
        if target is not None:
            out["written_bytes"] = sum(p.stat().st_size for p in target.iterdir())
            shutil.rmtree(target, ignore_errors=True)
        return out
    return run


def pooled_iid(files, settings):
    """The fixed cost of a fit: pooled least squares with homoskedastic errors (one pass, no grouping)."""
    import bigpanel

    engine = bigpanel.Engine(threads=settings.threads, memory_limit=settings.memory_limit,
                             temp_directory=settings.temp_directory)
    result = bigpanel.fit(str(Path(files[0]).parent), OUTCOME, REGRESSORS, UNIT, PERIOD, estimator="pooled",
                          variance="homoskedastic", engine=engine)
    return {"coefficients": [result.coef(term).estimate for term in REGRESSORS],
            "std_errors": [result.coef(term).std_error for term in REGRESSORS]}


def fit_many_ten(files, settings):
    """Ten within and pooled models (terms, estimator and cluster columns differ) from
    fit_many's shared scans; reports the within model's estimates for the agreement check."""
    import bigpanel

    engine = bigpanel.Engine(threads=settings.threads, memory_limit=settings.memory_limit,
                             temp_directory=settings.temp_directory)
    models = [dict(outcome=OUTCOME, regressors=REGRESSORS, variance="cluster", cluster=UNIT)]
    for i in range(1, 5):
        models.append(dict(outcome=OUTCOME, regressors=REGRESSORS[:i], variance="cluster", cluster=UNIT))
    models += [dict(outcome=OUTCOME, regressors=REGRESSORS[:i], estimator="pooled", variance=se)
               for i, se in ((5, "homoskedastic"), (4, "hc1"), (3, "cluster"), (2, "homoskedastic"), (1, "hc1"))]
    results = bigpanel.fit_many(str(Path(files[0]).parent), models, unit=UNIT, period=PERIOD, engine=engine)
    first = results[0]
    return {"coefficients": [first.coef(term).estimate for term in REGRESSORS],
            "std_errors": [first.coef(term).std_error for term in REGRESSORS], "scans": results.scans}


def run_spec_ten(files, settings):
    """fit_many_ten's ten models as a spec file run by bigpanel.run_spec into a fresh folder:
    the batch run's own costs (spec and schema checks, lock, JSON, manifest and comparison
    files) on top of the shared scans."""
    import json
    import tempfile

    import bigpanel

    def toml(value):
        return json.dumps(value)  # a JSON string or list of strings is valid TOML

    lines = [f"[source]\npath = {toml(str(Path(files[0]).parent))}\nunit = {toml(UNIT)}\nperiod = {toml(PERIOD)}\n"]
    for key, value in (("threads", settings.threads), ("memory_limit", settings.memory_limit),
                       ("temp_directory", settings.temp_directory)):
        if value is not None:
            lines.append(f"{key} = {toml(value)}\n")
    specs = [("within", REGRESSORS[:i], "cluster") for i in (5, 1, 2, 3, 4)]
    specs += [("pooled", REGRESSORS[:i], se) for i, se in ((5, "homoskedastic"), (4, "hc1"), (3, "cluster"),
                                                           (2, "homoskedastic"), (1, "hc1"))]
    for j, (estimator, terms, se) in enumerate(specs):
        lines.append(f"\n[models.m{j}]\noutcome = {toml(OUTCOME)}\nregressors = {toml(terms)}\n"
                     f"estimator = {toml(estimator)}\nvariance = {toml(se)}\n"
                     + (f"cluster = {toml([UNIT])}\n" if se == "cluster" else ""))
    with tempfile.TemporaryDirectory(prefix="bench-run-") as folder:
        spec = Path(folder) / "family.toml"
        spec.write_text("".join(lines))
        report = bigpanel.run_spec(spec, out=Path(folder) / "out")
        first = json.loads((Path(folder) / "out" / "models" / "m0.json").read_text())
    by_term = {c["term"]: c for c in first["coefficients"]}
    return {"coefficients": [by_term[t]["estimate"] for t in REGRESSORS],
            "std_errors": [by_term[t]["std_error"] for t in REGRESSORS], "scans": report.scans["source"]}


def _cluster_sandwich(xtx, meat, coef, n_obs, n_clusters):
    """Unit-cluster CR1 standard errors, the factor bigpanel uses for within with unit clusters:
    G/(G-1) * (N-1)/(N-K), unit effects nested in the clusters not counted (ESTIMATION.md)."""
    import numpy as np

    bread = np.linalg.inv(xtx)
    k = len(coef)
    factor = n_clusters / (n_clusters - 1) * (n_obs - 1) / (n_obs - k)
    vcov = factor * bread @ meat @ bread
    return {"coefficients": [float(b) for b in coef], "std_errors": [float(s) for s in np.sqrt(np.diag(vcov))]}


def pandas_within(files, settings):
    """Read into pandas, demean by groupby-transform, numpy lstsq, scores summed by groupby."""
    import numpy as np
    import pandas as pd

    columns = [OUTCOME, *REGRESSORS]
    frame = pd.read_parquet(files, columns=[UNIT, *columns])
    demeaned = frame[columns] - frame.groupby(UNIT)[columns].transform("mean")
    x = demeaned[REGRESSORS].to_numpy()
    y = demeaned[OUTCOME].to_numpy()
    coef = np.linalg.lstsq(x, y, rcond=None)[0]
    u = y - x @ coef
    scores = pd.DataFrame(x * u[:, None]).groupby(frame[UNIT].to_numpy()).sum().to_numpy()
    return _cluster_sandwich(x.T @ x, scores.T @ scores, coef, len(y), len(scores))


def polars_eager_within(files, settings):
    """Read into polars, demean with mean().over(unit), numpy lstsq, scores by group_by sum."""
    import numpy as np
    import polars as pl

    columns = [OUTCOME, *REGRESSORS]
    frame = pl.read_parquet(files, columns=[UNIT, *columns])
    demeaned = frame.select(pl.col(UNIT), *[pl.col(c) - pl.col(c).mean().over(UNIT) for c in columns])
    x = demeaned.select(REGRESSORS).to_numpy()
    y = demeaned[OUTCOME].to_numpy()
    coef = np.linalg.lstsq(x, y, rcond=None)[0]
    u = y - x @ coef
    scores = (pl.DataFrame(x * u[:, None], schema=REGRESSORS).with_columns(demeaned[UNIT])
              .group_by(UNIT).sum().drop(UNIT).to_numpy())
    return _cluster_sandwich(x.T @ x, scores.T @ scores, coef, len(y), len(scores))


def polars_lazy_within(files, settings):
    """One lazy query for the demeaned cross-product sums, numpy solve, a second lazy query
    for the cluster scores (group-by sum) and their products: only sums are collected."""
    import numpy as np
    import polars as pl

    columns = [OUTCOME, *REGRESSORS]
    demeaned = pl.scan_parquet(files).select(pl.col(UNIT), *[pl.col(c) - pl.col(c).mean().over(UNIT) for c in columns])
    k = len(REGRESSORS)
    pairs = [(i, j) for i in range(k + 1) for j in range(i, k + 1)]  # over regressors then outcome
    names = [*REGRESSORS, OUTCOME]
    sums = demeaned.select(pl.len().alias("n"), *[(pl.col(names[i]) * pl.col(names[j])).sum().alias(f"{i}_{j}")
                                                  for i, j in pairs]).collect().row(0, named=True)
    cross = np.zeros((k + 1, k + 1))
    for i, j in pairs:
        cross[i, j] = cross[j, i] = sums[f"{i}_{j}"]
    xtx, xty = cross[:k, :k], cross[:k, k]
    coef = np.linalg.solve(xtx, xty)
    residual = pl.col(OUTCOME) - pl.sum_horizontal([float(b) * pl.col(c) for b, c in zip(coef, REGRESSORS)])
    scores = demeaned.group_by(UNIT).agg([(pl.col(c) * residual).sum().alias(c) for c in REGRESSORS])
    meat_sums = scores.select(pl.len().alias("g"), *[(pl.col(REGRESSORS[i]) * pl.col(REGRESSORS[j])).sum().alias(f"{i}_{j}")
                                                     for i in range(k) for j in range(i, k)]).collect().row(0, named=True)
    meat = np.zeros((k, k))
    for i in range(k):
        for j in range(i, k):
            meat[i, j] = meat[j, i] = meat_sums[f"{i}_{j}"]
    return _cluster_sandwich(xtx, meat, coef, sums["n"], meat_sums["g"])


def _spark_session():
    """The SparkSession bigpanel makes (master from the environment, else local[*])."""
    from bigpanel.spark import spark_session

    return spark_session()


def spark_floor(files, settings):
    """Spark's own floor: one Spark SQL query over the files (read by Spark) with the count,
    sums and sums of products of outcome and regressors, collected as Arrow."""
    spark = _spark_session()
    spark.read.parquet(*files).createOrReplaceTempView("bench_floor")
    columns = ["`" + c + "`" for c in [OUTCOME, *REGRESSORS]]
    sums = ["count(*)"] + [f"sum({c})" for c in columns]
    sums += [f"sum({a} * {b})" for i, a in enumerate(columns) for b in columns[i:]]
    table = spark.sql(f"SELECT {', '.join(sums)} FROM bench_floor").toArrow()
    return {"received_bytes": table.nbytes, "queries": 1}


def _spark_fit(estimator):
    def run(files, settings):
        import bigpanel
        from bigpanel.spark import SparkEngine

        result = bigpanel.fit(str(Path(files[0]).parent), OUTCOME, REGRESSORS, UNIT, PERIOD, estimator=estimator,
                              variance="cluster", cluster=UNIT, engine="spark")
        return {"coefficients": [result.coef(term).estimate for term in REGRESSORS],
                "std_errors": [result.coef(term).std_error for term in REGRESSORS],
                "received_bytes": SparkEngine.received["bytes"], "queries": SparkEngine.received["queries"]}
    return run


def start_up(files, settings):
    """What every fit pays once per process before its first query: importing bigpanel's
    fit and everything it needs (numpy, scipy's special functions, DuckDB, pyarrow)."""
    import bigpanel.fit  # noqa: F401

    return {}


# A fit's imports happen before the clock (the in-memory ways' too); the start-up case times them.
_BP = ("bigpanel", "bigpanel.fit")
_SPARK = ("bigpanel", "bigpanel.fit", "bigpanel.spark", "pyarrow")
CASES = {case.name: case for case in [
    Case("floor", "floor", floor, ("duckdb",),
         "one DuckDB query: count, sums and sums of products of outcome and regressors"),
    Case("start-up", "bigpanel", start_up, (), "import bigpanel.fit in a fresh process (no query)"),
    Case("pooled", "bigpanel", _bigpanel("pooled"), _BP, "bigpanel pooled, unit clusters"),
    Case("within", "bigpanel", _bigpanel("within"), _BP, "bigpanel within (unit effects), unit clusters"),
    Case("within-unit-period", "bigpanel", _bigpanel("within", f"{UNIT},{PERIOD}"), _BP,
         "bigpanel within (unit and period effects), unit clusters"),
    Case("first-difference", "bigpanel", _bigpanel("first-difference"), _BP,
         "bigpanel first differences, unit clusters"),
    Case("random-effects", "bigpanel", _bigpanel("random-effects"), _BP,
         "bigpanel random effects (Swamy-Arora), unit clusters, with its Hausman and unit-means tests"),
    Case("between", "bigpanel", _bigpanel("between"), _BP, "bigpanel between (unit means), unit clusters"),
    Case("pooled-homoskedastic", "bigpanel", pooled_iid, _BP, "bigpanel pooled, homoskedastic errors (the fixed cost of a fit)"),
    Case("fit-many-10", "bigpanel", fit_many_ten, _BP,
         "bigpanel fit_many: 5 within (unit clusters) and 5 pooled models, shared scans"),
    Case("run-spec-10", "bigpanel", run_spec_ten, _BP,
         "bigpanel run_spec: fit-many-10's models from a spec file, with the run folder's files"),
    Case("pooled-sql-fold", "bigpanel", _bigpanel("pooled", fold="sql"), _BP,
         "bigpanel pooled, unit clusters, unit fold summed in SQL"),
    Case("within-sql-fold", "bigpanel", _bigpanel("within", fold="sql"), _BP,
         "bigpanel within, unit clusters, unit fold summed in SQL"),
    Case("first-difference-sql-fold", "bigpanel", _bigpanel("first-difference", fold="sql"), _BP,
         "bigpanel first differences, unit clusters, unit fold summed in SQL"),
    Case("within-weighted", "bigpanel", within_weighted, _BP,
         "bigpanel weighted within (weights: vans), unit clusters"),
    Case("within-iv", "bigpanel", within_instrumented, _BP,
         "bigpanel within, staff_hours instrumented by lag(staff_hours), unit clusters and first-stage F"),
    Case("within-lag", "bigpanel", within_lag_regressor, _BP,
         "bigpanel within with lag(staff_hours) as a regressor (within-iv's columns, no instrument), unit clusters"),
    Case("spark-floor", "spark", spark_floor, _SPARK,
         "one Spark SQL query: count, sums and sums of products of outcome and regressors", setup=_spark_session),
    Case("spark-within", "spark", _spark_fit("within"), _SPARK, "bigpanel within on Spark SQL, unit clusters",
         setup=_spark_session),
    Case("spark-first-difference", "spark", _spark_fit("first-difference"), _SPARK,
         "bigpanel first differences on Spark SQL, unit clusters", setup=_spark_session),
    Case("couriers-within", "bigpanel", _couriers("courier"), _BP,
         "couriers: within (courier effects), courier clusters", "couriers"),
    Case("couriers-within-write", "bigpanel", _couriers("courier", write=True), _BP,
         "couriers: within (courier effects), effects and residuals written back", "couriers"),
    Case("couriers-unit-year", "bigpanel", _couriers("courier,year"), _BP,
         "couriers: courier and year effects (exact path), courier clusters", "couriers"),
    Case("couriers-unit-year-write", "bigpanel", _couriers("courier,year", write=True), _BP,
         "couriers: courier and year effects, effects and residuals written back", "couriers"),
    Case("couriers-three-effects", "bigpanel", _couriers("courier,depot,year"), _BP,
         "couriers: courier, depot and year effects (many-effects estimator), courier clusters", "couriers"),
    Case("couriers-three-effects-write", "bigpanel", _couriers("courier,depot,year", write=True), _BP,
         "couriers: courier, depot and year effects, effects and residuals written back", "couriers"),
    Case("pandas", "in-memory", pandas_within, ("numpy", "pandas"),
         "within in pandas: read, groupby-transform demean, lstsq, groupby-sum scores"),
    Case("polars-eager", "in-memory", polars_eager_within, ("numpy", "polars"),
         "within in polars eager: read, over() demean, lstsq, group_by-sum scores"),
    Case("polars-lazy", "in-memory", polars_lazy_within, ("numpy", "polars"),
         "within as polars lazy queries: demeaned cross-products and cluster scores collected as sums"),
]}


def peak_rss_bytes() -> int:
    """Peak resident memory of this process image.

    VmHWM belongs to the memory map made at exec, so, unlike getrusage's ru_maxrss (kept across
    exec), it never includes the parent that started this process.
    """
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) * 1024
    except OSError:
        pass
    import resource

    scale = 1 if sys.platform == "darwin" else 1024
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * scale


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(prog="worker.py")
    parser.add_argument("case", choices=sorted(CASES))
    parser.add_argument("folder", type=Path)
    parser.add_argument("--threads", type=int)
    parser.add_argument("--memory-limit")
    parser.add_argument("--temp-directory")
    args = parser.parse_args(argv)
    settings = Settings(args.threads, args.memory_limit, args.temp_directory)
    files = sorted(str(p) for p in args.folder.glob("*.parquet"))
    if not files:
        print(f"No Parquet files in {args.folder}. Generate the panel first.", file=sys.stderr)
        return 2
    case = CASES[args.case]
    for module in case.imports:
        importlib.import_module(module)
    if case.setup is not None:
        case.setup()
    baseline = peak_rss_bytes()
    start = time.perf_counter()
    estimates = case.run(files, settings)
    wall = time.perf_counter() - start
    print(json.dumps({"case": case.name, "wall_s": wall, "peak_rss_bytes": peak_rss_bytes(),
                      "baseline_rss_bytes": baseline, **estimates}))
    return 0


if __name__ == "__main__":
    sys.exit(main())
