"""The spellings of an activation the score finder recognises, one pattern each.

Each ``Spelling`` describes, with the matcher of ``match``, the subgraph
that turns the logits ``z`` into the tensor reached from the output, and
says what the result means (``activation``), how the logits are obtained
(``logits_from``) and over which axis of z the classes lie (``axis``). The
finder tries them in the order of ``SPELLINGS`` at every tensor it walks
back through; adding an exporter's spelling is one entry here plus one
fixture. Operator semantics: the ONNX operator specification
(https://onnx.ai/onnx/operators/), its ai.onnx.ml operators, and the
com.microsoft contrib operators of onnxruntime (``QLinearSoftmax``).

``logits_from``:

* ``"tensor"``: z is a tensor of the graph; the scaling is inserted where
  the pattern reads z (every (node, input) reading it);
* ``"log"``: z = log(max(p, tiny)) of probabilities p (softmax(log p) = p);
* ``"raw-scores"``: z from a copy of an ai.onnx.ml classifier whose
  ``post_transform`` is NONE (its scores before the SOFTMAX or LOGISTIC);
* ``"dequantized"``: z = DequantizeLinear of a quantized input (QLinearSoftmax).

A Sigmoid whose values are then L1-normalised (``Div`` by their
``ReduceSum``/``ReduceL1``, or an ai.onnx.ml ``Normalizer(norm="L1")``) is
the ``sigmoid`` spelling followed by a ``post.Normalize`` step (``passes``):
the scaling goes in before the Sigmoid, p = L1(sigmoid(z / T)).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, cast

import numpy as np
import onnx

from ..errors import OnnxcalError
from .match import Const, Found, Pattern, Var, View, either, match, op
from .post import PostOp, Quantize
from .tensors import ML_DOMAIN, _attr

MS_DOMAIN = "com.microsoft"
ML_CLASSIFIERS = ("LinearClassifier", "TreeEnsembleClassifier", "SVMClassifier")
# post_transform values whose raw scores are logits of the probabilities (ONNX-ML spec).
RAW_TRANSFORMS = ("SOFTMAX", "LOGISTIC")

z = Var("z")


def reduced(op_type: str | tuple[str, ...], x: Pattern, name: str) -> Pattern:
    """``op_type(x)`` over some axes, with keepdims=1, or keepdims=0 and the axis put back
    (``Unsqueeze`` or ``Reshape``), either maybe broadcast back (``Expand``)."""
    r = op(op_type, x, name=name)
    kept = either(r, op(("Unsqueeze", "Reshape"), r))
    return either(kept, op("Expand", kept))


def reduce_axes(view: View, index: int) -> list[int] | None:
    """The axes a Reduce* node reduces: its ``axes`` input (ReduceSum from opset 13, the
    others from 18) or attribute; None when it reduces every axis."""
    node = view.node(index)
    if len(node.input) > 1 and node.input[1]:
        value = view.constant(node.input[1])
        return None if value is None or value.size == 0 else [int(a) for a in value.reshape(-1)]
    axes = _attr(node, "axes", None)
    return [int(a) for a in axes] if axes else None


def keepdims(view: View, index: int) -> bool:
    return bool(_attr(view.node(index), "keepdims", 1))


def z_rank(found: Found, view: View) -> int | None:
    shape = view.shapes.shape(found.tensors["z"])
    return len(shape) if shape is not None else None


@dataclass(frozen=True)
class Spelling:
    """One way of writing an activation, and what it means.

    ``axis(found, view, rank)`` gives the class axis of z (rank ``rank``,
    None when unknown), or raises ``OnnxcalError`` when the classes are not
    a single axis; ``check(found, view)`` rejects a match whose attributes
    do not fit; ``post(found, view)`` lists post-processing the spelling
    itself implies (a quantized output).
    """

    name: str
    words: str
    operators: str
    pattern: Pattern
    activation: str
    axis: Callable[[Found, View, int | None], int]
    logits_from: str = "tensor"
    check: Callable[[Found, View], bool] = lambda found, view: True
    post: Callable[[Found, View], tuple[PostOp, ...]] = lambda found, view: ()


def _in_range(axis: int, rank: int | None, view: View) -> int:
    if rank is None:
        return axis if axis >= 0 else axis + 2  # unknown rank: N x K (common practice)
    if not -rank <= axis < rank:
        raise OnnxcalError(
            f"class axis {axis} is out of range for output '{view.output}' of rank {rank}",
            "check the model's Softmax axis",
        )
    return axis % rank


def _softmax_axis(found: Found, view: View, rank: int | None) -> int:
    node = view.node(found.nodes["act"])
    opset = int(_attr(node, "opset", view.opset)) if node.op_type == "QLinearSoftmax" else view.opset
    axis = _in_range(int(_attr(node, "axis", -1 if opset >= 13 else 1)), rank, view)
    shape = view.shapes.shape(node.input[0])
    trailing = shape[axis + 1 :] if shape is not None else ((None,) * (rank - axis - 1) if rank else ())
    if opset < 13 and any(d != 1 for d in trailing):
        # Softmax-1/11 coerce the input to 2-D around `axis` (ONNX operator spec,
        # Softmax changelog): they normalise over axes axis..rank-1 jointly.
        raise OnnxcalError(
            f"the {node.op_type} '{node.name or node.output[0]}' (opset {opset}, axis {axis}, rank {rank}) "
            f"normalises over axes {axis}..{(rank or axis + 2) - 1} jointly, not per class",
            "onnxcal cannot calibrate this as class probabilities; "
            "re-export the model with the Softmax on the class axis",
        )
    return axis


def _sigmoid_axis(found: Found, view: View, rank: int | None) -> int:
    return 1 if rank is None or rank >= 2 else 0  # N x K (x H x W) layouts, common practice


def _reduced_axis(*names: str) -> Callable[[Found, View, int | None], int]:
    """The one axis the bound reductions ``names`` (those present) all reduce."""

    def axis(found: Found, view: View, rank: int | None) -> int:
        seen = set()
        for name in names:
            if name in found.nodes:
                axes = reduce_axes(view, found.nodes[name])
                if axes is None or len(axes) != 1:
                    raise OnnxcalError(
                        f"the {view.node(found.nodes[name]).op_type} of a written-out softmax reduces "
                        f"{'every axis' if axes is None else f'axes {axes}'}, not one class axis",
                        "choose an output whose softmax runs over one axis (--output)",
                    )
                seen.add(_in_range(axes[0], rank, view))
        if len(seen) != 1:
            raise OnnxcalError(
                f"the reductions of a written-out softmax run over different axes ({sorted(seen)})",
                "choose an output whose softmax runs over one axis (--output)",
            )
        return seen.pop()

    return axis


def _one_axis_reductions(*names: str) -> Callable[[Found, View], bool]:
    """The reductions ``names`` that are present keep a single axis (so the match is a softmax)."""

    def check(found: Found, view: View) -> bool:
        for name in names:
            if name in found.nodes:
                axes = reduce_axes(view, found.nodes[name])
                if axes is None or len(axes) != 1:
                    return False
        return True

    return check


def _quantized_output(found: Found, view: View) -> tuple[PostOp, ...]:
    scale = found.constants["y_scale"]
    zero = found.constants.get("y_zero")
    return (_quantize(scale, zero),)


def _quantize(scale: np.ndarray | None, zero: np.ndarray | None) -> Quantize:
    dtype = "uint8" if zero is None else zero.dtype.name
    z0 = 0 if zero is None else int(np.asarray(zero).reshape(-1)[0])
    return Quantize(float(np.asarray(scale).reshape(-1)[0]), z0, dtype)


def _per_tensor(*names: str) -> Callable[[Found, View], bool]:
    """The bound constants ``names`` (those present) each hold a single value: per-tensor quantization."""

    def check(found: Found, view: View) -> bool:
        return all(np.asarray(found.constants[n]).size == 1 for n in names if found.constants.get(n) is not None)

    return check


def _ml_axis(found: Found, view: View, rank: int | None) -> int:
    return 1


def ml_transform(node: onnx.NodeProto) -> str:
    """An ai.onnx.ml classifier's ``post_transform`` (NONE by default, ONNX-ML spec)."""
    value: Any = _attr(node, "post_transform", b"NONE")
    return value.decode() if isinstance(value, bytes) else str(value)


