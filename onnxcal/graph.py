"""ONNX graph reading and surgery.

Plain functions over ``onnx.ModelProto``. A model passed in is never changed:
rewrites work on a copy and return it, checked with
``onnx.checker.check_model(full_check=True)``.

The rewrites (one function each):

* ``_insert_before_activation`` — the class scores already pass through a
  Softmax, LogSoftmax or Sigmoid: put the calibration nodes in front of it,
  so every output keeps its name, shape, dtype and meaning (drop-in).
* ``_append_activation`` — the output holds raw logits: add the calibration
  nodes and a ``Softmax`` (or, for binary and multi-label models, a
  ``Sigmoid``) after it and expose the result as a new output.
* ``_set_parameters`` — the model already carries an onnxcal record: replace
  the parameter initializers instead of stacking a second calibration.

The calibration nodes come from one builder per form of the map:
``_divide_nodes`` (temperature: ``Div(scores, T)``, T a scalar or one per
label) and ``_affine_nodes`` (vector and Platt scaling:
``Add(Mul(scores, w), b)``).

The calibration record is JSON in ``metadata_props`` under ``RECORD_KEY``.
"""

from __future__ import annotations

import json
import os
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path

import numpy as np
import onnx
from onnx import helper, numpy_helper

from . import __version__
from ._files import atomic_write_bytes, require_file
from .errors import OnnxcalError
from .scaling import Scaling, check_scaling

RECORD_KEY = "onnxcal.calibration"
RECORD_FORMAT = 1
DEFAULT_OUTPUT_NAME = "probabilities"

ACTIVATIONS = {"Softmax": "softmax", "LogSoftmax": "logsoftmax", "Sigmoid": "sigmoid"}
# Ops that pass class scores through unchanged (values and class order kept).
_PASS_THROUGH = {"Identity"}
_FLOAT_TYPES = {
    onnx.TensorProto.FLOAT,
    onnx.TensorProto.DOUBLE,
    onnx.TensorProto.FLOAT16,
    onnx.TensorProto.BFLOAT16,
}


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


@dataclass(frozen=True)
class ScoreSite:
    """Where a model's class scores are and what turns them into probabilities.

    Attributes
    ----------
    output : str
        The graph output chosen as class scores.
    scores : str
        The tensor holding logits: the input of ``activation`` when there is
        one, else the output itself.
    activation : str or None
        ``"softmax"``, ``"logsoftmax"``, ``"sigmoid"`` or None (raw logits).
    node : int or None
        Index in ``graph.node`` of the activation node.
    class_axis : int
        Class axis of ``output``, non-negative.
    rank : int
        Rank of ``output``.
    num_classes : int or None
        Size of the class axis when it is fixed in the graph.
    dtype : str
        numpy dtype name of the scores.
    """

    output: str
    scores: str
    activation: str | None
    node: int | None
    class_axis: int
    rank: int
    num_classes: int | None
    dtype: str


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

    def to_dict(self) -> dict:
        d = asdict(self)
        d["record"] = self.record.to_dict() if self.record else None
        return d


