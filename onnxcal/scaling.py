"""The calibration maps onnxcal fits, as parameters and as their NumPy reference.

A :class:`Scaling` says which method was fitted, with which parameters, for
which kind of classifier. ``apply`` is the float64 NumPy reference of the map
from logits to calibrated logits; ``fit`` finds the parameters, ``graph``
bakes the same map into an ONNX model, ``verify`` checks the model against
``apply``.

=============  ===========  ===========================  =======================
method         kind         parameters                   calibrated probabilities
=============  ===========  ===========================  =======================
temperature    multiclass   ``temperature``: T           softmax(z / T)
temperature    binary       ``temperature``: T           sigmoid(z / T)
temperature    multilabel   ``temperature``: T or [T_k]  sigmoid(z_k / T_k)
temperature    sigmoid-l1   ``temperature``: T           L1(sigmoid(z / T))
vector         multiclass   ``w``: [w_k], ``b``: [b_k]   softmax(w * z + b)
platt          binary       ``w``: a, ``b``: b           sigmoid(a z + b)
=============  ===========  ===========================  =======================

References
----------
Guo, Pleiss, Sun, Weinberger, "On Calibration of Modern Neural Networks",
ICML 2017, sec. 4.2 (temperature and vector scaling).
Platt, "Probabilistic Outputs for Support Vector Machines and Comparisons to
Regularized Likelihood Methods", in Advances in Large Margin Classifiers,
MIT Press, 1999 (Platt scaling).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from .errors import OnnxcalError

SIGMOID_L1 = "sigmoid-l1"
"""One sigmoid per class, L1-normalised: p_k = sigmoid(z_k / T) / sum_j sigmoid(z_j / T) (``l1_sigmoid``)."""
KINDS = ("multiclass", "binary", "multilabel", SIGMOID_L1)
METHODS = ("temperature", "vector", "platt")
MULTILABEL_MODES = ("shared", "per-label")
# Which methods apply to which kind of classifier.
METHODS_FOR = {
    "multiclass": ("temperature", "vector"),
    "binary": ("temperature", "platt"),
    "multilabel": ("temperature",),
    SIGMOID_L1: ("temperature",),
}


@dataclass(frozen=True)
class Scaling:
    """A fitted calibration map.

    Attributes
    ----------
    method : str
        ``"temperature"``, ``"vector"`` or ``"platt"``.
    parameters : dict
        JSON-ready numbers: ``{"temperature": T}`` (a list of T_k for
        per-label multi-label temperatures) or ``{"w": ..., "b": ...}``
        (lists of K values for vector scaling, numbers for Platt scaling).
    kind : str
        ``"multiclass"`` (softmax), ``"binary"`` (one logit, sigmoid),
        ``"multilabel"`` (K independent sigmoids) or ``"sigmoid-l1"`` (K
        sigmoids divided by their sum; class labels, see ``l1_sigmoid``).
    """

    method: str
    parameters: dict = field(default_factory=dict)
    kind: str = "multiclass"

    @classmethod
    def of_temperature(cls, temperature, kind: str = "multiclass") -> Scaling:
        """Temperature scaling with one T (a number) or one T per label (a sequence)."""
        t = np.asarray(temperature, dtype=np.float64)
        value = float(t) if t.ndim == 0 else [float(v) for v in t]
        return cls("temperature", {"temperature": value}, kind)

    @classmethod
    def of_affine(cls, w, b, method: str, kind: str) -> Scaling:
        """Vector scaling (lists) or Platt scaling (numbers): w * z + b."""
        def plain(a):
            a = np.asarray(a, dtype=np.float64)
            return float(a) if a.ndim == 0 else [float(v) for v in a]

        return cls(method, {"w": plain(w), "b": plain(b)}, kind)

    @property
    def temperature(self) -> float | None:
        """The single T of a temperature scaling, else None."""
        t = self.parameters.get("temperature") if self.method == "temperature" else None
        return float(t) if isinstance(t, (int, float)) else None

    @property
    def activation(self) -> str:
        """``"softmax"`` for multiclass, ``"sigmoid"`` for binary and multi-label, ``"sigmoid-l1"``
        for L1-normalised sigmoids (how ``graph.fit_kind`` names the way a site is fitted)."""
        if self.kind == SIGMOID_L1:
            return SIGMOID_L1
        return "softmax" if self.kind == "multiclass" else "sigmoid"

    def arrays(self) -> dict[str, np.ndarray]:
        """The parameters as float64 arrays (0-d for a single number)."""
        return {k: np.asarray(v, dtype=np.float64) for k, v in self.parameters.items()}

    def apply(self, logits: np.ndarray) -> np.ndarray:
        """The calibrated logits, float64, class axis last (the NumPy reference).

        Examples
        --------
        >>> Scaling.of_temperature(2.0).apply(np.array([[4.0, 0.0]]))
        array([[2., 0.]])
        >>> Scaling.of_affine([1.0, 2.0], [0.5, 0.0], "vector", "multiclass").apply(np.array([[1.0, 1.0]]))
        array([[1.5, 2. ]])
        """
        z = np.asarray(logits, dtype=np.float64)
        a = self.arrays()
        if self.method == "temperature":
            return z / a["temperature"]
        return z * a["w"] + a["b"]

    def affine(self) -> tuple[np.ndarray, np.ndarray]:
        """``(w, b)`` with ``apply(z) = w * z + b``, float64: ``(1/T, 0)`` for temperature scaling.

        Every method onnxcal fits is an affine map per class on the logits;
        ``graph`` folds it into a linear layer in this form.

        Examples
        --------
        >>> Scaling.of_temperature([2.0, 4.0], "multilabel").affine()
        (array([0.5 , 0.25]), array([0., 0.]))
        """
        a = self.arrays()
        if self.method == "temperature":
            return 1.0 / a["temperature"], np.zeros_like(a["temperature"])
        return a["w"], a["b"]

    def scale(self) -> np.ndarray:
        """The multiplier of the logits: 1/T, or w (for warnings on its size)."""
        a = self.arrays()
        return 1.0 / a["temperature"] if self.method == "temperature" else a["w"]

    def to_dict(self) -> dict:
        return {"method": self.method, "kind": self.kind, "parameters": dict(self.parameters)}


def _finite_numbers(value, what: str) -> np.ndarray:
    try:
        arr = np.asarray(value, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise OnnxcalError(f"{what} {value!r} is not a number or a list of numbers") from exc
    if isinstance(value, bool) or arr.ndim > 1 or arr.size == 0 or not np.all(np.isfinite(arr)):
        raise OnnxcalError(f"{what} {value!r} is not a finite number or list of numbers")
    return arr


def check_scaling(scaling: Scaling, num_classes: int | None = None) -> Scaling:
    """Validate a scaling read from a file or given by the user.

    Raises
    ------
    OnnxcalError
        Unknown method or kind, missing or non-finite parameters, a
        temperature that is not positive, or lengths that do not match
        ``num_classes``.
    """
    if scaling.method not in METHODS:
        raise OnnxcalError(
            f"unknown calibration method {scaling.method!r}", f"use one of: {', '.join(METHODS)}"
        )
    if scaling.kind not in KINDS:
        raise OnnxcalError(f"unknown kind of classifier {scaling.kind!r}", f"use one of: {', '.join(KINDS)}")
    if scaling.method not in METHODS_FOR[scaling.kind]:
        raise OnnxcalError(f"{scaling.method} scaling does not apply to a {scaling.kind} classifier")
    names = ("temperature",) if scaling.method == "temperature" else ("w", "b")
    if sorted(scaling.parameters) != sorted(names):
        raise OnnxcalError(
            f"{scaling.method} scaling needs parameters {', '.join(names)}, "
            f"got {', '.join(sorted(scaling.parameters)) or 'none'}"
        )
    for name in names:
        arr = _finite_numbers(scaling.parameters[name], f"{scaling.method} parameter '{name}'")
        if name == "temperature" and np.any(arr <= 0):
            raise OnnxcalError(
                f"temperature {scaling.parameters[name]!r} is not a positive finite number",
                "T must be > 0 (T > 1 softens, T < 1 sharpens)",
            )
        if arr.ndim == 1 and num_classes is not None and arr.size != num_classes:
            raise OnnxcalError(
                f"{scaling.method} parameter '{name}' has {arr.size} values for "
                f"{num_classes} classes",
                "fit it on logits from this model",
            )
    if scaling.method == "vector" and np.ndim(scaling.parameters["w"]) != 1:
        raise OnnxcalError("vector scaling needs one w and one b per class (lists)")
    return scaling


def kind_of(num_classes: int, labels_ndim: int) -> str:
    """The kind of classifier from the logits' width and the labels' rank."""
    if labels_ndim == 2:
        return "multilabel"
    return "binary" if num_classes == 1 else "multiclass"


def is_far_from_one(scaling: Scaling) -> bool:
    """True when some implied temperature 1/scale is below 0.5 or above 5."""
    s = np.atleast_1d(scaling.scale())
    t = 1.0 / np.where(s > 0, s, math.nan)
    return bool(np.any((t < 0.5) | (t > 5.0)))
