"""One-vs-rest Platt scaling for multiclass, renormalised.

Platt, "Probabilistic Outputs for Support Vector Machines and Comparisons
to Regularized Likelihood Methods", Advances in Large Margin Classifiers,
MIT Press 1999: sigmoid(a s + b) of a binary score s. Zadrozny & Elkan (KDD
2002, sec. 5) reduce a multiclass problem to one such binary problem per
class and normalise the K outputs; scikit-learn's
``CalibratedClassifierCV(method="sigmoid")`` does the same for more than two
classes (one ``_SigmoidCalibration`` per class, then division by the row
sum, uniform for an all-zero row).

**Which score.** Each binary fit takes the logit z_k of its class (the
model's pre-softmax output), as scikit-learn takes the k-th column of the
estimator's ``decision_function`` (for a multinomial linear model or an SVM,
those are the same kind of per-class scores; for an estimator without one,
scikit-learn takes the ``predict_proba`` column p_k). onnxcal takes z_k
because it is what onnxcal captures for every model, it makes the map a
per-class affine function before a sigmoid (so the affine part folds into a
preceding linear layer, as vector scaling does), and for a one-logit model
it is Platt scaling exactly. The price: a softmax model's logits are defined
only up to a constant per row, and this map, unlike the softmax, is not
invariant to it; for a model that outputs probabilities, give it log p (the
same as scikit-learn calibrating log p_k rather than p_k).

**Objective.** Each class's a_k, b_k minimise the binary cross-entropy of
sigmoid(a_k z_k + b_k) against [y = k] (the plain likelihood, as
``onnxcal.fit``'s Platt scaling), all K fits in one pass per evaluation
(the objective is a sum of K independent terms, so the joint optimum is
the K separate ones). Not the NLL of the renormalised distribution.
scikit-learn's sigmoid calibrator fits the same model to Platt's smoothed
targets (N+ + 1)/(N+ + 2) and 1/(N- + 2) instead of 1 and 0 (Platt 1999,
sec. 2.2): the two agree as n grows, and exactly when onnxcal is given
those targets as weights (the tests do that).

**Decisions.** The per-class maps differ and the renormalisation mixes
them, so the argmax can change.

Parameters (JSON): ``{"a": [K floats], "b": [K floats]}``, a_k in
[0.01, 100], b_k in [-100, 100] (the bounds of onnxcal's Platt scaling).
Graph: Mul, Add, Sigmoid, then ReduceSum, Div, Equal, Where; opset >= 13.
Fold: a z + b folds into a preceding linear layer z = A h + c as
diag(a) A and a * c + b; the Sigmoid and the renormalisation stay.
"""

from __future__ import annotations

from collections.abc import Collection
from typing import Any

import numpy as np

from ..errors import OnnxcalError
from . import _lookup
from ._base import (
    B_MAX,
    T_MAX,
    T_MIN,
    GraphBuilder,
    MapFit,
    Subgraph,
    check_kind,
    chunks,
    field_array,
    plain,
    require_fields,
    sigmoid,
    total_weight,
)

METHOD = "ovr-platt"
KINDS = ("multiclass", "binary")
A_MIN, A_MAX = 1.0 / T_MAX, 1.0 / T_MIN


def n_parameters(num_classes: int, params: dict[str, Any] | None = None) -> int:
    return 2 * num_classes


def apply(params: dict[str, Any], scores: np.ndarray) -> np.ndarray:
    """Calibrated probabilities, float64 (the NumPy reference).

    Examples
    --------
    >>> apply({"a": [1.0, 1.0], "b": [0.0, 0.0]}, np.array([[0.0, 0.0], [50.0, -50.0]])).round(6)
    array([[0.5, 0.5],
           [1. , 0. ]])
    """
    z = np.asarray(scores, dtype=np.float64)
    q = sigmoid(z * np.asarray(params["a"], dtype=np.float64) + np.asarray(params["b"], dtype=np.float64))
    return _lookup.renormalise(q)


def check_parameters(params: dict[str, Any], num_classes: int | None = None, kind: str | None = None) -> dict[str, Any]:
    """Validate parameters read from a file; returns them as plain numbers.

    Raises
    ------
    OnnxcalError
        Naming the field: missing or extra fields, not one finite number per
        class, a scale outside [0.01, 100] or a bias outside [-100, 100].
    """
    if kind is not None:
        check_kind(kind, KINDS, METHOD)
    require_fields(params, ("a", "b"), METHOD)
    a = field_array(params, "a", METHOD, ndim=1, shape=(num_classes,))
    b = field_array(params, "b", METHOD, ndim=1, shape=(len(a),))
    if np.any((a < A_MIN) | (a > A_MAX)):
        raise OnnxcalError(f"{METHOD} parameter 'a' holds scales outside [{A_MIN:g}, {A_MAX:g}]")
    if np.any(np.abs(b) > B_MAX):
        raise OnnxcalError(f"{METHOD} parameter 'b' holds biases outside [-{B_MAX:g}, {B_MAX:g}]")
    return {"a": plain(a), "b": plain(b)}


