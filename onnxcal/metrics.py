"""Calibration metrics over logits and integer labels.

Every function here is pure: arrays in, numbers or arrays out. The logits of a
large validation set are processed in row chunks with float64 accumulation,
so memory stays bounded by one chunk whatever the number of samples.
Drawing is elsewhere (``report``); this module only computes.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np

DEFAULT_BINS = 15
_CHUNK_ELEMENTS = 1 << 22  # float64 elements per chunk (32 MiB)


def chunk_rows(n_classes: int) -> int:
    """Rows per chunk so one float64 chunk of ``n_classes`` columns is ~32 MiB."""
    return max(1, _CHUNK_ELEMENTS // max(1, n_classes))


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


def reliability_bins(
    confidence: np.ndarray, correct: np.ndarray, n_bins: int = DEFAULT_BINS
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

    Returns
    -------
    counts, confidence_sum, correct_sum : ndarray of shape (n_bins,)
    """
    edges = np.linspace(0.0, 1.0, n_bins + 1)
    ids = np.searchsorted(edges[1:-1], confidence, side="left")
    counts = np.bincount(ids, minlength=n_bins).astype(np.float64)
    conf_sum = np.bincount(ids, weights=confidence, minlength=n_bins)
    corr_sum = np.bincount(ids, weights=correct.astype(np.float64), minlength=n_bins)
    return counts, conf_sum, corr_sum


def ece_from_bins(counts: np.ndarray, conf_sum: np.ndarray, corr_sum: np.ndarray) -> float:
    """Expected calibration error from the sums of :func:`reliability_bins`.

    ECE = sum_m |B_m|/n * |acc(B_m) - conf(B_m)| = sum_m |corr_m - conf_m| / n.
    """
    n = counts.sum()
    return float(np.abs(corr_sum - conf_sum).sum() / n) if n else float("nan")


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


@dataclass(frozen=True)
class Metrics:
    """Calibration metrics of one set of predictions.

    Attributes
    ----------
    n : int
        Number of samples.
    nll : float
        Mean negative log-likelihood of the true class (natural log).
    ece : float
        Top-label expected calibration error, ``n_bins`` equal-width bins.
    brier : float
        Multiclass Brier score: mean over samples of sum_k (p_k - y_k)^2, in [0, 2].
    accuracy : float
        Fraction of samples whose argmax is the label.
    mean_confidence : float
        Mean probability of the predicted class.
    n_bins : int
        Number of bins used for ECE.
    """

    n: int
    nll: float
    ece: float
    brier: float
    accuracy: float
    mean_confidence: float
    n_bins: int = DEFAULT_BINS

    def to_dict(self) -> dict:
        return asdict(self)


def evaluate(
    logits: np.ndarray,
    labels: np.ndarray,
    temperature: float = 1.0,
    n_bins: int = DEFAULT_BINS,
) -> Metrics:
    """Metrics of ``softmax(logits / temperature)`` against ``labels``.

    Works through the logits in row chunks (float32 in, float64 sums), so a
    memory-mapped capture larger than RAM can be scored.

    Parameters
    ----------
    logits : ndarray of shape (n, k)
        Class scores before softmax.
    labels : ndarray of shape (n,)
        Integer class indices in [0, k).
    temperature : float, default 1.0
        The scores are divided by it before the softmax.
    n_bins : int, default 15
        Bins for ECE.

    Returns
    -------
    Metrics

    References
    ----------
    NLL and ECE: Guo et al. 2017, sec. 2 and 5. Brier score: G. W. Brier,
    "Verification of forecasts expressed in terms of probability",
    Monthly Weather Review 78(1), 1950 (multiclass form, summed over classes).

    Examples
    --------
    >>> m = evaluate(np.array([[2.0, 0.0], [0.0, 2.0]]), np.array([0, 0]))
    >>> m.accuracy
    0.5
    """
    n, k = logits.shape
    counts = np.zeros(n_bins)
    conf_sum = np.zeros(n_bins)
    corr_sum = np.zeros(n_bins)
    nll_sum = brier_sum = 0.0
    step = chunk_rows(k)
    rows = np.arange(min(step, n))
    for start in range(0, n, step):
        z = np.asarray(logits[start : start + step], dtype=np.float64) / temperature
        y = np.asarray(labels[start : start + step])
        r = rows[: len(y)]
        logp = log_softmax(z)
        p = np.exp(logp)
        nll_sum -= logp[r, y].sum()
        # sum_k (p_k - y_k)^2 = sum_k p_k^2 - 2 p_y + 1
        brier_sum += (np.einsum("ij,ij->i", p, p) - 2.0 * p[r, y] + 1.0).sum()
        pred = p.argmax(axis=1)
        conf = p[r, pred]
        c, s, a = reliability_bins(conf, (pred == y), n_bins)
        counts += c
        conf_sum += s
        corr_sum += a
    return Metrics(
        n=int(n),
        nll=float(nll_sum / n),
        ece=ece_from_bins(counts, conf_sum, corr_sum),
        brier=float(brier_sum / n),
        accuracy=float(corr_sum.sum() / n),
        mean_confidence=float(conf_sum.sum() / n),
        n_bins=n_bins,
    )
