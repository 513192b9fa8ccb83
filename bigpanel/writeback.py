"""Effects and residuals written back as Parquet, out of core and atomically.

After a fit, ``write_effects`` writes one Parquet file per effect (``effect_<column>.parquet``:
the level, its estimated effect, its row count) and ``write_residuals`` writes
``residuals.parquet`` (each used row's keys, fitted value and residual). The rows never
enter Python:

- every query that reads the source is one SELECT on the session's locked connection
  (:mod:`bigpanel.lockdown`), built by :mod:`bigpanel.sqlbuild` from the fit's design (the
  checked expressions) with the estimates as parameters;
- its result streams as Arrow batches into a second, writer DuckDB instance
  (:func:`bigpanel.source.writer_connection`) whose only reachable paths are this run's
  temporary files: it can read no source and write nothing else;
- the files are written into a private folder made inside the target folder (mode 0700,
  removed on any error and after a stop signal) and renamed into place only when every
  file is complete: an interrupted run leaves no file under a final name.

Effects, as estimated (the model y = x'b + a_unit [+ d_period] + u):

- within, unit effects only: a_i is unit i's mean of y - x'b over the rows used;
- unit plus period effects (the exact path): the period effects d_t are the fit's own
  coefficients, then *centred*: their row-weighted mean over the rows used is zero, within
  each connected group of units and periods when the panel falls apart into groups (units
  sharing no period with the rest); a_i is the unit mean of y - x'b - d_t, so the unit
  effects carry the level. Fitted values x'b + a_i + d_t do not depend on the normalisation.

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
RESIDUALS_FILE = "residuals.parquet"
STREAM_BATCH_ROWS = 131_072


# ---------------------------------------------------------------- the target folders


def check_folder(option: str, folder: str, source) -> str:
    """The absolute target folder, made if missing, after refusing one that is a file, is
    not writable, or lies among the source's files. Runs before any scan."""
    from .source import _unwritable_folder

    flag = "--" + option.replace("_", "-")
    path = os.path.realpath(os.path.abspath(os.path.expanduser(folder)))
    problem = _unwritable_folder(path)
    if problem:
        raise InputError(f"Option {flag} names '{echo(folder)}', {problem}. Give a folder you can write to.")
    files = [os.path.realpath(os.path.abspath(f)) for f in (source.files or ())]
    if source.database:
        files.append(os.path.realpath(os.path.abspath(source.database)))
    roots = []
    if len(files) > 1 or source.hive:
        roots.append(os.path.commonpath([os.path.dirname(f) for f in files]))
    for f in files:
        if _inside(f, path):
            raise InputError(f"Option {flag} names '{echo(folder)}', which holds the source file '{echo(f)}'. "
                             "bigpanel never writes among its sources: give a folder of its own.")
    for root in roots:
        if _inside(path, root):
            raise InputError(f"Option {flag} names '{echo(folder)}', which lies inside the source's folder '{echo(root)}'. "
                             "bigpanel never writes among its sources: give a folder outside it.")
    return path


def checked(spec, source):
    """The specification with its target folders checked against the source and made
    absolute (made if missing)."""
    from dataclasses import replace

    folders = {name: check_folder(name, getattr(spec, name), source)
               for name in ("write_effects", "write_residuals") if getattr(spec, name)}
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


def write(executor, est, design, spec, estimates: dict) -> dict:
    """Write the fit's effects and residuals; returns what was written (file paths by
    effect, the residuals file, the normalisation) for the result."""
    if not (spec.write_effects or spec.write_residuals):
        return {}
    parts = parts_of(design, estimates)
    rows = Rows(design.sql_columns, (spec.period,), est.differenced)
    used = executor.used_sql(rows)
    q = design.q
    base = {f"s{j}": 0.0 for j in range(q)} | {f"d{j}": 1.0 for j in range(q)}
    # within with period effects: the centred period effects join every row (the period
    # indicator columns, if any, are left out of x'b); otherwise they are as estimated
    centred = est.absorbs_units and spec.period_effects
    period_rows: list[dict] = []
    periods = parts.periods
    if centred:
        period_rows, periods = _centred_periods(executor, used, q, parts, base)
    params = base | _estimate_params(parts.slopes, () if centred else parts.effect_columns, parts.intercept, periods)
    parts_sql = sqlbuild.writeback_parts_sql(used, q, [j for j, _ in parts.slopes],
                                             [] if centred else [j for j, _ in parts.effect_columns],
                                             len(periods), bool(parts.intercept))
    plan: list[tuple] = []  # (folder, file name, SQL and its parameters, or an Arrow table)
    written: dict = {}
    if spec.write_effects:
        folder = spec.write_effects
        taken: set[str] = set()
        files = {}
        name = file_name(spec.unit, taken)
        columns = _unique([spec.unit, "effect", "n_rows"])
        plan.append((folder, name, (sqlbuild.writeback_unit_effects_sql(parts_sql, columns), params)))
        files[spec.unit] = os.path.join(folder, name)
        if spec.period_effects:
            import pyarrow as pa

            name = file_name(spec.period, taken)
            columns = _unique([spec.period, "effect", "n_rows"])
            table = pa.table({columns[0]: [r["shown"] for r in period_rows],
                              columns[1]: pa.array([float(r["effect"]) for r in period_rows], pa.float64()),
                              columns[2]: pa.array([int(r["n"]) for r in period_rows], pa.int64())})
            plan.append((folder, name, table))
            files[spec.period] = os.path.join(folder, name)
        written["effects"] = files
        written["normalisation"] = NORMALISATION if spec.period_effects else "unit effects carry the level"
    if spec.write_residuals:
        columns = _unique([spec.unit, spec.period, "fitted", "residual"])
        plan.append((spec.write_residuals, RESIDUALS_FILE,
                     (sqlbuild.writeback_residuals_sql(parts_sql, columns, est.absorbs_units), params)))
        written["residuals"] = os.path.join(spec.write_residuals, RESIDUALS_FILE)
    _write_files(executor, plan)
    return written


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


def _write_files(executor, plan: list[tuple]) -> None:
    """Write each entry into its Parquet file in a private folder inside its target
    folder (a query's rows streamed from the locked connection, or a small Arrow table of
    aggregates), then rename every file into place, only once all are complete."""
    from .source import writer_connection

    private = {folder: interrupts.private_folder(folder) for folder in dict.fromkeys(p[0] for p in plan)}
    try:
        staged = []
        for folder, name, rows in plan:
            temporary = os.path.join(private[folder], name)
            reader = executor.engine.reader(*rows, STREAM_BATCH_ROWS) if isinstance(rows, tuple) else rows
            writer = writer_connection(executor.engine.source.engine, [temporary])
            try:
                writer.register(sqlbuild.WRITE_VIEW, reader)
                writer.execute(sqlbuild.copy_parquet_sql(sqlbuild.WRITE_VIEW, temporary))
            except Exception as exc:  # noqa: BLE001 - DuckDB's errors, or the stream's
                interrupts.raise_if_received()
                raise executor.engine.explain(exc) from None
            finally:
                interrupts.unregister(writer)
                writer.close()
                if isinstance(rows, tuple):
                    reader.close()
            staged.append((temporary, os.path.join(folder, name)))
        for temporary, final in staged:
            os.replace(temporary, final)
    finally:
        for path in private.values():
            interrupts.remove_folder(path)
