"""Beta calibration of one probability per row: sigmoid(a ln p - b ln(1 - p) + c).

Kull, Silva Filho, Flach, "Beta calibration: a well-founded and easily
implemented improvement on logistic calibration for binary classifiers",
AISTATS 2017: if the scores of each class follow a beta distribution, the
log-odds of the positive class are a ln p - b ln(1 - p) + c (sec. 3), so the
map is a logistic regression on the two features ln p and -ln(1 - p),
fitted by the likelihood, with a, b >= 0 so that the map is non-decreasing
in p (sec. 3.2; the paper drops a feature whose coefficient comes out
negative and refits, onnxcal solves the bound-constrained problem directly,
which is the same convex problem with a, b on their bounds).

a = b = 1, c = 0 is the identity; a = b gives sigmoid(a z + c), i.e. Platt
scaling of the logit z = ln p - ln(1 - p). onnxcal's binary scores are the
logit z of a one-logit model, p = sigmoid(z), and the features are computed
from z without overflow or cancellation:
ln p = -softplus(-z), ln(1 - p) = -softplus(z), so that
a ln p - b ln(1 - p) + c = a z + (b - a) softplus(z) + c
(using softplus(-z) = softplus(z) - z).

Parameters (JSON): ``{"a": float >= 0, "b": float >= 0, "c": float}``.
Kind: binary (scores N x 1). It keeps the 0.5 decisions only when the map
crosses 0.5 at p = 0.5 (c = 0 and a = b); it is monotone, so the ranking
of the rows is kept (strictly when a + b > 0).

Graph: Relu, Abs, Neg, Exp, Add, Log (a softplus that never overflows),
Mul, Add, Sigmoid; opset >= 13.
"""

from __future__ import annotations

from collections.abc import Collection
from typing import Any, cast

import numpy as np

from ..errors import OnnxcalError
from ._base import (
    GraphBuilder,
    MapFit,
    Subgraph,
    binary_targets,
    check_kind,
    chunks,
    field_array,
    require_fields,
    sigmoid,
    total_weight,
)

METHOD = "beta"
KINDS = ("binary",)
A_MAX = 100.0  # a, b in [0, A_MAX] (a bound for separable data)
C_MAX = 1000.0


def n_parameters(num_classes: int = 1, params: dict[str, Any] | None = None) -> int:
    return 3


def softplus(z: np.ndarray) -> np.ndarray:
    """log(1 + exp(z)) without overflow, float64."""
    z = np.asarray(z, dtype=np.float64)
    return cast(np.ndarray, np.maximum(z, 0.0) + np.log1p(np.exp(-np.abs(z))))


