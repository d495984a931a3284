"""Finding a model's class scores: which output, which logits tensor, which class axis."""

from __future__ import annotations

import os
from dataclasses import asdict, dataclass

import numpy as np
import onnx
from onnx import helper, numpy_helper

from ..errors import OnnxcalError
from .record import Record, read_record
from .tensors import (
    _ELEM,
    _LAYOUT,
    _ML_CLASSIFIERS,
    ACTIVATION_CHOICES,
    ACTIVATIONS,
    ML_DOMAIN,
    TensorSpec,
    _attr,
    _axis_through_reshape,
    _producers,
    _rank,
    _Shapes,
    opset_version,
    tensor_spec,
)


@dataclass(frozen=True)
class ScoreSite:
    """Where a model's class scores are and what turns them into probabilities.

    Attributes
    ----------
    output : str
        The graph output chosen as class scores.
    scores : str
        The tensor the scaling applies to: the input of ``activation`` when
        there is one, the output itself for raw logits, or the probability
        tensor of an ai.onnx.ml classifier (``from_probabilities``).
    activation : str or None
        ``"softmax"``, ``"logsoftmax"``, ``"sigmoid"`` or None (raw logits).
        ``"softmax"`` for an ai.onnx.ml classifier: softmax(log p) = p.
    node : int or None
        Index in ``graph.node`` of the activation (or ML classifier) node.
    class_axis : int
        Class axis of ``tensor``, non-negative.
    rank : int
        Rank of ``tensor``.
    num_classes : int or None
        Size of the class axis when it is fixed in the graph.
    dtype : str
        numpy dtype name of ``scores``.
    tensor : str
        The tensor holding the output's values: the output itself, or the
        probability tensor a ZipMap turns into a sequence of maps.
    layout : tuple of int
        Indices of the layout nodes (Transpose, Reshape, ...) between the
        activation and ``tensor``, in order; ``expose_scores`` replays them on
        the logits so captured rows line up with the output.
    from_probabilities : bool
        True when ``scores`` holds probabilities from an ai.onnx.ml classifier;
        the logits are then log(max(p, tiny)).
    output_dtype : str
        numpy dtype name of ``tensor``.
    scores_axis, scores_rank : int
        Class axis and rank of ``scores`` (where per-class parameters
        broadcast); they differ from ``class_axis``/``rank`` when layout ops
        sit between the activation and the output.
    """

    output: str
    scores: str
    activation: str | None
    node: int | None
    class_axis: int
    rank: int
    num_classes: int | None
    dtype: str
    tensor: str = ""
    layout: tuple[int, ...] = ()
    from_probabilities: bool = False
    output_dtype: str = ""
    scores_axis: int = 1
    scores_rank: int = 2


@dataclass(frozen=True)
class ModelInfo:
    """What ``inspect`` reports about a model."""

    path: str
    sha256: str
    opset: int
    inputs: tuple[TensorSpec, ...]
    outputs: tuple[TensorSpec, ...]
    site: ScoreSite | None
    batch_fixed: bool
    record: Record | None = None
    external_data: tuple[str, ...] = ()
    site_problem: str | None = None

    def to_dict(self) -> dict:
        d = asdict(self)
        d["record"] = self.record.to_dict() if self.record else None
        return d


def _is_activation(node: onnx.NodeProto) -> bool:
    return node.op_type in ACTIVATIONS and node.domain in ("", "ai.onnx")


def _is_ml_classifier(node: onnx.NodeProto, tensor: str) -> bool:
    return (
        node.domain == ML_DOMAIN
        and node.op_type in _ML_CLASSIFIERS
        and len(node.output) > 1
        and node.output[1] == tensor
    )


def _is_probability_pass(node: onnx.NodeProto) -> bool:
    """Ops that keep a probability vector as it is (ai.onnx.ml)."""
    if node.domain != ML_DOMAIN:
        return False
    return node.op_type == "ZipMap" or (
        node.op_type == "Normalizer" and _attr(node, "norm", b"MAX") in (b"L1", "L1")
    )


