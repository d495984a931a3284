"""Smoothed targets: Platt's finite-sample correction of the 0/1 labels, for every method.

Maximum likelihood on 0/1 labels asks the map for probability 1 on every
row's true class. When every calibration row is classified correctly (the
true class has the strict top score) that request can be met ever more
closely by sharpening, so the maximum-likelihood estimate does not exist:
temperature falls to its bound, a scale rises to its bound, and the map is
overconfident on the first error a new row brings.

Platt (1999, sec. 2.2) fits his sigmoid to the targets

    t+ = (N+ + 1) / (N+ + 2) for a positive row,   t- = 1 / (N- + 2) for a negative one,

with N+ and N- the positive and negative rows fitted on: the posterior
mean of a class frequency under a uniform prior on it (Laplace's rule of
succession), which never reaches 0 or 1, so the fit stays finite on
separable rows. onnxcal's generalisation to K classes (its own; Platt
treats two) gives a row of class y the target

    (N_y + 1) / (N_y + 2) for its class y,   1 / ((N_y + 2) (K - 1)) for each other class,

i.e. the others share 1 / (N_y + 2) equally. For K = 2 it is Platt's:
a positive row gets (N+ + 1)/(N+ + 2) on the positive class, a negative
row 1/(N- + 2) on it. N_y counts the rows fitted on (weighted by
bootstrap counts when given).

The fit minimises the cross-entropy to these targets,
-mean_i sum_k t_ik log p_ik. It is the weighted NLL of a set in which
every row is repeated once per class, the copy labelled k weighted by
t_ik (:func:`expanded`), so every method's own solver fits it as it is
(they all take row weights). The repeated set holds K times the rows: it is
refused above :data:`MAX_EXPANDED` numbers.

References
----------
Platt, "Probabilistic Outputs for Support Vector Machines and Comparisons to
Regularized Likelihood Methods", Advances in Large Margin Classifiers, MIT
Press, 1999, sec. 2.2 (the targets; scikit-learn's ``_sigmoid_calibration``
uses the same).
"""

from __future__ import annotations

import numpy as np

from ..errors import OnnxcalError
from ..metrics.core import iter_chunks
from ..scaling import Scaling

# The repeated set (rows x classes copies of K scores) is refused above this many numbers (~800 MB as float32).
MAX_EXPANDED = 200_000_000


def _fitted(n: int, rows: np.ndarray | None, weights: np.ndarray | None) -> tuple[np.ndarray, np.ndarray]:
    r = np.arange(n) if rows is None else np.asarray(rows, dtype=np.int64)
    w = np.ones(len(r)) if weights is None else np.asarray(weights, dtype=np.float64)
    return r, w


def class_labels(labels: np.ndarray, num_columns: int) -> tuple[np.ndarray, int]:
    """The class index of each row and the number of classes (one logit: 2 classes, 0/1)."""
    y = np.asarray(labels).reshape(len(labels), -1)[:, 0] if np.ndim(labels) > 1 else np.asarray(labels)
    return y.astype(np.int64), max(num_columns, 2)


def smoothed_targets(
    labels: np.ndarray, num_classes: int, rows: np.ndarray | None = None, weights: np.ndarray | None = None
) -> np.ndarray:
    """The target probabilities (rows fitted on x classes), see the module docstring.

    Examples
    --------
    Platt's targets for 3 positive and 1 negative rows (K = 2): the
    positive class gets 4/5 on a positive row and 1/3 on a negative one.

    >>> np.allclose(smoothed_targets(np.array([1, 1, 1, 0]), 2)[[0, 3], 1], [4 / 5, 1 / 3], rtol=0, atol=1e-15)
    True
    """
    r, w = _fitted(len(labels), rows, weights)
    y = np.asarray(labels, dtype=np.int64)[r]
    n_y = np.bincount(y, weights=w, minlength=num_classes).astype(np.float64)
    own = (n_y[y] + 1.0) / (n_y[y] + 2.0)
    t = np.repeat(((1.0 - own) / (num_classes - 1))[:, None], num_classes, axis=1)
    t[np.arange(len(y)), y] = own
    return t


def all_correct(
    logits: np.ndarray, labels: np.ndarray, rows: np.ndarray | None = None, weights: np.ndarray | None = None
) -> bool:
    """True when every row fitted on (weight > 0) has its true class as the strict top score.

    One logit (binary): the logit's sign agrees with the label (0 counts as
    wrong). Multi-label labels: every label's logit sign agrees.
    """
    for z, lab, w in iter_chunks(logits, labels, rows, weights):  # bounded memory: a capture may be many GB
        if w is not None:
            z, lab = z[w > 0], lab[w > 0]
        if not _correct(z, lab, np.ndim(labels) > 1):
            return False
    return True


