"""Finding a model's class scores: which output, what it holds, the logits, the class axis.

``find_scores`` walks back from the output through layout ops and
post-processing (``passes``), trying at every tensor the spellings of an
activation (``patterns.SPELLINGS``) in order, then the readings composed
from others (``nested``: a head inside the subgraphs of an If, Loop or
Scan; a mean of probabilities; the score part of a Concat). The first that
fits says where the logits are; without one the output holds raw logits.
The result is a ``ScoreSite`` (``site``): the public description of the
reading, which capture, patch and verify all work from.
"""

from __future__ import annotations

from dataclasses import replace
from typing import Any

import numpy as np
import onnx
from onnx import helper, numpy_helper

from ..errors import OnnxcalError
from . import nested
from . import post as _post
from .match import Found, View
from .passes import RESHAPES, Step, step
from .patterns import RAW_TRANSFORMS, Spelling, first_match, ml_transform
from .site import HOLDS, Branch, ScoreSite, _words_of, fit_kind, read_as, words_for
from .tensors import (
    _ELEM,
    TensorSpec,
    _attr,
    _axis_through_reshape,
    _rank,
    _Shapes,
    opset_version,
    tensor_spec,
)

__all__ = ["HOLDS", "Branch", "ScoreSite", "find_scores", "fit_kind", "read_as"]

# --------------------------------------------------------------------------
# Choosing the output


def _usable(spec: TensorSpec, view: View) -> bool:
    """Float tensors, and the sequence of maps a ZipMap makes."""
    i = view.producer(spec.name)
    return spec.is_float or (i is not None and view.node(i).op_type == "ZipMap")


def _named(view: View, output: str) -> TensorSpec:
    specs = [tensor_spec(vi) for vi in view.graph.output]
    for s in specs:
        if s.name == output:
            if not _usable(s, view):
                raise OnnxcalError(
                    f"output '{output}' has element type {s.dtype}, not a float type",
                    "choose the output that holds class scores",
                )
            if (why := nested.recurrent_state(view, output, loops=False)) is not None:
                raise OnnxcalError(
                    f"output '{output}' is {why}: a state the model hands back to be fed in again, "
                    "not class scores",
                    "choose the class-score output with --output",
                )
            return s
    names = ", ".join(s.name for s in specs)
    raise OnnxcalError(f"the model has no output named '{output}'", f"choose one of: {names}")


def _without_states(view: View, usable: list[TensorSpec]) -> list[TensorSpec]:
    """The outputs that may hold class scores: never a recurrent state (an LSTM's ``Y_h``, a Loop's
    carried value; the latter may still be named with ``--output``: a sum of logits carried through a
    Loop is class scores), nor, beside other candidates, an output that mirrors an input it is
    computed from (a state fed back)."""
    states = {s.name: why for s in usable if (why := nested.recurrent_state(view, s.name)) is not None}
    if states and len(states) == len(usable):
        listed = "; ".join(f"'{name}' is {why}" for name, why in states.items())
        raise OnnxcalError(
            f"every float output of the model is a recurrent state ({listed}), not class scores",
            "export the model with its class-score output",
        )
    kept = [s for s in usable if s.name not in states]
    if len(kept) > 1:
        fed = {s.name for s in kept if nested.fed_back(view, s) is not None}
        kept = [s for s in kept if s.name not in fed] or kept
    return kept


def _choose(view: View, columns: tuple[int, int] | None = None) -> ScoreSite:
    """The output to calibrate when none is named.

    An output produced by a recognised activation or probability pattern
    wins; several such outputs, or (without one) several float outputs that
    could be raw logits, are refused with their names, since taking the
    first could calibrate the wrong values.
    """
    specs = [tensor_spec(vi) for vi in view.graph.output]
    usable = [s for s in specs if _usable(s, view)]
    if len(usable) > 1:  # a single number per model run is no class score
        usable = [s for s in usable if s.shape is None or len(s.shape) > 0 or not s.is_float] or usable[:1]
    if not usable:
        kinds = ", ".join(f"{s.name} ({s.dtype})" for s in specs)
        raise OnnxcalError(
            f"the model has no floating-point output to calibrate (outputs: {kinds})",
            "onnxcal needs an output of class scores or probabilities",
        )
    usable = _without_states(view, usable)
    if len(usable) == 1:
        return _read(view, usable[0], columns)
    readings: list[tuple[TensorSpec, ScoreSite | None]] = []
    for s in usable:
        try:
            readings.append((s, _read(view, s, columns)))
        except OnnxcalError:
            readings.append((s, None))
    found = [site for _, site in readings if site is not None and site.activation is not None]
    if len(found) == 1:
        return found[0]
    if found:
        listed = "; ".join(f"'{s.output}' ({s.holds}: {_words_of(s)})" for s in found)
        raise OnnxcalError(
            f"the model has {len(found)} outputs of class probabilities: {listed}",
            "choose one with --output NAME (calibrate another one afterwards with --output)",
        )
    listed = ", ".join(f"'{s.name}' ({s.dtype}, shape {_shape_text(s.shape)})" for s, _ in readings)
    raise OnnxcalError(
        f"the model has {len(readings)} float outputs that could hold raw logits and none comes from "
        f"an activation onnxcal knows: {listed}",
        "choose the class-score output with --output NAME",
    )


