"""Every SQL text bigpanel runs is built here, from the templates in ``sql/``.

Building never touches a connection: functions return ``(sql, params)`` or SQL text
that :mod:`bigpanel.source` runs. Identifiers go through :func:`quote_ident` only;
values travel as parameters, except file names inside table functions, which go
through :func:`quote_literal` (DuckDB does not bind parameters inside ``ATTACH``).
Template placeholders are ``{{name}}`` and are filled only with fragments made by this
module: quoted identifiers, validated user expressions, or lists of those.
"""

from __future__ import annotations

import json
import re
from collections.abc import Sequence
from dataclasses import dataclass
from functools import cache
from importlib import resources
from pathlib import Path

_PLACEHOLDER = re.compile(r"\{\{(\w+)\}\}")


@dataclass(frozen=True)
class Dialect:
    """What differs between SQL engines in the text the builders write: identifier and
    literal quoting, parameter markers, the compensated sum, the finiteness test, the
    grouping id, text and DOUBLE spellings, whole-number division and period ordinals.
    Builders write parameters as ``$name``; :meth:`bind` turns them into the engine's
    markers. ``DUCKDB`` here; ``SPARK`` below (DEVELOPERS.md, "Engines")."""

    name: str = "duckdb"
    compensated: str = "fsum"  # a sum whose result does not depend on the order of rows
    plain: str = "sum"
    param_marker: str = "$"
    text_type: str = "VARCHAR"
    materialized: str = "AS MATERIALIZED"  # a CTE computed once (plain AS where unknown)
    anti_join: str = "ANTI JOIN"
    semi_join: str = "SEMI JOIN"
    one: str = "1.0"  # the DOUBLE one (Spark reads 1.0 as a DECIMAL)
    mean: str = "favg"  # a mean whose result does not depend on the order of rows (or the plain one)

    def quote_ident(self, name: str) -> str:
        return '"' + str(name).replace('"', '""') + '"'

    def quote_literal(self, value: str) -> str:
        return "'" + str(value).replace("'", "''") + "'"

    def param(self, name: str) -> str:
        return f"{self.param_marker}{name}"

    def total(self, compensated: bool) -> str:
        """The sum function: compensated when a query's threads race (its result must not
        depend on their timing), plain when it runs on one thread."""
        return self.compensated if compensated else self.plain

    def is_finite(self, expression: str) -> str:
        return f"isfinite({expression})"

    def number_or_null(self, text: str) -> str:
        """An expression that is NULL unless the text ``text`` reads as a number (as DuckDB's
        TRY_CAST to DOUBLE reads it)."""
        return f"TRY_CAST({text} AS DOUBLE)"

    def grouping(self, keys: Sequence[str]) -> str:
        """The grouping set's id over ``keys``: a bit per key left out, the first key most
        significant (:func:`grouping_id`)."""
        return f"GROUPING({', '.join(keys)})"

    def whole_division(self, a: str, b: str) -> str:
        return f"({a}) // ({b})"

    def ordinal(self, period_value: str, mode: str) -> str:
        """The period as a whole number on its grid's scale (``mode``: integer, month, day,
        microsecond)."""
        return {
            "integer": f"CAST({period_value} AS HUGEINT)",
            "month": f"(year({period_value}) * 12 + month({period_value}) - 1)",
            "day": f"date_diff('day', DATE '1970-01-01', CAST({period_value} AS DATE))",
            "microsecond": f"epoch_us({period_value})",
        }[mode]

    def bind(self, sql: str, params: dict | None) -> tuple[str, dict | None]:
        """The query with this engine's parameter markers, and its parameters."""
        return sql, params

    def presence(self, first: int, last: int) -> tuple[str, str]:
        """(aggregate per unit, its text of 0s and 1s): the periods a unit is seen in, one
        character per period from ``first`` to ``last``."""
        return f"bitstring_agg(k_period, {int(first)}, {int(last)})", f"CAST(pattern AS {self.text_type})"


class SparkDialect(Dialect):
    """Spark SQL: backtick identifiers; string literals that read backslash escapes (so a
    backslash is doubled and a quote escaped); ``:name`` parameters; no compensated sum
    (the plain one: Spark's order of summation depends on partitioning, and agreement
    with DuckDB is to a stated tolerance, DEVELOPERS.md); ``grouping()`` per key; ``div``."""

    def quote_ident(self, name: str) -> str:
        return "`" + str(name).replace("`", "``") + "`"

    def quote_literal(self, value: str) -> str:
        return "'" + str(value).replace("\\", "\\\\").replace("'", "\\'") + "'"

    def is_finite(self, expression: str) -> str:
        return f"(({expression}) * 0 = 0)"  # NaN and infinities times 0 are NaN, unequal to 0 in Spark too

    def number_or_null(self, text: str) -> str:
        # Spark's cast also reads '1.5d' and hexadecimal floats: the pattern of DuckDB's numbers instead
        words = ", ".join(self.quote_literal(w) for w in NUMBER_WORDS)
        return f"(CASE WHEN {text} RLIKE {self.quote_literal(NUMBER_TEXT)} OR lower(trim({text})) IN ({words}) THEN 1 END)"

    def grouping(self, keys: Sequence[str]) -> str:
        # grouping_id() must list the columns in GROUP BY's order; bit by bit it need not
        n = len(keys)
        return "(" + " + ".join(f"grouping({k}) * {2 ** (n - 1 - i)}" for i, k in enumerate(keys)) + ")"

    def whole_division(self, a: str, b: str) -> str:
        return f"({a}) div ({b})"

    def ordinal(self, period_value: str, mode: str) -> str:
        return {
            "integer": f"CAST({period_value} AS BIGINT)",
            "month": f"(year({period_value}) * 12 + month({period_value}) - 1)",
            "day": f"datediff(CAST({period_value} AS DATE), DATE '1970-01-01')",
            "microsecond": f"unix_micros(CAST({period_value} AS TIMESTAMP))",
        }[mode]

    def presence(self, first: int, last: int) -> tuple[str, str]:
        # the set of the unit's periods, written out over the grid
        text = f"array_join(transform(sequence({int(first)}, {int(last)}), t -> IF(array_contains(pattern, t), '1', '0')), '')"
        return "collect_set(k_period)", text

    def bind(self, sql: str, params: dict | None) -> tuple[str, dict | None]:
        """``$name`` markers outside quoted text become ``:name``; only the parameters the
        query uses are passed (Spark refuses unused ones)."""
        used: list[str] = []

        def swap(m: re.Match) -> str:
            if m.group(1) is None:
                return m.group(0)
            used.append(m.group(1))
            return ":" + m.group(1)

        text = _MARKER_OR_QUOTED.sub(swap, sql)
        if not params:
            return text, None
        return text, {k: params[k] for k in dict.fromkeys(used) if k in params} or None


# quoted text (Spark: '...' and "..." with backslash escapes, `...` with doubled backticks)
# is passed over; a $name marker anywhere else is a parameter
_MARKER_OR_QUOTED = re.compile(r"'(?:[^'\\]|\\.)*'|\"(?:[^\"\\]|\\.)*\"|`(?:[^`]|``)*`|\$([A-Za-z_]\w*)")

# Text that DuckDB's TRY_CAST reads as a DOUBLE (checked against DuckDB 1.x): a decimal
# number with an optional exponent, single underscores between digits, blanks around; or
# one of these words (in any case, after trimming blanks)
NUMBER_TEXT = r"^\s*[-+]?([0-9]+(_[0-9]+)*\.?([0-9]+(_[0-9]+)*)?|\.[0-9]+(_[0-9]+)*)([eE][-+]?[0-9]+(_[0-9]+)*)?\s*$"
NUMBER_WORDS = ("nan", "+nan", "-nan", "inf", "+inf", "-inf", "infinity", "+infinity", "-infinity")

DUCKDB = Dialect()
SPARK = SparkDialect(name="spark", compensated="sum", param_marker=":", text_type="STRING", materialized="AS",
                     anti_join="LEFT ANTI JOIN", semi_join="LEFT SEMI JOIN", one="CAST(1 AS DOUBLE)", mean="avg")
# PostgreSQL: builders write DuckDB's SQL for it, and bigpanel.render writes PostgreSQL's
# text from DuckDB's parse tree of each query (fsum and favg become sum and avg there, which
# add rows in one order on one process; isfinite a comparison). The dialect tells builders
# what to leave out: no bitstring_agg (bigpanel.pg.PostgresEngine.twoway_pass), no histogram.
POSTGRES = Dialect(name="postgres")


def quote_ident(name: str, dialect: Dialect = DUCKDB) -> str:
    """Quote an identifier: ``a"b`` becomes ``"a""b"``."""
    return dialect.quote_ident(name)


def quote_literal(value: str, dialect: Dialect = DUCKDB) -> str:
    """Quote a string literal: ``it's`` becomes ``'it''s'``."""
    return dialect.quote_literal(value)


def value_literal(value) -> str:
    """A whole number or a string as SQL literal text (used for chunk bounds, which
    must be literals for DuckDB to skip row groups by their statistics)."""
    if isinstance(value, bool) or not isinstance(value, (int, str)):
        raise TypeError(f"no literal form for {type(value).__name__}")
    return str(int(value)) if isinstance(value, int) else quote_literal(value)


def _template_dir() -> Path:
    packaged = resources.files("bigpanel") / "sql"
    if packaged.is_dir():
        return Path(str(packaged))
    return Path(__file__).resolve().parent.parent / "sql"


@cache
def template(name: str) -> str:
    """Return the text of ``sql/<name>.sql`` without its leading comment block."""
    text = (_template_dir() / f"{name}.sql").read_text(encoding="utf-8")
    body = [line for line in text.splitlines() if not line.startswith("--")]
    return "\n".join(body).strip()


