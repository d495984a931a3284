"""The maps of :mod:`onnxcal.maps` in a patched graph: their parameters, read back and set to the identity.

A map's subgraph holds its parameters in initializers the builder names
(``onnxcal_matrix_weight_t``, ``onnxcal_beta_c``, ...). The patch records,
for every float initializer, the name it has in a graph of the map alone
(its *role*) and the name it got in the model (``Record.initializers``).
Rebuilding the map alone from the record's parameters then gives, by role,
the values the graph must hold (``verify``'s record check), and rebuilding
it from the map's identity parameters the values that make the patched
model give the original's outputs (``verify``'s identity check).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import onnx
from onnx import numpy_helper

from ..scaling import Scaling
from .external import tensor_array
from .find import find_scores
from .record import Record

# Maps whose builder can stop at logits (feeding the model's own activation).
LOGIT_MAPS = ("matrix", "dirichlet", "beta")
_FLOAT = (onnx.TensorProto.FLOAT16, onnx.TensorProto.FLOAT, onnx.TensorProto.DOUBLE)


def build_options(method: str) -> dict[str, str]:
    """The keywords a map's ``build`` gets in a patch."""
    return {"output": "logits"} if method in LOGIT_MAPS else {}


def is_parameter(tensor: onnx.TensorProto) -> bool:
    """True for a float initializer (the map's numbers; not an axes or index constant)."""
    return tensor.data_type in _FLOAT


def map_values(scaling: Scaling, dtype: str, num_classes: int) -> dict[str, np.ndarray]:
    """The float initializers of the map alone, by role (their name there), as float64."""
    from ..maps import module

    sub = module(scaling.method).build("x", dtype, num_classes, scaling.parameters, **build_options(scaling.method))
    return {t.name: numpy_helper.to_array(t).astype(np.float64) for t in sub.initializers if is_parameter(t)}


def identity_parameters(scaling: Scaling, num_classes: int) -> dict[str, Any] | None:
    """Parameters of the same map under which it gives back the model's own probabilities, or None.

    Matrix and Dirichlet: W = I, b = 0 (softmax(log softmax z) = softmax z);
    beta: a = b = 1, c = 0 (the logit itself); ensemble temperature: the
    weights (0, 1, 0); one-vs-rest Platt on one logit: a = 1, b = 0. The
    lookups (isotonic, histogram) and multiclass one-vs-rest Platt have
    none (a lookup is clamped outside its knots; renormalised sigmoids are
    not a softmax).
    """
    k = num_classes
    if scaling.method in ("matrix", "dirichlet"):
        return {"W": np.eye(k).tolist(), "b": [0.0] * k}
    if scaling.method == "beta":
        return {"a": 1.0, "b": 1.0, "c": 0.0}
    if scaling.method == "ensemble-temperature":
        return {"temperature": scaling.parameters["temperature"], "weights": [0.0, 1.0, 0.0]}
    if scaling.method == "ovr-platt" and k == 1:
        return {"a": [1.0], "b": [0.0]}
    return None


def expected_values(scaling: Scaling, dtype: str, num_classes: int, roles: dict[str, str]) -> dict[str, np.ndarray]:
    """The values the graph's map initializers (``roles``: role -> name) must hold, by role."""
    built = map_values(scaling, dtype, num_classes)
    return {role: built[role].reshape(-1) for role in roles if role in built}


def graph_values(model: onnx.ModelProto, roles: dict[str, str]) -> dict[str, np.ndarray] | None:
    """The values the graph holds for ``roles`` (role -> initializer name), or None when one is missing."""
    inits = {i.name: i for i in model.graph.initializer}
    if any(name not in inits for name in roles.values()):
        return None
    return {role: tensor_array(inits[name]).astype(np.float64).reshape(-1) for role, name in roles.items()}


def set_identity(model: onnx.ModelProto, scaling: Scaling, roles: dict[str, str], dtype: str, num_classes: int) -> bool:
    """Set in place the map's initializers of ``model`` to its identity; False when it has none."""
    ident = identity_parameters(scaling, num_classes)
    if ident is None:
        return False
    values = map_values(Scaling(scaling.method, ident, scaling.kind), dtype, num_classes)
    inits = {i.name: i for i in model.graph.initializer}
    for role, name in roles.items():
        init = inits.get(name)
        if init is None or role not in values:
            return False
        old = tensor_array(init)
        init.CopyFrom(numpy_helper.from_array(values[role].astype(old.dtype).reshape(old.shape), name))
    return True


def _site_of(model: onnx.ModelProto, record: Record) -> tuple[str, int]:
    """The dtype the map was built in and the width it reads, from the patched model's site."""
    site = find_scores(model, record.output, score_columns=record.score_columns or None)
    width = 1 if site.scores_rank == 1 else int(site.num_classes or 1)
    return record.compute_dtype or site.dtype, width


def recorded_values(model: onnx.ModelProto, record: Record) -> dict[str, Any]:
    """What the record says the graph's parameter initializers hold, by role.

    The record's parameters for the affine maps; for a map of
    :mod:`onnxcal.maps`, its initializers rebuilt from the record's
    parameters (``verify.record_check`` compares them with the graph's).
    """
    if record.scaling.is_affine or record.folded:
        return dict(record.parameters)
    dtype, width = _site_of(model, record)
    return expected_values(record.scaling, dtype, width, record.initializers)


def map_identity(model: onnx.ModelProto, record: Record) -> bool:
    """Set a map record's initializers in ``model`` to the map's identity; False when it has none."""
    dtype, width = _site_of(model, record)
    return set_identity(model, record.scaling, record.initializers, dtype, width)


def identity_unavailable(records: tuple[Record, ...] | list[Record]) -> str | None:
    """Why the patched model cannot be set to the identity, or None when it can."""
    for r in records:
        if r.folded or r.scaling.is_affine:
            continue
        width = 1 if r.kind == "binary" else 2
        if identity_parameters(r.scaling, width) is None:
            return (f"{r.method} calibration has no parameters under which it gives back the model's own "
                    "probabilities (the reference check compares it with its NumPy reference instead)")
    return None
