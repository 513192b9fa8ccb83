"""Panel checkup: keys, period grid, balance, gaps, duplicates, missing values and the
within/between split of every numeric column, from a few aggregate-only scans.

The scans (templates ``sql/checkup_*.sql``, built by :mod:`bigpanel.sqlbuild`; this module
runs them and reads their rows):

0. ``checkup_shifts``: the mean of each numeric column over the first rows (a tiny read),
   subtracted in the scans below, so that values far from zero (a large offset) keep
   their digits and the parallel sums differ from run to run only in the last bits; and
   their largest magnitude, from which a power-of-two scale is chosen that brings the
   values near 1 (exact: no digit changes), so that squares of very large or very small
   values neither overflow nor underflow.
Values that are NaN or infinite are counted apart ("not finite") and otherwise left out,
like missing values.
1. ``checkup_periods``: GROUP BY period. Row counts, the distinct periods (from which the
   regular step is found here, in Python, over at most ``MAX_PERIODS`` values), and per
   period the count, mean and sum of squared deviations of each column. The periods are
   combined into column totals with the exact two-pass formula over the few period rows.
2. ``checkup_units``: GROUP BY unit, reduced in the same statement to one row. A unit's
   distinct periods are counted with a bitmap over the period grid (exact, and far cheaper
   than COUNT(DISTINCT)); its within-unit sum of squares is DuckDB's streaming
   (Welford/Chan) ``regr_sxx``, which is exactly zero for a column constant in the unit and
   keeps its digits when unit means are large next to the spread inside units.
3. ``checkup_duplicates``: only when scan 2 found duplicate rows, the first offending keys.

Chunks: when a Parquet source is sorted by unit, :func:`bigpanel.moments.plan_chunks`
cuts it into unit ranges that read disjoint row groups. Scans 1-3 then run once per chunk,
each chunk on one thread (chunks in parallel), and Python adds the chunks' results in
chunk order: the unit scan's hash table holds one chunk's units at a time, and every
figure is the same, to the last bit, on every run. (Rows without a unit fall outside
every range; scan 1 reads them with one more query, which row-group statistics make
nearly free.) Otherwise each scan is one query on one thread (so that its sums, too,
come out the same whatever the thread count), and peak memory is set by the unit scan's hash table
(a small row per unit); an Engine ``memory_limit`` (and ``temp_directory``) bounds it,
DuckDB then spills.

Other engines: the scans run on the engine adapter (:func:`bigpanel.engine.adapter`), built
in its dialect. PostgreSQL and Spark SQL read the source as one chunk, count a unit's
distinct periods with COUNT(DISTINCT) and return the histogram as [n_periods, units] pairs;
Spark's sums are plain, so its figures agree with DuckDB's to a tolerance
(:data:`bigpanel.spark.RELATIVE_TOLERANCE`), its counts exactly.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import math
from collections.abc import Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from . import moments, solve, sqlbuild
from .convert import json_ready
from .errors import ECHO_LIMIT, InputError, echo
from .results import run_record
from .source import Session, Source, as_engine, as_source, is_integer, is_numeric

MAX_PERIODS = 1_000_000
"""More distinct periods than this and the period column is taken to be the wrong one."""

BITMAP_MAX_SLOTS = 4096
"""Longest period grid counted with a per-unit bitmap (512 bytes a unit); longer grids use
COUNT(DISTINCT), which is exact too but several times slower."""

WITHIN_SHARE_FLOOR = 1e-12
"""Within shares below this are rounding noise: the column does not vary within units.
Common practice: a relative threshold some thousands of times machine epsilon (2.2e-16)."""

N_DUPLICATE_EXAMPLES = 5

PROBE_ROWS = 20_000
"""First rows read for the columns' shifts."""

_SUBDAY_UNITS = (("hour", 3_600_000_000), ("minute", 60_000_000), ("second", 1_000_000), ("microsecond", 1))


# ---------------------------------------------------------------- the report


@dataclass(frozen=True)
class ColumnCheck:
    """Missing values and, for a numeric column, its spread within and between units.

    ``within_share`` is the within-unit sum of squares (deviations from each unit's mean)
    over the total sum of squares (deviations from the overall mean); ``between_share`` is
    the rest. ``units_varying`` counts units in which the column takes more than one value.
    ``within_estimable`` is False when the column never changes inside a unit, so that its
    effect cannot be estimated by within or first-difference regressions. The numeric
    fields are None for other columns; the shares are None for a column with no spread.
    ``number_tokens`` is set for a text column whose values are mostly numbers: the few
    other values (such as ``NA`` or ``.`` in an exported CSV), which made it text.
    ``n_not_finite`` counts NaN and infinite values, which are left out of every figure
    like missing ones. ``too_large`` is True when the column's sums of squares overflow a
    double even after scaling (std, shares and ``within_estimable`` are then None).
    """

    name: str
    dtype: str
    numeric: bool
    n_missing: int
    n_not_finite: int = 0
    mean: float | None = None
    std: float | None = None
    min: float | None = None
    max: float | None = None
    within_share: float | None = None
    between_share: float | None = None
    units_varying: int | None = None
    within_estimable: bool | None = None
    too_large: bool = False
    number_tokens: tuple[str, ...] = ()  # a text column otherwise numbers: its other values


