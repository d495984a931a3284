"""A small declarative matcher for ONNX subgraphs.

A pattern describes the subgraph that produces a tensor, as a tree:

* ``Op(op_type, inputs..., name=...)``: a node of that type (one of several
  types, a tuple) and domain whose first inputs match the sub-patterns, in
  order (``commutative=True`` also tries the two inputs swapped); its other
  inputs are not looked at. ``output`` says which output of the node the
  tensor must be. ``name`` binds the node, for the pattern's checks.
* ``Var(name)``: any tensor, bound to ``name``; a name used twice must bind
  the same tensor both times.
* ``Const(name)``: a constant (an initializer that no graph input
  overrides, or a ``Constant`` node), bound to its value; ``optional=True``
  also matches a missing (empty) input.
* ``Either(options...)``: the first option that matches.

``match(pattern, tensor, view)`` returns the bindings and the nodes matched,
or None. The walker (``find``), not each pattern, walks the graph: a pattern
only says what one spelling looks like. Matching never changes the graph.

Why our own matcher and not onnxscript's rewriter over onnx-ir: converting a
400 MiB model to onnx-ir and back peaked at 35 % more memory (+437 MiB) and
took 1.6-2.3x the time of reading the ``ModelProto`` with two dicts, and the
two packages add 9.6 MB (33,000 lines) of dependency for what is here about
150 lines (measured with onnx-ir 1.1.0 and onnxscript 0.7.2; see the commit
that added this module).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, cast

import numpy as np
import onnx

from .external import tensor_array
from .tensors import _Shapes, constant_node_value, overridable


@dataclass(frozen=True)
class Var:
    """Any tensor, bound to ``name``."""

    name: str


@dataclass(frozen=True)
class Const:
    """A constant tensor, bound to ``name`` (its value as a numpy array)."""

    name: str
    optional: bool = False


@dataclass(frozen=True)
class Op:
    """A node of ``op_type`` (a type or a tuple of types) whose first inputs match ``inputs``."""

    op_type: str | tuple[str, ...]
    inputs: tuple[Pattern, ...] = ()
    domain: str | tuple[str, ...] = ""
    name: str | None = None
    output: int = 0
    commutative: bool = False


@dataclass(frozen=True)
class Either:
    """The first of ``options`` that matches."""

    options: tuple[Pattern, ...]


Pattern = Var | Const | Op | Either


def op(op_type: str | tuple[str, ...], *inputs: Pattern, **kw: Any) -> Op:
    """``Op`` with its inputs given positionally: ``op("Div", a, b, name="div")``."""
    return Op(op_type, tuple(inputs), **kw)


def either(*options: Pattern) -> Either:
    return Either(tuple(options))


_DEFAULT = ("", "ai.onnx")


class View:
    """What patterns read of a graph: producers, constants, attributes, shapes, the opset.

    ``sub(graph)`` gives the view of a subgraph (an ``If`` branch, a
    ``Loop``/``Scan`` body): its own producers, and the constants of the
    scopes around it (a subgraph may read any tensor of an enclosing graph;
    ONNX IR spec, "Names Within a Graph").
    """

    def __init__(
        self, model: onnx.ModelProto, opset: int | None, graph: onnx.GraphProto | None = None,
        parent: View | None = None,
    ) -> None:
        self.model = model
        self.graph: onnx.GraphProto = model.graph if graph is None else graph
        self.parent = parent
        self.opset = opset or 0
        self.producers = {out: i for i, n in enumerate(self.graph.node) for out in n.output if out}
        skip = overridable(model) if parent is None else set()
        self._inits = {i.name: i for i in self.graph.initializer if i.name not in skip}
        self._inputs = {vi.name for vi in self.graph.input} if parent is not None else set()
        self.shapes: _Shapes = parent.shapes if parent is not None else _Shapes(model)
        self.output: str = parent.output if parent is not None else ""  # the output being read, for messages

    def sub(self, graph: onnx.GraphProto) -> View:
        """The view of ``graph``, a subgraph of an attribute of one of this graph's nodes."""
        return View(self.model, self.opset, graph, self)

    def producer(self, tensor: str) -> int | None:
        return self.producers.get(tensor)

    def node(self, index: int) -> onnx.NodeProto:
        return cast(onnx.NodeProto, self.graph.node[index])

    def constant(self, tensor: str) -> np.ndarray | None:
        """The value of ``tensor`` when it is a constant of the graph (or of a scope around it), else None."""
        if tensor in self._inits:
            return tensor_array(self._inits[tensor])
        i = self.producers.get(tensor)
        if i is not None:
            value = constant_node_value(self.graph.node[i])
            return None if value is None else tensor_array(value)
        if self.parent is not None and tensor not in self._inputs:
            return self.parent.constant(tensor)
        return None


@dataclass
class Found:
    """What a match bound: tensors and constants by name, nodes by name, every node matched."""

    tensors: dict[str, str] = field(default_factory=dict)
    constants: dict[str, np.ndarray | None] = field(default_factory=dict)
    nodes: dict[str, int] = field(default_factory=dict)
    matched: set[int] = field(default_factory=set)

    def copy(self) -> Found:
        return Found(dict(self.tensors), dict(self.constants), dict(self.nodes), set(self.matched))


def match(pattern: Pattern, tensor: str, view: View) -> Found | None:
    """Match ``pattern`` against the subgraph producing ``tensor``; the bindings, or None."""
    return _match(pattern, tensor, view, Found())


def _match(p: Pattern, tensor: str, view: View, found: Found) -> Found | None:
    if isinstance(p, Var):
        bound = found.tensors.get(p.name)
        if bound is not None:
            return found if bound == tensor else None
        found = found.copy()
        found.tensors[p.name] = tensor
        return found
    if isinstance(p, Const):
        if not tensor:
            return found if p.optional else None
        value = view.constant(tensor)
        if value is None:
            return None
        found = found.copy()
        found.constants[p.name] = value
        return found
    if isinstance(p, Either):
        for option in p.options:
            got = _match(option, tensor, view, found)
            if got is not None:
                return got
        return None
    return _match_op(p, tensor, view, found)


def _match_op(p: Op, tensor: str, view: View, found: Found) -> Found | None:
    if not tensor:
        return None
    index = view.producer(tensor)
    if index is None:
        return None
    node = view.node(index)
    types = (p.op_type,) if isinstance(p.op_type, str) else p.op_type
    domains = (p.domain,) if isinstance(p.domain, str) else p.domain
    domains = _DEFAULT if domains == ("",) else domains
    if node.op_type not in types or node.domain not in domains:
        return None
    if len(node.output) <= p.output or node.output[p.output] != tensor:
        return None
    orders = [list(node.input)]
    if p.commutative and len(node.input) == 2:
        orders.append(list(reversed(node.input)))
    for inputs in orders:
        got = _match_inputs(p, inputs, view, found)
        if got is not None:
            if p.name is not None:
                if got.nodes.get(p.name, index) != index:
                    continue
                got.nodes[p.name] = index
            got.matched.add(index)
            return got
    return None


def _match_inputs(p: Op, inputs: list[str], view: View, found: Found) -> Found | None:
    got: Found | None = found.copy()
    for i, sub in enumerate(p.inputs):
        name = inputs[i] if i < len(inputs) else ""
        assert got is not None  # None returned below
        got = _match(sub, name, view, got)
        if got is None:
            return None
    return got
