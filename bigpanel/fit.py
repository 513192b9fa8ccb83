"""Pooled, within and first-difference least squares over a source, out of core.

The pipeline for one model (each stage its own module; DEVELOPERS.md names the data
passed between them):

1. specification (:mod:`bigpanel.spec`, from the parameter table :mod:`bigpanel.params`);
2. design (:mod:`bigpanel.design`): the columns as checked SQL expressions with roles;
3. estimator (:mod:`bigpanel.estimators`): its moment request (:mod:`bigpanel.requests`);
4. execution (:mod:`bigpanel.execute`) on the engine: aggregates only; the estimator's
   algebra turns them into equations;
5. inference (:mod:`bigpanel.inference`): solve, variance from score moments, result.

Many models on one source share scans: :func:`fit_many` (:mod:`bigpanel.plan`).
"""

from __future__ import annotations

import warnings
from dataclasses import replace

import numpy as np

from . import estimators, writeback
from .design import Design, build_design
from .engine import open_engine
from .errors import BigpanelWarning, EstimationError, InputError
from .execute import Executor, Keys
from .hypotheses import restrictions
from .inference import MAX_EXPANDED, Notes, finish
from .params import check_keys
from .plan import ScanPlan, member_params, prefill
from .results import FitResult
from .source import Engine, as_engine, as_source
from .spec import FitSpec
from .weights import check_weights

CANCELLATION_LIMIT = 1e6  # raw/transformed sum of squares above which one pass loses > 6 digits


