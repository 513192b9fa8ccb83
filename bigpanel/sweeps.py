"""Many fixed effects absorbed out of core: level indices, singletons, sweeps, degrees of freedom.

Used by the ``sweeps`` fold (:mod:`bigpanel.estimators.many_effects`) when a within fit has
effects beyond the unit and the period (any number, each with any number of levels,
``cell(a, b)`` for one effect per combination of levels). How it runs:

1. **Copy** (:func:`materialise`): one SELECT on the locked engine gives the sample's rows
   (the design columns shifted and scaled as in every fit) with each effect's and each
   cluster's level as a compact integer index (a numbered DISTINCT of its key columns,
   ``sql/effect_rows.sql``). It is streamed on one thread, so the rows come in the same
   order on every run, and written by Python as raw column files into a private scratch
   folder inside the session's spill folder (mode 0700, removed when the session closes).
   The user's files are only read; user text never reaches anything but that SELECT.
2. **Singletons** (:meth:`Store.drop_singletons`): rows whose level of some effect holds
   one row are dropped, round after round, until none remain.
3. **Sweeps** (:func:`solve`): preconditioned conjugate gradients on the normal
   equations of the effects, D'D a = D'z, for every design column at once (the
   preconditioner is the level counts, so each step is one demeaning by every effect).
   Each iteration is one sweep: one pass over the index files, with arrays the size of
   the levels (``take`` and ``bincount`` in numpy). The transformed column is z - D a.
4. **Tolerance**: the count-weighted norm of the transformed column's per-level means,
   over every effect, relative to the column's norm,
   ``sqrt(sum_e sum_l n_l mean_l(z - D a)^2) / ||z||``, largest over the columns;
   it is 0 at the exact projection. It is recomputed from the rows at the end (not the
   recursion's estimate), and the fit says whether it met the tolerance.
5. **Degrees of freedom** (:func:`redundancies`): absorbed levels = levels with rows minus
   redundancies. Exact for one or two effects (two: the connected components of the
   graph between their levels) and, for more, whenever the levels number at most
   :data:`EXACT_RANK_LEVELS` (the rank of the effects' count matrix D'D); beyond that a
   lower bound on the redundancies (the components of every effect's graph with the
   largest effect), so absorbed levels are an upper bound and standard errors err on
   the large side. The result says which.

Memory grows with the levels (a few arrays of levels x columns), not with the rows: rows
live in the scratch files and pass through in chunks of :data:`CHUNK_ROWS`.

Measured (README, "Many effects"): sweeps in numpy over the integer index files against
sweeps as DuckDB GROUP BYs over a spillable temporary table; the numpy sweeps won.

For writing effects and residuals back: :func:`project` returns a SQL expression's
projection on the effects (the same copy and sweeps) with each effect's level values.
"""

from __future__ import annotations

import os
import shutil
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field

import numpy as np

from . import sqlbuild
from .errors import EstimationError

CHUNK_ROWS = 1 << 18  # rows per chunk of a pass over the scratch files (numpy temporaries ~30 MB)
DEFAULT_TOLERANCE = 1e-10  # on the transformed columns (see the module text); slopes then match dummy-variable OLS to 1e-8 in the tests
DEFAULT_ITERATIONS = 1_000
EXACT_RANK_LEVELS = 1_500  # at most this many levels in all: redundancies from the rank of D'D (exact)
RESTARTS = 3  # extra conjugate-gradient runs from the verified residual when rounding kept the tolerance unmet


@dataclass(frozen=True)
class Effect:
    """One absorbed effect: ``label`` as written (``firm``, ``cell(firm, year)``), and the
    source columns whose combination of values is a level."""

    label: str
    columns: tuple[str, ...]


# ---------------------------------------------------------------- the scratch copy


