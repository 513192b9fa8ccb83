"""Fuzzing the two promises a user's text and a user's panel rely on (issue 7, item 6).

Strategy one (hostile text): terms built from a grammar of hostile SQL pieces (comments,
quotes, newlines inside string literals, dollar-quoting, semicolons, subqueries, table
functions, COPY, ATTACH, PRAGMA, SET, INSTALL/LOAD, CALL, EXPORT DATABASE, DROP) are placed
in the outcome, the regressors, a ``levels()`` base and the ``--where`` filter, split
across term boundaries in random ways (the issue's reproduction hides the start of a
statement behind a line comment in one term and reveals it with a newline inside a string
literal in the next). Each example runs the CLI in-process (``bigpanel.cli.main``) on a
small DuckDB file and a small Parquet file in a temporary folder, with the working
directory inside that folder. The promise (issue 7): nothing but a single scalar
expression runs, no file outside the outputs is written, sources are never changed, and
bad input gets one sentence. Checked: every file under the folder (the sources included)
has the same name, size, mtime and SHA-256 after the run, no file or folder appears, the
DuckDB source's tables hold the same rows, and the exit code is 0 or 2 with no traceback.

Strategy two (random panels): small panels with gaps, duplicate keys, missing values,
constant columns and unbalanced units, and random models (pooled, within, first
differences; unit and period effects; homoskedastic, HC1, clusters). Every returned fit must match
dummy-variable least squares (statsmodels OLS, and numpy lstsq for the slopes) on exactly
the rows it used, rebuilt here in pandas: complete cases of the model's columns; within:
units with one such row left out (singletons); first differences: a row minus the unit's
row of the previous period, formed only when that period is present. Standard errors use
the small-sample factors of ../shared/ESTIMATION.md and bigpanel/variance.py: statsmodels'
own factor counts every dummy, so its variance is rescaled by (N - K_all) / (N - K') where
effects nested in the clusters leave K'. A refusal must be one sentence.

Example counts and seeds: ``derandomize=True`` makes hypothesis draw the same examples on
every run (its seed comes from the test's own source), so the suite is repeatable and a
failure reproduces. ``BIGPANEL_FUZZ_EXAMPLES`` raises the count and ``BIGPANEL_FUZZ_SEED``
switches to a random search from that seed, for long runs outside the suite. No example
database is written (``database=None``): it would be a file in the working folder.
"""

from __future__ import annotations

import contextlib
import hashlib
import io
import os
import subprocess
import sys
import warnings
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import statsmodels.api as sm
from statsmodels.stats import sandwich_covariance as sw
from hypothesis import HealthCheck, event, example, given, seed, settings
from hypothesis import strategies as st

import bigpanel
from bigpanel.cli import main
from bigpanel.errors import EstimationError, InputError

ROOT = Path(__file__).resolve().parents[1]


def _settings(examples: int):
    n = int(os.environ.get("BIGPANEL_FUZZ_EXAMPLES", examples))
    chosen = os.environ.get("BIGPANEL_FUZZ_SEED")
    s = settings(max_examples=n, deadline=None, database=None, derandomize=chosen is None, print_blob=True,
                 suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture,
                                        HealthCheck.filter_too_much, HealthCheck.data_too_large])

    def wrap(test):
        test = s(test)
        return seed(int(chosen))(test) if chosen is not None else test

    return wrap


# =============================================================== strategy one: hostile text

TABLE = "deliveries"


