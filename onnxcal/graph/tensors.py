"""Shared helpers of the graph package: dtypes, tensor descriptions, shapes, names."""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import onnx
from onnx import helper, numpy_helper

RECORD_KEY = "onnxcal.calibration"
RECORD_FORMAT = 3
DEFAULT_OUTPUT_NAME = "probabilities"
ML_DOMAIN = "ai.onnx.ml"

ACTIVATIONS = {"Softmax": "softmax", "LogSoftmax": "logsoftmax", "Sigmoid": "sigmoid"}
# What the user may ask for with --activation when the output holds raw logits.
ACTIVATION_CHOICES = ("softmax", "sigmoid")
COMPUTE_DTYPES = ("float32", "float64")
# ai.onnx.ml classifiers whose second output holds class probabilities.
_ML_CLASSIFIERS = {"LinearClassifier", "TreeEnsembleClassifier", "SVMClassifier"}
# Ops that move class scores around without changing any class's values.
_LAYOUT = {"Identity", "Cast", "Reshape", "Flatten", "Squeeze", "Unsqueeze", "Transpose"}
_RESHAPES = {"Reshape", "Flatten", "Squeeze", "Unsqueeze"}
_FLOAT_TYPES = {
    onnx.TensorProto.FLOAT,
    onnx.TensorProto.DOUBLE,
    onnx.TensorProto.FLOAT16,
    onnx.TensorProto.BFLOAT16,
}
_ELEM = {np.dtype(helper.tensor_dtype_to_np_dtype(e)).name: e for e in _FLOAT_TYPES}
# Below this many bytes an initializer stays inside the .onnx file when the
# model is saved with external data (onnx.save_model's own default).
EXTERNAL_THRESHOLD = 1024


def np_dtype(name: str) -> np.dtype:
    """numpy dtype for a float dtype name, bfloat16 included (via onnx's ml_dtypes)."""
    return np.dtype(helper.tensor_dtype_to_np_dtype(_ELEM[name]))


# --------------------------------------------------------------------------
# Reading


@dataclass(frozen=True)
class TensorSpec:
    """Name, element type and shape of a graph input or output.

    ``dtype`` is a numpy dtype name (``"float32"``) or, for non-tensor values
    such as sequences of maps, a short description. ``shape`` holds ints for
    fixed dims, strings for symbolic dims and None for unknown ones; it is
    None when the rank is unknown.
    """

    name: str
    dtype: str
    shape: tuple[int | str | None, ...] | None
    is_float: bool = False


def opset_version(model: onnx.ModelProto) -> int:
    """Opset of the default ONNX domain; 0 when the model imports none (e.g. a
    converter's export made only of ai.onnx.ml operators)."""
    for imp in model.opset_import:
        if imp.domain in ("", "ai.onnx"):
            return int(imp.version)
    return 0


def _dims(vi: onnx.ValueInfoProto) -> tuple[int | str | None, ...] | None:
    """Fixed dims as ints, symbolic ones by name, unknown ones as None.

    A negative ``dim_value`` (-1: some converters' spelling of a dynamic
    dim; onnxruntime reads it as unknown) is unknown, not a size.
    """
    t = vi.type.tensor_type
    if not vi.type.HasField("tensor_type") or not t.HasField("shape"):
        return None
    return tuple(
        (d.dim_value if d.dim_value >= 0 else None) if d.HasField("dim_value") else (d.dim_param or None)
        for d in t.shape.dim
    )


def _elem_name(elem: int) -> str:
    try:
        return np.dtype(helper.tensor_dtype_to_np_dtype(elem)).name if elem else "unknown"
    except KeyError:  # a number no ONNX version defines
        return f"unknown type {elem}"


def _type_name(tp: onnx.TypeProto) -> str:
    kind = tp.WhichOneof("value")
    if kind == "tensor_type":
        return _elem_name(tp.tensor_type.elem_type)
    if kind == "sequence_type":
        return f"seq({_type_name(tp.sequence_type.elem_type)})"
    if kind == "map_type":
        return f"map({_elem_name(tp.map_type.key_type)}, {_type_name(tp.map_type.value_type)})"
    return kind or "unknown"


