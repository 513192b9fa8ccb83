"""Least squares from cross-products: a pivoted factorization of the scaled matrix.

The normal equations H b = g are solved on the scaled matrix D H D (D = diag(H)^-1/2,
so its diagonal is 1) with a column-pivoted QR: terms whose pivot falls below
``tol`` times the largest are collinear with earlier ones and are dropped by name.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.linalg

RANK_TOL = 1e-10  # relative pivot size below which a scaled column counts as dependent


@dataclass(frozen=True)
class Solution:
    coef: np.ndarray  # (k,), zero for dropped columns
    kept: np.ndarray  # (k,) bool
    inverse: np.ndarray  # (k, k), (H_kept)^-1 embedded with zeros for dropped columns
    condition: float  # condition number of the scaled kept block


def solve_normal(h: np.ndarray, g: np.ndarray, tol: float = RANK_TOL, zero_variation: np.ndarray | None = None) -> Solution:
    """Solve ``h b = g`` keeping a maximal set of well-determined columns.

    Parameters
    ----------
    h : ndarray of shape (k, k)
        Symmetric positive semi-definite cross-product matrix.
    g : ndarray of shape (k,)
    zero_variation : ndarray of shape (k,) of bool, optional
        Columns known to have no variation; they are dropped before factorizing.
    """
    k = len(g)
    diag = np.diag(h).copy()
    usable = diag > 0
    if zero_variation is not None:
        usable &= ~zero_variation
    idx = np.flatnonzero(usable)
    kept = np.zeros(k, dtype=bool)
    coef = np.zeros(k)
    inverse = np.zeros((k, k))
    if idx.size == 0:
        return Solution(coef, kept, inverse, float("nan"))
    d = 1.0 / np.sqrt(diag[idx])
    hs = h[np.ix_(idx, idx)] * d[:, None] * d[None, :]
    _, r, piv = scipy.linalg.qr(hs, pivoting=True)
    pivots = np.abs(np.diag(r))
    rank = int(np.sum(pivots > tol * pivots[0]))
    sel = np.sort(piv[:rank])
    chosen = idx[sel]
    kept[chosen] = True
    hk = hs[np.ix_(sel, sel)]
    c, low = scipy.linalg.cho_factor(hk)
    bs = scipy.linalg.cho_solve((c, low), g[chosen] * d[sel])
    inv_s = scipy.linalg.cho_solve((c, low), np.eye(rank))
    coef[chosen] = bs * d[sel]
    inverse[np.ix_(chosen, chosen)] = inv_s * d[sel][:, None] * d[sel][None, :]
    eig = np.linalg.eigvalsh(hk)
    condition = float(eig[-1] / eig[0]) if eig[0] > 0 else float("inf")
    return Solution(coef, kept, inverse, condition)
