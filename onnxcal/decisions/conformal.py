"""Split conformal prediction sets: the classes each row's true class lies among, 1 - alpha of the time.

A conformity score s(x, y) says how unusual class y is for input x. On n
labelled rows the calibration map was not fitted on, the conformal quantile
is q = the ceil((n + 1)(1 - alpha))-th smallest score, and the set of a new
row is C(x) = {y : s(x, y) <= q}. When the n rows and the new row are
exchangeable (e.g. drawn independently from one distribution),

    1 - alpha <= P(Y in C(X)) <= 1 - alpha + 1 / (n + 1),

the lower bound always, the upper bound when the scores are almost surely
distinct (Vovk, Gammerman & Shafer 2005; as stated in Angelopoulos & Bates
2021, Theorem 1). The probability is over the n rows and the new row
together: the guarantee is marginal, not per input, and not per
calibration set (see :func:`conditional_coverage_floor`). When ceil((n +
1)(1 - alpha)) > n, i.e. n < 1/alpha - 1, q is infinite and every set holds
every class.

Scores (``score``):

``"las"``
    1 - p_y, the least ambiguous set-valued classifier (Sadinle, Lei &
    Wasserman, JASA 2019): C(x) = {k : p_k >= t} with t = 1 - q, the
    smallest sets on average among sets with this coverage when p is the
    true conditional distribution (their Theorem 1, from memory).
``"aps"``
    Adaptive prediction sets (Romano, Sesia & Candes, NeurIPS 2020). Their
    score is randomised: (mass of the classes ranked before y) + u * p_y,
    u uniform on [0, 1], classes ranked by p descending. A deployed graph
    has no random input (and a random operator would make its outputs
    unverifiable), so this is the deterministic form with u = 0: s(x, y) =
    the sum of p over the classes ranked before y (ties: lower index
    first), C(x) = {y : s(x, y) <= q}, the top classes while the mass before
    them is <= q. An ordinary conformal score, so both bounds hold, except
    that the top class always scores 0, an atom: the upper bound needs q >
    0 (when the top class is right on at least ceil((n + 1)(1 - alpha)) of
    the rows, q = 0 and every set is the top class alone, covering as often
    as the model is right). The set always holds the top class. (u = 1 can
    give empty sets to the most confident rows; taking q from the u = 1
    scores but including the class that crosses it, as some accounts do,
    keeps the lower bound and over-covers.)

With ``class_conditional``, each class y gets its own quantile q_y from the
rows labelled y (a Mondrian conformal predictor: Vovk et al. 2005, sec. 4.5
from memory; Sadinle et al. 2019, class-specific coverage), and the bounds
hold for each class: 1 - alpha <= P(Y in C(X) | Y = y) <= 1 - alpha + 1 /
(n_y + 1).

The graph computes the sets from the calibrated probabilities with standard
operators; :func:`class_set` is the NumPy reference that does it the same
way, in the same dtype.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import special

from ..errors import OnnxcalError
from ._inputs import check_fraction, compute_dtype, predictions, two_classes

SCORES = ("las", "aps")
DEFAULT_COVERAGE = 0.9


def conformal_rank(n: int, alpha: float) -> int:
    """k = ceil((n + 1)(1 - alpha)): which smallest score is the quantile (> n: infinite).

    A product within rounding of an integer counts as that integer, so
    that alpha = 0.1 and n = 9 give k = 9, as the decimal numbers do.

    Examples
    --------
    >>> conformal_rank(9, 0.1), conformal_rank(8, 0.1), conformal_rank(99, 0.05), conformal_rank(9, 0.3)
    (9, 9, 95, 7)
    """
    return math.ceil((n + 1) * (1.0 - alpha) - (n + 1) * 1e-12)


def conformal_quantile(scores: np.ndarray, alpha: float) -> np.ndarray:
    """The split conformal quantile: the ceil((n + 1)(1 - alpha))-th smallest of n scores.

    Ties count with their multiplicity. Infinite when that rank exceeds n
    (fewer than 1/alpha - 1 scores): no finite threshold then gives the
    coverage, and the set must hold every class.

    Parameters
    ----------
    scores : ndarray of shape (..., n)
        Conformity scores of the true classes; leading axes are separate
        sets of scores (each gets its own quantile).
    alpha : float
        Miscoverage, in (0, 1).

    Returns
    -------
    ndarray of shape (...)
        0-d for one set of scores.

    References
    ----------
    Vovk, Gammerman & Shafer, "Algorithmic Learning in a Random World",
    Springer 2005 (inductive conformal prediction); Angelopoulos & Bates,
    "A Gentle Introduction to Conformal Prediction and Distribution-Free
    Uncertainty Quantification", arXiv:2107.07511, 2021, sec. 1 and Theorem 1.

    Examples
    --------
    >>> s = np.array([0.5, 0.2, 0.1, 0.2, 0.2])
    >>> float(conformal_quantile(s, 0.4)), float(conformal_quantile(s, 0.2)), float(conformal_quantile(s, 0.1))
    (0.2, 0.5, inf)
    """
    s = np.asarray(scores)
    k = conformal_rank(s.shape[-1], alpha)
    if k > s.shape[-1]:
        return np.full(s.shape[:-1], np.inf)
    return np.asarray(np.partition(s, k - 1, axis=-1)[..., k - 1])


def conditional_coverage_floor(n: int, alpha: float, confidence: float = 0.95) -> float:
    """A coverage the sets reach with probability ``confidence`` over the draw of the n rows.

    The marginal guarantee averages over calibration sets too. For one
    calibration set, the coverage on new data (continuous scores) is
    distributed as Beta(k, n + 1 - k), k = ceil((n + 1)(1 - alpha)): mean
    k / (n + 1), but below 1 - alpha for nearly half of all calibration
    sets. This returns its (1 - confidence)-quantile (1 when k > n: the sets
    hold every class). A gate that measures coverage on a large test set
    should hold it to this floor, not to 1 - alpha, or it fails a correct
    procedure about half the time.

    References
    ----------
    Vovk, "Conditional Validity of Inductive Conformal Predictors", ACML
    2012 (training-conditional validity); Angelopoulos & Bates 2021, sec. 3
    (the Beta distribution of the coverage; from memory).

    Examples
    --------
    >>> round(conditional_coverage_floor(999, 0.1, 0.95), 4)   # Beta(900, 100): mean 0.9, sd 0.0095
    0.884
    """
    k = conformal_rank(n, alpha)
    if k > n:
        return 1.0
    # the Beta quantile scipy.stats.beta.ppf gives, without importing scipy.stats (a second at start-up)
    return float(special.betaincinv(k, n + 1 - k, 1.0 - confidence))


def _mass_before(p: np.ndarray) -> np.ndarray:
    """N x K: for each class, the sum of the probabilities ranked before it, as the graph adds them.

    Classes are ranked by p descending, ties by the lower index first
    (``TopK(p, K, axis=-1, largest=1, sorted=1)``: ONNX TopK breaks ties by
    the lower index); the running sum before each is ``CumSum(values,
    axis=-1, exclusive=1)`` (NumPy's cumsum adds left to right in the
    array's dtype, one rounding per step, and the exclusive sum is the same
    additions one place later); ``ScatterElements`` puts it back in class order.
    """
    order = np.argsort(-p, axis=-1, kind="stable")
    through = np.cumsum(np.take_along_axis(p, order, axis=-1), axis=-1, dtype=p.dtype)
    before = np.zeros_like(through)
    before[:, 1:] = through[:, :-1]
    by_class = np.empty_like(before)
    np.put_along_axis(by_class, order, before, axis=-1)
    return by_class


def _true_class_scores(p: np.ndarray, y: np.ndarray, score: str) -> np.ndarray:
    """Each row's score, in a form whose order is exact in p's dtype.

    LAS: -p_y (ranks rows exactly as 1 - p_y does, without the rounding of
    1 - p); APS: the mass ranked before y, as the graph adds it.
    """
    if score == "las":
        return -np.take_along_axis(p, y[:, None], axis=1)[:, 0]
    return np.take_along_axis(_mass_before(p), y[:, None], axis=1)[:, 0]


@dataclass(frozen=True)
class SetThreshold:
    """Conformal thresholds, as the graph compares with them.

    Attributes
    ----------
    score : str
        ``"las"``: class k is in the set when p_k >= threshold_k;
        ``"aps"``: when the sum of the probabilities ranked above k is < threshold_k.
    coverage : float
        The target 1 - alpha.
    class_conditional : bool
        One threshold per class (Mondrian) or one for all.
    thresholds : tuple of float
        One value, or one per class. LAS: t = 1 - q (the k-th largest true
        class probability, -inf when q is infinite); APS: q, one of the
        masses ranked before the true class (inf when infinite). Exact in
        ``dtype``.
    n : tuple of int
        Rows each quantile was taken over (per class when class-conditional).
    rank : tuple of int
        k = ceil((n + 1)(1 - alpha)) of each; k > n means infinite.
    dtype : str
        The compute dtype (``float32`` or ``float64``).
    """

    score: str
    coverage: float
    class_conditional: bool
    thresholds: tuple[float, ...]
    n: tuple[int, ...]
    rank: tuple[int, ...]
    dtype: str

    @property
    def quantiles(self) -> tuple[float, ...]:
        """q in the paper's units: 1 - t for LAS (a float64 difference, for display), q for APS."""
        return tuple(1.0 - t for t in self.thresholds) if self.score == "las" else self.thresholds

    @property
    def infinite(self) -> tuple[bool, ...]:
        """Which quantiles are infinite (too few rows: the set holds that class always)."""
        return tuple(k > n for k, n in zip(self.rank, self.n, strict=True))

    def vector(self, n_classes: int) -> np.ndarray:
        """The thresholds as the graph's initializer: K values of ``dtype`` (one repeated when marginal)."""
        return np.broadcast_to(np.asarray(self.thresholds, dtype=self.dtype), (n_classes,)).copy()

    def to_dict(self) -> dict[str, Any]:
        return {
            "score": self.score, "coverage": self.coverage, "class_conditional": self.class_conditional,
            "thresholds": [t if math.isfinite(t) else None for t in self.thresholds],
            "infinite": list(self.infinite), "n": list(self.n), "rank": list(self.rank), "dtype": self.dtype,
        }