def template_placeholders(name: str) -> set[str]:
    """Placeholders used by a template (tests check each is filled by a builder)."""
    return set(_PLACEHOLDER.findall(template(name)))


def render(name: str, **fragments: str) -> str:
    """Fill a template's placeholders; every placeholder must be given, and no other."""
    text = template(name)
    wanted = set(_PLACEHOLDER.findall(text))
    if wanted != set(fragments):
        raise KeyError(f"template {name}: expects {sorted(wanted)}, got {sorted(fragments)}")
    return _PLACEHOLDER.sub(lambda m: fragments[m.group(1)], text)


def template_names() -> list[str]:
    return sorted(p.stem for p in _template_dir().glob("*.sql"))


# ---------------------------------------------------------------- relations


def parquet_relation(paths: list[str], hive: bool) -> str:
    """``read_parquet`` over a list of files; columns missing from some files read as NULL."""
    files = "[" + ", ".join(quote_literal(p) for p in paths) + "]"
    return f"read_parquet({files}, union_by_name = true, hive_partitioning = {str(hive).lower()})"


CSV_OPTIONS = ("delim", "sep", "quote", "escape", "header", "decimal_separator", "nullstr", "skip", "dateformat",
               "timestampformat", "new_line", "comment")


def text_number_counts_sql(source_sql: str, columns: Sequence[str], dialect: Dialect = DUCKDB) -> str:
    """Per text column j: its non-missing values (n{j}) and those that read as numbers (num{j})."""
    items = []
    for j, c in enumerate(columns):
        q = quote_ident(c, dialect)
        items += [f"count({q}) AS n{j}", f"count({dialect.number_or_null(q)}) AS num{j}"]
    return f"SELECT {', '.join(items)} FROM {source_sql} AS src"


def text_tokens_sql(source_sql: str, column: str, limit: int, dialect: Dialect = DUCKDB) -> str:
    """The most frequent values of a text column that do not read as numbers."""
    q = quote_ident(column, dialect)
    return (f"SELECT {q} AS token, count(*) AS n FROM {source_sql} AS src "
            f"WHERE {q} IS NOT NULL AND {dialect.number_or_null(q)} IS NULL GROUP BY {q} ORDER BY n DESC, token LIMIT {int(limit)}")


def csv_relation(paths: list[str], types: dict[str, str] | None, options: dict[str, str] | None,
                 nulls: Sequence[str] = ()) -> str:
    """``read_csv`` with auto-detection; ``types`` pins column types, ``options`` passes
    ``delim``, ``decimal_separator``, ``nullstr`` or ``header``; ``nulls`` are extra
    missing-value tokens (the empty field stays one: DuckDB's list replaces its default)."""
    files = "[" + ", ".join(quote_literal(p) for p in paths) + "]"
    parts = [files, "auto_detect = true", "union_by_name = true"]
    if types:
        pairs = ", ".join(f"{quote_literal(k)}: {quote_literal(v)}" for k, v in types.items())
        parts.append(f"types = {{{pairs}}}")
    for key, value in (options or {}).items():
        if key not in CSV_OPTIONS:  # the option's name is SQL text: only names we know
            raise ValueError(f"unknown CSV reader option {key!r}")
        parts.append(f"{key} = {quote_literal(value)}")
    if nulls:
        parts.append("nullstr = [" + ", ".join(quote_literal(t) for t in ("", *nulls)) + "]")
    return f"read_csv({', '.join(parts)})"


def table_relation(catalog: str | None, table: str) -> str:
    parts = [p for p in (catalog, *table.split(".")) if p]
    return ".".join(quote_ident(p) for p in parts)


def query_relation(sql: str) -> str:
    return f"({sql})"


def attach_sql(path: str, alias: str) -> str:
    return f"ATTACH {quote_literal(path)} AS {quote_ident(alias)} (READ_ONLY)"


# ---------------------------------------------------------------- settings, filters, probes

BASE_SETTINGS = (
    ("enable_progress_bar", "false"),
    ("enable_progress_bar_print", "false"),
    ("preserve_insertion_order", "true"),
    ("parquet_metadata_cache", "true"),
)


def setting_sql(name: str, value) -> str:
    """``SET name = value``: booleans and whole numbers as they are, anything else quoted."""
    if not re.fullmatch(r"[a-z_]+", name):
        raise ValueError(f"not a setting name: {name!r}")
    if isinstance(value, bool):
        text = "true" if value else "false"
    elif isinstance(value, int) or value in ("true", "false"):
        text = str(int(value)) if isinstance(value, int) else value
    else:
        text = quote_literal(value)
    return f"SET {name} = {text}"


def filtered_sql(relation: str, where_sql: str | None, unit_column: str | None = None) -> str:
    """The rows of ``relation`` that pass the filter (SQL rendered from its checked tree)
    and, with ``unit_column``, whose unit lies in [``$unit_low``, ``$unit_high``) (a NULL
    bound is open): the bounds travel as parameters, so every chunk runs the same text,
    and DuckDB still skips row groups by them."""
    conditions = [f"({where_sql})"] if where_sql else []
    if unit_column is not None:
        column = quote_ident(unit_column)
        conditions.append(f"($unit_low IS NULL OR {column} >= $unit_low) AND ($unit_high IS NULL OR {column} < $unit_high)")
    clause = f" WHERE {' AND '.join(conditions)}" if conditions else ""
    return f"(SELECT * FROM {relation}{clause})"


def use_sql(catalog: str) -> str:
    return f"USE {quote_ident(catalog)}"


# ---------------------------------------------------------------- expressions


def parse_check_sql(sql: str) -> tuple[str, list]:
    """Query that returns DuckDB's parse tree of ``sql`` as JSON."""
    return "SELECT json_serialize_sql($1)", [sql]


def render_tree_sql(tree_json: str) -> tuple[str, list]:
    """Query that returns the SQL text DuckDB generates from a parse tree."""
    return "SELECT json_deserialize_sql(CAST($1 AS JSON))", [tree_json]


def describe_sql(select: str) -> str:
    """``DESCRIBE`` of a SELECT: its result columns and types, reading no rows."""
    return f"DESCRIBE {select}"


def all_columns_sql(relation: str) -> str:
    return f"SELECT * FROM {relation}"


def expression_type_sql(expression: str, relation: str) -> str:
    """A query whose one column is a checked expression over ``relation`` (for its type)."""
    return f"SELECT ({expression}) AS x FROM {relation} AS src"


def function_kinds_sql() -> str:
    return "SELECT DISTINCT lower(function_name), function_type FROM duckdb_functions()"


# ---------------------------------------------------------------- estimation queries
# Design columns are z0..z{q-1} (the outcome last); each arrives shifted by $s{j}.


def _z(j: int) -> str:
    return f"z{j}"


def design_rows_sql(
    source: str, unit: str, period: str, clusters: list[str], columns: list[tuple[str, int]], step: int,
    period_sql: str | None = None, effects: Sequence[Sequence[str]] = (), weight: str | None = None,
    dialect: Dialect = DUCKDB,
) -> str:
    """Select the unit, period, clusters and shifted design columns of every row.

    ``columns`` holds ``(expression, lag)`` pairs; a lag K reads the expression at
    period - K*step in the same unit (NULL when that period is absent); a negative K (a
    lead) reads it |K|*step periods later. ``period_sql``: the period as a slot on its
    regular grid (:func:`period_slot_sql`) instead of the column. ``effects``: the key
    columns of each absorbed effect (many effects, :mod:`bigpanel.sweeps`), as k_e<i>_<m>.
    ``weight``: the weight column's name, carried as ``k_w`` (the row's own weight, never lagged).
    """
    period_sql = period_sql or quote_ident(period, dialect)
    items = [f"{quote_ident(unit, dialect)} AS k_unit", f"{period_sql} AS k_period"]
    items += [f"{quote_ident(c, dialect)} AS k_c{i}" for i, c in enumerate(clusters)]
    items += [f"{quote_ident(c, dialect)} AS {name}" for e, keys in enumerate(effects)
              for c, name in zip(keys, effect_keys(e, len(keys)))]
    if weight is not None:
        items.append(f"CAST({quote_ident(weight, dialect)} AS DOUBLE) AS k_w")
    for j, (expr, lag) in enumerate(columns):
        value = f"CAST(({expr}) AS DOUBLE)"
        if lag:
            span = abs(int(lag)) * int(step)
            side = "PRECEDING" if lag > 0 else "FOLLOWING"
            value = (
                f"first_value({value}) OVER (PARTITION BY {quote_ident(unit, dialect)} ORDER BY {period_sql} "
                f"RANGE BETWEEN {span} {side} AND {span} {side})"
            )
        items.append(f"({value} - $s{j}) * $d{j} AS {_z(j)}")
    return render("design_rows", source=source, columns=", ".join(items))


def differenced_rows_sql(rows: str, n_clusters: int, q: int, streaming: bool = False, weighted: bool = False) -> str:
    """Difference every design column within units. ``streaming`` differences rows in
    their scan order (no sort): only for one-thread chunks of unit- and period-sorted files.
    ``weighted``: a difference carries the weight ``k_w`` of its later row (README)."""
    keys = ["k_unit", "k_period"] + [f"k_c{i}" for i in range(n_clusters)] + (["k_w"] if weighted else [])
    diffs = ", ".join(f"{_z(j)} - lag({_z(j)}) OVER w AS {_z(j)}" for j in range(q))
    window = "" if streaming else "PARTITION BY k_unit ORDER BY k_period"
    return render("differenced_rows", rows=f"({rows})", keys=", ".join(keys), diffs=diffs, window=window)


def effect_keys(effect: int, n_columns: int) -> list[str]:
    """The names of an absorbed effect's key columns in the design rows."""
    return [f"k_e{effect}_{m}" for m in range(n_columns)]


