"""The calibration record: what a patch did, as JSON in the model's metadata."""

from __future__ import annotations

import json
from dataclasses import asdict, dataclass, field, replace
from pathlib import PurePosixPath, PureWindowsPath
from typing import Any

import numpy as np
import onnx
from onnx import helper

from .. import __version__
from ..errors import OnnxcalError, first_line
from ..scaling import Scaling, check_scaling
from .external import tensor_array
from .fold import _constants, folded_values
from .post import from_json
from .tensors import RECORD_FORMAT, RECORD_KEY, _initializer, all_nodes, constant_node_value


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
        The tensor divided by T (in the uncalibrated model).
    rewrite : str
        ``"insert-before-activation"``, ``"append-softmax"``,
        ``"append-sigmoid"`` or ``"ml-log-probabilities"``.
    activation : str
        The meaning of ``output`` (``"softmax"``, ``"logsoftmax"``,
        ``"sigmoid"``).
    temperature_initializer : str
        Name of the initializer holding T ("" when folded or when the
        method has no single T).
    source_sha256 : str
        SHA-256 of the uncalibrated model file.
    source_name : str
        File name (not the path: the same patch gives the same bytes from
        any folder) of the uncalibrated model. Records of format 2 held its
        path (``source_path``); reading one keeps the name.
    fit : dict
        Fit summary (method, metrics, intervals), as in FIT.json.
    method : str
        ``"temperature"``, ``"vector"`` or ``"platt"``.
    parameters : dict
        The baked-in parameters (``{"temperature": T}``, ``{"w": ..., "b": ...}``).
    initializers : dict
        Name of the initializer holding each parameter (empty when folded).
    kind : str
        ``"multiclass"``, ``"binary"`` or ``"multilabel"``.
    folded : bool
        The scaling (w * z + b per class; 1/T for temperature scaling) was
        folded into the weight and bias of ``changes["scaled"]``.
    compute_dtype : str or None
        The dtype the scaling and activation run in, when Casts were added.
    source_output : str
        The output chosen in the uncalibrated model.
    changes : dict
        What the patch added or renamed, so that it can be undone:
        ``nodes``, ``initializers``, ``outputs`` (names added), ``renamed``
        (tensor name now -> before), ``dropped`` ([index, name] of a removed
        output), ``scaled`` (initializers changed when folded), ``fold``
        (the layer, its weight and bias, Gemm's beta, which weight axis and
        output axis hold the classes, the bias's dims and values before
        folding; for matrix scaling ``kept``, the weight's and bias's
        tensors before folding, serialized in base64 with their SHA-256,
        which ``unpatch`` puts back byte for byte) and ``rounded`` (how many times earlier folds and unfolds
        rounded the weights, when re-patching a folded model).
    holds : str
        What ``source_output`` holds: logits, probabilities or log-probabilities.
    spelling : str
        The pattern the score finder recognised (``ScoreSite.spelling``).
    logits_from : str
        How the logits were obtained (``ScoreSite.logits_from``).
    post : list of dict
        The post-processing between the activation and the output
        (``post.to_json``); verify's reference applies it.
    fitted_on_sha256 : str
        SHA-256 of the model the parameters were fitted on, when it is a
        twin of this one (``--fitted-on-twin``); "" when it is the source.
    score_columns : str
        ``"START:STOP"`` when only these positions of a Concat output were
        calibrated (``--score-columns``); "" otherwise.
    decisions : dict
        The decision outputs beside ``output`` (``graph.decide``), empty when
        none: the thresholds, how and on which rows they were chosen, the
        initializers holding them.
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
    source_name: str
    fit: dict[str, Any] = field(default_factory=dict)
    method: str = "temperature"
    parameters: dict[str, Any] = field(default_factory=dict)
    initializers: dict[str, Any] = field(default_factory=dict)
    kind: str = "multiclass"
    folded: bool = False
    compute_dtype: str | None = None
    source_output: str = ""
    changes: dict[str, Any] = field(default_factory=dict)
    holds: str = ""
    spelling: str = ""
    logits_from: str = "tensor"
    post: list[Any] = field(default_factory=list)
    fitted_on_sha256: str = ""
    score_columns: str = ""
    decisions: dict[str, Any] = field(default_factory=dict)
    onnxcal_version: str = __version__
    format: int = RECORD_FORMAT

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)

    @property
    def scaling(self) -> Scaling:
        """The calibration map the record describes."""
        parameters = self.parameters or {"temperature": self.temperature}
        return Scaling(self.method, dict(parameters), self.kind)


_RECORD_TYPES = {
    "temperature": (int, float, type(None)),
    "compute_dtype": (str, type(None)),
    "folded": (bool,),
    "format": (int,),
    **{k: (dict,) for k in ("fit", "parameters", "initializers", "changes", "decisions")},
    "post": (list,),
}
_CHANGE_LISTS = ("nodes", "initializers", "outputs", "value_info", "scaled", "inputs")