@pytest.fixture(scope="module")
def arena(tmp_path_factory):
    """A folder holding the two sources and the working directory of every run."""
    root = tmp_path_factory.mktemp("fuzz")
    (root / "src").mkdir()
    (root / "work").mkdir()
    rng = np.random.default_rng(7)
    n_units, n_periods = 12, 6
    depot = np.repeat(np.arange(1, n_units + 1), n_periods)
    month = np.tile(np.arange(1, n_periods + 1), n_units)
    table = pa.table({
        "depot": depot, "month": month, "region": (depot - 1) // 4,
        "kind": np.array(["hub", "city", "rural"])[depot % 3],
        "parcels": rng.normal(100, 10, depot.size), "staff": rng.normal(40, 5, depot.size),
        "vans": rng.integers(1, 6, depot.size).astype(float),
    })  # fmt: skip
    pq.write_table(table, root / "src" / "depots.parquet")
    con = duckdb.connect(str(root / "src" / "depots.duckdb"))
    con.register("t", table)
    con.execute(f"CREATE TABLE {TABLE} AS SELECT * FROM t")
    con.execute("CREATE TABLE secrets AS SELECT 'hidden' AS word")
    con.close()
    return root


def _snapshot(root: Path) -> dict:
    out = {}
    for dirpath, dirnames, filenames in os.walk(root):
        for d in dirnames:
            out[os.path.relpath(os.path.join(dirpath, d), root) + "/"] = None
        for f in filenames:
            p = os.path.join(dirpath, f)
            st_ = os.stat(p)
            out[os.path.relpath(p, root)] = (st_.st_size, st_.st_mtime_ns, hashlib.sha256(Path(p).read_bytes()).hexdigest())
    return out


def _tables(path: Path) -> dict:
    con = duckdb.connect(str(path), read_only=True)
    try:
        names = [r[0] for r in con.execute("SELECT table_name FROM duckdb_tables() ORDER BY 1").fetchall()]
        return {n: con.execute(f'SELECT count(*), sum(hash(t)) FROM "{n}" AS t').fetchone() for n in names}
    finally:
        con.close()


def _run_cli(argv: list[str], cwd: Path) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    before = os.getcwd()
    os.chdir(cwd)
    try:
        with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err), warnings.catch_warnings():
            warnings.simplefilter("ignore")
            code = main(argv)
    finally:
        os.chdir(before)
    return code, out.getvalue(), err.getvalue()


def _hostile_pieces(root: Path) -> tuple[st.SearchStrategy[str], st.SearchStrategy[str]]:
    """Pieces of SQL text, and the statements among them; targets of writes lie inside
    the watched folder."""
    work = root / "work"
    db = root / "src" / "depots.duckdb"
    pq_file = root / "src" / "depots.parquet"
    quote = st.sampled_from(["'{}'", "$${}$$", "$tag${}$tag$", '"{}"'])
    target = st.sampled_from(["pwned.csv", str(work / "pwned.csv"), str(root / "src" / "pwned.parquet")])
    statements = st.one_of(
        st.builds(lambda q, t: f"COPY (SELECT 42 AS x) TO {q.format(t)}", quote, target),
        st.builds(lambda q: f"COPY {TABLE} TO {q.format(str(work / 'copy.csv'))}", quote),
        st.builds(lambda q: f"ATTACH {q.format(str(db))} AS w; DROP TABLE w.{TABLE}", quote),
        st.builds(lambda q: f"ATTACH {q.format(str(work / 'new.duckdb'))} AS n", quote),
        st.sampled_from([
            f"DROP TABLE {TABLE}", f"DROP TABLE bigpanel_src.{TABLE}", f"DELETE FROM {TABLE}",
            f"INSERT INTO {TABLE} SELECT * FROM {TABLE}", f"CREATE TABLE bigpanel_src.x AS SELECT 1",
            "PRAGMA threads=1", "PRAGMA database_list", "SET threads = 1", "SET enable_external_access = true",
            f"SET temp_directory = '{work / 'spill'}'", "INSTALL httpfs", "LOAD httpfs", "FORCE INSTALL json",
            "CALL pragma_version()", "CHECKPOINT", f"EXPORT DATABASE '{work / 'export'}'",
            f"EXPORT DATABASE bigpanel_src TO '{work / 'export2'}'", "DETACH bigpanel_src",
            f"USE bigpanel_src; DROP TABLE {TABLE}",
        ]),
    )  # fmt: skip
    expressions = st.sampled_from([
        "parcels", "staff", "vans", "1", "1.0", "staff * 2", "length('a')",
        "(SELECT 1)", f"(SELECT count(*) FROM {TABLE})", "(SELECT word FROM secrets)",
        f"(SELECT count(*) FROM read_csv('{pq_file}'))", f"length((SELECT content FROM read_text('{db}')))",
        "(SELECT count(*) FROM glob('*'))", f"(SELECT count(*) FROM read_parquet('{pq_file}'))",
        "(SELECT count(*) FROM query('SELECT 1'))", "sum(parcels)", "row_number() OVER ()",
        "getvariable('x')", "current_setting('threads')",
    ])  # fmt: skip
    glue = st.sampled_from([
        "--", " --", "/*", "*/", "'", '"', "'\n", "\n", "\n'", "$$", "$tag$", ";", "; ", ")", "(", ",", ", ",
        " AS z0", " AS DOUBLE)", "CAST(", "length('", "FROM (SELECT 1 AS depot, 1 AS month)",
        ") AS DOUBLE) AS z0, 1.0 AS z1, 1.0 AS z2 FROM (SELECT 1 AS depot, 1 AS month)) AS head",
        "SELECT 0 AS a0, 0 AS a1, 0 AS a2 FROM (SELECT $s0 AS z0, $s1 AS z1, $s2 AS z2",
        " WHERE 1=1", " UNION ALL SELECT 1", "$s0", "?", "\\",
    ])  # fmt: skip
    return st.one_of(statements, expressions, glue, glue), statements


