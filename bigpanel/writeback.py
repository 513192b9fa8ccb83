"""Effects and residuals written back as Parquet, out of core and atomically.

After a fit, ``write_effects`` writes one Parquet file per effect (``effect_<column>.parquet``,
``effect_<a>_<b>.parquet`` for ``cell(a, b)``: the level's key columns, its estimated effect,
its row count) and ``write_residuals`` writes ``residuals.parquet`` (each used row's unit,
period and other effects' key columns, fitted value and residual). The rows never enter
Python:

- every query that reads the source is one SELECT on the session's locked connection
  (:mod:`bigpanel.lockdown`), built by :mod:`bigpanel.sqlbuild` from the fit's design (the
  checked expressions) with the estimates as parameters;
- effects are aggregates (one row per level) and are held as Arrow tables; the residual
  rows stream as Arrow batches from the locked connection into a second, writer DuckDB
  instance (:func:`bigpanel.source.writer_connection`) that joins them to the effect tables
  and whose only reachable paths are this run's temporary files: it can read no source and
  write nothing else;
- the files are written into a private folder made inside the target folder (mode 0700,
  removed on any error and after a stop signal) and renamed into place only when every
  file is complete: an interrupted run leaves no file under a final name.

Effects, as estimated (y = x'b + the effects + u), normalised so that the unit's effect
carries the level and every other effect is centred: its row-weighted mean over the rows
used is zero, within each connected group of its graph with the units (levels linked by
sharing a row; a group of units seen in no period, firm, ... of another group is centred
on its own). Fitted values, x'b plus the row's effects, do not depend on this choice.

- within, unit effects only: a_i is unit i's mean of y - x'b over the rows used;
- unit plus period effects (the exact path): the period effects are the fit's own
  coefficients, centred; a_i is the unit mean of y - x'b - d_t;
- more effects (absorbed by iteration, :mod:`bigpanel.sweeps`): the fit absorbed the
  effects from every design column; the projection being linear, the effects of y - x'b are
  combined from those column by column (nothing is swept again), then centred; with three
  effects or more, redundancies other than those groups are left as the solver found them.

First differences estimate no unit effects (the spec refuses ``write_effects``); their
residuals are those of the differenced equation, keyed by the later period of each pair.
"""

from __future__ import annotations

import os
import re
from dataclasses import dataclass

import numpy as np

from . import interrupts, sqlbuild
from .errors import InputError, echo
from .requests import Rows

NORMALISATION = ("unit effects carry the level; period effects centred (row-weighted mean zero over the rows used, "
                 "within each connected group of units and periods)")
NORMALISATION_MANY = ("the unit's effect carries the level; every other effect centred (row-weighted mean zero over "
                      "the rows used, within each connected group of its levels and the units'); with three effects "
                      "or more, other redundancies are left as the solver found them")
RESIDUALS_FILE = "residuals.parquet"
STREAM_BATCH_ROWS = 131_072


# ---------------------------------------------------------------- the target folders


def check_folder(option: str, folder: str, source) -> str:
    """The absolute target folder, made if missing, after refusing one that holds a source
    file or lies inside a source folder (checked first: nothing is made then), is a file,
    or cannot be written. Runs before any scan."""
    from .source import _unwritable_folder

    flag = "--" + option.replace("_", "-")
    path = os.path.realpath(os.path.abspath(os.path.expanduser(folder)))
    given = list(source.files or ()) + ([source.database] if source.database else [])
    files = [os.path.realpath(os.path.abspath(f)) for f in given]
    for shown_file, f in zip(given, files):
        if _inside(f, path):
            raise InputError(f"Option {flag} names '{echo(folder)}', which holds the source file '{echo(shown_file)}'. "
                             "bigpanel never writes among its sources: give a folder of its own.")
    if len(files) > 1 or source.hive:
        root = os.path.commonpath([os.path.dirname(f) for f in files])
        if _inside(path, root):
            raise InputError(f"Option {flag} names '{echo(folder)}', which lies inside the source's folder "
                             f"'{echo(os.path.relpath(root))}'. bigpanel never writes among its sources: give a folder "
                             "outside it.")
    problem = _unwritable_folder(path)
    if problem:
        raise InputError(f"Option {flag} names '{echo(folder)}', {problem}. Give a folder you can write to.")
    return path


