"""Isotonic regression of each class's probability, one-vs-rest, renormalised.

Zadrozny & Elkan, "Transforming classifier scores into accurate multiclass
probability estimates", KDD 2002: the calibrated probability is a
non-decreasing function g of the score, fitted by the pool-adjacent-
violators algorithm (PAV; Ayer, Brunk, Ewing, Reid, Silverman, Annals of
Mathematical Statistics 26(4), 1955), and multiclass problems are reduced to
one binary problem per class whose outputs are then normalised (sec. 5).

**Objective.** Not the NLL of the calibrated distribution. For each class,
g minimises the weighted squared error sum_i w_i (g(p_ik) - [y_i = k])^2
over non-decreasing functions (Zadrozny & Elkan 2002, sec. 3). The same PAV
solution also minimises the Bernoulli NLL over non-decreasing functions
(Robertson, Wright, Dykstra, *Order Restricted Statistical Inference*,
Wiley 1988, ch. 1: the isotonic solution minimises every Bregman loss; from
memory); the linear interpolation between knots and the renormalisation
over classes are not part of any objective.

**Map.** As scikit-learn's ``IsotonicRegression(out_of_bounds="clip")``:
the fitted values at the distinct training probabilities (after averaging
ties), knots kept where the value changes (both ends of each flat run),
linear interpolation between knots, constant beyond the first and last
knot. onnxcal applies it to the probability p_k = softmax(z)_k (one logit:
sigmoid(z)), not to the logit, so the table spans [0, 1] in every model.

**Decisions.** g is flat on every pooled block, so rows with different
scores get the same value (ties), and the per-class maps differ, so the
ranking of the classes within a row can change: isotonic calibration can
change the argmax and the 0.5 decisions (the tests build such a case).

Parameters (JSON): ``{"x": [[knots of class k] for k], "y": [[values] for k]}``,
x strictly increasing in [0, 1], y non-decreasing in [0, 1], one list per
class (one list for a one-logit model). Graph: see :mod:`onnxcal.maps._lookup`.
"""

from __future__ import annotations

from collections.abc import Collection
from typing import Any

import numpy as np

from ..errors import OnnxcalError
from . import _lookup
from ._base import GraphBuilder, MapFit, Subgraph

METHOD = "isotonic"
KINDS = _lookup.KINDS
TIE_RESOLUTION = float(np.finfo(np.float64).resolution)


def n_parameters(num_classes: int, params: dict[str, Any] | None = None) -> int:
    """Knots and values over all classes (the fit decides how many: ``params`` is needed)."""
    if params is None:
        raise ValueError("an isotonic map's size depends on its fit: pass params")
    return sum(2 * len(x) for x in params["x"])


