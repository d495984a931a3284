"""Calibration metrics over logits and labels.

Every function here is pure: arrays in, numbers or arrays out. ``evaluate``
works through the logits of a large validation set in row chunks (float32
in, float64 sums), so its temporaries stay a few MiB whatever the number of
samples; it keeps one confidence and one correctness flag per prediction
for the adaptive (equal-mass) ECE, whose bin edges need all of them.
Drawing is elsewhere (``report``); this module only computes.

Three kinds of classifier are scored (see :mod:`onnxcal.scaling`):
``multiclass`` (softmax over K logits, integer labels), ``binary`` (one
logit, sigmoid, 0/1 labels) and ``multilabel`` (K sigmoids, an N x K 0/1
label array). Binary and multi-label predictions are scored entry by entry:
each (sample, label) pair is one binary prediction whose top-label
confidence is max(p, 1 - p).
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Sequence
from dataclasses import asdict, dataclass

import numpy as np

from . import l1_sigmoid as _l1
from .binning import (  # noqa: F401  (re-exported: part of this module's interface)
    DEFAULT_BINS,
    _binned,
    bin_ids,
    ece_from_bins,
    equal_mass_bins,
    mce_from_bins,
    reliability_bins,
    weighted_quantiles,
)
from .scaling import Scaling, kind_of
from .sweep import ALL_ROWS, RowScores, ScoreSums, Selection, run_pass

# float64 elements per chunk: 512 KiB per temporary array, a handful at a time
# (measured fastest on this machine among 2^15 to 2^20: larger chunks fall out
# of cache and pay page faults for every temporary).
_CHUNK_ELEMENTS = 1 << 16


def chunk_rows(n_classes: int) -> int:
    """Rows per chunk so one float64 chunk of ``n_classes`` columns is ~512 KiB."""
    return max(1, _CHUNK_ELEMENTS // max(1, n_classes))


def iter_chunks(
    logits: np.ndarray,
    labels: np.ndarray,
    rows: np.ndarray | None = None,
    weights: np.ndarray | None = None,
) -> Iterator[tuple[np.ndarray, np.ndarray, np.ndarray | None]]:
    """Yield ``(z, y, w)`` row chunks: logits as float64, labels, weights.

    ``rows`` (sorted indices) restricts to a subset, gathered chunk by chunk
    so no copy of the subset is made; ``weights`` has one entry per selected
    row (bootstrap counts), or is None.
    """
    total = len(logits) if rows is None else len(rows)
    step = chunk_rows(logits.shape[1])
    for start in range(0, total, step):
        pick = slice(start, start + step) if rows is None else rows[start : start + step]
        z = np.asarray(logits[pick], dtype=np.float64)
        y = np.asarray(labels[pick])
        w = None if weights is None else np.asarray(weights[start : start + step], dtype=np.float64)
        yield z, y, w


def log_softmax(z: np.ndarray, axis: int = -1) -> np.ndarray:
    """Numerically stable log-softmax, ``z - logsumexp(z)`` along ``axis``.

    Computed in float64 whatever the input dtype.

    Examples
    --------
    >>> np.round(np.exp(log_softmax(np.array([0.0, np.log(3.0)]))), 3)
    array([0.25, 0.75])
    """
    z = np.asarray(z, dtype=np.float64)
    shifted = z - np.max(z, axis=axis, keepdims=True)
    return shifted - np.log(np.sum(np.exp(shifted), axis=axis, keepdims=True))


def softmax(z: np.ndarray, axis: int = -1) -> np.ndarray:
    """Numerically stable softmax along ``axis``, in float64.

    Examples
    --------
    >>> softmax(np.array([[1.0, 1.0]]))
    array([[0.5, 0.5]])
    """
    return np.exp(log_softmax(z, axis=axis))


def sigmoid(z: np.ndarray) -> np.ndarray:
    """The logistic function 1 / (1 + exp(-z)) in float64, without overflow.

    Examples
    --------
    >>> sigmoid(np.array([0.0, 1e4, -1e4]))
    array([0.5, 1. , 0. ])
    """
    z = np.asarray(z, dtype=np.float64)
    e = np.exp(-np.abs(z))
    return np.where(z >= 0, 1.0 / (1.0 + e), e / (1.0 + e))


def _wsum(x: np.ndarray, w: np.ndarray | None) -> float:
    return float(x.sum() if w is None else x @ w)


def expected_calibration_error(
    confidence: np.ndarray, correct: np.ndarray, n_bins: int = DEFAULT_BINS
) -> float:
    """Top-label expected calibration error with equal-width bins.

    Parameters
    ----------
    confidence : ndarray of shape (n,)
        Predicted probability of the predicted class.
    correct : ndarray of shape (n,)
        1 where the prediction is right, else 0.
    n_bins : int, default 15
        Number of equal-width bins M.

    Returns
    -------
    float
        ECE in [0, 1].

    References
    ----------
    Guo, Pleiss, Sun, Weinberger, "On Calibration of Modern Neural Networks",
    ICML 2017, sec. 2 eq. (3), following Naeini, Cooper, Hauskrecht,
    "Obtaining Well Calibrated Probabilities Using Bayesian Binning", AAAI 2015.

    Examples
    --------
    >>> expected_calibration_error(np.array([0.9, 0.9]), np.array([1, 0]))
    0.4
    """
    confidence = np.asarray(confidence, dtype=np.float64).ravel()
    correct = np.asarray(correct).ravel()
    return ece_from_bins(*reliability_bins(confidence, correct, n_bins))


def maximum_calibration_error(
    confidence: np.ndarray, correct: np.ndarray, n_bins: int = DEFAULT_BINS
) -> float:
    """Top-label maximum calibration error: the worst bin's |accuracy - confidence|.

    Same equal-width bins as :func:`expected_calibration_error`; empty bins
    are skipped.

    References
    ----------
    Naeini, Cooper, Hauskrecht, AAAI 2015 (MCE); Guo et al., ICML 2017,
    sec. 2 eq. (5).

    Examples
    --------
    >>> maximum_calibration_error(np.array([0.9, 0.9, 0.3]), np.array([1, 0, 0]), n_bins=10)
    0.4
    """
    confidence = np.asarray(confidence, dtype=np.float64).ravel()
    return mce_from_bins(*reliability_bins(confidence, np.asarray(correct).ravel(), n_bins))


def adaptive_calibration_error(
    confidence: np.ndarray, correct: np.ndarray, n_bins: int = DEFAULT_BINS
) -> float:
    """Top-label ECE over equal-mass bins (adaptive ECE).

    ECE_adaptive = sum_m |B_m|/n * |acc(B_m) - conf(B_m)| with bins chosen
    so each holds about n/M predictions (see :func:`equal_mass_bins`). This
    is the top-label form; Nixon et al. also average the same quantity over
    classes.

    References
    ----------
    Nixon, Dusenberry, Zhang, Jerfel, Tran, "Measuring Calibration in Deep
    Learning", CVPR Workshops 2019, sec. 3 ("adaptive calibration error").

    Examples
    --------
    >>> round(adaptive_calibration_error(np.array([0.6, 0.7, 0.8, 0.9]), np.array([1, 0, 1, 1]), n_bins=2), 3)
    0.15
    """
    return ece_from_bins(*equal_mass_bins(confidence, correct, n_bins))


def _classwise_ids(p: np.ndarray, n_bins: int) -> np.ndarray:
    """Flat (class, bin) index of every entry of a (rows, K) probability array."""
    return (bin_ids(p, n_bins) + n_bins * np.arange(p.shape[1])).ravel()


def _per_class_errors(p_sum: np.ndarray, y_sum: np.ndarray, n: float, n_classes: int) -> np.ndarray:
    """Each class's calibration error from flat (class, bin) sums: the terms of the classwise ECE."""
    if not n:
        return np.full(n_classes, np.nan)
    return np.abs(y_sum - p_sum).reshape(n_classes, -1).sum(axis=1) / n


