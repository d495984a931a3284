"""What every calibration map of :mod:`onnxcal.maps` shares.

* :class:`MapFit`, the outcome of a solver (parameters as JSON-ready
  numbers, convergence, passes over the data, notes);
* parameter checks for values read from a file (:func:`field_array`,
  :func:`require_fields`), which name the bad field;
* row-chunked reading of the scores with a subset of rows and bootstrap
  count weights (:func:`chunks`), so a fit's temporaries stay small;
* :class:`GraphBuilder`, which collects the nodes and initializers of an
  ONNX subgraph with unique deterministic names, and :class:`Subgraph`,
  what a map's ``build`` returns; :func:`standalone_model` wraps a
  subgraph into a model of its own (tests, benchmarks).

Nothing here depends on ``onnxcal.graph``: a builder takes the name of the
input tensor (the logits, class axis last) and returns the nodes to add,
so the graph rewrite that plugs it in stays the caller's business.
"""

from __future__ import annotations

from collections.abc import Collection, Iterator, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import onnx
from onnx import helper, numpy_helper

from ..errors import OnnxcalError

# Every builder uses only operators whose signature is the same from opset 13
# on (Softmax/LogSoftmax on one axis, ReduceSum with axes as an input,
# Unsqueeze with axes as an input, LessOrEqual, GatherElements, Where).
MIN_OPSET = 13
# float64 elements per chunk of a fit's pass (4 MiB per temporary): the
# matrix maps multiply a chunk by a K x K matrix, for which larger blocks
# than metrics.iter_chunks' 512 KiB keep BLAS efficient.
CHUNK_ELEMENTS = 1 << 19
_ELEM = {
    "float16": onnx.TensorProto.FLOAT16,
    "float32": onnx.TensorProto.FLOAT,
    "float64": onnx.TensorProto.DOUBLE,
}


@dataclass(frozen=True)
class MapFit:
    """The outcome of fitting one calibration map.

    Attributes
    ----------
    method : str
        The map's name (``"matrix"``, ``"dirichlet"``, ``"beta"``, ...).
    kind : str
        ``"multiclass"`` (softmax over K logits) or ``"binary"`` (one logit).
    parameters : dict
        JSON-ready numbers (lists, floats); what the map's ``apply``,
        ``check_parameters`` and ``build`` take.
    converged : bool
        False when the solver's budget ran out.
    passes : float
        Passes over the scores the solver made.
    notes : tuple of str
        Things the user should know about this fit.
    on_bound : bool
        A parameter lies on the bound of its search (one of the notes says
        which and why).
    """

    method: str
    kind: str
    parameters: dict[str, Any]
    converged: bool = True
    passes: float = 0.0
    notes: tuple[str, ...] = ()
    on_bound: bool = False

    def to_dict(self) -> dict[str, Any]:
        return {
            "method": self.method,
            "kind": self.kind,
            "parameters": dict(self.parameters),
            "converged": self.converged,
            "passes": self.passes,
            "notes": list(self.notes),
        }


# The bounds of onnxcal.fit's temperature and Platt solvers (a test checks they
# agree): onnxcal.maps imports nothing of onnxcal but errors, so that the
# scalings, the fit and the graph can all import it.
T_MIN = 0.01
T_MAX = 100.0
B_MAX = 100.0


def softmax(z: np.ndarray, axis: int = -1) -> np.ndarray:
    """Softmax along ``axis`` in float64 (scipy.special.softmax, which subtracts the maximum)."""
    import scipy.special  # here, not at import: scipy takes ~0.5 s and inspect needs none
    return np.asarray(scipy.special.softmax(np.asarray(z, dtype=np.float64), axis=axis))


def log_softmax(z: np.ndarray, axis: int = -1) -> np.ndarray:
    """Log-softmax along ``axis`` in float64 (scipy.special.log_softmax)."""
    import scipy.special  # here, not at import: scipy takes ~0.5 s and inspect needs none
    return np.asarray(scipy.special.log_softmax(np.asarray(z, dtype=np.float64), axis=axis))


