"""Analytic weights: the checks a weight column gets before any sum is taken.

A weighted fit minimises sum_i w_i u_i^2. Every sum of the moment plan then carries the
row's weight (sqlbuild: ``k_w``), unit means are weighted means, and the scores of the
sandwich variances are w x~ u~. Rows of weight 0 are left out and counted
(``rows_dropped.zero_weight``); a first difference carries the weight of its later row.
A negative, missing or non-finite weight is an error naming a few rows, raised here,
before the first scan of the fit.
"""

from __future__ import annotations

from . import sqlbuild
from .errors import InputError, echo

EXAMPLES = 3  # rows named in the error


def check_weights(executor, column: str) -> None:
    """Refuse a weight column that is missing, not numeric, or holds a negative, missing
    or non-finite value in a row that passes the filter (naming a few such rows)."""
    engine = executor.engine
    engine.require_columns([column])
    kind = engine.columns()[column]
    if not engine.is_numeric(kind):
        raise InputError(f"Option 'weights' names column '{echo(column)}' in {engine.label}, which has type {kind}, not a "
                         "number; give a numeric column of non-negative weights.")
    keys = executor.keys
    count_sql, rows_sql = sqlbuild.bad_weights_sql(engine.filtered(), keys.unit, keys.period, column, EXAMPLES,
                                                   executor.dialect)
    bad = int(executor.run_once(count_sql, scan=False)[0]["n_bad"])
    if not bad:
        return
    found = executor.run_once(rows_sql, scan=False)
    shown = "; ".join(f"unit {echo(r['k_unit'], 40)}, period {echo(r['k_period'], 40)}: "
                      f"{'missing' if r['k_w'] is None else r['k_w']}" for r in found)
    rows = "row has" if bad == 1 else "rows have"
    raise InputError(f"Option 'weights': {bad:,} {rows} a negative, missing or non-finite value in column '{echo(column)}' "
                     f"of {engine.label} ({shown}); weights must be finite and at least 0 (0 leaves a row out), so fix "
                     "them or leave those rows out with --where.")