class Store:
    """Rows as raw column files in a private folder (one file per column, native order).

    Columns: ``i<e>`` (int32 level of effect e), ``g<c>`` (int32 cluster index),
    ``z<j>`` (float64 design column, shifted and scaled), and kept keys as Arrow files.
    """

    def __init__(self, folder: str, dtypes: dict[str, np.dtype]):
        self.folder = folder
        self.dtypes = dict(dtypes)
        self.n = 0

    def path(self, name: str) -> str:
        return os.path.join(self.folder, name + ".bin")

    def writer(self) -> "_Writer":
        return _Writer(self)

    def chunks(self, names: Sequence[str], size: int = CHUNK_ROWS) -> Iterator[dict[str, np.ndarray]]:
        """The named columns, ``size`` rows at a time, in row order."""
        for start in range(0, self.n, size):
            m = min(size, self.n - start)
            yield {name: np.fromfile(self.path(name), dtype=self.dtypes[name], count=m,
                                     offset=start * self.dtypes[name].itemsize) for name in names}

    def keep_rows(self, keep: Callable[[dict], np.ndarray], names: Sequence[str] | None = None) -> int:
        """Rewrite the files with the rows where ``keep(chunk)`` is true; returns rows dropped."""
        names = list(self.dtypes) if names is None else names
        target = Store(self.folder, self.dtypes)
        tmp = {name: self.path(name) + ".new" for name in self.dtypes}
        handles = {name: open(tmp[name], "wb") for name in self.dtypes}
        kept = 0
        try:
            for chunk in self.chunks(list(self.dtypes)):
                mask = keep(chunk)
                for name, values in chunk.items():
                    values[mask].tofile(handles[name])
                kept += int(mask.sum())
        finally:
            for h in handles.values():
                h.close()
        for name in self.dtypes:
            os.replace(tmp[name], self.path(name))
        dropped = self.n - kept
        self.n = target.n = kept
        return dropped


class _Writer:
    def __init__(self, store: Store):
        self.store = store
        self.handles = {name: open(store.path(name), "wb") for name in store.dtypes}

    def append(self, columns: dict[str, np.ndarray]) -> None:
        m = None
        for name, values in columns.items():
            np.ascontiguousarray(values, dtype=self.store.dtypes[name]).tofile(self.handles[name])
            m = len(values)
        self.store.n += m or 0

    def close(self) -> None:
        for h in self.handles.values():
            h.close()


@dataclass
class Copy:
    """The sample copied to the scratch folder: the store, each effect's and each cluster
    set's levels (key values in index order, a pyarrow Table), counts after singletons."""

    store: Store
    effects: list[Effect]
    levels: list  # pyarrow Table per effect: key columns, row i = level i
    n_levels: list[int]
    cluster_sets: list[tuple[str, ...]]
    n_cluster_levels: list[int]
    q: int
    keep: tuple[str, ...] = ()
    singleton_rows: int = 0
    singleton_rounds: int = 0
    counts: list[np.ndarray] = field(default_factory=list)  # rows per level of each effect

    @property
    def index_names(self) -> list[str]:
        return [f"i{e}" for e in range(len(self.effects))]

    @property
    def value_names(self) -> list[str]:
        return [f"z{j}" for j in range(self.q)]

    def level_counts(self) -> list[np.ndarray]:
        counts = [np.zeros(n, dtype=np.int64) for n in self.n_levels]
        for chunk in self.store.chunks(self.index_names):
            for e, name in enumerate(self.index_names):
                counts[e] += np.bincount(chunk[name], minlength=self.n_levels[e])
        return counts

    def drop_singletons(self) -> None:
        """Drop rows whose level of some effect has one row, until none remain (dropping
        one row can leave another level with one)."""
        names = self.index_names
        while True:
            counts = self.level_counts()
            if not any((c == 1).any() for c in counts):
                self.counts = counts
                return

            def keep(chunk, counts=counts):
                mask = np.ones(len(chunk[names[0]]), dtype=bool)
                for e, name in enumerate(names):
                    mask &= counts[e][chunk[name]] != 1
                return mask

            self.singleton_rows += self.store.keep_rows(keep)
            self.singleton_rounds += 1


