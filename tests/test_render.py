"""The renderer from DuckDB's parse tree to PostgreSQL's SQL (bigpanel/render.py), without a
server: quoting, literals, bound parameters, refusals by name. What the rendered SQL
computes is compared with DuckDB on a real server in tests/test_engine_postgres.py."""

from __future__ import annotations

import pytest

from bigpanel import render
from bigpanel.expressions import expression_sql, query_sql
from bigpanel.source import parse_tree


def pg(text: str) -> str:
    """A user expression checked as on DuckDB, then rendered for PostgreSQL."""
    node = parse_tree("SELECT " + expression_sql(text, "Term"))["statements"][0]["node"]["select_list"][0]
    return render.expression(node, render.POSTGRES)


def test_identifiers_are_quoted_and_strings_escaped_whatever_the_server_setting():
    assert pg('"we""ird" + "Sales 2024"') == '("we""ird" + "Sales 2024")'
    # E'' strings read the same with standard_conforming_strings on or off
    assert pg("CASE WHEN region = 'it''s \\ north' THEN 1 ELSE 0 END") == \
        "(CASE WHEN (\"region\" = E'it''s \\\\ north') THEN 1 ELSE 0 END)"


def test_operators_keep_duckdbs_meaning():
    assert pg("hours / 2") == '(CAST("hours" AS double precision) / NULLIF(CAST(2 AS double precision), 0))'
    assert pg("x ** 2") == 'power("x", 2)'
    assert pg("name LIKE 'a_%'") == "(\"name\" LIKE E'a_%' ESCAPE E'')"  # DuckDB's LIKE has no escape character
    assert pg("CAST(flag AS DOUBLE)") == 'CAST("flag" AS double precision)'
    assert pg("CAST(x > 1 AS DOUBLE)") == 'CAST(CAST(("x" > 1) AS integer) AS double precision)'
    assert pg("-x - -1") == '((- "x") - (-1))'


@pytest.mark.parametrize("text,function", [
    ("isfinite(x)", "isfinite()"), ("round(x, 2)", "round()"), ("hash(x)", "hash()"), ("if(x > 0, 1, 0)", "if()"),
    ("list_value(x)", "list_value()"), ("regexp_matches(t, 'a')", "regexp_matches()"), ("x::HUGEINT // 2", "the operator //"),
    ("CAST(x AS UUID)", "the type UUID"), ("TRY_CAST(x AS DOUBLE)", "TRY_CAST"),
])
def test_functions_postgres_lacks_are_refused_by_name(text, function):
    with pytest.raises(render.Unsupported) as refused:
        pg(text)
    assert refused.value.function == function and refused.value.engine == "PostgreSQL"


def test_parameters_are_bound_in_order_with_their_types():
    out = render.translate("SELECT $a + $b * $a AS x, $c AS y, $n AS z", render.POSTGRES, {"a": 1.5, "b": 2, "c": "s", "n": None})
    assert out.sql == ('SELECT (CAST($1 AS double precision) + (CAST($2 AS bigint) * CAST($3 AS double precision))) AS "x", '
                       'CAST($4 AS text) AS "y", NULL AS "z"')
    assert out.values({"a": 1.5, "b": 2, "c": "s", "n": None}) == (1.5, 2, 1.5, "s")
    with pytest.raises(render.Unsupported):  # no parameters in user text
        render.statement(parse_tree("SELECT $1")["statements"][0]["node"], render.POSTGRES, "query")


def test_user_query_renders_joins_groups_and_subqueries():
    text = query_sql("SELECT a.unit, a.t, sum(b.v) AS v FROM s.a AS a LEFT JOIN s.b AS b ON a.unit = b.unit "
                     "WHERE a.unit IN (SELECT unit FROM s.c) GROUP BY a.unit, a.t HAVING count(*) > 1")
    out = render.statement(parse_tree(text)["statements"][0]["node"], render.POSTGRES, "query")
    assert out.sql == ('SELECT "a"."unit", "a"."t", sum("b"."v") AS "v" FROM "s"."a" AS "a" LEFT JOIN "s"."b" AS "b" '
                       'ON ("a"."unit" = "b"."unit") WHERE ("a"."unit" = ANY (SELECT "unit" FROM "s"."c")) '
                       'GROUP BY "a"."unit", "a"."t" HAVING (count(*) > 1)')


@pytest.mark.parametrize("query,what", [
    ("SELECT * FROM read_parquet('x.parquet')", "the table function read_parquet()"),
    ("SELECT *, isfinite(v) FROM t", "isfinite()"),
    ("SELECT * FROM t QUALIFY row_number() OVER () = 1", "QUALIFY or USING SAMPLE"),
    ("SELECT * EXCLUDE (v) FROM t", "* with EXCLUDE, REPLACE, RENAME or COLUMNS"),
    ("SELECT 1 AS a UNION ALL BY NAME SELECT 2 AS a", "UNION BY NAME"),
])
def test_user_query_constructs_postgres_lacks_are_refused(query, what):
    with pytest.raises(render.Unsupported) as refused:
        render.statement(parse_tree(query_sql(query))["statements"][0]["node"], render.POSTGRES, "query")
    assert refused.value.function == what


def test_bigpanels_own_constructs_render_only_in_internal_mode():
    sql = "SELECT fsum(z0) FILTER (WHERE isfinite(z0)) AS s, lag(k) OVER (PARTITION BY u ORDER BY p) AS l FROM r"
    out = render.translate(sql, render.POSTGRES)
    assert out.sql == ('SELECT sum("z0") FILTER (WHERE (("z0") * 0 = 0)) AS "s", '
                       'lag("k") OVER (PARTITION BY "u" ORDER BY "p" NULLS LAST) AS "l" FROM "r"')
    with pytest.raises(render.Unsupported):
        render.translate(sql, render.POSTGRES, mode="query")