@st.composite
def _smuggle(draw, statements) -> tuple[str, str]:
    """The issue's shape with its parts drawn: (first term, second term). Checked alone,
    the second term is one call on a string literal. Pasted after the first, whose comment
    swallows the text up to the literal's opening quote, the literal's content becomes
    live SQL: it closes the query, runs a statement and reopens a query whose end is
    commented out again."""
    hide, reveal = draw(st.sampled_from([("--", "\n"), ("/*", "*/"), ("--", "\r\n")]))
    quote = draw(st.sampled_from(["'", "$$", "$t$"]))
    # the query the text lands in has three design columns (two terms and the outcome)
    close = draw(st.sampled_from([
        ") AS DOUBLE) AS z0, 1.0 AS z1, 1.0 AS z2 FROM (SELECT 1 AS depot, 1 AS month)) AS head",
        ") AS DOUBLE) AS z0, 1.0 AS z1, 1.0 AS z2, 1 AS k_unit, 1 AS k_period FROM (SELECT 1 AS depot, 1 AS month)) AS r",
        ") AS DOUBLE) AS z0 FROM (SELECT 1 AS depot, 1 AS month)) AS head",
    ]))  # fmt: skip
    reopen = draw(st.sampled_from([
        "SELECT 0 AS a0, 0 AS a1, 0 AS a2 FROM (SELECT $s0 AS z0, $s1 AS z1, $s2 AS z2",
        "SELECT 0 AS a0 FROM (SELECT $s0 AS z0, $s1 AS z1, $s2 AS z2",
    ]))  # fmt: skip
    statement = draw(statements.filter(lambda text: quote not in text))  # the literal must stay whole
    first = draw(st.sampled_from(["1 ", "parcels ", "staff "])) + hide
    second = f"length({quote}{reveal}{close}; {statement}; {reopen} --{quote})"
    return first, second


