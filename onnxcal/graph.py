"""ONNX graph reading and surgery.

Plain functions over ``onnx.ModelProto``. A model passed in is never changed:
rewrites work on a copy and return it, checked with
``onnx.checker.check_model(full_check=True)``.

The rewrites (one function each):

* ``_insert_before_activation`` — the class scores already pass through a
  Softmax, LogSoftmax or Sigmoid: put ``Div(scores, T)`` in front of it, so
  every output keeps its name, shape, dtype and meaning (drop-in).
* ``_append_softmax`` — the output holds raw logits: add ``Div`` and
  ``Softmax`` after it and expose the result as a new output.
* ``_set_temperature`` — the model already carries an onnxcal record: replace
  the temperature initializer instead of stacking a second Div.

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
    temperature : float
        T; the scores are divided by it.
    output : str
        The output that carries calibrated probabilities.
    scores : str
        The tensor divided by T.
    rewrite : str
        ``"insert-before-activation"`` or ``"append-softmax"``.
    activation : str
        The activation after the Div (``"softmax"``, ``"logsoftmax"``, ...).
    temperature_initializer : str
        Name of the initializer holding T.
    source_sha256 : str
        SHA-256 of the uncalibrated model file.
    source_path : str
        Path of the uncalibrated model when it was patched.
    fit : dict
        Fit summary (method, metrics before/after), as in FIT.json.
    onnxcal_version : str
    format : int
    """

    temperature: float
    output: str
    scores: str
    rewrite: str
    activation: str
    temperature_initializer: str
    source_sha256: str
    source_path: str
    fit: dict = field(default_factory=dict)
    onnxcal_version: str = __version__
    format: int = RECORD_FORMAT

    def to_dict(self) -> dict:
        return asdict(self)


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
                return Record(**data)
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


def _temperature_tensor(name: str, temperature: float, dtype: str) -> onnx.TensorProto:
    return numpy_helper.from_array(np.array(temperature, dtype=np.dtype(dtype)), name=name)


def _insert_before_activation(
    graph: onnx.GraphProto, site: ScoreSite, t_name: str, taken: set[str]
) -> None:
    """Rewire the activation node to read ``Div(scores, T)``."""
    scaled = unique_name(f"{site.scores}_calibrated", taken)
    div = helper.make_node(
        "Div", [site.scores, t_name], [scaled], name=unique_name("onnxcal_divide", taken)
    )
    act = graph.node[site.node]
    act.input[0] = scaled
    graph.node.insert(site.node, div)


def _append_softmax(
    graph: onnx.GraphProto,
    site: ScoreSite,
    t_name: str,
    taken: set[str],
    new_output: str,
    drop_logits: bool,
) -> None:
    """Add ``Softmax(Div(output, T))`` as a new graph output ``new_output``."""
    scaled = unique_name(f"{site.output}_scaled", taken)
    graph.node.append(
        helper.make_node(
            "Div", [site.output, t_name], [scaled], name=unique_name("onnxcal_divide", taken)
        )
    )
    graph.node.append(
        helper.make_node(
            "Softmax",
            [scaled],
            [new_output],
            name=unique_name("onnxcal_softmax", taken),
            axis=site.class_axis,
        )
    )
    old = next(vi for vi in graph.output if vi.name == site.output)
    new_vi = onnx.ValueInfoProto()
    new_vi.CopyFrom(old)
    new_vi.name = new_output
    if drop_logits:
        keep = [vi for vi in graph.output if vi.name != site.output]
        del graph.output[:]
        graph.output.extend(keep)
    graph.output.append(new_vi)


def _set_temperature(graph: onnx.GraphProto, record: Record, temperature: float) -> None:
    """Replace the value of an existing temperature initializer."""
    for i, init in enumerate(graph.initializer):
        if init.name == record.temperature_initializer:
            dtype = helper.tensor_dtype_to_np_dtype(init.data_type)
            graph.initializer[i].CopyFrom(_temperature_tensor(init.name, temperature, dtype))
            return
    raise OnnxcalError(
        f"the calibration record names initializer '{record.temperature_initializer}' "
        "but the graph has none of that name",
        "patch the original, uncalibrated model instead",
    )


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


def patch(
    model: onnx.ModelProto,
    temperature: float,
    *,
    source_sha256: str,
    source_path: str | os.PathLike,
    output: str | None = None,
    new_output: str = DEFAULT_OUTPUT_NAME,
    drop_logits: bool = False,
    fit: dict | None = None,
) -> onnx.ModelProto:
    """Return a copy of ``model`` whose output carries softmax(scores / T).

    Parameters
    ----------
    model : onnx.ModelProto
        Not modified.
    temperature : float
        T > 0.
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
    temperature = check_temperature(temperature)
    out = onnx.ModelProto()
    out.CopyFrom(model)
    graph = out.graph
    previous = read_record(model)
    if previous is not None:
        _set_temperature(graph, previous, temperature)
        record = replace(previous, temperature=temperature, fit=fit or {})
    else:
        site = find_scores(model, output)
        taken = _all_names(graph)
        t_name = unique_name("onnxcal_temperature", taken)
        graph.initializer.append(_temperature_tensor(t_name, temperature, site.dtype))
        if site.activation is not None:
            _insert_before_activation(graph, site, t_name, taken)
            rewrite, activation, calibrated = "insert-before-activation", site.activation, site.output
        else:
            if new_output in taken:
                raise OnnxcalError(
                    f"the model already has a tensor named '{new_output}'",
                    "choose another name with --output-name",
                )
            taken.add(new_output)
            _append_softmax(graph, site, t_name, taken, new_output, drop_logits)
            rewrite, activation, calibrated = "append-softmax", "softmax", new_output
        record = Record(
            temperature=temperature,
            output=calibrated,
            scores=site.scores if site.activation else site.output,
            rewrite=rewrite,
            activation=activation,
            temperature_initializer=t_name,
            source_sha256=source_sha256,
            source_path=str(source_path),
            fit=fit or {},
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
