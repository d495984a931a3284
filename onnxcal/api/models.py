"""Models given as ``onnx.ModelProto`` where a model path is accepted (the Python API).

A notebook holds the model in memory; onnxcal's checks (the size limit, the
external data, onnx's checker, the hashes a record keeps) are made on a
model file. A ModelProto is written to a private temporary folder for the
call, under a name that says where it came from, and removed afterwards: the
call then runs exactly as it does on a path, with the same checks and errors.
"""

from __future__ import annotations

import functools
import inspect
import tempfile
from collections.abc import Callable
from pathlib import Path
from typing import Any, TypeVar

import onnx

from .._limits import DEFAULT_MAX_MODEL_BYTES, format_bytes, parse_size
from ..errors import OnnxcalError

F = TypeVar("F", bound=Callable[..., Any])

MEMORY_MODEL = "modelproto"
"""The stem of the temporary file a ModelProto is written to (messages and records name it)."""


def models_in_memory(*names: str) -> Callable[[F], F]:
    """Decorate an ``api`` function whose arguments ``names`` are model paths: each may also be an
    ``onnx.ModelProto``, written to a temporary file for the call."""

    def wrap(fn: F) -> F:
        signature = inspect.signature(fn)

        @functools.wraps(fn)
        def call(*args: Any, **kwargs: Any) -> Any:
            bound = signature.bind(*args, **kwargs)
            given = {n: bound.arguments[n] for n in names if isinstance(bound.arguments.get(n), onnx.ModelProto)}
            if not given:
                return fn(*args, **kwargs)
            limit = parse_size(bound.arguments.get("max_model_bytes", DEFAULT_MAX_MODEL_BYTES), "max_model_bytes")
            with tempfile.TemporaryDirectory(prefix="onnxcal-model-") as tmp:
                for i, (name, model) in enumerate(given.items()):
                    stem = MEMORY_MODEL if i == 0 else f"{MEMORY_MODEL}_{name}"
                    bound.arguments[name] = _written(model, Path(tmp) / f"{stem}.onnx", name, limit)
                return fn(*bound.args, **bound.kwargs)

        return call  # type: ignore[return-value]

    return wrap


def _written(model: onnx.ModelProto, path: Path, name: str, limit: int) -> Path:
    """``model`` serialized to ``path``; refused when it names external data or exceeds ``limit``."""
    external = [t.name for t in _tensors(model) if t.data_location == onnx.TensorProto.EXTERNAL]
    if external:
        raise OnnxcalError(
            f"the ModelProto given as {name} keeps tensor '{external[0]}' in an external data file, which "
            "onnxcal cannot find from a model in memory",
            "pass the path of the model file instead, or load it with onnx.load (which reads the data in)",
        )
    size = model.ByteSize()
    if size > limit:
        raise OnnxcalError(
            f"the ModelProto given as {name} is {format_bytes(size)}, more than max_model_bytes "
            f"({format_bytes(limit)})",
            "raise max_model_bytes if the machine has the memory for it",
        )
    path.write_bytes(model.SerializeToString())
    return path


def _tensors(model: onnx.ModelProto) -> list[onnx.TensorProto]:
    """The initializers of the main graph and of every subgraph."""
    found: list[onnx.TensorProto] = []
    graphs = [model.graph]
    while graphs:
        g = graphs.pop()
        found.extend(g.initializer)
        for node in g.node:
            for attr in node.attribute:
                if attr.type == onnx.AttributeProto.GRAPH:
                    graphs.append(attr.g)
                elif attr.type == onnx.AttributeProto.GRAPHS:
                    graphs.extend(attr.graphs)
                elif attr.type == onnx.AttributeProto.TENSOR:
                    found.append(attr.t)
    return found
