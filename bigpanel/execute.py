"""Execution: moment requests become SQL on the engine; aggregates come back.

The :class:`Executor` is the one place with mutable state in a fit: the engine,
the chunk plan, the scan counter, whether differences were formed in scan order, and
the row counts once counted. Everything it returns is aggregates (one row per chunk, per
cluster or per period) as plain dicts.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from . import moments, sqlbuild
from .errors import EstimationError, InputError, echo
from .requests import CrossProducts, Nesting, Rows, Scores
from .solve import power_of_two_scale

# The unit fold of unit-sorted chunks summed in numpy (fold.py) instead of SQL, per case
# (layout, differenced rows): kept where it measured faster in one benchmark run (README:
# pooled 4.1 s against 9.6 s in SQL; within 6.2 against 5.4 and first differences 5.5
# against 4.8 stay in SQL). The path that ran is recorded on the result.
NUMPY_FOLD_LAYOUTS = frozenset({("constant", False), ("plain", False)})
PROBE_ROWS = 20_000  # first rows used for the shifts and the pilot coefficients
MAX_PERIOD_SPAN = 10_000  # widest period range for unit + period effects (bits per unit)


@dataclass(frozen=True)
class Keys:
    """The panel's keys, shared by every model on a source. ``period_sql``: the period as
    its slot on the panel's regular grid (then ``step`` is 1), or None for the column."""

    unit: str
    period: str
    step: int = 1
    period_sql: str | None = None


