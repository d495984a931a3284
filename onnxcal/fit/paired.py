"""Intervals of a mean per-row difference between two candidates (``--method auto``'s paired comparison).

Both candidates score the same rows, so ``d_i`` = (this one's out-of-fold
NLL on row i) minus (the other's) carries everything the comparison needs;
the bootstrap resamples are the same for every candidate, so a replicate's
mean difference is the difference of the two replicates' means.

The interval is the bias-corrected and accelerated (BCa) bootstrap interval
(Efron, "Better Bootstrap Confidence Intervals", JASA 82, 1987; Efron &
Tibshirani, "An Introduction to the Bootstrap", 1993, ch. 14): the
percentile interval's ends moved to

    alpha_j = Phi(z0 + (z0 + z_j) / (1 - a (z0 + z_j))),   z_j = Phi^-1(0.025), Phi^-1(0.975),

with the bias correction ``z0 = Phi^-1(share of replicates below the
estimate)`` (ties counted half, as scipy.stats.bootstrap counts them) and
the acceleration ``a = sum u_j^3 / (6 (sum u_j^2)^1.5)``, ``u_j`` the
jackknife deviations (the mean of the leave-one-out estimates minus the
one leaving unit j out; a unit is a row, or a whole sample with groups).

Why not the plain percentile interval: per-row NLL differences are heavily
skewed (a map that is confidently wrong on a row pays several nats there,
against hundredths on the others). A resample leaves a given row out with
probability (1 - 1/n)^n ~ 0.37, and all of three such rows with
probability ~ 0.05, more than the 2.5 % the lower end needs: the
percentile interval's lower end then sits among the resamples without
them. The acceleration measures the skew and moves both ends toward it,
enough with a few such rows (tests/fit/test_paired.py: three rows 2 nats
worse among 117 rows 0.01 better: percentile -0.010, BCa +0.007). One such
row alone cannot lift it: the resamples without it hold 37 % of the mass.

When every replicate lies on one side of the estimate (z0 infinite) or the
acceleration folds the correction over (1 - a (z0 + z_j) <= 0), BCa is not
defined; the percentile interval is used then.
"""

from __future__ import annotations

import numpy as np

from ..holdout import samples_of

_Z = 1.959963984540054  # the 97.5 % point of the standard normal (scipy.stats.norm.ppf(0.975))


def percentile(values: np.ndarray) -> list[float] | None:
    """The 2.5 % and 97.5 % percentiles; None when empty or any value is not finite."""
    v = np.asarray(values, dtype=np.float64)
    if len(v) == 0 or not np.all(np.isfinite(v)):
        return None
    lo, hi = np.percentile(v, [2.5, 97.5])
    return [float(lo), float(hi)]


def _units(d: np.ndarray, groups: np.ndarray | None) -> tuple[np.ndarray, np.ndarray]:
    """Per unit (row, or whole sample): the sum of d and the number of rows."""
    if groups is None:
        return d, np.ones(len(d))
    samples = samples_of(groups)
    return np.add.reduceat(d, samples.starts), np.asarray(samples.sizes, dtype=np.float64)


def bca(d: np.ndarray, replicates: np.ndarray, groups: np.ndarray | None = None) -> list[float] | None:
    """The 95 % BCa interval of mean(d) from its bootstrap ``replicates`` (see the module docstring).

    None when a replicate is not finite.

    Examples
    --------
    Three rows far above the rest: the lower end moves above 0, where the
    percentile interval's stays below.

    >>> d = np.r_[np.full(117, -0.01), np.full(3, 2.0)]
    >>> rng = np.random.default_rng(0)
    >>> reps = np.array([d[rng.integers(0, 120, 120)].mean() for _ in range(2000)])
    >>> bool(percentile(reps)[0] < 0 < bca(d, reps)[0])
    True
    """
    from scipy.special import ndtr, ndtri  # here: commands that never compare methods do not load scipy

    reps = np.asarray(replicates, dtype=np.float64)
    if len(reps) == 0 or not np.all(np.isfinite(reps)):
        return None
    theta = float(d.sum() / len(d))
    share = (np.count_nonzero(reps < theta) + np.count_nonzero(reps <= theta)) / (2.0 * len(reps))
    if not 0.0 < share < 1.0:
        return percentile(reps)
    z0 = float(ndtri(share))
    sums, sizes = _units(np.asarray(d, dtype=np.float64), groups)
    if len(sums) < 2:
        return percentile(reps)
    leave_out = (sums.sum() - sums) / (sizes.sum() - sizes)
    u = leave_out.mean() - leave_out
    spread = float(u @ u)
    a = float((u**3).sum() / (6.0 * spread**1.5)) if spread > 0 else 0.0
    z = z0 + np.array([-_Z, _Z])
    fold = 1.0 - a * z
    if np.any(fold <= 0):
        return percentile(reps)
    ends = ndtr(z0 + z / fold)
    lo, hi = np.percentile(reps, 100.0 * ends)
    return [float(lo), float(hi)]


def normal(d: np.ndarray, groups: np.ndarray | None) -> list[float]:
    """mean +- 1.96 standard errors of the mean per-row difference (sample sums with ``groups``)."""
    per = d if groups is None else np.add.reduceat(d, samples_of(groups).starts)
    if len(per) < 2:
        return [float("-inf"), float("inf")]
    mean = float(d.sum() / len(d))
    se = float(np.sqrt(len(per)) * np.std(per, ddof=1) / len(d))
    return [mean - _Z * se, mean + _Z * se]