def materialise(executor, rows, params: dict, effects: Sequence[Effect], keep: Sequence[str] = ()) -> Copy:
    """Copy the sample of ``rows`` (a :class:`~bigpanel.requests.Rows` whose ``effects``
    are the effects' key columns) to a new scratch folder of the session, with level
    indices per effect and per cluster set (each cluster column; for two, their
    intersection too). ``keep``: design-row columns copied as they are (``k_unit``,
    ``k_period``) for writing rows back."""
    import pyarrow as pa

    engine = executor.engine
    design = executor.rows_sql(rows)  # levels are numbered over these (a key column read alone is cheap)
    effect_keys = [sqlbuild.effect_keys(e, len(cols)) for e, cols in enumerate(rows.effects)]
    clusters = [f"k_c{i}" for i in range(len(rows.clusters))]
    cluster_sets = [[c] for c in clusters] + ([clusters] if len(clusters) == 2 else [])
    levels = [engine.run(sqlbuild.effect_levels_sql(design, keys), params) for keys in effect_keys]
    n_cluster = [engine.run(sqlbuild.effect_levels_sql(design, keys, missing=True), params).num_rows for keys in cluster_sets]
    q = rows.q
    dtypes = {f"i{e}": np.dtype(np.int32) for e in range(len(effects))}
    dtypes |= {f"g{c}": np.dtype(np.int32) for c in range(len(cluster_sets))}
    dtypes |= {f"z{j}": np.dtype(np.float64) for j in range(q)}
    if keep:
        dtypes["row"] = np.dtype(np.int64)  # the row's place in keys.arrow (kept rows stay in order)
    store = Store(engine.scratch_folder(), dtypes)
    sql = sqlbuild.effect_rows_sql(design, executor.valid_sql(rows), effect_keys, cluster_sets, q, keep)
    writer = store.writer()
    kept_writer = None
    try:
        for batch in engine.stream(sql, params):
            columns = {name: batch.column(name).to_numpy(zero_copy_only=False) for name in dtypes if name != "row"}
            if keep:
                columns["row"] = np.arange(store.n, store.n + batch.num_rows, dtype=np.int64)
            writer.append(columns)
            if keep:
                if kept_writer is None:
                    kept_writer = pa.ipc.new_file(os.path.join(store.folder, "keys.arrow"), batch.select(list(keep)).schema)
                kept_writer.write_batch(batch.select(list(keep)))
    finally:
        writer.close()
        if kept_writer is not None:
            kept_writer.close()
    return Copy(store, list(effects), levels, [t.num_rows for t in levels], [tuple(s) for s in cluster_sets],
                n_cluster, q, tuple(keep))


# ---------------------------------------------------------------- the sweeps


@dataclass
class Solution:
    """Each effect's coefficients per design column (arrays q x levels), with how the
    iteration went."""

    alpha: list[np.ndarray]
    iterations: int
    tolerance: float
    achieved: float
    converged: bool
    restarts: int = 0


def _dot(a: list[np.ndarray], b: list[np.ndarray]) -> np.ndarray:
    """Per column: the sum over effects and levels of a * b."""
    return sum((x * y).sum(axis=1) for x, y in zip(a, b))


def _apply(copy: Copy, p: list[np.ndarray]) -> list[np.ndarray]:
    """D'D p: one pass over the index files."""
    names = copy.index_names
    out = [np.zeros_like(x) for x in p]
    for chunk in copy.store.chunks(names):
        idx = [chunk[n] for n in names]
        s = sum(np.take(pe, ie, axis=1) for pe, ie in zip(p, idx))
        for e, ie in enumerate(idx):
            for j in range(copy.q):
                out[e][j] += np.bincount(ie, weights=s[j], minlength=copy.n_levels[e])
    return out