def _pick_output(graph: onnx.GraphProto, output: str | None, producers: dict[str, int]) -> TensorSpec:
    specs = [tensor_spec(vi) for vi in graph.output]

    def usable(s: TensorSpec) -> bool:  # float tensors, and ZipMap outputs
        zipmap = s.name in producers and graph.node[producers[s.name]].op_type == "ZipMap"
        return s.is_float or zipmap

    if output is not None:
        for s in specs:
            if s.name == output:
                if not usable(s):
                    raise OnnxcalError(
                        f"output '{output}' has element type {s.dtype}, not a float type",
                        "choose the output that holds class scores",
                    )
                return s
        names = ", ".join(s.name for s in specs)
        raise OnnxcalError(f"the model has no output named '{output}'", f"choose one of: {names}")
    floats = [s for s in specs if usable(s)]
    if not floats:
        kinds = ", ".join(f"{s.name} ({s.dtype})" for s in specs)
        raise OnnxcalError(
            f"the model has no floating-point output to calibrate (outputs: {kinds})",
            "onnxcal needs an output of class scores or probabilities",
        )
    # Prefer an output shaped like (batch, classes), or a ZipMap's.
    ranked = [s for s in floats if s.shape is None or len(s.shape) >= 2]
    return (ranked or floats)[0]


def find_scores(model: onnx.ModelProto, output: str | None = None) -> ScoreSite:
    """Locate the class scores behind ``output`` (or the likeliest output).

    Walks back from the output through ops that keep every class's values
    (tracking the class axis) to the last Softmax, LogSoftmax or Sigmoid, or
    to an ai.onnx.ml classifier's probabilities. Without either, the output
    holds raw logits with the class axis 1 (NCHW-style layouts; common
    practice).

    Raises
    ------
    OnnxcalError
        No such output, no float output, a class axis that does not fit or
        is lost on the way, a Softmax below opset 13 that normalises over
        more than the class axis, or scores of a type that is not float.
    """
    site = _locate_scores(model, output)
    if site.dtype not in _ELEM:  # the tensor the scaling goes to
        raise OnnxcalError(
            f"the class scores '{site.scores}' behind output '{site.output}' have element type "
            f"{site.dtype}, not a floating-point type",
            "choose an output of float class scores with --output, or repair the model",
        )
    return site


def _locate_scores(model: onnx.ModelProto, output: str | None) -> ScoreSite:
    graph = model.graph
    producers = _producers(graph)
    spec = _pick_output(graph, output, producers)
    shapes = _Shapes(model)
    chain: list[int] = []  # nodes walked through, from the output backwards
    tensor = spec.name
    while tensor in producers:
        i = producers[tensor]
        node = graph.node[i]
        if _is_activation(node):
            return _activation_site(model, spec, i, chain, shapes)
        if _is_ml_classifier(node, tensor):
            return _ml_site(spec, i, node, chain, shapes, graph)
        if (node.op_type in _LAYOUT and node.domain in ("", "ai.onnx")) or _is_probability_pass(node):
            chain.append(i)
            tensor = node.input[0]
            continue
        break
    return _raw_site(spec, shapes)


def _values_tensor(spec: TensorSpec, chain: list[int], graph: onnx.GraphProto) -> tuple[str, list[int]]:
    """The tensor holding the output's values (a ZipMap's input) and the chain below it."""
    if chain and graph.node[chain[0]].op_type == "ZipMap":
        return graph.node[chain[0]].input[0], chain[1:]
    return spec.name, chain


def _follow_axis(
    axis: int, chain: list[int], graph: onnx.GraphProto, shapes: _Shapes, what: str
) -> int:
    """Map the class axis forward through ``chain`` (given output-first)."""
    for i in reversed(chain):
        node = graph.node[i]
        new = _axis_forward(node, axis, shapes)
        if new is None:
            raise OnnxcalError(
                f"the {node.op_type} node '{node.name or node.output[0]}' after the {what} "
                "does not keep the class axis whole (or its shapes are unknown)",
                "choose an output whose class axis onnxcal can follow (--output)",
            )
        axis = new
    return axis


