"""Calibration maps beyond temperature, vector and Platt scaling.

One module per method; each exposes the same functions:

* ``apply(params, scores) -> probabilities``: the float64 NumPy reference,
  from the logits (N x K; N x 1 for a one-logit model) to calibrated
  probabilities of the same shape;
* ``fit(scores, labels, *, rows=None, weights=None, l2=..., ...) -> MapFit``:
  the solver, on a subset of rows and with bootstrap count weights;
* ``check_parameters(params, num_classes=None, kind=...) -> dict``: checks
  values read from a file, naming the bad field (``OnnxcalError``);
* ``build(x, dtype, num_classes, params, *, taken=(), compute_dtype=None)
  -> Subgraph``: the ONNX nodes and initializers (standard operators, opset
  >= 13) that compute the map from the tensor ``x``;
* ``METHOD``, ``KINDS``, ``n_parameters(num_classes, params=None)`` (the
  lookups need ``params``: their size comes from the fit).

==========================  ===========  ==========================================  ============
method                      kinds        calibrated probabilities                    keeps argmax
==========================  ===========  ==========================================  ============
``matrix``                  multiclass   softmax(W z + b)                            no
``dirichlet``               multiclass   softmax(W log softmax(z) + b)               no
``beta``                    binary       sigmoid(a ln p - b ln(1 - p) + c)           no (order yes)
``isotonic``                both         g_k(p_k) / sum_j g_j(p_j), g_k isotonic     no
``histogram``               both         h_k(p_k) / sum_j h_j(p_j), h_k binned       no
``ensemble-temperature``    multiclass   w1 softmax(z/T) + w2 softmax(z) + w3 / K    yes
``ovr-platt``               both         s_k / sum_j s_j, s_k = sigmoid(a_k z_k+b_k)  no
==========================  ===========  ==========================================  ============

``docs/maths.md`` gives each method's maths and published source.
"""

from __future__ import annotations

from types import ModuleType
from typing import Any

import numpy as np

from ..errors import OnnxcalError
from . import beta, dirichlet, ensemble, histogram, isotonic, matrix, ovr_platt
from ._base import MapFit, Subgraph, standalone_model

MODULES: dict[str, ModuleType] = {
    m.METHOD: m for m in (matrix, dirichlet, beta, isotonic, histogram, ensemble, ovr_platt)
}
METHODS = tuple(MODULES)
METHODS_FOR = {
    kind: tuple(name for name, m in MODULES.items() if kind in m.KINDS) for kind in ("multiclass", "binary")
}
# Whether the map keeps every row's argmax (multiclass) / 0.5 decision (binary).
KEEPS_DECISIONS = {name: name == "ensemble-temperature" for name in MODULES}
# Maps whose output is piecewise constant or flat in places (ties, changed ranking).
LOOKUP_METHODS = ("isotonic", "histogram")


_FORMULA = {
    "matrix": "softmax(W z + b)",
    "dirichlet": "softmax(W log softmax(z) + b)",
    "beta": "sigmoid(a ln p - b ln(1 - p) + c)",
    "isotonic": "isotonic lookup of each class's probability, renormalised",
    "histogram": "histogram binning of each class's probability, renormalised",
    "ensemble-temperature": "w1 softmax(z / T) + w2 softmax(z) + w3 / K",
    "ovr-platt": "one-vs-rest sigmoid(a_k z_k + b_k), renormalised",
}


def describe(method: str, params: dict[str, Any]) -> str:
    """One line naming a fitted map and its parameters (CLI, report).

    Examples
    --------
    >>> describe("beta", {"a": 1.5, "b": 0.5, "c": 0.25})
    'beta calibration, sigmoid(a ln p - b ln(1 - p) + c): a = 1.5000, b = 0.5000, c = 0.2500'
    """
    head = f"{method} calibration, {_FORMULA[method]}"
    if method in ("matrix", "dirichlet"):
        w = np.asarray(params["W"], dtype=np.float64)
        off = w[~np.eye(len(w), dtype=bool)]
        return (f"{head}: {len(w)} x {len(w)} W, diagonal from {np.diag(w).min():.4f} to {np.diag(w).max():.4f}, "
                f"largest off-diagonal |W_jk| {np.abs(off).max() if off.size else 0.0:.4f}")
    if method == "beta":
        return f"{head}: a = {params['a']:.4f}, b = {params['b']:.4f}, c = {params['c']:.4f}"
    if method == "ensemble-temperature":
        w1, w2, w3 = params["weights"]
        return f"{head}: T = {params['temperature']:.4f}, w = ({w1:.4f}, {w2:.4f}, {w3:.4f})"
    if method == "ovr-platt":
        a = np.asarray(params["a"], dtype=np.float64)
        return f"{head}: {a.size} classes, a from {a.min():.4f} to {a.max():.4f}"
    table = params["x"] if method == "isotonic" else params["values"]
    sizes = [len(t) for t in table]
    what = "knots" if method == "isotonic" else "bins"
    return f"{head}: {len(sizes)} table{'s' if len(sizes) > 1 else ''} of {min(sizes)} to {max(sizes)} {what}"


def module(method: str) -> ModuleType:
    """The module of a method name.

    Raises
    ------
    OnnxcalError
        An unknown name, with the known ones.
    """
    try:
        return MODULES[method]
    except KeyError:
        raise OnnxcalError(f"unknown calibration method {method!r}", f"use one of: {', '.join(METHODS)}") from None


__all__ = [
    "METHODS", "METHODS_FOR", "MODULES", "KEEPS_DECISIONS", "LOOKUP_METHODS", "MapFit", "Subgraph", "describe",
    "module", "standalone_model",
]