@dataclass
class Transformed:
    """What a pass over the transformed columns gives: their cross-product, the raw sums of
    squares, each effect's D'(z - D a) (the normal equations' residual) and the measure."""

    cross: np.ndarray
    raw: np.ndarray
    residual: list[np.ndarray]
    measure: np.ndarray


def transformed_pass(copy: Copy, alpha: list[np.ndarray]) -> Transformed:
    """One pass: the transformed columns z - D a, their cross-product and the check."""
    names = copy.index_names
    q = copy.q
    cross = np.zeros((q, q))
    raw = np.zeros(q)
    residual = [np.zeros_like(a) for a in alpha]
    for chunk in copy.store.chunks(names + copy.value_names):
        idx = [chunk[n] for n in names]
        z = np.stack([chunk[f"z{j}"] for j in range(q)])
        r = z - sum(np.take(a, ie, axis=1) for a, ie in zip(alpha, idx))
        cross += r @ r.T
        raw += np.einsum("ij,ij->i", z, z)
        for e, ie in enumerate(idx):
            for j in range(q):
                residual[e][j] += np.bincount(ie, weights=r[j], minlength=copy.n_levels[e])
    return Transformed(cross, raw, residual, _measure(copy, residual, raw))


def _measure(copy: Copy, residual: list[np.ndarray], raw: np.ndarray) -> np.ndarray:
    inv = _inverse_counts(copy)
    weighted = sum((r * r * w).sum(axis=1) for r, w in zip(residual, inv))
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(raw > 0, np.sqrt(weighted / raw), 0.0)


def _inverse_counts(copy: Copy) -> list[np.ndarray]:
    out = []
    for c in copy.counts:
        inv = np.zeros(len(c))
        inv[c > 0] = 1.0 / c[c > 0]
        out.append(inv)
    return out


def _right_side(copy: Copy) -> tuple[list[np.ndarray], np.ndarray]:
    """D'z per effect and the columns' raw sums of squares: one pass."""
    names = copy.index_names
    q = copy.q
    b = [np.zeros((q, n)) for n in copy.n_levels]
    raw = np.zeros(q)
    for chunk in copy.store.chunks(names + copy.value_names):
        for j in range(q):
            z = chunk[f"z{j}"]
            raw[j] += z @ z
            for e, name in enumerate(names):
                b[e][j] += np.bincount(chunk[name], weights=z, minlength=copy.n_levels[e])
    return b, raw


def _pcg(copy: Copy, x: list[np.ndarray], r: list[np.ndarray], raw: np.ndarray, tolerance: float,
         budget: int) -> tuple[list[np.ndarray], int]:
    """Conjugate gradients on D'D a = D'z from ``x`` with residual ``r`` (per column,
    all columns at once), preconditioned by the level counts; stops when every column's
    measure is below ``tolerance`` (the recursion's estimate) or after ``budget`` sweeps."""
    inv = _inverse_counts(copy)
    scale = np.where(raw > 0, raw, 1.0)
    zr = [ri * w for ri, w in zip(r, inv)]
    p = [v.copy() for v in zr]
    rz = _dot(r, zr)
    done = 0
    while done < budget and np.sqrt(np.max(rz / scale)) > tolerance:
        w = _apply(copy, p)
        done += 1
        pw = _dot(p, w)
        with np.errstate(divide="ignore", invalid="ignore"):
            step = np.where(pw > 0, rz / pw, 0.0)
        x = [xi + step[:, None] * pi for xi, pi in zip(x, p)]
        r = [ri - step[:, None] * wi for ri, wi in zip(r, w)]
        zr = [ri * v for ri, v in zip(r, inv)]
        rz_new = _dot(r, zr)
        with np.errstate(divide="ignore", invalid="ignore"):
            beta = np.where(rz > 0, rz_new / rz, 0.0)
        p = [zi + beta[:, None] * pi for zi, pi in zip(zr, p)]
        rz = np.maximum(rz_new, 0.0)
    return x, done