def _classwise_from_sums(p_sum: np.ndarray, y_sum: np.ndarray, n: float, n_classes: int) -> float:
    return float(_per_class_errors(p_sum, y_sum, n, n_classes).mean())


def classwise_calibration_error(
    probabilities: np.ndarray, labels: np.ndarray, n_bins: int = DEFAULT_BINS
) -> float:
    """Classwise ECE: the mean over classes of each class probability's ECE.

    classwise-ECE = (1/K) sum_k sum_m |B_km|/n * |freq_k(B_km) - conf_k(B_km)|,
    where B_km holds the samples whose probability for class k falls in the
    m-th equal-width bin, freq is the fraction of them labelled k and conf
    their mean probability for k. Every class's probability is examined,
    not only the top one.

    Parameters
    ----------
    probabilities : ndarray of shape (n, K)
        Class probabilities (multiclass) or per-label probabilities
        (multi-label, binary with K = 1).
    labels : ndarray of shape (n,) or (n, K)
        Integer class indices, or a 0/1 array of the same shape as
        ``probabilities``.

    References
    ----------
    Kull, Perello-Nieto, Kängsepp, Silva Filho, Song, Flach, "Beyond
    temperature scaling: Obtaining well-calibrated multiclass probabilities
    with Dirichlet calibration", NeurIPS 2019, sec. 2 (classwise-ECE);
    Nixon et al., CVPR Workshops 2019 (the same quantity as "static
    calibration error").

    Examples
    --------
    >>> p = np.array([[0.8, 0.2], [0.8, 0.2]])
    >>> round(classwise_calibration_error(p, np.array([0, 1]), n_bins=10), 3)
    0.3
    """
    p = np.asarray(probabilities, dtype=np.float64)
    labels = np.asarray(labels)
    onehot = labels if labels.ndim == 2 else np.eye(p.shape[1])[labels]
    ids = _classwise_ids(p, n_bins)
    size = p.shape[1] * n_bins
    p_sum = np.bincount(ids, weights=p.ravel(), minlength=size)
    y_sum = np.bincount(ids, weights=onehot.ravel().astype(np.float64), minlength=size)
    return _classwise_from_sums(p_sum, y_sum, len(p), p.shape[1])