@dataclass(frozen=True)
class PanelReport:
    """What :func:`inspect_panel` found. Periods are ints, dates or datetimes.

    ``n_rows`` counts rows after the filter; rows missing the unit or the period (counted in
    ``n_rows_missing_unit`` and ``n_rows_missing_period``, which may overlap) are left out
    of every other figure, so those describe ``n_rows_used`` rows. ``periods_per_unit`` is
    (min, lower quartile, median, upper quartile, max) of the distinct periods per unit.
    ``n_grid_periods`` is the length of the regular grid from the first to the last period
    (``n_empty_periods`` of them have no rows at all); ``n_missing_unit_periods`` counts
    grid periods absent inside units' own spans. ``duplicate_examples`` holds
    (unit, period, rows) for the first offending keys, in key order. ``absent_in_files``
    holds (column, files without it, the first of them) for checked columns that some
    files of a Parquet source lack (their rows count as missing).
    """

    source: str
    where: str | None
    unit: str
    unit_dtype: str
    period: str
    period_dtype: str
    n_rows: int
    n_rows_missing_unit: int
    n_rows_missing_period: int
    n_rows_used: int
    n_units: int
    n_periods: int
    first_period: Any
    last_period: Any
    period_step: int | None
    period_step_unit: str | None
    n_grid_periods: int
    n_empty_periods: int
    n_balanced_units: int
    n_singleton_units: int
    periods_per_unit: tuple[int, int, int, int, int]
    n_units_with_gaps: int
    n_missing_unit_periods: int
    n_duplicate_keys: int
    n_duplicate_rows: int
    duplicate_examples: tuple[tuple[Any, Any, int], ...]
    columns: tuple[ColumnCheck, ...]
    absent_in_files: tuple[tuple[str, int, str], ...] = ()
    run: dict = dataclasses.field(default_factory=dict)  # {"threads": N, "version": "x.y.z"}

    @property
    def balanced_share(self) -> float:
        """Share of units observed in every period of the panel."""
        return self.n_balanced_units / self.n_units

    @property
    def not_estimable(self) -> tuple[str, ...]:
        """Numeric columns that never change within a unit."""
        return tuple(c.name for c in self.columns if c.within_estimable is False)

    def duplicate_problem(self) -> str | None:
        """One sentence naming the first duplicate keys, or None when every key is unique."""
        if not self.n_duplicate_keys:
            return None
        shown = echo(", ".join(f"({_show(u)}, {_show(p)})" for u, p, _ in self.duplicate_examples), 2 * ECHO_LIMIT)
        more = ", ..." if self.n_duplicate_keys > len(self.duplicate_examples) else ""
        plural = "s" if self.n_duplicate_keys != 1 else ""
        return (
            f"Source {self.source} has {self.n_duplicate_keys:,} duplicate ({echo(self.unit)}, {echo(self.period)}) "
            f"key{plural}, first {shown}{more}; keep one row per unit and period (filter or aggregate "
            "the source with a query) before estimating."
        )

    def to_dict(self) -> dict[str, Any]:
        """A JSON-ready dict of the fields above (periods as ISO text), plus the derived
        ``balanced_share`` and ``not_estimable``; ``run`` (threads and version) comes last,
        the one entry that differs between runs with other thread counts."""
        out = json_ready(self)
        run = out.pop("run")
        out["balanced_share"] = self.balanced_share
        out["not_estimable"] = list(self.not_estimable)
        out["run"] = run
        return out

    def to_polars(self):
        """One row per checked column: type, missing values, moments and variance shares."""
        import polars as pl

        schema = {
            "name": pl.String, "dtype": pl.String, "numeric": pl.Boolean, "n_missing": pl.Int64,
            "n_not_finite": pl.Int64, "mean": pl.Float64, "std": pl.Float64, "min": pl.Float64, "max": pl.Float64,
            "within_share": pl.Float64, "between_share": pl.Float64, "units_varying": pl.Int64,
            "within_estimable": pl.Boolean, "too_large": pl.Boolean, "number_tokens": pl.List(pl.String),
        }  # fmt: skip
        data = {name: [_plain(getattr(c, name)) for c in self.columns] for name in schema}
        return pl.DataFrame(data, schema=schema)

    def render(self, color: bool = False) -> str:
        """The report as plain text for a terminal; ``color`` marks problems in red."""
        return _render(self, color)

    def __str__(self) -> str:
        return self.render()


