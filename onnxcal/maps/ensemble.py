"""Ensemble temperature scaling: w1 softmax(z / T) + w2 softmax(z) + w3 / K.

Zhang, Kailkhura, Han, "Mix-n-Match: Ensemble and Compositional Methods for
Uncertainty Calibration in Deep Learning", ICML 2020, sec. 3.1: a convex
combination of the temperature-scaled probabilities, the uncalibrated ones
and the uniform distribution, the weights on the simplex
(w >= 0, w1 + w2 + w3 = 1). It keeps the accuracy-preserving property of
temperature scaling and adds expressiveness at the cost of two parameters.

**Fitting.** As in the paper, in two stages: T is the temperature-scaling
fit (by NLL: onnxcal.fit passes its own fit_temperature's T; alone, a bounded scalar search), then the
weights are fitted with T fixed. The paper's experiments fit the weights
(and T) by the mean squared error of the probabilities, with the NLL as an
alternative (from memory); onnxcal fits the weights by the NLL, as every
other onnxcal method: the NLL is a strictly proper scoring rule that puts
weight on the confidently wrong rows, and held-out NLL is what ``auto``
compares, so fitting by it keeps the choice consistent. With T fixed the
NLL of the mixture, -mean_i log(sum_j w_j a_ij) with a_i1 = softmax(z_i/T)_y,
a_i2 = softmax(z_i)_y, a_i3 = 1/K, is convex in w (a log of a linear
function), so the simplex-constrained minimum is global; the solver
(SLSQP on three numbers, after one pass over the scores) finds it.

**Argmax.** Kept, when w1 + w2 > 0: for T > 0 both softmax(z / T) and
softmax(z) are strictly increasing in z_k at fixed other logits and rank
the classes as z does, so z_j > z_k gives a strictly larger mixture value
for j than for k (the uniform term adds the same to both). With w1 = w2 = 0
every class gets 1/K: every row is a tie (an ArgMax then picks the first
class). The fit warns when w1 + w2 is 0.

Parameters (JSON): ``{"temperature": T > 0, "weights": [w1, w2, w3]}``.
Graph: Div, Softmax, Softmax, Mul, Mul, Add, Add; opset >= 13; no fold.
"""

from __future__ import annotations

from collections.abc import Collection
from typing import Any, cast

import numpy as np

from ..errors import OnnxcalError
from ._base import (
    T_MAX,
    T_MIN,
    GraphBuilder,
    MapFit,
    Subgraph,
    check_kind,
    chunks,
    field_array,
    log_softmax,
    plain,
    require_fields,
    softmax,
)

METHOD = "ensemble-temperature"
KINDS = ("multiclass",)
_SUM_TOL = 1e-6


def n_parameters(num_classes: int = 0, params: dict[str, Any] | None = None) -> int:
    return 3  # T and two free weights


def apply(params: dict[str, Any], scores: np.ndarray) -> np.ndarray:
    """Calibrated probabilities, float64 (the NumPy reference).

    Examples
    --------
    >>> z = np.array([[2.0, 0.0]])
    >>> apply({"temperature": 2.0, "weights": [0.0, 0.0, 1.0]}, z)
    array([[0.5, 0.5]])
    >>> bool(np.allclose(apply({"temperature": 2.0, "weights": [1.0, 0.0, 0.0]}, z), softmax(z / 2.0)))
    True
    """
    z = np.asarray(scores, dtype=np.float64)
    t = float(params["temperature"])
    w1, w2, w3 = (float(v) for v in params["weights"])
    return cast(np.ndarray, w1 * softmax(z / t, axis=-1) + w2 * softmax(z, axis=-1) + w3 / z.shape[-1])


def check_parameters(params: dict[str, Any], num_classes: int | None = None, kind: str = "multiclass") -> dict[str,
                                                                                                               Any]:
    """Validate parameters read from a file; returns them as plain numbers.

    Raises
    ------
    OnnxcalError
        Naming the field: missing or extra fields, a temperature that is not
        a positive number, weights that are not three numbers >= 0 adding
        up to 1.
    """
    check_kind(kind, KINDS, METHOD)
    require_fields(params, ("temperature", "weights"), METHOD)
    t = float(field_array(params, "temperature", METHOD, ndim=0))
    if t <= 0:
        raise OnnxcalError(f"{METHOD} parameter 'temperature' is {t!r}, but it must be > 0")
    w = field_array(params, "weights", METHOD, ndim=1, shape=(3,))
    if np.any(w < 0) or abs(float(w.sum()) - 1.0) > _SUM_TOL:
        raise OnnxcalError(
            f"{METHOD} parameter 'weights' is {plain(w)}, but it must be three numbers >= 0 adding up to 1"
        )
    return {"temperature": t, "weights": plain(w)}


def components(
    scores: np.ndarray,
    labels: np.ndarray,
    temperature: float,
    rows: np.ndarray | None = None,
    weights: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray | None]:
    """Per row, the true class's probability under each component (n x 3), and the weights."""
    parts = []
    k = scores.shape[1]
    for z, y, _ in chunks(scores, labels, rows):
        r = np.arange(len(y))
        parts.append(np.stack([softmax(z / temperature)[r, y], softmax(z)[r, y], np.full(len(y), 1.0 / k)], axis=1))
    a = np.concatenate(parts) if parts else np.zeros((0, 3))
    return a, None if weights is None else np.asarray(weights, dtype=np.float64)


