"""Pooled, within and first-difference least squares over a source, out of core.

The plan for one fit:

1. Check the specification against the source's schema (no rows read) and expand
   ``levels()`` terms and period effects into indicator columns (one small GROUP BY).
2. Probe the first rows for a shift per design column, so sums are accumulated close
   to zero (raw sums far from zero lose digits; ESTIMATION.md).
3. One pass: per-unit sums in DuckDB, chunk by chunk; Python folds each chunk into the
   transformed cross-product and, for unit (or nested) clusters, into the meat.
4. Solve with a pivoted factorization; if the one-pass per-unit formula cancelled
   too many digits, redo step 3 with unit means subtracted in SQL (two passes).
5. Variance: iid from the cross-products; unit and nested clusters from step 3;
   HC1, clusters cutting across units and two-way clustering from one more pass that
   computes the scores in SQL with the coefficients as parameters.
"""

from __future__ import annotations

import re
import warnings
from dataclasses import dataclass, field

import numpy as np
import pyarrow.parquet as pq
import scipy.special  # t and F tails; scipy.stats alone takes ~0.8 s to import

from . import moments, sqlbuild, variance
from .errors import (
    BigpanelWarning, DroppedRowsWarning, DroppedTermsWarning, EstimationError, FewClustersWarning, InputError, echo,
    shown,
)  # fmt: skip
from .results import Coefficient, FitResult
from .solve import overflowing_columns, power_of_two_scale, solve_normal, unscale
from .source import Engine, Session, Source, is_integer, is_numeric, open_source
from .spec import FitSpec

PROBE_ROWS = 20_000  # first rows used for the shifts and the pilot coefficients
MAX_PERIOD_SPAN = 10_000  # widest period range for unit + period effects (bits per unit)
MAX_EXPANDED = 8  # largest model whose unit-cluster meat is summed in the first pass (k^4/4 sums)
EXPANSION_LIMIT = 1e6  # largest-term/result ratio above which the expanded meat is recomputed
MAX_LEVELS = 500
CANCELLATION_LIMIT = 1e6  # raw/transformed sum of squares above which one pass loses > 6 digits
NO_VARIATION = 1e-11  # transformed/raw sum of squares below which a column is constant
FEW_CLUSTERS = 40  # common practice: below ~40 clusters CR1 is unreliable


def fit(
    source,
    outcome: str,
    regressors,
    unit: str,
    period: str,
    estimator: str = "within",
    effects=None,
    se: str | None = None,
    cluster=None,
    where: str | None = None,
    intercept: bool | None = None,
    period_step: int = 1,
    table: str | None = None,
    query: str | None = None,
    csv_types: dict | None = None,
    engine: Engine | None = None,
) -> FitResult:
    """Estimate a panel regression on a source too large for memory.

    Parameters
    ----------
    source : str, path, Source, or in-memory frame
        See :func:`bigpanel.open_source`. A :class:`Source` is used as it is.
    outcome : str
        Outcome column or SQL expression.
    regressors : str or list of str
        Terms separated by commas (commas inside parentheses do not split): columns,
        SQL scalar expressions, ``lag(EXPR[, K])`` and ``levels(COLUMN[, 'BASE'])``.
    unit, period : str
        Unit and period columns. First differences and lags need whole-number periods.
    estimator : {"pooled", "within", "first-difference"}
    effects : str or list of str, optional
        Fixed effects: within defaults to the unit and may add the period; for first
        differences, the period adds period intercepts to the differenced equation.
    se : {"iid", "hc1", "cluster"}, optional
        Default: cluster for within and first differences, iid for pooled.
    cluster : str or list of str, optional
        One or two cluster columns (default: the unit).
    where : str, optional
        SQL predicate applied before anything else.
    intercept : bool, optional
        Keep an intercept (pooled and first differences; default True).
    period_step : int
        Distance between consecutive periods (default 1).
    """
    spec = FitSpec.build(outcome, regressors, unit, period, estimator, effects, se, cluster, intercept, period_step)
    if isinstance(source, Source):
        src = source
        if where is not None:
            raise InputError("Option 'where' is given twice: set it on the Source or in fit(), not both.")
    else:
        src = open_source(source, table=table, query=query, where=where, csv_types=csv_types, engine=engine)
    with Session(src) as session:
        return _Fit(session, spec).run()


@dataclass
class _Design:
    labels: list[str]  # regressor labels, outcome excluded
    columns: list[tuple[str, int]]  # (sql, lag) for regressors then the outcome
    is_effect: list[bool]  # period-effect indicator columns (not reported as coefficients)
    absorbed_periods: str | None = None  # "twoway" (within) or "grouped" (pooled, FD): period
    # effects solved from per-period sums instead of indicator columns in SQL


@dataclass
class _Pass:
    """What one pass over the rows accumulated."""

    total: np.ndarray  # transformed cross-product over (regressors, [constant], outcome)
    raw_diag: np.ndarray  # the same diagonal before demeaning (for the digit-loss check)
    n_obs: int
    n_units: int
    singletons: int = 0
    singleton_rows: int = 0
    t_min: object = None
    t_max: object = None
    expansion: list | None = None  # per-chunk sums for the unit-cluster meat (moments.py)
    pilot: np.ndarray | None = None
    extra_labels: list = field(default_factory=list)  # columns after the regressors, before y
    extra_effect: list = field(default_factory=list)  # which of them are absorbed effects
    effect_values: list = field(default_factory=list)  # every period with an effect (base included)
    effect_rows: np.ndarray | None = None  # each period's indicator row over the extra columns