def _check_coverage(coverage: float, score: str) -> None:
    check_fraction(coverage, "the set coverage", "e.g. 0.9 for sets that hold the true class 90 % of the time")
    if score not in SCORES:
        raise OnnxcalError(f"unknown conformity score {score!r}", f"use one of: {', '.join(SCORES)}")


def choose_set_threshold(
    probabilities: np.ndarray, labels: np.ndarray, rows: np.ndarray, *, coverage: float = DEFAULT_COVERAGE,
    score: str = "las", class_conditional: bool = False,
) -> SetThreshold:
    """The conformal threshold(s) for sets that hold the true class with probability ``coverage``.

    Parameters
    ----------
    probabilities : ndarray
        Calibrated probabilities of every row: N x K (softmax), or N / N x
        1 for one sigmoid (the sets are then subsets of {0, 1}).
    labels : ndarray of shape (N,)
        True class indices.
    rows : ndarray
        Indices (or a boolean mask) of the rows to take the quantile over.
        They must not have been used to fit the calibration map (the
        held-out part of ``onnxcal.resample.split_holdout``, or a separate
        set): the guarantee needs them exchangeable with new data, and rows
        the map was fitted on are not.
    coverage : float, default 0.9
        1 - alpha.
    score : {"las", "aps"}
        Least ambiguous sets (1 - p_y) or adaptive prediction sets
        (deterministic form); see the module docstring.
    class_conditional : bool
        A quantile per class over the rows of that class (per-class coverage).

    Returns
    -------
    SetThreshold

    Raises
    ------
    OnnxcalError
        A coverage outside (0, 1), an unknown score, inputs that are not
        probabilities and labels, or multi-label labels (a multi-label
        model's own output is already a set of labels; its per-label
        decisions are chosen by ``choose_accept_thresholds_per_label``).

    References
    ----------
    Sadinle, Lei & Wasserman, "Least Ambiguous Set-Valued Classifiers with
    Bounded Error Levels", JASA 114(525), 2019; Romano, Sesia & Candes,
    "Classification with Valid and Adaptive Coverage", NeurIPS 2020; Vovk,
    Gammerman & Shafer 2005 (split and Mondrian conformal prediction).

    Examples
    --------
    >>> p = np.array([[0.7, 0.2, 0.1], [0.5, 0.3, 0.2], [0.4, 0.4, 0.2], [0.6, 0.3, 0.1]] * 5)
    >>> y = np.array([0, 1, 1, 2] * 5)
    >>> t = choose_set_threshold(p, y, np.arange(20), coverage=0.7)   # k = ceil(21 * 0.7) = 15
    >>> t.rank, t.thresholds    # 15th largest p_y: five each of 0.7, 0.3, 0.4, 0.1
    ((15,), (0.3,))
    """
    _check_coverage(coverage, score)
    pred = predictions(probabilities, labels, rows)
    if pred.kind == "multilabel":
        raise OnnxcalError(
            "prediction sets need one true class per row; a multi-label model's output is already a set of labels",
            "choose per-label thresholds with choose_accept_thresholds_per_label",
        )
    p = two_classes(pred.probabilities) if pred.kind == "binary" else pred.probabilities
    s = _true_class_scores(p, pred.labels, score)
    alpha = 1.0 - coverage
    groups = [pred.labels == k for k in range(p.shape[1])] if class_conditional else [np.ones(len(s), bool)]
    values, sizes, ranks = [], [], []
    for g in groups:
        q = float(conformal_quantile(s[g], alpha))
        values.append(-q if score == "las" else q)
        sizes.append(int(g.sum()))
        ranks.append(conformal_rank(int(g.sum()), alpha))
    return SetThreshold(
        score, float(coverage), class_conditional, tuple(values), tuple(sizes), tuple(ranks), p.dtype.name
    )