@dataclass(frozen=True)
class Record:
    """The calibration record onnxcal writes into a patched model.

    Attributes
    ----------
    temperature : float or None
        T when the method is temperature scaling with one T; else None
        (see ``parameters``).
    output : str
        The output that carries calibrated probabilities.
    scores : str
        The tensor divided by T.
    rewrite : str
        ``"insert-before-activation"``, ``"append-softmax"`` or ``"append-sigmoid"``.
    activation : str
        The activation after the calibration nodes (``"softmax"``, ``"logsoftmax"``, ``"sigmoid"``).
    temperature_initializer : str
        Name of the initializer holding T ("" when the method has none).
    source_sha256 : str
        SHA-256 of the uncalibrated model file.
    source_path : str
        Path of the uncalibrated model when it was patched.
    fit : dict
        Fit summary (method, metrics, intervals), as in FIT.json.
    method : str
        ``"temperature"``, ``"vector"`` or ``"platt"``.
    parameters : dict
        The baked-in parameters (``{"temperature": T}``, ``{"w": ..., "b": ...}``).
    initializers : dict
        Name of the initializer holding each parameter.
    onnxcal_version : str
    format : int
    """

    temperature: float | None
    output: str
    scores: str
    rewrite: str
    activation: str
    temperature_initializer: str
    source_sha256: str
    source_path: str
    fit: dict = field(default_factory=dict)
    method: str = "temperature"
    parameters: dict = field(default_factory=dict)
    initializers: dict = field(default_factory=dict)
    onnxcal_version: str = __version__
    format: int = RECORD_FORMAT

    def to_dict(self) -> dict:
        return asdict(self)

    @property
    def scaling(self) -> Scaling:
        """The calibration map the record describes."""
        return Scaling(self.method, dict(self.parameters), self.fit.get("kind", "multiclass"))


def load_model(path: str | os.PathLike) -> onnx.ModelProto:
    """Load and check an ONNX model file, with errors that name the file.

    Raises
    ------
    OnnxcalError
        The file is missing, is not an ONNX model, or fails onnx's checker.
    """
    p = require_file(path, "model")
    try:
        model = onnx.load(str(p))
    except Exception as exc:  # protobuf DecodeError, external-data errors, ...
        raise OnnxcalError(
            f"'{p}' is not a readable ONNX model ({type(exc).__name__}: {exc})",
            "give the path of an .onnx file exported by your framework",
        ) from exc
    if model.ir_version == 0 or not model.graph.output:
        raise OnnxcalError(
            f"'{p}' is not an ONNX model (no IR version or no graph outputs)",
            "give the path of an .onnx file exported by your framework",
        )
    try:
        onnx.checker.check_model(model)
    except Exception as exc:
        raise OnnxcalError(
            f"'{p}' fails the ONNX checker: {str(exc).splitlines()[0]}",
            "re-export the model or repair it before calibrating",
        ) from exc
    return model


def opset_version(model: onnx.ModelProto) -> int:
    """Opset of the default ONNX domain."""
    for imp in model.opset_import:
        if imp.domain in ("", "ai.onnx"):
            return int(imp.version)
    raise OnnxcalError("model has no opset import for the default ONNX domain")


def _dims(vi: onnx.ValueInfoProto) -> tuple[int | str | None, ...] | None:
    t = vi.type.tensor_type
    if not vi.type.HasField("tensor_type") or not t.HasField("shape"):
        return None
    return tuple(
        d.dim_value if d.HasField("dim_value") else (d.dim_param or None) for d in t.shape.dim
    )


def tensor_spec(vi: onnx.ValueInfoProto) -> TensorSpec:
    """Describe a ValueInfoProto as a TensorSpec."""
    kind = vi.type.WhichOneof("value")
    if kind != "tensor_type":
        return TensorSpec(vi.name, kind or "unknown", None, False)
    elem = vi.type.tensor_type.elem_type
    dtype = np.dtype(helper.tensor_dtype_to_np_dtype(elem)).name if elem else "unknown"
    return TensorSpec(vi.name, dtype, _dims(vi), elem in _FLOAT_TYPES)


def _producers(graph: onnx.GraphProto) -> dict[str, int]:
    return {out: i for i, node in enumerate(graph.node) for out in node.output}


def _attr(node: onnx.NodeProto, name: str, default):
    for a in node.attribute:
        if a.name == name:
            return helper.get_attribute_value(a)
    return default