def sigmoid(z: np.ndarray) -> np.ndarray:
    """The logistic function in float64, without overflow (scipy.special.expit)."""
    import scipy.special  # here, not at import: scipy takes ~0.5 s and inspect needs none
    return np.asarray(scipy.special.expit(np.asarray(z, dtype=np.float64)))


# --------------------------------------------------------------------------
# Parameter checks (values read from a file)


def require_fields(params: Mapping[str, Any], names: Collection[str], method: str) -> None:
    """Refuse a parameter dict whose fields are not exactly ``names``."""
    if not isinstance(params, Mapping):
        raise OnnxcalError(
            f"{method} parameters must be a mapping of field names to values, got {type(params).__name__}"
        )
    if sorted(params) != sorted(names):
        raise OnnxcalError(
            f"{method} calibration needs parameters {', '.join(sorted(names))}, "
            f"got {', '.join(sorted(map(str, params))) or 'none'}"
        )


def field_array(params: Mapping[str, Any], name: str, method: str, *, ndim: int,
                shape: tuple[Any, ...] | None = None) -> np.ndarray:
    """The field ``name`` as a finite float64 array of rank ``ndim`` (and ``shape``).

    ``shape`` may hold None for a dimension of any size.

    Raises
    ------
    OnnxcalError
        Naming the field: not numbers, not finite, wrong rank or size.
    """
    value = params[name]
    what = f"{method} parameter '{name}'"
    if isinstance(value, (bool, str, bytes)) or value is None:
        raise OnnxcalError(f"{what} must be numbers, got {type(value).__name__}")
    try:
        arr = np.asarray(value, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise OnnxcalError(f"{what} is not a {'number' if ndim == 0 else f'{ndim}-d array of numbers'}") from exc
    if arr.ndim != ndim:
        want = "a number" if ndim == 0 else ("a list of numbers" if ndim == 1 else "a list of lists of numbers")
        raise OnnxcalError(f"{what} must be {want}, got an array of rank {arr.ndim}")
    if not np.all(np.isfinite(arr)):
        raise OnnxcalError(f"{what} holds values that are not finite numbers")
    if shape is not None and any(w is not None and w != s for w, s in zip(shape, arr.shape, strict=False)):
        want_shape = " x ".join("any" if w is None else str(w) for w in shape)
        raise OnnxcalError(
            f"{what} has shape {' x '.join(map(str, arr.shape))}, expected {want_shape}",
            "fit it on scores from this model",
        )
    return arr


def check_kind(kind: str, allowed: Collection[str], method: str) -> None:
    if kind not in allowed:
        raise OnnxcalError(f"{method} calibration does not apply to a {kind} classifier",
                           f"use it on: {', '.join(allowed)}")


def plain(a: np.ndarray | float) -> float | list[Any]:
    """A float64 array as JSON-ready Python numbers (nested lists)."""
    arr = np.asarray(a, dtype=np.float64)
    return float(arr) if arr.ndim == 0 else arr.tolist()


# --------------------------------------------------------------------------
# Reading scores in chunks


def chunks(
    scores: np.ndarray,
    labels: np.ndarray,
    rows: np.ndarray | None = None,
    weights: np.ndarray | None = None,
    elements: int = CHUNK_ELEMENTS,
) -> Iterator[tuple[np.ndarray, np.ndarray, np.ndarray | None]]:
    """Yield ``(z, y, w)`` row chunks: scores as float64, labels, weights or None.

    As :func:`onnxcal.metrics.iter_chunks`, with the chunk size in elements
    as a parameter. ``rows`` (sorted indices) selects a subset without a
    copy of it; ``weights`` has one entry per selected row. A chunk of
    float64 scores without ``rows`` is a view of the caller's array: never
    change it in place.
    """
    total = len(scores) if rows is None else len(rows)
    step = max(1, elements // max(1, scores.shape[1]))
    for start in range(0, total, step):
        pick = slice(start, start + step) if rows is None else rows[start : start + step]
        z = np.asarray(scores[pick], dtype=np.float64)
        y = np.asarray(labels[pick])
        w = None if weights is None else np.asarray(weights[start : start + step], dtype=np.float64)
        yield z, y, w


def wsum(x: np.ndarray, w: np.ndarray | None) -> np.ndarray:
    """Sum over rows (axis 0), weighted by ``w`` when given."""
    return x.sum(axis=0) if w is None else np.tensordot(w, x, axes=([0], [0]))


def total_weight(n_rows: int, weights: np.ndarray | None) -> float:
    return float(n_rows) if weights is None else float(np.sum(weights))


def binary_targets(y: np.ndarray) -> np.ndarray:
    """0/1 labels of a one-logit classifier as a float64 vector."""
    return np.asarray(y, dtype=np.float64).reshape(len(y))


# --------------------------------------------------------------------------
# ONNX subgraphs


@dataclass(frozen=True)
class Subgraph:
    """Nodes and initializers that turn one tensor into calibrated probabilities.

    Attributes
    ----------
    input : str
        The tensor it reads (the logits, N x K, class axis last).
    output : str
        The tensor it produces (N x K, the input's dtype).
    nodes : tuple of onnx.NodeProto
        In topological order; they read only ``input`` and the initializers.
    initializers : tuple of onnx.TensorProto
    min_opset : int
        The lowest default-domain opset the nodes are valid in.
    """

    input: str
    output: str
    nodes: tuple[onnx.NodeProto, ...]
    initializers: tuple[onnx.TensorProto, ...]
    min_opset: int = MIN_OPSET
    names: frozenset[str] = field(default_factory=frozenset)


class GraphBuilder:
    """Collects the nodes of a subgraph with unique, deterministic names.

    Parameters
    ----------
    x : str
        The input tensor's name.
    dtype : str
        Its element type: ``"float16"``, ``"float32"`` or ``"float64"``.
    prefix : str
        Every new name starts with it (``onnxcal_matrix_...``).
    taken : collection of str
        Names already used in the host graph (nodes, tensors); new names
        avoid them with a numeric suffix.
    compute_dtype : str, optional
        The dtype the map runs in; float16 input is computed in float32 by
        default (Casts in and out), others in their own dtype.
    """

    def __init__(
        self, x: str, dtype: str, prefix: str, taken: Collection[str] = (), compute_dtype: str | None = None
    ) -> None:
        if dtype not in _ELEM:
            raise OnnxcalError(f"unsupported dtype {dtype!r} for a calibration subgraph",
                               f"use one of: {', '.join(_ELEM)}")
        self.input = x
        self.dtype = dtype
        self.compute = compute_dtype or ("float32" if dtype == "float16" else dtype)
        if self.compute not in _ELEM:
            raise OnnxcalError(f"unsupported compute dtype {self.compute!r}", f"use one of: {', '.join(_ELEM)}")
        self.prefix = prefix
        self.taken = set(taken)
        self.new: set[str] = set()
        self.nodes: list[onnx.NodeProto] = []
        self.initializers: list[onnx.TensorProto] = []

    def name(self, base: str) -> str:
        candidate, i = f"{self.prefix}_{base}", 1
        while candidate in self.taken or candidate in self.new:
            candidate = f"{self.prefix}_{base}_{i}"
            i += 1
        self.new.add(candidate)
        return candidate

    def const(self, base: str, value: np.ndarray | float, dtype: str | None = None) -> str:
        """An initializer in the compute dtype (or ``dtype``: e.g. ``"int64"``)."""
        arr = np.asarray(value, dtype=np.dtype(dtype or self.compute))
        tensor = numpy_helper.from_array(arr, self.name(base))
        self.initializers.append(tensor)
        return tensor.name

    def node(self, op: str, inputs: list[str], base: str, **attrs: Any) -> str:
        out = self.name(base)
        self.nodes.append(helper.make_node(op, inputs, [out], name=self.name(f"{op.lower()}"), **attrs))
        return out

    def start(self) -> str:
        """The input in the compute dtype (a Cast when it differs)."""
        if self.compute == self.dtype:
            return self.input
        return self.node("Cast", [self.input], f"input_{self.compute}", to=_ELEM[self.compute])

    def finish(self, y: str) -> Subgraph:
        """Cast ``y`` back to the input's dtype and freeze the subgraph."""
        if self.compute != self.dtype:
            y = self.node("Cast", [y], f"output_{self.dtype}", to=_ELEM[self.dtype])
        return Subgraph(
            input=self.input,
            output=y,
            nodes=tuple(self.nodes),
            initializers=tuple(self.initializers),
            names=frozenset(self.new),
        )

    # Small reusable pieces -------------------------------------------------

    def softplus(self, z: str) -> str:
        """softplus(z) = max(z, 0) + log(1 + exp(-|z|)), finite for every finite z.

        ONNX's Softplus is defined as log(exp(x) + 1) (ONNX operator
        specification, Softplus); a runtime that computes it as written
        overflows for x above ~88 in float32, so it is spelled out here.
        """
        e = self.node("Exp", [self.node("Neg", [self.node("Abs", [z], "abs")], "neg_abs")], "exp_neg_abs")
        log1p = self.node("Log", [self.node("Add", [e, self.const("one", 1.0)], "one_plus")], "log1p")
        return self.node("Add", [self.node("Relu", [z], "relu"), log1p], "softplus")

    def log_softmax(self, z: str) -> str:
        """z - max(z) - log(sum(exp(z - max(z)))) along the last axis.

        Spelled out rather than LogSoftmax, which onnx's ReferenceEvaluator
        computes as log(softmax(z)) (-inf once a probability underflows); the
        row maximum comes from ArgMax + GatherElements, whose signatures are
        the same at every opset from 13 on (ReduceMax's axes moved from an
        attribute to an input at opset 18).
        """
        top, indices = self.name("row_max"), self.name("row_argmax")
        k = self.const("top_k", np.array([1]), "int64")
        self.nodes.append(helper.make_node("TopK", [z, k], [top, indices], name=self.name("topk"), axis=-1))
        shifted = self.node("Sub", [z, top], "shifted")
        axes = self.const("axes_lse", np.array([-1]), "int64")
        total = self.node("ReduceSum", [self.node("Exp", [shifted], "exp_shifted"), axes], "sum_exp", keepdims=1)
        return self.node("Sub", [shifted, self.node("Log", [total], "log_sum_exp")], "log_probabilities")

    def renormalise(self, q: str, num_classes: int) -> str:
        """q / sum_k q_k along the last axis; a row of zeros becomes uniform 1/K.

        The uniform fallback is what scikit-learn's ``CalibratedClassifierCV``
        does for rows where every one-vs-rest calibrator gives 0
        (sklearn/calibration.py, ``_CalibratedClassifier.predict_proba``).
        """
        axes = self.const("axes_last", np.array([-1]), "int64")
        total = self.node("ReduceSum", [q, axes], "row_sum", keepdims=1)
        ratio = self.node("Div", [q, total], "normalised")
        zero = self.node("Equal", [total, self.const("zero", 0.0)], "row_is_zero")
        return self.node("Where", [zero, self.const("uniform", 1.0 / num_classes), ratio], "renormalised")


def standalone_model(sub: Subgraph, dtype: str, num_classes: int, opset: int = 17) -> onnx.ModelProto:
    """A model made of the subgraph alone: logits (N x K) in, its output out.

    For tests and benchmarks; checked with ``onnx.checker`` (full check).
    """
    elem = _ELEM[dtype]
    graph = helper.make_graph(
        list(sub.nodes),
        "calibration_map",
        [helper.make_tensor_value_info(sub.input, elem, ["N", num_classes])],
        [helper.make_tensor_value_info(sub.output, elem, ["N", num_classes])],
        initializer=list(sub.initializers),
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", opset)])
    model.ir_version = helper.find_min_ir_version_for([helper.make_opsetid("", opset)])
    onnx.checker.check_model(model, full_check=True)
    return model