# ---------------------------------------------------------------- the checkup


def inspect_panel(source, unit: str, period: str, columns: Sequence[str] | None = None, *, where: str | None = None,
                  table: str | None = None, query: str | None = None, csv_types: dict | None = None,
                  csv_nulls=None, engine=None, spark_master: str | None = None) -> PanelReport:
    """Check a panel's structure and the within-unit variation of its columns.

    Parameters
    ----------
    source : Source, str, path or in-memory frame
        Any source :func:`bigpanel.fit` takes (see :func:`~bigpanel.source.open_source`);
        its row filter applies to every figure.
    unit, period : str
        The key columns. The period must be an integer, DATE or TIMESTAMP column.
    columns : list of str, optional
        Columns to check; each must be numeric. By default every other column is checked
        (non-numeric ones for missing values only).
    engine : Engine or str, optional
        As in :func:`bigpanel.fit`: ``"spark"`` runs every scan as Spark SQL over the
        Parquet files (only aggregates come back), with ``spark_master`` as there.

    Returns
    -------
    PanelReport

    Raises
    ------
    InputError
        For an unknown or unsuitable column, a bad filter, or no rows after the filter.
    """
    source = as_source(source, where, table, query, csv_types, as_engine(engine, spark_master), csv_nulls)
    from .engine import adapter, open_session

    with open_session(source) as session:
        kinds = _check_arguments(session, unit, period, columns)
        session.check_filter()
        schema = session.columns()
        checked = [c for c in schema if c not in (unit, period)] if columns is None else list(dict.fromkeys(columns))
        numeric = [c for c in checked if is_numeric(schema[c])]
        engine = adapter(session)  # DuckDB, PostgreSQL or Spark: the scans' SQL in its dialect
        period_value = sqlbuild.period_value(period, kinds, engine.dialect)

        shifts = _probe_shifts(engine, checked, numeric)
        chunks = engine.plan_chunks(unit)
        by_period = _scan_periods(engine, chunks, unit, period_value, checked, shifts)
        grid = _period_grid(by_period["period_value"], kinds)
        if grid is None:
            raise InputError(_no_rows_message(session.source, unit, period, by_period["n_rows"]))
        units = _scan_units(engine, chunks, unit, period_value, checked, shifts, grid)
        duplicates: list[tuple[Any, Any, int]] = []
        n_duplicate_keys = 0
        if units["duplicate_rows"]:
            duplicates, n_duplicate_keys = _scan_duplicates(engine, chunks, unit, period_value)
        tokens = _number_tokens(engine, [c for c in checked if schema[c].upper() == "VARCHAR"])
        run = run_record(engine.thread_count()) | getattr(engine, "run_facts", dict)()

    keyed = by_period["keyed"]
    column_checks = tuple(replace(_column_check(c, schema[c], j, by_period, units, shifts.get(j)), number_tokens=tokens.get(c, ()))
                          for j, c in enumerate(checked))
    quartiles = _quartiles(units["periods_per_unit"])
    return PanelReport(
        source=session.source.label,
        where=session.source.where,
        unit=unit,
        unit_dtype=schema[unit],
        period=period,
        period_dtype=schema[period],
        n_rows=by_period["total_rows"],
        n_rows_missing_unit=by_period["missing_unit"],
        n_rows_missing_period=by_period["missing_period"],
        n_rows_used=int(np.sum(by_period["n_rows"][keyed])),
        n_units=int(units["n_units"]),
        n_periods=grid.n_periods,
        first_period=grid.first,
        last_period=grid.last,
        period_step=grid.step,
        period_step_unit=grid.step_unit,
        n_grid_periods=grid.n_slots,
        n_empty_periods=grid.n_slots - grid.n_periods,
        n_balanced_units=int(units["balanced_units"]),
        n_singleton_units=int(units["singleton_units"]),
        periods_per_unit=quartiles,  # type: ignore[arg-type]
        n_units_with_gaps=int(units["units_with_gaps"]),
        n_missing_unit_periods=int(units["missing_unit_periods"]),
        n_duplicate_keys=n_duplicate_keys,
        n_duplicate_rows=int(units["duplicate_rows"]),
        duplicate_examples=tuple(duplicates),
        columns=column_checks,
        absent_in_files=_absent_in_files(source, checked),
        run=run,
    )