def keys_present(keys: Sequence[str]) -> str:
    """Every key column has a value (rows without an effect's level are not used)."""
    return " AND ".join(f"{k} IS NOT NULL" for k in keys)


def effect_levels_sql(rows: str, keys: Sequence[str], missing: bool = False) -> str:
    """The distinct levels of ``keys`` over the design rows, in sort order: row i is level
    i in :func:`effect_rows_sql`. ``missing``: a row without a value is a level too
    (clusters); else such rows have no level (effects: they are not used)."""
    cols = ", ".join(keys)
    return render("effect_levels", rows=f"({rows})", keys=cols, present="true" if missing else keys_present(keys))


def effect_rows_sql(rows: str, valid: str, effects: Sequence[Sequence[str]], clusters: Sequence[Sequence[str]], q: int,
                    keep: Sequence[str] = ()) -> str:
    """The used rows (design rows ``rows`` where ``valid``) with a compact level index per
    effect (``i<e>``, INTEGER) and per cluster set (``g<c>``; a set of two columns is their
    intersection), the design columns z<j> and the ``keep`` columns, numbered as
    :func:`effect_levels_sql` numbers them."""
    levels, columns, joins = [], [], []
    for name, keys, missing in ([(f"i{e}", k, False) for e, k in enumerate(effects)]
                                + [(f"g{c}", k, True) for c, k in enumerate(clusters)]):
        table = f"l_{name}"
        cols = ", ".join(keys)
        present = "true" if missing else keys_present(keys)
        levels.append(f", {table} AS (SELECT {cols}, CAST(row_number() OVER (ORDER BY {cols}) - 1 AS INTEGER) AS i "
                      f"FROM (SELECT DISTINCT {cols} FROM design WHERE {present}) AS d)")
        equal = " IS NOT DISTINCT FROM " if missing else " = "
        joins.append(f" JOIN {table} ON " + " AND ".join(f"used.{k}{equal}{table}.{k}" for k in keys))
        columns.append(f"{table}.i AS {name}")
    columns += [f"used.{_z(j)}" for j in range(q)] + [f"used.{k}" for k in keep]
    return render("effect_rows", rows=rows, valid=valid, levels="".join(levels), columns=", ".join(columns),
                  joins="".join(joins))


def valid_predicate(q: int, differenced: bool, step: int, weighted: bool = False) -> str:
    """A unit, all design columns finite (and, for differences, the previous row the unit's
    previous period). z * 0 is 0 for a finite z and NaN for an infinite or NaN one (NULL
    stays NULL), so one comparison tests every column: cheaper than one isfinite() per column."""
    terms = ["k_unit IS NOT NULL", "(" + " + ".join(f"{_z(j)} * 0" for j in range(q)) + ") = 0"]
    if weighted:  # rows of weight 0 are left out (and counted: row_counts_sql)
        terms.append("k_w > 0")
    if differenced:
        terms.insert(0, f"k_prev_unit = k_unit AND k_prev = k_period - {int(step)}")
    return " AND ".join(terms)


def _moment_aggregates(q: int, total: str, weighted: bool = False) -> list[str]:
    """n (rows), sums s_j and products p_j_l; ``weighted``: every sum carries the row's
    weight k_w, and nw is the weight total (what the algebra uses where it counts rows)."""
    w = "k_w * " if weighted else ""
    aggs = ["count(*) AS n"] + ([f"{total}(k_w) AS nw"] if weighted else [])
    aggs += [f"{total}({w}{_z(j)}) AS s{j}" for j in range(q)]
    aggs += [f"{total}({w}{_z(j)} * {_z(l)}) AS p{j}_{l}" for j in range(q) for l in range(j, q)]
    return aggs


def unit_moments_sql(used: str, q: int, total: str = "sum", weighted: bool = False) -> str:
    """Per-unit n, sums s_j and products p_j_l (j <= l) of the q design columns.

    ``total`` is ``sum``, or ``fsum`` (compensated, order-independent) when the query
    runs on several threads and the result must not depend on their timing.
    """
    aggs = _moment_aggregates(q, total, weighted) + ["min(k_period) AS t_lo", "max(k_period) AS t_hi"]
    return render("unit_moments", rows=f"({used})", aggregates=", ".join(aggs))


def pooled_moments_sql(used: str, q: int, total: str = "sum", weighted: bool = False) -> str:
    aggs = _moment_aggregates(q, total, weighted) + ["count(DISTINCT k_unit) AS n_units", "min(k_period) AS t_min",
                                           "max(k_period) AS t_max"]
    return render("pooled_moments", rows=f"({used})", aggregates=", ".join(aggs))


def period_moments_sql(used: str, q: int, total: str = "sum", weighted: bool = False) -> str:
    aggs = _moment_aggregates(q, total, weighted) + ["count(DISTINCT k_unit) AS n_units"]
    return render("period_moments", rows=used, aggregates=", ".join(aggs))


def _p(j: int, l: int) -> str:
    return f"p{min(j, l)}_{max(j, l)}"


def _w(j: int, l: int) -> str:
    return f"w{min(j, l)}_{max(j, l)}"


def transformed_entry(j: int, l: int, q: int, mode: str, count: str = "n") -> str:
    """SQL for entry (j, l) of a unit's transformed cross-product over (regressors,
    [constant], outcome), from its moments n, s_*, p_*_* (see moments.py); ``count`` is
    the unit's row count ``n``, or its weight total ``nw`` in a weighted fit (weighted
    unit means: S - s s'/nw with weighted sums)."""
    if mode == "within":
        return f"({_p(j, l)} - s{j} * s{l} / {count})"
    if mode == "plain":
        return _p(j, l)
    const = q - 1  # index of the constant in the intercept layout; the outcome follows it

    def col(i: int) -> int | None:  # design column behind layout index i (None: constant)
        return None if i == const else (q - 1 if i == q else i)

    a, b = col(j), col(l)
    if a is None and b is None:
        return count
    if a is None or b is None:
        return f"s{a if b is None else b}"
    return _p(a, b)


def unit_pass_sql(units: str, q: int, mode: str, expand: bool, total: str = "sum", weighted: bool = False) -> str:
    """Sums over units of the transformed cross-products and, with ``expand``, of the
    products that give the unit-cluster meat for any coefficient vector (moments.py)."""
    dim = q + (1 if mode == "constant" else 0)
    k = dim - 1
    keep = "n > 1" if mode == "within" else "n > 0"
    count = "nw" if weighted else "n"
    entries = ["t_lo", "t_hi"] + [f"{transformed_entry(j, l, q, mode, count)} AS {_w(j, l)}" for j in range(dim) for l in range(j, dim)]
    entries += [f"p{j}_{j} AS raw{j}" for j in range(q)]
    sums = [f"{total}({_w(j, l)}) AS {_w(j, l)}" for j in range(dim) for l in range(j, dim)]
    sums += [f"{total}(raw{j}) AS r{j}" for j in range(q)]
    residuals = ""
    if expand:
        residuals = ", " + ", ".join(
            f"{_w(j, k)} - (" + " + ".join(f"$q{l} * {_w(j, l)}" for l in range(k)) + f") AS e{j}" for j in range(k)
        )
        pairs = [(a, b) for a in range(k) for b in range(a, k)]
        sums += [f"{total}(e{j} * e{m}) AS rr{j}_{m}" for j in range(k) for m in range(j, k)]
        sums += [f"{total}(e{j} * {_w(a, b)}) AS rb{j}_{a}_{b}" for j in range(k) for a, b in pairs]
        sums += [f"{total}({_w(*pairs[u])} * {_w(*pairs[v])}) AS bb{u}_{v}" for u in range(len(pairs)) for v in range(u, len(pairs))]
    sums += [f"min(t_lo) FILTER (WHERE {keep}) AS t_min", f"max(t_hi) FILTER (WHERE {keep}) AS t_max"]
    return render("unit_pass", units=f"({units})", entries=", ".join(entries), residuals=residuals,
                  keep=keep, sums=", ".join(sums))


def stream_rows_sql(used: str, q: int) -> str:
    """The used rows' unit, period and design columns, in storage order (for the numpy fold)."""
    return f"SELECT k_unit, k_period, {', '.join(_z(j) for j in range(q))} FROM ({used}) AS r"


def row_counts_sql(rows: str, q: int, differenced: bool, step: int, dialect: Dialect = DUCKDB,
                   required: Sequence[str] = (), weighted: bool = False) -> str:
    """Rows by reason; ``required``: key columns (absorbed effects') whose missing value drops a row."""
    finite = " AND ".join([f"{dialect.is_finite(_z(j))}" for j in range(q)] + [f"{k} IS NOT NULL" for k in required])
    usable = f"k_prev_unit = k_unit AND k_prev = k_period - {int(step)} AND " if differenced else ""
    counts = ["count(*) AS n_rows",
              f"count(*) FILTER (WHERE k_unit IS NULL OR ({usable}NOT coalesce({finite}, false))) AS missing"]
    if weighted:  # usable rows (or differences) whose weight is 0
        counts.append(f"count(*) FILTER (WHERE k_unit IS NOT NULL AND {usable}coalesce({finite}, false) AND k_w = 0) AS zero_weight")
    if differenced:  # rows without a unit are counted as missing above, and only there
        counts += [
            "count(*) FILTER (WHERE k_unit IS NOT NULL AND k_prev IS NULL) AS first_of_unit",
            f"count(*) FILTER (WHERE k_unit IS NOT NULL AND k_prev < k_period - {int(step)}) AS after_gap",
            "count(*) FILTER (WHERE k_unit IS NOT NULL AND k_prev = k_period) AS duplicate_keys",
        ]
    return render("row_counts", rows=f"({rows})", counts=", ".join(counts))


def period_bounds_sql(source: str, period: str, period_sql: str | None = None, dialect: Dialect = DUCKDB) -> str:
    p = period_sql or quote_ident(period, dialect)
    return f"SELECT min({p}) AS lo, max({p}) AS hi FROM {source} AS src"


