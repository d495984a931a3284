"""Binning of confidences: the equal-width and equal-mass bins behind the ECEs.

Pure functions over arrays of confidences, correctness and optional
integer weights (bootstrap counts); :mod:`onnxcal.metrics` builds the
calibration errors from them and re-exports them.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

DEFAULT_BINS = 15


def reliability_bins(
    confidence: np.ndarray,
    correct: np.ndarray,
    n_bins: int = DEFAULT_BINS,
    weights: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-bin sample counts, summed confidence and summed correctness.

    Bins are M equal-width intervals ``((m-1)/M, m/M]`` over [0, 1], with a
    confidence of exactly 0 put in the first bin (Guo et al. 2017, sec. 2).

    Parameters
    ----------
    confidence : ndarray of shape (n,)
        Predicted probability of the predicted class.
    correct : ndarray of shape (n,)
        1 where the prediction is right, else 0.
    n_bins : int
        Number of bins M.
    weights : ndarray of shape (n,), optional
        Weight of each sample (e.g. bootstrap counts).

    Returns
    -------
    counts, confidence_sum, correct_sum : ndarray of shape (n_bins,)
    """
    return _binned(bin_ids(confidence, n_bins), confidence, correct, n_bins, weights)


SEARCH_BELOW = 4096
"""Arrays up to this length are binned by ``numpy.searchsorted`` itself (fixed cost, not per value)."""

_EDGES: dict[int, np.ndarray] = {}


def _inner_edges(n_bins: int) -> np.ndarray:
    if n_bins not in _EDGES:
        _EDGES[n_bins] = np.linspace(0.0, 1.0, n_bins + 1)[1:-1]
    return _EDGES[n_bins]


def bin_ids(p: np.ndarray, n_bins: int) -> np.ndarray:
    """Index of the equal-width bin ``((m-1)/M, m/M]`` of each value in [0, 1].

    The same as ``np.searchsorted(np.linspace(0, 1, M + 1)[1:-1], p)`` (the
    rule of ``sklearn.calibration.calibration_curve``), computed as
    ceil(p M) - 1, with values within rounding of an edge settled by the
    search itself; several times faster on large arrays.

    Examples
    --------
    >>> bin_ids(np.array([0.0, 0.1, 0.10001, 0.5, 1.0]), 10)
    array([0, 0, 1, 4, 9])
    """
    p = np.asarray(p, dtype=np.float64)
    if p.size <= SEARCH_BELOW:  # one call: cheaper than the arithmetic's several on a chunk's rows
        return np.searchsorted(_inner_edges(n_bins), p).astype(np.intp, copy=False)
    f = p * n_bins
    ids: np.ndarray = np.ceil(f)
    ids -= 1.0
    np.clip(ids, 0, n_bins - 1, out=ids)
    # Only values within rounding of an edge can disagree with the edges as
    # numpy.linspace computes them; settle those by the edges themselves.
    # (The edge at 0 needs no care: ceil - 1 and the clip put [0, 1/M] in bin 0.)
    near = np.abs(f - np.rint(f)) < 1e-6
    near &= f > 0.5
    if near.any():
        edges = np.linspace(0.0, 1.0, n_bins + 1)
        ids[near] = np.searchsorted(edges[1:-1], p[near])
    ids = ids.astype(np.intp)
    return ids