def _check_arguments(session: Session, unit: str, period: str, columns: Sequence[str] | None) -> str:
    """Validate the key and column names; return the period kind (integer/date/timestamp)."""
    label = session.source.label
    if unit == period:
        raise InputError(f"Unit and period are the same column '{echo(unit)}'. Give two different columns.")
    if columns is not None:
        if isinstance(columns, str):
            raise InputError(f"Option 'columns' must be a list of column names, got the text '{echo(columns)}'.")
        for name in (unit, period):
            if name in columns:
                raise InputError(f"Column '{echo(name)}' is a key of the panel, not a column to check. Leave it out of 'columns'.")
    session.require_columns([unit, period, *(columns or [])], numeric=list(columns or []))
    duck_type = session.columns()[period]
    kind = _period_kind(duck_type)
    if kind is None:
        raise InputError(
            f"Column '{echo(period)}' in {label} has type {duck_type}, which cannot be a period. "
            "Use an integer, DATE or TIMESTAMP column, or convert it in a query (for example CAST(... AS DATE))."
        )
    return kind


def _period_kind(duck_type: str) -> str | None:
    if is_integer(duck_type):
        return "integer"
    base = duck_type.upper().split("(")[0].strip()
    if base == "DATE":
        return "date"
    if base.startswith("TIMESTAMP"):
        return "timestamp"
    return None


def _no_rows_message(source: Source, unit: str, period: str, n_rows: np.ndarray) -> str:
    if int(np.sum(n_rows)) == 0:
        where = f" after the filter '{echo(source.where)}'" if source.where else ""
        return f"Source {source.label} has no rows{where}. Loosen the filter or check the source."
    return f"No row of {source.label} has both a unit ('{echo(unit)}') and a period ('{echo(period)}'). Check the key columns."


# ---------------------------------------------------------------- scan 1: periods


def _probe_shifts(engine, checked: list[str], numeric: list[str]) -> dict[int, tuple[float, float]]:
    """Column index -> (shift, scale) for the numeric columns: the mean of the first rows'
    finite values (0.0 when there are none) and a power of two near 1 / their magnitude."""
    indices = [j for j, c in enumerate(checked) if c in numeric]
    if not indices:
        return {}
    sql = sqlbuild.checkup_shift_probe_sql(engine.filtered(), checked, indices, engine.dialect)
    row = engine.run(sql, {"probe_rows": PROBE_ROWS}).to_pylist()[0]
    out = {}
    for j in indices:
        shift = row[f"c_{j}"] if row[f"c_{j}"] is not None and math.isfinite(row[f"c_{j}"]) else 0.0
        out[j] = (shift, solve.power_of_two_scale(row[f"m_{j}"]))
    return out


def _scan_periods(engine, chunks: list[moments.Chunk], unit: str, period_value: str, checked: list[str],
                  shifts: dict[int, tuple[float, float]]) -> dict:
    """Scan 1 over each chunk; the chunks' period rows are kept side by side (every figure
    taken from them is a sum, or a two-pass formula valid over any partition of the rows)."""
    if len(chunks) > 1:
        chunks = chunks + [moments.Chunk(without_unit=True)]
    max_groups = 2 * MAX_PERIODS + 2  # each period twice (with and without a unit), plus NULL periods
    tables = engine.run_chunks(
        chunks, lambda c: sqlbuild.checkup_period_scan_sql(engine.filtered(c, unit), unit, period_value, checked, list(shifts), engine.dialect),
        {"max_groups": max_groups} | _shift_params(shifts),
    )
    table = _utc_times(pa.concat_tables(tables))
    n_distinct = len(table.column("period_value").drop_null().unique())
    if any(t.num_rows >= max_groups for t in tables) or n_distinct > MAX_PERIODS:
        raise InputError(
            f"The period column of {engine.source.label} has more than {MAX_PERIODS:,} distinct values. "
            "Check that the period option names the time column."
        )
    data = {name: table.column(name) for name in table.column_names}
    n_rows = np.asarray(data["n_rows"].to_numpy(zero_copy_only=False), dtype=np.int64)
    unit_missing = np.asarray(data["unit_missing"].to_numpy(zero_copy_only=False), dtype=bool)
    period_missing = np.asarray(data["period_value"].is_null().to_numpy(zero_copy_only=False), dtype=bool)
    keyed = ~unit_missing & ~period_missing
    out = {name: data[name] for name in data}
    out.update(
        n_rows=n_rows,
        keyed=keyed,
        total_rows=int(n_rows.sum()),
        missing_unit=int(n_rows[unit_missing].sum()),
        missing_period=int(n_rows[period_missing].sum()),
        period_value=data["period_value"].filter(keyed),
    )
    return out


