"""Selective prediction: the confidence threshold above which predictions are accepted.

A row is accepted when its confidence, the probability of the predicted
class (max_k p_k; max(p, 1 - p) for one sigmoid), is at least tau; the
others go to a person, a second model or a safe default. Given a target
error epsilon among accepted rows and a confidence 1 - delta, the threshold
is chosen on labelled rows the calibration map was not fitted on, so that

    P( P(wrong | confidence >= tau) <= epsilon ) >= 1 - delta,

the outer probability over the draw of those rows (the selective risk of
the chosen threshold, on data like them, is at most epsilon except with
probability delta).

Two published procedures:

``"ltt"`` (default)
    Learn then Test (Angelopoulos, Bates, Candes, Jordan & Lei, 2021): for
    every threshold tau_j of a grid fixed before the labels are looked at,
    test the null "the selective risk at tau_j exceeds epsilon" with the
    exact binomial p-value P(Bin(n_j, epsilon) <= k_j), where n_j rows are
    accepted and k_j of them are wrong (given n_j the errors are binomial);
    test the grid in order from the most conservative threshold (highest)
    down with fixed-sequence testing, stopping at the first null not
    rejected; any procedure controlling the family-wise error rate at delta
    gives the guarantee above for every rejected threshold (LTT Theorem 1,
    from memory), and the lowest one is returned (the most rows accepted).
    By default the grid is tested by ``starts`` = 10 fixed sequences from
    evenly spaced start points, each at delta / 10 (Bonferroni over the
    sequences): a sequence that starts where too few rows are accepted to
    certify anything then does not end the search. ``starts=1`` is plain
    fixed-sequence testing.
``"sgr"``
    Selection with guaranteed risk (Geifman & El-Yaniv, NeurIPS 2017,
    Algorithm 1): a binary search over the rows' own sorted confidences,
    ceil(log2 n) steps, each bounding the selective risk by the exact
    binomial bound at level delta / ceil(log2 n).

docs/decisions.md explains why LTT is the default.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import OnnxcalError
from ._inputs import Predictions, check_fraction, compute_dtype, predictions
from .binomial import Proportion, proportion, tail_pvalue, upper_bound

DEFAULT_CONFIDENCE = 0.95
DEFAULT_STARTS = 10  # fixed sequences, delta split evenly between them
GRID_POINTS = 200
METHODS = ("ltt", "sgr")


def confidence_and_error(pred: Predictions) -> tuple[np.ndarray, np.ndarray]:
    """Each row's confidence and whether its prediction is wrong.

    Multiclass: the largest probability and argmax != label (the first
    index among tied maxima, as ONNX ArgMax and TopK break ties). Binary:
    max(p, 1 - p) and (p > 0.5) != label, the rule of ``metrics``. The
    confidence is in the compute dtype, as the graph computes it.
    """
    p, y = pred.probabilities, pred.labels
    if pred.kind == "binary":
        return np.maximum(p, p.dtype.type(1) - p), (p > 0.5) != (y == 1)
    return p.max(axis=1), p.argmax(axis=1) != y


def accept(probabilities: np.ndarray, threshold: float | np.ndarray, kind: str = "multiclass") -> np.ndarray:
    """Which rows are accepted at ``threshold``, computed as the graph computes it.

    The ONNX form: multiclass ``GreaterOrEqual(ReduceMax(p, axes=[-1],
    keepdims=0), tau)``; binary and multi-label ``GreaterOrEqual(Max(p,
    Sub(1, p)), tau)`` (one tau per label for multi-label, broadcast over
    rows). ``tau`` is an initializer of the compute dtype; float16
    probabilities are cast to float32 first. GreaterOrEqual needs opset 12
    (``Not(Less(...))`` is the same for opset 11); ReduceMax takes its axes
    as an input from opset 18.

    Parameters
    ----------
    probabilities : ndarray
        N x K (multiclass, multi-label) or N / N x 1 (binary).
    threshold : float or ndarray of shape (K,)
        tau (one per label for multi-label); ``inf`` accepts nothing.
    kind : str
        ``"multiclass"``, ``"binary"`` or ``"multilabel"``.

    Returns
    -------
    ndarray of bool
        N (multiclass, binary) or N x K (multi-label).

    Examples
    --------
    >>> accept(np.array([[0.7, 0.3], [0.5, 0.5]], dtype=np.float32), 0.6)
    array([ True, False])
    >>> accept(np.array([0.05, 0.6, 0.97]), 0.9, kind="binary")
    array([ True, False,  True])
    """
    p = np.asarray(probabilities)
    p = p.astype(compute_dtype(p.dtype))
    tau = np.asarray(threshold).astype(p.dtype)
    if kind == "multiclass":
        return np.asarray(p.max(axis=-1) >= tau, dtype=bool)
    if kind == "binary":
        p = p.reshape(-1)
    return np.asarray(np.maximum(p, p.dtype.type(1) - p) >= tau, dtype=bool)


def rows_needed(error: float, confidence: float = DEFAULT_CONFIDENCE) -> int:
    """The fewest accepted rows that can show an error rate <= ``error``: all of them right.

    The smallest n with (1 - error)^n <= delta = 1 - confidence, the
    binomial tail p-value of n rows without an error. With fewer rows no
    threshold can meet the target, whatever the model.

    Examples
    --------
    >>> rows_needed(0.1, 0.95), rows_needed(0.02, 0.95), rows_needed(0.01, 0.99)
    (29, 149, 459)
    """
    delta = 1.0 - confidence
    n = max(1, math.ceil(math.log(delta) / math.log1p(-error)))
    while n > 1 and tail_pvalue(0, n - 1, error) <= delta:  # settle rounding of the logarithms
        n -= 1
    while tail_pvalue(0, n, error) > delta:
        n += 1
    return n


def default_thresholds(n_classes: int, points: int = GRID_POINTS) -> np.ndarray:
    """The built-in grid, fixed in advance: 1 - tau evenly spaced in log from 1e-6 to 1 - 1/K.

    Descending (most conservative first); the last threshold, 1/K (0.5 for
    a binary head), accepts every row, since the top probability is never
    below it.

    Examples
    --------
    >>> g = default_thresholds(4, points=5)
    >>> float(g[0]), float(g[-1]), bool(np.all(np.diff(g) < 0))
    (0.999999, 0.25, True)
    """
    floor = 1.0 / n_classes
    grid = 1.0 - np.geomspace(1e-6, 1.0 - floor, points)
    grid[-1] = floor
    return grid


def threshold_grid(
    other_confidences: np.ndarray, n_rows: int, error: float, confidence: float = DEFAULT_CONFIDENCE,
    points: int = 100,
) -> np.ndarray:
    """A grid from the confidences of OTHER rows (e.g. those the map was fitted on).

    Rows independent of the ones the threshold is chosen on may place the
    grid where the data are: thresholds at the quantiles of their
    confidences that accept a fraction from rows_needed / ``n_rows`` (the
    fewest rows that could certify ``error``) up to all of them, plus 0 last
    (accept everything). Built from the chosen-on rows themselves the grid
    would depend on them and the guarantee would not be the published one.

    Examples
    --------
    >>> g = threshold_grid(np.linspace(0.5, 1.0, 101), 290, 0.1, 0.95, points=2)
    >>> g.tolist()   # accept 29 / 290 = 10 % and 100 % of the other rows, then everything
    [0.95, 0.5, 0.0]
    """
    top = min(1.0, rows_needed(error, confidence) / n_rows)
    coverage = np.linspace(top, 1.0, points)
    grid = np.quantile(np.asarray(other_confidences, dtype=np.float64), 1.0 - coverage, method="lower")
    return np.unique(np.r_[grid, 0.0])[::-1]


class _Tally:
    """The rows sorted by confidence, to count the rows (and the wrong ones) above any threshold."""

    def __init__(self, conf: np.ndarray, wrong: np.ndarray) -> None:
        order = np.argsort(conf, kind="stable")
        self.sorted = conf[order]
        self.wrong_from = np.r_[np.cumsum(wrong[order][::-1])[::-1], 0]  # wrong rows at sorted index >= i

    def at(self, thresholds: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Rows with confidence >= each threshold, and how many of them are wrong."""
        first = np.searchsorted(self.sorted, np.asarray(thresholds, dtype=self.sorted.dtype), side="left")
        return len(self.sorted) - first, self.wrong_from[first]