def checked(spec, source):
    """The specification with its target folders checked against the source and made
    absolute (made if missing)."""
    from dataclasses import replace

    asked = [name for name in ("write_effects", "write_residuals") if getattr(spec, name)]
    if asked and source.kind == "postgres":  # nothing is written from a warehouse session (bigpanel.pg)
        raise InputError(f"Option '{asked[0]}' is not available for PostgreSQL sources yet: bigpanel reads the "
                         "warehouse only. Fit a Parquet export of the panel to write effects or residuals.")
    if asked and source.engine.name == "spark":  # bigpanel.spark brings back aggregates only
        raise InputError(f"Option '{asked[0]}' is not available with --engine spark yet: only aggregates come back "
                         "from Spark. Use --engine duckdb to write effects or residuals.")
    folders = {name: check_folder(name, getattr(spec, name), source) for name in asked}
    return replace(spec, **folders) if folders else spec


def _inside(path: str, folder: str) -> bool:
    return path == folder or path.startswith(folder.rstrip(os.sep) + os.sep)


def file_name(column: str, taken: set[str]) -> str:
    """``effect_<column>.parquet`` with anything but letters, digits, '-', '_' and '.'
    replaced by '_' (a numbered suffix when two columns come out alike)."""
    stem = "effect_" + (re.sub(r"[^A-Za-z0-9_.-]", "_", column).strip(".") or "column")
    name, i = stem + ".parquet", 1
    while name.lower() in taken:
        i += 1
        name = f"{stem}_{i}.parquet"
    taken.add(name.lower())
    return name


def _unique(names: list[str]) -> list[str]:
    """Output column names, a name met before getting '_' appended."""
    out: list[str] = []
    for n in names:
        while n in out:
            n += "_"
        out.append(n)
    return out


# ---------------------------------------------------------------- what the fit estimated


@dataclass(frozen=True)
class Parts:
    """How a row's fitted value is made: ``slopes`` (design index, estimate) over the
    non-effect regressors, ``effect_columns`` (design index, estimate) over period
    indicator columns, ``intercept``, and the periods' effects from extra columns."""

    slopes: tuple[tuple[int, float], ...]
    effect_columns: tuple[tuple[int, float], ...]
    intercept: float
    periods: tuple[tuple[object, float], ...]  # (k_period value, effect) from the extra columns
    periods_complete: bool  # no period effect was left out (the units-periods graph is connected)


def parts_of(design, estimates: dict) -> Parts:
    kx = design.q - 1
    est, effect, kept, labels = (estimates["estimate"], estimates["is_effect"], estimates["kept"],
                                 estimates["labels"])
    slopes = tuple((j, float(est[j])) for j in range(kx) if not effect[j] and est[j] != 0)
    columns = tuple((j, float(est[j])) for j in range(kx) if effect[j] and est[j] != 0)
    intercept = sum(float(est[j]) for j in range(kx, len(est)) if not effect[j] and labels[j] == "(intercept)")
    periods: tuple = ()
    rows = estimates["effect_rows"]
    if rows is not None:
        extra = [j for j in range(kx, len(est)) if effect[j]]
        values = rows @ np.asarray(est)[extra] if extra else np.zeros(len(estimates["effect_values"]))
        periods = tuple((v, float(g)) for v, g in zip(estimates["effect_values"], values))
    complete = all(kept[j] for j in range(len(est)) if effect[j])
    return Parts(slopes, columns, intercept, periods, complete)


# ---------------------------------------------------------------- writing


