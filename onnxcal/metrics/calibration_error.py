"""The calibration errors of predictions given as arrays: ECE, MCE, adaptive and classwise ECE.

Each takes the confidences (or class probabilities) and the labels of a
whole set at once; :func:`onnxcal.metrics.evaluate` computes the same
quantities chunk by chunk from the same bins (:mod:`onnxcal.metrics.binning`),
with :func:`_classwise_add` for the classwise sums.
"""

from __future__ import annotations

from typing import cast

import numpy as np

from .binning import (
    DEFAULT_BINS,
    bin_ids,
    ece_from_bins,
    equal_mass_bins,
    mce_from_bins,
    reliability_bins,
)


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
    return cast(np.ndarray, np.abs(y_sum - p_sum).reshape(n_classes, -1).sum(axis=1) / n)


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


def _classwise_add(
    p_sum: np.ndarray,
    y_sum: np.ndarray,
    p: np.ndarray,
    y: np.ndarray,
    w: np.ndarray | None,
    n_bins: int,
    onehot: np.ndarray | None = None,
) -> None:
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
