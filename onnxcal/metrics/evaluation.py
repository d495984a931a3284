"""The before/after table: :class:`Metrics` and :func:`evaluate`.

``evaluate`` works through the logits in row chunks (float64 sums): a
multiclass temperature (or none) in one :mod:`onnxcal.sweep` pass
(:func:`~onnxcal.metrics.score_sums.temperature_pass`), any other softmax
map or a sigmoid chunk by chunk here. It keeps one confidence and one
correctness flag per prediction for the adaptive (equal-mass) ECE, whose
bin edges need all of them.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import asdict, dataclass
from typing import Any, cast

import numpy as np

from .. import l1_sigmoid as _l1
from ..scaling import Scaling, kind_of
from ..sweep import Selection
from .binning import (
    DEFAULT_BINS,
    ece_from_bins,
    equal_mass_bins,
    mce_from_bins,
    reliability_bins,
)
from .calibration_error import _classwise_add, _classwise_from_sums
from .core import iter_chunks, sigmoid
from .score_sums import ScoreSums, temperature_pass


def _wsum(x: np.ndarray, w: np.ndarray | None) -> float:
    return float(x.sum() if w is None else x @ w)


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

    def to_dict(self) -> dict[str, Any]:
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
        divided by it).
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
        assert isinstance(scaling, Scaling)  # uses() is true only for a Scaling
        assert scaling.temperature is not None  # an L1-sigmoid scaling is a single temperature
        rows_l1 = _l1.LogSigmoidRows(logits, scaling.temperature)
        # LogSigmoidRows reads like a 2-D array (shape, len, row indexing), all evaluate needs
        return evaluate(cast(np.ndarray, rows_l1), labels, 1.0, n_bins, rows=rows, weights=weights, threads=threads)
    k = logits.shape[1]
    kind = kind_of(k, np.ndim(labels))
    scaling = _as_scaling(scaling, kind)
    if kind == "multiclass" and scaling.method == "temperature":
        sel = Selection(rows=rows, weights=weights)
        assert scaling.temperature is not None  # method "temperature" on multiclass: a single T
        beta = 1.0 / float(scaling.temperature)
        sums, _ = temperature_pass(logits, labels, beta, n_bins, selection=sel, threads=threads)
        return score_metrics(sums, 0, None, weights)
    if kind == "multiclass":
        return _evaluate_softmax(logits, labels, scaling, n_bins, rows, weights)
    return _evaluate_sigmoid(logits, labels, scaling, n_bins, rows, weights, kind)


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

    def add_top_label(self, conf: np.ndarray, correct: np.ndarray, w: np.ndarray | None) -> None:
        self.bins += reliability_bins(conf, correct, self.n_bins, w)
        self.confs.append(conf)
        self.corrects.append(correct)

    def metrics(self, n: float, per_sample: int, weights: np.ndarray | None, kind: str) -> Metrics:
        """Metrics from the sums; ``per_sample`` predictions per sample (K for multi-label)."""
        conf = np.concatenate(self.confs) if self.confs else np.zeros(0)
        correct = np.concatenate(self.corrects) if self.corrects else np.zeros(0, bool)
        entry_weights = None if weights is None else np.repeat(np.asarray(weights), per_sample)
        classwise = _classwise_from_sums(self.p_sum, self.y_sum, n, self.k)
        return _metrics_from(
            n, per_sample, self.bins, self.nll, self.brier, (conf, correct, entry_weights, None), classwise,
            kind,
        )


def _metrics_from(
    n: float,
    per_sample: int,
    bins: np.ndarray,
    nll: float,
    brier: float,
    top_label: tuple[np.ndarray, np.ndarray, np.ndarray | None, np.ndarray | None],
    classwise: float,
    kind: str,
    order: np.ndarray | None = None,
) -> Metrics:
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
    """The Metrics of one part of a pass's :class:`~onnxcal.metrics.score_sums.ScoreSums`.

    ``mask`` selects the part's rows among the pass's positions (None: all),
    ``weights`` the pass's per-row weights (None: unweighted).
    """
    pick: Callable[[np.ndarray], np.ndarray] = (lambda a: a) if mask is None else (lambda a: a[mask])
    n = float(sums.weight[part])
    p_sum, y_sum = sums.classwise(part)
    top = (pick(sums.rows.conf), pick(sums.rows.correct), None if weights is None else pick(weights), None)
    return _metrics_from(
        n, 1, sums.bins[part], sums.nll[part], sums.brier[part], top,
        _classwise_from_sums(p_sum, y_sum, n, sums.k), "multiclass",
    )


def _total(logits: np.ndarray, rows: np.ndarray | None, weights: np.ndarray | None) -> float:
    if weights is not None:
        return float(np.sum(weights))
    return float(len(logits) if rows is None else len(rows))


def _evaluate_softmax(
    logits: np.ndarray,
    labels: np.ndarray,
    scaling: Scaling,
    n_bins: int,
    rows: np.ndarray | None,
    weights: np.ndarray | None,
) -> Metrics:
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


def _evaluate_sigmoid(
    logits: np.ndarray,
    labels: np.ndarray,
    scaling: Scaling,
    n_bins: int,
    rows: np.ndarray | None,
    weights: np.ndarray | None,
    kind: str,
) -> Metrics:
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