def _pass(
    scores: np.ndarray,
    labels: np.ndarray,
    a: np.ndarray,
    b: np.ndarray,
    rows: np.ndarray | None,
    weights: np.ndarray | None,
) -> tuple[float, np.ndarray, np.ndarray]:
    """Mean over rows of the summed per-class cross-entropies, and its gradient in a and b."""
    k = scores.shape[1]
    f, ga, gb, total = 0.0, np.zeros(k), np.zeros(k), 0.0
    for z, y, w in chunks(scores, labels, rows, weights):
        if k == 1:
            t = np.asarray(y, dtype=np.float64).reshape(len(y), 1)
        else:
            t = (np.asarray(y)[:, None] == np.arange(k)).astype(np.float64)
        s = z * a + b
        loss = np.logaddexp(0.0, s) - t * s
        r = sigmoid(s) - t
        if w is not None:
            loss *= w[:, None]
            r *= w[:, None]
        f += float(loss.sum())
        gb += r.sum(axis=0)
        ga += (r * z).sum(axis=0)
        total += total_weight(len(z), w)
    return f / total, ga / total, gb / total


def fit(
    scores: np.ndarray,
    labels: np.ndarray,
    *,
    rows: np.ndarray | None = None,
    weights: np.ndarray | None = None,
    l2: float = 0.0,
    start: dict[str, Any] | None = None,
) -> MapFit:
    """Fit a_k, b_k for every class by its binary cross-entropy (L-BFGS-B, analytic gradient).

    Parameters
    ----------
    scores : ndarray of shape (n, K)
        Logits (K = 1: a one-logit model, labels 0/1; then this is Platt
        scaling).
    labels : ndarray of shape (n,)
        Class indices (or 0/1 for K = 1).
    rows, weights
        A subset of rows and bootstrap count weights.
    l2 : float
        Weight of l2 * (sum (a - 1)^2 + sum b^2) (0: the plain likelihood).
    start : dict, optional
        Parameters to start from; default a = 1, b = 0.

    References
    ----------
    Platt 1999; Zadrozny & Elkan, KDD 2002, sec. 5.
    """
    import scipy.optimize  # here, not at import: scipy takes ~0.5 s and inspect needs none
    k = scores.shape[1]
    evals = 0
    idx = np.arange(len(scores)) if rows is None else rows
    sample = np.asarray(scores[idx[:: max(1, len(idx) // 10_000)]], dtype=np.float64)
    c = float(np.sqrt(np.mean(sample * sample))) or 1.0  # optimise c * a (as fit._fit_affine)

    def objective(x: np.ndarray) -> tuple[float, np.ndarray]:
        nonlocal evals
        evals += 1
        a, b = x[:k] / c, x[k:]
        f, ga, gb = _pass(scores, labels, a, b, rows, weights)
        f += l2 * (float(np.sum((a - 1.0) ** 2)) + float(b @ b))
        return f, np.concatenate([(ga + 2.0 * l2 * (a - 1.0)) / c, gb + 2.0 * l2 * b])

    a0, b0 = (np.ones(k), np.zeros(k)) if start is None else (np.asarray(start["a"], float), np.asarray(start["b"],
                                                                                                        float))
    bounds = [(c * A_MIN, c * A_MAX)] * k + [(-B_MAX, B_MAX)] * k
    res = scipy.optimize.minimize(
        objective, np.concatenate([c * a0, b0]), jac=True, method="L-BFGS-B", bounds=bounds,
        options={"maxiter": 2000, "ftol": 1e-14, "gtol": 1e-10, "maxcor": 20},
    )
    a, b = res.x[:k] / c, res.x[k:]
    notes = []
    on_bound = (a <= A_MIN * (1 + 1e-9)) | (a >= A_MAX * (1 - 1e-9)) | (np.abs(b) >= B_MAX * (1 - 1e-9))
    if on_bound.any():
        notes.append(
            f"{METHOD}: the scale or bias of classes {', '.join(map(str, np.flatnonzero(on_bound)[:5]))} lies on "
            "its bound: a class that is absent, always present, or perfectly separated on this set"
        )
    return MapFit(METHOD, _lookup.kind_of_scores(k), {"a": plain(a), "b": plain(b)}, bool(res.success), float(evals),
                  tuple(notes), bool(on_bound.any()))


def build(
    x: str,
    dtype: str,
    num_classes: int,
    params: dict[str, Any],
    *,
    taken: Collection[str] = (),
    compute_dtype: str | None = None,
) -> Subgraph:
    """ONNX nodes computing the renormalised sigmoid(a z + b) from the logits ``x`` (N x K).

    Mul, Add, Sigmoid, then for K > 1 ReduceSum, Div, Equal, Where (an
    all-zero row becomes uniform); opset >= 13; float16 runs in float32.
    """
    p = check_parameters(params, num_classes)
    g = GraphBuilder(x, dtype, "onnxcal_ovr_platt", taken, compute_dtype)
    z = g.start()
    s = g.node("Add", [g.node("Mul", [z, g.const("a", np.asarray(p["a"]))], "a_z"), g.const("b", np.asarray(p["b"]))],
               "logits")
    q = g.node("Sigmoid", [s], "q")
    return _lookup.finish(g, q, num_classes)