def fit(
    source,
    outcome: str,
    regressors,
    unit: str,
    period: str,
    estimator: str = "within",
    effects=None,
    variance: str | None = None,
    cluster=None,
    where: str | None = None,
    intercept: bool | None = None,
    period_step: int | None = None,
    table: str | None = None,
    query: str | None = None,
    csv_types: dict | None = None,
    engine: Engine | str | None = None,
    csv_nulls=None,
    absorbed_levels: str | None = None,
    effects_tolerance: float | None = None,
    effects_iterations: int | None = None,
    write_effects=None,
    write_residuals=None,
    weights: str | None = None,
    endogenous=None,
    instruments=None,
    test=None,
    serial_test: bool | None = None,
    spark_master: str | None = None,
) -> FitResult:
    """Estimate a panel regression on a source too large for memory.

    Parameters
    ----------
    source : str, path, Source, or in-memory frame
        See :func:`bigpanel.open_source`: files, a DuckDB table or query, a pyarrow Table,
        a polars DataFrame or LazyFrame (streamed to a temporary Parquet file), a pandas
        frame (named index levels become columns). A :class:`Source` is used as it is.
    outcome : str
        Outcome column or SQL expression.
    regressors : str or list of str
        Terms separated by commas (commas inside parentheses do not split): columns,
        SQL scalar expressions, ``lag(EXPR[, K])``, ``lead(EXPR[, K])`` (K periods later,
        missing across a gap) and ``levels(COLUMN[, 'BASE'])``.
    unit, period : str
        Unit and period columns. First differences and lags need whole-number periods.
    estimator : {"pooled", "within", "first-difference", "between", "random-effects"}
        ``between``: least squares on unit means; ``random-effects``: generalized least
        squares with Swamy-Arora variance components (a per-unit theta on unbalanced
        panels), reported with its test against within.
    effects : str or list of str, optional
        Fixed effects: within defaults to the unit and may add the period (an exact path)
        and any number of other columns, or ``cell(A, B)`` for one effect per combination
        of levels (absorbed by iteration; the result's ``absorption`` reports the path,
        sweeps, tolerance reached, singletons and redundancies). For first differences,
        the period adds period intercepts to the differenced equation.
    variance : {"homoskedastic", "hc1", "cluster"}, optional
        Default: cluster for within and first differences, homoskedastic for pooled.
    cluster : str or list of str, optional
        One or two cluster columns (default: the unit).
    where : str, optional
        SQL predicate applied before anything else.
    intercept : bool, optional
        Keep an intercept (pooled and first differences; default True).
    period_step : int, optional
        Distance between consecutive whole-number periods. Default: the panel's detected
        step (integers: the gcd of the gaps; DATE/TIMESTAMP: day, week, month, quarter or
        year), named in the result's ``period_step``.
    absorbed_levels : {"not-nested", "all"}, optional
        How absorbed effect levels count in K' of the cluster small-sample factor, one K'
        for every component of a two-way variance: "not-nested" (default) leaves out the
        effects nested in a cluster dimension; "all" counts every level (dummy variables).
    effects_tolerance : float, optional
        Many effects: stop when the largest remaining level mean of a transformed column,
        count-weighted over every effect and relative to the column's norm, is below this
        (default 1e-10). A fit that does not reach it warns and says so in the result.
    effects_iterations : int, optional
        Many effects: most iterations, each one pass over the scratch copy (default 1000).
    test : str or list of str, optional
        Joint Wald tests of linear restrictions, one text per test, restrictions separated
        by commas: ``"grant = 0, lag(grant) = 0"``; reported under ``tests.joint`` with the
        chosen variance (:mod:`bigpanel.hypotheses`).
    serial_test : bool, optional
        Within and first differences: test the errors for serial correlation (one more
        scan; ``tests.serial_correlation``).
    table, query, csv_types, engine
        As in :func:`bigpanel.open_source`; ``engine`` is also an engine's name:
        ``"spark"`` runs the plan as Spark SQL (Parquet sources).
    spark_master : str, optional
        With ``engine="spark"``: the Spark master URL (default: ``SPARK_MASTER``, else
        ``spark.master`` in spark-defaults.conf, else local mode).
    csv_nulls : str or list of str, optional
        Extra CSV tokens read as missing (``"NA,."``); empty fields always are.
    write_effects : str or path, optional
        Folder (made if missing, outside the source's folders) to write one Parquet file
        per effect into, ``effect_<column>.parquet`` (level, effect, rows; within fits;
        normalisation in :mod:`bigpanel.writeback`). The result's ``written`` names them.
    write_residuals : str or path, optional
        Folder to write ``residuals.parquet`` into: each used row's unit, period, fitted
        value and residual (within and first-difference fits).
    weights : str, optional
        Column of analytic weights (finite, at least 0) for every estimator and variance:
        weighted sums, weighted unit means; rows of weight 0 are left out and counted in
        ``rows_dropped["zero_weight"]``; a first difference takes its later row's weight.
        A negative, missing or non-finite weight is an error naming a few rows.
    endogenous, instruments : str or list of str, optional
        Two-stage least squares: the instrumented terms and the excluded instruments
        (written like the regressors, ``lag()`` included; at least as many instruments as
        endogenous terms). The result lists ``instrumented`` terms and, per endogenous
        term, the first-stage F of the excluded instruments under the chosen variance.
    """
    spec = FitSpec.build(outcome, regressors, unit, period, estimator, effects, variance, cluster, intercept, period_step,
                         absorbed_levels, effects_tolerance, effects_iterations, write_effects=write_effects,
                         write_residuals=write_residuals, weights=weights, endogenous=endogenous,
                         instruments=instruments, test=test, serial_test=serial_test)
    src = as_source(source, where, table, query, csv_types, as_engine(engine, spark_master), csv_nulls)
    spec = writeback.checked(spec, src)
    notes = Notes([])
    try:
        with open_engine(src) as adapter:
            executor = Executor(adapter, Keys(spec.unit, spec.period, spec.period_step))
            return estimate(executor, spec, notes)
    finally:
        emit(notes, stacklevel=3)


class FitList(list):
    """The results of :func:`fit_many`, in the models' order; ``scans`` is the number of
    full passes over the source's rows."""

    scans: int = 0

    def compare(self, names=None, out=None) -> dict[str, str]:
        """The models side by side (:func:`bigpanel.compare_results`): Markdown, LaTeX,
        HTML and CSV texts by file name, also written to the folder ``out`` when given."""
        from .compare import compare_results

        return compare_results(list(self), names=names, out=out)


