"""Intervals of a mean per-row difference between two candidates (``--method auto``'s paired comparison).

Both candidates score the same rows, so ``d_i`` = (this one's out-of-fold
NLL on row i) minus (the other's) carries everything the comparison needs;
the bootstrap resamples are the same for every candidate, so a replicate's
mean difference is the difference of the two replicates' means.

With resamples, the interval is their 2.5 % and 97.5 % percentiles (the
percentile interval, Efron & Tibshirani, "An Introduction to the
Bootstrap", 1993, ch. 13, from memory); without, mean +- 1.96 standard errors.

The bias-corrected and accelerated (BCa) interval (Efron, JASA 82, 1987, from memory)
was tried for this comparison and dropped on the evidence: its
acceleration, estimated on a few dozen skewed per-row differences, told a
richer map apart from temperature scaling too often, and the richer map
then did worse on new rows (docs/maths.md, "Choosing automatically";
docs/benchmarks.md, "auto's rule replayed over seeds").
"""

from __future__ import annotations

import numpy as np

from ..holdout import samples_of

_Z = 1.959963984540054  # the 97.5 % point of the standard normal (scipy.stats.norm.ppf(0.975))


def percentile(values: np.ndarray) -> list[float] | None:
    """The 2.5 % and 97.5 % percentiles; None when empty or any value is not finite.

    Examples
    --------
    >>> percentile(np.arange(201.0))
    [5.0, 195.0]
    >>> percentile(np.array([0.0, np.inf])) is None
    True
    """
    v = np.asarray(values, dtype=np.float64)
    if len(v) == 0 or not np.all(np.isfinite(v)):
        return None
    lo, hi = np.percentile(v, [2.5, 97.5])
    return [float(lo), float(hi)]


def normal(d: np.ndarray, groups: np.ndarray | None) -> list[float]:
    """mean +- 1.96 standard errors of the mean per-row difference (sample sums with ``groups``)."""
    per = d if groups is None else np.add.reduceat(d, samples_of(groups).starts)
    if len(per) < 2:
        return [float("-inf"), float("inf")]
    mean = float(d.sum() / len(d))
    se = float(np.sqrt(len(per)) * np.std(per, ddof=1) / len(d))
    return [mean - _Z * se, mean + _Z * se]