def _shape_text(shape: tuple[Any, ...] | None) -> str:
    return "?" if shape is None else "[" + ", ".join("?" if d is None else str(d) for d in shape) + "]"


# --------------------------------------------------------------------------
# Reading an output


def find_scores(
    model: onnx.ModelProto,
    output: str | None = None,
    *,
    holds: str | None = None,
    logits_from: str | None = None,
    score_columns: str | None = None,
) -> ScoreSite:
    """Locate the class scores behind ``output`` (or the one output that holds them).

    Walks back from the output through layout ops and post-processing
    (tracking the class axis) to the first spelling of an activation it
    recognises (``patterns.SPELLINGS``), looking into the subgraphs of If,
    Loop and Scan nodes, through a mean of probabilities and into a Concat
    (``nested``). Without one, the output holds raw logits with the class
    axis 1 (NCHW-style layouts; common practice).

    Parameters
    ----------
    model : onnx.ModelProto
    output : str, optional
        The output; by default the one output produced by a recognised
        activation (see ``_choose``); never a recurrent state.
    holds : {"logits", "probabilities", "log-probabilities"}, optional
        What the output holds, as stated by the user or found in the data:
        it must agree with a recognised activation, and it turns a raw
        output into probabilities or log-probabilities (``read_as``).
    logits_from : str, optional
        ``"log"`` reads an ai.onnx.ml classifier through log p even when its
        raw scores are available.
    score_columns : str, optional
        ``"START:STOP"``: the output concatenates class scores with other
        values, and the scores are positions START..STOP-1 along the
        Concat's axis (``--score-columns``).

    Raises
    ------
    OnnxcalError
        No such output, several candidates, no float output, a recurrent
        state named as the output, a class axis that does not fit or is
        lost, a Softmax below opset 13 that normalises over more than the
        class axis, scores of a type that is not float, ``holds``
        contradicting the graph, subgraphs that compute the output in
        different ways, or class scores concatenated with other values
        (without matching ``score_columns``).
    """
    view = View(model, opset_version(model))
    columns = nested.parse_columns(score_columns) if score_columns else None
    site = _read(view, _named(view, output), columns) if output is not None else _choose(view, columns)
    if columns is not None and site.columns is None:
        raise OnnxcalError(
            f"--score-columns: output '{site.output}' is not a Concat of class scores with other values",
            "leave out --score-columns",
        )
    if holds is not None:
        site = read_as(site, holds)
    if logits_from == "log" and site.logits_from == "raw-scores":
        site = replace(site, logits_from="log")
    if site.dtype not in _ELEM:  # the tensor the scaling goes to
        raise OnnxcalError(
            f"the class scores '{site.scores}' behind output '{site.output}' have element type "
            f"{site.dtype}, not a floating-point type",
            "choose an output of float class scores with --output, or repair the model",
        )
    return site


def _inner(view: View, spec: TensorSpec) -> ScoreSite:
    """The walker's reading of a tensor inside the graph (an input of a Concat or a mean, a
    subgraph's output), for the composed readings of ``nested``."""
    return _read(view, spec, None, top=False)


def _read(view: View, spec: TensorSpec, columns: tuple[int, int] | None = None, top: bool = True) -> ScoreSite:
    if top:
        view.output = spec.name
    tensor, steps = spec.name, list[Step]()
    while True:
        found = first_match(tensor, view)
        if found is not None:
            return _site(view, spec, tensor, steps, *found)
        composed = _composed(view, tensor, columns)
        if composed is not None:
            return _assemble(view, spec, tensor, steps, composed)
        nxt = step(tensor, view)
        if nxt is None or (nxt.zipmap and steps):
            return _raw_site(spec, view.shapes)
        steps.append(nxt)
        tensor = nxt.source


