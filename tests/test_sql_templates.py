"""SQL templates and the checkup's query builders.

Every template in sql/ names its placeholders in its leading comment; the body must use
exactly those, and rendering with them must leave nothing unfilled."""

from __future__ import annotations

import re
from pathlib import Path

import duckdb
import pyarrow as pa
import pytest

from bigpanel import open_source, sqlbuild
from bigpanel.panel import inspect_panel

SQL_DIR = Path(__file__).resolve().parent.parent / "sql"
PLACEHOLDER = re.compile(r"\{\{(\w+)\}\}")


def template_files() -> list[Path]:
    return sorted(SQL_DIR.glob("*.sql"))


def test_there_are_templates():
    assert {"checkup_periods", "checkup_units", "checkup_duplicates"} <= {p.stem for p in template_files()}
    assert set(sqlbuild.template_names()) == {p.stem for p in template_files()}


@pytest.mark.parametrize("path", template_files(), ids=lambda p: p.stem)
def test_template_placeholders_are_declared_and_filled(path):
    lines = path.read_text(encoding="utf-8").splitlines()
    header = [line for line in lines if line.startswith("--")]
    declared = set(PLACEHOLDER.findall("\n".join(header)))
    assert lines[0].startswith(f"-- {path.stem}:"), "the header starts by naming the template"
    assert declared == sqlbuild.template_placeholders(path.stem)
    rendered = sqlbuild.render(path.stem, **{name: f"/*{name}*/" for name in declared})
    assert "{{" not in rendered and "}}" not in rendered
    with pytest.raises(KeyError):
        sqlbuild.render(path.stem, **{name: "x" for name in declared | {"not_a_placeholder"}})


# ---------------------------------------------------------------- the checkup's builders


@pytest.mark.parametrize(
    ("mode", "expected"),
    [
        ("integer", 'CAST((CAST("t" AS HUGEINT) - $first) // $step AS BIGINT)'),
        ("month", 'CAST(((year("t") * 12 + month("t") - 1) - $first) // $step AS BIGINT)'),
        ("day", "CAST((date_diff('day', DATE '1970-01-01', CAST(\"t\" AS DATE)) - $first) // $step AS BIGINT)"),
        ("microsecond", 'CAST((epoch_us("t") - $first) // $step AS BIGINT)'),
    ],
)
def test_slot_expression(mode, expected):
    assert sqlbuild.slot_expression('"t"', mode) == expected


@pytest.mark.parametrize(
    ("sql", "expected"),
    [
        (sqlbuild.period_value('a"b', "integer"), '"a""b"'),
        (sqlbuild.period_value('a"b', "timestamp"), 'CAST("a""b" AS TIMESTAMP)'),
        (sqlbuild.rows_without_unit_sql("(SELECT * FROM x)", "order"),
         '(SELECT * FROM (SELECT * FROM x) AS src WHERE "order" IS NULL)'),
    ],
)
def test_checkup_fragment_text(sql, expected):
    assert sql == expected


def test_duplicate_scan_text():
    sql = sqlbuild.checkup_duplicate_scan_sql("(SELECT * FROM x)", 'a"b', '"order"')
    assert 'SELECT "a""b" AS unit_key, "order" AS period_key, count(*) AS n_rows' in sql
    assert 'FROM (SELECT * FROM x) AS src' in sql and "LIMIT $n_examples" in sql


@pytest.mark.parametrize("bitmap", [True, False])
def test_built_scans_bind_in_duckdb(bitmap):
    """The builders' SQL is valid and binds against a table with awkward column names."""
    con = duckdb.connect()
    con.execute('CREATE TABLE t ("order" INTEGER, "a""b" DATE, "sum x" DOUBLE, "select" VARCHAR)')
    source = "(SELECT * FROM t)"
    checked = ["select", "sum x"]
    scans = [
        (sqlbuild.checkup_shift_probe_sql(source, checked, [1]), {"probe_rows": 3}),
        (sqlbuild.checkup_period_scan_sql(source, "order", '"a""b"', checked, [1]), {"max_groups": 10, "c_1": 0.5, "d_1": 0.25}),
        (sqlbuild.checkup_unit_scan_sql(source, "order", '"a""b"', checked, [1], "month", bitmap),
         {"first": 0, "step": 1, "n_periods": 1, "c_1": 0.5, "d_1": 0.25} | ({"last_slot": 0} if bitmap else {})),
        (sqlbuild.checkup_duplicate_scan_sql(source, "order", '"a""b"'), {"n_examples": 5}),
        (f"SELECT count(*) FROM {sqlbuild.rows_without_unit_sql(source, 'order')}", {}),
    ]
    for sql, params in scans:
        con.execute(sql, params).fetchall()


def test_awkward_column_names_end_to_end():
    table = pa.table({
        "order": [1, 1, 2, 2, 2],
        'a"b': [10, 11, 10, 11, 12],
        "sum x": [1.0, 2.0, 3.0, 3.0, 3.0],
        "select": [5.0, 5.0, 7.0, 7.0, 7.0],
    })  # fmt: skip
    report = inspect_panel(open_source(table), "order", 'a"b')
    assert (report.n_units, report.n_periods, report.n_balanced_units) == (2, 3, 1)
    checks = {c.name: c for c in report.columns}
    assert checks["sum x"].units_varying == 1 and checks["select"].within_estimable is False


def test_spark_scans_use_no_duckdb_only_sql():
    """Built in Spark's dialect, the checkup's scans call none of DuckDB's own functions
    or operators (Spark lacks them; the Spark SQL reference lists its built-in functions)
    and quote names in backticks; DuckDB's text is the one checked above."""
    source = "(SELECT * FROM `v`)"
    checked = ["select", "sum x", "note"]
    period = sqlbuild.period_value("a`b", "timestamp", sqlbuild.SPARK)
    sqls = [
        sqlbuild.checkup_shift_probe_sql(source, checked, [1], sqlbuild.SPARK),
        sqlbuild.checkup_period_scan_sql(source, "order", period, checked, [1], sqlbuild.SPARK),
        sqlbuild.checkup_unit_scan_sql(source, "order", period, checked, [1], "microsecond", True, sqlbuild.SPARK),
        sqlbuild.checkup_duplicate_scan_sql(source, "order", period, sqlbuild.SPARK),
        sqlbuild.text_number_counts_sql(source, ["note"], sqlbuild.SPARK),
        sqlbuild.text_tokens_sql(source, "note", 6, sqlbuild.SPARK),
    ]
    for sql in sqls:
        for duckdb_only in ("favg(", "fsum(", "isfinite(", "//", "histogram(", "bitstring_agg(", "bit_count(",
                            "epoch_us(", "date_diff(", "TRY_CAST", "HUGEINT", '"'):
            assert duckdb_only not in sql, (duckdb_only, sql)
    assert "`sum x`" in sqls[1] and "CAST(`a``b` AS TIMESTAMP)" in sqls[2] and "count(DISTINCT slot)" in sqls[2]