class _Fit:
    def __init__(self, session: Session, spec: FitSpec):
        self.s = session
        self.spec = spec
        self.notes: list[str] = []
        self.streaming = False  # first differences in file order within chunks (see run)
        self.counted: dict | None = None  # rows by reason, once counted
        self._bounds: tuple | None = None
        self._n_filtered: int | None = None

    # ------------------------------------------------------------------ checks
    def _check(self) -> None:
        spec, s = self.spec, self.s
        names = [spec.unit, spec.period, *spec.cluster]
        s.require_columns(names)
        s.check_filter()
        if spec.needs_order:
            ptype = s.columns()[spec.period]
            if not is_integer(ptype):
                raise InputError(
                    f"Column '{spec.period}' in {s.source.label} has type {ptype}; first differences and lags need "
                    "whole-number periods. Use a period index column (for example months since a start date)."
                )

    def _numeric_term(self, expr: str, what: str, text: str) -> None:
        """``expr`` is SQL rendered from a checked parse tree; ``text`` is what the user wrote."""
        if _BASE_TEN_LOG.search(expr):
            msg = f"{what} {shown(text)} uses log(), which in SQL is the base-10 logarithm; ln() is the natural one"
            self.notes.append(msg)
            warnings.warn(msg, BigpanelWarning, stacklevel=4)
        cols = self.s.columns()
        bare = expr.strip().strip('"')
        if bare in cols:
            if not is_numeric(cols[bare]):
                advice = (f"Use levels({bare}) for a categorical column, or convert it in an expression." if what == "Term"
                          else "Give a numeric outcome, or convert it in an expression.")
                raise InputError(f"Column '{bare}' in {self.s.source.label} has type {cols[bare]}, not a number. {advice}")
            return
        kind = self.s.describe_expression(expr, what, text)
        if not is_numeric(kind):
            raise InputError(f"{what} {shown(text)} has type {kind}, not a number. Give a numeric expression.")

    def _levels(self, expr: str) -> list[str]:
        sql = sqlbuild.distinct_values_sql(self.s.source.filtered(), expr, MAX_LEVELS + 1)
        values = self.s.run(sql).column("v").to_pylist()
        if len(values) > MAX_LEVELS:
            raise InputError(f"Column '{expr}' has more than {MAX_LEVELS} levels. Use it as a fixed effect or group it first.")
        return values

    def _design(self) -> _Design:
        spec = self.spec
        labels, columns, is_effect = [], [], []
        cols = self.s.columns()
        for term in spec.terms:
            if term.kind == "levels":
                if term.expr not in cols:
                    from .errors import unknown_column

                    raise unknown_column(term.expr, self.s.source.label, cols)
                quoted = sqlbuild.quote_ident(term.expr)
                levels = self._levels(quoted)
                base = term.base if term.base is not None else (levels[0] if levels else None)
                if base not in levels:
                    raise InputError(f"Term '{echo(term.text)}': base level '{echo(base)}' does not occur in column '{echo(term.expr)}'; "
                                     f"name one of its levels ({echo(', '.join(map(str, levels[:10])))}) as the base.")
                for level in levels:
                    if level != base:
                        labels.append(f"{term.expr}[{level}]")
                        columns.append((sqlbuild.indicator_sql(quoted, level), 0))
                        is_effect.append(False)
            else:
                self._numeric_term(term.expr, "Term", term.text)
                labels.append(term.text)
                columns.append((term.expr, term.lag))
                is_effect.append(False)
        absorbed = None
        if spec.period_effects:
            absorbed = "grouped" if spec.estimator != "within" else ("twoway" if self._integer_period() else None)
        if spec.period_effects and absorbed is None:  # within, periods that are not whole numbers
            quoted = sqlbuild.quote_ident(spec.period)
            for value in sorted(self._levels(quoted), key=_period_key)[1:]:
                labels.append(f"{spec.period}[{value}]")
                columns.append((sqlbuild.indicator_sql(quoted, value), 0))
                is_effect.append(True)
        self._numeric_term(spec.outcome_sql, "Outcome", spec.outcome)
        columns.append((spec.outcome_sql, 0))
        return _Design(labels, columns, is_effect, absorbed)

    def _integer_period(self) -> bool:
        ptype = self.s.columns()[self.spec.period].upper()
        return is_integer(ptype)

    def _period_bounds(self) -> tuple[object, object]:
        """First and last period in the filtered source (reads the period column only)."""
        if self._bounds is None:
            row = self.s.run(sqlbuild.period_bounds_sql(self.s.source.filtered(), self.spec.period)).to_pylist()[0]
            self._bounds = (row["lo"], row["hi"])
        return self._bounds

    def _period_range(self) -> tuple[int, int]:
        lo, hi = self._period_bounds()
        if lo is None:
            raise EstimationError(self._empty_message())
        if hi - lo > MAX_PERIOD_SPAN:
            raise InputError(
                f"Column '{self.spec.period}' spans {hi - lo + 1} period values; period effects need a compact index "
                f"(at most {MAX_PERIOD_SPAN + 1}). Use a period number such as months since the first month."
            )
        return int(lo), int(hi)

    # ------------------------------------------------------------------ SQL
    def _rows(self, design: _Design, chunk: moments.Chunk | None = None, head: bool = False) -> str:
        spec = self.spec
        chunk = chunk or moments.Chunk()
        source = chunk.source_sql(self.s.source, spec.unit)
        if head:
            source = sqlbuild.head_sql(source, PROBE_ROWS)
        rows = sqlbuild.design_rows_sql(source, spec.unit, spec.period, list(spec.cluster), design.columns, spec.period_step)
        if spec.estimator == "first-difference":
            # a real chunk runs on one thread in file order: difference without sorting
            streaming = self.streaming and chunk.files is not None and not head
            rows = sqlbuild.differenced_rows_sql(rows, len(spec.cluster), len(design.columns), streaming)
        return rows

    def _valid(self, q: int) -> str:
        return sqlbuild.valid_predicate(q, self.spec.estimator == "first-difference", self.spec.period_step)

    def _shifts(self, design: _Design) -> tuple[np.ndarray, np.ndarray]:
        """Shift and scale (a power of two, see solve.py) per design column, from the first rows."""
        q = len(design.columns)
        zero = {f"s{j}": 0.0 for j in range(q)} | {f"d{j}": 1.0 for j in range(q)}
        spec = self.spec
        head = sqlbuild.head_sql(self.s.source.filtered(), PROBE_ROWS)
        rows = sqlbuild.design_rows_sql(head, spec.unit, spec.period, list(spec.cluster), design.columns, spec.period_step)
        sql = sqlbuild.probe_sql(rows, q)  # levels, not differences: only the constant's column moves
        row = self.s.run(sql, zero).to_pylist()[0]
        scales = np.array([power_of_two_scale(row[f"m{j}"]) for j in range(q)])
        if spec.estimator != "within" and not spec.intercept:
            return np.zeros(q), scales
        shifts = np.array([row[f"a{j}"] if row[f"a{j}"] is not None else 0.0 for j in range(q)], dtype=float)
        return np.where(np.isfinite(shifts), shifts, 0.0), scales

    # ------------------------------------------------------------------ passes
    def _mode(self) -> str:
        if self.spec.estimator == "within":
            return "within"
        return "intercept" if self.spec.intercept else "plain"

    def _unit_clusters(self) -> bool:
        """Standard errors clustered by the unit alone (the one-pass meat's case)."""
        return self.spec.se == "cluster" and self.spec.cluster == (self.spec.unit,)

    def _accumulate(self, design: _Design, params: dict, chunks, demeaned: bool, pilot: np.ndarray | None,
                    head: bool = False) -> _Pass:
        q = len(design.columns)
        mode = self._mode()
        n_cl = len(self.spec.cluster)
        total = moments.sum_function(chunks)

        def used(files):
            rows = sqlbuild.used_rows_sql(self._rows(design, files, head), self._valid(q))
            return sqlbuild.demeaned_rows_sql(rows, q, n_cl) if demeaned else rows

        if design.absorbed_periods == "twoway":
            return self._accumulate_twoway(design, params, chunks, used, total)
        if design.absorbed_periods == "grouped":
            return self._accumulate_grouped(design, params, chunks, used, total)
        if mode != "within" and pilot is None:
            results = moments.run_chunks(self.s, chunks, lambda f: sqlbuild.pooled_moments_sql(used(f), q, total), params)
            rows = [t.to_pylist()[0] for t in results]
            mat, raw, n = moments.pooled_matrix(rows, q, mode == "intercept")
            lo = [r["t_min"] for r in rows if r["t_min"] is not None]
            hi = [r["t_max"] for r in rows if r["t_max"] is not None]
            n_units = sum(int(r["n_units"]) for r in rows)  # chunks hold disjoint units
            return _Pass(mat, raw, n, n_units, t_min=min(lo) if lo else None, t_max=max(hi) if hi else None)

        expand = pilot is not None
        p = dict(params)
        if expand:
            p.update({f"q{j}": float(v) for j, v in enumerate(pilot)})

        def make(chunk):
            units = sqlbuild.unit_moments_sql(used(chunk), q, total)
            return sqlbuild.unit_pass_sql(units, q, mode, expand, total)

        rows = [t.to_pylist()[0] for t in moments.run_chunks(self.s, chunks, make, p)]
        dim = q + (1 if mode == "intercept" else 0)
        acc = _Pass(total=np.zeros((dim, dim)), raw_diag=np.zeros(q), n_obs=0, n_units=0)
        for row in rows:
            self._add_unit_row(acc, row, q, dim)
        if mode == "intercept":
            acc.raw_diag = np.r_[acc.raw_diag[:-1], acc.n_obs, acc.raw_diag[-1]]
        if expand:
            acc.expansion = [{key: r[key] for key in r if key.startswith(("rr", "rb", "bb"))} for r in rows]
            acc.pilot = pilot
        return acc

    def _accumulate_twoway(self, design: _Design, params: dict, chunks, used, total: str) -> _Pass:
        """Unit and period effects: the cross-product over (regressors, period indicators
        but the first, outcome) in the unit-demeaned space, from one pass (ESTIMATION.md):
        D'Z = per-period sums of z minus, per presence pattern, the sums of unit means;
        D'D = diag(n_t) - sum over patterns of (sum 1/n_i) c c'."""
        q = len(design.columns)
        first, last = self._period_range()
        tables = moments.run_chunks(self.s, chunks, lambda f: sqlbuild.twoway_pass_sql(used(f), q, first, last, total), params)
        acc = _Pass(total=np.zeros((q, q)), raw_diag=np.zeros(q), n_obs=0, n_units=0)
        patterns: dict[str, np.ndarray] = {}
        periods: dict[int, np.ndarray] = {}
        for table in tables:
            for row in table.to_pylist():
                if row["kind"] == "total":
                    self._add_unit_row(acc, row, q, q)
                elif row["kind"] == "pattern":
                    vec = np.array([row["pattern_units"], row["inv_n"]] + [row[f"m{j}"] for j in range(q)], dtype=float)
                    patterns[row["pattern"]] = patterns.get(row["pattern"], 0) + vec
                else:
                    vec = np.array([row["period_n"]] + [row[f"s{j}"] for j in range(q)], dtype=float)
                    periods[row["period"]] = periods.get(row["period"], 0) + vec
        values = sorted(periods)
        index = {v: i for i, v in enumerate(values)}
        n_t = np.array([periods[v][0] for v in values])
        sums = np.array([periods[v][1:] for v in values])
        presence = np.zeros((len(patterns), len(values)))
        weights, mean_sums = np.zeros(len(patterns)), np.zeros((len(patterns), q))
        for r, (bits, vec) in enumerate(patterns.items()):
            for offset in (i for i, b in enumerate(bits) if b == "1"):
                presence[r, index[first + offset]] = 1.0
            weights[r], mean_sums[r] = vec[1], vec[2:]
        dup = sum(int(vec[0]) for bits, vec in patterns.items() if abs(bits.count("1") * vec[1] - vec[0]) > 1e-9 * vec[0])
        if dup:
            self._duplicates(reason="unit and period effects")
        dz = sums - presence.T @ mean_sums  # D'Z (periods x q)
        dd = np.diag(n_t) - presence.T @ (weights[:, None] * presence)  # D'D
        eff = list(range(1, len(values)))  # the first period is the base
        kx, e = q - 1, len(eff)
        full = np.zeros((kx + e + 1, kx + e + 1))
        w = acc.total
        full[:kx, :kx] = w[:kx, :kx]
        full[:kx, -1] = full[-1, :kx] = w[:kx, -1]
        full[-1, -1] = w[-1, -1]
        full[kx:kx + e, :kx] = dz[eff, :kx]
        full[:kx, kx:kx + e] = dz[eff, :kx].T
        full[kx:kx + e, kx:kx + e] = dd[np.ix_(eff, eff)]
        full[kx:kx + e, -1] = full[-1, kx:kx + e] = dz[eff, -1]
        acc.total = full
        acc.raw_diag = np.r_[acc.raw_diag[:kx], n_t[eff], acc.raw_diag[-1]]
        self._set_effects(acc, values, with_constant=False)
        return acc

    def _set_effects(self, acc: _Pass, values: list, with_constant: bool) -> None:
        """Label the period-effect columns (all periods but the first, then the constant
        when there is one) and record each period's indicator row over them."""
        effects = values[1:] if with_constant or self.spec.estimator == "within" else values
        acc.extra_labels = [f"{self.spec.period}[{v}]" for v in effects] + (["(intercept)"] if with_constant else [])
        acc.extra_effect = [True] * len(acc.extra_labels)
        rows = np.zeros((len(values), len(acc.extra_labels)))
        for i, v in enumerate(values):
            if v in effects:
                rows[i, effects.index(v)] = 1.0
            if with_constant:
                rows[i, -1] = 1.0
        acc.effect_values, acc.effect_rows = list(values), rows

    def _accumulate_grouped(self, design: _Design, params: dict, chunks, used, total: str) -> _Pass:
        """Period effects in pooled and differenced regressions: indicator cross-products
        are per-period counts and sums, so one GROUP BY period gives the whole matrix over
        (regressors, indicators but the first, constant, outcome)."""
        q = len(design.columns)
        by_period: dict = {}
        units = 0  # chunks hold disjoint units, so their distinct counts add up
        for table in moments.run_chunks(self.s, chunks, lambda f: sqlbuild.period_moments_sql(used(f), q, total), params):
            for row in table.to_pylist():
                if row["all_periods"]:
                    units += int(row["n_units"])
                    continue
                acc_row = by_period.setdefault(row["period"], {"n": 0, "s": np.zeros(q), "p": np.zeros((q, q))})
                acc_row["n"] += int(row["n"])
                acc_row["s"] += [row[f"s{j}"] for j in range(q)]
                acc_row["p"] += moments.symmetric(row, "p", q)
        if not by_period:
            return _Pass(np.zeros((q, q)), np.zeros(q), 0, 0)
        values = sorted(by_period)
        intercept = self.spec.intercept
        kx = q - 1
        effects = values[1:] if intercept else values
        e = len(effects) + (1 if intercept else 0)
        ys = kx + e  # layout: regressors, indicators, [constant], outcome
        full = np.zeros((ys + 1, ys + 1))
        z_index = list(range(kx)) + [ys]  # where the design columns (regressors, outcome) go
        for v in values:
            r = by_period[v]
            full[np.ix_(z_index, z_index)] += r["p"]
            cols = ([kx + effects.index(v)] if v in effects else []) + ([kx + e - 1] if intercept else [])
            for c in cols:
                full[c, z_index] += r["s"]
                full[z_index, c] += r["s"]
                for c2 in cols:
                    full[c, c2] += r["n"]
        n_obs = sum(by_period[v]["n"] for v in values)
        raw = np.r_[np.diag(full)[:kx + e], full[ys, ys]]
        acc = _Pass(full, raw, n_obs, units, t_min=min(values), t_max=max(values))
        self._set_effects(acc, values, with_constant=intercept)
        return acc

    def _add_unit_row(self, acc: _Pass, row: dict, q: int, dim: int) -> None:
        acc.total += moments.symmetric(row, "w", dim)
        acc.raw_diag += [row[f"r{j}"] or 0.0 for j in range(q)]
        acc.n_obs += int(row["n_obs"])
        acc.n_units += int(row["n_units"])
        acc.singletons += int(row["singletons"])
        acc.singleton_rows += int(row["singleton_rows"])

    def _pilot(self, design: _Design, params: dict) -> np.ndarray | None:
        """Coefficients from the first rows, the centre of the one-pass meat expansion;
        None when the model is too large for it or clusters are not units."""
        if not self._unit_clusters() or design.absorbed_periods:
            return None
        q = len(design.columns)
        k = q - 1 + (1 if self._mode() == "intercept" else 0)
        if k > MAX_EXPANDED:
            return None
        acc = self._accumulate(design, params, [moments.Chunk()], demeaned=False, pilot=None, head=True)
        h, g = acc.total[:k, :k], acc.total[:k, k]
        if not np.isfinite(h).all() or acc.n_obs == 0:
            return np.zeros(k)
        return np.linalg.lstsq(h, g, rcond=None)[0]

    # ------------------------------------------------------------------ score pass
    def _score_params(self, design: _Design, params: dict, acc: _Pass, sol, intercept: bool) -> dict:
        """Shifts, coefficients and (two-way) period effects with their projections Gamma."""
        q = len(design.columns)
        kx = q - 1
        p = dict(params)
        p.update({f"b{j}": float(sol.coef[j]) for j in range(kx)})
        if intercept:
            p["b_one"] = float(sol.coef[kx])
        if acc.effect_rows is not None:
            # Frisch-Waugh-Lovell: Gamma projects the regressors on the kept effect columns
            e = acc.effect_rows.shape[1]
            kept = np.flatnonzero(sol.kept[kx:kx + e])
            dd = acc.total[kx:kx + e, kx:kx + e][np.ix_(kept, kept)]
            dx = acc.total[kx:kx + e, :kx][kept]
            projection = np.zeros((e, kx))
            if kept.size:
                projection[kept] = np.linalg.lstsq(dd, dx, rcond=None)[0]
            gamma = acc.effect_rows @ sol.coef[kx:kx + e]
            big_gamma = acc.effect_rows @ projection
            for i, value in enumerate(acc.effect_values):
                p[f"t{i}"] = value
                p[f"g{i}"] = float(gamma[i])
                p.update({f"G{i}_{j}": float(big_gamma[i, j]) for j in range(kx)})
        return p

    def _meats(self, design: _Design, params: dict, acc: _Pass, sol, intercept: bool, chunks, nested: bool):
        """Meats over the score columns (regressors [and constant]) and cluster counts."""
        spec = self.spec
        q = len(design.columns)
        k = q - 1 + (1 if intercept else 0)
        demean = spec.estimator == "within"
        n_periods = len(acc.effect_values)
        p = self._score_params(design, params, acc, sol, intercept)

        def used(files):
            return sqlbuild.used_rows_sql(self._rows(design, files), self._valid(q))

        if spec.se == "cluster" and len(spec.cluster) == 1 and (spec.cluster[0] == spec.unit or nested):
            by_unit = spec.cluster[0] == spec.unit
            total = moments.sum_function(chunks)
            make = lambda f: sqlbuild.unit_scores_sql(used(f), q, intercept, demean, n_periods, by_unit, total)  # noqa: E731
            tables = moments.run_chunks(self.s, chunks, make, p)
            if by_unit:
                rows = [t.to_pylist()[0] for t in tables]
                return [sum(moments.symmetric(r, "o", k) for r in rows)], [sum(int(r["n_groups"]) for r in rows)]
            groups: dict[str, np.ndarray] = {}
            for t in tables:
                for r in t.to_pylist():
                    groups[r["g"]] = groups.get(r["g"], 0) + np.array([r[f"e{i}"] for i in range(k)], dtype=float)
            scores = np.array([groups[g] for g in sorted(groups)]) if groups else np.zeros((0, k))
            return [scores.T @ scores], [len(groups)]
        all_rows = used(moments.Chunk())
        if spec.se == "hc1":
            row = self.s.run(sqlbuild.residual_moments_sql(all_rows, q, intercept, demean, n_periods), p).to_pylist()[0]
            return [moments.symmetric(row, "h", k)], []
        n_cl = len(spec.cluster)
        out = {r["gid"]: (moments.symmetric(r, "o", k), int(r["n_groups"]))
               for r in self.s.run(sqlbuild.cluster_scores_sql(all_rows, q, intercept, demean, n_periods, n_cl), p).to_pylist()}
        order = [0] if n_cl == 1 else [1, 2, 0]  # GROUPING(c0, c1): c0 only 01, c1 only 10, both 00
        return [out[g][0] for g in order], [out[g][1] for g in order]

    def _nested(self, design: _Design, params: dict) -> bool:
        """Is the (single, non-unit) cluster column constant within every unit?"""
        q = len(design.columns)
        used = sqlbuild.used_rows_sql(self._rows(design), self._valid(q))
        return int(self.s.run(sqlbuild.nesting_sql(used, 0), params).column("mixed")[0].as_py()) == 0

    # ------------------------------------------------------------------ run
    def run(self) -> FitResult:
        spec, s = self.spec, self.s
        self._check()
        if any(t.kind == "lag" for t in spec.terms):
            self._duplicates(only_if_any=True)
        design = self._design()
        q = len(design.columns)
        shifts, scales = self._shifts(design)
        params = {f"s{j}": float(shifts[j]) for j in range(q)} | {f"d{j}": float(scales[j]) for j in range(q)}
        chunks = moments.plan_chunks(s, spec.unit)
        pilot = self._pilot(design, params)
        # Sorted extracts are differenced in scan order; if any consecutive pair was missed
        # that way (files not sorted by period within unit), the pass is redone with sorting.
        self.streaming = spec.estimator == "first-difference" and len(chunks) > 1 and not any(t.lag for t in spec.terms)
        acc = self._accumulate(design, params, chunks, demeaned=False, pilot=pilot)
        if self.streaming and self._missed_pairs(design, params, acc):
            self.streaming = False
            self.notes.append("files are not sorted by unit and period; differences were formed after sorting")
            acc = self._accumulate(design, params, chunks, demeaned=False, pilot=pilot)
        if acc.n_obs == 0:
            raise EstimationError(self._empty_message())
        accumulation = "one pass, shifted per-unit sums"
        ratio = self._cancellation(acc)
        if spec.estimator == "within" and ratio > CANCELLATION_LIMIT:
            acc = self._accumulate(design, params, chunks, demeaned=True, pilot=pilot)
            accumulation = "two passes, unit means subtracted in SQL"
        return self._finish(design, shifts, params, acc, accumulation, chunks)

    def _cancellation(self, acc: _Pass) -> float:
        diag = np.diag(acc.total)
        with np.errstate(divide="ignore", invalid="ignore"):
            r = np.where(diag > 0, acc.raw_diag / diag, 1.0)
        return float(np.max(r)) if r.size else 1.0

    def _empty_message(self) -> str:
        src = self.s.source
        where = f" after the filter '{echo(src.where)}'" if src.where else ""
        pairs, check = "", "the filter and the columns"
        if self.spec.estimator == "first-difference" or any(t.lag for t in self.spec.terms):
            pairs = f", or (differences and lags) lacks the unit's period {self.spec.period_step:,} before it"
            check = "the filter, the columns and the period step"
        return (f"No usable rows in {src.label}{where}: every row was filtered out or lacks a value of the unit "
                f"'{echo(self.spec.unit)}' or of a term{pairs}. Check {check}.")

    def _rows_after_filter(self) -> int:
        """Rows left by the filter (footers only for unfiltered Parquet; counted once)."""
        if self._n_filtered is None:
            src = self.s.source
            if src.kind == "parquet" and not src.where:
                self._n_filtered = sum(pq.read_metadata(f).num_rows for f in src.files)
            else:
                self._n_filtered = int(self.s.run(sqlbuild.count_rows_sql(src.filtered())).column("n")[0].as_py())
        return self._n_filtered

    def _count_rows(self, design: _Design, params: dict) -> dict:
        """Rows by reason, over all rows (differences formed after sorting)."""
        if self.counted is None:
            spec = self.spec
            fd = spec.estimator == "first-difference"
            rows = self._rows(design)
            self.counted = self.s.run(sqlbuild.row_counts_sql(rows, len(design.columns), fd, spec.period_step), params).to_pylist()[0]
        return self.counted

    def _missed_pairs(self, design: _Design, params: dict, acc: _Pass) -> bool:
        """Did differencing in scan order miss consecutive pairs that sorting would find?"""
        if self._rows_after_filter() == acc.n_obs + acc.n_units:  # every unit's rows all paired
            return False
        row = self._count_rows(design, params)
        pairs = row["n_rows"] - row["first_of_unit"] - row["after_gap"] - row["duplicate_keys"] - row["missing"]
        return pairs != acc.n_obs

    def _dropped(self, design: _Design, params: dict, acc: _Pass) -> dict:
        spec = self.spec
        total = self._rows_after_filter()
        fd = spec.estimator == "first-difference"
        expected = acc.n_obs + acc.singleton_rows + (acc.n_units if fd else 0)
        out = {"filtered_out": None, "missing_or_not_finite": 0}
        if fd:
            out.update(first_period_of_unit=acc.n_units, after_gap=0)
        if total != expected:
            row = self._count_rows(design, params)
            if fd and row["duplicate_keys"]:
                self._duplicates()
            out["missing_or_not_finite"] = int(row["missing"])
            if fd:
                out["first_period_of_unit"] = int(row["first_of_unit"])
                out["after_gap"] = int(row["after_gap"])
        out.pop("filtered_out")
        return out

    def _duplicates(self, reason: str = "First differences and lags", only_if_any: bool = False) -> None:
        """Raise the error naming a few duplicate (unit, period) keys; with ``only_if_any``
        first look for them and return quietly when there are none."""
        spec = self.spec
        sql = sqlbuild.checkup_duplicate_scan_sql(self.s.source.filtered(), spec.unit, sqlbuild.quote_ident(spec.period))
        rows = self.s.run(sql, {"n_examples": 5}).to_pylist()
        if only_if_any and not rows:
            return
        shown = ", ".join(f"({r['unit_key']}, {r['period_key']})" for r in rows)
        raise InputError(
            f"Columns '{spec.unit}' and '{spec.period}' in {self.s.source.label} have duplicate keys, for example {shown}. "
            f"{reason[0].upper() + reason[1:]} need one row per unit and period: filter or aggregate the duplicates."
        )

    def _finish(self, design: _Design, shifts, params, acc: _Pass, accumulation: str, chunks) -> FitResult:
        spec = self.spec
        mode = self._mode()
        dim = acc.total.shape[0]
        k = dim - 1
        extra = acc.extra_labels or (["(intercept)"] if mode == "intercept" else [])
        labels = list(design.labels) + extra
        is_effect = list(design.is_effect) + (acc.extra_effect or [False] * len(extra))
        overflow = overflowing_columns(acc.total)
        if overflow:
            raise _too_large([(labels + [spec.outcome])[j] for j in overflow], "its sums of squares overflow")
        h, g, yy = acc.total[:k, :k], acc.total[:k, k], acc.total[k, k]
        terms_dropped: dict[str, str] = {}
        zero_var = np.zeros(k, dtype=bool)
        if spec.estimator in ("within", "first-difference"):
            raw = acc.raw_diag[:k]
            with np.errstate(divide="ignore", invalid="ignore"):
                zero_var = (np.diag(h) <= NO_VARIATION * np.maximum(raw, 1e-300)) | (np.diag(h) <= 0)
            if mode == "intercept":
                zero_var[k - 1] = False
            for j in np.flatnonzero(zero_var):
                terms_dropped[labels[j]] = "no variation within units"
        sol = solve_normal(h, g, zero_variation=zero_var)
        for j in np.flatnonzero(~sol.kept & ~zero_var):
            terms_dropped[labels[j]] = "collinear with other terms"
        if terms_dropped:
            warnings.warn("Terms left out: " + ", ".join(f"{t} ({w})" for t, w in terms_dropped.items()), DroppedTermsWarning, stacklevel=3)
        if not sol.kept.any():
            raise EstimationError("No term can be estimated: " + echo("; ".join(f"{t}: {w}" for t, w in terms_dropped.items()))
                                  + ". Give terms that change within units and are not combinations of each other.")
        coef = sol.coef
        rss = max(float(yy - g @ coef), 0.0)
        if mode == "intercept":
            tss = yy - acc.total[k - 1, k] ** 2 / acc.total[k - 1, k - 1]
        else:
            tss = yy
        r2 = 1.0 - rss / tss if tss > 0 else float("nan")
        n_obs = acc.n_obs
        n_kept = int(sol.kept.sum())
        absorbed = acc.n_units if spec.estimator == "within" else 0
        var = self._variance(design, params, acc, sol, rss, n_obs, n_kept, absorbed, mode, chunks)
        # columns were scaled by powers of two in SQL (solve.py); back to the user's units,
        # with the intercept moved back from the shifted columns:
        # y - c_y = b0' + sum b_j (x_j - c_j), so the intercept is b0' + c_y - c'b
        col_scale = np.ones(k)
        col_scale[: len(design.labels)] = [params[f"d{j}"] for j in range(len(design.labels))]
        y_scale = params[f"d{len(design.columns) - 1}"]
        if mode == "intercept" and not is_effect[k - 1]:
            c = np.array([0.0 if spec.estimator == "first-difference" else shifts[j] for j in range(k - 1)] + [0.0])
            c_y = 0.0 if spec.estimator == "first-difference" else shifts[-1]
            estimate, std_error, overflow = unscale(coef, var.vcov, col_scale, y_scale, k - 1, c, c_y)
        else:
            estimate, std_error, overflow = unscale(coef, var.vcov, col_scale, y_scale)
        overflow = [j for j in overflow if sol.kept[j] and not is_effect[j]]
        if overflow:
            raise _too_large([labels[j] for j in overflow], "its estimate or standard error is beyond a double's range")
        crit = float(scipy.special.stdtrit(var.df, 0.975)) if var.df > 0 else float("nan")
        coefs = []
        for j in range(k):
            if is_effect[j] or not sol.kept[j]:
                continue
            se = float(std_error[j])
            tval = estimate[j] / se if se > 0 else float("nan")
            p = 2 * float(scipy.special.stdtr(var.df, -abs(tval))) if var.df > 0 else float("nan")
            coefs.append(Coefficient(labels[j], float(estimate[j]), se, float(tval), float(p),
                                     float(estimate[j] - crit * se), float(estimate[j] + crit * se)))
        slopes = [j for j in range(k) if sol.kept[j] and not is_effect[j] and labels[j] != "(intercept)"]
        f_stat, f_p = float("nan"), float("nan")
        if slopes:
            # the Wald statistic does not change when columns are rescaled: take the scaled ones
            vs = var.vcov[np.ix_(slopes, slopes)]
            bs = coef[slopes]
            try:
                f_stat = float(bs @ np.linalg.solve(vs, bs) / len(slopes))
                f_p = float(scipy.special.fdtrc(len(slopes), var.df, f_stat))
            except np.linalg.LinAlgError:
                pass
        if var.n_clusters is not None:
            g_min = var.n_clusters if isinstance(var.n_clusters, int) else min(var.n_clusters)
            if g_min < FEW_CLUSTERS:
                msg = f"only {g_min} clusters: cluster-robust errors are unreliable with fewer than about {FEW_CLUSTERS}"
                self.notes.append(msg)
                warnings.warn(msg, FewClustersWarning, stacklevel=3)
        if var.clipped_eigenvalues:
            self.notes.append(f"two-way variance was not positive semi-definite; {var.clipped_eigenvalues} negative eigenvalues set to zero")
        dropped = self._dropped(design, params, acc)
        lost = {k2: v for k2, v in dropped.items() if v and k2 != "first_period_of_unit"}
        if lost:
            warnings.warn("Rows left out: " + ", ".join(f"{v:,} {k2.replace('_', ' ')}" for k2, v in lost.items()), DroppedRowsWarning, stacklevel=3)
        if acc.t_min is None:
            acc.t_min, acc.t_max = self._period_bounds()
        n_periods = None
        if isinstance(acc.t_min, (int, np.integer)) and isinstance(acc.t_max, (int, np.integer)):
            n_periods = int((acc.t_max - acc.t_min) // spec.period_step) + 1
        r2_kind = {"within": "within", "first-difference": "differenced equation", "pooled": "pooled"}[spec.estimator]
        return FitResult(
            estimator=spec.estimator, outcome=spec.outcome, coefficients=tuple(coefs), n_obs=n_obs, n_units=acc.n_units,
            n_periods=n_periods, period_first=acc.t_min, period_last=acc.t_max, effects=spec.effects,
            variance={"type": var.kind, "df": var.df, "small_sample_factor": var.small_sample_factor,
                      "n_clusters": var.n_clusters, "cluster_columns": list(spec.cluster)},
            r_squared=float(r2), r_squared_kind=r2_kind, f_stat=f_stat, f_df=(float(len(slopes)), float(var.df)),
            f_p_value=f_p, rows_dropped=dropped, terms_dropped=terms_dropped, singletons_dropped=acc.singletons,
            absorbed=absorbed, condition_number=sol.condition, accumulation=accumulation, source=self.s.source.label,
            where=self.s.source.where, warnings=tuple(self.notes),
        )

    def _variance(self, design, params, acc: _Pass, sol, rss, n_obs, n_kept, absorbed, mode, chunks) -> variance.Variance:
        spec = self.spec
        if spec.se == "iid":
            return variance.iid(sol.inverse, rss, n_obs, n_kept, absorbed)
        intercept = mode == "intercept" and design.absorbed_periods != "grouped"  # else absorbed
        k = len(design.columns) - 1 + (1 if intercept else 0)  # score columns: regressors [, constant]
        inverse = sol.inverse[:k, :k]  # two-way: (X''X'')^-1, the regressor block (Frisch-Waugh-Lovell)
        if spec.se == "hc1":
            meats, _ = self._meats(design, params, acc, sol, intercept, chunks, nested=False)
            return _embed(variance.hc1(inverse, meats[0], n_obs, n_kept, absorbed), len(sol.coef))
        if len(spec.cluster) == 1 and spec.cluster[0] == spec.unit and acc.expansion is not None:
            meat, worst = np.zeros((k, k)), 0.0
            for row in acc.expansion:
                part, ratio = moments.expanded_meat(row, k, acc.pilot, sol.coef)
                meat, worst = meat + part, max(worst, ratio)
            if worst < EXPANSION_LIMIT:
                # unit effects are nested in unit clusters: not counted in K'
                return _embed(variance.cluster(inverse, meat, acc.n_units, n_obs, n_kept), len(sol.coef))
            self.notes.append("the one-pass cluster meat cancelled too many digits; scores were recomputed in a second pass")
        nested = [c == spec.unit for c in spec.cluster]
        if len(spec.cluster) == 1 and not nested[0]:
            nested[0] = self._nested(design, params)
        meats, counts = self._meats(design, params, acc, sol, intercept, chunks, nested=nested[0])
        if len(spec.cluster) == 1:
            v = variance.cluster(inverse, meats[0], counts[0], n_obs, n_kept + (0 if nested[0] else absorbed))
            return _embed(v, len(sol.coef))
        kp = (n_kept + (0 if nested[0] else absorbed), n_kept + (0 if nested[1] else absorbed), n_kept + absorbed)
        return _embed(variance.two_way(inverse, tuple(meats), tuple(counts), n_obs, kp), len(sol.coef))


def _too_large(names: list[str], why: str) -> InputError:
    return InputError(f"Values of {', '.join(shown(n) for n in names)} are out of a double's reach for this fit ({why}). "
                      "Rescale the term or the outcome by a power of ten in the term or a query, and scale the estimate back.")


def _embed(var: variance.Variance, dim: int) -> variance.Variance:
    """Place a variance over the leading score columns into the full coefficient layout."""
    if var.vcov.shape[0] == dim:
        return var
    full = np.zeros((dim, dim))
    k = var.vcov.shape[0]
    full[:k, :k] = var.vcov
    return variance.Variance(full, var.kind, var.df, var.small_sample_factor, var.n_clusters, var.clipped_eigenvalues)


_BASE_TEN_LOG = re.compile(r"(?<![\w.])log\s*\(", re.IGNORECASE)


def _period_key(value: str):
    try:
        return (0, float(value), value)
    except ValueError:
        return (1, 0.0, value)