def _composed(view: View, tensor: str, columns: tuple[int, int] | None) -> nested.Composed | None:
    index = view.producer(tensor)
    if index is None:
        return None
    node = view.node(index)
    if node.domain not in ("", "ai.onnx"):
        return None
    if node.op_type in ("If", "Loop", "Scan"):
        return nested.through_subgraphs(view, tensor, index, _inner)
    if node.op_type == "ReduceMean":
        return nested.pooled_mean(view, tensor, index, _inner)
    if node.op_type == "Concat":
        return nested.concat_part(view, tensor, index, _inner, columns)
    return None


def _rank_zero(scores: str, output: str) -> OnnxcalError:
    return OnnxcalError(
        f"the scores '{scores}' behind output '{output}' are a single number (rank 0), with no class axis",
        "choose an output of class scores with --output, or repair the model's shapes",
    )


def _site(view: View, spec: TensorSpec, values: str, steps: list[Step], spelling: Spelling, found: Found) -> ScoreSite:
    """The site of a spelling matched at ``values``, followed on to the output."""
    shapes = view.shapes
    act = found.nodes.get("act", min(found.matched))
    node = view.node(act)
    if spelling.name == "ml-classifier":
        z, logits_from = node.output[1], ("raw-scores" if ml_transform(node) in RAW_TRANSFORMS else "log")
    elif spelling.name == "qlinear-softmax":  # the pattern ends in the DequantizeLinear after it
        z, logits_from, values = found.tensors["x_q"], "dequantized", node.output[0]
    else:
        z, logits_from = found.tensors["z"], spelling.logits_from
    z_shape = shapes.shape(z)
    rank = len(z_shape) if z_shape is not None else (_rank(shapes.shape(values)) or 2)
    if rank == 0:
        raise _rank_zero(z, spec.name)
    axis = spelling.axis(found, view, rank)
    dim = z_shape[axis] if z_shape is not None and axis < len(z_shape) else None
    size = dim if isinstance(dim, int) else None
    if spelling.name == "ml-classifier":
        size = _ml_classes(node, shapes)
    elif spelling.activation == "sigmoid" and rank == 1:
        size = 1  # a rank-1 Sigmoid: one binary score per row
    rewire: tuple[tuple[int, int], ...] = ()
    if logits_from == "tensor":
        rewire = tuple((i, slot) for i in sorted(found.matched) for slot, name in enumerate(view.node(i).input)
                       if name == z)
    composed = nested.Composed(
        z, logits_from, spelling.activation, spelling.name,
        "log-probabilities" if spelling.activation == "logsoftmax" else "probabilities",
        act, tuple(sorted(found.matched)), axis, rank, axis, rank, size,
        _logits_dtype(view, z, logits_from, values, spec), "",
        post=spelling.post(found, view), rewire=rewire, path=tuple(found.matched), values=values,
    )
    site = _assemble(view, spec, values, steps, composed)
    return replace(site, ml_transform=ml_transform(node)) if spelling.name == "ml-classifier" else site


def _assemble(view: View, spec: TensorSpec, values: str, steps: list[Step], c: nested.Composed) -> ScoreSite:
    """The ``ScoreSite`` of what ``c`` says ``values`` holds, followed through ``steps`` to the output."""
    shapes = view.shapes
    tensor = spec.name
    if steps and steps[0].zipmap:
        tensor, steps = steps[0].source, steps[1:]
    forward = list(reversed(steps))
    if c.columns is not None:
        _check_after_concat(view, forward, c)
    out_axis, out_rank, layout, taken = _follow(view, values, c.axis, c.rank, forward, words_for(c.spelling))
    size = c.size
    if size is None and not taken and spec.shape is not None and len(spec.shape) == out_rank:
        declared = spec.shape[out_axis]  # declared by the output (the logits' shape unknown)
        size = declared if isinstance(declared, int) else None
    path = [values, *(s.source for s in steps), tensor]
    dtypes = tuple(dict.fromkeys(d for d in [c.dtype, *c.dtypes, *(shapes.dtype(t) for t in path)] if d in _ELEM))
    return ScoreSite(
        output=spec.name,
        scores=c.scores,
        activation=c.activation,
        node=c.node,
        class_axis=out_axis,
        rank=out_rank,
        num_classes=size if isinstance(size, int) and size > 0 else None,
        dtype=c.dtype,
        tensor=tensor,
        layout=c.layout + layout,
        output_dtype=shapes.dtype(tensor) or (spec.dtype if spec.is_float else c.dtype),
        scores_axis=c.scores_axis,
        scores_rank=c.scores_rank,
        holds=c.holds,
        spelling=c.spelling,
        logits_from=c.logits_from,
        post=c.post + tuple(s.post for s in forward if s.post is not None),
        nodes=c.nodes,
        rewire=c.rewire,
        values=c.values or values,
        dtypes=dtypes,
        path=tuple(sorted({i for s in steps for i in s.nodes} | set(c.path) | set(c.nodes))),
        branches=c.branches,
        columns=None if c.columns is None else (out_axis, *c.columns),
        composed=c.words,
    )