@dataclass(frozen=True)
class Metrics:
    """Calibration metrics of one set of predictions.

    Attributes
    ----------
    n : int
        Number of samples (the sum of the weights when weighted).
    nll : float
        Mean negative log-likelihood of the labels (natural log); for binary
        and multi-label, the mean binary cross-entropy over all entries.
    ece : float
        Top-label expected calibration error, ``n_bins`` equal-width bins.
    mce : float
        Maximum calibration error over the same bins.
    adaptive_ece : float
        Top-label ECE over ``n_bins`` equal-mass bins.
    classwise_ece : float
        Mean over classes (labels) of each class probability's ECE.
    brier : float
        Multiclass: mean over samples of sum_k (p_k - y_k)^2, in [0, 2].
        Binary and multi-label: mean over entries of (p - y)^2, in [0, 1].
    accuracy : float
        Fraction of right predictions (argmax; p > 0.5 per entry for
        binary and multi-label).
    mean_confidence : float
        Mean probability of the predicted class.
    gap : float
        mean_confidence - accuracy: positive means overconfident.
    n_bins : int
        Number of bins used for the ECEs.
    kind : str
        ``"multiclass"``, ``"binary"`` or ``"multilabel"``.
    """

    n: int
    nll: float
    ece: float
    mce: float
    adaptive_ece: float
    classwise_ece: float
    brier: float
    accuracy: float
    mean_confidence: float
    gap: float
    n_bins: int = DEFAULT_BINS
    kind: str = "multiclass"

    def to_dict(self) -> dict:
        return asdict(self)


