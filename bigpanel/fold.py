"""The unit fold in numpy: per-unit sums of streamed, unit-sorted rows (``np.add.reduceat``).

A chunk of a unit-sorted extract holds each unit's rows one after another. DuckDB computes
the design columns (filters, expressions, lags and differences stay in SQL) and streams
them as Arrow batches; numpy cuts each batch at unit boundaries and sums each unit's rows
with one ``reduceat`` per block of columns, then folds the units exactly as
``unit_pass.sql`` does (same result names), so the estimators read either path alike.
Rows of a unit that straddle two batches are carried over. If a unit's rows are not
consecutive (a row group not sorted inside), :class:`NotConsecutive` is raised and the
caller uses the SQL path.
"""

from __future__ import annotations

import numpy as np

from .moments import pairs


class NotConsecutive(Exception):
    """A unit's rows are not consecutive in the stream."""


def fold_units(batches, q: int, layout: str, pilot: np.ndarray | None = None) -> dict:
    """Sum a stream of (k_unit, k_period, z0..z{q-1}) batches into unit_pass.sql's row.

    ``layout``: ``within`` (S_i - s_i s_i'/n_i), ``plain`` or ``constant`` (a constant
    column before the outcome); ``pilot``: expansion centre for the unit-cluster meat.
    """
    state = _State(q, layout, pilot)
    carry_keys, carry_z, carry_t = None, None, None
    for batch in batches:
        if batch.num_rows == 0:
            continue
        keys = batch.column(0).to_numpy(zero_copy_only=False)
        periods = batch.column(1).to_numpy(zero_copy_only=False)
        z = np.empty((q, batch.num_rows))  # column-major: one contiguous row per design column
        for j in range(q):
            z[j] = batch.column(2 + j).to_numpy(zero_copy_only=False)
        if carry_keys is not None:
            keys = np.concatenate([carry_keys, keys])
            periods = np.concatenate([carry_t, periods])
            z = np.concatenate([carry_z, z], axis=1)
        starts = np.flatnonzero(keys[1:] != keys[:-1]) + 1
        last = int(starts[-1]) if starts.size else 0  # the last unit may continue in the next batch
        if last:
            state.add(keys[:last], periods[:last], z[:, :last], np.r_[0, starts[:-1]])
        carry_keys, carry_t, carry_z = keys[last:], periods[last:], z[:, last:]
    if carry_keys is not None and carry_keys.size:
        state.add(carry_keys, carry_t, carry_z, np.array([0]))
    return state.row()


class _State:
    def __init__(self, q: int, layout: str, pilot: np.ndarray | None):
        self.q, self.layout, self.pilot = q, layout, pilot
        self.dim = q + (1 if layout == "constant" else 0)
        self.idx = pairs(self.dim)
        k = self.dim - 1
        self.kpairs = pairs(k)
        self.design_pairs = tuple(np.array(pairs(q)).T)
        self.design_diag = [i for i, (x, y) in enumerate(pairs(q)) if x == y]
        self.w = np.zeros(len(self.idx))
        self.raw = np.zeros(q)
        self.n_obs = self.n_units = self.singletons = self.singleton_rows = 0
        self.t_min = self.t_max = None
        self.last_key = None
        if pilot is not None:
            self.rr = np.zeros((k, k))
            self.rb = np.zeros((k, len(self.kpairs)))
            self.bb = np.zeros((len(self.kpairs), len(self.kpairs)))

    def add(self, keys, periods, z, bounds) -> None:
        """Add whole units: rows ``bounds[i]`` up to the next bound are one unit's."""
        heads = keys[bounds]
        if (self.last_key is not None and not heads[0] > self.last_key) or (heads.size > 1 and not (heads[1:] > heads[:-1]).all()):
            raise NotConsecutive
        self.last_key = heads[-1]
        n = np.diff(np.r_[bounds, keys.size])
        q = self.q
        a, b = self.design_pairs
        products = np.empty((len(a), z.shape[1]))
        for i, (x, y) in enumerate(zip(a, b)):
            np.multiply(z[x], z[y], out=products[i])
        s = np.add.reduceat(z, bounds, axis=1).T
        p = np.add.reduceat(products, bounds, axis=1).T
        self.raw += p[:, self.design_diag].sum(axis=0)
        keep = n > 1 if self.layout == "within" else n > 0
        self.n_units += int(keep.sum())
        self.n_obs += int(n[keep].sum())
        self.singletons += int((~keep).sum())
        self.singleton_rows += int(n[~keep].sum())
        first = np.minimum.reduceat(periods, bounds)[keep]
        final = np.maximum.reduceat(periods, bounds)[keep]
        if first.size:
            lo, hi = first.min(), final.max()
            self.t_min = lo if self.t_min is None else min(self.t_min, lo)
            self.t_max = hi if self.t_max is None else max(self.t_max, hi)
        entries = self._entries(n, s, p, a, b)  # units x pairs(dim)
        self.w += entries.sum(axis=0)
        if self.pilot is not None:
            self._expand(entries)

    def _entries(self, n, s, p, a, b) -> np.ndarray:
        """Each unit's transformed cross-product entries in pairs(dim) order."""
        q = self.q
        pos = {(int(x), int(y)): i for i, (x, y) in enumerate(zip(a, b))}
        cols = []
        for j, l in self.idx:
            if self.layout == "within":
                cols.append(p[:, pos[(j, l)]] - s[:, j] * s[:, l] / n)
            elif self.layout == "plain":
                cols.append(p[:, pos[(j, l)]])
            else:  # constant at index q - 1, outcome at q
                jj = None if j == q - 1 else (q - 1 if j == q else j)
                ll = None if l == q - 1 else (q - 1 if l == q else l)
                if jj is None and ll is None:
                    cols.append(n.astype(np.float64))
                elif jj is None or ll is None:
                    cols.append(s[:, ll if jj is None else jj])
                else:
                    cols.append(p[:, pos[(min(jj, ll), max(jj, ll))]])
        return np.column_stack(cols)

    def _expand(self, entries: np.ndarray) -> None:
        k = self.dim - 1
        where = {pair: i for i, pair in enumerate(self.idx)}
        bmat = entries[:, [where[pr] for pr in self.kpairs]]  # B_i entries over regressor pairs
        full = np.zeros((entries.shape[0], k, k))
        for i, (x, y) in enumerate(self.kpairs):
            full[:, x, y] = full[:, y, x] = bmat[:, i]
        a_y = entries[:, [where[(j, k)] for j in range(k)]]
        e = a_y - full @ self.pilot
        self.rr += e.T @ e
        self.rb += e.T @ bmat
        self.bb += bmat.T @ bmat

    def row(self) -> dict:
        out = {f"w{j}_{l}": float(v) for (j, l), v in zip(self.idx, self.w)}
        out.update({f"r{j}": float(v) for j, v in enumerate(self.raw)})
        out.update(n_obs=self.n_obs, n_units=self.n_units, singletons=self.singletons,
                   singleton_rows=self.singleton_rows, t_min=_plain(self.t_min), t_max=_plain(self.t_max))
        if self.pilot is not None:
            k = self.dim - 1
            out.update({f"rr{j}_{m}": float(self.rr[j, m]) for j in range(k) for m in range(j, k)})
            out.update({f"rb{j}_{a}_{b}": float(self.rb[j, i]) for j in range(k) for i, (a, b) in enumerate(self.kpairs)})
            n = len(self.kpairs)
            out.update({f"bb{u}_{v}": float(self.bb[u, v]) for u in range(n) for v in range(u, n)})
        return out


def _plain(value):
    return value.item() if hasattr(value, "item") else value