class Executor:
    """Runs requests on one engine (:mod:`bigpanel.engine`)."""

    def __init__(self, engine, keys: Keys):
        self.engine = engine  # an engine.EngineAdapter
        self.keys = keys
        self.scans = 0  # full passes over the source's rows
        self.notes: list[str] = []
        self.streaming = False  # differences formed in scan order (see moments)
        self._chunks: list | None = None
        self._bounds: tuple | None = None
        self._n_filtered: int | None = None
        self._counted: dict = {}
        self._levels: dict = {}
        self._keys_unique: bool | None = None
        self._duplicates: list[dict] | None = None
        self._nested: dict = {}
        self._meats: dict = {}
        self.absorptions: dict = {}  # many effects: Rows -> sweeps.Absorption (scratch copy, solved effects)
        self.collecting: list | None = None  # score requests seen while planning (fit_many)
        self.fold_path = "sql"  # where the last unit fold was summed: "sql" or "numpy"
        self.estimates: dict | None = None  # the last solved model's estimates in user units (inference.finish)
        self._grid: tuple | None = None  # (kind, panel grid) of the periods after the filter
        self.given_step = keys.step  # None: the step is the panel's detected one
        self.slot_values: dict | None = None  # slot -> period value, when periods are slots
        self.step_text = "" if keys.step is None else f"{keys.step:,} (given)"
        if keys.step is None:
            self.keys = Keys(keys.unit, keys.period, 1)

    # ------------------------------------------------------------------ plumbing
    @property
    def label(self) -> str:
        return self.engine.label

    @property
    def dialect(self) -> sqlbuild.Dialect:
        return self.engine.dialect

    def chunks(self) -> list:
        if self._chunks is None:
            self._chunks = self.engine.plan_chunks(self.keys.unit)
        return self._chunks

    def run_once(self, sql: str, params: dict | None = None, scan: bool = True) -> list[dict]:
        """One query over all rows (``scan``: it reads every row)."""
        self.scans += int(scan)
        run = self.engine.run_alone if scan else self.engine.run  # whole-source sums in one fixed order
        return run(sql, params).to_pylist()

    def run_chunked(self, make_sql: Callable, params: dict, chunks: Sequence | None = None) -> list[list[dict]]:
        chunks = self.chunks() if chunks is None else chunks
        self.scans += 1
        return [t.to_pylist() for t in self.engine.run_chunks(chunks, make_sql, params)]

    def empty_message(self, ordered: bool = False) -> str:
        """No usable rows; ``ordered``: the model takes differences or lags."""
        where = f" after the filter '{echo(self.engine.where)}'" if self.engine.where else ""
        pairs, check = "", "the filter and the columns"
        if ordered:
            step = f"{self.given_step:,}" if self.given_step is not None else f"one step ({self.step_text or 1})"
            pairs = f", or (differences and lags) lacks the unit's period {step} before it"
            check = "the filter, the columns and the period step"
        return (f"No usable rows in {self.label}{where}: every row was filtered out or lacks a value of the unit "
                f"'{echo(self.keys.unit)}' or of a term{pairs}. Check {check}.")

    # ------------------------------------------------------------------ periods
    def period_grid(self):
        """(kind, grid) of the distinct periods after the filter, found as the checkup finds
        them (``panel._period_grid``); (kind, None) when there are none or too many."""
        if self._grid is None:
            from .panel import MAX_PERIODS, _period_grid, _period_kind

            kind = _period_kind(self.engine.columns()[self.keys.period])
            grid = None
            if kind is not None:
                sql = sqlbuild.distinct_periods_sql(self.engine.filtered(), self.keys.period, kind, MAX_PERIODS + 1, self.dialect)
                values = self.engine.run(sql).column("period_value")
                grid = _period_grid(values, kind) if len(values) <= MAX_PERIODS else None
            self._grid = (kind, grid)
        return self._grid

    def use_periods(self, ordered: bool) -> None:
        """Settle the period step. Without a given step it is the panel's detected one
        (integers: the gcd of the gaps; dates: day, week, month, quarter or year), and a
        model that needs consecutive periods (``ordered``: differences, lags, unit and
        period effects) reads the period as its slot on that grid. Irregular spacing (no
        two periods one step apart) is refused for such a model, naming the gaps found."""
        kind, grid = self.period_grid()
        if self.given_step is not None:
            if ordered and kind not in (None, "integer"):
                raise InputError(f"Option 'period_step' applies to whole-number periods; column '{echo(self.keys.period)}' "
                                 f"in {self.label} holds {kind}s, whose step is detected. Leave out --period-step.")
            return
        if grid is None:
            return
        step = "-" if grid.step is None else f"{grid.step:,}" + (f" {grid.step_unit}" if grid.step_unit else "")
        self.step_text = step + " (detected)"
        if not ordered or self.slot_values is not None:
            return
        gaps = sorted({b - a for a, b in zip(grid.ordinals, grid.ordinals[1:])})
        if gaps and gaps[0] > grid.slot_step:
            unit = {"integer": "", "month": " months", "day": " days", "microsecond": " microseconds"}[grid.mode]
            shown = ", ".join(f"{g:,}" for g in gaps[:6]) + (", ..." if len(gaps) > 6 else "")
            raise InputError(f"Column '{echo(self.keys.period)}' in {self.label} is spaced irregularly: consecutive periods "
                             f"are {shown}{unit} apart, so no step separates them and differences and lags are undefined. "
                             "Give --period-step, or a period index column with a regular step.")
        slot = sqlbuild.period_slot_sql(self.keys.period, kind, grid.mode, grid.first_ordinal, grid.slot_step, self.dialect)
        self.keys = Keys(self.keys.unit, self.keys.period, 1, slot)
        self.slot_values = {(o - grid.first_ordinal) // grid.slot_step: v for o, v in zip(grid.ordinals, grid.periods)}
        self._bounds = None

    def period_value(self, value):
        """A period as the user has it (periods read as slots are mapped back)."""
        if self.slot_values is None or value is None:
            return value
        return self.slot_values.get(int(value), value)

    def n_periods(self) -> int | None:
        """Distinct periods after the filter (not the span)."""
        grid = self.period_grid()[1]
        return grid.n_periods if grid is not None else None

    # ------------------------------------------------------------------ rows
    def rows_sql(self, rows: Rows, chunk=None, head: bool = False, streaming: bool = False) -> str:
        k = self.keys
        chunk = chunk or moments.Chunk()
        source = self.engine.filtered(chunk, k.unit, PROBE_ROWS if head else None)
        sql = sqlbuild.design_rows_sql(source, k.unit, k.period, list(rows.clusters), list(rows.columns), k.step,
                                       k.period_sql, rows.effects, weight=rows.weight, dialect=self.dialect)
        if rows.differenced:
            sql = sqlbuild.differenced_rows_sql(sql, len(rows.clusters), rows.q, streaming and chunk.files is not None and not head,
                                                rows.weighted)
        return sql

    def used_sql(self, rows: Rows, chunk=None, head: bool = False, streaming: bool = False) -> str:
        used = sqlbuild.used_rows_sql(self.rows_sql(rows, chunk, head, streaming), self.valid_sql(rows))
        return sqlbuild.demeaned_rows_sql(used, rows.q, len(rows.clusters), rows.weighted) if rows.demeaned else used

    def valid_sql(self, rows: Rows) -> str:
        """The predicate of the used rows: a unit, finite design columns (differences: the
        unit's previous period) and, with absorbed effects, a level of every effect."""
        valid = sqlbuild.valid_predicate(rows.q, rows.differenced, self.keys.step, rows.weighted)
        if rows.effects:
            valid += " AND " + sqlbuild.keys_present(self.effect_keys(rows))
        return valid

    @staticmethod
    def effect_keys(rows: Rows) -> list[str]:
        """The key columns of the rows' absorbed effects (many effects)."""
        return [k for e, cols in enumerate(rows.effects) for k in sqlbuild.effect_keys(e, len(cols))]

    # ------------------------------------------------------------------ probes
    def shifts(self, columns: Sequence[tuple[str, int]], weight: str | None = None) -> tuple[np.ndarray, np.ndarray]:
        """Shift (mean; weighted mean with a ``weight`` column) and scale (a power of two,
        see solve.py) per design column (levels), from the first rows: sums are taken of
        (x - shift) * scale."""
        q = len(columns)
        k = self.keys
        head = self.engine.filtered(head=PROBE_ROWS)
        rows = sqlbuild.design_rows_sql(head, k.unit, k.period, [], list(columns), k.step, k.period_sql, weight=weight,
                                        dialect=self.dialect)
        zero = {f"s{j}": 0.0 for j in range(q)} | {f"d{j}": 1.0 for j in range(q)}
        row = self.run_once(sqlbuild.probe_sql(rows, q, weighted=weight is not None, dialect=self.dialect), zero, scan=False)[0]
        scales = np.array([power_of_two_scale(row[f"m{j}"]) for j in range(q)])
        shifts = np.array([row[f"a{j}"] if row[f"a{j}"] is not None else 0.0 for j in range(q)], dtype=float)
        return np.where(np.isfinite(shifts), shifts, 0.0), scales

    def period_bounds(self) -> tuple[object, object]:
        """First and last period in the filtered source (reads the period column only)."""
        if self._bounds is None:
            sql = sqlbuild.period_bounds_sql(self.engine.filtered(), self.keys.period, self.keys.period_sql, self.dialect)
            row = self.run_once(sql)[0]
            self._bounds = (row["lo"], row["hi"])
        return self._bounds

    def period_range(self) -> tuple[int, int]:
        lo, hi = self.period_bounds()
        if lo is None:
            raise EstimationError(self.empty_message())
        if hi - lo > MAX_PERIOD_SPAN:
            raise InputError(
                f"Column '{self.keys.period}' spans {hi - lo + 1} period values; period effects need a compact index "
                f"(at most {MAX_PERIOD_SPAN + 1}). Use a period number such as months since the first month."
            )
        return int(lo), int(hi)

    def rows_after_filter(self) -> int:
        """Rows left by the filter (footers only for unfiltered Parquet; counted once)."""
        if self._n_filtered is None:
            known = self.engine.row_count()
            if known is not None:
                self._n_filtered = known
            else:
                self._n_filtered = int(self.run_once(sqlbuild.count_rows_sql(self.engine.filtered()))[0]["n"])
        return self._n_filtered

    def row_counts(self, rows: Rows, params: dict) -> dict:
        """Rows by reason, over all rows (differences formed after sorting)."""
        key = (rows.columns, rows.differenced, rows.weight)
        if key not in self._counted:
            sql = sqlbuild.row_counts_sql(self.rows_sql(rows), rows.q, rows.differenced, self.keys.step, dialect=self.dialect,
                                          required=self.effect_keys(rows), weighted=rows.weighted)
            self._counted[key] = self.run_once(sql, params)[0]
        return self._counted[key]

    def distinct(self, expression: str, limit: int) -> list[str]:
        """Distinct non-null values of an expression (as text, sorted; at most ``limit``)."""
        if expression not in self._levels:
            sql = sqlbuild.distinct_values_sql(self.engine.filtered(), expression, limit, dialect=self.dialect)
            # sorted here too: an engine may order text by its collation (PostgreSQL's locale),
            # and the first level is the default base (code point order = DuckDB's byte order)
            self._levels[expression] = sorted(r["v"] for r in self.run_once(sql))
        return self._levels[expression]

    def duplicate_keys(self) -> list[dict]:
        """A few (unit, period) keys held by more than one row, each with ``n_rows`` and
        the number of such keys ``n_keys`` (a GROUP BY of the two key columns; once)."""
        if self._duplicates is None:
            k = self.keys
            if self._units_with_duplicates() == 0:
                self._duplicates = []
            else:
                sql = sqlbuild.checkup_duplicate_scan_sql(self.engine.filtered(), k.unit,
                                                          sqlbuild.quote_ident(k.period, self.dialect), self.dialect)
                self._duplicates = self.run_once(sql, {"n_examples": 5}, scan=False)
            self._keys_unique = not self._duplicates
        return self._duplicates

    def _units_with_duplicates(self) -> int | None:
        """Units with more rows than distinct periods, from the cheap probe
        (``sqlbuild.duplicate_probe_sql``) on DuckDB when the periods lie on a grid of at
        most 256 slots; None (unknown) otherwise."""
        kind, grid = self.period_grid()
        if self.dialect.name != "duckdb" or grid is None or grid.n_slots > 64 * sqlbuild.DUPLICATE_PROBE_WORDS:
            return None
        k = self.keys
        slot = sqlbuild.period_slot_sql(k.period, kind, grid.mode, grid.first_ordinal, grid.slot_step, self.dialect)
        sql = sqlbuild.duplicate_probe_sql(self.engine.filtered(), k.unit, k.period, slot, grid.n_slots)
        return int(self.run_once(sql, scan=False)[0]["units_with_duplicates"])

    def _duplicate_text(self, rows: list[dict], count: bool = False) -> str:
        k = self.keys
        shown = ", ".join(f"({r['unit_key']}, {r['period_key']})" for r in rows)
        what = f"{int(rows[0]['n_keys']):,} duplicate (unit, period) keys" if count else "duplicate keys"
        return f"Columns '{k.unit}' and '{k.period}' in {self.label} have {what}, for example {shown}"

    def duplicates(self, reason: str = "First differences and lags", only_if_any: bool = False) -> None:
        """Raise the error naming a few duplicate (unit, period) keys; with ``only_if_any``
        first look for them and return quietly when there are none."""
        if only_if_any and self._keys_unique:
            return
        rows = self.duplicate_keys()
        if only_if_any and not rows:
            return
        raise InputError(f"{self._duplicate_text(rows)}. "
                         f"{reason[0].upper() + reason[1:]} need one row per unit and period: filter or aggregate the duplicates.")

    def duplicate_note(self) -> str | None:
        """The warning for within and pooled fits, which keep every row: the count of
        duplicate (unit, period) keys and a few of them; None when the keys are unique."""
        rows = self.duplicate_keys()
        if not rows:
            return None
        return (f"{self._duplicate_text(rows, count=True)}; the rows are kept (within and pooled fits use every row, first "
                "differences and lags refuse them). Filter or aggregate them if each unit should have one row per period.")

    def nested(self, request: Nesting, params: dict) -> bool:
        if request not in self._nested:
            used = self.used_sql(request.rows)
            self._nested[request] = int(self.run_once(sqlbuild.nesting_sql(used, request.column), params)[0]["mixed"]) == 0
        return self._nested[request]

    # ------------------------------------------------------------------ moments
    def cross_products(self, request: CrossProducts, params: dict) -> list[list[dict]]:
        """The request's aggregates, one list of rows per chunk (in chunk order)."""
        rows = request.rows
        chunks = [moments.Chunk()] if request.head else self.chunks()
        total = moments.sum_function(chunks, self.dialect)
        q = rows.q
        p = dict(params)
        streaming = self.streaming
        weighted = rows.weighted

        def used(chunk):
            return self.used_sql(rows, chunk, request.head, streaming)

        if request.fold == "sweeps":  # many effects: sweeps over a private scratch copy (sweeps.py)
            from . import sweeps

            self.scans += 1
            return [[sweeps.cross_products(self, request, params)]]
        if request.fold == "rows":
            make = lambda c: sqlbuild.pooled_moments_sql(used(c), q, total, weighted)  # noqa: E731
        elif request.fold == "period":
            make = lambda c: sqlbuild.period_moments_sql(used(c), q, total, weighted)  # noqa: E731
        elif request.fold == "unit-size":  # between and random effects (estimators/between.py)
            make = lambda c: sqlbuild.unit_size_pass_sql(sqlbuild.unit_moments_sql(used(c), q, total), q, total)  # noqa: E731
        elif request.fold == "unit+period":
            first, last = self.period_range()
            make = lambda c: sqlbuild.twoway_pass_sql(used(c), q, first, last, total, self.dialect)  # noqa: E731
        else:
            expand = request.pilot is not None
            if expand:
                p.update({f"q{j}": float(v) for j, v in enumerate(request.pilot)})

            def make(c):
                return sqlbuild.unit_pass_sql(sqlbuild.unit_moments_sql(used(c), q, total, weighted), q, request.layout, expand,
                                              total, weighted)

            if self._numpy_fold(request, chunks):
                return self._fold_in_numpy(request, chunks, used, make, p)
            self.fold_path = "sql"

        if request.head:
            return [self.run_once(make(chunks[0]), p, scan=False)]
        return self.run_chunked(make, p, chunks)

    def _numpy_fold(self, request: CrossProducts, chunks) -> bool:
        """Unit-sorted chunks (more than one) of levels, where the engine can stream."""
        return (len(chunks) > 1 and not request.head and not request.rows.demeaned and not request.rows.weighted
                and (request.layout, request.rows.differenced) in NUMPY_FOLD_LAYOUTS
                and hasattr(self.engine, "fold_chunks"))

    def _fold_in_numpy(self, request: CrossProducts, chunks, used, make, params: dict) -> list[list[dict]]:
        from .fold import NotConsecutive, fold_units

        q = request.rows.q
        pilot = None if request.pilot is None else np.array(request.pilot)

        def fold(batches):
            try:
                return fold_units(batches, q, request.layout, pilot)
            except NotConsecutive:
                return None

        stream = {k: v for k, v in params.items() if k[0] in "sd"}  # the pilot's $q_j are not in the stream
        self.scans += 1
        rows = self.engine.fold_chunks(chunks, lambda c: sqlbuild.stream_rows_sql(used(c), q), stream, fold)
        if any(r is None for r in rows):  # a unit's rows were not consecutive: sum in SQL
            self.fold_path = "sql"
            self.scans -= 1
            return self.run_chunked(make, params, chunks)
        self.fold_path = "numpy"
        return [[r] for r in rows]

    def moments(self, request: CrossProducts, params: dict, assemble: Callable):
        """Run a cross-product request and assemble it (``assemble(rows_per_chunk)``
        returns an object with ``n_obs`` and ``n_units``). Differences of a unit-sorted
        extract are first formed in scan order; if pairs were missed that way (files not
        sorted by period within unit), the pass is redone with sorting."""
        rows = request.rows
        self.streaming = rows.differenced and len(self.chunks()) > 1 and not rows.has_lags and not request.head
        result = assemble(self.cross_products(request, params))
        if self.streaming and self._missed_pairs(rows, params, result):
            self.streaming = False
            self.notes.append("files are not sorted by unit and period; differences were formed after sorting")
            result = assemble(self.cross_products(request, params))
        return result

    def _missed_pairs(self, rows: Rows, params: dict, result) -> bool:
        if self.rows_after_filter() == result.n_obs + result.n_units:  # every unit's rows all paired
            return False
        row = self.row_counts(rows, params)
        pairs = row["n_rows"] - row["first_of_unit"] - row["after_gap"] - row["duplicate_keys"] - row["missing"]
        pairs -= row.get("zero_weight", 0)  # differences whose later row weighs 0 are left out
        return pairs != result.n_obs

    def dropped(self, rows: Rows, params: dict, n_obs: int, n_units: int, singleton_rows: int) -> dict:
        """Rows left out, by reason."""
        total = self.rows_after_filter()
        fd = rows.differenced
        expected = n_obs + singleton_rows + (n_units if fd else 0)
        out = {"missing_or_not_finite": 0}
        if fd:
            out.update(first_period_of_unit=n_units, after_gap=0)
        if rows.weighted:
            out["zero_weight"] = 0
        if total != expected:
            row = self.row_counts(rows, params)
            if rows.weighted:
                out["zero_weight"] = int(row["zero_weight"])
            if fd and row["duplicate_keys"]:
                self.duplicates()
            out["missing_or_not_finite"] = int(row["missing"])
            if fd:
                out["first_period_of_unit"] = int(row["first_of_unit"])
                out["after_gap"] = int(row["after_gap"])
        return out

    # ------------------------------------------------------------------ shared scans (fit_many)
    def set_totals(self, n_rows: int, bounds: tuple) -> None:
        self._n_filtered = int(n_rows)
        self._bounds = bounds

    def set_row_counts(self, rows: Rows, counts: dict) -> None:
        self._counted[(rows.columns, rows.differenced, rows.weight)] = counts

    def set_nested(self, request: Nesting, nested: bool) -> None:
        self._nested[request] = nested

    def shared_moments(self, scan, params: dict) -> dict:
        """One scan: the cross-products of every sample of a shared scan (plan.SharedScan),
        chunk by chunk (unit ranges: every total adds up across chunks, bounds take min/max)."""
        from .plan import pattern_totals

        def make(chunk):
            return self.shared_moments_sql(scan, chunk)

        return pattern_totals(scan, self.run_chunked(make, params))

    def shared_moments_sql(self, scan, chunk=None) -> str:
        """The SQL of a shared scan's first pass on one chunk (every chunk runs the same
        text; the unit range is a parameter). Builds text only: a dry run shows it."""
        rows = scan.rows
        total = moments.sum_function(self.chunks(), self.dialect)  # plain sums on one-thread chunks
        return sqlbuild.shared_moments_sql(self.rows_sql(rows, chunk), scan.samples, rows.differenced,
                                           self.keys.step, scan.nesting_checks(), total, self.dialect)

    def shared_meats(self, scan, requests: list, params: dict) -> None:
        """One scan: the meats of every recorded score request (index, Scores, k,
        n_clusters) of a shared scan; afterwards :meth:`meats` answers them."""
        from .plan import request_sets, score_models

        if not requests:
            return
        rows = scan.rows
        models, sets, values = score_models(scan, requests)
        keys = [k for k in ["k_unit"] + [f"k_c{i}" for i in range(len(scan.clusters))] if any(k in s for s in sets)]

        chunked = all(s in (("k_unit",), ()) for s in sets)  # groups inside units: chunks add up
        total = moments.sum_function(self.chunks() if chunked else [None], self.dialect)

        def make(chunk):
            return sqlbuild.shared_scores_sql(self.rows_sql(rows, chunk), scan.samples, rows.differenced,
                                              self.keys.step, models, keys, sets, total, self.dialect)

        if chunked:
            by_gid: dict = {}
            for table in self.run_chunked(make, {**params, **values}):
                for r in table:
                    acc = by_gid.setdefault(r["gid"], dict.fromkeys(r, 0))
                    for key, v in r.items():
                        acc[key] = r["gid"] if key == "gid" else acc[key] + (v or 0)
        else:  # clusters that cut across units need every row's cell at once
            by_gid = {r["gid"]: r for r in self.run_once(make(None), {**params, **values})}
        members = {m.index: m for m in scan.members}
        for m, (index, req, k, _) in enumerate(requests):
            meats, counts = [], []
            for group in request_sets(scan, members[index], req):
                row = by_gid[sqlbuild.grouping_id(keys, group)]
                if req.kind == "rows":
                    meats.append(moments.symmetric({f"h{i}_{l}": row[f"h{m}_{i}_{l}"] for i in range(k) for l in range(i, k)}, "h", k))
                else:
                    meats.append(moments.symmetric({f"o{i}_{l}": row[f"o{m}_{i}_{l}"] for i in range(k) for l in range(i, k)}, "o", k))
                    counts.append(int(row[f"ng{m}"]))
            self._meats[req] = (meats, counts)

    # ------------------------------------------------------------------ scores
    def serial_sums(self, rows: Rows, k: int, intercept: bool, n_periods: int, within: bool, params: dict) -> dict:
        """One scan: the serial-correlation test's sums over units (``serial_pass.sql``),
        added over chunks."""
        total = moments.sum_function(self.chunks(), self.dialect)

        def make(c):
            return sqlbuild.serial_pass_sql(self.used_sql(rows, c), k, self.keys.step, intercept, n_periods, within, total)

        out: dict = {}
        for table in self.run_chunked(make, params):
            for key, v in table[0].items():
                out[key] = out.get(key, 0) + (v or 0)
        return out

    def unit_mean_meats(self, rows: Rows, modes: Sequence[str], values: dict, params: dict) -> tuple[list[np.ndarray], int]:
        """One scan: the meats, clustered by unit, of the score sets ``modes`` of the
        estimators on unit means (``unit_mean_scores.sql``), and the number of units."""
        total = moments.sum_function(self.chunks(), self.dialect)
        k = rows.q - 1

        def make(c):
            return sqlbuild.unit_mean_scores_sql(self.used_sql(rows, c, streaming=self.streaming), rows.q, modes, total)

        found = [t[0] for t in self.run_chunked(make, {**params, **values})]
        dims = [2 * k + 1 if mode == "means" else k + 1 for mode in modes]
        meats = [sum(moments.symmetric(r, f"o{m}_", d) for r in found) for m, d in enumerate(dims)]
        return meats, sum(int(r["n_groups"]) for r in found)

    def meats(self, request: Scores, params: dict, k: int, n_clusters: int) -> tuple[list[np.ndarray], list[int]]:
        """Meats over the k score columns, with the number of clusters of each."""
        if request in self._meats:
            return self._meats[request]
        if request.rows.effects and self.collecting is None:  # many effects: over the scratch copy (sweeps.py)
            from . import sweeps

            return sweeps.meats(self, request, k, n_clusters)
        if self.collecting is not None:  # planning a shared score scan: record, answer a stand-in
            self.collecting.append((request, k, n_clusters))
            parts = 1 if n_clusters < 2 else 3
            return [np.eye(k)] * parts, [2] * parts
        p = dict(params)
        p.update(dict(request.values))
        rows = request.rows
        q = rows.q
        if request.kind in ("units", "nested"):
            by_unit = request.kind == "units"
            total = moments.sum_function(self.chunks(), self.dialect)

            def make(c):
                return sqlbuild.unit_scores_sql(self.used_sql(rows, c, streaming=self.streaming), q, request.constant, request.demean,
                                                request.n_periods, by_unit, total, weighted=rows.weighted, dialect=self.dialect)

            tables = self.run_chunked(make, p)
            if by_unit:
                found = [t[0] for t in tables]
                return [sum(moments.symmetric(r, "o", k) for r in found)], [sum(int(r["n_groups"]) for r in found)]
            groups: dict[str, np.ndarray] = {}
            for t in tables:
                for r in t:
                    groups[r["g"]] = groups.get(r["g"], 0) + np.array([r[f"e{i}"] for i in range(k)], dtype=float)
            scores = np.array([groups[g] for g in sorted(groups)]) if groups else np.zeros((0, k))
            return [scores.T @ scores], [len(groups)]
        used = self.used_sql(rows)
        if request.kind == "rows":
            row = self.run_once(sqlbuild.residual_moments_sql(used, q, request.constant, request.demean, request.n_periods,
                                                              weighted=rows.weighted, dialect=self.dialect), p)[0]
            return [moments.symmetric(row, "h", k)], []
        sql = sqlbuild.cluster_scores_sql(used, q, request.constant, request.demean, request.n_periods, n_clusters,
                                          weighted=rows.weighted, dialect=self.dialect)
        out = {r["gid"]: (moments.symmetric(r, "o", k), int(r["n_groups"])) for r in self.run_once(sql, p)}
        order = [0] if n_clusters == 1 else [1, 2, 0]  # GROUPING(c0, c1): c0 only 01, c1 only 10, both 00
        return [out[g][0] for g in order], [out[g][1] for g in order]