# Metric fields shown in tables and given bootstrap intervals, in order.
METRIC_FIELDS = (
    "nll", "ece", "mce", "adaptive_ece", "classwise_ece", "brier", "accuracy", "mean_confidence", "gap",
)
# How tables (CLI, report) name them; ``{bins}`` is the number of bins.
METRIC_LABELS = {
    "nll": "NLL",
    "ece": "ECE ({bins} bins)",
    "mce": "MCE",
    "adaptive_ece": "adaptive ECE",
    "classwise_ece": "classwise ECE",
    "brier": "Brier score",
    "accuracy": "accuracy",
    "mean_confidence": "mean confidence",
    "gap": "gap (conf - acc)",
}


def _as_scaling(scaling: Scaling | float, kind: str) -> Scaling:
    return scaling if isinstance(scaling, Scaling) else Scaling.of_temperature(float(scaling), kind)


def evaluate(
    logits: np.ndarray,
    labels: np.ndarray,
    scaling: Scaling | float = 1.0,
    n_bins: int = DEFAULT_BINS,
    *,
    rows: np.ndarray | None = None,
    weights: np.ndarray | None = None,
    threads: int | None = None,
) -> Metrics:
    """Metrics of the calibrated probabilities against ``labels``.

    Works through the logits in row chunks (float64 sums), so a
    memory-mapped capture larger than RAM can be scored. A multiclass
    temperature (or none) is scored in one :mod:`onnxcal.sweep` pass:
    float32 logits are exponentiated in float32.

    Parameters
    ----------
    logits : ndarray of shape (n, k)
        Class scores before the activation (k = 1 for a binary model).
    labels : ndarray of shape (n,) or (n, k)
        Integer class indices (0/1 for binary), or a 0/1 multi-label array.
    scaling : Scaling or float, default 1.0
        The calibration map; a number is a temperature (the scores are
        divided by it). A ``sigmoid-l1`` scaling scores L1(sigmoid(z / T)).
    n_bins : int, default 15
        Bins for the ECEs.
    rows : ndarray of int, optional
        Score only these rows (sorted indices).
    weights : ndarray, optional
        One non-negative integer weight per scored row (bootstrap counts).
    threads : int, optional
        Threads for a temperature-scaled softmax (default: the cores
        available, see :func:`onnxcal.sweep.default_threads`); the result
        does not depend on it.

    Returns
    -------
    Metrics

    References
    ----------
    NLL, ECE and MCE: Guo et al. 2017, sec. 2 and 5. Brier score: G. W. Brier,
    "Verification of forecasts expressed in terms of probability",
    Monthly Weather Review 78(1), 1950 (multiclass form, summed over classes).
    Adaptive ECE: Nixon et al. 2019. Classwise ECE: Kull et al. 2019.

    Examples
    --------
    >>> m = evaluate(np.array([[2.0, 0.0], [0.0, 2.0]]), np.array([0, 0]))
    >>> m.accuracy
    0.5
    """
    if _l1.uses(scaling):  # L1(sigmoid(z / T)) = softmax(log sigmoid(z / T)) (l1_sigmoid)
        rows_l1 = _l1.LogSigmoidRows(logits, scaling.temperature)
        return evaluate(rows_l1, labels, 1.0, n_bins, rows=rows, weights=weights, threads=threads)
    k = logits.shape[1]
    kind = kind_of(k, np.ndim(labels))
    scaling = _as_scaling(scaling, kind)
    if kind == "multiclass" and scaling.method == "temperature":
        sel = Selection(rows=rows, weights=weights)
        beta = 1.0 / float(scaling.temperature)
        sums, _ = temperature_pass(logits, labels, beta, n_bins, selection=sel, threads=threads)
        return score_metrics(sums, 0, None, weights)
    if kind == "multiclass":
        return _evaluate_softmax(logits, labels, scaling, n_bins, rows, weights)
    return _evaluate_sigmoid(logits, labels, scaling, n_bins, rows, weights, kind)