def _check_after_concat(view: View, forward: list[Step], c: nested.Composed) -> None:
    """After a Concat whose score part is calibrated alone, only ops that keep every position's
    place may follow (the captured scores are laid out like the output by replaying them)."""
    for s in forward:
        node = view.node(s.nodes[0])
        if s.post is not None or node.op_type in ("Reshape", "Flatten"):
            raise OnnxcalError(
                f"a {node.op_type} node '{node.name or node.output[0]}' follows the Concat of '{view.output}', "
                "so onnxcal cannot lay its score positions out like the output",
                "choose the Concat's output itself with --output if it is a graph output, or leave out --score-columns",
            )


def _logits_dtype(view: View, z: str, logits_from: str, values: str, spec: TensorSpec) -> str:
    if logits_from == "dequantized":  # DequantizeLinear gives the scale's dtype (ONNX operator spec)
        node = view.node(view.producer(values) or 0)
        scale = view.constant(node.input[1]) if node.op_type == "QLinearSoftmax" else None
        return scale.dtype.name if scale is not None else "float32"
    known = view.shapes.dtype(z) or view.shapes.dtype(values)
    return known or (spec.dtype if spec.is_float else "float32")


def _ml_classes(node: onnx.NodeProto, shapes: _Shapes) -> int | None:
    labels = _class_labels(node)
    shape = shapes.shape(node.output[1])
    k = shape[1] if shape is not None and len(shape) == 2 and isinstance(shape[1], int) else None
    return k or (labels.dims[0] if labels is not None else None)


def _follow(
    view: View, values: str, axis: int, rank: int, forward: list[Step], what: str
) -> tuple[int, int, tuple[int, ...], bool]:
    """Follow the class axis from the activation to the output.

    Returns the class axis and rank of the logits laid out like the output
    (up to a class taken by Gather/Slice), the layout nodes to replay on
    them, and whether one class is taken.
    """
    layout: list[int] = []
    taken = False
    kept = (axis, rank)
    for s in forward:
        if s.axis_op is not None:
            node = view.node(s.axis_op)
            if taken:
                continue  # one value per row: a reshape cannot mix classes any more
            new = _axis_forward(node, axis, view.shapes)
            if new is None:
                raise OnnxcalError(
                    f"the {node.op_type} node '{node.name or node.output[0]}' after the {what} "
                    "does not keep the class axis whole (or its shapes are unknown)",
                    "choose an output whose class axis onnxcal can follow (--output)",
                )
            axis, rank = new, _rank(view.shapes.shape(node.output[0])) or rank
            if node.op_type not in ("Identity", "Cast"):
                layout.append(s.axis_op)
            kept = (axis, rank)
        elif isinstance(s.post, (_post.Take, _post.Normalize)) and s.axis is not None and not taken:
            if s.axis % rank != axis:
                raise OnnxcalError(
                    f"a {type(s.post).__name__.lower()} step after the {what} works on axis {s.axis}, "
                    f"not on the class axis {axis}",
                    "choose an output whose values onnxcal can follow (--output)",
                )
            taken = taken or isinstance(s.post, _post.Take)
    return kept[0], kept[1], tuple(layout), taken


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
        values=spec.name,
        dtypes=(spec.dtype,) if spec.dtype in _ELEM else (),
    )


def _axis_forward(node: onnx.NodeProto, axis: int, shapes: _Shapes) -> int | None:
    """Class axis of a layout node's output given that of its input (None: lost)."""
    if node.op_type in ("Identity", "Cast"):
        return axis
    if node.op_type == "Transpose":
        rank = _rank(shapes.shape(node.input[0]))
        perm = list(_attr(node, "perm", [])) or (list(range(rank))[::-1] if rank else [])
        return perm.index(axis) if axis in perm else None
    assert node.op_type in RESHAPES
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