def class_set(probabilities: np.ndarray, threshold: SetThreshold) -> np.ndarray:
    """The N x K set membership, computed as the graph computes it.

    The ONNX form, in the compute dtype (a ``Cast`` to float32 first for
    float16 outputs; a one-sigmoid head first becomes ``Concat(Sub(1, p),
    p)``):

    - LAS: ``GreaterOrEqual(p, t)`` with ``t`` the K thresholds (opset 12;
      ``Not(Less(p, t))`` before).
    - APS: ``values, indices = TopK(p, K, axis=-1, largest=1, sorted=1)``;
      ``before = CumSum(values, axis=-1, exclusive=1)``;
      ``before_by_class = ScatterElements(p, indices, before, axis=-1)``
      (``indices`` is a permutation, so every element of ``p`` is
      replaced); ``LessOrEqual(before_by_class, q)`` (opset 12;
      ``Not(Greater(...))`` before). TopK with ``largest`` and ``sorted``,
      CumSum and ScatterElements need opset 11; K is the static class count
      (or ``Shape`` -> ``Gather`` for a dynamic one).

    Parameters
    ----------
    probabilities : ndarray
        N x K class probabilities, or N / N x 1 for one sigmoid.
    threshold : SetThreshold
        From :func:`choose_set_threshold`.

    Returns
    -------
    ndarray of bool, shape (N, K)
        K = 2 for one sigmoid.

    Examples
    --------
    >>> p = np.array([[0.6, 0.3, 0.1]])
    >>> las = SetThreshold("las", 0.9, False, (0.25,), (100,), (91,), "float64")
    >>> aps = SetThreshold("aps", 0.9, False, (0.85,), (100,), (91,), "float64")
    >>> class_set(p, las).tolist(), class_set(p, aps).tolist()
    ([[True, True, False]], [[True, True, False]])
    """
    p = np.asarray(probabilities)
    p = p.astype(compute_dtype(p.dtype))
    if p.ndim == 1 or p.shape[1] == 1:
        p = two_classes(p.reshape(-1))
    t = threshold.vector(p.shape[1]).astype(p.dtype)
    if threshold.score == "las":
        return np.asarray(p >= t, dtype=bool)
    return np.asarray(_mass_before(p) <= t, dtype=bool)


def class_set_size(membership: np.ndarray) -> np.ndarray:
    """Classes in each row's set, int64: ``ReduceSum(Cast(membership, int64), axes=[-1], keepdims=0)``.

    (ReduceSum takes its axes as an input from opset 13, as an attribute before.)

    Examples
    --------
    >>> class_set_size(np.array([[True, False, True], [False, False, False]]))
    array([2, 0])
    """
    return np.asarray(np.asarray(membership).sum(axis=-1, dtype=np.int64), dtype=np.int64)