@st.composite
def _hostile_call(draw, root: Path) -> dict:
    pieces, statements = _hostile_pieces(root)
    text = st.lists(pieces, min_size=1, max_size=6).map("".join)
    terms = draw(st.lists(text, min_size=1, max_size=4))
    outcome = draw(st.one_of(st.just("parcels"), text))
    where = draw(st.one_of(st.none(), text))
    base = draw(st.one_of(st.none(), text))
    if draw(st.booleans()):  # the issue's shape: halves across a boundary
        first, second = draw(_smuggle(statements))
        where_first = draw(st.sampled_from(["terms", "terms", "outcome", "outcome", "where", "base"]))
        if where_first == "terms":  # exactly the issue's two terms
            terms, outcome, base = [first, second], "parcels", None
        elif where_first == "outcome":  # the outcome carries the second half
            terms, outcome, base = ["staff", first], second, None
        elif where_first == "where":
            where, terms = first, [second]
        else:
            base, terms = first, [second]
    if base is not None:
        terms = terms + [f"levels(kind, '{base}')"]
    return {"outcome": outcome, "regressors": ", ".join(terms), "where": where,
            "estimator": draw(st.sampled_from(["within", "pooled", "first-difference"]))}


def _hostile_argv(call: dict, source: list[str]) -> list[str]:
    argv = ["fit", *source, "--unit", "depot", "--period", "month", "--outcome", call["outcome"],
            "--regressors", call["regressors"], "--estimator", call["estimator"]]
    if call["where"] is not None:
        argv += ["--where", call["where"]]
    return argv


def _check_hostile_run(arena: Path, argv: list[str]) -> None:
    tables = _tables(arena / "src" / "depots.duckdb")
    before = _snapshot(arena)
    code, _, err = _run_cli(argv, arena / "work")
    after = _snapshot(arena)
    changed = sorted(k for k in set(before) | set(after) if before.get(k, "absent") != after.get(k, "absent"))
    assert not changed, f"files appeared or changed: {changed}"
    assert _tables(arena / "src" / "depots.duckdb") == tables, "the DuckDB source's tables changed"
    # Exit 1 is a failed run. The one kind allowed here is the model-level refusal that
    # errors.py maps to 1 (EstimationError: a hostile but valid constant term leaves nothing
    # to estimate, or a filter leaves no rows); an engine failure or an unexpected error is not.
    model_refusal = code == 1 and err.strip().startswith(("No term can be estimated", "No usable rows"))
    assert code in (0, 2) or model_refusal, f"exit {code}: {err.strip()[:300]}"
    assert "Traceback" not in err
    if code:  # one sentence: user text is echoed with its newlines escaped (errors.echo)
        assert err.strip() and "\n" not in err.strip(), f"not one line: {err!r}"


# The issue's reproduction, exactly (its shell line, as an argv without a shell).
REPRODUCTION = (
    "1 --, length('\n) AS DOUBLE) AS z0, 1.0 AS z1, 1.0 AS z2 FROM (SELECT 1 AS depot, 1 AS month)) AS head; "
    "COPY (SELECT 42 AS x) TO $$pwned.csv$$; SELECT 0 AS a0, 0 AS a1, 0 AS a2 FROM "
    "(SELECT $s0 AS z0, $s1 AS z1, $s2 AS z2 --')"
)


def test_hostile_text_runs_nothing_and_writes_nothing(arena):
    sources = {"duckdb": [str(arena / "src" / "depots.duckdb"), "--table", TABLE],
               "parquet": [str(arena / "src" / "depots.parquet")]}

    @_settings(30)
    @given(call=_hostile_call(arena))
    @example(call={"outcome": "parcels", "regressors": REPRODUCTION, "where": None, "estimator": "within"})
    @example(call={"outcome": REPRODUCTION.split(", ", 1)[1], "regressors": "staff, " + REPRODUCTION.split(", ", 1)[0],
                   "where": None, "estimator": "within"})
    def check(call):
        for source in sources.values():
            _check_hostile_run(arena, _hostile_argv(call, source))

    check()