def _classwise_add(p_sum, y_sum, p, y, w, n_bins, onehot=None):
    """Add a chunk's classwise-ECE sums, flat (class, bin) index k * M + m.

    Only entries above the first edge are binned one by one (fewer than M
    per row for softmax probabilities); the first bin gets the rest by
    subtraction from the column sums, which is much faster for many classes.
    """
    k = p.shape[1]
    first = np.linspace(0.0, 1.0, n_bins + 1)[1]
    wp = p if w is None else p * w[:, None]
    rows, cols = np.nonzero(p > first)
    ids = bin_ids(p[rows, cols], n_bins) + n_bins * cols
    upper = np.bincount(ids, weights=wp[rows, cols], minlength=k * n_bins)
    p_sum += upper
    p_sum[::n_bins] += wp.sum(axis=0) - upper.reshape(k, n_bins).sum(axis=1)
    if onehot is None:  # multiclass: the label's entry of each row
        r = np.arange(len(y))
        ids_y = bin_ids(p[r, y], n_bins) + n_bins * y
        y_sum += np.bincount(ids_y, weights=w, minlength=k * n_bins)
    else:
        wy = onehot if w is None else onehot * w[:, None]
        upper_y = np.bincount(ids, weights=wy[rows, cols], minlength=k * n_bins)
        y_sum += upper_y
        y_sum[::n_bins] += wy.sum(axis=0) - upper_y.reshape(k, n_bins).sum(axis=1)


class _Sums:
    """Running sums of one evaluation (chunk by chunk)."""

    def __init__(self, k: int, n_bins: int) -> None:
        self.k, self.n_bins = k, n_bins
        self.bins = np.zeros((3, n_bins))
        self.p_sum = np.zeros(k * n_bins)
        self.y_sum = np.zeros(k * n_bins)
        self.nll = self.brier = 0.0
        self.confs: list[np.ndarray] = []
        self.corrects: list[np.ndarray] = []

    def add_top_label(self, conf, correct, w) -> None:
        self.bins += reliability_bins(conf, correct, self.n_bins, w)
        self.confs.append(conf)
        self.corrects.append(correct)

    def metrics(self, n: float, per_sample: int, weights, kind: str) -> Metrics:
        """Metrics from the sums; ``per_sample`` predictions per sample (K for multi-label)."""
        conf = np.concatenate(self.confs) if self.confs else np.zeros(0)
        correct = np.concatenate(self.corrects) if self.corrects else np.zeros(0, bool)
        entry_weights = None if weights is None else np.repeat(np.asarray(weights), per_sample)
        classwise = _classwise_from_sums(self.p_sum, self.y_sum, n, self.k)
        return _metrics_from(
            n, per_sample, self.bins, self.nll, self.brier, (conf, correct, entry_weights, None), classwise,
            kind,
        )


def _metrics_from(n, per_sample, bins, nll, brier, top_label, classwise, kind, order=None) -> Metrics:
    """Metrics from the sums of one evaluation.

    ``top_label`` = (confidence, correctness, weights, order) of every
    prediction, for the equal-mass bins of the adaptive ECE.
    """
    entries = n * per_sample
    counts, conf_sum, corr_sum = bins
    conf, correct, entry_weights, order = top_label
    nan = float("nan")
    accuracy = float(corr_sum.sum() / entries) if entries else nan
    mean_conf = float(conf_sum.sum() / entries) if entries else nan
    n_bins = len(counts)
    return Metrics(
        n=int(round(n)),
        nll=float(nll / entries) if entries else nan,
        ece=ece_from_bins(counts, conf_sum, corr_sum),
        mce=mce_from_bins(counts, conf_sum, corr_sum),
        adaptive_ece=ece_from_bins(*equal_mass_bins(conf, correct, n_bins, entry_weights, order=order)),
        classwise_ece=classwise,
        brier=float(brier / entries) if entries else nan,
        accuracy=accuracy,
        mean_confidence=mean_conf,
        gap=mean_conf - accuracy,
        n_bins=n_bins,
        kind=kind,
    )