def _pick_output(graph: onnx.GraphProto, output: str | None) -> TensorSpec:
    specs = [tensor_spec(vi) for vi in graph.output]
    if output is not None:
        for s in specs:
            if s.name == output:
                if not s.is_float:
                    raise OnnxcalError(
                        f"output '{output}' has element type {s.dtype}, not a float type",
                        "choose the output that holds class scores",
                    )
                return s
        names = ", ".join(s.name for s in specs)
        raise OnnxcalError(f"the model has no output named '{output}'", f"choose one of: {names}")
    floats = [s for s in specs if s.is_float]
    if not floats:
        kinds = ", ".join(f"{s.name} ({s.dtype})" for s in specs)
        raise OnnxcalError(
            f"the model has no floating-point output to calibrate (outputs: {kinds})",
            "onnxcal needs an output of class scores or probabilities",
        )
    # Prefer an output shaped like (batch, classes).
    ranked = [s for s in floats if s.shape is not None and len(s.shape) >= 2]
    return (ranked or floats)[0]


def find_scores(model: onnx.ModelProto, output: str | None = None) -> ScoreSite:
    """Locate the class scores behind ``output`` (or the likeliest output).

    Walks back from the output through ops that pass values through
    unchanged to the last Softmax, LogSoftmax or Sigmoid, if there is one.

    Raises
    ------
    OnnxcalError
        No such output, no float output, or a class axis that does not fit.
    """
    graph = model.graph
    spec = _pick_output(graph, output)
    rank = len(spec.shape) if spec.shape is not None else 2
    producers = _producers(graph)
    tensor, node_idx, activation = spec.name, None, None
    axis = -1 if opset_version(model) >= 13 else 1
    while tensor in producers:
        node = graph.node[producers[tensor]]
        if node.op_type in ACTIVATIONS and node.domain in ("", "ai.onnx"):
            node_idx, activation = producers[tensor], ACTIVATIONS[node.op_type]
            default = -1 if opset_version(model) >= 13 else 1
            axis = int(_attr(node, "axis", default)) if activation != "sigmoid" else -1
            tensor = node.input[0]
            break
        if node.op_type in _PASS_THROUGH:
            tensor = node.input[0]
            continue
        break
    if activation is None:
        tensor = spec.name
    class_axis = axis + rank if axis < 0 else axis
    if not 0 <= class_axis < rank:
        raise OnnxcalError(
            f"class axis {axis} is out of range for output '{spec.name}' of rank {rank}",
            "check the model's Softmax axis",
        )
    size = spec.shape[class_axis] if spec.shape is not None else None
    return ScoreSite(
        output=spec.name,
        scores=tensor,
        activation=activation,
        node=node_idx,
        class_axis=class_axis,
        rank=rank,
        num_classes=size if isinstance(size, int) and size > 0 else None,
        dtype=spec.dtype,
    )


def read_record(model: onnx.ModelProto) -> Record | None:
    """Return the onnxcal calibration record of ``model``, or None.

    Raises
    ------
    OnnxcalError
        A record is present but is not valid JSON of the expected form.
    """
    for prop in model.metadata_props:
        if prop.key == RECORD_KEY:
            try:
                data = json.loads(prop.value)
                record = Record(**data)
                if not record.parameters and record.temperature is not None:  # written before vector scaling
                    record = replace(
                        record,
                        parameters={"temperature": record.temperature},
                        initializers={"temperature": record.temperature_initializer},
                    )
                return record
            except (ValueError, TypeError) as exc:
                raise OnnxcalError(
                    f"the model's calibration record ({RECORD_KEY}) is damaged: {exc}",
                    "patch the original model again",
                ) from exc
    return None


def describe(model: onnx.ModelProto, path: str | os.PathLike, sha256: str) -> ModelInfo:
    """Summarise a model for ``inspect``."""
    graph = model.graph
    init_names = {i.name for i in graph.initializer}
    inputs = tuple(tensor_spec(vi) for vi in graph.input if vi.name not in init_names)
    record = read_record(model)
    try:  # a patched model: describe the calibrated output
        site = find_scores(model, record.output if record else None)
    except OnnxcalError:
        site = None
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
    )