def solve(copy: Copy, tolerance: float = DEFAULT_TOLERANCE, max_iterations: int = DEFAULT_ITERATIONS
          ) -> tuple[Solution, Transformed]:
    """Take the effects out of every design column; returns the solution and the final
    pass over the transformed columns (their cross-product and the verified measure)."""
    b, raw = _right_side(copy)
    x = [np.zeros_like(v) for v in b]
    r = b
    done = restarts = 0
    while True:
        x, used = _pcg(copy, x, r, raw, tolerance, max_iterations - done)
        done += used
        final = transformed_pass(copy, x)
        achieved = float(np.max(final.measure)) if final.measure.size else 0.0
        if achieved <= tolerance or done >= max_iterations or restarts >= RESTARTS:
            break
        r = final.residual  # the verified residual: go on from there
        restarts += 1
    return Solution(x, done, tolerance, achieved, achieved <= tolerance, restarts), final


# ---------------------------------------------------------------- degrees of freedom


def _components(copy: Copy, a: int, b: int) -> int:
    """Connected components of the graph between the levels (with rows) of effects a and b."""
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    la, lb = copy.n_levels[a], copy.n_levels[b]
    n = la + lb
    labels = np.arange(n)
    for chunk in copy.store.chunks([f"i{a}", f"i{b}"], size=4 * CHUNK_ROWS):
        u, v = labels[chunk[f"i{a}"]], labels[la + chunk[f"i{b}"]]  # repeated edges are harmless
        graph = coo_matrix((np.ones(len(u), dtype=np.int8), (u, v)), shape=(n, n))
        _, comp = connected_components(graph, directed=False)
        labels = comp[labels]
    active = np.r_[copy.counts[a] > 0, copy.counts[b] > 0]
    return int(np.count_nonzero(np.bincount(labels[active], minlength=n)))


def _rank(copy: Copy, subset: Sequence[int]) -> int:
    """Rank of the indicator matrix of the effects in ``subset`` (levels with rows), from
    the count matrix D'D (exact: small integer matrices)."""
    active = [np.flatnonzero(copy.counts[e] > 0) for e in subset]
    sizes = [len(a) for a in active]
    starts = np.r_[0, np.cumsum(sizes)]
    dd = np.zeros((starts[-1], starts[-1]))
    for x, e in enumerate(subset):
        for y, f in enumerate(subset):
            if y < x:
                continue
            cells = np.zeros(copy.n_levels[e] * copy.n_levels[f])
            for chunk in copy.store.chunks([f"i{e}", f"i{f}"]):
                cells += np.bincount(chunk[f"i{e}"].astype(np.int64) * copy.n_levels[f] + chunk[f"i{f}"],
                                     minlength=len(cells))
            block = cells.reshape(copy.n_levels[e], copy.n_levels[f])[np.ix_(active[x], active[y])]
            dd[starts[x]:starts[x + 1], starts[y]:starts[y + 1]] = block
            dd[starts[y]:starts[y + 1], starts[x]:starts[x + 1]] = block.T
    return int(np.linalg.matrix_rank(dd, hermitian=True)) if dd.size else 0


@dataclass(frozen=True)
class Redundancy:
    count: int
    exact: bool
    method: str


def redundancies(copy: Copy, subset: Sequence[int] | None = None, exact_levels: int | None = None) -> Redundancy:
    """Linearly dependent level indicators among the effects in ``subset`` (all by default);
    ``exact_levels`` (default :data:`EXACT_RANK_LEVELS`): most levels for the exact rank."""
    exact_levels = EXACT_RANK_LEVELS if exact_levels is None else exact_levels
    subset = list(range(len(copy.effects))) if subset is None else list(subset)
    active = [int((copy.counts[e] > 0).sum()) for e in subset]
    if len(subset) <= 1:
        return Redundancy(0, True, "one effect: none")
    if len(subset) == 2:
        return Redundancy(_components(copy, subset[0], subset[1]), True,
                          "connected components of the graph between the two effects' levels (exact)")
    if sum(active) <= exact_levels:
        return Redundancy(sum(active) - _rank(copy, subset), True,
                          "rank of the effects' count matrix (exact; at most "
                          f"{exact_levels:,} levels)")
    anchor = subset[int(np.argmax(active))]
    count = sum(_components(copy, anchor, e) for e in subset if e != anchor)
    return Redundancy(count, False, f"connected components of each effect's graph with "
                      f"{copy.effects[anchor].label} (a lower bound on redundancies: absorbed levels "
                      "may be over-counted, which widens standard errors)")