@dataclass(frozen=True)
class _Grid:
    """The regular grid of periods: ordinals are ints (the value, months, days or
    microseconds), ``slot = (ordinal - first_ordinal) // slot_step``."""

    n_periods: int
    first: Any
    last: Any
    step: int | None
    step_unit: str | None
    mode: str  # integer | month | day | microsecond
    first_ordinal: int
    slot_step: int
    n_slots: int
    ordinals: tuple = ()  # each distinct period's ordinal, ascending
    periods: tuple = ()  # the distinct periods as Python values, in the same order


def _period_grid(values, kind: str) -> _Grid | None:
    """Distinct periods -> the grid: first, last and the gcd step of consecutive periods."""
    if len(values) == 0:
        return None
    if kind == "integer":
        ordinals = sorted(set(int(v) for v in values.to_pylist()))
        mode, first, last = "integer", ordinals[0], ordinals[-1]
        periods = tuple(ordinals)
    else:
        stamps = np.unique(np.asarray(values.to_numpy(zero_copy_only=False)).astype("datetime64[us]"))
        periods = tuple(_from_numpy(v, kind) for v in stamps)
        days = stamps.astype("datetime64[D]")
        first, last = _from_numpy(stamps[0], kind), _from_numpy(stamps[-1], kind)
        if np.any(stamps - days.astype("datetime64[us]") != stamps[0] - days[0].astype("datetime64[us]")):
            mode, ordinals = "microsecond", stamps.astype(np.int64).tolist()
        else:
            months = days.astype("datetime64[M]")
            day_of_month = (days - months.astype("datetime64[D]")).astype(np.int64)
            month_end = (days + 1).astype("datetime64[M]") != months
            if np.all(day_of_month == day_of_month[0]) or np.all(month_end):
                # year * 12 + month - 1, as SQL computes it from year() and month()
                mode, ordinals = "month", (months.astype(np.int64) + 1970 * 12).tolist()
            else:
                mode, ordinals = "day", days.astype(np.int64).tolist()
    n_periods = len(ordinals)
    gaps = [b - a for a, b in zip(ordinals, ordinals[1:])]
    slot_step = math.gcd(*gaps) if gaps else 1
    n_slots = (ordinals[-1] - ordinals[0]) // slot_step + 1
    step, step_unit = _step_label(mode, slot_step) if gaps else (None, None)
    return _Grid(n_periods, first, last, step, step_unit, mode, ordinals[0], slot_step, n_slots, tuple(ordinals), periods)