@dataclass(frozen=True)
class Written:
    """One file to write: the rows of a query on the locked connection (``query``: SQL and
    parameters) or a small Arrow ``table`` of aggregates; ``joined`` (effect tables, each
    with its join key columns) and ``select`` (the writer's SELECT over them and the
    streamed rows) when the file is the rows joined to the effects."""

    folder: str
    name: str
    query: tuple | None = None
    table: object = None
    joined: tuple = ()
    select: str | None = None


def write(executor, est, design, spec, estimates: dict) -> dict:
    """Write the fit's effects and residuals; returns what was written (file paths by
    effect, the residuals file, the normalisation) for the result."""
    if not (spec.write_effects or spec.write_residuals):
        return {}
    parts = parts_of(design, estimates)
    many = estimates.get("absorption") is not None
    if many and any(lag for _, lag in design.sql_columns):
        raise InputError("Options --write-effects and --write-residuals do not yet take lag() or lead() terms with "
                         "effects beyond the unit and the period. Leave out the write-back, or the lagged term.")
    q = design.q
    rows = Rows(design.sql_columns, (spec.period,), est.differenced, effects=spec.effect_columns if many else ())
    used = executor.used_sql(rows)
    base = {f"s{j}": 0.0 for j in range(q)} | {f"d{j}": 1.0 for j in range(q)}
    # within with period effects (exact path): the centred period effects join every row (the
    # period indicator columns, if any, leave x'b); otherwise the periods' effects as estimated
    centred = est.absorbs_units and spec.period_effects and not many
    period_rows: list[dict] = []
    periods = parts.periods
    if centred:
        period_rows, periods = _centred_periods(executor, used, q, parts, base)
    params = base | _estimate_params(parts.slopes, () if centred else parts.effect_columns, parts.intercept, periods)
    keys = [k for e, cols in enumerate(rows.effects) for k in sqlbuild.effect_keys(e, len(cols))]
    parts_sql = sqlbuild.writeback_parts_sql(used, q, [j for j, _ in parts.slopes],
                                             [] if centred else [j for j, _ in parts.effect_columns],
                                             len(periods), bool(parts.intercept), keys)
    # effect tables: (columns as the source names them, join keys, Arrow table with the join
    # keys, effect and n_rows)
    effects: list[tuple[tuple[str, ...], list[str], object]] = []
    if many:
        effects = _absorbed_effects(spec, estimates, parts)
    elif est.absorbs_units:
        table = executor.engine.run(sqlbuild.writeback_unit_effects_sql(parts_sql), params)
        effects.append(((spec.unit,), ["k_unit"], table))
    plan: list[Written] = []
    written: dict = {}
    if spec.write_effects:
        folder, taken, files = spec.write_effects, set(), {}
        for columns, join, table in effects:
            plan.append(Written(folder, file_name("_".join(columns), taken), table=_named(table, join, columns)))
            files[_label(columns)] = os.path.join(folder, plan[-1].name)
        if centred:
            import pyarrow as pa

            table = pa.table({"k": [r["shown"] for r in period_rows],
                              "effect": pa.array([float(r["effect"]) for r in period_rows], pa.float64()),
                              "n_rows": pa.array([int(r["n"]) for r in period_rows], pa.int64())})
            plan.append(Written(folder, file_name(spec.period, taken), table=_named(table, ["k"], (spec.period,))))
            files[spec.period] = os.path.join(folder, plan[-1].name)
        written["effects"] = files
        written["normalisation"] = (NORMALISATION_MANY if many else NORMALISATION if centred
                                    else "unit effects carry the level")
    if spec.write_residuals:
        extra = [(k, c) for columns, join, _ in effects for k, c in zip(join, columns)] if many else []
        carried, seen = [("k_unit", spec.unit), ("k_c0", spec.period)], {spec.unit, spec.period}
        for k, c in extra:
            if c not in seen:
                carried.append((k, c))
                seen.add(c)
        names = _unique([c for _, c in carried] + ["fitted", "residual"])
        select = sqlbuild.writeback_joined_sql(sqlbuild.WRITE_VIEW, [join for _, join, _ in effects],
                                               [k for k, _ in carried], names)
        plan.append(Written(spec.write_residuals, RESIDUALS_FILE,
                            query=(sqlbuild.writeback_rows_sql(parts_sql, list(dict.fromkeys(
                                [k for k, _ in carried] + [k for _, join, _ in effects for k in join]))), params),
                            joined=tuple(table.select(join + ["effect"]) for _, join, table in effects),
                            select=select))
        written["residuals"] = os.path.join(spec.write_residuals, RESIDUALS_FILE)
    _write_files(executor, plan)
    return written