def score_metrics(sums: ScoreSums, part: int, mask: np.ndarray | None, weights: np.ndarray | None) -> Metrics:
    """The Metrics of one part of a pass's :class:`~onnxcal.sweep.ScoreSums`.

    ``mask`` selects the part's rows among the pass's positions (None: all),
    ``weights`` the pass's per-row weights (None: unweighted).
    """
    pick = (lambda a: a) if mask is None else (lambda a: a[mask])
    n = float(sums.weight[part])
    p_sum, y_sum = sums.classwise(part)
    top = (pick(sums.rows.conf), pick(sums.rows.correct), None if weights is None else pick(weights), None)
    return _metrics_from(
        n, 1, sums.bins[part], sums.nll[part], sums.brier[part], top,
        _classwise_from_sums(p_sum, y_sum, n, sums.k), "multiclass",
    )


def temperature_pass(
    logits: np.ndarray,
    labels: np.ndarray,
    beta: float,
    n_bins: int = DEFAULT_BINS,
    *,
    selection: Selection = ALL_ROWS,
    parts: int = 1,
    moments: int = 0,
    sq_moments: int = 0,
    sq_part: int | None = None,
    extra: Callable[[], Sequence] | None = None,
    threads: int | None = None,
) -> tuple[ScoreSums, list]:
    """One pass scoring softmax(beta z) per part (and feeding ``extra`` consumers).

    Returns the merged :class:`~onnxcal.sweep.ScoreSums` and,
    per lane, the ``extra`` consumers (for the caller to merge).
    """
    n = len(logits) if selection.rows is None else len(selection.rows)
    rows = RowScores(n)
    k = logits.shape[1]

    def make():
        return (ScoreSums(parts, k, n_bins, rows), *(extra() if extra else ()))

    lanes = run_pass(
        logits, labels, beta, make, selection=selection, moments=moments, sq_moments=sq_moments,
        sq_part=sq_part, threads=threads,
    )
    sums = ScoreSums.merge([lane[0] for lane in lanes])
    return sums, [lane[1:] for lane in lanes]


def _total(logits, rows, weights) -> float:
    if weights is not None:
        return float(np.sum(weights))
    return float(len(logits) if rows is None else len(rows))


def _evaluate_softmax(logits, labels, scaling, n_bins, rows, weights) -> Metrics:
    sums = _Sums(logits.shape[1], n_bins)
    for z, y, w in iter_chunks(logits, labels, rows, weights):
        r = np.arange(len(y))
        s = scaling.apply(z)
        s -= s.max(axis=1, keepdims=True)
        sy = s[r, y]
        p = np.exp(s, out=s)
        total = p.sum(axis=1)
        p /= total[:, None]
        # -log p_y = log sum_k exp(s_k) - s_y, with s shifted by its row maximum
        sums.nll += _wsum(np.log(total) - sy, w)
        # sum_k (p_k - y_k)^2 = sum_k p_k^2 - 2 p_y + 1
        sums.brier += _wsum(np.einsum("ij,ij->i", p, p) - 2.0 * p[r, y] + 1.0, w)
        pred = p.argmax(axis=1)
        sums.add_top_label(p[r, pred], pred == y, w)
        _classwise_add(sums.p_sum, sums.y_sum, p, y, w, n_bins)
    return sums.metrics(_total(logits, rows, weights), 1, weights, "multiclass")


def _evaluate_sigmoid(logits, labels, scaling, n_bins, rows, weights, kind) -> Metrics:
    k = logits.shape[1]
    sums = _Sums(k, n_bins)
    for z, y, w in iter_chunks(logits, labels, rows, weights):
        y = y.reshape(len(y), -1).astype(np.float64)
        s = scaling.apply(z)
        p = sigmoid(s)
        ww = None if w is None else np.repeat(w, k)
        # -[y log p + (1 - y) log(1 - p)] = log(1 + e^s) - y s
        sums.nll += _wsum((np.logaddexp(0.0, s) - y * s).ravel(), ww)
        sums.brier += _wsum(((p - y) ** 2).ravel(), ww)
        pred = p > 0.5
        sums.add_top_label(np.where(pred, p, 1.0 - p).ravel(), (pred == (y > 0.5)).ravel(), ww)
        _classwise_add(sums.p_sum, sums.y_sum, p, y, w, n_bins, onehot=y)
    return sums.metrics(_total(logits, rows, weights), k, weights, kind)