def nested_in(copy: Copy, effect: int, cluster_set: int) -> bool:
    """Does every level (with rows) of ``effect`` lie inside one cluster of ``cluster_set``?"""
    n = copy.n_levels[effect]
    lo = np.full(n, np.iinfo(np.int32).max, dtype=np.int64)
    hi = np.full(n, -1, dtype=np.int64)
    for chunk in copy.store.chunks([f"i{effect}", f"g{cluster_set}"]):
        np.minimum.at(lo, chunk[f"i{effect}"], chunk[f"g{cluster_set}"])
        np.maximum.at(hi, chunk[f"i{effect}"], chunk[f"g{cluster_set}"])
    active = copy.counts[effect] > 0
    return bool(np.all(lo[active] == hi[active]))


# ---------------------------------------------------------------- the fit's absorption


@dataclass
class Absorption:
    """A fit's absorbed effects: the copy, the solution and what the result reports."""

    copy: Copy
    solution: Solution
    transformed: Transformed
    redundancy: Redundancy
    unit_effect: int | None = None
    _nested: dict = field(default_factory=dict)

    @property
    def active_levels(self) -> list[int]:
        return [int((c > 0).sum()) for c in self.copy.counts]

    @property
    def absorbed(self) -> int:
        return sum(self.active_levels) - self.redundancy.count

    def nested(self, effect: int, cluster_set: int) -> bool:
        key = (effect, cluster_set)
        if key not in self._nested:
            self._nested[key] = nested_in(self.copy, effect, cluster_set)
        return self._nested[key]

    def levels_not_nested(self, n_cluster_columns: int) -> int:
        """Absorbed levels minus the rank of the effects nested in a cluster dimension
        (the K' rule of the two-way fix, ESTIMATION.md)."""
        nested = [e for e in range(len(self.copy.effects)) if any(self.nested(e, c) for c in range(n_cluster_columns))]
        if not nested:
            return self.absorbed
        rank = sum(self.active_levels[e] for e in nested) - redundancies(self.copy, nested).count
        return self.absorbed - rank

    def report(self) -> dict:
        s = self.solution
        return {
            "path": "iterative",
            "method": "conjugate gradients on the effects' normal equations, preconditioned by level counts; "
                      "sweeps in numpy over integer level indices in a private scratch folder",
            "effects": [{"effect": e.label, "levels": n} for e, n in zip(self.copy.effects, self.active_levels)],
            "iterations": s.iterations,
            "tolerance": s.tolerance,
            "achieved": s.achieved,
            "converged": s.converged,
            "singleton_rows": self.copy.singleton_rows,
            "singleton_rounds": self.copy.singleton_rounds,
            "redundancies": self.redundancy.count,
            "redundancies_exact": self.redundancy.exact,
            "redundancy_method": self.redundancy.method,
        }


def absorption(executor, rows, params: dict, effects: Sequence[Effect], unit: str | None, tolerance: float,
           max_iterations: int, keep: Sequence[str] = ()) -> Absorption:
    """Copy, drop singletons, solve and count: a fit's absorption (kept on the executor)."""
    copy = materialise(executor, rows, params, effects, keep)
    copy.drop_singletons()
    if copy.store.n == 0:
        raise EstimationError(executor.empty_message())
    solution, final = solve(copy, tolerance, max_iterations)
    unit_effect = next((e for e, eff in enumerate(effects) if eff.columns == (unit,)), None)
    return Absorption(copy, solution, final, redundancies(copy), unit_effect)


