"""Exact binomial intervals, tail bounds and the pass / fail / undecided verdict.

Everything a decision rule claims is a statement about a binomial count:
the errors among accepted rows, the rows whose true class lies in their
set. This module holds the exact (Clopper-Pearson) interval of such a
proportion, the one-sided upper bound and the tail p-value that the
threshold choices test with, and the verdict a CI gate draws from an
interval and a target. No normal approximation anywhere: the bounds are
quantiles of the beta distribution (``scipy.special.betaincinv``), the
p-values binomial tails (``scipy.special.bdtr``): the quantities
``scipy.stats.beta.ppf`` and ``scipy.stats.binom.cdf`` give (the tests
compare them), without their per-call argument handling, which costs about
a hundred times more per call and is most of the time of a threshold choice.

References
----------
Clopper & Pearson, "The use of confidence or fiducial limits illustrated in
the case of the binomial", Biometrika 26(4), 1934 (the exact interval). The
identity between binomial tails and the regularized incomplete beta
function used below, P(Bin(n, p) <= k) = 1 - I_p(k + 1, n - k), is standard
(e.g. Johnson, Kemp & Kotz, "Univariate Discrete Distributions", 3rd ed.,
2005, sec. 3.2; from memory).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

LEVEL = 0.95
OUTCOMES = ("pass", "fail", "undecided")
SIDES = ("at least", "at most")


def clopper_pearson(
    successes: np.ndarray | int, trials: np.ndarray | int, level: float = LEVEL
) -> tuple[np.ndarray, np.ndarray]:
    """Two-sided exact (Clopper-Pearson) interval of a binomial proportion.

    low = B(a/2; k, n - k + 1) and high = B(1 - a/2; k + 1, n - k), with B
    the beta quantile function and a = 1 - level; low = 0 when k = 0, high
    = 1 when k = n. Each side misses with probability at most a/2 whatever
    the true proportion, so the interval is conservative (its coverage is at
    least ``level``). With no trials the interval is [0, 1].

    Parameters
    ----------
    successes, trials : int or ndarray of int
        Counts k <= n, broadcast together.
    level : float, default 0.95
        Two-sided confidence level.

    Returns
    -------
    low, high : ndarray of float64
        The bounds, 0-d for scalar input.

    References
    ----------
    Clopper & Pearson, Biometrika 1934; the same bounds as
    ``scipy.stats.binomtest(k, n).proportion_ci(method="exact")``.

    Examples
    --------
    >>> low, high = clopper_pearson(0, 10)
    >>> float(low), round(float(high), 4)
    (0.0, 0.3085)
    """
    from scipy import (
        special,  # here, not at import: scipy takes ~0.5 s and inspect needs none
    )
    k = np.asarray(successes, dtype=np.float64)
    n = np.asarray(trials, dtype=np.float64)
    tail = (1.0 - level) / 2.0
    with np.errstate(invalid="ignore", divide="ignore"):
        low = np.where(k > 0, special.betaincinv(k, n - k + 1, tail), 0.0)
        high = np.where(k < n, special.betaincinv(k + 1, n - k, 1.0 - tail), 1.0)
    return np.asarray(low, dtype=np.float64), np.asarray(high, dtype=np.float64)


def upper_bound(errors: np.ndarray | int, trials: np.ndarray | int, delta: float) -> np.ndarray:
    """One-sided exact upper confidence bound of a binomial proportion.

    The largest b with P(Bin(n, b) <= k) >= delta, i.e. B(1 - delta; k + 1,
    n - k): the true proportion exceeds it with probability at most delta.
    It is 1 when k = n (no trials included). This is the bound B*(r, delta,
    m) of Geifman & El-Yaniv (2017, Lemma 3.1, from memory) with r = k / n,
    and the one-sided Clopper-Pearson bound.

    Examples
    --------
    >>> round(float(upper_bound(0, 29, 0.05)), 4)   # 1 - 0.05 ** (1 / 29)
    0.0981
    """
    from scipy import (
        special,  # here, not at import: scipy takes ~0.5 s and inspect needs none
    )
    k = np.asarray(errors, dtype=np.float64)
    n = np.asarray(trials, dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        bound = np.where(k < n, special.betaincinv(k + 1, n - k, 1.0 - delta), 1.0)
    return np.asarray(bound, dtype=np.float64)


def tail_pvalue(errors: np.ndarray | int, trials: np.ndarray | int, target: float) -> np.ndarray:
    """p-value of the null "the error rate exceeds ``target``": P(Bin(n, target) <= k).

    Small when k errors in n trials are too few to be likely under an error
    rate of ``target`` or more (the binomial tail is decreasing in the rate,
    so the largest null rate gives the largest p-value). It is 1 with no
    trials. p <= delta exactly when :func:`upper_bound` (k, n, delta) <=
    target. Learn then Test uses this p-value for a binary loss
    (Angelopoulos et al. 2021, the binomial tail bound; from memory: sec. 3).

    Examples
    --------
    >>> round(float(tail_pvalue(0, 29, 0.1)), 4)    # 0.9 ** 29
    0.0471
    """
    from scipy import (
        special,  # here, not at import: scipy takes ~0.5 s and inspect needs none
    )
    k = np.asarray(errors, dtype=np.int64)
    n = np.asarray(trials, dtype=np.int64)
    return np.asarray(np.where(n > 0, special.bdtr(k, n, target), 1.0), dtype=np.float64)


@dataclass(frozen=True)
class Proportion:
    """A count out of a number of trials, with its exact interval.

    Attributes
    ----------
    successes, trials : int
        The count and the number of trials.
    low, high : float
        Two-sided Clopper-Pearson bounds at ``level`` ([0, 1] with no trials).
    level : float
        Confidence level of the interval.
    """

    successes: int
    trials: int
    low: float
    high: float
    level: float = LEVEL

    @property
    def rate(self) -> float:
        """successes / trials (NaN with no trials)."""
        return self.successes / self.trials if self.trials else float("nan")

    def to_dict(self) -> dict[str, Any]:
        return {
            "successes": self.successes, "trials": self.trials, "rate": None if not self.trials else self.rate,
            "interval": [self.low, self.high], "level": self.level,
        }


def proportion(successes: int, trials: int, level: float = LEVEL) -> Proportion:
    """``successes`` out of ``trials`` with its Clopper-Pearson interval.

    Examples
    --------
    >>> p = proportion(3, 10)
    >>> p.rate, round(p.low, 4), round(p.high, 4)
    (0.3, 0.0667, 0.6525)
    """
    low, high = clopper_pearson(successes, trials, level)
    return Proportion(int(successes), int(trials), float(low), float(high), level)


@dataclass(frozen=True)
class Verdict:
    """The gate's decision on one measured proportion against a target.

    Attributes
    ----------
    outcome : str
        ``"pass"`` when the whole interval lies on the right side of the
        target, ``"fail"`` when it lies wholly on the wrong side,
        ``"undecided"`` when it straddles the target (more data would tell).
    measured : Proportion
        The count, its rate and its exact interval.
    target : float
        The rate it is held to.
    side : str
        ``"at least"`` (coverage: the rate should reach the target) or
        ``"at most"`` (error: the rate should stay under it).
    """

    outcome: str
    measured: Proportion
    target: float
    side: str

    def to_dict(self) -> dict[str, Any]:
        return {"outcome": self.outcome, "target": self.target, "side": self.side, **self.measured.to_dict()}


def verdict(successes: int, trials: int, target: float, side: str, level: float = LEVEL) -> Verdict:
    """Pass, fail or undecided: where the exact interval lies relative to ``target``.

    For ``side="at least"`` (e.g. the fraction of rows whose true class is
    in their set, against 1 - alpha): pass when low >= target, fail when
    high < target. For ``side="at most"`` (e.g. the error among accepted
    rows, against epsilon): pass when high <= target, fail when low >
    target. Otherwise undecided. A true rate on the right side is called
    "fail" with probability at most (1 - level) / 2, as is a true rate on
    the wrong side "pass" (each is one tail of the Clopper-Pearson interval).

    Examples
    --------
    >>> verdict(990, 1000, 0.95, "at least").outcome
    'pass'
    >>> verdict(95, 100, 0.9, "at least").outcome     # interval [0.887, 0.984]
    'undecided'
    >>> verdict(30, 100, 0.1, "at most").outcome
    'fail'
    """
    measured = proportion(successes, trials, level)
    right, wrong = (
        (measured.low >= target, measured.high < target) if side == "at least"
        else (measured.high <= target, measured.low > target)
    )
    outcome = "pass" if right else ("fail" if wrong else "undecided")
    return Verdict(outcome, measured, float(target), side)