# --------------------------------------------------------------------------
# Reliability diagrams and per-class errors (drawn by ``report``)


@dataclass(frozen=True)
class Reliability:
    """The figures behind a reliability diagram and the per-class error bars.

    Attributes
    ----------
    kind : str
        ``"multiclass"``, ``"binary"`` or ``"multilabel"``.
    quantity : str
        ``"top-label"`` (multiclass): each sample's prediction is the
        probability of its predicted class, and "observed" is the fraction
        of those predictions that are right. ``"positive"`` (binary and
        multi-label): each (sample, label) entry's prediction is the
        probability that the label is present, and "observed" is the
        fraction of entries where it is.
    edges : ndarray of shape (M + 1,)
        Bin edges 0, 1/M, ..., 1; bins are ``((m-1)/M, m/M]``.
    counts : ndarray of shape (M,)
        Predictions per bin (also the confidence histogram).
    confidence : ndarray of shape (M,)
        Mean prediction in each bin; NaN for an empty bin.
    observed : ndarray of shape (M,)
        Fraction correct (top-label) or present (positive) in each bin;
        NaN for an empty bin.
    class_error : ndarray of shape (K,)
        Calibration error of each class's (label's) probability,
        sum_m |B_km|/n |freq_k(B_km) - conf_k(B_km)|; their mean is the
        classwise ECE.
    """

    kind: str
    quantity: str
    edges: np.ndarray
    counts: np.ndarray
    confidence: np.ndarray
    observed: np.ndarray
    class_error: np.ndarray

    @property
    def error(self) -> float:
        """The binned calibration error of the diagram, sum_m |B_m|/n |observed - confidence|.

        For ``top-label`` this is the ECE of :func:`evaluate`; for a binary
        model (``positive``, K = 1) it is the classwise ECE.
        """
        full = self.counts > 0
        gaps = np.abs(self.observed[full] - self.confidence[full]) * self.counts[full]
        return float(gaps.sum() / self.counts.sum()) if full.any() else float("nan")

    def to_dict(self) -> dict:
        """JSON-ready: arrays as lists, NaN (empty bins) as None."""

        def plain(a: np.ndarray) -> list:
            return [None if not np.isfinite(v) else float(v) for v in np.asarray(a, dtype=np.float64)]

        return {
            "kind": self.kind,
            "quantity": self.quantity,
            "edges": plain(self.edges),
            "counts": [int(round(c)) for c in self.counts],
            "confidence": plain(self.confidence),
            "observed": plain(self.observed),
            "class_error": plain(self.class_error),
            "error": None if not np.isfinite(self.error) else self.error,
        }