def cross_products(executor, request, params: dict) -> dict:
    """The ``sweeps`` fold: the transformed cross-product and counts, as one aggregate row
    (``w<j>_<l>``, ``r<j>``, ``n_obs``, ``n_units``, singletons); the absorption is kept on
    the executor for the score requests."""
    tolerance, iterations, unit, labels = request.sweeps
    effects = [Effect(label, tuple(cols)) for label, cols in zip(labels, request.rows.effects)]
    found = absorption(executor, request.rows, params, effects, unit, tolerance, iterations)
    executor.absorptions[request.rows] = found
    q = request.rows.q
    row = {f"w{j}_{l}": float(found.transformed.cross[j, l]) for j in range(q) for l in range(j, q)}
    row |= {f"r{j}": float(found.transformed.raw[j]) for j in range(q)}
    counts = found.copy.counts[found.unit_effect] if found.unit_effect is not None else None
    row |= {"n_obs": found.copy.store.n, "n_units": int((counts > 0).sum()) if counts is not None else 0,
            "singletons": found.copy.singleton_rows, "singleton_rows": found.copy.singleton_rows,
            "t_min": None, "t_max": None, "absorption": found}
    return row


def meats(executor, request, k: int, n_clusters: int) -> tuple[list[np.ndarray], list[int]]:
    """Score meats over the transformed columns at the request's coefficients: HC1
    (``n_clusters`` 0: sum u^2 x x') or clusters (one way; two ways: A, B, A-and-B)."""
    found: Absorption = executor.absorptions[request.rows]
    copy = found.copy
    values = dict(request.values)
    b = np.array([values[f"b{j}"] for j in range(k)])
    q = copy.q
    names = copy.index_names
    sets = [0] if n_clusters == 1 else ([0, 1, 2] if n_clusters == 2 else [])
    group_names = [f"g{c}" for c in sets]
    meat_rows = np.zeros((k, k))
    sums = [np.zeros((k, copy.n_cluster_levels[c])) for c in sets]
    for chunk in copy.store.chunks(names + copy.value_names + group_names):
        idx = [chunk[n] for n in names]
        z = np.stack([chunk[f"z{j}"] for j in range(q)])
        r = z - sum(np.take(a, ie, axis=1) for a, ie in zip(found.solution.alpha, idx))
        x = r[:k]
        u = r[q - 1] - b @ x
        scores = x * u
        if not sets:
            meat_rows += scores @ scores.T
        for s, name in zip(sums, group_names):
            for j in range(k):
                s[j] += np.bincount(chunk[name], weights=scores[j], minlength=s.shape[1])
    if not sets:
        return [meat_rows], []
    counts = [int(n) for n in _cluster_counts(copy, group_names)]
    return [s @ s.T for s in sums], counts


def _cluster_counts(copy: Copy, names: list[str]) -> list[int]:
    seen = [np.zeros(copy.n_cluster_levels[int(n[1:])], dtype=bool) for n in names]
    for chunk in copy.store.chunks(names):
        for s, name in zip(seen, names):
            s[chunk[name]] = True
    return [int(s.sum()) for s in seen]


# ---------------------------------------------------------------- projections (writing back)


@dataclass
class EffectValues:
    """One effect's levels: ``levels`` (pyarrow Table of its key columns, row i = level i),
    ``value`` (the effect of each level), ``rows`` (rows per level in the sample; 0 for a
    level whose rows were all dropped as singletons)."""

    effect: Effect
    levels: object
    value: np.ndarray
    rows: np.ndarray