@pytest.mark.parametrize("place", ["regressors", "outcome"])
def test_issue_reproduction_is_refused_and_writes_nothing(arena, place):
    argv = [sys.executable, "-m", "bigpanel", "fit", str(arena / "src" / "depots.duckdb"), "--table", TABLE,
            "--unit", "depot", "--period", "month"]
    if place == "regressors":
        argv += ["--outcome", "parcels", "--regressors", REPRODUCTION]
    else:  # "the outcome can carry the second half too"
        first, second = REPRODUCTION.split(", ", 1)
        argv += ["--outcome", second, "--regressors", f"staff, {first}"]
    tables = _tables(arena / "src" / "depots.duckdb")
    before = _snapshot(arena)
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    done = subprocess.run(argv, cwd=arena / "work", env=env, capture_output=True, text=True, timeout=120)
    assert _snapshot(arena) == before, "the reproduction wrote or changed a file"
    assert _tables(arena / "src" / "depots.duckdb") == tables
    assert "Traceback" not in done.stderr
    if place == "regressors":  # the filed reproduction itself is refused, in one sentence
        assert done.returncode == 2, done.stderr
        assert done.stderr.strip().count("\n") == 0
    else:
        # Rendered from its parse tree, the second half alone is one scalar expression, the
        # length of a string literal: a harmless constant outcome may be fitted (exit 0),
        # or refused (exit 2); either way nothing ran but that expression.
        assert done.returncode in (0, 2), done.stderr


# =============================================================== strategy two: random panels

REGRESSORS = ("x1", "x2", "xc", "xu")  # xc: constant everywhere; xu: constant within units


@st.composite
def _panel(draw) -> pd.DataFrame:
    n_units = draw(st.integers(2, 9))
    n_periods = draw(st.integers(2, 7))
    seed_ = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed_)
    rows = [(u, t) for u in range(n_units) for t in range(1, n_periods + 1)]
    keep = rng.random(len(rows)) >= draw(st.sampled_from([0.0, 0.1, 0.3]))  # gaps, unbalanced
    rows = [r for r, k in zip(rows, keep) if k]
    if not rows:
        rows = [(0, 1)]
    df = pd.DataFrame(rows, columns=["unit", "period"])
    n = len(df)
    df["region"] = df["unit"] % 3
    effect = rng.normal(0, 3, n_units)[df["unit"]]
    df["x1"] = rng.normal(0, 1, n) + 0.5 * effect
    df["x2"] = rng.normal(0, 1, n) * draw(st.sampled_from([1.0, 1e3]))
    df["xc"] = 2.5
    df["xu"] = rng.normal(0, 1, n_units)[df["unit"]]
    df["y"] = 1.0 + 2.0 * df["x1"] - 0.5 * df["x2"] + effect + rng.normal(0, 1, n)
    for col in ("x1", "x2", "y"):  # missing values
        share = draw(st.sampled_from([0.0, 0.0, 0.1]))
        df.loc[rng.random(n) < share, col] = np.nan
    n_dup = draw(st.sampled_from([0, 0, 0, 1, 2]))  # duplicate keys (other values)
    if n_dup:
        dup = df.sample(n=min(n_dup, n), random_state=seed_ % 1000).copy()
        dup[["x1", "x2", "y"]] += rng.normal(0, 1, (len(dup), 3))
        df = pd.concat([df, dup], ignore_index=True)
    return df.sort_values(["unit", "period"], kind="stable").reset_index(drop=True)


@st.composite
def _model(draw) -> dict:
    estimator = draw(st.sampled_from(["pooled", "within", "first-difference"]))
    period_effects = draw(st.booleans())
    if estimator == "within":
        effects = ["unit", "period"] if period_effects else ["unit"]
    else:
        effects = ["period"] if period_effects else []
    se = draw(st.sampled_from(["homoskedastic", "hc1", "cluster"]))
    cluster = draw(st.sampled_from(["unit", "region"])) if se == "cluster" else None
    terms = draw(st.lists(st.sampled_from(REGRESSORS), min_size=1, max_size=4, unique=True))
    return {"estimator": estimator, "effects": effects, "se": se, "cluster": cluster, "terms": terms}