def count_rows_sql(source: str) -> str:
    return f"SELECT count(*) AS n FROM {source} AS src"


def period_join_sql(n_periods: int, k: int) -> str:
    """LEFT JOIN to a VALUES list of period effects: period $t_i, effect $g_i and the
    projection of each regressor on the period indicators $G_i_j (base period absent: 0)."""
    if n_periods == 0:
        return ""
    rows = ", ".join("(" + ", ".join([f"$t{i}", f"$g{i}"] + [f"$G{i}_{j}" for j in range(k)]) + ")" for i in range(n_periods))
    names = ", ".join(["k_period", "g"] + [f"G{j}" for j in range(k)])
    return f"LEFT JOIN (VALUES {rows}) AS pe({names}) ON r.k_period = pe.k_period"


def adjusted_columns(q: int, intercept: bool, periods: bool, weighted: bool = False, dialect: Dialect = DUCKDB) -> str:
    """a_j = z_j - Gamma_t,j (regressor net of its period-effect projection) and the raw
    residual e = y - x'b - gamma_t - b_one, from shifted design columns."""
    k = q - 1
    cols = [f"r.{_z(j)} - coalesce(pe.G{j}, 0) AS a{j}" if periods else f"r.{_z(j)} AS a{j}" for j in range(k)]
    resid = f"r.{_z(k)}" + "".join(f" - $b{j} * r.{_z(j)}" for j in range(k))
    if periods:
        resid += " - coalesce(pe.g, 0)"
    if intercept:
        cols.append(f"{dialect.one} AS a_one")
        resid += " - $b_one"
    if weighted:
        cols.append("r.k_w AS k_w")
    return ", ".join(cols) + f", {resid} AS e"


def _a_names(q: int, intercept: bool) -> list[str]:
    return [f"a{j}" for j in range(q - 1)] + (["a_one"] if intercept else [])


def centered_ctes(used: str, q: int, intercept: bool, demean: bool, n_periods: int, n_clusters: int,
                  total: str = DUCKDB.compensated, weighted: bool = False, dialect: Dialect = DUCKDB) -> str:
    """CTEs ending in ``centered``: per row x~_j AS x_j and u~ AS u (unit-demeaned under
    within, after removing period effects), with the unit and cluster keys. ``weighted``:
    weighted unit means, and u~ carries the row's weight (u = w u~), so that sums of
    x u and u u x x are the weighted scores and the HC1 meat sum w^2 u~^2 x~ x~'."""
    keys = ["k_unit", "k_period"] + [f"k_c{i}" for i in range(n_clusters)]
    names = _a_names(q, intercept)
    adjusted = (f"adjusted AS (SELECT {', '.join('r.' + k for k in keys)}, "
                f"{adjusted_columns(q, intercept, n_periods > 0, weighted, dialect)} FROM used AS r {period_join_sql(n_periods, q - 1)})")
    parts = [f"used AS ({used})", adjusted]
    w, count, u = ("k_w * ", f"{total}(k_w)", "k_w * ") if weighted else ("", "count(*)", "")
    if demean:
        means = ", ".join(f"{total}({w}{a}) / {count} AS m_{a}" for a in names)
        parts.append(f"means AS (SELECT k_unit, {means}, {total}({w}e) / {count} AS m_e FROM adjusted "
                     "GROUP BY k_unit HAVING count(*) > 1)")
        xs = ", ".join(f"{a} - m_{a} AS x{i}" for i, a in enumerate(names))
        parts.append(f"centered AS (SELECT {', '.join(keys)}, {xs}, {u}(e - m_e) AS u FROM adjusted JOIN means USING (k_unit))")
    else:
        xs = ", ".join(f"{a} AS x{i}" for i, a in enumerate(names))
        parts.append(f"centered AS (SELECT {', '.join(keys)}, {xs}, {u}e AS u FROM adjusted)")
    return ",\n".join(parts)


def used_rows_sql(rows: str, valid: str) -> str:
    return f"SELECT * FROM ({rows}) AS r WHERE {valid}"


def cluster_scores_sql(used: str, q: int, intercept: bool, demean: bool, n_periods: int, n_clusters: int, dialect: Dialect = DUCKDB,
                       weighted: bool = False) -> str:
    """Meat for each cluster set (one-way: c0; two-way: c0, c1 and their intersection).

    It runs over all rows on several threads, so every sum is compensated (``fsum``):
    plain sums would change in the last digits with the threads' timing.
    """
    k = q - 1 + (1 if intercept else 0)
    scores = ", ".join(f"{dialect.compensated}(x{i} * u) AS g{i}" for i in range(k))
    outer = ", ".join(f"{dialect.compensated}(g{i} * g{j}) AS o{i}_{j}" for i in range(k) for j in range(i, k))
    if n_clusters == 1:
        sets, key = "GROUPING SETS ((k_c0))", f"{dialect.grouping(['k_c0'])} AS gid"
    else:
        sets, key = "GROUPING SETS ((k_c0), (k_c1), (k_c0, k_c1))", f"{dialect.grouping(['k_c0', 'k_c1'])} AS gid"
    centered = centered_ctes(used, q, intercept, demean, n_periods, n_clusters, dialect.compensated,
                             weighted=weighted, dialect=dialect)
    return render("cluster_scores", centered=centered, sets_key=key, sets=sets, scores=scores, outer=outer)


def residual_moments_sql(used: str, q: int, intercept: bool, demean: bool, n_periods: int, dialect: Dialect = DUCKDB,
                         weighted: bool = False) -> str:
    k = q - 1 + (1 if intercept else 0)
    sums = ", ".join(f"{dialect.compensated}(u * u * x{i} * x{j}) AS h{i}_{j}" for i in range(k) for j in range(i, k))
    centered = centered_ctes(used, q, intercept, demean, n_periods, 0, dialect.compensated, weighted=weighted, dialect=dialect)
    return render("residual_moments", centered=centered, sums=sums)


def unit_scores_sql(used: str, q: int, intercept: bool, demean: bool, n_periods: int, by_unit: bool, total: str,
                    weighted: bool = False, dialect: Dialect = DUCKDB) -> str:
    """Cluster scores from per-unit sums (clusters that are units or unions of units);
    ``weighted``: sums carry the row's weight (a unit's score sum w a e - (sum w a)(sum w e)/sum w)."""
    names = _a_names(q, intercept)
    k = len(names)
    w = "k_w * " if weighted else ""
    unit_sums = ", ".join(f"{total}({w}{a} * e) AS ae{i}, {total}({w}{a}) AS sa{i}" for i, a in enumerate(names))
    if weighted:
        unit_sums += f", {total}(k_w) AS nw"
    if demean:
        count = "nw" if weighted else "n"
        scores = ", ".join(f"ae{i} - sa{i} * se / {count} AS e{i}" for i in range(k))
    else:
        scores = ", ".join(f"ae{i} AS e{i}" for i in range(k))
    outer = ", ".join(f"{total}(e{i} * e{j}) AS o{i}_{j}" for i in range(k) for j in range(i, k))
    if by_unit:
        final = f"SELECT count(*) AS n_groups, {outer} FROM scores"
        pick = "k_unit"
    else:
        summed = ", ".join(f"{total}(e{i}) AS e{i}" for i in range(k))
        final = f"SELECT CAST(g AS {dialect.text_type}) AS g, {summed} FROM scores GROUP BY g ORDER BY g"
        pick = "min(k_c0)"
    adjusted = adjusted_columns(q, intercept, n_periods > 0, weighted, dialect)
    if not by_unit:
        adjusted = "r.k_c0, " + adjusted
    return render("unit_scores", used=used, adjusted=adjusted, period_join=period_join_sql(n_periods, q - 1),
                  pick=pick, sum_e=f"{total}({w}e)", unit_sums=unit_sums, scores=scores, final=final,
                  keep="n > 1" if demean else "true")


def unit_size_pass_sql(units: str, q: int, total: str = "sum") -> str:
    """Within and between cross-products, sums and raw squares of the q design columns,
    summed over the units of each size (``unit_size_pass.sql``)."""
    pairs = [(j, l) for j in range(q) for l in range(j, q)]
    sums = [f"{total}({_p(j, l)} - s{j} * s{l} / n) AS {_w(j, l)}" for j, l in pairs]
    sums += [f"{total}(s{j} * s{l} / n) AS b{j}_{l}" for j, l in pairs]
    sums += [f"{total}(s{j}) AS m{j}" for j in range(q)] + [f"{total}(p{j}_{j}) AS r{j}" for j in range(q)]
    return render("unit_size_pass", units=f"({units})", sums=", ".join(sums))


UNIT_MEAN_MODES = ("between", "random", "means")  # score sets of unit_mean_scores.sql


