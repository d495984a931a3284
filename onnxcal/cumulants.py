"""Cumulants from raw moments, and the row cumulants of a :mod:`onnxcal.sweep` pass from its power sums."""

from __future__ import annotations

from math import comb

import numpy as np


def cumulants_from_moments(mu: np.ndarray) -> np.ndarray:
    """Cumulants kappa_1..kappa_m from raw moments mu_1..mu_m (rows of an (m, n) array).

    Up to m = 5 from the central moments c_j (kappa_2 = c_2, kappa_3 = c_3,
    kappa_4 = c_4 - 3 c_2^2, kappa_5 = c_5 - 10 c_3 c_2); beyond, by the
    recursion kappa_n = mu_n - sum_{j=1}^{n-1} C(n-1, j-1) kappa_j mu_{n-j}
    (both common practice).
    """
    m = len(mu)
    if m > 5:
        kappa = np.empty_like(mu)
        for n in range(1, m + 1):
            acc = mu[n - 1].copy()
            for j in range(1, n):
                acc -= comb(n - 1, j - 1) * kappa[j - 1] * mu[n - j - 1]
            kappa[n - 1] = acc
        return kappa
    kappa = np.empty_like(mu)
    if m == 0:
        return kappa
    m1 = kappa[0] = mu[0]
    if m >= 2:
        sq = m1 * m1
        c2 = kappa[1] = mu[1] - sq
    if m >= 3:
        c3 = kappa[2] = mu[2] - m1 * (3.0 * mu[1] - 2.0 * sq)
    if m >= 4:
        c4 = mu[3] - m1 * (4.0 * mu[2] - m1 * (6.0 * mu[1] - 3.0 * sq))
        kappa[3] = c4 - 3.0 * c2 * c2
    if m >= 5:
        c5 = mu[4] - m1 * (5.0 * mu[3] - m1 * (10.0 * mu[2] - m1 * (10.0 * mu[1] - 4.0 * sq)))
        kappa[4] = c5 - 10.0 * c3 * c2
    return kappa


def row_cumulants(
    sums: np.ndarray, eps: float, m: int, s: float | np.ndarray, b: float
) -> tuple[np.ndarray, np.ndarray]:
    """Row totals at the exact beta and the cumulants 1..m of z = (x + s) / b (an (m, c) array).

    ``sums`` holds the row sums of w x^j (j = 0..max(m, 1)); the weights at the
    exact beta are w exp(eps x), to first order w (1 + eps x), so the sum of
    order j needs that of order j + 1. The highest one is left at b: its
    correction is about eps x ~ 1e-7 of itself, and the top cumulant only
    ever enters multiplied by d^m, d a step in beta (at most ~1e-2).
    """
    at = sums[: m + 1].copy()
    if eps:
        top = min(m, len(sums) - 2)
        at[: top + 1] += eps * sums[1 : top + 2]
    kappa = cumulants_from_moments(at[1:] / at[0])
    if m:
        kappa[0] += s
        kappa /= (b ** np.arange(1, m + 1))[:, None]
    return at[0], kappa