def _activation_site(
    model: onnx.ModelProto, spec: TensorSpec, index: int, chain: list[int], shapes: _Shapes
) -> ScoreSite:
    graph = model.graph
    node = graph.node[index]
    activation = ACTIVATIONS[node.op_type]
    scores = node.input[0]
    tensor, chain = _values_tensor(spec, chain, graph)
    in_shape = shapes.shape(scores)
    rank = len(in_shape) if in_shape is not None else (_rank(shapes.shape(tensor)) or 2)
    if rank == 0:
        raise _rank_zero(scores, spec.name)
    opset = opset_version(model)
    if activation == "sigmoid":
        axis = 1 if rank >= 2 else 0
    else:
        axis = int(_attr(node, "axis", -1 if opset >= 13 else 1))
        if not -rank <= axis < rank:
            raise OnnxcalError(
                f"class axis {axis} is out of range for output '{spec.name}' of rank {rank}",
                "check the model's Softmax axis",
            )
        axis %= rank
        trailing = in_shape[axis + 1 :] if in_shape is not None else (None,) * (rank - axis - 1)
        if opset < 13 and any(d != 1 for d in trailing):
            # Softmax-1/11 coerce the input to 2-D around `axis` (ONNX operator
            # spec, Softmax changelog): it normalises over axes axis..rank-1 jointly.
            raise OnnxcalError(
                f"the {node.op_type} of output '{spec.name}' (opset {opset}, axis {axis}, "
                f"rank {rank}) normalises over axes {axis}..{rank - 1} jointly, not per class",
                "onnxcal cannot calibrate this as class probabilities; re-export the model "
                "with the Softmax on the class axis",
            )
    size = in_shape[axis] if in_shape is not None else None
    out_axis = _follow_axis(axis, chain, graph, shapes, node.op_type)
    out_shape = shapes.shape(tensor)
    return ScoreSite(
        output=spec.name,
        scores=scores,
        activation=activation,
        node=index,
        class_axis=out_axis,
        rank=_rank(out_shape) or rank,
        num_classes=size if isinstance(size, int) and size > 0 else None,
        dtype=shapes.dtype(scores) or spec.dtype,
        tensor=tensor,
        layout=tuple(i for i in reversed(chain) if graph.node[i].op_type not in ("Identity", "Cast")),
        output_dtype=shapes.dtype(tensor) or spec.dtype,
        scores_axis=axis,
        scores_rank=rank,
    )


def _ml_site(
    spec: TensorSpec, index: int, node: onnx.NodeProto, chain: list[int], shapes: _Shapes, graph
) -> ScoreSite:
    tensor, chain = _values_tensor(spec, chain, graph)
    if any(graph.node[i].op_type not in ("Identity", "Normalizer", "Cast") for i in chain):
        raise OnnxcalError(
            f"the probabilities of the {node.op_type} behind output '{spec.name}' are "
            "reshaped on the way to it",
            "choose the classifier's probability output itself with --output",
        )
    labels = _class_labels(node)
    labels = labels.dims[0] if labels is not None else None
    shape = shapes.shape(node.output[1])
    k = shape[1] if shape is not None and len(shape) == 2 and isinstance(shape[1], int) else None
    return ScoreSite(
        output=spec.name,
        scores=node.output[1],
        activation="softmax",
        node=index,
        class_axis=1,
        rank=2,
        num_classes=k or labels,
        dtype=shapes.dtype(node.output[1]) or "float32",
        tensor=tensor,
        from_probabilities=True,
        output_dtype=shapes.dtype(tensor) or "float32",
    )


def _rank_zero(scores: str, output: str) -> OnnxcalError:
    return OnnxcalError(
        f"the scores '{scores}' behind output '{output}' are a single number (rank 0), with no class axis",
        "choose an output of class scores with --output, or repair the model's shapes",
    )


