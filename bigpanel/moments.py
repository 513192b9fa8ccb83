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
their scores from a second pass over the rows (sqlbuild.unit_scores_sql).

Chunks: when a Parquet source's row groups hold consecutive ranges of units (an extract
sorted by unit), each range of units is its own query, so each GROUP BY hashes few
units and stays in cache; the chunks run in parallel on cursors with one thread each,
which also makes every sum's order, and so its last digits, the same on every run.
Otherwise the whole source is one chunk, run on one thread (``run_alone``), with
compensated sums (``fsum``) for accuracy. One thread because DuckDB's ``fsum`` is not
exactly rounded: on many threads its partial sums meet in an order set by the thread
count and the threads' timing, and the last bits follow (measured on DuckDB 2.0.1:
adversarial per-group sums differed from 1-thread results in ~4% of groups at 2-16
threads, and from run to run); one thread reads the rows in one fixed order.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import Any

import numpy as np

from . import sqlbuild
from .source import Session, parquet_row_groups

CHUNK_ROWS = 1_000_000  # most rows per chunk query: bounds the GROUP BY (memory flat in rows)
MIN_CHUNK_ROWS = 250_000  # fewest rows worth a query of their own (planning costs ~10 ms)
TARGET_CHUNKS = 16  # chunks wanted between those bounds: work for up to 8 threads, two chunks each


@dataclass(frozen=True)
class Chunk:
    """Files to read and the half-open range of units [low, high) to keep (None: open).

    ``without_unit`` is the chunk of rows whose unit is missing (they fall outside every
    range). The bounds reach SQL as the parameters ``$unit_low`` and ``$unit_high``.
    """

    files: tuple[str, ...] | None = None
    low: Any = None
    high: Any = None
    without_unit: bool = False

    @property
    def ranged(self) -> bool:
        return self.low is not None or self.high is not None

    def params(self) -> dict:
        return {"unit_low": self.low, "unit_high": self.high} if self.ranged else {}

    def source_sql(self, source, unit: str) -> str:
        """The chunk's rows of ``source`` after its filter (all files: the same text for
        every chunk; row groups outside the range are skipped by their statistics)."""
        if self.without_unit:
            return sqlbuild.rows_without_unit_sql(source.filtered(), unit)
        return source.filtered(None, unit if self.ranged else None)


def plan_chunks(session: Session, unit: str) -> list[Chunk]:
    """Split a Parquet source into unit ranges that each read few row groups.

    When the row groups' unit ranges (footer statistics) follow one another, as in an
    extract sorted by unit, consecutive row groups are cut at unit boundaries into
    chunks of about total / TARGET_CHUNKS rows, kept between MIN_CHUNK_ROWS and
    CHUNK_ROWS; each chunk keeps the units in [low, high), so a unit split across row
    groups still lies wholly in one chunk, and DuckDB skips the row groups outside the
    range. Otherwise the whole source is one chunk.

    The plan depends on the files alone, never on the thread count: the chunks' sums
    are added in chunk order, so the same files give the same bits with any ``threads``.
    """
    src = session.source
    whole = [Chunk()]
    if src.kind != "parquet":
        return whole
    try:
        groups = parquet_row_groups(src.files, unit)
    except Exception:  # noqa: BLE001 - unreadable footers are reported by the scan itself
        return whole
    total = sum(g[1] for g in groups) if groups else 0
    size = min(CHUNK_ROWS, max(MIN_CHUNK_ROWS, total // TARGET_CHUNKS))
    if not groups or total < 2 * size:
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
        if rows >= size and lo > groups[i - 1][3]:
            chunks.append(Chunk(tuple(dict.fromkeys(files)), low, lo))
            files, rows, low = [], 0, lo
        files.append(f)
        rows += n
    chunks.append(Chunk(tuple(dict.fromkeys(files)), low, None))
    return chunks if len(chunks) > 1 else whole


def sum_function(chunks: Sequence, dialect: sqlbuild.Dialect = sqlbuild.DUCKDB) -> str:
    """The plain sum when every query runs on one thread (chunked), else the compensated one."""
    return dialect.total(compensated=len(chunks) <= 1)


def run_chunks(
    session: Session,
    chunks: Sequence[Chunk],
    make_sql: Callable[[Chunk], str],
    params: dict,
) -> list:
    """Run one query per chunk; return their Arrow results in chunk order."""
    def bound(chunk) -> dict:
        return params | chunk.params() if isinstance(chunk, Chunk) else params

    if len(chunks) == 1:
        return [run_alone(session, make_sql(chunks[0]), bound(chunks[0]))]
    threads = thread_count(session)

    def one(chunk):
        cur = session.cursor(threads=1)  # the session's one-thread instance (its settings are locked)
        try:
            return session.run(make_sql(chunk), bound(chunk), con=cur)
        finally:
            cur.close()

    return in_parallel(one, chunks, threads)


def in_parallel(one: Callable, chunks: Sequence, threads: int) -> list:
    """``one(chunk)`` for every chunk on up to ``threads`` workers, results in chunk order."""
    pool = ThreadPoolExecutor(max_workers=max(1, int(threads)))
    try:
        return list(pool.map(one, chunks))
    finally:  # on an error or a stop signal, chunks not yet started are dropped
        pool.shutdown(wait=True, cancel_futures=True)


def thread_count(session: Session) -> int:
    """Chunk queries run at once: the engine's ``threads``, by default one per core."""
    return int(session.source.engine.threads or os.cpu_count() or 1)


def run_alone(session: Session, sql: str, params: dict | None = None):
    """Run one query over the whole source on one thread, so that its sums are added in
    one order whatever the engine's thread count (see the module note).

    It runs on the session's one-thread DuckDB instance (Session.cursor(threads=1) makes
    it), on that instance's own connection rather than a cursor: ``USE`` is per
    connection, and a query source inside a DuckDB file needs it."""
    session.cursor(threads=1).close()
    return session.run(sql, params, con=session._single)


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


def pooled_matrix(rows: list[dict], q: int, intercept: bool) -> tuple[np.ndarray, np.ndarray, int]:
    """Add chunk sums (n, s_j, p_j_l) in chunk order; return the cross-product over
    (regressors, [constant], outcome), the raw diagonal, and the row count. In a weighted
    fit the constant's square is the weight total ``nw``, not the row count."""
    n = sum(int(r["n"] or 0) for r in rows)
    n_constant = sum(float(r["nw"] or 0.0) for r in rows) if rows and "nw" in rows[0] else n
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
    out[q - 1, q - 1] = n_constant
    return out, np.diag(out).copy(), n