def _correct(z: np.ndarray, lab: np.ndarray, multilabel: bool) -> bool:
    if z.shape[1] == 1 or multilabel:
        sign = 2.0 * lab.reshape(len(z), -1).astype(np.float64) - 1.0
        return bool(np.all(sign * z > 0))
    top = z[np.arange(len(z)), lab.astype(np.int64)]
    return bool(np.all((z < top[:, None]).sum(axis=1) == z.shape[1] - 1))


# Maps that can move the model's decision and hold every positive multiple of their own output logits: when the
# fitted map classifies every fitted row correctly, scaling its outputs up raises the likelihood without end.
SEPARATING = ("vector", "platt", "matrix", "dirichlet", "beta")
# Rows read first by separates(): a set with errors usually shows one among them.
_FIRST_ROWS = 1024


def separates(
    scaling: Scaling, logits: np.ndarray, labels: np.ndarray, rows: np.ndarray | None = None,
    weights: np.ndarray | None = None,
) -> bool:
    """True when the fitted map classifies every row fitted on (weight > 0) correctly, as :func:`all_correct`.

    The first :data:`_FIRST_ROWS` rows are read first, then the rest chunk
    by chunk, stopping at the first error: a set with errors costs about
    one small read.
    """
    r = np.arange(len(logits)) if rows is None else np.asarray(rows, dtype=np.int64)
    if weights is not None:
        r = r[np.asarray(weights) > 0]
    for part in (r[:_FIRST_ROWS], r[_FIRST_ROWS:]):
        for z, lab, _ in iter_chunks(logits, labels, part):
            if not _correct(scaling.apply(z), lab, np.ndim(labels) > 1):
                return False
    return True


def without_estimate(logits: np.ndarray, labels: np.ndarray, rows: np.ndarray | None = None) -> bool:
    """True when a maximum-likelihood fit on these rows does not exist and smoothed targets can replace it.

    Every row is classified correctly (:func:`all_correct`), the labels are
    one class per row (no smoothed targets for multi-label labels), and the
    repeated set stays within :data:`MAX_EXPANDED` (above it the fits warn
    instead).
    """
    return can_expand(logits, labels, rows) and all_correct(logits, labels, rows)


def can_expand(logits: np.ndarray, labels: np.ndarray, rows: np.ndarray | None = None) -> bool:
    """Whether smoothed targets apply: one class per row, and a repeated set within :data:`MAX_EXPANDED`."""
    n = len(logits) if rows is None else len(rows)
    return np.ndim(labels) == 1 and n * max(logits.shape[1], 2) * logits.shape[1] <= MAX_EXPANDED


def expanded(
    logits: np.ndarray, labels: np.ndarray, rows: np.ndarray | None = None, weights: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(logits, labels, weights) of the repeated set whose weighted NLL is the smoothed cross-entropy.

    Each fitted row appears once per class k (its logits unchanged, label
    k, weight t_ik times its own weight). One logit: two copies, labels 0
    and 1.

    Raises
    ------
    OnnxcalError
        Multi-label labels (no smoothed targets for them), or a repeated set
        above :data:`MAX_EXPANDED` numbers.
    """
    if np.ndim(labels) > 1:
        raise OnnxcalError("smoothed targets apply to multiclass and binary classifiers, not to multi-label labels",
                           "fit multi-label classifiers on their labels (without --smoothed-targets)")
    r, w = _fitted(len(logits), rows, weights)
    y, k = class_labels(labels, logits.shape[1])
    if len(r) * k * logits.shape[1] > MAX_EXPANDED:
        raise OnnxcalError(
            f"smoothed targets repeat each of the {len(r)} rows once per class ({k}): too large to fit",
            "fit on the labels (without --smoothed-targets), or on fewer rows; with many rows per class the "
            "smoothed targets are close to the labels anyway",
        )
    t = smoothed_targets(y, k, r, w) * w[:, None]
    z = np.repeat(np.asarray(logits[r]), k, axis=0)
    return np.ascontiguousarray(z), np.tile(np.arange(k, dtype=np.int64), len(r)), t.ravel()


def separated_warning(method: str) -> str:
    """The warning for a map that, fitted by maximum likelihood, classifies every calibration row correctly."""
    return (
        f"the fitted {method} map classifies every calibration row correctly, so its maximum-likelihood fit does "
        "not exist: its parameters grew until the solver stopped, and the map will be overconfident on the first "
        "error new data brings; calibrate on more (or harder) rows, use a map that keeps the model's decisions "
        "(temperature), or fit with --smoothed-targets"
    )


def no_estimate_warning(what: str) -> str:
    """The warning for a maximum-likelihood fit stopped at its bound on rows that are all classified correctly."""
    return (
        f"every calibration row is classified correctly, so the maximum-likelihood fit does not exist: {what} "
        "stopped at its bound, and the map will be overconfident on the first error new data brings; calibrate "
        "on more (or harder) rows, or fit with --smoothed-targets (Platt's targets: never 0 or 1, so the fit "
        "stays finite)"
    )