def reliability(
    logits: np.ndarray,
    labels: np.ndarray,
    scaling: Scaling | float = 1.0,
    n_bins: int = DEFAULT_BINS,
    *,
    rows: np.ndarray | None = None,
) -> Reliability:
    """Per-bin counts, mean prediction and observed frequency, and per-class errors.

    Multiclass: the top-label reliability diagram (equal-width bins of the
    predicted class's probability against the fraction correct), as for
    the ECE. Binary and multi-label: every entry's probability that the
    label is present against the fraction present (for a binary model this
    is the curve of ``sklearn.calibration.calibration_curve``).

    Parameters
    ----------
    logits : ndarray of shape (n, k)
    labels : ndarray of shape (n,) or (n, k)
    scaling : Scaling or float, default 1.0
        The calibration map (a number is a temperature).
    n_bins : int, default 15
    rows : ndarray of int, optional
        Only these rows (sorted indices).

    Returns
    -------
    Reliability

    References
    ----------
    DeGroot & Fienberg, "The Comparison and Evaluation of Forecasters",
    The Statistician 32(1/2), 1983 (reliability diagrams); Niculescu-Mizil
    & Caruana, "Predicting Good Probabilities With Supervised Learning",
    ICML 2005, sec. 2; Guo et al. 2017, sec. 2 (top-label form). Per-class
    errors: Kull et al. 2019, sec. 2 (classwise-ECE).

    Examples
    --------
    >>> r = reliability(np.array([[2.0, 0.0], [0.0, 2.0]]), np.array([0, 0]), n_bins=10)
    >>> int(r.counts[8]), float(r.observed[8])
    (2, 0.5)
    """
    if _l1.uses(scaling):  # scored as softmax(log sigmoid(z / T)), see evaluate
        return reliability(_l1.LogSigmoidRows(logits, scaling.temperature), labels, 1.0, n_bins, rows=rows)
    k = logits.shape[1]
    kind = kind_of(k, np.ndim(labels))
    scaling = _as_scaling(scaling, kind)
    bins = np.zeros((3, n_bins))
    p_sum, y_sum = np.zeros(k * n_bins), np.zeros(k * n_bins)
    n = 0
    if kind == "multiclass" and scaling.method == "temperature":  # the pass evaluate makes
        sums, _ = temperature_pass(
            logits, labels, 1.0 / float(scaling.temperature), n_bins, selection=Selection(rows=rows)
        )
        bins, n = sums.bins[0], float(sums.weight[0])
        p_sum, y_sum = sums.classwise(0)
    for z, y, _ in iter_chunks(logits, labels, rows) if not n else ():
        s = scaling.apply(z)
        if kind == "multiclass":
            p = softmax(s, axis=1)
            pred = p.argmax(axis=1)
            bins += reliability_bins(p[np.arange(len(y)), pred], pred == y, n_bins)
            _classwise_add(p_sum, y_sum, p, y, None, n_bins)
        else:
            p = sigmoid(s)
            present = y.reshape(len(y), -1).astype(np.float64)
            bins += reliability_bins(p.ravel(), present.ravel(), n_bins)
            _classwise_add(p_sum, y_sum, p, present, None, n_bins, onehot=present)
        n += len(y)
    counts, conf_sum, obs_sum = bins
    with np.errstate(invalid="ignore", divide="ignore"):
        confidence = np.where(counts > 0, conf_sum / counts, np.nan)
        observed = np.where(counts > 0, obs_sum / counts, np.nan)
    return Reliability(
        kind=kind,
        quantity="top-label" if kind == "multiclass" else "positive",
        edges=np.linspace(0.0, 1.0, n_bins + 1),
        counts=counts,
        confidence=confidence,
        observed=observed,
        class_error=_per_class_errors(p_sum, y_sum, n, k),
    )


def scores_from_probabilities(output: np.ndarray, activation: str) -> np.ndarray:
    """Logits that give back a model's probability output, float64, for :func:`evaluate`.

    ``"softmax"``: log(max(p, tiny)), since softmax(log p) = p for rows
    that sum to 1 (common practice). ``"logsoftmax"``: the output itself.
    ``"sigmoid"``: the logit log(p) - log(1 - p), each clamped the same
    way. ``tiny`` is the smallest normal number of the output's dtype, so
    a probability rounded to 0 or 1 gives a large finite logit, as the
    output's own precision allows.

    Examples
    --------
    >>> scores_from_probabilities(np.array([[0.5]]), "sigmoid")
    array([[0.]])
    """
    if activation == "logsoftmax":
        return np.asarray(output, dtype=np.float64)
    p = np.asarray(output)
    if p.dtype.kind != "f":
        p = p.astype(np.float64)
    tiny = np.finfo(p.dtype).tiny
    log_p = np.log(np.maximum(p, tiny).astype(np.float64))
    if activation == "sigmoid":
        return log_p - np.log(np.maximum(1.0 - p, tiny).astype(np.float64))
    return log_p