def temperature_value(model: onnx.ModelProto, record: Record) -> float | None:
    """The value of the record's temperature initializer in the graph, or None."""
    for init in model.graph.initializer:
        if init.name == record.temperature_initializer:
            arr = numpy_helper.to_array(init)
            return float(arr.reshape(-1)[0]) if arr.size == 1 else None
    return None


def parameter_values(model: onnx.ModelProto, record: Record) -> dict[str, np.ndarray] | None:
    """The values of the record's parameter initializers in the graph (flattened), or None."""
    inits = {i.name: i for i in model.graph.initializer}
    if not record.initializers or any(n not in inits for n in record.initializers.values()):
        return None
    return {k: numpy_helper.to_array(inits[n]).astype(np.float64).reshape(-1) for k, n in record.initializers.items()}


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
    return names


def _parameter_tensor(name: str, value, dtype: str, site: ScoreSite) -> onnx.TensorProto:
    """A parameter initializer: a scalar, or one value per class shaped to
    broadcast along the class axis of the scores (ONNX multidirectional
    broadcasting aligns trailing dims)."""
    arr = np.asarray(value, dtype=np.dtype(dtype))
    if arr.ndim == 1:
        arr = arr.reshape((arr.size,) + (1,) * (site.rank - 1 - site.class_axis))
    return numpy_helper.from_array(arr, name=name)


def _divide_nodes(graph, site, scaling, source, taken):
    """``Div(source, T)``: temperature scaling (one T, or one per label)."""
    t_name = unique_name("onnxcal_temperature", taken)
    graph.initializer.append(_parameter_tensor(t_name, scaling.parameters["temperature"], site.dtype, site))
    out = unique_name(f"{source}_calibrated", taken)
    div = helper.make_node("Div", [source, t_name], [out], name=unique_name("onnxcal_divide", taken))
    return [div], out, {"temperature": t_name}


def _affine_nodes(graph, site, scaling, source, taken):
    """``Add(Mul(source, w), b)``: vector scaling (per class) or Platt scaling (scalars)."""
    w_name = unique_name("onnxcal_scale", taken)
    b_name = unique_name("onnxcal_bias", taken)
    for name, key in ((w_name, "w"), (b_name, "b")):
        graph.initializer.append(_parameter_tensor(name, scaling.parameters[key], site.dtype, site))
    scaled = unique_name(f"{source}_scaled", taken)
    out = unique_name(f"{source}_calibrated", taken)
    nodes = [
        helper.make_node("Mul", [source, w_name], [scaled], name=unique_name("onnxcal_multiply", taken)),
        helper.make_node("Add", [scaled, b_name], [out], name=unique_name("onnxcal_add", taken)),
    ]
    return nodes, out, {"w": w_name, "b": b_name}


_NODE_BUILDERS = {"temperature": _divide_nodes, "vector": _affine_nodes, "platt": _affine_nodes}


def _insert_before_activation(
    graph: onnx.GraphProto, site: ScoreSite, nodes: list[onnx.NodeProto], calibrated: str
) -> None:
    """Rewire the activation node to read the calibrated scores."""
    act = graph.node[site.node]
    act.input[0] = calibrated
    for offset, node in enumerate(nodes):
        graph.node.insert(site.node + offset, node)


def _append_activation(
    graph: onnx.GraphProto,
    site: ScoreSite,
    nodes: list[onnx.NodeProto],
    calibrated: str,
    taken: set[str],
    new_output: str,
    drop_logits: bool,
    activation: str,
) -> None:
    """Add ``Softmax`` (or ``Sigmoid``) of the calibrated scores as a new graph output."""
    graph.node.extend(nodes)
    if activation == "softmax":
        act = helper.make_node(
            "Softmax", [calibrated], [new_output], name=unique_name("onnxcal_softmax", taken),
            axis=site.class_axis,
        )
    else:
        act = helper.make_node("Sigmoid", [calibrated], [new_output], name=unique_name("onnxcal_sigmoid", taken))
    graph.node.append(act)
    old = next(vi for vi in graph.output if vi.name == site.output)
    new_vi = onnx.ValueInfoProto()
    new_vi.CopyFrom(old)
    new_vi.name = new_output
    if drop_logits:
        keep = [vi for vi in graph.output if vi.name != site.output]
        del graph.output[:]
        graph.output.extend(keep)
    graph.output.append(new_vi)


