"""The patched model at the identity riding in the patched model's own session (``calibrate``'s checks).

``calibrate`` checks the graph it writes against the NumPy reference on a
sample of rows, and the same graph with its calibration parameters at the
identity (:func:`onnxcal.graph.at_identity`) against the original's outputs.
The two graphs differ only in the parameters' initializers and in what
depends on them: the head (a Div and a Softmax, say). ``identity_rider``
adds a copy of just those nodes, fed by the identity's initializers, to
the written graph, so one session runs both on the sample's rows and the
body of the model runs once, not twice.

The written graph's nodes stay as they are, and the copy reads only
tensors that are already the graph's outputs, inputs or initializers:
onnxruntime does not fuse away a node whose output is a graph output, so
the added consumers cannot change how the written nodes are optimised, and
the check still runs the graph that is written (asked of onnxruntime's own
optimiser in tests/test_rider.py: a MatMul followed by a Div by a constant
becomes one FusedMatMul when the MatMul's output has one reader and is no
output; a second reader blocks that fusion, and so does the MatMul's
output being an output). When the copy would read an inner tensor (a
folded weight, a head whose input is not an output, ``drop_logits``), or
anything that differs sits in a subgraph, there is no rider and the
identity runs in a session of its own, as ``verify`` runs it.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import onnx

SUFFIX = "__onnxcal_at_identity"
"""Added to the names of the copied nodes, their outputs and the identity's initializers."""


@dataclass(frozen=True)
class Rider:
    """The written graph with the identity's nodes beside it; ``outputs`` maps each name of the identity's
    outputs to the output that gives it in ``model`` (itself when the parameters do not reach it)."""

    model: onnx.ModelProto
    outputs: dict[str, str]


def _subgraph_names(node: onnx.NodeProto) -> set[str]:
    """Every tensor name a node's subgraphs mention (read or written), at any depth."""
    names: set[str] = set()
    for attr in node.attribute:
        for g in ([attr.g] if attr.HasField("g") else []) + list(attr.graphs):
            for inner in g.node:
                names.update(inner.input)
                names.update(inner.output)
                names.update(_subgraph_names(inner))
            names.update(o.name for o in g.output)
    return names


def _has_subgraph(node: onnx.NodeProto) -> bool:
    return any(a.HasField("g") or len(a.graphs) for a in node.attribute)


def _changed_initializers(patched: onnx.GraphProto, at_one: onnx.GraphProto) -> set[str] | None:
    """The initializers whose values differ; None when the graphs differ in anything else."""
    if len(patched.node) != len(at_one.node) or any(a != b for a, b in zip(patched.node, at_one.node, strict=True)):
        return None
    before = {t.name: t for t in patched.initializer}
    after = {t.name: t for t in at_one.initializer}
    if before.keys() != after.keys() or len(before) != len(patched.initializer):
        return None
    if list(patched.input) != list(at_one.input) or list(patched.output) != list(at_one.output):
        return None
    return {name for name, t in after.items() if t != before[name]}


def _tainted_nodes(graph: onnx.GraphProto, changed: set[str]) -> list[int] | None:
    """The nodes downstream of ``changed`` (in graph order), or None when a subgraph is involved."""
    tainted = set(changed)
    nodes: list[int] = []
    for i, node in enumerate(graph.node):
        reads = set(node.input) | (_subgraph_names(node) if _has_subgraph(node) else set())
        if reads & tainted:
            if _has_subgraph(node):
                return None
            nodes.append(i)
            tainted.update(o for o in node.output if o)
    return nodes


def _unique(graph: onnx.GraphProto, names: Iterable[str]) -> bool:
    """True when none of ``names`` is already a name in ``graph``."""
    used = {t.name for t in graph.initializer} | {v.name for v in graph.input} | {v.name for v in graph.output}
    for node in graph.node:
        used.update(node.input)
        used.update(node.output)
        used.add(node.name)
    return not used.intersection(names)


def identity_rider(patched: onnx.ModelProto, at_one: onnx.ModelProto, names: Sequence[str]) -> Rider | None:
    """``patched`` with a copy of the nodes ``at_one`` computes differently, giving ``names`` at the identity.

    ``at_one`` is ``patched`` with its calibration parameters at the
    identity (:func:`onnxcal.graph.at_identity`). None when the graphs differ
    in more than initializers, when a node that differs has or feeds a
    subgraph, or when the copy would read a tensor of ``patched`` that is
    not a graph output, input or initializer (see the module docstring).
    """
    g, one = patched.graph, at_one.graph
    changed = _changed_initializers(g, one)
    if not changed:
        return None
    indices = _tainted_nodes(g, changed)
    if not indices:
        return None
    produced = {o for i in indices for o in g.node[i].output if o}
    tainted = produced | changed
    if not tainted.intersection(names):  # the parameters reach none of them: the written graph gives them
        return Rider(patched, {name: name for name in names})
    allowed = {v.name for v in g.output} | {v.name for v in g.input} | {t.name for t in g.initializer}
    read = {x for i in indices for x in g.node[i].input if x and x not in tainted}
    if not read <= allowed:
        return None
    if not _unique(g, [n + SUFFIX for n in tainted] + [g.node[i].name + SUFFIX for i in indices if g.node[i].name]):
        return None

    def renamed(name: str) -> str:
        return name + SUFFIX if name in tainted else name

    out = onnx.ModelProto()
    out.CopyFrom(patched)
    values = {t.name: t for t in one.initializer}
    for name in sorted(changed):
        init = out.graph.initializer.add()
        init.CopyFrom(values[name])
        init.name = renamed(name)
    for i in indices:
        node = out.graph.node.add()
        node.CopyFrom(g.node[i])
        if node.name:
            node.name += SUFFIX
        node.input[:] = [renamed(x) for x in node.input]
        node.output[:] = [renamed(x) for x in node.output]
    declared = {v.name: v for v in g.output}
    outputs: dict[str, str] = {}
    for name in names:
        if name not in tainted:
            outputs[name] = name
            continue
        if name not in declared:
            return None
        vi = out.graph.output.add()
        vi.CopyFrom(declared[name])
        vi.name = renamed(name)
        outputs[name] = vi.name
    return Rider(out, outputs)
