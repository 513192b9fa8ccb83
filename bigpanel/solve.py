"""Least squares from cross-products: a pivoted factorization of the scaled matrix.

The normal equations H b = g are solved on the scaled matrix D H D (D = diag(H)^-1/2,
so its diagonal is 1) with a column-pivoted QR: terms whose pivot falls below
``tol`` times the largest are collinear with earlier ones and are dropped by name.

That scaling comes too late for columns whose squares overflow (values near 1e200) or
underflow (near 1e-200) while the sums are accumulated in SQL. So each design column is
first multiplied, in SQL, by a power of two that brings the first rows' values near 1
(:func:`power_of_two_scale`: exact, no digit changes); the algebra runs on the scaled
columns and :func:`unscale` turns coefficients and variances back into the user's units.
What a double still cannot hold is found by :func:`overflowing_columns` and
:func:`unscale`, for the caller to refuse by name.
"""

from __future__ import annotations

import math
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
    by_first: np.ndarray | None = None  # (k,) bool: dropped as collinear with the ``first`` columns


def solve_normal(h: np.ndarray, g: np.ndarray, tol: float = RANK_TOL, zero_variation: np.ndarray | None = None,
                 first: np.ndarray | None = None) -> Solution:
    """Solve ``h b = g`` keeping a maximal set of well-determined columns.

    Columns marked ``first`` (absorbed effects) are chosen before the others: a maximal
    independent set of them is kept, and another column is dropped when it lies in their
    span (``Solution.by_first``) or in the span of earlier kept columns, so an effect is
    never dropped in place of a slope (ESTIMATION.md, "Absorbed effects take priority").

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
    by_first = np.zeros(k, dtype=bool)
    if first is None or not first[idx].any():
        sel = _independent(hs, tol)
    else:
        sel, spanned = _effects_first(hs, first[idx], tol)
        by_first[idx[spanned]] = True
    rank = len(sel)
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
    return Solution(coef, kept, inverse, condition, by_first)


def _independent(hs: np.ndarray, tol: float) -> np.ndarray:
    """Sorted positions of a maximal well-determined set of columns of a scaled
    cross-product (column-pivoted QR; pivots below ``tol`` times the largest are dependent)."""
    _, r, piv = scipy.linalg.qr(hs, pivoting=True)
    pivots = np.abs(np.diag(r))
    return np.sort(piv[: int(np.sum(pivots > tol * pivots[0]))])


def _effects_first(hs: np.ndarray, first: np.ndarray, tol: float) -> tuple[np.ndarray, np.ndarray]:
    """Positions kept (sorted) when the ``first`` columns are chosen before the others, and
    the other columns that lie in the span of the kept ``first`` ones.

    The ``first`` block is reduced on its own; the others are then taken in the
    Schur complement C = H_oo - H_oe H_ee^-1 H_eo (their parts orthogonal to the kept
    effects): a column whose remaining share C_jj of its unit (scaled) sum of squares is
    at most ``tol`` is in the effects' span; among the rest, pivoted QR of C decides."""
    eff, other = np.flatnonzero(first), np.flatnonzero(~first)
    kept_e = eff[_independent(hs[np.ix_(eff, eff)], tol)]
    if other.size == 0:
        return kept_e, np.zeros(0, dtype=int)
    cross = hs[np.ix_(kept_e, other)]
    c = hs[np.ix_(other, other)] - cross.T @ scipy.linalg.solve(hs[np.ix_(kept_e, kept_e)], cross, assume_a="pos")
    share = np.diag(c)
    spanned = share <= tol
    rest = np.flatnonzero(~spanned)
    kept_o = rest[_independent(c[np.ix_(rest, rest)], tol)] if rest.size else rest
    return np.sort(np.r_[kept_e, other[kept_o]]), other[spanned]


def power_of_two_scale(magnitude: float | None) -> float:
    """2**-e with 2**(e-1) <= ``magnitude`` < 2**e: multiplying by it brings values of that
    magnitude into [0.5, 1) without changing a digit. 1.0 for None, zero or non-finite input."""
    if magnitude is None or not math.isfinite(magnitude) or magnitude == 0:
        return 1.0
    return math.ldexp(1.0, -math.frexp(magnitude)[1])


def overflowing_columns(total: np.ndarray) -> list[int]:
    """Indices of the columns of a cross-product matrix whose sums are not finite (an
    overflow, or an infinite value that reached the sums)."""
    bad = ~np.isfinite(total)
    return [int(j) for j in np.flatnonzero(bad.any(axis=0))]


def unscale_rows(k: int, scales: np.ndarray, y_scale: float, intercept: int | None = None,
                 shifts: np.ndarray | None = None) -> np.ndarray:
    """The matrix M of :func:`unscale`: estimates in the user's units are M b' (plus the
    outcome's shift for the intercept), and their covariance is M V' M'."""
    with np.errstate(over="ignore"):
        factor = np.asarray(scales, dtype=float) / y_scale
    rows = np.diag(factor)
    if intercept is not None:
        rows[intercept] = 0.0
        rows[intercept, intercept] = 1.0 / y_scale
        if shifts is not None:
            with np.errstate(over="ignore", invalid="ignore"):
                others = [j for j in range(k) if j != intercept]
                rows[intercept, others] = -np.asarray(shifts, dtype=float)[others] * factor[others]
    return rows


def unscale(coef: np.ndarray, vcov: np.ndarray, scales: np.ndarray, y_scale: float, intercept: int | None = None,
            shifts: np.ndarray | None = None, y_shift: float = 0.0) -> tuple[np.ndarray, np.ndarray, list[int]]:
    """Estimates and standard errors in the user's units, from a fit on shifted, scaled
    columns z_j = (x_j - shifts[j]) scales[j] and outcome (y - y_shift) y_scale.

    The estimates are e = M b' (+ y_shift for the intercept), where M = diag(scales / y_scale)
    except for the intercept's row (index ``intercept``, a constant column: scale 1), which
    is (e_intercept - sum_j shifts[j] scales[j] e_j) / y_scale; their covariance is M V' M'.
    A standard error is computed as |row| sqrt(r V' r') with r = row / |row| (max norm), so
    that it stays finite whenever it is representable, even when M V' M' itself is not.
    Also returns the indices whose estimate or standard error a double cannot hold.
    """
    k = len(coef)
    rows = unscale_rows(k, scales, y_scale, intercept, shifts)
    estimate = np.zeros(k)
    std_error = np.zeros(k)
    with np.errstate(over="ignore", invalid="ignore"):
        for j in range(k):
            size = float(np.max(np.abs(rows[j])))
            if size == 0 or not math.isfinite(size):
                estimate[j] = std_error[j] = float("nan") if size else 0.0
                continue
            r = rows[j] / size
            estimate[j] = size * float(r @ coef)
            quad = float(r @ vcov @ r)
            std_error[j] = size * math.sqrt(quad) if quad >= 0 else float("nan")
        if intercept is not None:
            estimate[intercept] += y_shift
    bad = [j for j in range(k) if math.isinf(estimate[j]) or math.isinf(std_error[j])
           or (rows[j].any() and not np.isfinite(rows[j]).all())]
    return estimate, std_error, bad