def unit_mean_scores_sql(used: str, q: int, modes: Sequence[str], total: str = "sum") -> str:
    """Outer sums over units of the unit scores of each set ``modes[m]`` (parameters
    ``$b<m>_j``, ``$a<m>``, ``$g<m>_j``; ``$re_e``, ``$re_u``):

    - ``between``: columns (unit means of the regressors, 1) times the unit's mean residual;
    - ``random``: the quasi-demeaned regression's score, sum_t (z_t - theta zbar)(u_t - theta ubar)
      = sum z u - lam n zbar ubar over (regressors, constant);
    - ``means``: the same with the unit means of the regressors as more columns
      (regressors, means, constant), the correlated random-effects regression.
    """
    k = q - 1
    y = _z(k)
    residuals = [f"{y}" + "".join(f" - $b{m}_{j} * {_z(j)}" for j in range(k)) + f" AS e{m}" for m in range(len(modes))]
    unit_sums = ["count(*) AS n"] + [f"{total}({_z(j)}) AS sx{j}" for j in range(k)]
    weights = ["1 - $re_e / (n * $re_u + $re_e) AS lam"]
    scores, outer = [], []
    for m, mode in enumerate(modes):
        if mode not in UNIT_MEAN_MODES:
            raise ValueError(mode)
        unit_sums += [f"{total}({_z(j)} * e{m}) AS xe{m}_{j}" for j in range(k)] + [f"{total}(e{m}) AS se{m}"]
        fitted = "".join(f" + $g{m}_{j} * sx{j} / n" for j in range(k)) if mode == "means" else ""
        weights.append(f"se{m} / n - $a{m}{fitted.replace(' + ', ' - ')} AS ub{m}")
        if mode == "between":
            cols = [f"sx{j} / n * ub{m}" for j in range(k)] + [f"ub{m}"]
        else:
            level = f"($a{m}{fitted})"
            cols = [f"xe{m}_{j} - sx{j} * {level} - lam * sx{j} * ub{m}" for j in range(k)]
            if mode == "means":
                cols += [f"(1 - lam) * sx{j} * ub{m}" for j in range(k)]
            cols.append(f"(1 - lam) * n * ub{m}")
        scores += [f"{c} AS f{m}_{i}" for i, c in enumerate(cols)]
        outer += [f"{total}(f{m}_{i} * f{m}_{l}) AS o{m}_{i}_{l}" for i in range(len(cols)) for l in range(i, len(cols))]
    return render("unit_mean_scores", used=used, residuals=", ".join(residuals), unit_sums=", ".join(unit_sums),
                  weights=", ".join(weights), scores=", ".join(scores), outer=", ".join(outer))


SERIAL_SUMS = ("n", "a", "b", "c", "d", "ee")  # per unit: count, sum l, sum l*l, sum e, sum l*e, sum e*e


def serial_pass_sql(used: str, k: int, step: int, intercept: bool, n_periods: int, within: bool, total: str = "sum") -> str:
    """The serial-correlation test's sums (``serial_pass.sql``) from the used rows in levels
    (k regressors, outcome last): one window per unit over the level residual, whatever
    the number of terms. Period terms: within with unit and period effects subtracts the
    effect $g_i of period $t_i from the level residual; first differences subtract the
    differenced equation's intercept ``$b_one`` or its period intercepts from e and l."""
    step = int(step)
    level = f"r.{_z(k)}" + "".join(f" - $b{j} * r.{_z(j)}" for j in range(k))
    values = ", ".join(f"($t{i}, $g{i})" for i in range(n_periods))
    level_join = joins = ""
    current, previous = "r.r - r.r1", "r.r1 - r.r2"
    if n_periods and within:
        level += " - coalesce(pe.g, 0)"
        level_join = f"LEFT JOIN (VALUES {values}) AS pe(k_period, g) ON r.k_period = pe.k_period"
    elif n_periods:
        joins = " ".join(f"LEFT JOIN (VALUES {values}) AS pe{a}(k_period, g) ON r.k_period - {a * step} = pe{a}.k_period"
                         for a in range(2))
        current, previous = current + " - coalesce(pe0.g, 0)", previous + " - coalesce(pe1.g, 0)"
    elif intercept:
        current, previous = current + " - $b_one", previous + " - $b_one"
    sums = {"n": "count(*)", "a": f"{total}(l)", "b": f"{total}(l * l)", "c": f"{total}(e)", "d": f"{total}(l * e)",
            "ee": f"{total}(e * e)"}
    per_unit = ", ".join(f"{v} AS {name}" for name, v in sums.items())
    names = list(SERIAL_SUMS)
    outer = [f"{total}({a}) AS t_{a}" for a in names]
    outer += [f"{total}({a} * {b}) AS x_{a}_{b}" for i, a in enumerate(names[:-1]) for b in names[i:-1]]
    return render("serial_pass", used=used, level=level, level_join=level_join,
                  window="PARTITION BY k_unit ORDER BY k_period", step=str(step), current=current, previous=previous,
                  joins=joins, per_unit=per_unit, outer=", ".join(outer))


def twoway_pass_sql(used: str, q: int, first: int, last: int, total: str = "sum", dialect: Dialect = DUCKDB) -> str:
    """Unit + period effects in one pass: per-unit totals, presence patterns, period sums.

    A unit's presence pattern is a text of 0s and 1s, one per period from ``first`` to
    ``last``: DuckDB's ``bitstring_agg``; elsewhere the set of the unit's periods written
    out as that text. The three kinds of rows are united by position, every column listed."""
    moments = ", ".join(_moment_aggregates(q, total) + ["min(k_period) AS t_lo", "max(k_period) AS t_hi"])
    totals = unit_pass_sql("SELECT * FROM unit_rows", q, "within", False, total)
    means = ", ".join(f"{total}(s{j} / n) AS m{j}" for j in range(q))
    sums = ", ".join(f"s{j}" for j in range(q))
    pattern_agg, pattern_text = dialect.presence(first, last)
    dim = q
    kinds = {
        "total": ["n_units", "n_obs", "singletons", "singleton_rows"]
                 + [_w(j, l) for j in range(dim) for l in range(j, dim)] + [f"r{j}" for j in range(q)] + ["t_min", "t_max"],
        "pattern": ["pattern", "pattern_units", "inv_n"] + [f"m{j}" for j in range(q)],
        "period": ["period", "period_n"] + [f"s{j}" for j in range(q)],
    }
    every = [c for cols in kinds.values() for c in cols]

    def listed(kind: str) -> str:
        return ", ".join(c if c in kinds[kind] else f"NULL AS {c}" for c in every)

    return render("twoway_pass", used=used, moments=moments, materialized=dialect.materialized, pattern_agg=pattern_agg,
                  totals=totals, pattern_text=pattern_text, one=dialect.one, means=means, sums=sums,
                  total_columns=listed("total"), pattern_columns=listed("pattern"), period_columns=listed("period"))


def nesting_sql(used: str, column: int) -> str:
    """Units whose rows carry more than one value of cluster column k_c{column}."""
    return (f"SELECT count(*) AS mixed FROM (SELECT k_unit FROM ({used}) AS r GROUP BY k_unit "
            f"HAVING count(DISTINCT k_c{int(column)}) > 1) AS m")


def indicator_sql(expr: str, level: str, dialect: Dialect = DUCKDB) -> str:
    """1.0 where ``expr`` (as text) equals ``level``, 0.0 elsewhere, NULL where it is NULL."""
    return f"CAST(CAST(({expr}) AS {dialect.text_type}) = {quote_literal(level, dialect)} AS DOUBLE)"


def distinct_values_sql(source: str, expr: str, limit: int, dialect: Dialect = DUCKDB) -> str:
    return f"SELECT DISTINCT CAST(({expr}) AS {dialect.text_type}) AS v FROM {source} AS src WHERE ({expr}) IS NOT NULL ORDER BY v LIMIT {int(limit)}"


def demeaned_rows_sql(used: str, q: int, n_clusters: int, weighted: bool = False) -> str:
    """Used rows with every design column minus its unit mean (two passes: the means
    are a GROUP BY joined back), for data whose unit means dwarf their spread;
    ``weighted``: weighted unit means."""
    keys = "k_unit, k_period" + "".join(f", k_c{i}" for i in range(n_clusters)) + (", k_w" if weighted else "")
    if weighted:
        cols = ", ".join(f"{_z(j)} - sum(k_w * {_z(j)}) OVER (PARTITION BY k_unit) / sum(k_w) OVER (PARTITION BY k_unit) "
                         f"AS {_z(j)}" for j in range(q))
    else:
        cols = ", ".join(f"{_z(j)} - avg({_z(j)}) OVER (PARTITION BY k_unit) AS {_z(j)}" for j in range(q))
    return f"SELECT {keys}, {cols} FROM ({used}) AS r"


def probe_sql(rows: str, q: int, dialect: Dialect = DUCKDB, weighted: bool = False) -> str:
    """Means and largest magnitudes of the finite values of the design columns over ``rows``
    (built on the source's first rows): the shift subtracted and the scale multiplied by
    before accumulating. ``weighted``: weighted means over the rows of positive weight."""
    if weighted:
        def mean(j):
            keep = f"{dialect.is_finite(_z(j))} AND k_w > 0"
            return f"sum(k_w * {_z(j)}) FILTER (WHERE {keep}) / sum(k_w) FILTER (WHERE {keep})"
    else:
        def mean(j):
            return f"avg({_z(j)}) FILTER (WHERE {dialect.is_finite(_z(j))})"
    means = ", ".join(f"{mean(j)} AS a{j}, "
                      f"max(abs({_z(j)})) FILTER (WHERE {dialect.is_finite(_z(j))}) AS m{j}" for j in range(q))
    return f"SELECT {means} FROM ({rows}) AS head"


def head_sql(source: str, limit: int) -> str:
    return f"(SELECT * FROM {source} AS src LIMIT {int(limit)})"


# ---------------------------------------------------------------- checkup queries
# The scans of bigpanel.panel (sql/checkup_*.sql). Checked columns are numbered j by
# their place in ``checked``; ``numeric`` lists the j of the numeric ones, which arrive
# shifted by $c_{j}.


def period_value(period: str, kind: str, dialect: Dialect = DUCKDB) -> str:
    """The period as the scans see it: timestamps of every precision and zone as TIMESTAMP."""
    quoted = quote_ident(period, dialect)
    return f"CAST({quoted} AS TIMESTAMP)" if kind == "timestamp" else quoted