def knots(p: np.ndarray, t: np.ndarray, w: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The knots (x, y) of the isotonic fit of targets t on probabilities p, weights w.

    Ties in p are merged first (weighted mean of t, summed weight), PAV runs
    on the distinct values (``scipy.optimize.isotonic_regression``), and only
    the ends of each flat run are kept, as scikit-learn's ``IsotonicRegression``
    does (``_build_y``).

    Examples
    --------
    >>> x, y = knots(np.array([0.1, 0.2, 0.3, 0.4]), np.array([0.0, 1.0, 0.0, 1.0]), np.ones(4))
    >>> x.tolist(), y.tolist()
    ([0.1, 0.2, 0.3, 0.4], [0.0, 0.5, 0.5, 1.0])
    """
    import scipy.optimize  # here, not at import: scipy takes ~0.5 s and inspect needs none
    order = np.argsort(p, kind="stable")
    p, t, w = p[order], t[order], w[order]
    # Ties: values closer than float64's resolution (1e-15) to the previous
    # one are one value, as scikit-learn's _make_unique merges them; two
    # softmax outputs of equal logits can differ in the last bit.
    first = np.flatnonzero(np.concatenate([[True], np.diff(p) >= TIE_RESOLUTION]))
    u = p[first]
    ws = np.add.reduceat(w, first)
    ts = np.add.reduceat(w * t, first) / ws
    fitted = scipy.optimize.isotonic_regression(ts, weights=ws, increasing=True).x
    fitted = np.clip(fitted, 0.0, 1.0)
    keep = np.ones(len(u), dtype=bool)
    if len(u) > 2:
        keep[1:-1] = (fitted[1:-1] != fitted[:-2]) | (fitted[1:-1] != fitted[2:])
    return u[keep], fitted[keep]


def calibrate_columns(params: dict[str, Any], p: np.ndarray) -> np.ndarray:
    """Each column's isotonic map, before renormalisation (float64)."""
    q = np.empty_like(p)
    for k, (x, y) in enumerate(zip(params["x"], params["y"], strict=True)):
        q[:, k] = np.interp(p[:, k], np.asarray(x, dtype=np.float64), np.asarray(y, dtype=np.float64))
    return q


def apply(params: dict[str, Any], scores: np.ndarray) -> np.ndarray:
    """Calibrated probabilities, float64 (the NumPy reference).

    ``scores`` are logits, N x K (softmax) or N x 1 (sigmoid); the result
    has the same shape.

    Examples
    --------
    >>> params = {"x": [[0.2, 0.8]], "y": [[0.1, 0.7]]}
    >>> apply(params, np.log(np.array([[0.1 / 0.9], [1.0], [9.0]]))).round(6).ravel().tolist()
    [0.1, 0.4, 0.7]
    """
    p = _lookup.probabilities(scores)
    return _lookup.renormalise(calibrate_columns(params, p))


def check_parameters(params: dict[str, Any], num_classes: int | None = None, kind: str | None = None) -> dict[str, Any]:
    """Validate parameters read from a file; returns them as plain numbers.

    Raises
    ------
    OnnxcalError
        Naming the field: missing or extra fields, not one list per class,
        values outside [0, 1] or not finite, x not strictly increasing, y
        decreasing, x and y of different lengths.
    """
    xs, ys = _lookup.check_tables(params, ("x", "y"), num_classes, METHOD, kind)
    if len(xs) != len(ys):
        raise OnnxcalError(f"isotonic parameters 'x' and 'y' have {len(xs)} and {len(ys)} per-class lists")
    for k, (x, y) in enumerate(zip(xs, ys, strict=True)):
        if len(x) != len(y):
            raise OnnxcalError(f"isotonic parameters 'x[{k}]' and 'y[{k}]' have {len(x)} and {len(y)} values")
        _lookup.strictly_increasing(x, f"x[{k}]", METHOD)
        if np.any(np.diff(y) < 0):
            raise OnnxcalError(f"isotonic parameter 'y[{k}]' decreases; an isotonic map is non-decreasing")
    return {"x": _lookup.as_lists(xs), "y": _lookup.as_lists(ys)}


def fit(
    scores: np.ndarray,
    labels: np.ndarray,
    *,
    rows: np.ndarray | None = None,
    weights: np.ndarray | None = None,
    l2: float = 0.0,
) -> MapFit:
    """Fit one isotonic map per class (one for a one-logit model).

    Parameters
    ----------
    scores : ndarray of shape (n, K)
        Logits; K = 1 for a one-logit binary model.
    labels : ndarray of shape (n,)
        Class indices (K > 1) or 0/1 (K = 1).
    rows, weights
        A subset of rows and bootstrap count weights (rows of weight 0 are
        left out; a weight w counts a row w times).
    l2 : float
        Unused (isotonic regression has no penalty); accepted so every
        solver takes the same arguments.

    References
    ----------
    Zadrozny & Elkan, KDD 2002, sec. 3 (PAV) and 5 (one-vs-rest).
    """
    del l2
    per_class, passes = _lookup.fit_per_class(scores, labels, rows, weights, knots)
    xs, ys = [t[0] for t in per_class], [t[1] for t in per_class]
    notes = []
    sizes = [len(x) for x in xs]
    if max(sizes) > 512:
        notes.append(
            f"isotonic maps with up to {max(sizes)} knots per class: the graph compares every probability "
            "with each of them; a lookup this fine suggests few ties in the scores, and overfits small sets"
        )
    kind = _lookup.kind_of_scores(scores.shape[1])
    params = {"x": _lookup.as_lists(xs), "y": _lookup.as_lists(ys)}
    return MapFit(METHOD, kind, params, True, float(passes), tuple(notes))


def tables(params: dict[str, Any]) -> dict[str, np.ndarray]:
    """The padded lookup tables the graph holds: thresholds K x M, base_x, base_y, slope K x (M + 1).

    Segment j = #{m : x_m <= p}: j = 0 is below the first knot (value y_0),
    1 <= j < m interpolates from knot j - 1 to knot j, j = m is at or above
    the last knot (value y_{m-1}).
    """
    xs = [np.asarray(x, dtype=np.float64) for x in params["x"]]
    ys = [np.asarray(y, dtype=np.float64) for y in params["y"]]
    width = max(len(x) for x in xs)
    base_x = np.zeros((len(xs), width + 1))
    base_y = np.zeros((len(xs), width + 1))
    slope = np.zeros((len(xs), width + 1))
    for k, (x, y) in enumerate(zip(xs, ys, strict=True)):
        m = len(x)
        base_x[k, 0], base_y[k, 0] = x[0], y[0]
        base_x[k, 1:m], base_y[k, 1:m] = x[:-1], y[:-1]
        slope[k, 1:m] = np.diff(y) / np.diff(x)
        base_x[k, m:], base_y[k, m:] = x[-1], y[-1]
    return {"thresholds": _lookup.padded(xs, width, _lookup.PAD), "base_x": base_x, "base_y": base_y, "slope": slope}


def build(
    x: str,
    dtype: str,
    num_classes: int,
    params: dict[str, Any],
    *,
    taken: Collection[str] = (),
    compute_dtype: str | None = None,
) -> Subgraph:
    """ONNX nodes computing the calibrated probabilities from the logits ``x`` (N x K).

    Softmax (Sigmoid for one logit), the segment index by LessOrEqual against
    the padded knots, Cast, ReduceSum, three Gathers, Sub/Mul/Add, then the
    renormalisation (ReduceSum, Div, Equal, Where) for K > 1. Cost per row:
    K x M comparisons, M the most knots of any class. Opset >= 13.

    Runs in float64 by default (Casts in and out), whatever the input's
    dtype: a steep segment (slope s, up to 1e4 and more where two knots
    are close) turns a rounding error e of p into an error s e of the
    output, about s x 1e-7 in float32 (measured 1e-3 with onnxruntime's
    float32 Sigmoid). ``compute_dtype="float32"`` trades that for speed.
    """
    params = check_parameters(params, num_classes)
    t = tables(params)
    g = GraphBuilder(x, dtype, f"onnxcal_{METHOD}", taken, compute_dtype or _lookup.COMPUTE_DTYPE)
    p = _lookup.start_probabilities(g, num_classes)
    index = _lookup.segment_index(g, p, t["thresholds"], inclusive=True)
    x0 = _lookup.gather(g, t["base_x"], index, "base_x")
    y0 = _lookup.gather(g, t["base_y"], index, "base_y")
    s = _lookup.gather(g, t["slope"], index, "slope")
    q = g.node("Add", [y0, g.node("Mul", [s, g.node("Sub", [p, x0], "dp")], "rise")], "calibrated")
    return _lookup.finish(g, q, num_classes)
