"""Accumulating cross-products and cluster scores, chunk by chunk, as SQL aggregates.

DuckDB computes, for each unit i, n_i, s_i = sum z and S_i = sum z z' over the design
columns z = (x_1..x_k, y) (shifted, see :mod:`bigpanel.fit`), then in the same query
the unit's transformed cross-product A_i (within: S_i - s_i s_i'/n_i; pooled and
differenced: the sums with a constant column) and sums over units. Only one row per
chunk reaches Python.

Unit-cluster meat in the same pass. With B_i, a_i the regressor block and outcome
column of A_i, unit i's score at b is a_i - B_i b. Around a pilot q (an estimate from
the first rows), r_i = a_i - B_i q and d = b - q:

    sum_i s_i s_i' = sum r r' - C - C' + Q,  C[j,m] = sum_l (sum_i r_ij B_i[m,l]) d_l,
    Q[j,m] = sum_{l,n} (sum_i B_i[j,l] B_i[m,n]) d_l d_n,

which is exact for any q; a q near b keeps the terms from cancelling. The pass sums
r r', r (x) B and B (x) B (k^4/4 sums), so it serves only small k; larger models get
their scores from a second pass over the rows (sqlbuild.cluster_scores_sql).

Chunks: when a Parquet source's files hold disjoint ranges of units (an extract
sorted by unit), each group of files is its own query, so each GROUP BY hashes few
units and stays in cache; the chunks run in parallel on cursors with one thread each,
which also makes every sum's order, and so its last digits, the same on every run.
Otherwise the whole source is one chunk on all threads, and sums are compensated
(``fsum``) so that their result does not depend on the threads' timing.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import Any

import numpy as np
import pyarrow.parquet as pq

from . import sqlbuild
from .source import Session, parquet_row_groups

CHUNK_ROWS = 500_000  # rows per chunk query: small enough for a cache-friendly GROUP BY


@dataclass(frozen=True)
class Chunk:
    """Files to read and the half-open range of units [low, high) to keep (None: open)."""

    files: tuple[str, ...] | None = None
    low: Any = None
    high: Any = None

    def unit_range(self, unit: str) -> tuple[str, Any, Any] | None:
        return None if self.low is None and self.high is None else (unit, self.low, self.high)


def plan_chunks(session: Session, unit: str) -> list[Chunk]:
    """Split a Parquet source into unit ranges that each read few row groups.

    When the row groups' unit ranges (footer statistics) follow one another, as in an
    extract sorted by unit, consecutive row groups are cut into chunks of about
    CHUNK_ROWS rows at unit boundaries; each chunk keeps the units in [low, high), so a
    unit split across row groups still lies wholly in one chunk, and DuckDB skips the
    row groups outside the range. Otherwise the whole source is one chunk.
    """
    src = session.source
    whole = [Chunk()]
    if src.kind != "parquet":
        return whole
    try:
        groups = parquet_row_groups(src.files, unit)
    except Exception:  # noqa: BLE001 - unreadable footers are reported by the scan itself
        return whole
    if not groups or sum(g[1] for g in groups) < 2 * CHUNK_ROWS:
        return whole
    try:
        groups.sort(key=lambda g: (g[2], g[3]))
        sorted_ok = all(a[3] <= b[2] for a, b in zip(groups, groups[1:]))
        sqlbuild.value_literal(groups[0][2])
    except TypeError:
        return whole
    if not sorted_ok:
        return whole
    chunks: list[Chunk] = []
    files: list[str] = []
    rows, low = 0, None
    for i, (f, n, lo, hi) in enumerate(groups):
        if rows >= CHUNK_ROWS and lo > groups[i - 1][3]:
            chunks.append(Chunk(tuple(dict.fromkeys(files)), low, lo))
            files, rows, low = [], 0, lo
        files.append(f)
        rows += n
    chunks.append(Chunk(tuple(dict.fromkeys(files)), low, None))
    return chunks if len(chunks) > 1 else whole


def sum_function(chunks: Sequence) -> str:
    """``sum`` when every query runs on one thread (chunked), else ``fsum``."""
    return "sum" if len(chunks) > 1 else "fsum"


def run_chunks(
    session: Session,
    chunks: Sequence[Chunk],
    make_sql: Callable[[Chunk], str],
    params: dict,
    reduce: Callable | None = None,
) -> list:
    """Run one query per chunk; return their Arrow results (or ``reduce`` of each, computed
    in the worker thread) in chunk order."""
    reduce = reduce or (lambda table: table)
    if len(chunks) == 1:
        return [reduce(session.run(make_sql(chunks[0]), params))]
    threads = session.source.engine.threads or os.cpu_count() or 1

    def one(chunk):
        cur = session.cursor(threads=1)
        try:
            return reduce(session.run(make_sql(chunk), params, con=cur))
        finally:
            cur.close()

    with ThreadPoolExecutor(max_workers=max(1, int(threads))) as pool:
        return list(pool.map(one, chunks))


def symmetric(row: dict, prefix: str, dim: int) -> np.ndarray:
    """A symmetric matrix from upper-triangle entries named ``{prefix}{j}_{l}``."""
    out = np.zeros((dim, dim))
    for j in range(dim):
        for l in range(j, dim):
            out[j, l] = out[l, j] = row[f"{prefix}{j}_{l}"] or 0.0
    return out


def pairs(k: int) -> list[tuple[int, int]]:
    """Upper-triangle index pairs (a <= b) in the order unit_pass_sql names them."""
    return [(a, b) for a in range(k) for b in range(a, k)]


def expanded_meat(row: dict, k: int, pilot: np.ndarray, coef: np.ndarray) -> tuple[np.ndarray, float]:
    """The unit-cluster meat at ``coef`` from the expansion sums around ``pilot``, and
    the ratio of the largest term to the result (a measure of digits cancelled)."""
    rr = symmetric(row, "rr", k)
    idx = pairs(k)
    rb = np.zeros((k, k, k))
    for j in range(k):
        for (a, b) in idx:
            rb[j, a, b] = rb[j, b, a] = row[f"rb{j}_{a}_{b}"] or 0.0
    bb = np.zeros((k, k, k, k))
    for u, (a, b) in enumerate(idx):
        for v in range(u, len(idx)):
            c, e = idx[v]
            val = row[f"bb{u}_{v}"] or 0.0
            for x, y in {(a, b), (b, a)}:
                for z, w in {(c, e), (e, c)}:
                    bb[x, y, z, w] = bb[z, w, x, y] = val
    d = coef - pilot
    cross = np.einsum("jml,l->jm", rb, d)
    quad = np.einsum("jlmn,l,n->jm", bb, d, d)
    meat = rr - cross - cross.T + quad
    meat = (meat + meat.T) / 2
    scale = max(np.abs(np.diag(rr)).max(), np.abs(np.diag(quad)).max(), 1e-300)
    size = np.abs(np.diag(meat)).max()
    return meat, float(scale / size) if size > 0 else float("inf")


def fold_units(table, q: int, mode: str, pilot: np.ndarray | None) -> dict:
    """The sums unit_pass.sql computes, from a chunk's per-unit moments in numpy.

    Used for chunks run on one thread each: the per-unit rows of one chunk (a few tens of
    thousands) are folded by BLAS products in the worker, which is cheaper than DuckDB
    evaluating the k^4/4 expansion sums one by one. Keys and meaning are those of the SQL.
    """
    n = table.column("n").to_numpy().astype(np.float64)
    sums = np.column_stack([table.column(f"s{j}").to_numpy() for j in range(q)])
    prods = np.empty((len(n), q, q))
    for j in range(q):
        for l in range(j, q):
            prods[:, j, l] = prods[:, l, j] = table.column(f"p{j}_{l}").to_numpy()
    if mode == "within":
        entries = prods - sums[:, :, None] * (sums / n[:, None])[:, None, :]
        keep = n > 1
    elif mode == "plain":
        entries, keep = prods, n > 0
    else:  # layout: regressors, constant, outcome
        order = list(range(q - 1))
        entries = np.empty((len(n), q + 1, q + 1))
        inner = order + [q - 1]
        pos = list(range(q - 1)) + [q]
        entries[np.ix_(np.arange(len(n)), pos, pos)] = prods[:, inner][:, :, inner]
        entries[:, q - 1, pos] = entries[:, pos, q - 1] = sums
        entries[:, q - 1, q - 1] = n
        keep = n > 0
    dim = entries.shape[1]
    total = entries.sum(axis=0)
    row = {f"w{j}_{l}": float(total[j, l]) for j in range(dim) for l in range(j, dim)}
    row.update({f"r{j}": float(prods[:, j, j].sum()) for j in range(q)})
    row.update(n_obs=int(n[keep].sum()), n_units=int(keep.sum()), singletons=int((~keep).sum()),
               singleton_rows=int(n[~keep].sum()))
    t_min, t_max = table.column("t_min"), table.column("t_max")
    row["t_min"] = min(t_min.to_pylist()) if len(n) else None
    row["t_max"] = max(t_max.to_pylist()) if len(n) else None
    if pilot is not None:
        k = dim - 1
        b = entries[:, :k, :k]
        r = entries[:, :k, k] - b @ pilot
        idx = pairs(k)
        flat = np.column_stack([b[:, a, c] for a, c in idx])
        rr, rb, bb = r.T @ r, r.T @ flat, flat.T @ flat
        row.update({f"rr{j}_{m}": float(rr[j, m]) for j in range(k) for m in range(j, k)})
        row.update({f"rb{j}_{a}_{c}": float(rb[j, u]) for j in range(k) for u, (a, c) in enumerate(idx)})
        row.update({f"bb{u}_{v}": float(bb[u, v]) for u in range(len(idx)) for v in range(u, len(idx))})
    return row


def pooled_matrix(rows: list[dict], q: int, intercept: bool) -> tuple[np.ndarray, np.ndarray, int]:
    """Add chunk sums (n, s_j, p_j_l) in chunk order; return the cross-product over
    (regressors, [constant], outcome), the raw diagonal, and the row count."""
    n = sum(int(r["n"] or 0) for r in rows)
    s = np.zeros(q)
    p = np.zeros((q, q))
    for r in rows:
        s += [r[f"s{j}"] or 0.0 for j in range(q)]
        p += symmetric(r, "p", q)
    if not intercept:
        return p, np.diag(p).copy(), n
    out = np.zeros((q + 1, q + 1))
    x = slice(0, q - 1)
    out[x, x] = p[:-1, :-1]
    out[x, q] = out[q, x] = p[:-1, -1]
    out[q, q] = p[-1, -1]
    out[x, q - 1] = out[q - 1, x] = s[:-1]
    out[q - 1, q] = out[q, q - 1] = s[-1]
    out[q - 1, q - 1] = n
    return out, np.diag(out).copy(), n