def _used_rows(df: pd.DataFrame, m: dict) -> pd.DataFrame:
    """The rows a fit uses, rebuilt in pandas (see the module note)."""
    cols = ["y", *m["terms"]]
    complete = df[cols].notna().all(axis=1) & np.isfinite(df[cols]).all(axis=1)
    if m["estimator"] == "first-difference":
        d = df.sort_values(["unit", "period"], kind="stable")
        prev = d.groupby("unit").shift(1)
        ok = (prev["period"] == d["period"] - 1)
        out = d[cols] - prev[cols]
        ok &= out.notna().all(axis=1)
        out = out[ok].copy()
        out[["unit", "period", "region"]] = d.loc[ok, ["unit", "period", "region"]]
        return out.reset_index(drop=True)
    used = df[complete].copy()
    if m["estimator"] == "within":
        size = used.groupby("unit")["y"].transform("size")
        used = used[size > 1]
    return used.reset_index(drop=True)


def _dummies(values: pd.Series, drop_first: bool) -> np.ndarray:
    levels = sorted(values.unique())
    cols = levels[1:] if drop_first else levels
    return np.column_stack([(values == v).to_numpy(float) for v in cols]) if cols else np.zeros((len(values), 0))


def _design(used: pd.DataFrame, m: dict, kept: list[str]) -> np.ndarray:
    """Kept terms, dummies for the effects (one level left out when another effect or the
    constant spans it), and the constant of pooled and differenced regressions, in this order."""
    parts = [used[kept].to_numpy(float).reshape(len(used), len(kept))]
    intercept = m["estimator"] != "within"
    if "unit" in m["effects"]:
        parts.append(_dummies(used["unit"], drop_first=False))
    if "period" in m["effects"]:
        parts.append(_dummies(used["period"], drop_first=intercept or "unit" in m["effects"]))
    if intercept:
        parts.append(np.ones((len(used), 1)))
    return np.column_stack(parts)


def _reference_variance(x: np.ndarray, y: np.ndarray, used: pd.DataFrame, m: dict) -> np.ndarray:
    """statsmodels' covariance of the dummy-variable fit, with its own small-sample factor."""
    ols = sm.OLS(y, x).fit()
    if m["se"] == "homoskedastic":
        return ols.cov_params()
    if m["se"] == "hc1":
        return sw.cov_hc1(ols)
    # CR1 (ESTIMATION.md): statsmodels' raw sandwich (use_correction=False) times
    # G/(G-1) * (N-1)/(N-K'), K' leaving out the unit effects when they nest in the clusters
    groups = pd.factorize(used[m["cluster"]])[0]
    raw = sw.cov_cluster(ols, groups, use_correction=False)
    n, g = len(y), groups.max() + 1
    nested = "unit" in m["effects"] and used.groupby("unit")[m["cluster"]].nunique().max() == 1
    k_prime = np.linalg.matrix_rank(x) - (used["unit"].nunique() if nested else 0)
    return raw * g / (g - 1) * (n - 1) / (n - k_prime) if n > k_prime else raw * np.nan


def _one_sentence(message: str) -> None:
    text = str(message).strip()
    assert text and "\n" not in text and "Traceback" not in text, repr(text)
    assert text.endswith((".", "?")), repr(text)


def _has_duplicates(df: pd.DataFrame) -> bool:
    return bool(df.duplicated(["unit", "period"]).any())


# Found by this test: a singleton unit (one row, left out of the fit) was still counted as
# a cluster when unit clusters come from the second pass (unit and period effects), so G
# was 4 instead of 3 here and the CR1 factor G/(G-1) too small. Fixed in unit_scores.sql.
SINGLETON_CLUSTER = pd.DataFrame({
    "unit": [0, 0, 1, 2, 2, 3, 3], "period": [1, 2, 2, 1, 2, 1, 2], "region": [0, 0, 1, 2, 2, 0, 0],
    "x1": [-0.19, 0.38, -0.04, 0.64, 0.08, 0.53, 0.04], "x2": [0.1, -0.3, 0.2, 0.5, -0.1, 0.4, 0.0],
    "xc": 2.5, "xu": [1.0, 1.0, 2.0, 3.0, 3.0, 4.0, 4.0], "y": [3.96, 1.75, 1.56, 3.76, 1.39, 5.71, 3.15],
})  # fmt: skip