def tensor_spec(vi: onnx.ValueInfoProto) -> TensorSpec:
    """Describe a ValueInfoProto as a TensorSpec."""
    if vi.type.WhichOneof("value") != "tensor_type":
        return TensorSpec(vi.name, _type_name(vi.type), None, False)
    elem = vi.type.tensor_type.elem_type
    return TensorSpec(vi.name, _type_name(vi.type), _dims(vi), elem in _FLOAT_TYPES)


def _producers(graph: onnx.GraphProto) -> dict[str, int]:
    return {out: i for i, node in enumerate(graph.node) for out in node.output}


def _attr(node: onnx.NodeProto, name: str, default: Any) -> Any:
    for a in node.attribute:
        if a.name == name:
            return helper.get_attribute_value(a)
    return default


class _Shapes:
    """Shapes of a graph's tensors: declared ones, else from shape inference (lazily)."""

    def __init__(self, model: onnx.ModelProto) -> None:
        self._model = model
        self._known = _value_infos(model.graph)
        self._inferred: dict[str, onnx.ValueInfoProto] | None = None

    def _info(self, name: str) -> onnx.ValueInfoProto | None:
        vi = self._known.get(name)
        if (vi is None or _dims(vi) is None) and self._inferred is None:
            try:
                inferred = onnx.shape_inference.infer_shapes(_without_weights(self._model))
                self._inferred = _value_infos(inferred.graph, inputs=False)
            except Exception:  # inference is best effort; callers handle None
                self._inferred = {}
        if vi is None or _dims(vi) is None:
            vi = (self._inferred or {}).get(name, vi)
        return vi

    def shape(self, name: str) -> tuple[int | str | None, ...] | None:
        vi = self._info(name)
        return _dims(vi) if vi is not None else None

    def dtype(self, name: str) -> str | None:
        vi = self._info(name)
        if vi is None or not vi.type.tensor_type.elem_type:
            return None
        return _type_name(vi.type)


def subgraphs(node: onnx.NodeProto) -> list[tuple[str, onnx.GraphProto]]:
    """(attribute name, graph) of every subgraph of ``node`` (If branches, Loop and Scan bodies)."""
    out = []
    for a in node.attribute:
        if a.type == onnx.AttributeProto.GRAPH:
            out.append((a.name, a.g))
        elif a.type == onnx.AttributeProto.GRAPHS:
            out.extend((a.name, g) for g in a.graphs)
    return out


def all_nodes(graph: onnx.GraphProto) -> Iterator[onnx.NodeProto]:
    """Every node of ``graph`` and of its subgraphs, depth first."""
    for node in graph.node:
        yield node
        for _, g in subgraphs(node):
            yield from all_nodes(g)


def _value_infos(graph: onnx.GraphProto, inputs: bool = True) -> dict[str, onnx.ValueInfoProto]:
    """Every value info of ``graph`` and its subgraphs by name (names are unique across a model,
    ONNX IR spec: a subgraph may not reuse a name of an enclosing scope)."""
    infos = {vi.name: vi for vi in [*(graph.input if inputs else ()), *graph.output, *graph.value_info]}
    for node in graph.node:
        for _, g in subgraphs(node):
            for name, vi in _value_infos(g).items():
                infos.setdefault(name, vi)
    return infos


SMALL_INITIALIZER = 1024
"""Initializers of fewer bytes keep their values for shape inference (a Reshape's target shape)."""


def _without_weights(model: onnx.ModelProto) -> onnx.ModelProto:
    """A copy of ``model`` for shape inference: large initializers become graph inputs of their type.

    Inference needs the values of small constants (shapes, axes) only, so a
    400 MiB model is not copied (twice, in and out of onnx's C++) to find a
    tensor's shape; the model passed in is not changed.
    """
    light = onnx.ModelProto()
    for field in ("ir_version", "producer_name", "domain", "model_version"):
        setattr(light, field, getattr(model, field))
    light.opset_import.extend(model.opset_import)
    light.functions.extend(model.functions)
    g, src = light.graph, model.graph
    g.name = src.name
    g.node.extend(src.node)
    g.input.extend(src.input)
    g.output.extend(src.output)
    g.value_info.extend(src.value_info)
    declared = {vi.name for vi in src.input}
    for init in src.initializer:
        if init.data_location != onnx.TensorProto.EXTERNAL and init.ByteSize() < SMALL_INITIALIZER:
            g.initializer.append(init)
        elif init.name not in declared:
            g.input.append(helper.make_tensor_value_info(init.name, init.data_type, list(init.dims)))
    g.sparse_initializer.extend(src.sparse_initializer)
    return light