def _check_record_fields(data: Any) -> None:
    """Refuse a record whose fields are not of the types onnxcal writes (a garbled or forged record)."""
    if not isinstance(data, dict):
        raise TypeError(f"it is a JSON {type(data).__name__}, not an object")
    for key, value in data.items():
        want = _RECORD_TYPES.get(key, (str,))
        if key in Record.__dataclass_fields__ and not isinstance(value, want):
            raise TypeError(f"field '{key}' is {type(value).__name__} {value!r:.40}")
    changes = data.get("changes", {})
    for key in _CHANGE_LISTS:
        if not isinstance(changes.get(key, []), list) or not all(isinstance(v, str) for v in changes.get(key, [])):
            raise TypeError(f"changes '{key}' is not a list of names")
    renamed = changes.get("renamed", {})
    if not isinstance(renamed, dict) or not all(isinstance(v, str) for v in [*renamed, *renamed.values()]):
        raise TypeError("changes 'renamed' is not a map of names")


def _from_dict(data: Any) -> Record:
    """A Record from its JSON form (format 2 or 3), checked."""
    _check_record_fields(data)
    data = dict(data)
    if "source_path" in data:  # format 2 held the path; keep the file name only
        path = data.pop("source_path")
        data.setdefault("source_name", PureWindowsPath(path).name if "\\" in path else PurePosixPath(path).name)
    if not all(isinstance(item, dict) for item in data.get("post", [])):
        raise TypeError("field 'post' is not a list of objects")
    record = Record(**data)
    if not record.parameters and record.temperature is not None:  # written before vector scaling
        record = replace(
            record,
            parameters={"temperature": record.temperature},
            initializers={"temperature": record.temperature_initializer}
            if record.temperature_initializer else {},
        )
    check_scaling(record.scaling)
    from_json(record.post)  # every step one onnxcal knows
    return record


def read_records(model: onnx.ModelProto) -> tuple[Record, ...]:
    """Every calibration record of ``model``, in the order the heads were patched (empty: none).

    Format 3 stores a JSON list, one record per calibrated output; format 2
    (one head) a single object.

    Raises
    ------
    OnnxcalError
        A record is present but is not valid JSON of the expected form (field
        types, valid parameters), or two records calibrate one output.
    """
    for prop in model.metadata_props:
        if prop.key == RECORD_KEY:
            try:
                data = json.loads(prop.value)
                records = tuple(_from_dict(d) for d in (data if isinstance(data, list) else [data]))
                if not records:
                    raise ValueError("it lists no record")
            except OnnxcalError as exc:
                raise _damaged(exc) from exc
            except Exception as exc:  # not JSON, or not the record onnxcal writes
                raise _damaged(exc) from exc
            outputs = [r.output for r in records]
            if len(set(outputs)) != len(outputs):
                raise _damaged(ValueError(f"two records calibrate output '{max(outputs, key=outputs.count)}'"))
            return records
    return ()


def read_record(model: onnx.ModelProto, output: str | None = None) -> Record | None:
    """The calibration record of ``output`` (its calibrated or its original output name),
    or without ``output`` the one patched last; None when there is none.

    Raises
    ------
    OnnxcalError
        As :func:`read_records`.
    """
    records = read_records(model)
    if output is None:
        return records[-1] if records else None
    return next((r for r in records if output in (r.output, r.source_output)), None)


def _damaged(exc: Exception) -> OnnxcalError:
    detail = exc.message if isinstance(exc, OnnxcalError) else first_line(exc)
    return OnnxcalError(
        f"the model's calibration record ({RECORD_KEY}) is damaged: {detail}",
        "patch the original model again",
    )