def simplex_weights(a: np.ndarray, w: np.ndarray | None) -> tuple[np.ndarray, bool]:
    """argmin over the simplex of -sum_i w_i log(a_i . v) (convex), and whether it converged."""
    import scipy.optimize  # here, not at import: scipy takes ~0.5 s and inspect needs none
    total = float(len(a) if w is None else w.sum())
    wt = np.ones(len(a)) if w is None else w
    tiny = np.finfo(np.float64).tiny

    def objective(v: np.ndarray) -> tuple[float, np.ndarray]:
        m = np.maximum(a @ v, tiny)
        return -float(wt @ np.log(m)) / total, -(a.T @ (wt / m)) / total

    runs = [
        scipy.optimize.minimize(
            objective, v0, jac=True, method="SLSQP", bounds=[(0.0, 1.0)] * 3,
            # scipy calls a constraint as fun(x, *args); the *_ lets the stubs match (args is empty)
            constraints=[{"type": "eq", "fun": lambda v, *_: v.sum() - 1.0, "jac": lambda v, *_: np.ones(3)}],
            options={"ftol": 1e-15, "maxiter": 500},
        )
        for v0 in (np.array([0.8, 0.1, 0.1]), np.array([1 / 3, 1 / 3, 1 / 3]))
    ]
    best = min(runs, key=lambda r: float(r.fun))
    v = np.clip(best.x, 0.0, None)
    return v / v.sum(), bool(best.success)


def _nll(scores: np.ndarray, labels: np.ndarray, rows: np.ndarray | None, weights: np.ndarray | None,
         temperature: float) -> float:
    total = 0.0
    start = 0
    for z, y, _ in chunks(scores, labels, rows):
        terms = -log_softmax(z / temperature)[np.arange(len(y)), y]
        w = None if weights is None else weights[start : start + len(y)]
        total += float(terms.sum() if w is None else w @ terms)
        start += len(y)
    return total


def fit_temperature(
    scores: np.ndarray, labels: np.ndarray, rows: np.ndarray | None = None, weights: np.ndarray | None = None
) -> tuple[float, float, bool]:
    """The T of temperature scaling, by a bounded scalar minimisation of the NLL over log T.

    The NLL is convex in 1/T (Guo et al. 2017, sec. 4.2; onnxcal.fit's
    Newton solver relies on the same fact), so Brent's bounded method on
    log T in [log T_MIN, log T_MAX] finds the one minimum. ``onnxcal.fit``
    passes its own solver's T instead (``temperature=``); this one keeps
    the module usable on its own. Returns (T, passes, on a bound).
    """
    import scipy.optimize  # here, not at import: scipy takes ~0.5 s and inspect needs none
    res = scipy.optimize.minimize_scalar(
        lambda u: _nll(scores, labels, rows, weights, float(np.exp(u))),
        bounds=(np.log(T_MIN), np.log(T_MAX)), method="bounded", options={"xatol": 1e-9},
    )
    t = float(np.exp(res.x))
    return t, float(res.nfev), bool(t <= T_MIN * 1.0001 or t >= T_MAX * 0.9999)


def fit(
    scores: np.ndarray,
    labels: np.ndarray,
    *,
    rows: np.ndarray | None = None,
    weights: np.ndarray | None = None,
    l2: float = 0.0,
    temperature: float | None = None,
) -> MapFit:
    """Fit T by temperature scaling, then the simplex weights by NLL with T fixed.

    Parameters
    ----------
    scores : ndarray of shape (n, K)
        Logits (K > 1).
    labels : ndarray of shape (n,)
        Class indices.
    rows, weights
        A subset of rows and bootstrap count weights.
    l2 : float
        Unused (accepted so every solver takes the same arguments).
    temperature : float, optional
        Use this T instead of fitting it (stage 2 only).

    References
    ----------
    Zhang, Kailkhura, Han, ICML 2020, sec. 3.1.
    """
    del l2
    notes: list[str] = []
    passes, at_bound = 0.0, False
    if temperature is None:
        temperature, passes, at_bound = fit_temperature(scores, labels, rows, weights)
        if at_bound:
            notes.append(f"T = {temperature:.3g} is on its bound [{T_MIN:g}, {T_MAX:g}]")
    a, w = components(scores, labels, temperature, rows, weights)
    v, converged = simplex_weights(a, w)
    if v[0] + v[1] <= 1e-12:
        notes.append("the fitted weights put everything on the uniform distribution: every class gets 1/K")
    params = {"temperature": float(temperature), "weights": plain(v)}
    return MapFit(METHOD, "multiclass", params, converged, passes + 1.0, tuple(notes), bool(at_bound))


def build(
    x: str,
    dtype: str,
    num_classes: int,
    params: dict[str, Any],
    *,
    taken: Collection[str] = (),
    compute_dtype: str | None = None,
) -> Subgraph:
    """ONNX nodes computing w1 Softmax(z / T) + w2 Softmax(z) + w3 / K from the logits ``x`` (N x K).

    Div, two Softmax (last axis), two Mul, two Add; opset >= 13; float16
    runs in float32. Output: probabilities only (a mixture has no logit form
    to feed an existing Softmax).
    """
    p = check_parameters(params, num_classes)
    w1, w2, w3 = p["weights"]
    g = GraphBuilder(x, dtype, "onnxcal_ets", taken, compute_dtype)
    z = g.start()
    sharp = g.node("Softmax", [g.node("Div", [z, g.const("temperature", p["temperature"])], "scaled")], "p_scaled",
                   axis=-1)
    plain_p = g.node("Softmax", [z], "p_plain", axis=-1)
    mix = g.node("Add", [g.node("Mul", [sharp, g.const("w1", w1)], "w1_p"), g.node("Mul", [plain_p, g.const("w2", w2)],
                                                                                   "w2_p")], "mix")
    out = g.node("Add", [mix, g.const("w3_uniform", w3 / num_classes)], "probabilities")
    return g.finish(out)