def _rank(shape: Sequence[int | str | None] | None) -> int | None:
    return len(shape) if shape is not None else None


def _same_dims(a: Sequence[int | str | None], b: Sequence[int | str | None]) -> bool:
    """Products of two dim lists are equal (symbolic dims compared by name)."""
    if any(d is None for d in [*a, *b]):
        return False
    ints_a = int(np.prod([d for d in a if isinstance(d, int)], dtype=np.int64))
    ints_b = int(np.prod([d for d in b if isinstance(d, int)], dtype=np.int64))
    syms_a = sorted(d for d in a if isinstance(d, str))
    syms_b = sorted(d for d in b if isinstance(d, str))
    return ints_a == ints_b and syms_a == syms_b


def _axis_through_reshape(
    axis: int, before: Sequence[int | str | None] | None, after: Sequence[int | str | None] | None
) -> int | None:
    """Where the class axis ends up when a reshape keeps it whole, else None.

    The class axis survives when some output axis has its size and the same
    product of sizes in front of it.
    """
    if before is None or after is None or not 0 <= axis < len(before):  # unknown or inconsistent shapes
        return None
    k = before[axis]
    if len(after) == 1 and k == 1:  # (n, 1) squeezed to (n,): one logit per sample
        return 0
    for j, d in enumerate(after):
        if d == k and _same_dims(before[:axis], after[:j]):
            return j
    return None



def _initializer(graph: onnx.GraphProto, name: str) -> onnx.TensorProto | None:
    return next((i for i in graph.initializer if i.name == name), None)


def overridable(model: onnx.ModelProto) -> set[str]:
    """Initializers a caller may override by feeding a graph input of the same name.

    From IR version 4 an initializer listed among the graph inputs is a
    default value the caller may replace; before it, every initializer had
    to be listed as an input, so the listing says nothing and they are
    constants (ONNX IR spec, "Graphs" and its IR version history).
    """
    if model.ir_version and model.ir_version < 4:
        return set()
    return {vi.name for vi in model.graph.input}


def constant_node_value(node: onnx.NodeProto) -> onnx.TensorProto | None:
    """The tensor a ``Constant`` node holds in its ``value`` attribute, else None."""
    if node.op_type != "Constant" or node.domain not in ("", "ai.onnx"):
        return None
    value = _attr(node, "value", None)
    return value if isinstance(value, onnx.TensorProto) else None


# --------------------------------------------------------------------------
# Rewriting


def unique_name(base: str, taken: set[str]) -> str:
    """``base``, or ``base_1``, ``base_2``, ... : the first not in ``taken``.

    Deterministic, so the same model always gets the same names. The chosen
    name is added to ``taken``.
    """
    name, i = base, 0
    while name in taken:
        i += 1
        name = f"{base}_{i}"
    taken.add(name)
    return name


def _all_names(graph: onnx.GraphProto) -> set[str]:
    names = {i.name for i in graph.initializer} | {vi.name for vi in graph.input}
    names |= {vi.name for vi in graph.output} | {vi.name for vi in graph.value_info}
    for node in graph.node:
        names.update(node.input)
        names.update(node.output)
        names.add(node.name)
        for a in node.attribute:  # names inside subgraphs may not be reused either
            for g in [a.g] if a.type == onnx.AttributeProto.GRAPH else list(a.graphs):
                names |= _all_names(g)
    return names


def _scalar(name: str, value: float, dtype: str) -> onnx.TensorProto:
    return numpy_helper.from_array(np.array(value, dtype=np_dtype(dtype)), name=name)


def _uses(graph: onnx.GraphProto) -> dict[str, int]:
    counts: dict[str, int] = {}
    for node in graph.node:
        for name in node.input:
            counts[name] = counts.get(name, 0) + 1
        for a in node.attribute:  # subgraphs may read outer tensors
            for g in [a.g] if a.type == onnx.AttributeProto.GRAPH else list(a.graphs):
                for name, c in _uses(g).items():
                    counts[name] = counts.get(name, 0) + c
    for vi in graph.output:
        counts[vi.name] = counts.get(vi.name, 0) + 1
    return counts