def checkup_shift_probe_sql(source_sql: str, checked: Sequence[str], numeric: Sequence[int],
                            dialect: Dialect = DUCKDB) -> str:
    """SQL of the shift probe: for each index j (into ``checked``) in ``numeric``, the mean c_j
    and the largest magnitude m_j of the finite values."""
    means = []
    for j in numeric:
        raw = f"CAST({quote_ident(checked[j], dialect)} AS DOUBLE)"
        finite = dialect.is_finite(raw)
        means += [f"{dialect.mean}({raw}) FILTER (WHERE {finite}) AS c_{j}",
                  f"max(abs({raw})) FILTER (WHERE {finite}) AS m_{j}"]
    return render("checkup_shifts", source=source_sql, means=", ".join(means))


def _shifted(name: str, j: int, dialect: Dialect = DUCKDB) -> str:
    """Column j shifted by $c_j and scaled by $d_j (a power of two); NULL unless finite."""
    raw = f"CAST({quote_ident(name, dialect)} AS DOUBLE)"
    return f"(CASE WHEN {dialect.is_finite(raw)} THEN ({raw} - $c_{j}) * $d_{j} END)"


def rows_without_unit_sql(source_sql: str, unit: str) -> str:
    """The rows of ``source_sql`` with no unit (they fall outside every unit-range chunk)."""
    return f"(SELECT * FROM {source_sql} AS src WHERE {quote_ident(unit)} IS NULL)"


def checkup_period_scan_sql(source_sql: str, unit: str, period_value: str, checked: Sequence[str],
                            numeric: Sequence[int], dialect: Dialect = DUCKDB) -> str:
    """SQL of the period scan. Column j's aggregates are n_j (values present; for j in
    ``numeric``, indices into ``checked``, finite values) and, for numeric columns, nf_j (NaN
    and infinite values), the shifted and scaled mean_j and ss_j, and the raw min_j, max_j."""
    parts = []
    for j, name in enumerate(checked):
        q = quote_ident(name, dialect)
        if j not in numeric:
            parts.append(f"count({q}) AS n_{j}")
            continue
        v, raw = _shifted(name, j, dialect), f"CAST({q} AS DOUBLE)"
        finite = f"FILTER (WHERE {dialect.is_finite(raw)})"
        parts += [f"count({v}) AS n_{j}", f"count({q}) FILTER (WHERE NOT {dialect.is_finite(raw)}) AS nf_{j}",
                  f"{dialect.mean}({v}) AS mean_{j}", f"regr_sxx({v}, {v}) AS ss_{j}",
                  f"min({raw}) {finite} AS min_{j}", f"max({raw}) {finite} AS max_{j}"]
    return render(
        "checkup_periods",
        source=source_sql,
        period=period_value,
        unit=quote_ident(unit, dialect),
        column_aggregates="".join(",\n       " + p for p in parts),
    )


def slot_expression(period_value: str, mode: str, dialect: Dialect = DUCKDB) -> str:
    """The period's slot on the grid; ``$first`` is the first period's ordinal, ``$step`` the step."""
    ordinal = dialect.ordinal(period_value, mode)
    if isinstance(dialect, SparkDialect):  # no // there; DuckDB's text (PostgreSQL's source) stays as it was
        return f"CAST({dialect.whole_division(f'{ordinal} - $first', '$step')} AS BIGINT)"
    return f"CAST(({ordinal} - $first) // $step AS BIGINT)"


def period_slot_sql(period: str, kind: str, mode: str, first: int, step: int, dialect: Dialect = DUCKDB) -> str:
    """The period column as its slot on a regular grid (0, 1, 2, ... one per step), with
    the grid's first ordinal and step written as literals (whole numbers the fit found)."""
    ordinal = dialect.ordinal(period_value(period, kind, dialect), mode)
    return f"CAST({dialect.whole_division(f'{ordinal} - ({int(first)})', str(int(step)))} AS BIGINT)"


def distinct_periods_sql(source: str, period: str, kind: str, limit: int, dialect: Dialect = DUCKDB) -> str:
    """The distinct non-null periods (timestamps as TIMESTAMP), at most ``limit``."""
    value = period_value(period, kind, dialect)
    return f"SELECT DISTINCT {value} AS period_value FROM {source} AS src WHERE {value} IS NOT NULL LIMIT {int(limit)}"


def checkup_unit_scan_sql(source_sql: str, unit: str, period_value: str, checked: Sequence[str],
                          numeric: Sequence[int], mode: str, bitmap: bool, dialect: Dialect = DUCKDB) -> str:
    """SQL of the unit scan; each j in ``numeric`` (indices into ``checked``) gives
    within_ss_j and varying_units_j. On PostgreSQL and Spark (no bitstring_agg, no histogram)
    distinct periods are counted with count(DISTINCT) and the histogram comes as
    [n_periods, units] pairs (PostgreSQL flattens them: ``panel.histogram_pairs`` reads
    every form)."""
    bitmap = bitmap and dialect.name == "duckdb"
    pairs = "collect_list(array(n_periods, n_units))" if dialect.name == "spark" else "array_agg(ARRAY[n_periods, n_units])"
    periods = "histogram(n_periods)" if dialect.name == "duckdb" else (
        f"(SELECT {pairs} FROM "
        "(SELECT n_periods, count(*) AS n_units FROM per_unit GROUP BY n_periods) AS h)")
    values = [f"{_shifted(checked[j], j, dialect)} AS v_{j}" for j in numeric]
    per_unit = [f"regr_sxx(v_{j}, v_{j}) AS ss_{j}" for j in numeric]
    totals = [f"{dialect.compensated}(ss_{j}) AS within_ss_{j},\n       count(*) FILTER (WHERE ss_{j} > 0) AS varying_units_{j}"
              for j in numeric]
    return render(
        "checkup_units",
        source=source_sql,
        unit=quote_ident(unit, dialect),
        period=period_value,
        slot=slot_expression(period_value, mode, dialect),
        distinct_slots="bit_count(bitstring_agg(slot, 0, $last_slot))" if bitmap else "count(DISTINCT slot)",
        column_values="".join(", " + v for v in values),
        unit_aggregates="".join(",\n           " + a for a in per_unit),
        column_totals="".join(",\n       " + t for t in totals),
        periods_per_unit=periods,
    )


def checkup_duplicate_scan_sql(source_sql: str, unit: str, period_value: str, dialect: Dialect = DUCKDB) -> str:
    return render("checkup_duplicates", source=source_sql, unit=quote_ident(unit, dialect), period=period_value)


DUPLICATE_PROBE_WORDS = 4  # 64-bit words of the duplicate probe's per-unit period set: grids up to 256 slots