def check_record(model: onnx.ModelProto, record: Record, where: str = "the model") -> None:
    """Refuse a record that does not describe the graph it sits in.

    A tool that edits a patched model (an optimiser, a converter) may drop or
    rename what onnxcal added but keep the metadata; undoing the patch or
    reporting on its parameters from such a record would be wrong. The
    parameters' values are not compared here: ``onnxcal verify`` reports a
    difference there as a failed check.

    Raises
    ------
    OnnxcalError
        Something the record says the patch added, or its calibrated output,
        is not in the graph.
    """
    g = model.graph
    nodes = list(all_nodes(g))  # a patch may add nodes inside subgraphs (If branches, Loop/Scan bodies)
    have = {
        "node": {n.name for n in nodes},
        "initializer": {i.name for i in g.initializer},
        "output": {o.name for o in g.output},
        "constant": {i.name for i in g.initializer} | {n.output[0] for n in g.node if constant_node_value(n)},
    }
    tensors = {t for n in nodes for t in n.output} | {i.name for i in g.input} | have["initializer"]
    ch = record.changes
    wanted = [("node", n) for n in ch.get("nodes", [])] + [("initializer", n) for n in ch.get("initializers", [])]
    wanted += [("output", n) for n in ch.get("outputs", [])] + [("constant", n) for n in ch.get("scaled", [])]
    wanted += [("initializer", n) for n in record.initializers.values() if n]
    problem = next((f"{kind} '{name}' that the patch added is missing" for kind, name in wanted
                    if name not in have[kind]), None)
    if problem is None and record.output not in have["output"]:
        problem = f"its calibrated output '{record.output}' is not an output of the graph"
    if problem is None:
        lost = next((new for new in ch.get("renamed", {}) if new not in tensors), None)
        problem = None if lost is None else f"tensor '{lost}' that the patch renamed is missing"
    if problem is not None:
        raise OnnxcalError(
            f"the calibration record of {where} does not match its graph: {problem} "
            "(was the model edited after onnxcal patched it?)",
            "patch the original, uncalibrated model again",
        )


def temperature_value(
    model: onnx.ModelProto, record: Record, original: onnx.ModelProto | None = None
) -> float | None:
    """The single temperature the graph applies, or None when it cannot be read.

    For a folded model this is 1 / w estimated from the original's weights
    and the patched ones (it needs ``original``; see :func:`folded_values`).
    """
    if record.temperature is None:
        return None
    if record.folded:
        found = None if original is None else folded_values(model, record, original)
        return None if found is None else float(1.0 / np.mean(found.w))
    init = _initializer(model.graph, record.temperature_initializer)
    if init is None:
        return None
    arr = tensor_array(init)
    return float(arr.reshape(-1)[0]) if arr.size == 1 else None


def parameter_values(
    model: onnx.ModelProto, record: Record, original: onnx.ModelProto | None = None
) -> dict[str, np.ndarray] | None:
    """The values of the record's parameters as the graph holds them, or None.

    For a folded model they are estimated from the weights against
    ``original``'s (see :func:`folded_values`): T_k = 1 / w_k for
    temperature scaling, else w and b. None for a matrix fold, whose W is
    not read back (:func:`~onnxcal.graph.fold_matrix.matrix_fold_error`
    checks it against the original's weights instead).
    """
    if record.folded and record.method in ("matrix", "dirichlet"):
        return None
    if record.folded:
        found = None if original is None else folded_values(model, record, original)
        if found is None:
            return None
        if record.method == "temperature":
            return {"temperature": 1.0 / found.w}
        return {"w": found.w, "b": found.b.reshape(-1)}
    inits = record.initializers or {"temperature": record.temperature_initializer}
    tensors = {k: _initializer(model.graph, n) for k, n in inits.items()}
    present = {k: v for k, v in tensors.items() if v is not None}
    if len(present) < len(tensors):
        return None
    return {k: tensor_array(v).astype(np.float64).reshape(-1) for k, v in present.items()}


def temperature_dtype(model: onnx.ModelProto, record: Record) -> str | None:
    """The dtype T is held in: its initializer's, or the folded weights'."""
    names = record.changes.get("scaled", []) if record.folded else list(
        (record.initializers or {"temperature": record.temperature_initializer}).values()
    )
    for name, init in _constants(model.graph).items():
        if name in names:
            return np.dtype(helper.tensor_dtype_to_np_dtype(init.data_type)).name
    return None


# -- records and undo ------------------------------------------------------


def _write_records(model: onnx.ModelProto, records: list[Record] | tuple[Record, ...]) -> None:
    """Store ``records`` (format 3: a JSON list) in ``model``'s metadata, or remove them."""
    keep = [p for p in model.metadata_props if p.key != RECORD_KEY]
    del model.metadata_props[:]
    model.metadata_props.extend(keep)
    if records:
        entry = model.metadata_props.add()
        entry.key = RECORD_KEY
        entry.value = json.dumps([r.to_dict() for r in records], sort_keys=True)


PENDING_SHA256 = "0" * 64
"""The source hash a record holds until :func:`fill_source_sha256` writes the real one (same length,
so the serialised model keeps its size)."""


def fill_source_sha256(model: onnx.ModelProto, sha256: str) -> None:
    """Write ``sha256`` into the records of ``model`` (in place) that hold :data:`PENDING_SHA256`."""
    records = read_records(model)
    if any(r.source_sha256 == PENDING_SHA256 for r in records):
        _write_records(model, [replace(r, source_sha256=sha256) if r.source_sha256 == PENDING_SHA256 else r
                               for r in records])


def _write_record(model: onnx.ModelProto, record: Record | None) -> None:
    """Store one record (the model's only one), or none."""
    _write_records(model, [] if record is None else [record])