def _label(columns: tuple[str, ...]) -> str:
    return columns[0] if len(columns) == 1 else f"cell({', '.join(columns)})"


def _named(table, join: list[str], columns: tuple[str, ...]):
    """An effect table for its file: the key columns under the source's names, then the
    effect and the row count (names made unique)."""
    names = _unique(list(columns) + ["effect", "n_rows"])
    return table.select(join + ["effect", "n_rows"]).rename_columns(names)


def _absorbed_effects(spec, estimates: dict, parts: Parts) -> list:
    """Many effects: each effect's values from the fit's own absorption, normalised.

    The fit absorbed the effects from every design column z_j = (x_j - s_j) d_j: its
    projection on the effects is D a_j, so that of x_j is D a_j / d_j + s_j, and, the
    projection being linear, that of y - x'b has level values a_y / d_y - sum_j b_j a_j / d_j
    plus the constant s_y - b's (given to the unit's effect). Nothing is swept again.
    """
    found = estimates["absorption"]
    copy = found.copy
    scales, shifts = estimates["scales"], estimates["shifts"]
    q = len(scales)
    b = np.zeros(q - 1)
    for j, v in parts.slopes:
        b[j] = v
    values = [a[q - 1] / scales[q - 1] - (b / scales[: q - 1]) @ a[: q - 1] for a in found.solution.alpha]
    first = found.unit_effect if found.unit_effect is not None else 0
    values[first] = values[first] + (shifts[q - 1] - b @ shifts[: q - 1])
    _centre(copy, values, first)
    out = []
    for e, effect in enumerate(copy.effects):
        keep = copy.counts[e] > 0
        join = list(copy.levels[e].column_names)
        table = (copy.levels[e].filter(keep).append_column("effect", _array(values[e][keep]))
                 .append_column("n_rows", _array(copy.counts[e][keep])))
        out.append((tuple(effect.columns), join, table))
    return out


def _array(values):
    import pyarrow as pa

    return pa.array(values)


def _centre(copy, values: list[np.ndarray], first: int) -> None:
    """Centre every effect but ``first`` (the unit's): row-weighted mean zero within each
    connected group of its graph with the unit's levels (levels linked by sharing a row),
    the group's mean added to its unit levels, so the fitted values do not change."""
    for e in range(len(values)):
        if e == first:
            continue
        hub, own = _pair_groups(copy, first, e)
        n_groups = int(max(hub.max(initial=0), own.max(initial=0))) + 1
        rows = copy.counts[e].astype(float)
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = np.bincount(own, weights=rows * values[e], minlength=n_groups) / np.bincount(
                own, weights=rows, minlength=n_groups)
        mean = np.nan_to_num(mean)
        values[e] = values[e] - mean[own]
        values[first] = values[first] + mean[hub]


def _pair_groups(copy, a: int, b: int) -> tuple[np.ndarray, np.ndarray]:
    """Connected groups of the graph between the levels of effects ``a`` and ``b`` (a
    level of each linked when they share a row): a group number per level of ``a`` and
    per level of ``b`` (:func:`bigpanel.sweeps.level_groups`, which the redundancy count
    uses too; chunk by chunk, edges not sorted: numpy 2.4's ``unique`` took 20 s on 3M
    values here, against 0.17 s for a sort)."""
    from .sweeps import level_groups

    return level_groups(copy, a, b)


