"""Readings the finder composes from other readings: heads inside subgraphs, means of
probabilities, the score part of a ``Concat``, and outputs that are recurrent states.

The walker (``find._read``) calls these where no spelling matches. Each
reads the tensors it depends on with the walker itself (``read``, passed
in), and says what the tensor it was called on holds as a ``Composed``,
which the walker turns into a ``ScoreSite`` by following the class axis on
to the output. None means "not this": the walker goes on (and without
anything else the output holds raw logits, which the data guard checks).

Operator semantics: the ONNX operator specification (If, Loop, Scan,
ReduceMean, Concat, LSTM, GRU, RNN).
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass
from typing import Any

import onnx

from ..errors import OnnxcalError
from .match import View
from .passes import LAYOUT
from .patterns import keepdims, reduce_axes
from .site import Branch, ScoreSite
from .tensors import TensorSpec, _attr, _rank, subgraphs, tensor_spec

Read = Callable[[View, TensorSpec], ScoreSite]
"""``read(view, spec)``: the walker's reading of the tensor ``spec`` names, in ``view``'s graph."""


@dataclass(frozen=True)
class Composed:
    """What a tensor holds, as one of the readers below found it.

    ``axis`` and ``rank`` describe the tensor the reader was called on
    (the class axis there); the other fields are those of ``ScoreSite``.
    """

    scores: str
    logits_from: str
    activation: str | None
    spelling: str
    holds: str
    node: int | None
    nodes: tuple[int, ...]
    axis: int
    rank: int
    scores_axis: int
    scores_rank: int
    size: int | None
    dtype: str
    words: str
    post: tuple[Any, ...] = ()
    rewire: tuple[tuple[int, int], ...] = ()
    branches: tuple[Branch, ...] = ()
    layout: tuple[int, ...] = ()
    path: tuple[int, ...] = ()
    dtypes: tuple[str, ...] = ()
    values: str = ""
    columns: tuple[int, int] | None = None


def spec_of(view: View, tensor: str) -> TensorSpec:
    """A TensorSpec for any tensor of the graph (its declared or inferred type and shape)."""
    dtype = view.shapes.dtype(tensor) or "unknown"
    return TensorSpec(tensor, dtype, view.shapes.shape(tensor), dtype in ("float16", "bfloat16", "float32", "float64"))


def _name(node: onnx.NodeProto) -> str:
    return f"{node.op_type} '{node.name or node.output[0]}'"


def _size(d: int | str | None) -> int | None:
    """A dim as a size: None when symbolic or unknown."""
    return d if isinstance(d, int) else None


# --------------------------------------------------------------------------
# Heads inside subgraphs


Exit = tuple[str, onnx.GraphProto, int]


def _exits(node: onnx.NodeProto, slot: int, view: View) -> tuple[list[Exit], int | None] | None:
    """The subgraph outputs that give ``node``'s output ``slot``, and the axis a Loop/Scan stacks
    the iterations on (None for If). None for a value carried from one iteration to the next.

    If: output i is output i of the branch that ran. Loop: outputs are the N
    carried values' finals, then the scan outputs, stacked on a new axis 0;
    the body's outputs are the condition, the N carried values, the scan
    outputs. Scan (opset 9 on): N state finals, then scan outputs stacked on
    ``scan_output_axes`` (default 0); the body's outputs in the same order.
    """
    graphs = dict(subgraphs(node))
    if node.op_type == "If":
        return [(a, graphs[a], slot) for a in ("then_branch", "else_branch") if a in graphs], None
    if node.op_type == "Loop":
        carried = len(node.input) - 2
        return (None if slot < carried else ([("body", graphs["body"], slot + 1)], 0))
    if node.op_type == "Scan" and view.opset >= 9:
        states = len(node.input) - int(_attr(node, "num_scan_inputs", 0))
        if slot < states:
            return None
        axes = list(_attr(node, "scan_output_axes", []) or [])
        return [("body", graphs["body"], slot)], (int(axes[slot - states]) if slot - states < len(axes) else 0)
    return None


def _reached_outputs(graph: onnx.GraphProto, start: str) -> set[str]:
    """The outputs of ``graph`` whose values depend on tensor ``start`` (through any node,
    subgraphs' reads of outer tensors included)."""
    reads: dict[str, list[int]] = {}
    for i, node in enumerate(graph.node):
        names = set(node.input) | {t for _, g in subgraphs(node) for n in _all(g) for t in n.input}
        for name in names:
            reads.setdefault(name, []).append(i)
    seen, todo = {start}, [start]
    while todo:
        for i in reads.get(todo.pop(), []):
            for out in graph.node[i].output:
                if out and out not in seen:
                    seen.add(out)
                    todo.append(out)
    return {o.name for o in graph.output} & seen


def _all(graph: onnx.GraphProto) -> Iterator[onnx.NodeProto]:
    for node in graph.node:
        yield node
        for _, g in subgraphs(node):
            yield from _all(g)


def _signature(site: ScoreSite) -> tuple[Any, ...]:
    return (site.activation, site.holds, site.logits_from, site.post, site.class_axis, site.rank,
            site.scores_axis, site.scores_rank, site.dtype, site.inserts)


def _what(site: ScoreSite) -> str:
    if site.activation is None:
        return "raw values"
    return f"{site.holds} ({site.spelling}, class axis {site.class_axis} of rank {site.rank})"


def through_subgraphs(view: View, tensor: str, index: int, read: Read) -> Composed | None:
    """A head inside the subgraphs of an ``If`` (both branches), ``Loop`` or ``Scan`` (its body).

    Every branch must read the same way (the same activation, class axis,
    post-processing); then the scaling goes before the activation in every
    branch (``insert-before-activation``), or, when a branch's logits are
    computed rather than read (probabilities of a classifier), the
    control-flow node's output is calibrated as probabilities in place. A
    Loop/Scan body whose activation also feeds the values carried to the
    next iteration is not looked into (scaling there would change the
    recurrence). Raises when the branches disagree.
    """
    node = view.node(index)
    exits = _exits(node, list(node.output).index(tensor), view)
    if exits is None:
        return None
    outs, stacked = exits
    branches = []
    for attribute, g, slot in outs:
        sub = view.sub(g)
        inner = read(sub, tensor_spec(g.output[slot]) if g.output[slot].type.HasField("tensor_type")
                     else spec_of(sub, g.output[slot].name))
        if stacked is not None and inner.activation is not None and \
                _reached_outputs(g, inner.values or inner.scores) - {g.output[slot].name}:
            return None  # the activation feeds what the next iteration reads
        branches.append(Branch(index, attribute, slot, inner, f"{attribute} of {_name(node)}"))
    sites = [b.site for b in branches]
    if all(s.activation is None for s in sites):
        return None
    if len({_signature(s) for s in sites}) > 1:
        found = "; ".join(f"{b.attribute}: {_what(b.site)}" for b in branches)
        raise OnnxcalError(
            f"the subgraphs of {_name(node)} compute '{tensor}' in different ways ({found}), so no one "
            "scaling calibrates it",
            "choose another output with --output, or re-export the model with one head",
        )
    first = sites[0]
    axis, rank = first.class_axis, first.rank
    if stacked is not None:  # Loop/Scan: the iterations are stacked on a new axis
        at = stacked % (rank + 1)
        axis, rank = (axis + 1 if at <= axis else axis), rank + 1
    where = ("both branches" if node.op_type == "If" else "the body") + f" of {_name(node)}"
    dtypes = tuple(dict.fromkeys(d for s in sites for d in s.dtypes))
    if first.inserts:
        return Composed(
            first.scores, "tensor", first.activation, first.spelling, first.holds, index, (index,), axis, rank,
            first.scores_axis, first.scores_rank, first.num_classes, first.dtype,
            f"inside {where}", post=first.post, branches=tuple(branches), dtypes=dtypes,
        )
    return _probabilities_at(view, tensor, index, first, axis, rank, "probabilities-in-subgraphs",
                             f"computed inside {where}")


def _probabilities_at(view: View, tensor: str, index: int, inner: ScoreSite, axis: int, rank: int,
                      spelling: str, words: str) -> Composed | None:
    """``tensor`` read as holding what ``inner`` holds, calibrated in place through log p, logit p
    or the log-probabilities themselves (``replace-values``)."""
    if inner.post or inner.activation is None:
        return None  # percent, clipped, one class: the data guard reads the values
    how = {"softmax": "log", "sigmoid": "logit", "logsoftmax": "log-probabilities"}[inner.activation]
    size = inner.num_classes
    if inner.activation == "sigmoid":
        axis = 1 if rank >= 2 else 0
        shape = view.shapes.shape(tensor)
        size = 1 if rank <= 1 else (_size(shape[axis]) if shape is not None and len(shape) > axis else None)
    dtype = view.shapes.dtype(tensor) or inner.output_dtype or inner.dtype
    return Composed(tensor, how, inner.activation, spelling, inner.holds, index, (index,), axis, rank,
                    axis, rank, size, dtype, words, values=tensor)


# --------------------------------------------------------------------------
# A mean of probabilities


def pooled_mean(view: View, tensor: str, index: int, read: Read) -> Composed | None:
    """``ReduceMean`` of probabilities over axes that are not the class axis (frames, positions).

    A mean of sigmoids is not the sigmoid of anything, and a mean of
    softmax rows is not a softmax of the logits, so no scaling inserted
    before the activation calibrates it as one temperature would; the mean
    is what the model outputs and downstream code thresholds, so onnxcal
    calibrates the mean as probabilities: z = logit(mean) (or log(mean) for
    softmax rows), the output becomes sigmoid(z / T) (softmax(z / T)) in
    place (docs/graph.md, "A mean of probabilities").
    """
    node = view.node(index)
    if node.op_type != "ReduceMean" or node.domain not in ("", "ai.onnx"):
        return None
    try:
        inner = read(view, spec_of(view, node.input[0]))
    except OnnxcalError:
        return None  # whatever it averages, the data guard still reads the mean
    if inner.activation not in ("softmax", "sigmoid") or inner.holds != "probabilities" or inner.post:
        return None
    axes = reduce_axes(view, index)
    if axes is None:
        return None  # every axis: one number per model run
    reduced = sorted({a % inner.rank for a in axes})
    keep = keepdims(view, index)
    rank = inner.rank if keep else inner.rank - len(reduced)
    if rank == 0 or (inner.activation == "softmax" and inner.class_axis in reduced):
        return None
    axis = inner.class_axis if keep else inner.class_axis - sum(a < inner.class_axis for a in reduced)
    inside = f" {inner.composed}" if inner.composed else ""
    words = (f"the mean over axes {reduced} ({_name(node)}) of {inner.spelling} probabilities{inside}")
    return _probabilities_at(view, tensor, index, inner, axis, rank, "mean-of-probabilities", words)


# --------------------------------------------------------------------------
# The score part of a Concat


def parse_columns(text: str) -> tuple[int, int]:
    """``"4:22"`` -> (4, 22): positions 4 to 21 along the Concat's axis (``--score-columns``)."""
    try:
        start, stop = (int(part) for part in str(text).split(":"))
    except ValueError as exc:
        raise OnnxcalError(
            f"--score-columns {text!r} is not START:STOP", "e.g. --score-columns 4:22 for positions 4 to 21"
        ) from exc
    if not 0 <= start < stop:
        raise OnnxcalError(f"--score-columns {text!r} does not give 0 <= START < STOP", "e.g. --score-columns 4:22")
    return start, stop


@dataclass(frozen=True)
class _Part:
    tensor: str
    start: int | None
    size: int | None
    site: ScoreSite | None

    @property
    def span(self) -> str:
        if self.start is None or self.size is None:
            return "positions of unknown extent"
        return f"positions {self.start}..{self.start + self.size - 1}"

    def describe(self) -> str:
        if self.site is None or self.site.activation is None:
            return f"{self.span} from tensor '{self.tensor}' (not an activation onnxcal knows)"
        return f"{self.span} from {self.site.spelling} {self.site.holds} (logits '{self.site.scores}')"


def _isolable(part: _Part, axis: int) -> bool:
    s = part.site
    if s is None or part.start is None or part.size is None or not s.inserts:
        return False
    if s.activation == "sigmoid":  # every value its own score: the classes run along the Concat's axis
        return not s.layout
    return s.class_axis == axis


def concat_part(
    view: View, tensor: str, index: int, read: Read, columns: tuple[int, int] | None
) -> Composed | None:
    """A ``Concat`` one of whose inputs comes from an activation (a detector's boxes and scores).

    Without ``columns`` (or with columns that are not one activation's
    part), refused: the output mixes class scores with other values, and
    calibrating it whole would treat every position as a class score. With
    ``columns`` naming the positions of one activation's part, that part is
    calibrated drop-in (the scaling before its activation); the other
    positions stay as they are.
    """
    node = view.node(index)
    if node.op_type != "Concat" or node.domain not in ("", "ai.onnx"):
        return None
    rank = _rank(view.shapes.shape(tensor)) or _rank(view.shapes.shape(node.input[0]))
    if rank is None:
        return None
    axis = int(_attr(node, "axis", 1)) % rank
    parts: list[_Part] = []
    start: int | None = 0
    for name in node.input:
        shape = view.shapes.shape(name)
        size = _size(shape[axis]) if shape is not None and len(shape) == rank else None
        try:
            site = read(view, spec_of(view, name))
        except OnnxcalError:
            site = None
        parts.append(_Part(name, start, size, site))
        start = None if start is None or size is None else start + size
    if not any(p.site is not None and p.site.activation is not None for p in parts):
        return None
    chosen = next((p for p in parts if columns is not None and (p.start, (p.start or 0) + (p.size or 0)) == columns
                   and _isolable(p, axis)), None)
    if chosen is None:
        raise _mixed(node, tensor, axis, parts, columns)
    s = chosen.site
    assert s is not None and chosen.start is not None and chosen.size is not None
    scores_axis = axis if s.activation == "sigmoid" else s.scores_axis
    return Composed(
        s.scores, s.logits_from, s.activation, s.spelling, s.holds, s.node, s.nodes, axis, rank,
        scores_axis, s.scores_rank, chosen.size, s.dtype,
        f"positions {chosen.start}..{chosen.start + chosen.size - 1} along axis {axis} of {_name(node)}",
        post=s.post, rewire=s.rewire, branches=s.branches, layout=s.layout, path=(*s.path, index),
        dtypes=s.dtypes, values=s.values, columns=(chosen.start, chosen.start + chosen.size),
    )


def _mixed(
    node: onnx.NodeProto, tensor: str, axis: int, parts: list[_Part], columns: tuple[int, int] | None
) -> OnnxcalError:
    listed = "; ".join(p.describe() for p in parts)
    offer = [(p.start, p.start + p.size) for p in parts if _isolable(p, axis) and p.start is not None and p.size]
    hint = (f"calibrate only the scores with --score-columns {offer[0][0]}:{offer[0][1]}"
            " (the other positions stay as they are)" if offer else
            "onnxcal cannot isolate the scores here (their extent is not fixed in the graph, or they are "
            "laid out differently); choose another output with --output")
    asked = f"--score-columns {columns[0]}:{columns[1]} is not the part of one activation; " if columns else ""
    return OnnxcalError(
        f"{asked}'{tensor}' concatenates values of different kinds along axis {axis} ({_name(node)}): {listed}; "
        "calibrating all of it would treat every position as a class score",
        hint,
    )


# --------------------------------------------------------------------------
# Outputs that are states, not scores

RECURRENT = {"LSTM": ("Y_h", "Y_c"), "GRU": ("Y_h",), "RNN": ("Y_h",)}


def recurrent_state(view: View, tensor: str, loops: bool = True, depth: int = 0) -> str | None:
    """Why ``tensor`` is a recurrent state (in words), or None.

    A state output of an LSTM, GRU or RNN (``Y_h``, ``Y_c``: what a
    streaming caller feeds back as the next call's initial state), and with
    ``loops`` a value a Loop carries or a Scan's state, reached through
    layout ops or a Concat (of hidden and cell states).
    """
    i = view.producer(tensor)
    if i is None or depth > 64:
        return None
    node = view.node(i)
    slot = list(node.output).index(tensor)
    if node.op_type in RECURRENT and 1 <= slot <= len(RECURRENT[node.op_type]):
        return f"the state output {RECURRENT[node.op_type][slot - 1]} of {_name(node)}"
    if loops and node.op_type == "Loop" and slot < len(node.input) - 2:
        return f"a value {_name(node)} carries from one iteration to the next"
    if loops and node.op_type == "Scan" and slot < len(node.input) - int(_attr(node, "num_scan_inputs", 0)):
        return f"a state of {_name(node)}"
    if node.op_type in LAYOUT:
        return recurrent_state(view, node.input[0], loops, depth + 1)
    if node.op_type == "Concat":
        return next((why for x in node.input if (why := recurrent_state(view, x, loops, depth + 1))), None)
    return None


def fed_back(view: View, spec: TensorSpec) -> str | None:
    """The graph input ``spec`` mirrors (same element type and declared shape) and is computed
    from: a state the caller feeds back (``state`` in, ``state_out`` out), or None."""
    if not spec.shape:
        return None
    inits = {i.name for i in view.graph.initializer}
    twins = {vi.name for vi in view.graph.input if vi.name not in inits and tensor_spec(vi).dtype == spec.dtype
             and tensor_spec(vi).shape == spec.shape}
    if not twins:
        return None
    seen, todo = {spec.name}, [spec.name]
    while todo:
        t = todo.pop()
        if t in twins:
            return t
        i = view.producer(t)
        if i is None:
            continue
        node = view.node(i)
        for name in [*node.input, *(x for _, g in subgraphs(node) for n in _all(g) for x in n.input)]:
            if name and name not in seen:
                seen.add(name)
                todo.append(name)
    return None