def _set_parameters(graph: onnx.GraphProto, record: Record, scaling: Scaling) -> None:
    """Replace the values of the existing parameter initializers."""
    if scaling.method != record.method or set(record.initializers) != set(scaling.parameters):
        raise OnnxcalError(
            f"the model is already calibrated with {record.method} scaling and cannot be "
            f"re-patched with {scaling.method} scaling in place",
            "patch the original, uncalibrated model instead",
        )
    inits = {init.name: i for i, init in enumerate(graph.initializer)}
    for key, name in record.initializers.items():
        if name not in inits:
            raise OnnxcalError(
                f"the calibration record names initializer '{name}' but the graph has none of that name",
                "patch the original, uncalibrated model instead",
            )
        old = graph.initializer[inits[name]]
        new = np.asarray(scaling.parameters[key], dtype=helper.tensor_dtype_to_np_dtype(old.data_type))
        if new.size != int(np.prod(old.dims)):
            raise OnnxcalError(
                f"the new {scaling.method} parameter '{key}' has {new.size} values, the model's has "
                f"{int(np.prod(old.dims))}",
                "patch the original, uncalibrated model instead",
            )
        graph.initializer[inits[name]].CopyFrom(numpy_helper.from_array(new.reshape(tuple(old.dims)), name))


def _write_record(model: onnx.ModelProto, record: Record) -> None:
    keep = [p for p in model.metadata_props if p.key != RECORD_KEY]
    del model.metadata_props[:]
    model.metadata_props.extend(keep)
    entry = model.metadata_props.add()
    entry.key = RECORD_KEY
    entry.value = json.dumps(record.to_dict(), sort_keys=True)


def check_temperature(temperature: float) -> float:
    """Validate a temperature given by the user."""
    try:
        t = float(temperature)
    except (TypeError, ValueError) as exc:
        raise OnnxcalError(f"temperature {temperature!r} is not a number") from exc
    if not np.isfinite(t) or t <= 0:
        raise OnnxcalError(
            f"temperature {temperature!r} is not a positive finite number",
            "T must be > 0 (T > 1 softens, T < 1 sharpens)",
        )
    return t


def _site_scaling(calibration: float | Scaling, site: ScoreSite) -> Scaling:
    """The scaling to bake in, checked against the site it goes to."""
    if not isinstance(calibration, Scaling):
        kind = "binary" if site.num_classes == 1 else "multiclass"
        calibration = Scaling.of_temperature(check_temperature(calibration), kind)
    scaling = check_scaling(calibration, site.num_classes)
    if scaling.activation == "sigmoid" and site.activation in ("softmax", "logsoftmax"):
        raise OnnxcalError(
            f"a {scaling.kind} calibration (for sigmoid outputs) cannot go before the "
            f"{site.activation.capitalize()} of output '{site.output}'",
            "fit it on logits captured from this output",
        )
    if scaling.method == "vector" and site.activation == "sigmoid":
        raise OnnxcalError(
            f"vector scaling is fitted for a softmax, but output '{site.output}' ends in a Sigmoid",
            "use --method temperature, or fit on a softmax output",
        )
    return scaling