@_settings(40)
@given(df=_panel(), m=_model())
@example(df=SINGLETON_CLUSTER, m={"estimator": "within", "effects": ["unit", "period"], "se": "cluster",
                                  "cluster": "unit", "terms": ["x1"]})
def test_random_panels_match_dummy_variable_least_squares(df, m):
    used = _used_rows(df, m)
    cluster = m["cluster"] if m["se"] == "cluster" else None
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            res = bigpanel.fit(pa.Table.from_pandas(df, preserve_index=False), "y", m["terms"], "unit", "period",
                               estimator=m["estimator"], effects=m["effects"] or None, variance=m["se"], cluster=cluster)
    except (InputError, EstimationError) as exc:
        event("refused: " + " ".join(str(exc).split()[:4]))
        _one_sentence(exc)
        # refusals that the rows explain: duplicate keys where order or one row per key
        # matters, no usable rows, or nothing estimable
        dup = _has_duplicates(df) and (m["estimator"] == "first-difference" or "period" in m["effects"] and m["estimator"] == "within")
        if "duplicate" in str(exc):
            assert _has_duplicates(df)
            return
        assert dup or len(used) == 0 or "No term can be estimated" in str(exc) or "cannot be" in str(exc), str(exc)
        return
    event(f"fit: {m['estimator']}, {m['se']}")
    if m["estimator"] == "first-difference":
        assert not _has_duplicates(df), "first differences returned a fit on duplicate keys"
    assert res.n_obs == len(used)
    kept = [t for t in m["terms"] if t not in res.terms_dropped]
    assert [c.term for c in res.coefficients if c.term != "(intercept)"] == kept
    x, y = _design(used, m, kept), used["y"].to_numpy(float)
    k_all = int(np.linalg.matrix_rank(x))
    # the terms left out add no rank (constant within units, or collinear)
    assert np.linalg.matrix_rank(_design(used, m, list(m["terms"]))) == k_all
    if k_all < x.shape[1] or not kept:  # effects collinear among themselves; or no slope
        return
    k = len(kept)
    # slopes: 1e-8 relative, far above the rounding of these small, well-scaled fits
    est = np.array([res.coef(t).estimate for t in kept])
    lstsq = np.linalg.lstsq(x, y, rcond=None)[0][:k]
    ols = sm.OLS(y, x).fit().params[:k]
    atol = 1e-8 * max(np.abs(lstsq).max(), 1e-3)
    np.testing.assert_allclose(est, lstsq, rtol=1e-8, atol=atol)
    np.testing.assert_allclose(est, ols, rtol=1e-8, atol=atol)
    # standard errors with bigpanel's documented factor (ESTIMATION.md, variance.py)
    n = len(used)
    se = np.array([res.coef(t).std_error for t in kept])
    n_groups = used[m["cluster"]].nunique() if m["se"] == "cluster" else None
    if (n_groups is None and n - k_all <= 0) or (n_groups is not None and n_groups < 2):
        assert not np.isfinite(se).any(), "a standard error without degrees of freedom"
        return
    var = np.diag(_reference_variance(x, y, used, m))[:k]
    if not np.isfinite(var).all():
        assert not np.isfinite(se).any(), "a standard error without degrees of freedom"
        return
    # Compared as variances: where the true variance is zero (two clusters whose scores
    # cancel) both sides hold rounding noise, which a square root would blow up. The
    # floor is 1e-9 of the homoskedastic variance's scale, far above that noise (~1e-16 relative).
    floor = 1e-9 * max(np.abs(np.diag(sm.OLS(y, x).fit().cov_params())).max(), np.abs(var).max(), 1e-300)
    np.testing.assert_allclose(se**2, var, rtol=1e-6, atol=floor)