def _estimate_params(slopes, columns, intercept: float, periods) -> dict:
    """The parameters of :func:`bigpanel.sqlbuild.writeback_parts_sql` (exactly those it uses)."""
    p = {f"b{j}": v for j, v in (*slopes, *columns)}
    if intercept:
        p["b_one"] = intercept
    for i, (value, g) in enumerate(periods):
        p[f"t{i}"] = value
        p[f"g{i}"] = g
    return p


def _centred_periods(executor, used: str, q: int, parts: Parts, base: dict) -> tuple[list[dict], tuple]:
    """The period effects per period, centred within each connected group of units and
    periods: ([{k_period, shown, n, effect}], ((k_period, centred effect), ...))."""
    params = base | _estimate_params((), parts.effect_columns, 0.0, parts.periods)
    sql = sqlbuild.writeback_periods_sql(
        sqlbuild.writeback_parts_sql(used, q, [], [j for j, _ in parts.effect_columns], len(parts.periods), False))
    rows = executor.engine.run(sql, params).to_pylist()  # all threads: one value per period, its rows counted
    if not rows:
        return [], ()
    group = {r["k_period"]: 0 for r in rows}
    if not parts.periods_complete:  # some period effect was left out: the panel may fall apart
        edges = executor.engine.run(sqlbuild.writeback_period_links_sql(used), base).to_pylist()
        group = _groups([r["k_period"] for r in rows], [(e["first_period"], e["k_period"]) for e in edges])
    totals: dict = {}
    for r in rows:
        n, s = totals.get(group[r["k_period"]], (0, 0.0))
        totals[group[r["k_period"]]] = (n + r["n"], s + r["n"] * r["effect"])
    out = []
    for r in rows:
        n, s = totals[group[r["k_period"]]]
        out.append({"k_period": r["k_period"], "shown": r["shown"], "n": int(r["n"]), "effect": r["effect"] - s / n})
    return out, tuple((r["k_period"], r["effect"]) for r in out)


def _groups(values: list, links: list[tuple]) -> dict:
    """Connected groups of periods linked through units (union-find): period -> group."""
    parent = {v: v for v in values}

    def root(v):
        while parent[v] != v:
            parent[v] = parent[parent[v]]
            v = parent[v]
        return v

    for a, b in links:
        if a in parent and b in parent:
            parent[root(a)] = root(b)
    return {v: root(v) for v in values}


def _write_files(executor, plan: list[Written]) -> None:
    """Write each file in a private folder inside its target folder (a query's rows
    streamed from the locked connection, possibly joined to effect tables in the writer,
    or a small Arrow table of aggregates), then rename every file into place, only once
    all are complete."""
    from .source import writer_connection

    private = {folder: interrupts.private_folder(folder) for folder in dict.fromkeys(w.folder for w in plan)}
    try:
        staged = []
        for item in plan:
            temporary = os.path.join(private[item.folder], item.name)
            reader = executor.engine.reader(*item.query, STREAM_BATCH_ROWS) if item.query else item.table
            writer = writer_connection(executor.engine.source.engine, [temporary])
            try:
                writer.register(sqlbuild.WRITE_VIEW, reader)
                for i, table in enumerate(item.joined):
                    writer.register(sqlbuild.effect_view(i), table)
                writer.execute(sqlbuild.copy_parquet_sql(item.select or sqlbuild.all_rows_sql(sqlbuild.WRITE_VIEW),
                                                         temporary))
            except Exception as exc:  # noqa: BLE001 - DuckDB's errors, or the stream's
                interrupts.raise_if_received()
                raise executor.engine.explain(exc) from None
            finally:
                interrupts.unregister(writer)
                writer.close()
                if item.query:
                    reader.close()
            staged.append((temporary, os.path.join(item.folder, item.name)))
        for temporary, final in staged:
            os.replace(temporary, final)
    finally:
        for path in private.values():
            interrupts.remove_folder(path)