def patch(
    model: onnx.ModelProto,
    calibration: float | Scaling,
    *,
    source_sha256: str,
    source_path: str | os.PathLike,
    output: str | None = None,
    new_output: str = DEFAULT_OUTPUT_NAME,
    drop_logits: bool = False,
    fit: dict | None = None,
) -> onnx.ModelProto:
    """Return a copy of ``model`` whose output carries calibrated probabilities.

    Parameters
    ----------
    model : onnx.ModelProto
        Not modified.
    calibration : float or Scaling
        A temperature T > 0, or a fitted scaling (temperature, vector, Platt).
    source_sha256, source_path : str
        Identify the uncalibrated model in the record.
    output : str, optional
        The class-score output; the likeliest float output by default.
    new_output : str, default "probabilities"
        Name of the added output when the model ends in raw logits.
    drop_logits : bool
        Remove the logits output when a new output is added.
    fit : dict, optional
        Fit summary stored in the record.

    Returns
    -------
    onnx.ModelProto
        Checked with ``onnx.checker.check_model(full_check=True)``.
    """
    out = onnx.ModelProto()
    out.CopyFrom(model)
    graph = out.graph
    previous = read_record(model)
    if previous is not None:
        scaling = _site_scaling(calibration, find_scores(model, previous.output))
        _set_parameters(graph, previous, scaling)
        record = replace(
            previous, temperature=scaling.temperature, parameters=dict(scaling.parameters), fit=fit or {}
        )
    else:
        site = find_scores(model, output)
        scaling = _site_scaling(calibration, site)
        taken = _all_names(graph)
        if site.activation is None and new_output in taken:
            raise OnnxcalError(
                f"the model already has a tensor named '{new_output}'",
                "choose another name with --output-name",
            )
        taken.add(new_output)
        source = site.scores if site.activation is not None else site.output
        nodes, calibrated_scores, inits = _NODE_BUILDERS[scaling.method](graph, site, scaling, source, taken)
        if site.activation is not None:
            _insert_before_activation(graph, site, nodes, calibrated_scores)
            rewrite, activation, calibrated = "insert-before-activation", site.activation, site.output
        else:
            activation = scaling.activation
            _append_activation(graph, site, nodes, calibrated_scores, taken, new_output, drop_logits, activation)
            rewrite, calibrated = f"append-{activation}", new_output
        record = Record(
            temperature=scaling.temperature,
            output=calibrated,
            scores=source,
            rewrite=rewrite,
            activation=activation,
            temperature_initializer=inits.get("temperature", ""),
            source_sha256=source_sha256,
            source_path=str(source_path),
            fit=fit or {},
            method=scaling.method,
            parameters=dict(scaling.parameters),
            initializers=inits,
        )
    _write_record(out, record)
    try:
        onnx.checker.check_model(out, full_check=True)
    except Exception as exc:  # a bug on our side, or a model onnx cannot infer
        raise OnnxcalError(
            f"the patched model fails the ONNX checker: {str(exc).splitlines()[0]}",
            "report this with the model's inspect output",
        ) from exc
    return out


def expose(model: onnx.ModelProto, tensors: list[str]) -> onnx.ModelProto:
    """A copy of ``model`` with ``tensors`` added as graph outputs (for capture).

    Types come from shape inference; the copy is for running, never saved.
    """
    out = onnx.ModelProto()
    out.CopyFrom(model)
    existing = {vi.name for vi in out.graph.output}
    missing = [t for t in tensors if t not in existing]
    if not missing:
        return out
    try:
        inferred = onnx.shape_inference.infer_shapes(out)
        known = {vi.name: vi for vi in inferred.graph.value_info}
    except Exception:  # inference is a nicety here; fall back to untyped outputs
        known = {}
    for name in missing:
        vi = known.get(name)
        out.graph.output.append(vi if vi is not None else helper.make_empty_tensor_value_info(name))
    return out


def save_model(model: onnx.ModelProto, path: str | os.PathLike) -> None:
    """Serialise ``model`` and write it atomically to ``path``."""
    atomic_write_bytes(Path(path), model.SerializeToString())