def _step_label(mode: str, slot_step: int) -> tuple[int, str | None]:
    if mode == "integer":
        return slot_step, None
    if mode == "month":
        if slot_step % 12 == 0:
            return slot_step // 12, "year"
        if slot_step % 3 == 0:
            return slot_step // 3, "quarter"
        return slot_step, "month"
    if mode == "day":
        return (slot_step // 7, "week") if slot_step % 7 == 0 else (slot_step, "day")
    for name, size in _SUBDAY_UNITS:
        if slot_step % size == 0:
            return slot_step // size, name
    raise AssertionError("unreachable: every step is a whole number of microseconds")


def _from_numpy(stamp: np.datetime64, kind: str) -> Any:
    value = stamp.astype("datetime64[us]").item()
    return value.date() if kind == "date" else value


def _shift_params(shifts: dict[int, tuple[float, float]]) -> dict[str, float]:
    params = {}
    for j, (shift, scale) in shifts.items():
        params[f"c_{j}"], params[f"d_{j}"] = float(shift), float(scale)
    return params


def _utc_times(table: pa.Table) -> pa.Table:
    """Timestamps with a time zone (Spark's TIMESTAMP, in the session's UTC) as the plain
    UTC timestamps DuckDB's CAST(... AS TIMESTAMP) gives."""
    for i, field in enumerate(table.schema):
        if pa.types.is_timestamp(field.type) and field.type.tz is not None:
            plain = pa.timestamp(field.type.unit)
            table = table.set_column(i, pa.field(field.name, plain), table.column(i).cast(plain))
    return table


# ---------------------------------------------------------------- scan 2: units


def _scan_units(engine, chunks: list[moments.Chunk], unit: str, period_value: str, checked: list[str],
                shifts: dict[int, tuple[float, float]], grid: _Grid) -> dict:
    """Scan 2 over each chunk (every unit lies in one chunk), added up in chunk order."""
    bitmap = grid.n_slots <= BITMAP_MAX_SLOTS
    params = {"first": grid.first_ordinal, "step": grid.slot_step, "n_periods": grid.n_periods} | _shift_params(shifts)
    if bitmap:
        params["last_slot"] = grid.n_slots - 1
    tables = engine.run_chunks(
        chunks,
        lambda c: sqlbuild.checkup_unit_scan_sql(engine.filtered(c, unit), unit, period_value, checked, list(shifts), grid.mode, bitmap,
                                                 engine.dialect),
        params,
    )
    rows = [t.to_pylist()[0] for t in tables]
    out: dict[str, Any] = {}
    for name in rows[0]:
        values = [r[name] for r in rows if r[name] is not None]
        if name == "periods_per_unit":
            histogram: dict[int, int] = {}
            for pairs in values:
                for n_periods, n_units in histogram_pairs(pairs):
                    histogram[n_periods] = histogram.get(n_periods, 0) + n_units
            out[name] = histogram
        elif name.startswith("within_ss_"):
            out[name] = math.fsum(values) if all(math.isfinite(v) for v in values) else math.inf
        else:
            out[name] = sum(values)
    return out


def histogram_pairs(value) -> list[tuple[int, int]]:
    """(value, count) pairs of a histogram: a map (DuckDB), a list of [value, count] pairs
    (Spark) or a flat [value, count, ...] list (PostgreSQL flattens an array of pairs)."""
    if value and not isinstance(value, dict) and not isinstance(value[0], (tuple, list, dict)):
        return list(zip(value[::2], value[1::2]))
    return list(dict(value).items())


def _quartiles(histogram) -> tuple[int, ...]:
    """(min, q1, median, q3, max) from a {value: count} histogram: the value at 0-based rank
    floor(q * (n - 1)) in sorted order (numpy's "lower" quantile)."""
    pairs = sorted(dict(histogram).items())
    values = np.array([v for v, _ in pairs], dtype=np.int64)
    ends = np.cumsum([c for _, c in pairs])
    n = int(ends[-1])
    ranks = [math.floor(q * (n - 1)) for q in (0.0, 0.25, 0.5, 0.75, 1.0)]
    return tuple(int(values[np.searchsorted(ends, r, side="right")]) for r in ranks)


# ---------------------------------------------------------------- scan 3: duplicate keys


def _scan_duplicates(engine, chunks: list[moments.Chunk], unit: str, period_value: str) -> tuple[list[tuple[Any, Any, int]], int]:
    """Scan 3 over each chunk: the first offending keys of all chunks, and their count."""
    tables = engine.run_chunks(chunks, lambda c: sqlbuild.checkup_duplicate_scan_sql(engine.filtered(c, unit), unit, period_value, engine.dialect),
                               {"n_examples": N_DUPLICATE_EXAMPLES})
    tables = [_utc_times(t) for t in tables]
    rows = [r for t in tables for r in t.to_pylist()]
    n_keys = sum(int(t.column("n_keys")[0].as_py()) for t in tables if t.num_rows)
    examples = sorted((r["unit_key"], r["period_key"], int(r["n_rows"])) for r in rows)
    return examples[:N_DUPLICATE_EXAMPLES], n_keys


# ---------------------------------------------------------------- columns


def _column_check(name: str, dtype: str, j: int, by_period: dict, units: dict,
                  shift: tuple[float, float] | None) -> ColumnCheck:
    """Column j's figures; ``shift`` = (shift, scale), None for a non-numeric column, is what
    the scans subtracted and multiplied by."""
    keyed = by_period["keyed"]
    n_rows = by_period["n_rows"][keyed]
    counts = _floats(by_period[f"n_{j}"])[keyed]
    n_not_finite = 0 if shift is None else int(_floats(by_period[f"nf_{j}"])[keyed].sum())
    n_missing = int(n_rows.sum() - counts.sum()) - n_not_finite
    if shift is None:
        return ColumnCheck(name=name, dtype=dtype, numeric=False, n_missing=n_missing)
    n = float(counts.sum())
    if n == 0:
        return ColumnCheck(name=name, dtype=dtype, numeric=True, n_missing=n_missing, n_not_finite=n_not_finite,
                           units_varying=0, within_estimable=False)
    offset, scale = shift
    present = counts > 0
    counts = counts[present]
    means = _floats(by_period[f"mean_{j}"])[keyed][present]
    within_period = _floats(by_period[f"ss_{j}"])[keyed][present]
    low = float(np.min(_floats(by_period[f"min_{j}"])[keyed][present]))
    high = float(np.max(_floats(by_period[f"max_{j}"])[keyed][present]))
    # Two passes over the period means (exact, few values): total SS = sum of the periods'
    # own sums of squares + sum of n_t (mean_t - mean)^2, all in scaled units.
    with np.errstate(over="ignore", invalid="ignore"):
        weighted = counts * means
        spread = counts * (means - math.fsum(weighted) / n) ** 2 if np.isfinite(weighted).all() else weighted
    parts = (within_period, weighted, spread)
    within_ss = float(units[f"within_ss_{j}"] or 0.0)
    varying = int(units[f"varying_units_{j}"])
    if not all(np.isfinite(p).all() for p in parts) or not math.isfinite(within_ss):
        # values far larger than the first rows' (which set the scale): the squares overflow
        return ColumnCheck(name=name, dtype=dtype, numeric=True, n_missing=n_missing, n_not_finite=n_not_finite,
                           min=low, max=high, units_varying=varying, too_large=True)
    mean = math.fsum(weighted) / n
    total_ss = math.fsum(within_period) + math.fsum(spread)
    if total_ss > 0:
        # The two sums come from different scans; clip the rounding that can push a share
        # a few ulps past 0 or 1.
        within_share = min(1.0, max(0.0, within_ss / total_ss))
        between_share = 1.0 - within_share
    else:
        within_share = between_share = None
    estimable = varying > 0 and within_share is not None and within_share >= WITHIN_SHARE_FLOOR
    return ColumnCheck(
        name=name, dtype=dtype, numeric=True, n_missing=n_missing, n_not_finite=n_not_finite,
        mean=offset + mean / scale,
        std=math.sqrt(total_ss / (n - 1)) / scale if n > 1 else None,
        min=low, max=high,
        within_share=within_share, between_share=between_share,
        units_varying=varying, within_estimable=estimable,
    )  # fmt: skip


def _floats(column) -> np.ndarray:
    return np.asarray(column.to_numpy(zero_copy_only=False), dtype=np.float64)


def _absent_in_files(source: Source, checked: Sequence[str]) -> tuple[tuple[str, int, str], ...]:
    """(column, files without it, the first such file) for checked columns that some of a
    Parquet source's files lack (footers only; the files were read with union by name)."""
    if source.kind != "parquet" or len(source.files) < 2:
        return ()
    missing: dict[str, list[str]] = {}
    for f in source.files:
        names = set(pq.read_schema(f).names)
        for name in checked:
            if name not in names:
                missing.setdefault(name, []).append(f)
    return tuple((name, len(files), files[0]) for name, files in missing.items())


# ---------------------------------------------------------------- rendering


def _show(value: Any) -> str:
    if isinstance(value, dt.datetime):
        return value.isoformat(sep=" ")
    if isinstance(value, dt.date):
        return value.isoformat()
    return str(value)


def _count(n: int, word: str) -> str:
    return f"{n:,} {word}{'' if n == 1 else 's'}"


def _share(x: float | None) -> str:
    if x is None:
        return "-"
    if 0 < x < 0.001:
        return f"{x:.1e}"
    return f"{x:.3f}"


def _number(x: float | None) -> str:
    return "-" if x is None else f"{x:.6g}"


def _render(r: PanelReport, color: bool) -> str:
    def bad(text: str) -> str:
        return f"\x1b[31m{text}\x1b[0m" if color else text

    step = "-" if r.period_step is None else f"{r.period_step}" + (f" {r.period_step_unit}" if r.period_step_unit else "")
    if r.period_step and r.period_step_unit and r.period_step != 1:
        step += "s"
    lines = [f"Panel checkup of {r.source}" + (f" where {r.where}" if r.where else "")]
    lines.append(f"  rows              {r.n_rows:,}")
    skipped = r.n_rows - r.n_rows_used
    if skipped:
        lines.append(bad(f"  left out          {_count(skipped, 'row')} without a unit or period "
                         f"({r.n_rows_missing_unit:,} no {r.unit}, {r.n_rows_missing_period:,} no {r.period})"))
    lines.append(f"  units             {r.n_units:,}  ({r.unit}, {r.unit_dtype})")
    lines.append(f"  periods           {r.n_periods:,}  ({r.period}, {r.period_dtype}), "
                 f"{_show(r.first_period)} to {_show(r.last_period)}, step {step}")
    if r.n_empty_periods:
        lines.append(f"  empty periods     {r.n_empty_periods:,} of the {r.n_grid_periods:,} on the grid have no rows")
    lines.append("")
    lines.append("Structure")
    balanced = "yes" if r.n_balanced_units == r.n_units else "no"
    lines.append(f"  balanced          {balanced}: {r.n_balanced_units:,} of {r.n_units:,} units "
                 f"({100 * r.balanced_share:.1f}%) have every period")
    lo, q1, med, q3, hi = r.periods_per_unit
    lines.append(f"  periods per unit  min {lo}, quartiles {q1} / {med} / {q3}, max {hi}")
    lines.append(f"  single period     {_count(r.n_singleton_units, 'unit')}")
    if r.n_units_with_gaps:
        lines.append(f"  gaps              {_count(r.n_units_with_gaps, 'unit')} miss a period inside their span "
                     f"({r.n_missing_unit_periods:,} unit-periods missing)")
    else:
        lines.append("  gaps              none")
    if r.n_duplicate_keys:
        shown = ", ".join(f"({_show(u)}, {_show(p)}) x{n}" for u, p, n in r.duplicate_examples)
        lines.append(bad(f"  duplicate keys    {r.n_duplicate_keys:,} ({r.n_duplicate_rows:,} surplus rows): {shown}"))
    else:
        lines.append("  duplicate keys    none")
    lines.append("")
    name_width = max([len("column")] + [len(c.name) for c in r.columns])
    type_width = max([len("type")] + [len(c.dtype) for c in r.columns])
    header = (f"  {'column':<{name_width}}  {'type':<{type_width}}  {'missing':>9}  {'not finite':>10}  {'mean':>11}  {'std':>11}  "
              f"{'within':>7}  {'between':>7}  {'units varying':>13}")
    lines.append("Columns (within/between: shares of the variance inside units and across unit means)")
    lines.append(header)
    for c in r.columns:
        varying = "-" if c.units_varying is None else f"{c.units_varying:,}"
        not_finite = f"{c.n_not_finite:,}" if c.numeric else "-"
        row = (f"  {c.name:<{name_width}}  {c.dtype:<{type_width}}  {c.n_missing:>9,}  {not_finite:>10}  {_number(c.mean):>11}  "
               f"{_number(c.std):>11}  {_share(c.within_share):>7}  {_share(c.between_share):>7}  {varying:>13}")
        if c.within_estimable is False:
            row = bad(row + (("  no values" if not c.n_not_finite else "  no finite values") if c.mean is None else "  no change within units"))
        elif c.too_large:
            row = bad(row + "  too large to square")
        lines.append(row)
    if r.not_estimable:
        names = ", ".join(r.not_estimable)
        lines.append("")
        lines.append(bad(f"Not estimable by within or first-difference regressions (constant within every unit): {names}."))
    not_finite = [c for c in r.columns if c.n_not_finite]
    if not_finite:
        shown = ", ".join(f"{c.name} ({c.n_not_finite:,})" for c in not_finite)
        lines.append("")
        lines.append(bad(f"Not finite (NaN or infinite; left out like missing values, and so are their rows in a fit): {shown}."))
    numbers = [c for c in r.columns if c.number_tokens]
    if numbers:
        lines.append("")
        for c in numbers:
            tokens = ", ".join(_token(t) for t in c.number_tokens)
            lines.append(bad(f"Text column {c.name} looks numeric except for tokens: {tokens}. Read them as missing "
                             f"with --csv-null (for example --csv-null {_csv_null_example(c.number_tokens)})."))
    too_large = [c.name for c in r.columns if c.too_large]
    if too_large:
        lines.append("")
        lines.append(bad(f"Too large: the sums of squares of {', '.join(too_large)} overflow a double; "
                         "divide the column by a power of ten in a query or term."))
    if r.absent_in_files:
        shown = ", ".join(f"{name} (absent from {_count(n, 'file')}, first {echo(first)})" for name, n, first in r.absent_in_files)
        lines.append("")
        lines.append(bad(f"Not in every file (their rows count as missing): {shown}."))
    if not r.columns:
        lines.append("  (no columns to check)")
    return "\n".join(lines)


MAX_NUMBER_TOKENS = 5  # a text column with more distinct non-numbers than this is text


def _number_tokens(engine, text_columns: list[str]) -> dict[str, tuple[str, ...]]:
    """Text columns whose non-missing values are mostly (over half) numbers, with their
    few other values (at most MAX_NUMBER_TOKENS distinct ones): an exported CSV's ``NA``."""
    if not text_columns:
        return {}
    source_sql = engine.filtered()
    counts = engine.run(sqlbuild.text_number_counts_sql(source_sql, text_columns, engine.dialect)).to_pylist()[0]
    out = {}
    for j, c in enumerate(text_columns):
        n, num = int(counts[f"n{j}"] or 0), int(counts[f"num{j}"] or 0)
        if num == 0 or num == n or 2 * num <= n:
            continue
        rows = engine.run(sqlbuild.text_tokens_sql(source_sql, c, MAX_NUMBER_TOKENS + 1, engine.dialect)).to_pylist()
        if len(rows) <= MAX_NUMBER_TOKENS:
            out[c] = tuple(str(r["token"]) for r in rows)
    return out


def _token(token: str) -> str:
    return "(blank)" if not token.strip() else "'" + echo(token, 40) + "'"


def _csv_null_example(tokens: tuple[str, ...]) -> str:
    named = [t for t in tokens if t.strip() and "," not in t]
    return ",".join(named) if named else "NA"


def _plain(value: Any) -> Any:
    return list(value) if isinstance(value, tuple) else value