def features(scores: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(ln p, -ln(1 - p)) for p = sigmoid(z), from the logits z, float64."""
    sp = softplus(scores)
    return -softplus(-np.asarray(scores, dtype=np.float64)), sp


def calibrated_logits(params: dict[str, Any], scores: np.ndarray) -> np.ndarray:
    """a ln p - b ln(1 - p) + c (float64, the same shape as ``scores``)."""
    a, b, c = (float(params[k]) for k in ("a", "b", "c"))
    log_p, minus_log_q = features(scores)
    return a * log_p + b * minus_log_q + c


def apply(params: dict[str, Any], scores: np.ndarray) -> np.ndarray:
    """Calibrated probability of the positive class, float64 (the NumPy reference).

    Examples
    --------
    >>> z = np.array([[-2.0], [0.0], [3.0]])
    >>> bool(np.allclose(apply({"a": 1.0, "b": 1.0, "c": 0.0}, z), sigmoid(z)))
    True
    >>> apply({"a": 1.0, "b": 1.0, "c": 0.0}, np.array([[1000.0], [-1000.0]]))
    array([[1.],
           [0.]])
    """
    return sigmoid(calibrated_logits(params, scores))


def check_parameters(params: dict[str, Any], num_classes: int | None = 1, kind: str = "binary") -> dict[str, Any]:
    """Validate parameters read from a file; returns them as plain numbers.

    Raises
    ------
    OnnxcalError
        Naming the field: missing or extra fields, not a finite number, a or
        b negative, or a model with more than one logit.
    """
    check_kind(kind, KINDS, METHOD)
    if num_classes not in (None, 1):
        raise OnnxcalError(f"beta calibration needs one logit per row, the scores have {num_classes}")
    require_fields(params, ("a", "b", "c"), METHOD)
    out = {k: float(field_array(params, k, METHOD, ndim=0)) for k in ("a", "b", "c")}
    for k in ("a", "b"):
        if out[k] < 0:
            raise OnnxcalError(
                f"beta parameter '{k}' is {out[k]!r}, but it must be >= 0",
                "a and b >= 0 keep the map non-decreasing (Kull et al. 2017)",
            )
    return out


def _pass(
    scores: np.ndarray,
    labels: np.ndarray,
    theta: np.ndarray,
    rows: np.ndarray | None,
    weights: np.ndarray | None,
) -> tuple[float, np.ndarray]:
    """Mean binary cross-entropy of sigmoid(a x1 + b x2 + c) and its gradient."""
    f, g, total = 0.0, np.zeros(3), 0.0
    for z, y, w in chunks(scores, labels, rows, weights):
        x1, x2 = features(z[:, 0])
        t = binary_targets(y)
        s = theta[0] * x1 + theta[1] * x2 + theta[2]
        loss = np.logaddexp(0.0, s) - t * s
        r = sigmoid(s) - t
        if w is not None:
            loss, r = loss * w, r * w
        f += float(loss.sum())
        g += (float(r @ x1), float(r @ x2), float(r.sum()))
        total += total_weight(len(t), w)
    return f / total, g / total


def fit(
    scores: np.ndarray,
    labels: np.ndarray,
    *,
    rows: np.ndarray | None = None,
    weights: np.ndarray | None = None,
    l2: float = 0.0,
    start: dict[str, Any] | None = None,
) -> MapFit:
    """Fit a, b, c by the likelihood (binary cross-entropy), with a, b >= 0.

    Parameters
    ----------
    scores : ndarray of shape (n, 1)
        Logits of a one-logit classifier, p = sigmoid(z).
    labels : ndarray of shape (n,) or (n, 1)
        0/1 targets.
    rows, weights
        A subset of rows, bootstrap count weights (as ``onnxcal.fit``).
    l2 : float
        Weight of l2 * ((a - 1)^2 + (b - 1)^2 + c^2), a pull toward the
        identity (0: the plain likelihood, as the paper).
    start : dict, optional
        Parameters to start from; default the identity a = b = 1, c = 0.

    Returns
    -------
    MapFit
        L-BFGS-B with the analytic gradient; a, b in [0, 100], c in
        [-1000, 1000].

    References
    ----------
    Kull, Silva Filho, Flach, AISTATS 2017, sec. 3.
    """
    import scipy.optimize  # here, not at import: scipy takes ~0.5 s and inspect needs none
    evals = 0
    centre = np.array([1.0, 1.0, 0.0])

    def objective(theta: np.ndarray) -> tuple[float, np.ndarray]:
        nonlocal evals
        evals += 1
        f, g = _pass(scores, labels, theta, rows, weights)
        d = theta - centre
        return f + l2 * float(d @ d), g + 2.0 * l2 * d

    x0 = centre if start is None else np.array([start["a"], start["b"], start["c"]], dtype=np.float64)
    bounds = [(0.0, A_MAX), (0.0, A_MAX), (-C_MAX, C_MAX)]
    res = scipy.optimize.minimize(
        objective, x0, jac=True, method="L-BFGS-B", bounds=bounds,
        options={"maxiter": 1000, "ftol": 1e-14, "gtol": 1e-10},
    )
    a, b, c = (float(v) for v in res.x)
    notes = []
    on_bound = max(a, b) >= A_MAX * (1 - 1e-9)
    if on_bound:
        notes.append(
            f"beta parameter {'a' if a >= b else 'b'} lies at its bound {A_MAX:g}: the scores separate the "
            "labels (nearly) perfectly on this set; use a larger or harder validation set"
        )
    if a == 0.0 or b == 0.0:
        notes.append(
            f"beta parameter {'a' if a == 0.0 else 'b'} lies at 0 (the constraint a, b >= 0 of the paper "
            "is active): the map is flat in that direction"
        )
    converged = bool(res.success) or float(np.max(np.abs(_projected(res.jac, res.x, bounds)))) < 1e-7
    return MapFit(METHOD, "binary", {"a": a, "b": b, "c": c}, converged, float(evals), tuple(notes), on_bound)


def _projected(grad: np.ndarray, x: np.ndarray, bounds: list[tuple[float, float]]) -> np.ndarray:
    g = np.asarray(grad, dtype=np.float64).copy()
    for i, (lo, hi) in enumerate(bounds):
        if (x[i] <= lo and g[i] > 0) or (x[i] >= hi and g[i] < 0):
            g[i] = 0.0
    return g


def build(
    x: str,
    dtype: str,
    num_classes: int,
    params: dict[str, Any],
    *,
    taken: Collection[str] = (),
    compute_dtype: str | None = None,
    output: str = "probabilities",
) -> Subgraph:
    """ONNX nodes computing sigmoid(a z + (b - a) softplus(z) + c) from the logit ``x`` (N x 1).

    ``output="logits"`` stops before the Sigmoid (to feed one the model
    has). The softplus is spelled Relu(z) + Log(1 + Exp(-|z|)), which stays
    finite for any finite z in any runtime. Opset >= 13; float16 runs in
    float32.
    """
    p = check_parameters(params, num_classes)
    g = GraphBuilder(x, dtype, f"onnxcal_{METHOD}", taken, compute_dtype)
    z = g.start()
    sp = g.softplus(z)
    s = g.node("Mul", [z, g.const("a", p["a"])], "a_z")
    s = g.node("Add", [s, g.node("Mul", [sp, g.const("b_minus_a", p["b"] - p["a"])], "b_minus_a_softplus")], "sum")
    s = g.node("Add", [s, g.const("c", p["c"])], "logits")
    if output == "probabilities":
        s = g.node("Sigmoid", [s], "probabilities")
    elif output != "logits":
        raise ValueError(f"output must be 'probabilities' or 'logits', got {output!r}")
    return g.finish(s)