def _binned(
    ids: np.ndarray, confidence: np.ndarray, correct: np.ndarray, n_bins: int, weights: np.ndarray | None
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    w = np.ones(len(ids)) if weights is None else np.asarray(weights, dtype=np.float64)
    counts = np.bincount(ids, weights=w, minlength=n_bins)
    conf_sum = np.bincount(ids, weights=w * confidence, minlength=n_bins)
    corr_sum = np.bincount(ids, weights=w * np.asarray(correct, dtype=np.float64), minlength=n_bins)
    return counts, conf_sum, corr_sum


def ece_from_bins(counts: np.ndarray, conf_sum: np.ndarray, corr_sum: np.ndarray) -> float:
    """Expected calibration error from the sums of :func:`reliability_bins`.

    ECE = sum_m |B_m|/n * |acc(B_m) - conf(B_m)| = sum_m |corr_m - conf_m| / n.
    """
    n = counts.sum()
    return float(np.abs(corr_sum - conf_sum).sum() / n) if n else float("nan")


def mce_from_bins(counts: np.ndarray, conf_sum: np.ndarray, corr_sum: np.ndarray) -> float:
    """Maximum calibration error: max over non-empty bins of |acc(B_m) - conf(B_m)|."""
    full = counts > 0
    if not full.any():
        return float("nan")
    return float(np.max(np.abs(corr_sum[full] - conf_sum[full]) / counts[full]))


def equal_mass_bins(
    confidence: np.ndarray,
    correct: np.ndarray,
    n_bins: int = DEFAULT_BINS,
    weights: np.ndarray | None = None,
    *,
    order: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Bin sums (as :func:`reliability_bins`) over equal-mass bins.

    Edges are the 0, 1/M, ..., 1 quantiles of the confidences (linear
    interpolation, as ``numpy.percentile``), bins are right-closed, so each
    bin holds about n/M samples. Integer ``weights`` (bootstrap counts)
    count a sample that many times, edges included. ``order``, a
    permutation that nearly sorts ``confidence``, speeds up the sort.
    """
    confidence = np.asarray(confidence, dtype=np.float64).ravel()
    qs = np.linspace(0.0, 1.0, n_bins + 1)
    edges: np.ndarray | None
    if weights is None:
        if confidence.size == 0:
            return np.zeros(n_bins), np.zeros(n_bins), np.zeros(n_bins)
        edges = np.quantile(confidence, qs)
    else:
        edges = weighted_quantiles(confidence, weights, qs, order=order)
        if edges is None:
            return np.zeros(n_bins), np.zeros(n_bins), np.zeros(n_bins)
    ids = np.searchsorted(edges[1:-1], confidence, side="left")
    return _binned(ids, confidence, np.asarray(correct).ravel(), n_bins, weights)


def weighted_quantiles(
    values: np.ndarray, weights: np.ndarray, qs: np.ndarray, *, order: np.ndarray | None = None
) -> np.ndarray | None:
    """``numpy.quantile(numpy.repeat(values, weights), qs)`` without the repeated copy.

    ``weights`` are non-negative integers (counts). The pool's order
    statistics are read off the cumulative counts of the sorted values, and
    interpolated exactly as numpy's default ("linear") method does, so the
    result is the same to the last bit. ``order``, a permutation that nearly
    sorts ``values`` (e.g. their order in a related sample), lets the sort
    run on nearly sorted data. None when the pool is empty.

    Examples
    --------
    >>> v, w, q = np.array([0.3, 0.1, 0.2]), np.array([1, 0, 3]), np.array([0.0, 0.5, 0.9])
    >>> weighted_quantiles(v, w, q).tolist() == np.quantile(np.repeat(v, w), q).tolist()
    True
    """
    values = np.asarray(values, dtype=np.float64)
    counts = np.asarray(weights, dtype=np.int64)
    if order is None:
        order = np.argsort(values, kind="stable")
    else:
        ahead = values[order]
        if np.any(ahead[1:] < ahead[:-1]):
            order = order[np.argsort(ahead, kind="stable")]
    cum = np.cumsum(counts[order])
    n = int(cum[-1]) if len(cum) else 0
    if n == 0:
        return None
    sorted_values = values[order]

    def pair(j: int) -> tuple[float, float]:
        at = np.searchsorted(cum, [j, min(j + 1, n - 1)], side="right")
        return float(sorted_values[at[0]]), float(sorted_values[at[1]])

    return lerp_quantiles(pair, n, qs)


def lerp_quantiles(pair: Callable[[int], tuple[float, float]], n: int, qs: np.ndarray) -> np.ndarray:
    """Quantiles ``qs`` of a pool of n values by numpy's default ("linear") method.

    ``pair(j)`` gives the pool's order statistics j and j + 1 (0-based; the
    second clipped to n - 1). The interpolation repeats numpy's own
    arithmetic (``_lerp``), so the result is the same to the last bit.
    """
    out = np.empty(len(qs))
    for i, q in enumerate(np.asarray(qs, dtype=np.float64)):
        virtual = (n - 1) * q
        if virtual >= n - 1:
            out[i] = pair(n - 1)[0]
            continue
        below = float(np.floor(virtual))
        gamma = virtual - below
        lo, hi = pair(int(below))
        diff = hi - lo
        out[i] = hi - diff * (1 - gamma) if gamma >= 0.5 else lo + diff * gamma
    return out