def _raw_site(spec: TensorSpec, shapes: _Shapes) -> ScoreSite:
    if not spec.is_float:
        raise OnnxcalError(
            f"output '{spec.name}' ({spec.dtype}) does not come from an ai.onnx.ml classifier "
            "or an activation onnxcal knows",
            "choose a tensor output of class scores with --output",
        )
    rank = len(spec.shape) if spec.shape is not None else 2
    if rank == 0:
        raise _rank_zero(spec.name, spec.name)
    axis = 1 if rank >= 2 else 0
    size = spec.shape[axis] if spec.shape is not None else None
    if rank == 1:
        size = 1
    return ScoreSite(
        output=spec.name,
        scores=spec.name,
        activation=None,
        node=None,
        class_axis=axis,
        rank=rank,
        num_classes=size if isinstance(size, int) and size > 0 else None,
        dtype=spec.dtype,
        tensor=spec.name,
        output_dtype=spec.dtype,
        scores_axis=axis,
        scores_rank=rank,
    )


def fit_kind(site: ScoreSite, requested: str | None = None) -> str:
    """How the calibrated scores become probabilities: ``"softmax"`` or ``"sigmoid"``.

    An activation in the model decides; for raw logits ``requested`` (the
    ``--activation`` option) does, else one logit means a sigmoid and more
    mean a softmax (common practice).

    Raises
    ------
    OnnxcalError
        ``requested`` is not a known choice or contradicts the model.
    """
    if requested is not None and requested not in ACTIVATION_CHOICES:
        raise OnnxcalError(
            f"--activation {requested!r} is not one of: {', '.join(ACTIVATION_CHOICES)}"
        )
    if site.activation is not None:
        kind = "sigmoid" if site.activation == "sigmoid" else "softmax"
        if requested is not None and requested != kind:
            what = "an ai.onnx.ml classifier" if site.from_probabilities else site.activation
            raise OnnxcalError(
                f"output '{site.output}' already comes from {what}, so --activation "
                f"{requested} does not apply",
                "leave out --activation",
            )
        return kind
    single = site.num_classes == 1 or site.rank == 1
    if requested == "softmax" and single:
        raise OnnxcalError(
            f"output '{site.output}' holds one logit per sample; a softmax over one value is always 1",
            "use --activation sigmoid (or leave it out)",
        )
    return requested or ("sigmoid" if single else "softmax")


def describe(
    model: onnx.ModelProto,
    path: str | os.PathLike,
    sha256: str,
    external_data: tuple[str, ...] = (),
) -> ModelInfo:
    """Summarise a model for ``inspect``."""
    graph = model.graph
    init_names = {i.name for i in graph.initializer}
    inputs = tuple(tensor_spec(vi) for vi in graph.input if vi.name not in init_names)
    record = read_record(model)
    problem = None
    try:  # a patched model: describe the calibrated output
        site = find_scores(model, record.output if record else None)
    except OnnxcalError as exc:
        site, problem = None, str(exc)
    batch_fixed = any(
        s.shape is not None and len(s.shape) > 0 and isinstance(s.shape[0], int) for s in inputs
    )
    return ModelInfo(
        path=str(path),
        sha256=sha256,
        opset=opset_version(model),
        inputs=inputs,
        outputs=tuple(tensor_spec(vi) for vi in graph.output),
        site=site,
        batch_fixed=batch_fixed,
        record=record,
        external_data=tuple(external_data),
        site_problem=problem,
    )


def _axis_forward(node: onnx.NodeProto, axis: int, shapes: _Shapes) -> int | None:
    """Class axis of ``node``'s output given that of its input (None: lost)."""
    if node.op_type in ("Identity", "Cast") or _is_probability_pass(node):
        return axis
    if node.op_type == "Transpose":
        rank = _rank(shapes.shape(node.input[0]))
        perm = list(_attr(node, "perm", [])) or (list(range(rank))[::-1] if rank else [])
        return perm.index(axis) if axis in perm else None
    return _axis_through_reshape(axis, shapes.shape(node.input[0]), shapes.shape(node.output[0]))



def _class_labels(node: onnx.NodeProto) -> onnx.TensorProto | None:
    # LinearClassifier and SVMClassifier call it classlabels_ints (ONNX-ML operator spec).
    ints = _attr(node, "classlabels_int64s", None) or _attr(node, "classlabels_ints", None)
    if ints:
        return numpy_helper.from_array(np.array(ints, dtype=np.int64))
    strings = _attr(node, "classlabels_strings", None)
    if strings:
        return helper.make_tensor("", onnx.TensorProto.STRING, [len(strings)], list(strings))
    return None

