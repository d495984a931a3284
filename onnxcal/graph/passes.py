"""What may sit between an activation and the output: layout ops and post-processing.

The score finder walks back from the output through these. A layout op
moves class scores around without changing a value (its class axis is
tracked); a post-processing step changes the probabilities in a way that
keeps them meaningful (``post``). Each is one declarative pattern over the
tensor it produces; ``step(tensor, view)`` returns the first that fits.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .match import Const, Found, Var, View, either, match, op
from .patterns import _quantize, reduce_axes, reduced
from .post import Clip, Normalize, PostOp, Scale, Take
from .tensors import ML_DOMAIN, _attr

LAYOUT = ("Identity", "Cast", "Reshape", "Flatten", "Squeeze", "Unsqueeze", "Transpose")
RESHAPES = ("Reshape", "Flatten", "Squeeze", "Unsqueeze")

_p = Var("p")


@dataclass(frozen=True)
class Step:
    """One node (or Q/DQ pair) walked back through: its input, what it does, its nodes."""

    source: str
    nodes: tuple[int, ...]
    post: PostOp | None = None  # None: a layout op
    axis_op: int | None = None  # the layout node whose class axis must be followed
    zipmap: bool = False
    axis: int | None = None  # the class axis a post step works on (Take, Normalize), when it names one


def _scalar(value: np.ndarray | None) -> float | None:
    if value is None or np.asarray(value).size != 1:
        return None
    v = float(np.asarray(value).reshape(-1)[0])
    return v if np.isfinite(v) else None


def _scale(found: Found, view: View, divide: bool) -> Step | None:
    c = _scalar(found.constants["c"])
    if c is None or c <= 0:
        return None
    return Step(found.tensors["p"], tuple(found.matched), Scale(1.0 / c if divide else c))


def _clip(found: Found, view: View) -> Step | None:
    node = view.node(found.nodes["clip"])
    if view.opset and view.opset < 11:  # Clip-6: min and max are attributes
        low, high = _attr(node, "min", None), _attr(node, "max", None)
    else:
        low, high = (_scalar(found.constants.get(k)) for k in ("low", "high"))
        if any(len(node.input) > i and node.input[i] and found.constants.get(k) is None
               for i, k in ((1, "low"), (2, "high"))):
            return None  # a bound that is not a constant
    return Step(found.tensors["p"], tuple(found.matched), Clip(low, high))


def _gather(found: Found, view: View) -> Step | None:
    index = np.asarray(found.constants["i"])
    if index.size != 1:
        return None
    node = view.node(found.nodes["take"])
    return Step(found.tensors["p"], tuple(found.matched), Take(int(index.reshape(-1)[0])),
                axis=int(_attr(node, "axis", 0)))


def _slice(found: Found, view: View) -> Step | None:
    node = view.node(found.nodes["take"])
    if len(node.input) > 1:  # Slice-10 and later: starts, ends, axes, steps as inputs
        values = [view.constant(n) if n else None for n in list(node.input[1:5]) + [""] * (5 - len(node.input))]
        starts, ends, axes, steps = values
        if starts is None or ends is None or (len(node.input) > 3 and node.input[3] and axes is None):
            return None
    else:  # Slice-1: attributes
        starts, ends, axes, steps = (np.array(_attr(node, k, []) or [], dtype=np.int64) if _attr(node, k, None)
                                     else None for k in ("starts", "ends", "axes", "steps"))
    if starts is None or ends is None or np.asarray(starts).size != 1:
        return None
    start, end = int(np.asarray(starts).reshape(-1)[0]), int(np.asarray(ends).reshape(-1)[0])
    step = 1 if steps is None else int(np.asarray(steps).reshape(-1)[0])
    axis = 0 if axes is None else int(np.asarray(axes).reshape(-1)[0])
    if step != 1 or start < 0 or end != start + 1:
        return None
    return Step(found.tensors["p"], tuple(found.matched), Take(start), axis=axis)


def _qdq(found: Found, view: View) -> Step | None:
    a = [found.constants.get(k) for k in ("s", "zp")]
    b = [found.constants.get(k) for k in ("s2", "zp2")]
    if any(v is not None and np.asarray(v).size != 1 for v in a + b):
        return None  # per-axis quantization of probabilities: not a single grid
    same = all((x is None and y is None) or (x is not None and y is not None and np.array_equal(x, y))
               for x, y in zip(a, b, strict=True))
    if not same:
        return None
    return Step(found.tensors["p"], tuple(found.matched), _quantize(a[0], a[1]))


def _normalize(found: Found, view: View) -> Step | None:
    if "norm" in found.nodes:
        norm = _attr(view.node(found.nodes["norm"]), "norm", b"MAX")
        return Step(found.tensors["p"], tuple(found.matched), Normalize(), axis=1) if norm in (b"L1", "L1") else None
    axes = reduce_axes(view, found.nodes["sum"])
    if axes is None or len(axes) != 1:
        return None
    return Step(found.tensors["p"], tuple(found.matched), Normalize(), axis=axes[0])


_POST = (
    (op("Mul", _p, Const("c"), commutative=True), lambda f, v: _scale(f, v, False)),
    (op("Div", _p, Const("c")), lambda f, v: _scale(f, v, True)),
    (op("Clip", _p, Const("low", optional=True), Const("high", optional=True), name="clip"), _clip),
    (op("Gather", _p, Const("i"), name="take"), _gather),
    (op("Slice", _p, name="take"), _slice),
    (op("DequantizeLinear", op("QuantizeLinear", _p, Const("s"), Const("zp", optional=True)),
        Const("s2"), Const("zp2", optional=True)), _qdq),
    (either(op("Div", _p, reduced(("ReduceSum", "ReduceL1"), _p, "sum")),
            op("Normalizer", _p, domain=ML_DOMAIN, name="norm")), _normalize),
)


def step(tensor: str, view: View) -> Step | None:
    """The layout op or post-processing step that produces ``tensor``, or None."""
    index = view.producer(tensor)
    if index is None:
        return None
    node = view.node(index)
    if node.domain in ("", "ai.onnx") and node.op_type in LAYOUT and node.output[0] == tensor:
        return Step(node.input[0], (index,), axis_op=index)
    if node.domain == ML_DOMAIN and node.op_type == "ZipMap":
        return Step(node.input[0], (index,), zipmap=True)
    for pattern, build in _POST:
        found = match(pattern, tensor, view)
        if found is not None and (got := build(found, view)) is not None:
            return got
    return None