@dataclass
class Projection:
    """A column's projection on the absorbed effects (see :func:`project`)."""

    effects: list[EffectValues]
    solution: Solution
    copy: Copy
    shift: float
    scale: float

    def rows(self) -> Iterator[tuple[dict[str, np.ndarray], np.ndarray, np.ndarray]]:
        """Per chunk of the sample's rows, in the copy's order: the kept key columns (as
        pyarrow arrays), the column's value and its projection on the effects (the sum of
        the row's levels' effects), both in the column's own units."""
        import pyarrow as pa

        copy = self.copy
        names = copy.index_names
        reader = pa.ipc.open_file(pa.OSFile(os.path.join(copy.store.folder, "keys.arrow"))) if copy.keep else None
        batch_no, base, window = 0, 0, None  # key rows [base, base + len(window)) read so far
        for chunk in copy.store.chunks(names + ["z0"] + (["row"] if reader else [])):
            idx = [chunk[n] for n in names]
            fitted = sum(np.take(v.value, ie) for v, ie in zip(self.effects, idx))
            value = chunk["z0"] / self.scale + self.shift
            keys = {}
            if reader is not None and len(value):
                ids = chunk["row"]
                while window is None or base + window.num_rows <= ids[-1]:
                    nxt = pa.Table.from_batches([reader.get_batch(batch_no)])
                    batch_no += 1
                    if window is None:
                        window = nxt
                    else:  # rows before this chunk's first are done with
                        cut = max(0, min(int(ids[0]) - base, window.num_rows))
                        window = pa.concat_tables([window.slice(cut), nxt])
                        base += cut
                picked = window.take(pa.array(ids - base))
                keys = {name: picked.column(name) for name in copy.keep}
            yield keys, value, fitted

    def close(self) -> None:
        shutil.rmtree(self.copy.store.folder, ignore_errors=True)


def project(executor, rows, params: dict, effects: Sequence[Effect], expression_params: tuple[float, float] = (0.0, 1.0),
            tolerance: float = DEFAULT_TOLERANCE, max_iterations: int = DEFAULT_ITERATIONS,
            keep: Sequence[str] = ("k_unit", "k_period")) -> Projection:
    """The projection of one SQL column expression on the absorbed effects, for writing
    effects and residuals back (issue 11, item 4).

    ``rows``: a :class:`~bigpanel.requests.Rows` with one design column, the expression
    (checked SQL over the filtered source, e.g. the residual ``y - x'b`` built from the
    fit's design columns and coefficients), and ``effects`` the effects' key columns (as
    in the fit: ``Rows(((sql, 0),), clusters=(), effects=tuple(e.columns for e in effects))``);
    ``params`` the expression's parameters, with its shift and scale as ``$s0``/``$d0``
    (``expression_params`` gives the same two values, to turn results back into the
    expression's units). The sample is the rows where the expression is finite and every
    effect has a level; singletons are dropped as in the fit (repeatedly), so on the
    fit's own rows the sample is the fit's.

    Returns a :class:`Projection`: per effect its level values, effect and row count
    (``effects``; the effects are one solution of the normal equations: with redundant
    levels any other solution differs by constants within connected groups, so normalise
    as documented before writing), the convergence record (``solution``), and
    ``rows()``, an iterator over the sample's rows in chunks: (keys, value, projection).
    The remainder value - projection is the part the effects do not explain (the
    residual, when the expression is y - x'b). Files live in a private scratch folder of
    the session; ``close()`` removes them early (else the session does when it closes).
    """
    copy = materialise(executor, rows, params, effects, keep)
    copy.drop_singletons()
    solution, _ = solve(copy, tolerance, max_iterations)
    shift, scale = expression_params
    values = [EffectValues(eff, copy.levels[e], solution.alpha[e][0] / scale, copy.counts[e])
              for e, eff in enumerate(effects)]
    # the shift belongs to the projection: give it to the first effect (constant within its levels)
    if values:
        values[0].value = np.where(values[0].rows > 0, values[0].value + shift, values[0].value)
    return Projection(values, solution, copy, shift, scale)
