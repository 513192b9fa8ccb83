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

import math
import warnings
from dataclasses import dataclass, field

import numpy as np
import pyarrow.parquet as pq
import scipy.stats

from . import moments, sqlbuild, variance
from .errors import (
    DroppedRowsWarning, DroppedTermsWarning, EstimationError, FewClustersWarning, InputError,
)  # fmt: skip
from .results import Coefficient, FitResult
from .solve import solve_normal
from .source import Engine, Session, Source, is_numeric, open_source
from .spec import FitSpec, Term

PROBE_ROWS = 20_000  # first rows used for the shifts and the pilot coefficients
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
    in_levels: frozenset[int] = frozenset()  # FD: columns not differenced


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


class _Fit:
    def __init__(self, session: Session, spec: FitSpec):
        self.s = session
        self.spec = spec
        self.notes: list[str] = []

    # ------------------------------------------------------------------ checks
    def _check(self) -> None:
        spec, s = self.spec, self.s
        names = [spec.unit, spec.period, *spec.cluster]
        s.require_columns(names)
        s.check_filter()
        if spec.needs_order:
            ptype = s.columns()[spec.period]
            if not is_numeric(ptype) or ptype.upper().startswith(("FLOAT", "DOUBLE", "REAL", "DECIMAL", "BOOLEAN")):
                raise InputError(
                    f"Column '{spec.period}' in {s.source.label} has type {ptype}; first differences and lags need "
                    "whole-number periods. Use a period index column (for example months since a start date)."
                )

    def _numeric_term(self, expr: str, what: str) -> None:
        self.s.check_expression(expr, what)
        cols = self.s.columns()
        bare = expr.strip().strip('"')
        if bare in cols:
            if not is_numeric(cols[bare]):
                raise InputError(
                    f"Column '{bare}' in {self.s.source.label} has type {cols[bare]}, not a number. "
                    f"Use levels({bare}) for a categorical column, or convert it in an expression."
                )
            return
        kind = self.s.describe_expression(expr)
        if not is_numeric(kind):
            raise InputError(f"{what} '{expr}' has type {kind}, not a number. Give a numeric expression.")

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
                    raise InputError(f"Term '{term.text}': base level '{base}' does not occur in column '{term.expr}'. Levels: {', '.join(levels[:10])}.")
                for level in levels:
                    if level != base:
                        labels.append(f"{term.expr}[{level}]")
                        columns.append((sqlbuild.indicator_sql(quoted, level), 0))
                        is_effect.append(False)
            else:
                self._numeric_term(term.expr, "Term")
                labels.append(term.text)
                columns.append((term.expr, term.lag))
                is_effect.append(False)
        in_levels = set()
        if spec.period_effects:
            quoted = sqlbuild.quote_ident(spec.period)
            periods = self._levels(quoted)
            order = sorted(periods, key=_period_key)
            skip = order[:2] if spec.estimator == "first-difference" else order[:1]
            for value in order:
                if value not in skip:
                    if spec.estimator == "first-difference":
                        in_levels.add(len(columns))
                    labels.append(f"{spec.period}[{value}]")
                    columns.append((sqlbuild.indicator_sql(quoted, value), 0))
                    is_effect.append(True)
        self._numeric_term(spec.outcome, "Outcome")
        columns.append((spec.outcome, 0))
        return _Design(labels, columns, is_effect, frozenset(in_levels))

    # ------------------------------------------------------------------ SQL
    def _rows(self, design: _Design, files=None, head: bool = False) -> str:
        spec = self.spec
        source = self.s.source.filtered(files)
        if head:
            source = sqlbuild.head_sql(source, PROBE_ROWS)
        rows = sqlbuild.design_rows_sql(source, spec.unit, spec.period, list(spec.cluster), design.columns, spec.period_step)
        if spec.estimator == "first-difference":
            rows = sqlbuild.differenced_rows_sql(rows, len(spec.cluster), len(design.columns), design.in_levels)
        return rows

    def _valid(self, q: int) -> str:
        return sqlbuild.valid_predicate(q, self.spec.estimator == "first-difference", self.spec.period_step)

    def _shifts(self, design: _Design) -> np.ndarray:
        q = len(design.columns)
        if self.spec.estimator != "within" and not self.spec.intercept:
            return np.zeros(q)
        zero = {f"s{j}": 0.0 for j in range(q)}
        spec = self.spec
        head = sqlbuild.head_sql(self.s.source.filtered(), PROBE_ROWS)
        rows = sqlbuild.design_rows_sql(head, spec.unit, spec.period, list(spec.cluster), design.columns, spec.period_step)
        sql = sqlbuild.probe_sql(rows, q)  # levels, not differences: only the constant's column moves
        row = self.s.run(sql, zero).to_pylist()[0]
        shifts = np.array([row[f"a{j}"] if row[f"a{j}"] is not None else 0.0 for j in range(q)], dtype=float)
        return np.where(np.isfinite(shifts), shifts, 0.0)

    # ------------------------------------------------------------------ passes
    def _mode(self) -> str:
        if self.spec.estimator == "within":
            return "within"
        return "intercept" if self.spec.intercept else "plain"

    def _cluster_plan(self) -> str:
        """'none' | 'unit' (fast) | 'nested' (coarser, per-unit check) | 'sql' (score pass)."""
        spec = self.spec
        if spec.se != "cluster":
            return "none"
        if len(spec.cluster) == 2:
            return "sql"
        if spec.cluster[0] == spec.unit:
            return "unit"
        return "nested"

    def _accumulate(self, design: _Design, params: dict, chunks, demeaned: bool, pilot: np.ndarray | None,
                    head: bool = False) -> _Pass:
        q = len(design.columns)
        mode = self._mode()
        n_cl = len(self.spec.cluster)
        total = moments.sum_function(chunks)

        def used(files):
            rows = sqlbuild.used_rows_sql(self._rows(design, files, head), self._valid(q))
            return sqlbuild.demeaned_rows_sql(rows, q, n_cl) if demeaned else rows

        if mode != "within" and pilot is None:
            results = moments.run_chunks(self.s, chunks, lambda f: sqlbuild.pooled_moments_sql(used(f), q, "true", total), params)
            rows = [t.to_pylist()[0] for t in results]
            mat, raw, n = moments.pooled_matrix(rows, q, mode == "intercept")
            lo = [r["t_min"] for r in rows if r["t_min"] is not None]
            hi = [r["t_max"] for r in rows if r["t_max"] is not None]
            return _Pass(mat, raw, n, 0, t_min=min(lo) if lo else None, t_max=max(hi) if hi else None)

        expand = pilot is not None
        p = dict(params)
        if expand:
            p.update({f"q{j}": float(v) for j, v in enumerate(pilot)})

        def make(files):
            units = sqlbuild.unit_moments_sql(used(files), q, 0, "true", total)
            return sqlbuild.unit_pass_sql(units, q, mode, expand, total)

        rows = [t.to_pylist()[0] for t in moments.run_chunks(self.s, chunks, make, p)]
        dim = q + (1 if mode == "intercept" else 0)
        acc = _Pass(total=np.zeros((dim, dim)), raw_diag=np.zeros(q), n_obs=0, n_units=0)
        for row in rows:
            acc.total += moments.symmetric(row, "w", dim)
            acc.raw_diag += [row[f"r{j}"] or 0.0 for j in range(q)]
            acc.n_obs += int(row["n_obs"])
            acc.n_units += int(row["n_units"])
            acc.singletons += int(row["singletons"])
            acc.singleton_rows += int(row["singleton_rows"])
            if row["t_min"] is not None:
                acc.t_min = row["t_min"] if acc.t_min is None else min(acc.t_min, row["t_min"])
                acc.t_max = row["t_max"] if acc.t_max is None else max(acc.t_max, row["t_max"])
        if mode == "intercept":
            acc.raw_diag = np.r_[acc.raw_diag[:-1], acc.n_obs, acc.raw_diag[-1]]
        if expand:
            acc.expansion = [{key: r[key] for key in r if key.startswith(("rr", "rb", "bb"))} for r in rows]
            acc.pilot = pilot
        return acc

    def _pilot(self, design: _Design, params: dict) -> np.ndarray | None:
        """Coefficients from the first rows, the centre of the one-pass meat expansion;
        None when the model is too large for it or clusters are not units."""
        if self._cluster_plan() != "unit":
            return None
        q = len(design.columns)
        k = q - 1 + (1 if self._mode() == "intercept" else 0)
        if k > MAX_EXPANDED:
            return None
        acc = self._accumulate(design, params, [None], demeaned=False, pilot=np.zeros(k), head=True)
        h, g = acc.total[:k, :k], acc.total[:k, k]
        if not np.isfinite(h).all() or acc.n_obs == 0:
            return np.zeros(k)
        return np.linalg.lstsq(h, g, rcond=None)[0]

    # ------------------------------------------------------------------ score pass
    def _sql_meats(self, design: _Design, params: dict, coef: np.ndarray, kept_intercept: bool):
        spec = self.spec
        q = len(design.columns)
        demean = spec.estimator == "within"
        k = q - 1 + (1 if kept_intercept else 0)
        p = dict(params)
        for j in range(q - 1):
            p[f"b{j}"] = float(coef[j])
        if kept_intercept:
            p["b_one"] = float(coef[q - 1])
        used = sqlbuild.used_rows_sql(self._rows(design), self._valid(q))
        n_cl = len(spec.cluster) if spec.se == "cluster" else 0
        if spec.se == "hc1":
            sql = sqlbuild.residual_moments_sql(used, q, demean, kept_intercept, n_cl)
            row = self.s.run(sql, p).to_pylist()[0]
            meat = np.zeros((k, k))
            for i in range(k):
                for j in range(i, k):
                    meat[i, j] = meat[j, i] = row[f"h{i}_{j}"] or 0.0
            return [meat], []
        sql = sqlbuild.cluster_scores_sql(used, q, demean, kept_intercept, n_cl)
        out, counts = [], []
        for row in self.s.run(sql, p).to_pylist():
            meat = np.zeros((k, k))
            for i in range(k):
                for j in range(i, k):
                    meat[i, j] = meat[j, i] = row[f"o{i}_{j}"] or 0.0
            out.append((row["gid"], meat, row["n_groups"]))
        # GROUPING(c0, c1): 1 = grouped by c1 only... order sets as (c0, c1, both)
        if n_cl == 1:
            return [out[0][1]], [out[0][2]]
        by_gid = {gid: (m, n) for gid, m, n in out}
        order = [1, 2, 0]  # GROUPING bits: c0 only -> 01, c1 only -> 10, both -> 00
        return [by_gid[g][0] for g in order], [by_gid[g][1] for g in order]

    # ------------------------------------------------------------------ run
    def run(self) -> FitResult:
        spec, s = self.spec, self.s
        self._check()
        design = self._design()
        q = len(design.columns)
        shifts = self._shifts(design)
        params = {f"s{j}": float(shifts[j]) for j in range(q)}
        chunks = moments.plan_chunks(s, spec.unit)
        pilot = self._pilot(design, params)
        acc = self._accumulate(design, params, chunks, demeaned=False, pilot=pilot)
        if acc.n_obs == 0:
            raise EstimationError(self._empty_message())
        accumulation = "one pass, shifted per-unit sums"
        ratio = self._cancellation(acc)
        if spec.estimator == "within" and ratio > CANCELLATION_LIMIT:
            acc = self._accumulate(design, params, chunks, demeaned=True, pilot=pilot)
            accumulation = "two passes, unit means subtracted in SQL"
        return self._finish(design, shifts, params, acc, accumulation)

    def _cancellation(self, acc: _Pass) -> float:
        diag = np.diag(acc.total)
        with np.errstate(divide="ignore", invalid="ignore"):
            r = np.where(diag > 0, acc.raw_diag / diag, 1.0)
        return float(np.max(r)) if r.size else 1.0

    def _empty_message(self) -> str:
        src = self.s.source
        where = f" after the filter '{src.where}'" if src.where else ""
        return (f"No usable rows in {src.label}{where}: every row was filtered out or has a missing value in a term. "
                "Check the filter and the columns.")

    def _rows_after_filter(self) -> int:
        src = self.s.source
        if src.kind == "parquet" and not src.where:
            return sum(pq.read_metadata(f).num_rows for f in src.files)
        return int(self.s.run(f"SELECT count(*) AS n FROM {src.filtered()} AS src").column("n")[0].as_py())

    def _dropped(self, design: _Design, params: dict, acc: _Pass) -> dict:
        spec = self.spec
        total = self._rows_after_filter()
        fd = spec.estimator == "first-difference"
        expected = acc.n_obs + acc.singleton_rows + (acc.n_units if fd else 0)
        out = {"filtered_out": None, "missing_or_not_finite": 0}
        if fd:
            out.update(first_period_of_unit=acc.n_units, after_gap=0)
        if total != expected:
            q = len(design.columns)
            rows = self._rows(design)
            row = self.s.run(sqlbuild.row_counts_sql(rows, q, fd, spec.period_step), params).to_pylist()[0]
            if fd and row["duplicate_keys"]:
                self._duplicates()
            out["missing_or_not_finite"] = int(row["missing"])
            if fd:
                out["first_period_of_unit"] = int(row["first_of_unit"])
                out["after_gap"] = int(row["after_gap"])
        out.pop("filtered_out")
        return out

    def _duplicates(self) -> None:
        spec = self.spec
        sql = sqlbuild.duplicate_keys_sql(self.s.source.filtered(), spec.unit, spec.period)
        rows = self.s.run(sql).to_pylist()
        shown = ", ".join(f"({r[spec.unit]}, {r[spec.period]})" for r in rows)
        raise InputError(
            f"Columns '{spec.unit}' and '{spec.period}' in {self.s.source.label} have duplicate keys, for example {shown}. "
            "First differences and lags need one row per unit and period: filter or aggregate the duplicates."
        )

    def _finish(self, design: _Design, shifts, params, acc: _Pass, accumulation: str) -> FitResult:
        spec = self.spec
        mode = self._mode()
        dim = acc.total.shape[0]
        k = dim - 1
        labels = list(design.labels) + (["(intercept)"] if mode == "intercept" else [])
        is_effect = list(design.is_effect) + ([False] if mode == "intercept" else [])
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
            raise EstimationError("No term can be estimated: " + "; ".join(f"{t}: {w}" for t, w in terms_dropped.items()) + ".")
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
        var = self._variance(design, params, acc, sol, rss, n_obs, n_kept, absorbed, mode)
        vcov = var.vcov
        estimate = coef.copy()
        if mode == "intercept":
            # shifted columns: y - c_y = b0' + sum b_j (x_j - c_j); the intercept is b0' + c_y - c'b
            c = np.array([0.0 if (spec.estimator == "first-difference" and j not in design.in_levels) else shifts[j] for j in range(k - 1)])
            c_y = 0.0 if spec.estimator == "first-difference" else shifts[-1]
            t = np.eye(k)
            t[k - 1, : k - 1] = -c
            estimate[k - 1] = coef[k - 1] + c_y - c @ coef[: k - 1]
            vcov = t @ vcov @ t.T
        crit = scipy.stats.t.ppf(0.975, var.df) if var.df > 0 else float("nan")
        coefs = []
        for j in range(k):
            if is_effect[j] or not sol.kept[j]:
                continue
            se = math.sqrt(vcov[j, j]) if vcov[j, j] >= 0 else float("nan")
            tval = estimate[j] / se if se > 0 else float("nan")
            p = 2 * scipy.stats.t.sf(abs(tval), var.df) if var.df > 0 else float("nan")
            coefs.append(Coefficient(labels[j], float(estimate[j]), se, float(tval), float(p),
                                     float(estimate[j] - crit * se), float(estimate[j] + crit * se)))
        slopes = [j for j in range(k) if sol.kept[j] and not is_effect[j] and labels[j] != "(intercept)"]
        f_stat, f_p = float("nan"), float("nan")
        if slopes:
            vs = vcov[np.ix_(slopes, slopes)]
            bs = estimate[slopes]
            try:
                f_stat = float(bs @ np.linalg.solve(vs, bs) / len(slopes))
                f_p = float(scipy.stats.f.sf(f_stat, len(slopes), var.df))
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

    def _variance(self, design, params, acc: _Pass, sol, rss, n_obs, n_kept, absorbed, mode) -> variance.Variance:
        spec = self.spec
        inverse = sol.inverse
        if spec.se == "iid":
            return variance.iid(inverse, rss, n_obs, n_kept, absorbed)
        kept_intercept = mode == "intercept"
        if spec.se == "hc1":
            meats, _ = self._sql_meats(design, params, sol.coef, kept_intercept)
            return variance.hc1(inverse, meats[0], n_obs, n_kept, absorbed)
        plan = self._cluster_plan()
        if plan == "unit" and acc.expansion is not None:
            k = len(sol.coef)
            meat = np.zeros((k, k))
            worst = 0.0
            for row in acc.expansion:
                part, ratio = moments.expanded_meat(row, k, acc.pilot, sol.coef)
                meat += part
                worst = max(worst, ratio)
            if worst < EXPANSION_LIMIT:
                # unit effects are nested in unit clusters: not counted in K'
                return variance.cluster(inverse, meat, acc.n_units, n_obs, n_kept)
            self.notes.append("the one-pass cluster meat cancelled too many digits; scores were recomputed in a second pass")
        meats, counts = self._sql_meats(design, params, sol.coef, kept_intercept)
        nested = [c == spec.unit for c in spec.cluster]
        if len(spec.cluster) == 1:
            return variance.cluster(inverse, meats[0], counts[0], n_obs, n_kept + (0 if nested[0] else absorbed))
        kp = (n_kept + (0 if nested[0] else absorbed), n_kept + (0 if nested[1] else absorbed), n_kept + absorbed)
        return variance.two_way(inverse, tuple(meats), tuple(counts), n_obs, kp)


def _period_key(value: str):
    try:
        return (0, float(value), value)
    except ValueError:
        return (1, 0.0, value)