# -- the spellings ------------------------------------------------------------

_shift = either(op("Sub", z, reduced("ReduceMax", z, "max")), z)  # z - max(z), or z itself
_exp = op("Exp", _shift)
_sum = reduced("ReduceSum", _exp, "sum")
_log_sum = either(
    reduced("ReduceLogSumExp", _shift, "lse"),
    op("Log", reduced("ReduceSum", op("Exp", _shift), "sum")),
)
_sigmoid = op("Sigmoid", z, name="act")

SPELLINGS: tuple[Spelling, ...] = (
    Spelling(
        "softmax", "Softmax", "Softmax",
        op("Softmax", z, name="act"), "softmax", _softmax_axis,
    ),
    Spelling(
        "log-softmax", "LogSoftmax", "LogSoftmax",
        op("LogSoftmax", z, name="act"), "logsoftmax", _softmax_axis,
    ),
    Spelling(
        "sigmoid", "Sigmoid", "Sigmoid",
        _sigmoid, "sigmoid", _sigmoid_axis,
    ),
    Spelling(
        "softmax-written-out", "Softmax written out (Exp over its ReduceSum)",
        "Exp, ReduceSum, Div or Mul + Reciprocal, optionally Sub + ReduceMax, Unsqueeze/Reshape/Expand",
        either(op("Div", _exp, _sum), op("Mul", _exp, op("Reciprocal", _sum), commutative=True)),
        "softmax", _reduced_axis("sum", "max"), check=_one_axis_reductions("sum", "max"),
    ),
    Spelling(
        "log-softmax-written-out", "log-softmax written out (z minus its log-sum-exp)",
        "Sub, ReduceLogSumExp or Log + ReduceSum + Exp, optionally ReduceMax",
        either(
            op("Sub", _shift, _log_sum),
            op("Sub", z, op("Add", reduced("ReduceMax", z, "max"), op("Log", reduced("ReduceSum", _exp, "sum")),
                            commutative=True)),
        ),
        "logsoftmax", _reduced_axis("sum", "lse", "max"), check=_one_axis_reductions("sum", "lse", "max"),
    ),
    Spelling(
        "qlinear-softmax", "QLinearSoftmax (com.microsoft) on a quantized input, then DequantizeLinear",
        "com.microsoft QLinearSoftmax, DequantizeLinear",
        op(
            "DequantizeLinear",
            op("QLinearSoftmax", Var("x_q"), Const("x_scale"), Const("x_zero", optional=True),
               Const("y_scale"), Const("y_zero", optional=True), domain=MS_DOMAIN, name="act"),
            Const("y_scale_out"), Const("y_zero_out", optional=True),
        ),
        "softmax", _softmax_axis, logits_from="dequantized",
        check=_per_tensor("x_scale", "x_zero", "y_scale", "y_zero"), post=_quantized_output,
    ),
    Spelling(
        "ml-classifier", "the probabilities of an ai.onnx.ml classifier",
        "ai.onnx.ml LinearClassifier, TreeEnsembleClassifier or SVMClassifier",
        op(ML_CLASSIFIERS, Var("features"), domain=ML_DOMAIN, output=1, name="act"),
        "softmax", _ml_axis, logits_from="log",
    ),
)
BY_NAME = {s.name: s for s in SPELLINGS}


def first_match(tensor: str, view: View) -> tuple[Spelling, Found] | None:
    """The first spelling that produces ``tensor``, with what it bound."""
    for spelling in SPELLINGS:
        found = match(spelling.pattern, tensor, view)
        if found is not None and spelling.check(found, view):
            if spelling.name == "qlinear-softmax" and not _same_grid(found):
                continue
            return spelling, found
    return None


def _same_grid(found: Found) -> bool:
    """The DequantizeLinear after a QLinearSoftmax uses the softmax's output scale and zero point."""
    pairs = (("y_scale", "y_scale_out"), ("y_zero", "y_zero_out"))
    return all(
        (found.constants.get(a) is None and found.constants.get(b) is None)
        or (found.constants.get(a) is not None and found.constants.get(b) is not None
            and np.array_equal(cast(np.ndarray, found.constants[a]), cast(np.ndarray, found.constants[b])))
        for a, b in pairs
    )