def duplicate_probe_sql(source_sql: str, unit: str, period: str, slot: str, n_slots: int) -> str:
    """The number of units holding more rows than distinct periods (DuckDB): each unit's
    set of period slots (``slot``: 0 to ``n_slots`` - 1, at most 64 * DUPLICATE_PROBE_WORDS)
    as bits OR-ed into 64-bit words, counted against its rows. One GROUP BY over units
    with one bit operation per row: a few times cheaper than grouping by unit and period
    (``checkup_duplicates.sql``), which then runs only when this finds a duplicate."""
    words = []
    for w in range(-(-int(n_slots) // 64)):
        low = 64 * w
        words.append(f"coalesce(bit_count(bit_or(CASE WHEN slot >= {low} AND slot < {low + 64} "
                     f"THEN CAST(1 AS UBIGINT) << CAST(slot - {low} AS UBIGINT) END)), 0)")
    u, p = quote_ident(unit), quote_ident(period)
    return (f"SELECT count(*) FILTER (WHERE n > periods) AS units_with_duplicates FROM ("
            f"SELECT count(*) AS n, {' + '.join(words)} AS periods FROM ("
            f"SELECT {u} AS k_unit, {slot} AS slot FROM {source_sql} AS src WHERE {u} IS NOT NULL AND {p} IS NOT NULL) "
            "AS keyed GROUP BY k_unit) AS per_unit")


# ---------------------------------------------------------------- shared scans (fit_many)
# Many models on one source: the union of their columns z0..z{Q-1}; sample s is the rows
# where its columns (``samples[s]``, indices into the union) are all finite.


def _finite(cols: Sequence[int]) -> str:
    return "coalesce((" + " + ".join(f"{_z(j)} * 0" for j in cols) + ") = 0, false)"


def _pair(step: int) -> str:
    return f"coalesce(k_prev_unit = k_unit AND k_prev = k_period - {int(step)}, false)"


PATTERN_BITS = 60  # samples per pattern word (BIGINT)


def pattern_words(n_samples: int) -> int:
    return max(1, -(-n_samples // PATTERN_BITS))


def pattern_keys(n_samples: int) -> list[str]:
    """The columns of a row's pattern: why, pat0, pat1, ..."""
    return ["why"] + [f"pat{t}" for t in range(pattern_words(n_samples))]


def pattern_items(samples: Sequence[Sequence[int]], differenced: bool, step: int) -> list[str]:
    """why (0 usable; differences: 1 first row of the unit, 2 after a gap, 3 duplicate key,
    4 other) and pat{t}: bit s % PATTERN_BITS of word s // PATTERN_BITS set when sample s's
    columns are all finite."""
    if differenced:
        why = (f"CASE WHEN {_pair(step)} THEN 0 WHEN k_prev IS NULL THEN 1 WHEN k_prev < k_period - {int(step)} THEN 2 "
               "WHEN k_prev = k_period THEN 3 ELSE 4 END AS why")
    else:
        why = "0 AS why"
    words = []
    for t in range(pattern_words(len(samples))):
        bits = [f"CASE WHEN {_finite(cols)} THEN CAST({1 << (s % PATTERN_BITS)} AS BIGINT) ELSE CAST(0 AS BIGINT) END"
                for s, cols in enumerate(samples) if s // PATTERN_BITS == t]
        words.append(f"({' + '.join(bits)}) AS pat{t}")
    return [why] + words


def sample_pairs(samples: Sequence[Sequence[int]]) -> list[tuple[int, int]]:
    """The union's column pairs (j <= l) that some sample holds both of, in order."""
    pairs = {(j, l) for cols in samples for a, j in enumerate(sorted(cols)) for l in sorted(cols)[a:]}
    return sorted(pairs)


def shared_moments_sql(rows: str, samples: Sequence[Sequence[int]], differenced: bool, step: int,
                       nesting: Sequence[tuple[int, int]] = (), total: str = DUCKDB.compensated,
                       dialect: Dialect = DUCKDB) -> str:
    """Cross-products of every sample in one scan, summed once per unit and row pattern
    (``shared_moments.sql``); ``nesting`` lists (sample, cluster position) pairs whose
    clusters are checked to hold whole units; ``total`` is the sum function (compensated
    unless the query is one of several one-thread chunks). :func:`bigpanel.plan.pattern_totals`
    reads the result."""
    used = sorted({j for cols in samples for j in cols})
    pairs = sample_pairs(samples)
    clusters = sorted({int(c) for _, c in nesting})
    keys = pattern_keys(len(samples))
    cell = ["count(*) AS n", "min(k_period) AS lo", "max(k_period) AS hi"]
    cell += [f"min(k_c{c}) AS cmin{c}, max(k_c{c}) AS cmax{c}" for c in clusters]
    cell += [f"{total}({_z(j)}) AS s{j}" for j in used]
    cell += [f"{total}({_z(j)} * {_z(l)}) AS p{j}_{l}" for j, l in pairs]
    per_sample = ["sum(n) AS n", "min(lo) AS lo", "max(hi) AS hi"]
    per_sample += [f"min(cmin{c}) AS cmin{c}, max(cmax{c}) AS cmax{c}" for c in clusters]
    per_sample += [f"{total}(s{j}) AS s{j}" for j in used]
    per_sample += [f"{total}(p{j}_{l}) AS p{j}_{l}" for j, l in pairs]
    totals = ["count(k_unit) AS t_units", "count(*) AS t_groups", "sum(n) AS t_n", "min(lo) AS t_lo", "max(hi) AS t_hi"]
    totals += [f"sum(CASE WHEN cmin{c} <> cmax{c} THEN 1 ELSE 0 END) AS t_mixed{c}" for c in clusters]
    totals += [f"{total}(s{j}) AS t_s{j}" for j in used]
    totals += [f"{total}(p{j}_{l}) AS t_p{j}_{l}" for j, l in pairs]
    totals += [f"{total}(p{j}_{l} - s{j} * s{l} / n) AS t_w{j}_{l}" for j, l in pairs]
    counts = ["NULL AS t_units", "NULL AS t_groups", "sum(n) AS t_n", "min(lo) AS t_lo", "max(hi) AS t_hi"]
    counts += [f"NULL AS {item.rsplit(' AS ', 1)[1]}" for item in totals[5:]]
    words = pattern_words(len(samples))
    word = "c.pat0" if words == 1 else ("CASE samples.word " + " ".join(f"WHEN {t} THEN c.pat{t}" for t in range(words)) + " END")
    return render("shared_moments", rows=rows, pattern=", ".join(pattern_items(samples, differenced, step)),
                  materialized=dialect.materialized, anti_join=dialect.anti_join, semi_join=dialect.semi_join,
                  pattern_keys=", ".join(keys), cell_sums=", ".join(cell),
                  samples=", ".join(f"({s}, {s // PATTERN_BITS}, {s % PATTERN_BITS})" for s in range(len(samples))),
                  covers=f"({word} >> samples.bit) & 1 = 1", sample_sums=", ".join(per_sample),
                  totals=", ".join(totals), no_keys=", ".join(f"NULL AS {k}" for k in keys), counts=", ".join(counts))


def shared_scores_sql(rows: str, samples: Sequence[Sequence[int]], differenced: bool, step: int,
                      models: Sequence[dict], keys: Sequence[str], sets: Sequence[Sequence[str]],
                      total: str = DUCKDB.compensated, dialect: Dialect = DUCKDB) -> str:
    """Meats of many models in one scan. Each model is a dict: ``sample`` (index),
    ``x`` (union indices of its regressors), ``y`` (its outcome), ``constant``,
    ``demean`` and ``hc1`` (bools). ``sets`` are the grouping sets over ``keys`` (some of
    ``k_unit``, ``k_c0``, ...); their GROUPING() id is :func:`grouping_id`."""
    keys_of = pattern_keys(len(samples))
    used: dict[int, None] = {}
    pairs: dict[tuple[int, int], None] = {}

    def p(j: int, l: int) -> str:  # the cell's sum of z_j z_l
        pair = (min(j, l), max(j, l))
        pairs.setdefault(pair, None)
        return f"p{pair[0]}_{pair[1]}"

    def sz(j: int) -> str:
        used.setdefault(j, None)
        return f"s{j}"

    raw_sums, cell_sums, unit_sums, scores, group_sums, outer = [], [], [], [], [], []
    unit_totals, unit_means, unit_outer = [], [], []  # the per-unit path (sets of units or all rows only)
    residuals = []  # per HC1 model: its residual and its square, per row
    for m, spec in enumerate(models):
        s = spec["sample"]
        covers = f"why = 0 AND (pat{s // PATTERN_BITS} >> {s % PATTERN_BITS}) & 1 = 1"
        xs = list(spec["x"]) + ([None] if spec["constant"] else [])  # None: the constant column
        k = len(xs)
        tri = [(i, l) for i in range(k) for l in range(i, k)]
        one = f" - $one{m}" if spec["constant"] else ""

        def s_of(x):  # the cell's sum of score column x
            return "n_all" if x is None else sz(x)

        def s_times(x, z: int) -> str:  # the cell's sum of x * z_z
            return sz(z) if x is None else p(x, z)

        def s_u(x) -> str:  # the cell's sum of x * u: u = z_y - sum b_i z_i - one, summed linearly
            terms = s_times(x, spec["y"]) + "".join(f" - $b{m}_{i} * {s_times(x, j)}" for i, j in enumerate(spec["x"]))
            return terms + (f" - $one{m} * {s_of(x)}" if spec["constant"] else "")

        first_cell = len(cell_sums)

        def case(expr: str) -> str:
            return f"CASE WHEN {covers} THEN {expr} END"

        def s_xx(a, b) -> str:  # the cell's sum of x_a x_b
            if a is None or b is None:
                other = b if a is None else a
                return s_of(other)
            return p(a, b)

        cell_sums += [f"CASE WHEN {covers} THEN n_all ELSE 0 END AS n{m}", f"{case(s_u(None))} AS su{m}"]
        cell_sums += [f"{case(s_of(x))} AS sx{m}_{i}, {case(s_u(x))} AS sxu{m}_{i}" for i, x in enumerate(xs)]
        if spec["hc1"]:  # fourth moments: per row, with the model's residual (its sample's cells only are read)
            u = _z(spec["y"]) + "".join(f" - $b{m}_{i} * {_z(j)}" for i, j in enumerate(spec["x"])) + one
            residuals += [f"{u} AS ru{m}", f"({u}) * ({u}) AS ruu{m}"]  # once per row, read by every sum below
            u, uu = f"ru{m}", f"ruu{m}"
            col = [(dialect.one if x is None else _z(x)) for x in xs]
            want = (("sxxu", f" * {u}"), ("sxxuu", f" * {uu}")) if spec["demean"] else (("sxxuu", f" * {uu}"),)
            raw_sums += [f"{total}({col[i]} * {col[l]}{factor}) AS r{name}{m}_{i}_{l}" for i, l in tri for name, factor in want]
            cell_sums += [f"{case(f'r{name}{m}_{i}_{l}')} AS {name}{m}_{i}_{l}" for i, l in tri for name, _ in want]
            if spec["demean"]:
                raw_sums.append(f"{total}({uu}) AS rsuu{m}")
                raw_sums += [f"{total}({col[i]} * {uu}) AS rsxuu{m}_{i}" for i in range(k)]
                cell_sums.append(f"{case(f'rsuu{m}')} AS suu{m}")
                cell_sums += [f"{case(f'rsxuu{m}_{i}')} AS sxuu{m}_{i}" for i in range(k)]
                cell_sums += [f"{case(s_xx(xs[i], xs[l]))} AS sxx{m}_{i}_{l}" for i, l in tri]
        names = re.findall(r" AS (\w+)(?=,|$)", ", ".join(cell_sums[first_cell:]))  # this model's cell columns, in order
        unit_totals += [f"sum({c}) AS {c}" if c == f"n{m}" else f"{total}({c}) AS {c}" for c in names]
        unit_outer += [f"count(*) FILTER (WHERE k{m}) AS ng{m}"]
        unit_outer += [f"{total}(g{m}_{i} * g{m}_{l}) AS o{m}_{i}_{l}" for i, l in tri]
        if spec["hc1"]:
            unit_outer += [f"{total}(h{m}_{i}_{l}) AS h{m}_{i}_{l}" for i, l in tri]
        if spec["demean"]:
            unit_means += [f", n{m} AS nn{m}, su{m} / n{m} AS uu{m}"] + [f", sx{m}_{i} / n{m} AS xx{m}_{i}" for i in range(k)]
        if spec["demean"]:
            unit_sums += [f", sum(n{m}) AS nn{m}", f", {total}(su{m}) / sum(n{m}) AS uu{m}"]
            unit_sums += [f", {total}(sx{m}_{i}) / sum(n{m}) AS xx{m}_{i}" for i in range(k)]
            member = f"nn{m} > 1 AND n{m} > 0"
            # sum over the cell of (x - xbar)(u - ubar), unit means xbar, ubar
            scores += [f"CASE WHEN {member} THEN sxu{m}_{i} - uu{m} * sx{m}_{i} - xx{m}_{i} * su{m} "
                       f"+ n{m} * xx{m}_{i} * uu{m} END AS g{m}_{i}" for i in range(k)]
            if spec["hc1"]:
                for i, l in tri:  # sum of (x_i - m_i)(x_l - m_l)(u - mu)^2, expanded in the cell's sums
                    mi, ml, mu = f"xx{m}_{i}", f"xx{m}_{l}", f"uu{m}"
                    a = f"(sxxuu{m}_{i}_{l} - 2 * {mu} * sxxu{m}_{i}_{l} + {mu} * {mu} * sxx{m}_{i}_{l})"
                    b = f"{mi} * (sxuu{m}_{l} - 2 * {mu} * sxu{m}_{l} + {mu} * {mu} * sx{m}_{l})"
                    c = f"{ml} * (sxuu{m}_{i} - 2 * {mu} * sxu{m}_{i} + {mu} * {mu} * sx{m}_{i})"
                    d = f"{mi} * {ml} * (suu{m} - 2 * {mu} * su{m} + {mu} * {mu} * n{m})"
                    scores.append(f"CASE WHEN {member} THEN {a} - {b} - {c} + {d} END AS h{m}_{i}_{l}")
        else:
            member = f"n{m} > 0"
            scores += [f"sxu{m}_{i} AS g{m}_{i}" for i in range(k)]
            if spec["hc1"]:
                scores += [f"sxxuu{m}_{i}_{l} AS h{m}_{i}_{l}" for i, l in tri]
        scores.append(f"{member} AS k{m}")
        group_sums += [f"{total}(g{m}_{i}) AS g{m}_{i}" for i in range(k)] + [f"count(*) FILTER (WHERE k{m}) AS n{m}"]
        outer += [f"count(*) FILTER (WHERE n{m} > 0) AS ng{m}"]
        outer += [f"{total}(g{m}_{i} * g{m}_{l}) AS o{m}_{i}_{l}" for i, l in tri]
        if spec["hc1"]:
            group_sums += [f"{total}(h{m}_{i}_{l}) AS h{m}_{i}_{l}" for i, l in tri]
            outer += [f"{total}(h{m}_{i}_{l}) AS h{m}_{i}_{l}" for i, l in tri]
    union = ["count(*) AS n_all"] + [f"{total}({_z(j)}) AS s{j}" for j in used]
    union += [f"{total}({_z(j)} * {_z(l)}) AS p{j}_{l}" for j, l in pairs]
    common = dict(rows=rows, pattern=", ".join(pattern_items(samples, differenced, step) + residuals),
                  pattern_keys=", ".join(keys_of), raw_sums=", ".join(union + raw_sums), cell_sums=", ".join(cell_sums),
                  scores=", ".join(scores))
    if all(tuple(s) in (("k_unit",), ()) for s in sets):  # every meat is a sum over units: no cells of clusters
        gids = ", ".join(f"({grouping_id(keys, s)})" for s in sets)
        return render("shared_unit_scores", **common, unit_totals=", ".join(unit_totals), materialized=dialect.materialized,
                      anti_join=dialect.anti_join, semi_join=dialect.semi_join,
                      unit_means="".join(unit_means), outer=", ".join(unit_outer), gids=gids)
    cell_keys = ["k_unit"] + [k for k in keys if k != "k_unit"]
    grouping_sets = "GROUPING SETS (" + ", ".join("(" + ", ".join(s) + ")" for s in sets) + ")"
    return render("shared_scores", **common, cell_keys=", ".join(cell_keys), unit_sums="".join(unit_sums),
                  materialized=dialect.materialized, grouping=dialect.grouping(keys) if keys else "0", sets=grouping_sets,
                  group_sums=", ".join(group_sums), outer=", ".join(outer))


def grouping_id(keys: Sequence[str], grouped: Sequence[str]) -> int:
    """DuckDB's GROUPING(keys...) for a set grouping by ``grouped``: bit set for each key
    left out, the first key the most significant."""
    out = 0
    for key in keys:
        out = (out << 1) | (0 if key in grouped else 1)
    return out


# ---------------------------------------------------------------- weights


def bad_weights_sql(source: str, unit: str, period: str, weight: str, limit: int,
                    dialect: Dialect = DUCKDB) -> tuple[str, str]:
    """The count of rows whose weight (checked column ``weight``) is negative, missing or
    not finite, and a query for the first ``limit`` of them (unit, period, weight)."""
    value = f"CAST({quote_ident(weight, dialect)} AS DOUBLE)"
    bad = f"{value} IS NULL OR NOT {dialect.is_finite(value)} OR {value} < 0"
    count = f"SELECT count(*) AS n_bad FROM {source} AS src WHERE {bad}"
    rows = (f"SELECT {quote_ident(unit, dialect)} AS k_unit, {quote_ident(period, dialect)} AS k_period, {value} AS k_w "
            f"FROM {source} AS src WHERE {bad} LIMIT {int(limit)}")
    return count, rows


# ---------------------------------------------------------------- write-back (bigpanel.writeback)
# The rows of the fit's sample (``used``, design columns unshifted: $s_j = 0, $d_j = 1, the
# period column carried as k_c0) with the estimates as parameters: $b_j per design column,
# $b_one the intercept, ($t_i, $g_i) the periods' effects.

WRITE_VIEW = "bigpanel_rows"  # the name under which the writer instance sees the streamed rows
# The writer joins streamed rows (not counted in advance: DuckDB guesses one row) to effect
# tables; with these optimizers on it built its hash table from the stream (20M rows: 2.5 GB),
# off it builds from the effect tables and streams the rows through (0.28 GB).
WRITER_OPTIMIZERS = ("disabled_optimizers", "join_order,build_side_probe_side")


def writeback_parts_sql(used: str, q: int, slopes: Sequence[int], effect_columns: Sequence[int], n_periods: int,
                        intercept: bool, keys: Sequence[str] = ()) -> str:
    """CTEs ``used`` and ``parts``: per used row k_unit, k_period, k_c0 (the period as the
    source has it), the effects' key columns ``keys``, the outcome y, xb = sum of $b_j z_j
    over ``slopes`` (+ $b_one) and pe = sum of $b_j z_j over ``effect_columns`` plus the
    row's period effect $g_i (joined on $t_i; 0 for a period not listed)."""
    xb = " + ".join([f"$b{int(j)} * r.{_z(j)}" for j in slopes] + (["$b_one"] if intercept else [])) or "0.0"
    pe = " + ".join([f"$b{int(j)} * r.{_z(j)}" for j in effect_columns]
                    + (["coalesce(pe.g, 0.0)"] if n_periods else [])) or "0.0"
    carried = "".join(f"r.{k}, " for k in keys)
    return (f"used AS ({used}),\nparts AS (SELECT r.k_unit, r.k_period, r.k_c0, {carried}r.{_z(q - 1)} AS y, {xb} AS xb, "
            f"{pe} AS pe FROM used AS r {period_join_sql(n_periods, 0)})")


def writeback_periods_sql(parts: str) -> str:
    """Per period: its value as the source has it, its rows and its effect (the mean of pe)."""
    return (f"WITH {parts}\nSELECT k_period, any_value(k_c0) AS shown, count(*) AS n, {DUCKDB.compensated}(pe) / count(*) "
            "AS effect FROM parts GROUP BY k_period ORDER BY k_period")


def writeback_period_links_sql(used: str) -> str:
    """Each unit's first period beside each of its periods (distinct pairs): the links that
    make periods one connected group."""
    return ("SELECT DISTINCT first_period, k_period FROM (SELECT k_period, min(k_period) OVER (PARTITION BY k_unit) "
            f"AS first_period FROM ({used}) AS r) AS l")


def writeback_unit_effects_sql(parts: str) -> str:
    """Per unit (k_unit, effect, n_rows), in unit order: the mean of y - xb - pe."""
    return (f"WITH {parts}\nSELECT k_unit, {DUCKDB.compensated}(y - xb - pe) / count(*) AS effect, "
            "count(*) AS n_rows FROM parts GROUP BY k_unit ORDER BY k_unit")


def writeback_rows_sql(parts: str, carried: Sequence[str]) -> str:
    """The rows streamed to the writer instance: the ``carried`` key columns, y, xb and pe."""
    return f"WITH {parts}\nSELECT {', '.join(carried)}, y, xb, pe FROM parts"


def effect_view(i: int) -> str:
    """The name under which the writer instance sees effect table ``i``."""
    return f"bigpanel_effect_{int(i)}"


def writeback_joined_sql(view: str, joins: Sequence[Sequence[str]], carried: Sequence[str], names: Sequence[str]) -> str:
    """The writer instance's residual rows: the streamed rows ``view`` joined to effect table
    i on its key columns ``joins[i]``; output the ``carried`` columns, then the fitted value
    xb + pe + the effects and the residual y minus it, named ``names``. The effect tables are
    the hash tables built (the writer's join-order optimizers are off: the stream is not
    counted in advance, and would otherwise be taken for the small side)."""
    total = "r.xb + r.pe" + "".join(f" + t{i}.effect" for i in range(len(joins)))
    items = [f"r.{c} AS {quote_ident(n)}" for c, n in zip(carried, names)]
    items += [f"{total} AS {quote_ident(names[-2])}", f"r.y - ({total}) AS {quote_ident(names[-1])}"]
    tables = "".join(f" JOIN {quote_ident(effect_view(i))} AS t{i} ON " + " AND ".join(f"r.{k} = t{i}.{k}" for k in keys)
                     for i, keys in enumerate(joins))
    return f"SELECT {', '.join(items)} FROM {quote_ident(view)} AS r{tables}"


def all_rows_sql(view: str) -> str:
    return f"SELECT * FROM {quote_ident(view)}"


def copy_parquet_sql(select: str, path: str) -> str:
    """The writer instance's one statement: the rows of ``select`` into a Parquet file."""
    return f"COPY ({select}) TO {quote_literal(path)} (FORMAT parquet)"
