"""Sandwich variances from the bread (H^-1) and a meat, with their small-sample factors.

Conventions (../shared/ESTIMATION.md, and the sources named there):

- homoskedastic: V = s^2 H^-1, s^2 = RSS / (N - K - absorbed); t with N - K - absorbed df.
- HC1: V = H^-1 (sum u^2 x x') H^-1 * N / (N - K - absorbed); same df.
- CR1 (Liang and Zeger): V = H^-1 (sum_g s_g s_g') H^-1 * G/(G-1) * (N-1)/(N-K'),
  K' = K plus absorbed levels not nested in the clusters (Cameron and Miller 2015);
  t with G - 1 df. K' is chosen by the caller (inference.k_prime).
- Two-way (Cameron, Gelbach and Miller 2011): V_A + V_B - V_AB, each with its own
  G/(G-1) and one K' for all three (slopes plus the absorbed levels not nested in either
  cluster dimension, or every level); negative eigenvalues are set to zero (and
  reported); t with min(G_A, G_B) - 1 df.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Variance:
    vcov: np.ndarray
    kind: str
    df: float
    small_sample_factor: float | list[float]
    n_clusters: int | list[int] | None
    clipped_eigenvalues: int = 0
    k_prime: int | None = None  # K' of the cluster factor (one for every component)


def _sandwich(inverse: np.ndarray, meat: np.ndarray) -> np.ndarray:
    v = inverse @ meat @ inverse
    return (v + v.T) / 2


def homoskedastic(inverse: np.ndarray, rss: float, n_obs: int, k: int, absorbed: int) -> Variance:
    df = n_obs - k - absorbed
    s2 = rss / df if df > 0 else float("nan")
    return Variance(s2 * inverse, "homoskedastic", float(df), 1.0, None)


def hc1(inverse: np.ndarray, meat: np.ndarray, n_obs: int, k: int, absorbed: int) -> Variance:
    df = n_obs - k - absorbed
    factor = n_obs / df if df > 0 else float("nan")
    return Variance(factor * _sandwich(inverse, meat), "hc1", float(df), factor, None)


def cr1_factor(n_clusters: int, n_obs: int, k_prime: int) -> float:
    if n_clusters < 2 or n_obs - k_prime <= 0:
        return float("nan")
    return n_clusters / (n_clusters - 1) * (n_obs - 1) / (n_obs - k_prime)


def cluster(inverse: np.ndarray, meat: np.ndarray, n_clusters: int, n_obs: int, k_prime: int) -> Variance:
    factor = cr1_factor(n_clusters, n_obs, k_prime)
    return Variance(factor * _sandwich(inverse, meat), "cluster", float(n_clusters - 1), factor, n_clusters,
                    k_prime=k_prime)


def two_way(
    inverse: np.ndarray,
    meats: tuple[np.ndarray, np.ndarray, np.ndarray],
    counts: tuple[int, int, int],
    n_obs: int,
    k_primes: tuple[int, int, int],
) -> Variance:
    """Meats and cluster counts in the order (A, B, A-and-B)."""
    factors = [cr1_factor(g, n_obs, kp) for g, kp in zip(counts, k_primes)]
    parts = [f * _sandwich(inverse, m) for f, m in zip(factors, meats)]
    v = parts[0] + parts[1] - parts[2]
    eigval, eigvec = np.linalg.eigh(v)
    clipped = int(np.sum(eigval < 0))
    if clipped:
        v = (eigvec * np.clip(eigval, 0, None)) @ eigvec.T
    kp = k_primes[0] if len(set(k_primes)) == 1 else None
    return Variance(v, "cluster", float(min(counts[0], counts[1]) - 1), factors, list(counts), clipped, kp)