def fit_many(
    source,
    models,
    unit: str,
    period: str,
    where: str | None = None,
    period_step: int | None = None,
    table: str | None = None,
    query: str | None = None,
    csv_types: dict | None = None,
    engine: Engine | str | None = None,
    csv_nulls=None,
    spark_master: str | None = None,
) -> FitList:
    """Estimate many models on one source, sharing scans.

    Parameters
    ----------
    models : list of dict
        Each with the model keys of :func:`fit` (``outcome``, ``regressors``, ``estimator``,
        ``effects``, ``variance``, ``cluster``, ``intercept``, ``absorbed_levels``); ``unit``, ``period`` and
        ``period_step`` are shared and may be repeated only with the same value.
    Other parameters as in :func:`fit`.

    Returns
    -------
    FitList
        One :class:`FitResult` per model, in order, each equal to its own :func:`fit`
        (to rounding); ``.scans`` counts the full passes over the source's rows. Pooled,
        within and first-difference models without period effects share two scans per
        row transform (levels, differences); each model keeps its own sample.
    """
    specs = [_model_spec(m, i, unit, period, period_step) for i, m in enumerate(models)]
    src = as_source(source, where, table, query, csv_types, as_engine(engine, spark_master), csv_nulls)
    specs = [writeback.checked(spec, src) for spec in specs]
    notes = [Notes([]) for _ in specs]
    try:
        with open_engine(src) as adapter:
            executor = Executor(adapter, Keys(unit, period, specs[0].period_step if specs else None))
            prepared = [prepare(executor, spec, n) for spec, n in zip(specs, notes)]
            plan = ScanPlan.build(prepared)
            results: list = [None] * len(specs)
            for scan in plan.shared:
                alone = _run_shared(executor, scan, notes, results)
                plan.alone.extend(alone)
            for i in sorted(plan.alone):
                results[i] = estimate(executor, specs[i], notes[i])
            out = FitList(results)
            out.scans = executor.scans
            return out
    finally:
        for n in notes:
            emit(n, stacklevel=3)


def _model_spec(model: dict, i: int, unit: str, period: str, period_step: int | None) -> FitSpec:
    if not isinstance(model, dict):
        raise InputError(f"Model {i + 1} of fit_many is a {type(model).__name__}; give a dict of fit's model keys.")
    check_keys(model, f"Model {i + 1} of fit_many")
    shared = {"unit": unit, "period": period, "period_step": period_step}
    for key, value in shared.items():
        if key in model and model[key] != value:
            raise InputError(f"Model {i + 1} of fit_many sets '{key}' to '{model[key]}', but the models share "
                             f"'{value}'. Give models with other keys to another fit_many call.")
    args = {**model, **shared}
    return FitSpec.build(args.pop("outcome", None), args.pop("regressors", None), **args)


def _run_shared(executor: Executor, scan, notes: list, results: list) -> list[int]:
    """Estimate a shared scan's models: one scan for the cross-products, one for the
    score meats. Returns the models that must run alone (digits lost in one pass)."""
    shifts, scales = executor.shifts(scan.columns)
    shifts = np.where(scan.shifted, shifts, 0.0)
    params = scaled_params(shifts, scales)
    totals = executor.shared_moments(scan, params)
    prefill(executor, scan, totals)
    ready, alone = [], []
    for m in scan.members:
        eq = m.est.shared_equations(totals, m.sample, m.columns)
        if eq.n_obs == 0:
            raise EstimationError(executor.empty_message(m.est.spec.needs_order))
        if m.est.demeaned_retry and eq.cancellation() > CANCELLATION_LIMIT:
            alone.append(m.index)
            continue
        ready.append((m, eq))
    executor.collecting = []
    for m, eq in ready:  # learn each model's score request (solving is cheap)
        before = len(executor.collecting)
        own, own_params = member_params(m, shifts, scales)
        finish(m.est, executor, m.design, m.rows, own, own_params, eq, SHARED, Notes([]))
        executor.collecting[before:] = [(m.index, *r) for r in executor.collecting[before:]]
    requests, executor.collecting = executor.collecting, None
    executor.shared_meats(scan, requests, params)
    for m, eq in ready:
        own, own_params = member_params(m, shifts, scales)
        results[m.index] = written(executor, m.est, m.design,
                                   finish(m.est, executor, m.design, m.rows, own, own_params, eq, SHARED, notes[m.index]))
    return alone


SHARED = "shared scan, shifted per-unit sums"


