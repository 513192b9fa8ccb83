"""Accumulating cross-products and cluster scores from per-unit sums, chunk by chunk.

DuckDB computes, for each unit i, n_i, s_i = sum z and S_i = sum z z' over the design
columns z = (x_1..x_k, y) (shifted, see :mod:`bigpanel.fit`). Python turns each chunk's
per-unit sums into the transformed cross-product A_i (within: S_i - s_i s_i'/n_i;
pooled and differenced: the sums with a constant column) and adds them up. Nothing
per row reaches Python; per-unit arrays live only while their chunk is folded in.

Chunks: when a Parquet source's files hold disjoint ranges of units (an extract
sorted by unit), each group of files is its own query, so each GROUP BY hashes few
units and stays in cache; the chunks run in parallel on cursors with one thread each.
Otherwise the whole source is one chunk.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

import numpy as np
import pyarrow.parquet as pq

from .source import Session, parquet_unit_ranges

CHUNK_ROWS = 1_500_000  # rows per chunk query: small enough for a cache-friendly GROUP BY


def plan_chunks(session: Session, unit: str) -> list[tuple[str, ...] | None]:
    """Groups of Parquet files whose unit ranges do not overlap, or ``[None]`` (one chunk).

    Uses only the files' footer statistics. A unit whose rows span two files puts
    those files in the same group.
    """
    src = session.source
    if src.kind != "parquet" or len(src.files) < 2:
        return [None]
    try:
        ranges = parquet_unit_ranges(src.files, unit)
    except Exception:  # noqa: BLE001 - unreadable footers are reported by the scan itself
        return [None]
    if ranges is None:
        return [None]
    stats = [(r, f) for r, f in zip(ranges, src.files) if r is not None]
    if not stats:
        return [None]
    try:
        stats.sort(key=lambda item: item[0][0])
    except TypeError:
        return [None]
    rows = {f: pq.read_metadata(f).num_rows for _, f in stats}
    groups: list[list[str]] = []
    group_hi, group_rows = None, 0
    for (lo, hi), f in stats:
        overlaps = group_hi is not None and lo <= group_hi
        if groups and (overlaps or group_rows + rows[f] <= CHUNK_ROWS):
            groups[-1].append(f)
            group_hi = max(group_hi, hi)
            group_rows += rows[f]
        else:
            groups.append([f])
            group_hi, group_rows = hi, rows[f]
    if len(groups) < 2:
        return [None]
    return [tuple(g) for g in groups]


def run_chunks(
    session: Session,
    chunks: Sequence[tuple[str, ...] | None],
    make_sql: Callable[[tuple[str, ...] | None], str],
    params: dict,
    fold: Callable[[object], None],
) -> None:
    """Run one query per chunk and pass each Arrow result to ``fold``, in chunk order,
    on the calling thread (so folding is deterministic)."""
    if len(chunks) == 1:
        fold(session.run(make_sql(chunks[0]), params))
        return
    threads = session.source.engine.threads or os.cpu_count() or 1

    def one(chunk):
        cur = session.cursor(threads=1)
        try:
            return session.run(make_sql(chunk), params, con=cur)
        finally:
            cur.close()

    with ThreadPoolExecutor(max_workers=max(1, int(threads))) as pool:
        for table in pool.map(one, chunks):
            fold(table)


def unit_tensor(table, q: int) -> tuple[np.ndarray, np.ndarray]:
    """Per-unit counts (m,) and moment matrices G (m, q+1, q+1) over (1, z_0..z_{q-1})."""
    n = table.column("n").to_numpy().astype(np.float64)
    m = len(n)
    g = np.empty((m, q + 1, q + 1))
    g[:, 0, 0] = n
    for j in range(q):
        s = table.column(f"s{j}").to_numpy()
        g[:, 0, j + 1] = g[:, j + 1, 0] = s
        for l in range(j, q):
            p = table.column(f"p{j}_{l}").to_numpy()
            g[:, j + 1, l + 1] = g[:, l + 1, j + 1] = p
    return n, g


def transform(g: np.ndarray, mode: str) -> np.ndarray:
    """Per-unit transformed cross-products.

    mode ``within``: S - s s'/n (unit-demeaned); ``intercept``: the full matrix with the
    constant as the last regressor column; ``plain``: S without the constant.
    Column order of the result: regressors first, then (for ``intercept``) the constant,
    then the outcome last.
    """
    n = g[:, 0, 0]
    inner = g[:, 1:, 1:]
    if mode == "within":
        s = g[:, 0, 1:]
        return inner - s[:, :, None] * s[:, None, :] / n[:, None, None]
    if mode == "plain":
        return inner.copy()
    q = inner.shape[1]
    order = list(range(1, q)) + [0, q]  # x_1..x_k, constant, y (indices into g)
    return g[:, order][:, :, order]


@dataclass
class ClusterMeat:
    """Sum over clusters of s_g s_g', where s_g = a_g - B_g b comes from per-unit sums.

    Clusters are units (each complete in one chunk) or coarser groups that contain
    whole units. Unit clusters are folded at once around a pilot coefficient b0, with
    sums of r r', r (x) vec(B) and vec(B) vec(B)' (r = a - B b0), so that the meat for
    the final b is exact without keeping per-unit data. Coarser clusters keep one
    (k+1) x (k+1) matrix per cluster.
    """

    k: int
    pilot: np.ndarray | None = None
    by_unit: bool = True
    rr: np.ndarray = field(init=False)
    rb: np.ndarray = field(init=False)
    bb: np.ndarray = field(init=False)
    groups: dict = field(default_factory=dict)

    def __post_init__(self) -> None:
        k = self.k
        self.rr = np.zeros((k, k))
        self.rb = np.zeros((k, k * k))
        self.bb = np.zeros((k * k, k * k))

    def add(self, a_tensor: np.ndarray, keys: np.ndarray | None = None) -> None:
        """Fold per-unit transformed cross-products (m, k+1, k+1), outcome last."""
        k = self.k
        if not self.by_unit:
            uniq, inv = np.unique(keys, return_inverse=True)
            sums = np.zeros((len(uniq), k + 1, k + 1))
            np.add.at(sums, inv, a_tensor)
            for key, mat in zip(uniq.tolist(), sums):
                prev = self.groups.get(key)
                self.groups[key] = mat if prev is None else prev + mat
            return
        b = a_tensor[:, :k, :k]
        a = a_tensor[:, :k, k]
        if self.pilot is None:  # any b0 is exact; one near b keeps the expansion from cancelling
            self.pilot = np.linalg.lstsq(b.sum(axis=0), a.sum(axis=0), rcond=None)[0]
        r = a - np.einsum("ijl,l->ij", b, self.pilot)
        flat = b.reshape(len(b), k * k)
        self.rr += r.T @ r
        self.rb += r.T @ flat
        self.bb += flat.T @ flat

    def meat(self, coef: np.ndarray) -> np.ndarray:
        k = self.k
        if not self.by_unit:
            out = np.zeros((k, k))
            for mat in self.groups.values():
                s = mat[:k, k] - mat[:k, :k] @ coef
                out += np.outer(s, s)
            return out
        d = coef - self.pilot
        cross = np.einsum("ajl,l->aj", self.rb.reshape(k, k, k), d)
        quad = np.einsum("jlmn,l,n->jm", self.bb.reshape(k, k, k, k), d, d)
        out = self.rr - cross - cross.T + quad
        return (out + out.T) / 2
