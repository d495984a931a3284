"""The latency gate's figure: the ratio of two models' seconds per call, round by round, with a
distribution-free interval for its median (pure NumPy and scipy; ``verify.latency_check`` words it).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

LATENCY_CONFIDENCE = 0.95
"""Confidence of the latency ratio's interval."""
LATENCY_PRECISION = 0.01
"""The latency gate stops, undecided, once its interval is this narrow (relative) and still holds the limit."""
LATENCY_CHUNKS = 10
"""The latency gate times at most this many times ``latency_runs`` rounds ..."""
LATENCY_BUDGET = 30.0
"""... or for about this many seconds, whichever comes first."""


def median_interval(x: np.ndarray, confidence: float = LATENCY_CONFIDENCE) -> tuple[float, float]:
    """Distribution-free interval for the median of ``x`` from its order statistics.

    [x_(j), x_(n-j+1)] covers the median with probability 1 - 2 P(B <= j - 1),
    B ~ Binomial(n, 1/2); j is the largest with that at least ``confidence``
    (W. J. Conover, Practical Nonparametric Statistics, 3rd ed., 1999, section
    3.2). With too few values for the confidence (n < 6 at 95 %) the interval
    is unbounded.
    """
    from scipy.stats import binom

    n = len(x)
    j = int(np.count_nonzero(binom.cdf(np.arange(n), n, 0.5) <= (1.0 - confidence) / 2.0))
    if j == 0:
        return -np.inf, np.inf
    s = np.sort(x)
    return float(s[j - 1]), float(s[n - j])


@dataclass(frozen=True)
class LatencyRatio:
    """The patched model's latency over the original's: the median of the per-round ratios and its interval."""

    ratio: float
    low: float
    high: float
    rounds: int
    original: float  # median seconds per call
    patched: float

    def decided(self, max_ratio: float | None) -> bool:
        """The interval lies on one side of ``max_ratio``, or is too narrow to tell it from it."""
        if max_ratio is None:
            return True
        return self.high <= max_ratio or self.low > max_ratio or self.high <= self.low * (1.0 + LATENCY_PRECISION)


def latency_ratio(original: np.ndarray, patched: np.ndarray) -> LatencyRatio:
    """The ratio of the two models' seconds per call, from :func:`time_alternately`'s rounds.

    Its rounds run the two back to back in turns (A B, B A, ...), so a change in
    the machine's load hits both of a round alike; but a call's time also
    depends on its place (the call after the other model's, whose idle threads
    may still hold a core, or whose data left the cache, is slower). So the
    ratio is taken over pairs of consecutive rounds, one in each order: each
    pair's time of the patched model over the original's, with both places in
    both sums (common practice: a balanced, crossover design). The median of
    those ratios and its distribution-free interval; an odd last round is left
    out.
    """
    o = np.asarray(original, np.float64)
    p = np.asarray(patched, np.float64)
    n = len(o) - len(o) % 2
    if n >= 2:
        o_pairs, p_pairs = o[:n].reshape(-1, 2).sum(axis=1), p[:n].reshape(-1, 2).sum(axis=1)
    else:
        o_pairs, p_pairs = o, p
    ratios = np.log(p_pairs) - np.log(o_pairs)
    low, high = median_interval(ratios)
    return LatencyRatio(float(np.exp(np.median(ratios))), float(np.exp(low)), float(np.exp(high)), len(o),
                        float(np.median(o)), float(np.median(p)))