def scaled_params(shifts: np.ndarray, scales: np.ndarray) -> dict:
    """$s_j and $d_j: column j is summed as (x_j - s_j) * d_j."""
    return {f"s{j}": float(v) for j, v in enumerate(shifts)} | {f"d{j}": float(v) for j, v in enumerate(scales)}


def emit(notes: Notes, stacklevel: int) -> None:
    """Warn each note once, pointing at the caller of the public function."""
    for category, message in notes.items:
        warnings.warn(message, category or BigpanelWarning, stacklevel=stacklevel)


def prepare(executor: Executor, spec: FitSpec, notes: Notes) -> tuple[estimators.Estimator, Design]:
    """The estimator and its design (checked against the schema; no rows read but
    ``levels()`` values)."""
    refuse = getattr(executor.engine, "refuse_model", None)  # what an engine cannot run yet (pg, spark)
    if refuse is not None:
        refuse(spec)
    if spec.weights:
        check_weights(executor, spec.weights)
    design = build_design(executor, spec)
    for msg in design.notes:
        notes.add(BigpanelWarning, msg)
    est = estimators.select(spec, executor.engine)
    executor.use_periods(spec.needs_order or isinstance(est, estimators.UnitPeriod))
    design = est.extend_design(executor, design)
    for text in spec.tests:  # test names checked before any scan
        restrictions(text, design.labels + (["(intercept)"] if est.constant else []))
    if spec.needs_order:
        if any(t.kind == "lag" for t in spec.all_terms):
            executor.duplicates(only_if_any=True)
    else:  # within and pooled keep duplicate keys' rows: say so
        note = executor.duplicate_note()
        if note:
            notes.add(BigpanelWarning, note)
    return est, design


def estimate(executor: Executor, spec: FitSpec, notes: Notes) -> FitResult:
    """One model through the pipeline."""
    executor.notes = []
    est, design = prepare(executor, spec, notes)
    rows = est.rows(design)
    shifts, scales = executor.shifts(design.sql_columns, rows.weight)
    if not est.shifted():
        shifts = np.zeros(design.q)
    params = scaled_params(shifts, scales)
    request = est.first_pass(design, pilot(est, executor, design, params))
    eq = executor.moments(request, params, lambda chunks: est.equations(design, request, chunks, executor))
    if eq.n_obs == 0:
        raise EstimationError(executor.empty_message(spec.needs_order))
    accumulation = est.accumulation(eq) or (
        "one pass, shifted per-unit sums" + (" folded in numpy" if executor.fold_path == "numpy" else ""))
    if est.demeaned_retry and eq.cancellation() > CANCELLATION_LIMIT:
        request = replace(request, rows=replace(request.rows, demeaned=True))
        eq = executor.moments(request, params, lambda chunks: est.equations(design, request, chunks, executor))
        accumulation = "two passes, unit means subtracted in SQL"
    return written(executor, est, design, finish(est, executor, design, rows, shifts, params, eq, accumulation, notes))


def written(executor: Executor, est: estimators.Estimator, design: Design, result: FitResult) -> FitResult:
    """The result, after writing the effects and residuals its specification asks for."""
    spec = est.spec
    if not (spec.write_effects or spec.write_residuals):
        return result
    spec = writeback.checked(spec, executor.engine.source)  # again for callers that did not check (spec files)
    return replace(result, written=writeback.write(executor, est, design, spec, executor.estimates))


def pilot(est: estimators.Estimator, executor: Executor, design: Design, params: dict) -> np.ndarray | None:
    """Coefficients from the first rows, the centre of the one-pass unit-cluster meat
    expansion; None when the model is too large for it or clusters are not units."""
    spec = est.spec
    if not (spec.variance == "cluster" and spec.cluster == (spec.unit,) and est.expands):
        return None
    k = design.q - 1 + (1 if est.constant else 0)
    if k > getattr(executor.engine, "max_expanded", MAX_EXPANDED):  # an engine may prefer a second pass
        return None
    probe = replace(est.first_pass(design), head=True)
    eq = est.equations(design, probe, executor.cross_products(probe, params), executor)
    h, g = eq.total[:k, :k], eq.total[:k, k]
    if not np.isfinite(h).all() or eq.n_obs == 0:
        return np.zeros(k)
    return np.linalg.lstsq(h, g, rcond=None)[0]
