"""Reliability diagrams and per-class errors: the figures ``report`` draws."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, cast

import numpy as np

from .. import l1_sigmoid as _l1
from ..scaling import Scaling, kind_of
from ..sweep import Selection
from .binning import DEFAULT_BINS, reliability_bins
from .calibration_error import _classwise_add, _per_class_errors
from .core import iter_chunks, sigmoid, softmax
from .evaluation import _as_scaling
from .score_sums import temperature_pass

# The standard normal quantile of 0.975, for 95 % intervals (scipy.stats.norm.ppf(0.975)).
Z_95 = 1.959963984540054


def wilson_interval(
    successes: np.ndarray, trials: np.ndarray, z: float = Z_95
) -> tuple[np.ndarray, np.ndarray]:
    """Wilson score interval of a binomial proportion, element by element.

    The interval is the set of proportions p whose score test does not reject
    ``successes`` out of ``trials`` at the level of ``z``:

        centre = (k + z²/2) / (n + z²),
        half   = z / (n + z²) · sqrt(k (n − k) / n + z²/4).

    Unlike the normal approximation k/n ± z sqrt(p̂(1 − p̂)/n) it never leaves
    [0, 1] and is not empty at k = 0 or k = n, which is why it suits the bins of
    a reliability diagram, where a bin may hold one prediction.

    Parameters
    ----------
    successes : ndarray
        Predictions that came true (may be float sums of 0/1 values).
    trials : ndarray
        Predictions in each bin; a bin of 0 gets NaN bounds.
    z : float, default Z_95
        Standard normal quantile (1.96 for 95 %).

    Returns
    -------
    (lower, upper) : tuple of ndarray

    References
    ----------
    E. B. Wilson, "Probable Inference, the Law of Succession, and Statistical
    Inference", Journal of the American Statistical Association 22(158),
    1927, pp. 209-212; A. Agresti & B. A. Coull, "Approximate Is Better than
    'Exact' for Interval Estimation of Binomial Proportions", The American
    Statistician 52(2), 1998, eq. (2).

    Examples
    --------
    >>> low, high = wilson_interval(np.array([0.0, 5.0]), np.array([1.0, 10.0]))
    >>> [round(float(v), 4) for v in (low[0], high[0], low[1], high[1])]
    [0.0, 0.7935, 0.2366, 0.7634]
    """
    k = np.asarray(successes, dtype=np.float64)
    n = np.asarray(trials, dtype=np.float64)
    z2 = z * z
    with np.errstate(invalid="ignore", divide="ignore"):
        centre = (k + z2 / 2) / (n + z2)
        spread = np.clip(k * (n - k) / n, 0.0, None)  # rounding can make k a hair above n
        half = z / (n + z2) * np.sqrt(spread + z2 / 4)
    empty = n <= 0
    low = np.where(empty, np.nan, np.clip(centre - half, 0.0, 1.0))
    high = np.where(empty, np.nan, np.clip(centre + half, 0.0, 1.0))
    return low, high


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

    ``observed_interval`` is each bin's 95 % Wilson interval of the observed
    fraction (:func:`wilson_interval`); ``mean_confidence`` and
    ``mean_observed`` are the figures over all bins.
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

    @property
    def observed_interval(self) -> tuple[np.ndarray, np.ndarray]:
        """Each bin's 95 % Wilson interval of the observed fraction (NaN for an empty bin)."""
        full = self.counts > 0
        successes = np.where(full, np.nan_to_num(self.observed) * self.counts, 0.0)
        return wilson_interval(successes, self.counts)

    @property
    def mean_confidence(self) -> float:
        """Mean prediction over every bin (the confidence histogram's mean)."""
        full = self.counts > 0
        total = float(self.counts.sum())
        return float((self.confidence[full] * self.counts[full]).sum() / total) if total else float("nan")

    @property
    def mean_observed(self) -> float:
        """Fraction correct (top-label) or present (positive) over every bin."""
        full = self.counts > 0
        total = float(self.counts.sum())
        return float((self.observed[full] * self.counts[full]).sum() / total) if total else float("nan")

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready: arrays as lists, NaN (empty bins) as None."""

        def plain(a: np.ndarray) -> list[float | None]:
            return [None if not np.isfinite(v) else float(v) for v in np.asarray(a, dtype=np.float64)]

        def number(v: float) -> float | None:
            return float(v) if np.isfinite(v) else None

        low, high = self.observed_interval

        return {
            "kind": self.kind,
            "quantity": self.quantity,
            "edges": plain(self.edges),
            "counts": [int(round(c)) for c in self.counts],
            "confidence": plain(self.confidence),
            "observed": plain(self.observed),
            "observed_interval": [
                None if not np.isfinite(lo) else [float(lo), float(hi)] for lo, hi in zip(low, high, strict=True)
            ],
            "class_error": plain(self.class_error),
            "error": number(self.error),
            "mean_confidence": number(self.mean_confidence),
            "mean_observed": number(self.mean_observed),
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
        assert isinstance(scaling, Scaling)  # uses() is true only for a Scaling
        assert scaling.temperature is not None  # an L1-sigmoid scaling is a single temperature
        # LogSigmoidRows reads like a 2-D array (shape, len, row indexing), all reliability needs
        log_rows = cast(np.ndarray, _l1.LogSigmoidRows(logits, scaling.temperature))
        return reliability(log_rows, labels, 1.0, n_bins, rows=rows)
    k = logits.shape[1]
    kind = kind_of(k, np.ndim(labels))
    scaling = _as_scaling(scaling, kind)
    bins = np.zeros((3, n_bins))
    p_sum, y_sum = np.zeros(k * n_bins), np.zeros(k * n_bins)
    n: float = 0
    if kind == "multiclass" and scaling.method == "temperature":  # the pass evaluate makes
        assert scaling.temperature is not None  # method "temperature" on multiclass: a single T
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