def counts_at(conf: np.ndarray, wrong: np.ndarray, thresholds: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Rows with confidence >= each threshold, and how many of them are wrong."""
    return _Tally(conf, wrong).at(thresholds)


def start_points(grid_size: int, starts: int) -> np.ndarray:
    """Where the fixed sequences start: ``starts`` evenly spaced grid indices (fewer on a short grid).

    Examples
    --------
    >>> start_points(200, 10).tolist()
    [0, 22, 44, 66, 88, 111, 133, 155, 177, 199]
    """
    return np.unique(np.round(np.linspace(0, grid_size - 1, min(starts, grid_size))).astype(np.intp))


def fixed_sequences(pvalues: np.ndarray, delta: float, starts: int) -> int | None:
    """Index of the last threshold rejected by fixed-sequence testing from ``starts`` start points.

    Each sequence runs from its start down the grid at level delta / (its
    number), stopping before the first p-value above that level; the result
    is the furthest index any sequence reaches (None when none rejects its
    start). With one start this is plain fixed-sequence testing.

    Examples
    --------
    >>> fixed_sequences(np.array([0.01, 0.02, 0.2, 0.01]), 0.05, 1)
    1
    >>> fixed_sequences(np.array([0.9, 0.01, 0.02, 0.2]), 0.05, 1) is None
    True
    """
    g = len(pvalues)
    begin = start_points(g, starts)
    ok = pvalues <= delta / len(begin)
    fail_at = np.where(ok, g, np.arange(g))
    next_fail = np.minimum.accumulate(fail_at[::-1])[::-1]  # first failing index >= j
    ends = next_fail[begin[ok[begin]]] - 1
    return int(ends.max()) if ends.size else None


@dataclass(frozen=True)
class AcceptThreshold:
    """A chosen acceptance threshold and what it does on the rows it was chosen on.

    Attributes
    ----------
    threshold : float or None
        tau: accept a row when its confidence is >= tau. None when no
        threshold meets the target (``detail`` says why); accept nothing then.
    error_target, confidence : float
        epsilon and 1 - delta.
    method : str
        ``"ltt"`` or ``"sgr"``.
    n : int
        Rows the threshold was chosen on.
    accepted : Proportion
        Accepted rows out of ``n`` (the coverage), with its exact interval.
    errors : Proportion
        Wrong predictions among the accepted rows (the empirical selective
        error), with its exact interval.
    error_bound : float
        The exact one-sided upper bound of the selective error at tau, at the
        level the method tested with (<= epsilon when a threshold was found;
        NaN when none was).
    detail : str
        How the threshold was chosen, or why none meets the target.
    """

    threshold: float | None
    error_target: float
    confidence: float
    method: str
    n: int
    accepted: Proportion
    errors: Proportion
    error_bound: float
    detail: str

    @property
    def found(self) -> bool:
        return self.threshold is not None

    def to_dict(self) -> dict[str, Any]:
        return {
            "threshold": self.threshold, "error_target": self.error_target, "confidence": self.confidence,
            "method": self.method, "n": self.n, "accepted": self.accepted.to_dict(),
            "errors": self.errors.to_dict(),
            "error_bound": None if math.isnan(self.error_bound) else self.error_bound, "detail": self.detail,
        }


def _found(
    n: int, chosen: tuple[float, int, int, float], error: float, confidence: float, method: str, detail: str
) -> AcceptThreshold:
    tau, n_acc, n_wrong, bound = chosen
    return AcceptThreshold(
        tau, error, confidence, method, n, proportion(n_acc, n), proportion(n_wrong, n_acc), bound, detail
    )


def _none(
    n: int, closest: tuple[float, int, int, float], error: float, confidence: float, method: str
) -> AcceptThreshold:
    detail = _none_detail(error, confidence, n, closest)
    return AcceptThreshold(None, error, confidence, method, n, proportion(0, n), proportion(0, 0), math.nan, detail)


def _none_detail(error: float, confidence: float, n: int, best: tuple[float, int, int, float]) -> str:
    tau, n_acc, n_wrong, bound = best
    return (
        f"no threshold meets an error of at most {error:g} with confidence {confidence:g}: the closest, "
        f"tau = {tau:.6g}, accepts {n_acc} of {n} rows with {n_wrong} wrong, an upper bound of {bound:.3g}; "
        f"even without errors it takes {rows_needed(error, confidence)} accepted rows"
    )


def _ltt(
    conf: np.ndarray, wrong: np.ndarray, error: float, confidence: float, grid: np.ndarray, starts: int
) -> AcceptThreshold:
    n_acc, n_wrong = counts_at(conf, wrong, grid)
    pvalues = tail_pvalue(n_wrong, n_acc, error)
    chosen = fixed_sequences(pvalues, 1.0 - confidence, starts)
    chains = len(start_points(len(grid), starts))
    level = (1.0 - confidence) / chains
    j = int(np.argmin(pvalues)) if chosen is None else chosen
    at = (float(grid[j]), int(n_acc[j]), int(n_wrong[j]), float(upper_bound(n_wrong[j], n_acc[j], level)))
    if chosen is None:
        return _none(len(conf), at, error, confidence, "ltt")
    detail = (
        f"Learn then Test: fixed-sequence testing over {len(grid)} thresholds from the highest down, "
        f"{chains} sequence{'s' if chains > 1 else ''} at level {level:.3g} each; the lowest threshold rejected"
    )
    return _found(len(conf), at, error, confidence, "ltt", detail)


def _sgr(conf: np.ndarray, wrong: np.ndarray, error: float, confidence: float) -> AcceptThreshold:
    m = len(conf)
    steps = math.ceil(math.log2(m)) if m > 1 else 0
    level = (1.0 - confidence) / max(steps, 1)
    tally = _Tally(conf, wrong)
    z_min, z_max = 1, m
    tried = []
    for _ in range(steps):  # Geifman & El-Yaniv 2017, Algorithm 1 (1-based z over ascending confidences)
        z = math.ceil((z_min + z_max) / 2)
        theta = tally.sorted[z - 1]
        n_acc, n_wrong = (int(v[0]) for v in tally.at(np.array([theta])))
        bound = float(upper_bound(n_wrong, n_acc, level))
        tried.append((float(theta), n_acc, n_wrong, bound))
        if bound < error:
            z_max = z
        else:
            z_min = z
    good = [t for t in tried if t[3] < error]
    if not good:
        closest = min(tried, key=lambda t: t[3]) if tried else (float(conf[0]), 1, int(wrong[0]), 1.0)
        return _none(m, closest, error, confidence, "sgr")
    detail = (
        f"selection with guaranteed risk: binary search in {steps} steps over the rows' confidences, "
        f"each bound at level {level:.3g}; the lowest threshold whose bound is under the target"
    )
    return _found(m, min(good, key=lambda t: t[0]), error, confidence, "sgr", detail)


def _grid(thresholds: np.ndarray | None, n_classes: int, dtype: np.dtype) -> np.ndarray:
    grid = default_thresholds(n_classes) if thresholds is None else np.asarray(thresholds, dtype=np.float64)
    if grid.ndim != 1 or grid.size == 0 or not np.all(np.isfinite(grid)):
        raise OnnxcalError("thresholds must be a non-empty 1-D array of finite numbers")
    # Rounded to the dtype the graph compares in, so the rows counted here are the rows it accepts.
    return np.unique(grid.astype(dtype))[::-1]


def _choose(
    conf: np.ndarray, wrong: np.ndarray, error: float, confidence: float, method: str,
    thresholds: np.ndarray | None, starts: int, n_classes: int,
) -> AcceptThreshold:
    if method == "sgr":
        return _sgr(conf, wrong, error, confidence)
    return _ltt(conf, wrong, error, confidence, _grid(thresholds, n_classes, conf.dtype), starts)


def _check_options(error: float, confidence: float, method: str, starts: int) -> None:
    check_fraction(error, "the error target", "e.g. 0.02 for at most 2 % wrong among accepted rows")
    check_fraction(confidence, "the confidence", "e.g. 0.95")
    if method not in METHODS:
        raise OnnxcalError(f"unknown threshold method {method!r}", f"use one of: {', '.join(METHODS)}")
    if isinstance(starts, bool) or not isinstance(starts, int) or starts < 1:
        raise OnnxcalError(f"starts must be a positive integer, got {starts!r}")


def choose_accept_threshold(
    probabilities: np.ndarray, labels: np.ndarray, rows: np.ndarray, *, error: float,
    confidence: float = DEFAULT_CONFIDENCE, method: str = "ltt", thresholds: np.ndarray | None = None,
    starts: int = DEFAULT_STARTS,
) -> AcceptThreshold:
    """Choose tau so the error among rows with confidence >= tau is <= ``error`` with probability ``confidence``.

    Parameters
    ----------
    probabilities : ndarray
        Calibrated probabilities of every row: N x K (softmax) or N / N x 1
        (one sigmoid: the probability of class 1).
    labels : ndarray of shape (N,)
        True class indices (0/1 for one sigmoid).
    rows : ndarray
        Indices (or a boolean mask) of the rows to choose on. They must not
        have been used to fit the calibration map: the held-out part of
        ``onnxcal.resample.split_holdout`` or a separate labelled set. A
        map fitted on these rows makes them look better calibrated than new
        data will be, and the guarantee does not hold.
    error : float
        epsilon, the largest acceptable error rate among accepted rows.
    confidence : float, default 0.95
        1 - delta, the probability (over the draw of the rows) that the
        chosen threshold meets ``error``.
    method : {"ltt", "sgr"}
        Learn then Test with fixed-sequence testing (default) or selection
        with guaranteed risk (see the module docstring).
    thresholds : ndarray, optional
        LTT's grid, fixed before these rows' labels are seen (e.g.
        :func:`threshold_grid` of other rows). Default :func:`default_thresholds`.
    starts : int, default 10
        LTT's number of fixed sequences, from evenly spaced points of the
        grid (delta is split evenly between them); 1 is plain
        fixed-sequence testing from the top, which stops for good where the
        top thresholds accept too few rows to certify anything.

    Returns
    -------
    AcceptThreshold
        ``threshold`` None (not an exception) when no threshold meets the target.

    Raises
    ------
    OnnxcalError
        Targets outside (0, 1), an unknown method, inputs that are not
        probabilities and labels of one another, multi-label labels (see
        :func:`choose_accept_thresholds_per_label`).

    References
    ----------
    Angelopoulos, Bates, Candes, Jordan, Lei, "Learn then Test: Calibrating
    Predictive Algorithms to Achieve Risk Control", arXiv:2110.01052, 2021
    (Theorem 1; fixed-sequence testing; the binomial p-value; a selective
    classification example; from memory). Geifman & El-Yaniv, "Selective
    Classification for Deep Neural Networks", NeurIPS 2017, Algorithm 1.

    Examples
    --------
    >>> p = np.r_[np.full(29, 0.97), np.full(11, 0.7)]        # P(class 1), one sigmoid
    >>> y = np.r_[np.ones(29, int), np.zeros(10, int), 1]     # the 0.7s: 10 of 11 wrong
    >>> r = choose_accept_threshold(p, y, np.arange(40), error=0.1, thresholds=[0.95, 0.6], starts=1)
    >>> r.threshold, r.accepted.successes, r.errors.successes
    (0.95, 29, 0)
    """
    _check_options(error, confidence, method, starts)
    pred = predictions(probabilities, labels, rows)
    if pred.kind == "multilabel":
        raise OnnxcalError(
            "a multi-label model has no single prediction per row to accept",
            "choose one threshold per label with choose_accept_thresholds_per_label",
        )
    conf, wrong = confidence_and_error(pred)
    n_classes = 2 if pred.kind == "binary" else pred.probabilities.shape[1]
    return _choose(conf, wrong, error, confidence, method, thresholds, starts, n_classes)


def choose_accept_thresholds_per_label(
    probabilities: np.ndarray, labels: np.ndarray, rows: np.ndarray, *, error: float,
    confidence: float = DEFAULT_CONFIDENCE, method: str = "ltt", thresholds: np.ndarray | None = None,
    starts: int = DEFAULT_STARTS, joint: bool = True,
) -> tuple[AcceptThreshold, ...]:
    """One threshold per label of a multi-label (K sigmoids) model.

    Each label's decision (present when p_k > 0.5) is accepted when
    max(p_k, 1 - p_k) >= tau_k: the graph's ``accept`` is then N x K. Each
    label is a binary problem over independent rows, chosen as
    :func:`choose_accept_threshold` does; with ``joint`` (default) each at
    delta / K, so that all K guarantees hold together with probability
    1 - delta (Bonferroni); without, each holds on its own with 1 - delta.
    A guarantee on the error among all accepted (row, label) entries pooled
    is not offered: the entries of one row are not independent, and the
    binomial argument needs independent trials.

    Returns
    -------
    tuple of AcceptThreshold
        One per label, in label order; ``confidence`` of each is the level
        it was chosen at.
    """
    _check_options(error, confidence, method, starts)
    pred = predictions(probabilities, labels, rows)
    if pred.kind != "multilabel":
        raise OnnxcalError("per-label thresholds need an N x K 0/1 label array (a multi-label model)")
    k = pred.probabilities.shape[1]
    level = 1.0 - (1.0 - confidence) / k if joint else confidence
    results = []
    for j in range(k):
        column = Predictions("binary", pred.probabilities[:, j], pred.labels[:, j].astype(np.int64))
        conf, wrong = confidence_and_error(column)
        results.append(_choose(conf, wrong, error, level, method, thresholds, starts, 2))
    return tuple(results)


@dataclass(frozen=True, eq=False)
class RiskCoverage:
    """The risk-coverage curve: every distinct confidence as a threshold.

    Attributes
    ----------
    thresholds : ndarray
        The distinct confidences, descending.
    accepted, errors : ndarray of int64
        Rows with confidence >= each threshold, and how many are wrong.
    n : int
        Rows in all.
    """

    thresholds: np.ndarray
    accepted: np.ndarray
    errors: np.ndarray
    n: int

    @property
    def coverage(self) -> np.ndarray:
        return np.asarray(self.accepted / self.n, dtype=np.float64)

    @property
    def risk(self) -> np.ndarray:
        """The selective error at each threshold (every threshold accepts at least one row)."""
        return np.asarray(self.errors / self.accepted, dtype=np.float64)


def risk_coverage(probabilities: np.ndarray, labels: np.ndarray, rows: np.ndarray) -> RiskCoverage:
    """The error among accepted rows against the fraction accepted, for every threshold.

    The curve the report draws, with the chosen threshold marked (Geifman &
    El-Yaniv 2017, sec. 2, the risk-coverage curve; El-Yaniv & Wiener,
    "On the Foundations of Noise-free Selective Classification", JMLR 2010).

    Examples
    --------
    >>> rc = risk_coverage(np.array([[0.9, 0.1], [0.8, 0.2], [0.6, 0.4]]), np.array([0, 1, 0]), np.arange(3))
    >>> rc.thresholds.tolist(), rc.coverage.round(2).tolist(), rc.risk.round(2).tolist()
    ([0.9, 0.8, 0.6], [0.33, 0.67, 1.0], [0.0, 0.5, 0.33])
    """
    pred = predictions(probabilities, labels, rows)
    if pred.kind == "multilabel":
        raise OnnxcalError("a risk-coverage curve of a multi-label model is drawn per label")
    conf, wrong = confidence_and_error(pred)
    grid = np.unique(conf)[::-1]
    accepted, errors = counts_at(conf, wrong, grid)
    return RiskCoverage(grid, accepted.astype(np.int64), errors.astype(np.int64), len(conf))
