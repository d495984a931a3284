"""ONNX graph reading and surgery.

Plain functions over ``onnx.ModelProto``. A model passed in is never changed:
rewrites work on a copy and return it, checked with
``onnx.checker.check_model(full_check=True)``. ``docs/graph.md`` explains how
the class scores are found and rewritten, with the ONNX operator spec
references.

Finding the scores (``find_scores``): walk back from the chosen output
through ops that keep every class's values (Identity, Cast, Reshape,
Flatten, Squeeze, Unsqueeze, Transpose, and on ai.onnx.ml probabilities
Normalizer and ZipMap), tracking the class axis, to the last Softmax,
LogSoftmax or Sigmoid, or to an ai.onnx.ml classifier's probability output.

The rewrites (one function each), all built on ``_Surgery``, which gives
unique deterministic names and notes every change so it can be undone:

* ``_insert_before_activation``: the scores pass through a Softmax,
  LogSoftmax or Sigmoid; put the scaling in front of it (drop-in).
* ``_append_activation``: raw logits; add the scaling and a Softmax (per
  class axis, also below opset 13) or Sigmoid as a new output.
* ``_rewrite_ml``: probabilities from an ai.onnx.ml classifier; replace
  them by softmax(scale(log max(p, tiny))) and recompute its label output.
* ``_fold``: fold the scaling (w * z + b per class) into a Gemm /
  MatMul(+Add)'s weight and bias instead of adding nodes.

What goes in front of the activation is one function of type ``ScaleFn``,
made by ``scale_fn`` from the fitted ``Scaling``: ``divide_by_temperature``
(temperature scaling: ``Div(scores, T)``, T a scalar or one per label) or
``multiply_add`` (vector and Platt scaling: ``Add(Mul(scores, w), b)``).
Re-patching a patched model first undoes the previous patch (``unpatch``),
so patches never stack.

The calibration record is JSON in ``metadata_props`` under ``RECORD_KEY``.
"""

from __future__ import annotations

import json
import os
from collections.abc import Callable, Iterator
from dataclasses import asdict, dataclass, field, replace
from functools import partial
from pathlib import Path, PureWindowsPath

import numpy as np
import onnx
from onnx import helper, numpy_helper

from . import __version__
from ._files import atomic_write_files, require_file
from ._limits import DEFAULT_MAX_MODEL_BYTES, check_model_size
from .errors import OnnxcalError, first_line
from .scaling import Scaling, check_scaling

RECORD_KEY = "onnxcal.calibration"
RECORD_FORMAT = 2
DEFAULT_OUTPUT_NAME = "probabilities"
ML_DOMAIN = "ai.onnx.ml"

ACTIVATIONS = {"Softmax": "softmax", "LogSoftmax": "logsoftmax", "Sigmoid": "sigmoid"}
# What the user may ask for with --activation when the output holds raw logits.
ACTIVATION_CHOICES = ("softmax", "sigmoid")
COMPUTE_DTYPES = ("float32", "float64")
# ai.onnx.ml classifiers whose second output holds class probabilities.
_ML_CLASSIFIERS = {"LinearClassifier", "TreeEnsembleClassifier", "SVMClassifier"}
# Ops that move class scores around without changing any class's values.
_LAYOUT = {"Identity", "Cast", "Reshape", "Flatten", "Squeeze", "Unsqueeze", "Transpose"}
_RESHAPES = {"Reshape", "Flatten", "Squeeze", "Unsqueeze"}
_FLOAT_TYPES = {
    onnx.TensorProto.FLOAT,
    onnx.TensorProto.DOUBLE,
    onnx.TensorProto.FLOAT16,
    onnx.TensorProto.BFLOAT16,
}
_ELEM = {np.dtype(helper.tensor_dtype_to_np_dtype(e)).name: e for e in _FLOAT_TYPES}
# Below this many bytes an initializer stays inside the .onnx file when the
# model is saved with external data (onnx.save_model's own default).
EXTERNAL_THRESHOLD = 1024


def np_dtype(name: str) -> np.dtype:
    """numpy dtype for a float dtype name, bfloat16 included (via onnx's ml_dtypes)."""
    return np.dtype(helper.tensor_dtype_to_np_dtype(_ELEM[name]))


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
    source_path : str
        Path of the uncalibrated model when it was patched.
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
        folding) and ``rounded`` (how many times earlier folds and unfolds
        rounded the weights, when re-patching a folded model).
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
    kind: str = "multiclass"
    folded: bool = False
    compute_dtype: str | None = None
    source_output: str = ""
    changes: dict = field(default_factory=dict)
    onnxcal_version: str = __version__
    format: int = RECORD_FORMAT

    def to_dict(self) -> dict:
        return asdict(self)

    @property
    def scaling(self) -> Scaling:
        """The calibration map the record describes."""
        parameters = self.parameters or {"temperature": self.temperature}
        return Scaling(self.method, dict(parameters), self.kind)


def _attribute_tensors(a: onnx.AttributeProto) -> Iterator[onnx.TensorProto]:
    """Tensors an attribute holds, whatever its declared type says (a hostile file may
    set ``t`` on an INT attribute; onnx's loader would still read it)."""
    if a.HasField("t"):
        yield a.t
    yield from a.tensors
    for sparse in [a.sparse_tensor] * a.HasField("sparse_tensor") + list(a.sparse_tensors):
        yield sparse.values
        yield sparse.indices
    for g in [a.g] * a.HasField("g") + list(a.graphs):
        yield from _tensors(g)


def _tensors(graph: onnx.GraphProto) -> Iterator[onnx.TensorProto]:
    """Every tensor of a graph: initializers (sparse ones too), attributes, subgraphs'."""
    yield from graph.initializer
    for sparse in graph.sparse_initializer:
        yield sparse.values
        yield sparse.indices
    for node in graph.node:
        for a in node.attribute:
            yield from _attribute_tensors(a)


def _model_tensors(model: onnx.ModelProto) -> Iterator[onnx.TensorProto]:
    """Every tensor of a model: its graph's and those of its local functions."""
    yield from _tensors(model.graph)
    for function in model.functions:
        for node in function.node:
            for a in node.attribute:
                yield from _attribute_tensors(a)


def _external_locations(model: onnx.ModelProto) -> list[str]:
    locations = []
    for t in _model_tensors(model):
        if t.data_location == onnx.TensorProto.EXTERNAL:
            entry = {e.key: e.value for e in t.external_data}
            location = entry.get("location", "")
            if not isinstance(location, str) or "\0" in location:  # protobuf gives bytes when not UTF-8
                raise OnnxcalError(
                    f"the external data location {location!r} of tensor '{t.name}' is not a file name "
                    "(not UTF-8 text, or it holds a NUL byte)",
                    "re-export the model, or save it without external data",
                )
            locations.append(location)
    return sorted(set(locations))


def _check_location(loc: str, model_path: Path, base: Path) -> Path:
    """The file an external-data location names, refused unless it is safely inside ``base``.

    Refused: an empty or absolute location (POSIX or Windows style), a
    ``..`` component, any component that is a symbolic link, a path that
    resolves outside ``base`` anyway, anything but a regular file, and a file
    with more than one hard link (it may be a link to a file outside, e.g. a
    key, that no path check can see). These checks hold on their own; onnx's
    loader (>= 1.21) makes similar ones as it opens the file. Reference:
    onnx's security advisories on external data, from memory CVE-2022-25882
    and CVE-2024-27318 (path traversal through ``location``), and
    GHSA-538c-55jv-c5g9 (external-data attribute injection, named in onnx
    1.23's ``external_data_helper.py``); see docs/security.md.
    """
    where = f"'{model_path}' keeps weights at external location '{loc}', which is outside the model's directory"
    hint = "keep the external data files beside the .onnx file, named relative to it"
    rel, win = Path(loc), PureWindowsPath(loc)
    if not loc or rel.is_absolute() or win.is_absolute() or win.drive:
        raise OnnxcalError(f"{where} (an absolute path)" if loc else f"{where} (an empty location)", hint)
    if ".." in rel.parts or ".." in win.parts:
        raise OnnxcalError(f"{where} ('..' leads out of it)", hint)
    step = base
    for part in rel.parts:
        step = step / part
        if step.is_symlink():
            raise OnnxcalError(
                f"external data file '{loc}' of '{model_path}' is a symbolic link"
                + ("" if step == base / rel else f" (through '{step.relative_to(base)}')")
                + ", which could lead outside the model's directory",
                "put the weights file itself beside the .onnx file",
            )
    target = base / rel
    if not target.resolve().is_relative_to(base):
        raise OnnxcalError(f"{where} (it resolves to '{target.resolve()}')", hint)
    if not target.is_file():
        raise OnnxcalError(
            f"external data file '{loc}' of '{model_path}' is not a file in '{base}'",
            "copy the weights file beside the .onnx file",
        )
    links = target.stat().st_nlink
    if links > 1:
        raise OnnxcalError(
            f"external data file '{loc}' of '{model_path}' has {links} hard links, so it may be "
            "a file from outside the model's directory",
            "copy the weights beside the .onnx file (a copy, not a hard link)",
        )
    return target


def _check_locations(locations: list[str], model_path: Path) -> tuple[Path, ...]:
    """Resolve external-data locations; refuse any that could read outside the model's directory."""
    base = model_path.resolve().parent
    return tuple(_check_location(loc, model_path, base) for loc in locations)


def _parse(p: Path) -> onnx.ModelProto:
    """The ModelProto of a file, without its external data; errors name the file."""
    try:
        return onnx.load(str(p), load_external_data=False)
    except OSError as exc:
        raise OnnxcalError(f"cannot read model '{p}': {exc.strerror or exc}", "check that the file is readable") from exc
    except Exception as exc:  # protobuf DecodeError, ...
        raise OnnxcalError(
            f"'{p}' is not a readable ONNX model (its bytes do not parse as an ONNX ModelProto: "
            "a truncated download, or another kind of file)",
            "give the path of an .onnx file exported by your framework",
        ) from exc


def _sized_model_file(path: str | os.PathLike, max_bytes: int) -> Path:
    p = require_file(path, "model")
    check_model_size(p, 0, max_bytes)
    if p.stat().st_size == 0:
        raise OnnxcalError(f"'{p}' is empty (0 bytes)", "give the path of an .onnx file exported by your framework")
    return p


def external_data_files(
    path: str | os.PathLike, *, max_bytes: int = DEFAULT_MAX_MODEL_BYTES
) -> tuple[Path, ...]:
    """The external data files a model file uses (checked to lie beside it)."""
    p = _sized_model_file(path, max_bytes)
    try:
        model = onnx.load(str(p), load_external_data=False)
    except Exception:  # load_model reports unreadable files
        return ()
    return _check_locations(_external_locations(model), p)


def load_model(path: str | os.PathLike, *, max_bytes: int = DEFAULT_MAX_MODEL_BYTES) -> onnx.ModelProto:
    """Load and check an ONNX model file, with errors that name the file.

    The file (plus its external data) must be at most ``max_bytes``, checked
    before it is read. External data are read from the model's directory; a
    location that could lead outside it (absolute, ``..``, a symlink, a
    hard link) is refused before any read, and so is external data left in
    a tensor onnx does not load (onnxruntime would look for it elsewhere).

    Raises
    ------
    OnnxcalError
        The file is missing, empty, too large, is not an ONNX model, fails
        onnx's checker, or points outside its directory for external data.
    """
    p = _sized_model_file(path, max_bytes)
    model = _parse(p)
    if model.ir_version == 0 or not model.graph.output:
        raise OnnxcalError(
            f"'{p}' is not an ONNX model (no IR version or no graph outputs)",
            "give the path of an .onnx file exported by your framework",
        )
    if (field_name := _non_text(model)) is not None:
        raise OnnxcalError(
            f"'{p}' is damaged: its field {field_name} holds bytes that are not UTF-8 text",
            "re-export the model",
        )
    files = _check_locations(_external_locations(model), p)
    if files:
        check_model_size(p, sum(f.stat().st_size for f in set(files)), max_bytes)
        try:
            onnx.external_data_helper.load_external_data_for_model(model, str(p.resolve().parent))
        except Exception as exc:
            raise OnnxcalError(
                f"cannot read the external data of '{p}' ({first_line(exc)})",
                "check that the weights file beside it is complete",
            ) from exc
        left = [t.name for t in _model_tensors(model) if t.data_location == onnx.TensorProto.EXTERNAL]
        if left:
            raise OnnxcalError(
                f"'{p}' keeps tensor '{left[0]}' in external data where onnx does not load it "
                "(e.g. a sparse initializer)",
                "save the model with that tensor inside the .onnx file",
            )
    try:
        onnx.checker.check_model(model)
    except Exception as exc:
        raise OnnxcalError(
            f"'{p}' fails the ONNX checker: {first_line(exc)}",
            "re-export the model or repair it before calibrating",
        ) from exc
    return model


def _repeated(fd) -> bool:
    flag = getattr(fd, "is_repeated", None)  # protobuf >= 6; older ones have only the label
    return bool(flag) if flag is not None else fd.label == fd.LABEL_REPEATED


def _non_text(message) -> str | None:
    """The first string field (depth first) of a protobuf message whose value is not text.

    protobuf hands over the bytes of a ``string`` field that is not valid
    UTF-8 as ``bytes``; every name in onnx and onnxruntime is text.
    """
    for fd, value in message.ListFields():
        if fd.type not in (fd.TYPE_STRING, fd.TYPE_MESSAGE):
            continue
        for v in value if _repeated(fd) else (value,):
            if fd.type == fd.TYPE_STRING:
                if not isinstance(v, str):
                    return fd.full_name
            elif (found := _non_text(v)) is not None:
                return found
    return None


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


def _elem_name(elem: int) -> str:
    try:
        return np.dtype(helper.tensor_dtype_to_np_dtype(elem)).name if elem else "unknown"
    except KeyError:  # a number no ONNX version defines
        return f"unknown type {elem}"


def _type_name(tp: onnx.TypeProto) -> str:
    kind = tp.WhichOneof("value")
    if kind == "tensor_type":
        return _elem_name(tp.tensor_type.elem_type)
    if kind == "sequence_type":
        return f"seq({_type_name(tp.sequence_type.elem_type)})"
    if kind == "map_type":
        return f"map({_elem_name(tp.map_type.key_type)}, {_type_name(tp.map_type.value_type)})"
    return kind or "unknown"


def tensor_spec(vi: onnx.ValueInfoProto) -> TensorSpec:
    """Describe a ValueInfoProto as a TensorSpec."""
    if vi.type.WhichOneof("value") != "tensor_type":
        return TensorSpec(vi.name, _type_name(vi.type), None, False)
    elem = vi.type.tensor_type.elem_type
    return TensorSpec(vi.name, _type_name(vi.type), _dims(vi), elem in _FLOAT_TYPES)


def _producers(graph: onnx.GraphProto) -> dict[str, int]:
    return {out: i for i, node in enumerate(graph.node) for out in node.output}


def _attr(node: onnx.NodeProto, name: str, default):
    for a in node.attribute:
        if a.name == name:
            return helper.get_attribute_value(a)
    return default


class _Shapes:
    """Shapes of a graph's tensors: declared ones, else from shape inference (lazily)."""

    def __init__(self, model: onnx.ModelProto) -> None:
        self._model = model
        g = model.graph
        self._known = {vi.name: vi for vi in [*g.input, *g.output, *g.value_info]}
        self._inferred: dict[str, onnx.ValueInfoProto] | None = None

    def _info(self, name: str) -> onnx.ValueInfoProto | None:
        vi = self._known.get(name)
        if (vi is None or _dims(vi) is None) and self._inferred is None:
            try:
                inferred = onnx.shape_inference.infer_shapes(self._model)
                self._inferred = {v.name: v for v in inferred.graph.value_info}
            except Exception:  # inference is best effort; callers handle None
                self._inferred = {}
        if vi is None or _dims(vi) is None:
            vi = (self._inferred or {}).get(name, vi)
        return vi

    def shape(self, name: str) -> tuple[int | str | None, ...] | None:
        vi = self._info(name)
        return _dims(vi) if vi is not None else None

    def dtype(self, name: str) -> str | None:
        vi = self._info(name)
        if vi is None or not vi.type.tensor_type.elem_type:
            return None
        return _type_name(vi.type)


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


def _rank(shape) -> int | None:
    return len(shape) if shape is not None else None


def _same_dims(a, b) -> bool:
    """Products of two dim lists are equal (symbolic dims compared by name)."""
    if any(d is None for d in [*a, *b]):
        return False
    ints_a = int(np.prod([d for d in a if isinstance(d, int)], dtype=np.int64))
    ints_b = int(np.prod([d for d in b if isinstance(d, int)], dtype=np.int64))
    syms_a = sorted(d for d in a if isinstance(d, str))
    syms_b = sorted(d for d in b if isinstance(d, str))
    return ints_a == ints_b and syms_a == syms_b


def _axis_through_reshape(axis: int, before, after) -> int | None:
    """Where the class axis ends up when a reshape keeps it whole, else None.

    The class axis survives when some output axis has its size and the same
    product of sizes in front of it.
    """
    if before is None or after is None or not 0 <= axis < len(before):  # unknown or inconsistent shapes
        return None
    k = before[axis]
    if len(after) == 1 and k == 1:  # (n, 1) squeezed to (n,): one logit per sample
        return 0
    for j, d in enumerate(after):
        if d == k and _same_dims(before[:axis], after[:j]):
            return j
    return None


def _axis_forward(node: onnx.NodeProto, axis: int, shapes: _Shapes) -> int | None:
    """Class axis of ``node``'s output given that of its input (None: lost)."""
    if node.op_type in ("Identity", "Cast") or _is_probability_pass(node):
        return axis
    if node.op_type == "Transpose":
        rank = _rank(shapes.shape(node.input[0]))
        perm = list(_attr(node, "perm", [])) or (list(range(rank))[::-1] if rank else [])
        return perm.index(axis) if axis in perm else None
    return _axis_through_reshape(axis, shapes.shape(node.input[0]), shapes.shape(node.output[0]))


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


_RECORD_TYPES = {
    "temperature": (int, float, type(None)),
    "compute_dtype": (str, type(None)),
    "folded": (bool,),
    "format": (int,),
    **{k: (dict,) for k in ("fit", "parameters", "initializers", "changes")},
}
_CHANGE_LISTS = ("nodes", "initializers", "outputs", "value_info", "scaled")


def _check_record_fields(data) -> None:
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


def read_record(model: onnx.ModelProto) -> Record | None:
    """Return the onnxcal calibration record of ``model``, or None.

    Raises
    ------
    OnnxcalError
        A record is present but is not valid JSON of the expected form (field
        types, valid parameters).
    """
    for prop in model.metadata_props:
        if prop.key == RECORD_KEY:
            try:
                data = json.loads(prop.value)
                _check_record_fields(data)
                record = Record(**data)
                if not record.parameters and record.temperature is not None:  # written before vector scaling
                    record = replace(
                        record,
                        parameters={"temperature": record.temperature},
                        initializers={"temperature": record.temperature_initializer}
                        if record.temperature_initializer else {},
                    )
                check_scaling(record.scaling)
                return record
            except OnnxcalError as exc:
                raise OnnxcalError(
                    f"the model's calibration record ({RECORD_KEY}) is damaged: {exc.message}",
                    "patch the original model again",
                ) from exc
            except Exception as exc:  # not JSON, or not the record onnxcal writes
                raise OnnxcalError(
                    f"the model's calibration record ({RECORD_KEY}) is damaged: {first_line(exc)}",
                    "patch the original model again",
                ) from exc
    return None


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
    have = {
        "node": {n.name for n in g.node},
        "initializer": {i.name for i in g.initializer},
        "output": {o.name for o in g.output},
    }
    tensors = {t for n in g.node for t in n.output} | {i.name for i in g.input} | have["initializer"]
    ch = record.changes
    wanted = [("node", n) for n in ch.get("nodes", [])] + [("initializer", n) for n in ch.get("initializers", [])]
    wanted += [("output", n) for n in ch.get("outputs", [])] + [("initializer", n) for n in ch.get("scaled", [])]
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


def _initializer(graph: onnx.GraphProto, name: str) -> onnx.TensorProto | None:
    return next((i for i in graph.initializer if i.name == name), None)


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
    arr = numpy_helper.to_array(init)
    return float(arr.reshape(-1)[0]) if arr.size == 1 else None


def parameter_values(
    model: onnx.ModelProto, record: Record, original: onnx.ModelProto | None = None
) -> dict[str, np.ndarray] | None:
    """The values of the record's parameters as the graph holds them, or None.

    For a folded model they are estimated from the weights against
    ``original``'s (see :func:`folded_values`): T_k = 1 / w_k for
    temperature scaling, else w and b.
    """
    if record.folded:
        found = None if original is None else folded_values(model, record, original)
        if found is None:
            return None
        if record.method == "temperature":
            return {"temperature": 1.0 / found.w}
        return {"w": found.w, "b": found.b.reshape(-1)}
    inits = record.initializers or {"temperature": record.temperature_initializer}
    found = {k: _initializer(model.graph, n) for k, n in inits.items()}
    if any(v is None for v in found.values()):
        return None
    return {k: numpy_helper.to_array(v).astype(np.float64).reshape(-1) for k, v in found.items()}


def temperature_dtype(model: onnx.ModelProto, record: Record) -> str | None:
    """The dtype T is held in: its initializer's, or the folded weights'."""
    names = record.changes.get("scaled", []) if record.folded else list(
        (record.initializers or {"temperature": record.temperature_initializer}).values()
    )
    for init in model.graph.initializer:
        if init.name in names:
            return np.dtype(helper.tensor_dtype_to_np_dtype(init.data_type)).name
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
        for a in node.attribute:  # names inside subgraphs may not be reused either
            for g in [a.g] if a.type == onnx.AttributeProto.GRAPH else list(a.graphs):
                names |= _all_names(g)
    return names


def _scalar(name: str, value: float, dtype: str) -> onnx.TensorProto:
    return numpy_helper.from_array(np.array(value, dtype=np_dtype(dtype)), name=name)


class _Surgery:
    """Adds nodes and initializers to a graph under unique names, noting every change.

    ``changes`` ends up in the record; ``unpatch`` reads it to undo the patch.
    """

    def __init__(self, graph: onnx.GraphProto) -> None:
        self.graph = graph
        self.taken = _all_names(graph)
        self.nodes: list[onnx.NodeProto] = []
        self.changes: dict = {"nodes": [], "initializers": [], "outputs": [], "renamed": {}}
        self.parameters: dict[str, str] = {}  # role -> initializer name (e.g. "temperature")

    def name(self, base: str) -> str:
        return unique_name(base, self.taken)

    def constant(self, base: str, tensor: onnx.TensorProto) -> str:
        tensor.name = self.name(base)
        self.graph.initializer.append(tensor)
        self.changes["initializers"].append(tensor.name)
        return tensor.name

    def node(self, op: str, inputs: list[str], out: str, output: str | None = None, **attrs) -> str:
        """Queue ``op``; its output is ``output`` or a new name from ``out``."""
        result = output or self.name(out)
        name = self.name(f"onnxcal_{op.lower()}")
        self.nodes.append(helper.make_node(op, inputs, [result], name=name, **attrs))
        self.changes["nodes"].append(name)
        return result

    def flush(self, index: int) -> None:
        """Insert the queued nodes at ``index`` of ``graph.node``."""
        for j, node in enumerate(self.nodes):
            self.graph.node.insert(index + j, node)
        self.nodes = []

    def value_info(self, vi: onnx.ValueInfoProto) -> None:
        self.graph.value_info.append(vi)
        self.changes.setdefault("value_info", []).append(vi.name)

    def rename_output(self, node: onnx.NodeProto, slot: int, base: str) -> str:
        """Give ``node.output[slot]`` a new name (returned); the old name is freed for us."""
        new = self.name(base)
        self.changes["renamed"][new] = node.output[slot]
        node.output[slot] = new
        return new

    def rename_input(self, node: onnx.NodeProto, slot: int, new: str) -> None:
        self.changes["renamed"][new] = node.input[slot]
        node.input[slot] = new


ScaleFn = Callable[[_Surgery, str, str], str]
"""``scale(surgery, x, dtype) -> name``: add the nodes that scale the scores
``x`` (of numpy dtype name ``dtype``) and return the scaled tensor's name.
Initializers it adds go in ``surgery.parameters`` by role."""


_PARAMETER_NAMES = {"temperature": "onnxcal_temperature", "w": "onnxcal_scale", "b": "onnxcal_bias"}


def _parameter(s: _Surgery, role: str, value, dtype: str, site: ScoreSite) -> str:
    """A parameter initializer: a scalar, or one value per class shaped to
    broadcast along the class axis of the scores (ONNX multidirectional
    broadcasting aligns trailing dims; ONNX operator spec, Broadcasting)."""
    arr = np.asarray(value, dtype=np_dtype(dtype))
    if arr.ndim == 1:
        arr = arr.reshape((arr.size,) + (1,) * (site.scores_rank - 1 - site.scores_axis))
    name = s.constant(_PARAMETER_NAMES[role], numpy_helper.from_array(arr, ""))
    s.parameters[role] = name
    return name


def divide_by_temperature(
    surgery: _Surgery, x: str, dtype: str, *, temperature, site: ScoreSite
) -> str:
    """Temperature scaling: ``Div(x, T)``, T a scalar (or one per label) in ``dtype``.

    References
    ----------
    Guo, Pleiss, Sun, Weinberger, "On Calibration of Modern Neural Networks",
    ICML 2017, sec. 4.2.
    """
    t_name = _parameter(surgery, "temperature", temperature, dtype, site)
    return surgery.node("Div", [x, t_name], f"{x}_calibrated")


def multiply_add(surgery: _Surgery, x: str, dtype: str, *, w, b, site: ScoreSite) -> str:
    """Vector scaling (per class) or Platt scaling (scalars): ``Add(Mul(x, w), b)``.

    References
    ----------
    Guo et al. 2017, sec. 4.2 (vector scaling); Platt, "Probabilistic Outputs
    for Support Vector Machines ...", 1999 (Platt scaling).
    """
    w_name = _parameter(surgery, "w", w, dtype, site)
    b_name = _parameter(surgery, "b", b, dtype, site)
    scaled = surgery.node("Mul", [x, w_name], f"{x}_scaled")
    return surgery.node("Add", [scaled, b_name], f"{x}_calibrated")


def scale_fn(scaling: Scaling, site: ScoreSite) -> ScaleFn:
    """The ``ScaleFn`` that bakes ``scaling`` in front of ``site``'s activation."""
    if scaling.method == "temperature":
        return partial(divide_by_temperature, temperature=scaling.parameters["temperature"], site=site)
    return partial(multiply_add, w=scaling.parameters["w"], b=scaling.parameters["b"], site=site)


def _no_scaling(surgery: _Surgery, x: str, dtype: str) -> str:
    """The scale when T is folded into the weights: nothing to add."""
    return x


def _scaled(surgery: _Surgery, x: str, dtype: str, scale: ScaleFn, compute: str | None) -> str:
    """``scale(x)``, after a Cast to the compute dtype when one is asked for."""
    if compute is None:
        return scale(surgery, x, dtype)
    cast = surgery.node("Cast", [x], f"{x}_{compute}", to=_ELEM[compute])
    return scale(surgery, cast, compute)


def _cast_back(surgery: _Surgery, y: str, dtype: str, compute: str | None, output: str) -> str:
    """Cast ``y`` back to ``dtype`` under the name ``output`` (when a compute dtype was used)."""
    return surgery.node("Cast", [y], output, output=output, to=_ELEM[dtype]) if compute else y


def _insert_before_activation(
    s: _Surgery, site: ScoreSite, scale: ScaleFn, compute: str | None
) -> None:
    """Rewire the activation to read ``scale(scores)``; its output keeps its name."""
    s.rename_input(s.graph.node[site.node], 0, _scaled(s, site.scores, site.dtype, scale, compute))
    index = site.node + len(s.nodes)  # where the activation is once the queue is in
    s.flush(site.node)
    if compute is not None:  # the activation now runs in `compute`; cast its result back
        act = s.graph.node[index]
        wanted = act.output[0]
        inner = s.rename_output(act, 0, f"{wanted}_{compute}")
        _cast_back(s, inner, site.dtype, compute, wanted)
        s.flush(index + 1)


def _softmax_on_axis(s: _Surgery, x: str, axis: int, rank: int, opset: int, output: str) -> str:
    """Softmax over one axis, correct at every opset.

    From opset 13 Softmax normalises over ``axis`` alone. Softmax-1/11 coerce
    the input to 2-D around ``axis`` and normalise over all axes from it on
    (ONNX operator spec, Softmax changelog), which is per-class only when
    ``axis`` is the last: otherwise Transpose the class axis last, Softmax,
    and Transpose back.
    """
    if opset >= 13 or axis == rank - 1:
        return s.node("Softmax", [x], output, output=output, axis=axis)
    perm = [i for i in range(rank) if i != axis] + [axis]
    inverse = [int(i) for i in np.argsort(perm)]
    moved = s.node("Transpose", [x], f"{x}_class_last", perm=perm)
    probs = s.node("Softmax", [moved], f"{x}_class_last_softmax", axis=rank - 1)
    return s.node("Transpose", [probs], output, output=output, perm=inverse)


def _append_activation(
    s: _Surgery,
    site: ScoreSite,
    scale: ScaleFn,
    compute: str | None,
    kind: str,
    new_output: str,
    drop_logits: bool,
    opset: int,
) -> None:
    """Add ``activation(scale(output))`` as a new graph output ``new_output``."""
    scaled = _scaled(s, site.output, site.dtype, scale, compute)
    inner = s.name(f"{new_output}_{compute}") if compute else new_output
    if kind == "sigmoid":
        s.node("Sigmoid", [scaled], inner, output=inner)
    else:
        if site.rank is None:
            raise OnnxcalError(f"the rank of output '{site.output}' is unknown", "re-export with shapes")
        _softmax_on_axis(s, scaled, site.class_axis, site.rank, opset, inner)
    _cast_back(s, inner, site.dtype, compute, new_output)
    s.flush(len(s.graph.node))
    old_index, old = next((i, vi) for i, vi in enumerate(s.graph.output) if vi.name == site.output)
    new_vi = onnx.ValueInfoProto()
    new_vi.CopyFrom(old)
    new_vi.name = new_output
    if drop_logits:
        del s.graph.output[old_index]
        s.changes["dropped"] = [old_index, site.output]
    s.graph.output.append(new_vi)
    s.changes["outputs"].append(new_output)


def _class_labels(node: onnx.NodeProto) -> onnx.TensorProto | None:
    # LinearClassifier and SVMClassifier call it classlabels_ints (ONNX-ML operator spec).
    ints = _attr(node, "classlabels_int64s", None) or _attr(node, "classlabels_ints", None)
    if ints:
        return numpy_helper.from_array(np.array(ints, dtype=np.int64))
    strings = _attr(node, "classlabels_strings", None)
    if strings:
        return helper.make_tensor("", onnx.TensorProto.STRING, [len(strings)], list(strings))
    return None


def _rewrite_ml(s: _Surgery, site: ScoreSite, scale: ScaleFn, compute: str | None) -> None:
    """Calibrate an ai.onnx.ml classifier's probabilities through their logarithm.

    softmax(log p / T) = softmax(z / T) for any logits z with p = softmax(z),
    because softmax ignores a constant added to every class (common
    practice). p is clamped to the dtype's smallest normal number first, so
    a probability that underflowed to 0 stays finite. The classifier's label
    output is recomputed as classlabels[argmax] of the new probabilities.
    """
    ml = s.graph.node[site.node]
    p = ml.output[1]
    raw = s.rename_output(ml, 1, f"{p}_uncalibrated")
    # Type the renamed tensor: onnx infers none for some ai.onnx.ml ops
    # (TreeEnsembleClassifier-1), and strict shape inference needs one.
    s.value_info(helper.make_tensor_value_info(raw, _ELEM[site.dtype], [None, site.num_classes]))
    tiny = s.constant("onnxcal_smallest_probability", _scalar("", np.finfo(np_dtype(site.dtype)).tiny, site.dtype))
    logp = s.node("Log", [s.node("Max", [raw, tiny], f"{p}_clamped")], f"{p}_log")
    scaled = _scaled(s, logp, site.dtype, scale, compute)
    inner = s.name(f"{p}_{compute}") if compute else p
    s.node("Softmax", [scaled], inner, output=inner, axis=1)
    _cast_back(s, inner, site.dtype, compute, p)
    classes = _class_labels(ml)
    if ml.output[0] and classes is not None:
        label = ml.output[0]
        s.rename_output(ml, 0, f"{label}_uncalibrated")
        index = s.node("ArgMax", [p], f"{label}_index", axis=1, keepdims=0)
        s.node("Gather", [s.constant("onnxcal_class_labels", classes), index], label, output=label, axis=0)
    s.flush(site.node + 1)


# -- folding ---------------------------------------------------------------

_QUANTIZED = {"QLinearMatMul", "MatMulInteger", "QGemm", "DequantizeLinear", "QLinearConv"}


def _uses(graph: onnx.GraphProto) -> dict[str, int]:
    counts: dict[str, int] = {}
    for node in graph.node:
        for name in node.input:
            counts[name] = counts.get(name, 0) + 1
        for a in node.attribute:  # subgraphs may read outer tensors
            for g in [a.g] if a.type == onnx.AttributeProto.GRAPH else list(a.graphs):
                for name, c in _uses(g).items():
                    counts[name] = counts.get(name, 0) + c
    for vi in graph.output:
        counts[vi.name] = counts.get(vi.name, 0) + 1
    return counts


@dataclass(frozen=True)
class _FoldSite:
    """The linear layer the scores come from, and which of its weights hold class k.

    ``weight_axis`` is the weight's axis with one slice per class and
    ``class_from_end`` the class axis of the layer's output counted from the
    end (1: the last), along which a per-class bias broadcasts; both are None
    when every class is scaled alike and they need not be known.
    ``bias_before`` keeps the bias's dims and values before folding, so that
    ``unpatch`` restores it exactly (also when folding expanded a scalar
    bias to one per class); subtracting b back out of it would lose up to
    |b_k / beta| / |w_k| times the dtype's rounding. Stored in
    ``Record.changes["fold"]``.
    """

    layer: str
    weight: str
    bias: str = ""
    beta: float = 1.0
    weight_axis: int | None = None
    class_from_end: int | None = None
    bias_before: dict | None = None


def _axis_backward(node: onnx.NodeProto, axis: int, rank: int, shapes: _Shapes) -> tuple[int, int] | None:
    """Class axis and rank of a layout node's input, given its output's (None: lost)."""
    if node.op_type == "Identity":
        return axis, rank
    in_shape = shapes.shape(node.input[0])
    if node.op_type == "Transpose":
        perm = list(_attr(node, "perm", [])) or list(range(rank))[::-1]
        return (perm[axis], rank) if axis < len(perm) else None
    moved = _axis_through_reshape(axis, shapes.shape(node.output[0]), in_shape)
    return None if moved is None else (moved, len(in_shape))


def _fold_site(model: onnx.ModelProto, site: ScoreSite, drop_logits: bool, per_class: bool) -> _FoldSite:
    """The Gemm or MatMul(+Add) whose weight and bias can take the scaling.

    With ``per_class``, also which weight slice and bias entry belong to
    class k: the class axis is followed back from the scores through the
    layout ops (Identity, Transpose, reshapes) to the layer's output.

    Raises
    ------
    OnnxcalError
        The scores do not come straight from a Gemm or MatMul(+Add), its
        weight or bias is shared, quantized or not a constant, or (per
        class) the class axis is lost on the way or is not the layer's
        output-feature axis.
    """
    graph = model.graph
    producers, uses = _producers(graph), _uses(graph)
    inits = {i.name: i for i in graph.initializer}
    overridable = {vi.name for vi in graph.input}
    why = "leave out --fold to insert the scaling as nodes instead"
    shapes = _Shapes(model)
    tensor, tracked, lost = site.scores, (site.scores_axis, site.scores_rank), None
    # Each tensor on the way down has one reader: the activation (or, for raw
    # logits, the output that --drop-logits removes), then the next node down.
    if site.activation is None:
        if not drop_logits:
            raise OnnxcalError(
                f"--fold would change the logits output '{site.output}' itself (to the calibrated logits)",
                "add --drop-logits to replace it by the probabilities, or " + why,
            )
    while True:
        if uses.get(tensor, 0) != 1:
            raise OnnxcalError(
                f"--fold: tensor '{tensor}' is used by more than the activation, so scaling "
                "its producer would change other outputs", why,
            )
        node = graph.node[producers[tensor]] if tensor in producers else None
        if node is None:
            raise OnnxcalError(f"--fold: the scores '{tensor}' are not computed by the graph", why)
        if node.op_type in _RESHAPES | {"Identity", "Transpose"}:
            if tracked is not None:
                tracked, lost = _axis_backward(node, *tracked, shapes), node
            tensor = node.input[0]
            continue
        break

    def constant(name: str, role: str) -> str:
        if node.op_type in _QUANTIZED or (name in producers and graph.node[producers[name]].op_type in _QUANTIZED):
            raise OnnxcalError(f"--fold: the {role} of '{node.name or node.op_type}' is quantized", why)
        if name not in inits or name in overridable:
            raise OnnxcalError(
                f"--fold: the {role} '{name}' of '{node.name or node.op_type}' is not a constant initializer", why
            )
        if inits[name].data_type not in _FLOAT_TYPES:
            raise OnnxcalError(f"--fold: the {role} '{name}' is not floating point (quantized?)", why)
        if uses.get(name, 0) != 1:
            raise OnnxcalError(f"--fold: the {role} '{name}' is shared with other nodes", why)
        return name

    if node.op_type in _QUANTIZED:
        raise OnnxcalError(f"--fold: the logits come from a quantized {node.op_type}", why)
    bias = ""
    if node.op_type == "Add":
        a, b = node.input
        bias, mm = (b, a) if b in inits else (a, b)
        mm_node = graph.node[producers[mm]] if mm in producers else None
        if mm_node is None or mm_node.op_type != "MatMul" or uses.get(mm, 0) != 1:
            raise OnnxcalError("--fold: the logits come from an Add that does not follow a MatMul", why)
        node = mm_node
    if node.op_type == "Gemm":
        weight = constant(node.input[1], "weight")
        bias = constant(node.input[2], "bias") if len(node.input) > 2 and node.input[2] else ""
        # Gemm: Y = alpha A' B' + beta C; column k of B' (row k of B when transB) is class k.
        ndim, weight_axis, from_end = 2, 0 if _attr(node, "transB", 0) else 1, 1
    elif node.op_type == "MatMul":
        weight = constant(next((n for n in node.input if n in inits), node.input[1]), "weight")
        bias = constant(bias, "bias") if bias else ""
        # MatMul(A, W): W's last axis is the output's; MatMul(W, B): W's second-last.
        ndim = len(inits[weight].dims)
        from_end = 1 if list(node.input).index(weight) == 1 else 2
        weight_axis = ndim - from_end
    else:
        raise OnnxcalError(
            f"--fold: the logits come from a {node.op_type}, not a Gemm or MatMul(+Add)", why
        )
    layer = node.name or node.op_type
    beta = float(_attr(node, "beta", 1.0)) if node.op_type == "Gemm" else 1.0
    fold = _FoldSite(layer, weight, bias, beta)
    if not per_class:
        return fold
    if tracked is None:
        raise OnnxcalError(
            f"--fold: cannot tell which part of weight '{weight}' belongs to which class: the class "
            f"axis is lost through the {lost.op_type} node '{lost.name or lost.output[0]}' "
            "(it merges axes, or its shapes are unknown)", why,
        )
    axis, rank = tracked
    if ndim < 2 or rank - axis != from_end:
        raise OnnxcalError(
            f"--fold: the class axis of the scores is not the output-feature axis of '{layer}', "
            f"so no slice of weight '{weight}' holds one class", why,
        )
    return replace(fold, weight_axis=weight_axis, class_from_end=from_end)


def _uniform(v: np.ndarray) -> np.ndarray:
    """``v`` as a 0-d array when every class has the same value."""
    v = np.asarray(v, dtype=np.float64)
    return np.array(v.flat[0]) if v.size and np.all(v == v.flat[0]) else v


def _along(v: np.ndarray, axis: int | None, ndim: int) -> np.ndarray:
    """Per-class values laid along ``axis`` of an ``ndim``-D array (a 0-d ``v`` as it is)."""
    if v.ndim == 0:
        return v
    shape = [1] * ndim
    shape[axis] = v.size
    return v.reshape(shape)


def _from_end(v: np.ndarray, class_from_end: int | None) -> np.ndarray:
    """Per-class values that broadcast (trailing dims aligned) along axis ``-class_from_end``."""
    return v if v.ndim == 0 else v.reshape((v.size,) + (1,) * (class_from_end - 1))


def _fold_affine(scaling: Scaling) -> tuple[np.ndarray, np.ndarray]:
    """The scaling as per-class (w, b), each 0-d when it is the same for every class."""
    w, b = scaling.affine()
    return _uniform(w), _uniform(b)


def _array(graph: onnx.GraphProto, name: str) -> np.ndarray | None:
    init = _initializer(graph, name)
    return None if init is None else numpy_helper.to_array(init)


def _put_arrays(graph: onnx.GraphProto, arrays: dict[str, np.ndarray]) -> None:
    """Replace initializers by float64 ``arrays``, each rounded once to the dtype it had."""
    for i, init in enumerate(graph.initializer):
        if init.name in arrays:
            dtype = np.dtype(helper.tensor_dtype_to_np_dtype(init.data_type))
            with np.errstate(over="ignore"):
                new = numpy_helper.from_array(np.asarray(arrays[init.name]).astype(dtype), init.name)
            if init.HasField("doc_string"):
                new.doc_string = init.doc_string
            graph.initializer[i].CopyFrom(new)


def _fold(s: _Surgery, model: onnx.ModelProto, site: ScoreSite, scaling: Scaling, drop_logits: bool) -> None:
    """Fold w * z + b into the weight and bias of the layer computing z: no extra op.

    Slice k of the weight (column k of a Gemm's B', ...) is multiplied by
    w_k, and bias entry k becomes w_k c_k + b_k / beta, so that
    alpha A' (B' w) + beta (w c + b / beta) = w (alpha A' B' + beta c) + b.
    """
    w, b = _fold_affine(scaling)
    fold = _fold_site(model, site, drop_logits, per_class=w.ndim > 0 or b.ndim > 0)
    shift = bool(np.any(b != 0))
    if np.any(w == 0):
        raise OnnxcalError(
            "--fold: the scaling multiplies some class's logit by 0, so the folded weights could "
            "not be restored", "leave out --fold to insert the scaling as nodes instead",
        )
    if shift and not fold.bias:
        raise OnnxcalError(
            f"--fold: '{fold.layer}' has no bias to take the offset b of {scaling.method} scaling",
            "leave out --fold to insert Mul + Add instead, or fit temperature scaling (no offset)",
        )
    if shift and fold.beta == 0:
        raise OnnxcalError(
            f"--fold: '{fold.layer}' multiplies its bias by beta = 0, so it cannot take the offset b "
            f"of {scaling.method} scaling", "leave out --fold to insert Mul + Add instead",
        )
    weight = _array(s.graph, fold.weight)
    arrays = {fold.weight: weight.astype(np.float64) * _along(w, fold.weight_axis, weight.ndim)}
    dtypes = {fold.weight: weight.dtype}
    if fold.bias:
        bias = _array(s.graph, fold.bias)
        offset = _from_end(b, fold.class_from_end) / fold.beta if shift else 0.0
        arrays[fold.bias] = bias.astype(np.float64) * _from_end(w, fold.class_from_end) + offset
        dtypes[fold.bias] = bias.dtype
        fold = replace(fold, bias_before={"dims": list(bias.shape), "values": [float(v) for v in bias.ravel()]})
    for name, arr in arrays.items():
        dtype = dtypes[name]
        with np.errstate(over="ignore"):
            fits = np.all(np.isfinite(arr.astype(dtype)))
        if not fits:
            raise OnnxcalError(
                f"--fold: the scaled '{name}' does not fit in {dtype.name}",
                "leave out --fold to insert the scaling as nodes instead",
            )
    _put_arrays(s.graph, arrays)
    s.changes["scaled"] = list(arrays)
    s.changes["fold"] = asdict(fold)


def _recorded_fold(record: Record) -> _FoldSite:
    """The fold a record describes (records before per-class folding scaled every entry by 1/T)."""
    if "fold" in record.changes:
        return _FoldSite(**record.changes["fold"])
    names = record.changes["scaled"]
    return _FoldSite("", names[0], names[1] if len(names) > 1 else "")


def _unfold(graph: onnx.GraphProto, record: Record) -> None:
    """Undo ``_fold`` in place: divide the weight by w, put the recorded bias back."""
    fold = _recorded_fold(record)
    w, _ = _fold_affine(record.scaling)
    weight = _array(graph, fold.weight)
    arrays = {fold.weight: weight.astype(np.float64) / _along(w, fold.weight_axis, weight.ndim)}
    if fold.bias_before is not None:
        arrays[fold.bias] = np.reshape(fold.bias_before["values"], fold.bias_before["dims"])
    elif fold.bias:  # a record from before per-class folding: the bias was divided by T
        arrays[fold.bias] = _array(graph, fold.bias).astype(np.float64) / w
    _put_arrays(graph, arrays)


def _roundings(record: Record | None) -> int:
    """How many times the weights of ``unpatch(model)`` were rounded since the source.

    Each fold rounds the folded weight once and each unfold once more; a
    later fold adds one (``FoldedValues.roundings``), so verify's limit can
    follow repeated re-patching.
    """
    if record is None:
        return 0
    return record.changes.get("rounded", 0) + (2 if record.folded else 0)


@dataclass(frozen=True)
class FoldedValues:
    """The per-class w and b that a folded model's weights carry, against the original's.

    Attributes
    ----------
    w : ndarray
        Least-squares multiplier of each class's weight slice, W'_k ~ w_k W_k:
        shape (K,); (1,) when every class was scaled alike (one ratio over
        the whole weight).
    b : ndarray
        Offset per class, class axis last: beta (c'_k - w_k c_k) from the
        patched and original biases (zeros when the layer has no bias).
    b_scale : ndarray
        beta (|c'_k| + |w_k c_k|), shaped like ``b``: the size that b's
        rounding error is relative to.
    residual : float
        Largest |W'_k - w_k W_k| relative to the largest |w_k W_k| of the same
        slice: rounding only when the weights are a per-class multiple of the
        original's.
    dtype : str
        The weights' dtype.
    roundings : int
        How many times the weights were rounded since the source: 1 for one
        fold, 2 more for each re-patch of a folded model (unfold, fold).
    """

    w: np.ndarray
    b: np.ndarray
    b_scale: np.ndarray
    residual: float
    dtype: str
    roundings: int = 1


def _class_last(x: np.ndarray, class_from_end: int | None) -> np.ndarray:
    if class_from_end is None:
        return x.reshape(-1, 1)
    return np.moveaxis(x, -class_from_end, -1).reshape(-1, x.shape[-class_from_end])


def folded_values(
    model: onnx.ModelProto, record: Record, original: onnx.ModelProto
) -> FoldedValues | None:
    """Estimate the w and b folded into ``model``'s weights from ``original``'s.

    Per class, w_k is the least-squares ratio of the patched weight slice to
    the original's, then b_k = beta (c'_k - w_k c_k) from the biases. None
    when a folded initializer is missing or its shape does not fit.
    """
    fold = _recorded_fold(record)
    w0, w1 = _array(original.graph, fold.weight), _array(model.graph, fold.weight)
    if w0 is None or w1 is None or w0.shape != w1.shape:
        return None
    axis = fold.weight_axis

    def slices(x: np.ndarray) -> np.ndarray:  # a row per class (one row when all are alike)
        x = x.astype(np.float64)
        return x.reshape(1, -1) if axis is None else np.moveaxis(x, axis, 0).reshape(x.shape[axis], -1)

    a, c = slices(w0), slices(w1)
    with np.errstate(divide="ignore", invalid="ignore"):
        w = np.sum(a * c, axis=1) / np.sum(a * a, axis=1)
        fitted = w[:, None] * a
        residual = float(np.max(np.max(np.abs(c - fitted), axis=1) / np.max(np.abs(fitted), axis=1)))
    roundings = record.changes.get("rounded", 0) + 1
    if not fold.bias:
        zeros = np.zeros((1, 1))
        return FoldedValues(w, zeros, zeros, residual, w1.dtype.name, roundings)
    c0, c1 = _array(original.graph, fold.bias), _array(model.graph, fold.bias)
    if c0 is None or c1 is None:
        return None
    per = _from_end(w, fold.class_from_end) if fold.class_from_end else w.reshape(())
    try:
        scaled = per * c0.astype(np.float64)
        b = fold.beta * (c1.astype(np.float64) - scaled)
    except ValueError:  # shapes that do not fit together
        return None
    b, b_scale = np.broadcast_arrays(b, fold.beta * (np.abs(c1.astype(np.float64)) + np.abs(scaled)))
    b, b_scale = _class_last(b, fold.class_from_end), _class_last(b_scale, fold.class_from_end)
    return FoldedValues(w, b, b_scale, residual, w1.dtype.name, roundings)


# -- records and undo ------------------------------------------------------


def _write_record(model: onnx.ModelProto, record: Record | None) -> None:
    keep = [p for p in model.metadata_props if p.key != RECORD_KEY]
    del model.metadata_props[:]
    model.metadata_props.extend(keep)
    if record is not None:
        entry = model.metadata_props.add()
        entry.key = RECORD_KEY
        entry.value = json.dumps(record.to_dict(), sort_keys=True)


def unpatch(model: onnx.ModelProto) -> onnx.ModelProto:
    """A copy of a patched ``model`` with onnxcal's patch undone.

    Exact for every rewrite that adds nodes. A folded model gets its weight
    divided by w again, restored up to one rounding of its dtype, and its
    bias back exactly (dims and values, from the record).

    Raises
    ------
    OnnxcalError
        The record is from an older onnxcal that did not note its changes.
    """
    record = read_record(model)
    out = onnx.ModelProto()
    out.CopyFrom(model)
    if record is None:
        return out
    ch = record.changes
    if not ch:
        raise OnnxcalError(
            "the model's calibration record does not say what the patch changed "
            f"(record format {record.format})",
            "patch the original, uncalibrated model instead",
        )
    check_record(model, record)
    try:
        _undo(out.graph, record)
    except (KeyError, TypeError, ValueError, IndexError, AttributeError, StopIteration) as exc:
        raise _damaged(exc) from exc  # the record comes from the file: its changes may not fit
    _write_record(out, None)
    return out


def _undo(g: onnx.GraphProto, record: Record) -> None:
    """Undo in place the changes ``record`` lists."""
    ch = record.changes
    added = set(ch["nodes"])
    keep = [n for n in g.node if n.name not in added]
    renamed = ch["renamed"]
    for node in keep:
        for i, name in enumerate(node.input):
            node.input[i] = renamed.get(name, name)
        for i, name in enumerate(node.output):
            node.output[i] = renamed.get(name, name)
    del g.node[:]
    g.node.extend(keep)
    inits = [i for i in g.initializer if i.name not in set(ch["initializers"])]
    del g.initializer[:]
    g.initializer.extend(inits)
    infos = [vi for vi in g.value_info if vi.name not in set(ch.get("value_info", []))]
    del g.value_info[:]
    g.value_info.extend(infos)
    outputs = list(g.output)
    restored = None
    if ch.get("dropped"):
        index, name = ch["dropped"]
        restored = onnx.ValueInfoProto()
        restored.CopyFrom(next(vi for vi in outputs if vi.name in ch["outputs"]))
        restored.name = name
    outputs = [vi for vi in outputs if vi.name not in set(ch["outputs"])]
    if restored is not None:
        outputs.insert(index, restored)
    del g.output[:]
    g.output.extend(outputs)
    if record.folded:
        _unfold(g, record)


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


def _site_scaling(calibration: float | Scaling, site: ScoreSite, activation: str | None) -> Scaling:
    """The scaling to bake in, checked against the site it goes to.

    A bare temperature becomes temperature scaling of the site's kind
    (softmax: multiclass; sigmoid: binary for one logit, else multi-label).
    """
    if isinstance(calibration, Scaling):
        scaling = check_scaling(calibration, site.num_classes)
        # For raw logits the fitted scaling says what to append, unless --activation does.
        requested = activation if (activation or site.activation) else scaling.activation
        kind = fit_kind(site, requested)
        if scaling.activation != kind:
            raise OnnxcalError(
                f"a {scaling.kind} calibration (for {scaling.activation} outputs) does not fit "
                f"output '{site.output}', which is calibrated through a {kind}",
                "fit it on logits captured from this output",
            )
        return scaling
    kind = fit_kind(site, activation)
    t = check_temperature(calibration)
    if kind == "softmax":
        return Scaling.of_temperature(t, "multiclass")
    return Scaling.of_temperature(t, "binary" if site.num_classes == 1 or site.rank == 1 else "multilabel")


def _check_options(
    site: ScoreSite, compute_dtype: str | None, fold: bool, scaling: Scaling
) -> str | None:
    """Validate --compute-dtype and --fold against the site; the compute dtype to use."""
    if compute_dtype is not None and compute_dtype not in COMPUTE_DTYPES:
        raise OnnxcalError(
            f"--compute-dtype {compute_dtype!r} is not one of: {', '.join(COMPUTE_DTYPES)}"
        )
    if fold and compute_dtype is not None:
        raise OnnxcalError(
            "--compute-dtype sets the dtype of the inserted Div, and with --fold there is none",
            "give one of --fold and --compute-dtype",
        )
    if fold and site.from_probabilities:
        raise OnnxcalError(
            f"--fold: output '{site.output}' comes from an ai.onnx.ml classifier, which has "
            "no logits layer to fold the scaling into",
            "leave out --fold",
        )
    if compute_dtype == site.dtype:
        return None
    return compute_dtype


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
    activation: str | None = None,
    compute_dtype: str | None = None,
    fold: bool = False,
) -> onnx.ModelProto:
    """Return a copy of ``model`` whose output carries calibrated probabilities.

    Parameters
    ----------
    model : onnx.ModelProto
        Not modified. If it carries an onnxcal record, that patch is undone
        first (see :func:`unpatch`), so patches never stack.
    calibration : float or Scaling
        A temperature T > 0, or a fitted scaling (temperature, vector, Platt,
        per-label temperatures).
    source_sha256, source_path : str
        Identify the uncalibrated model in the record (kept from the old
        record when re-patching).
    output : str, optional
        The class-score output; the likeliest float output by default.
    new_output : str, default "probabilities"
        Name of the added output when the model ends in raw logits.
    drop_logits : bool
        Remove the logits output when a new output is added.
    fit : dict, optional
        Fit summary stored in the record.
    activation : {"softmax", "sigmoid"}, optional
        What to append after raw logits (default: sigmoid for one logit,
        softmax otherwise); must agree with an activation the model has.
    compute_dtype : {"float32", "float64"}, optional
        Run the Div and the activation in this dtype (Casts around them);
        the output keeps its dtype.
    fold : bool
        Fold the scaling (any of them: each is w * z + b per class) into the
        weight and bias of the Gemm / MatMul(+Add) producing the logits
        instead of inserting nodes (see ``_fold``).

    Returns
    -------
    onnx.ModelProto
        Checked with ``onnx.checker.check_model(full_check=True)``.
    """
    previous = read_record(model)
    out = unpatch(model)
    if previous is not None:
        source_sha256, source_path = previous.source_sha256, previous.source_path
        output = output or previous.source_output or None
    site = find_scores(out, output)
    scaling = _site_scaling(calibration, site, activation)
    kind = scaling.activation
    compute = _check_options(site, compute_dtype, fold, scaling)
    s = _Surgery(out.graph)
    if rounded := _roundings(previous):
        s.changes["rounded"] = rounded
    if fold:
        _fold(s, out, site, scaling, drop_logits)
    scale: ScaleFn = _no_scaling if fold else scale_fn(scaling, site)
    if site.from_probabilities:
        _rewrite_ml(s, site, scale, compute)
        rewrite, calibrated = "ml-log-probabilities", site.output
    elif site.activation is not None:
        if not fold:
            _insert_before_activation(s, site, scale, compute)
        rewrite, calibrated = "insert-before-activation", site.output
    else:
        if new_output in s.taken:
            raise OnnxcalError(
                f"the model already has a tensor named '{new_output}'",
                "choose another name with --output-name",
            )
        s.taken.add(new_output)
        _append_activation(s, site, scale, compute, kind, new_output, drop_logits, opset_version(out))
        rewrite, calibrated = f"append-{kind}", new_output
    record = Record(
        temperature=scaling.temperature,
        output=calibrated,
        scores=site.scores,
        rewrite=rewrite,
        activation=site.activation or kind,
        temperature_initializer=s.parameters.get("temperature", ""),
        source_sha256=source_sha256,
        source_path=str(source_path),
        fit=fit or {},
        method=scaling.method,
        parameters=dict(scaling.parameters),
        initializers=dict(s.parameters),
        kind=scaling.kind,
        folded=fold,
        compute_dtype=compute,
        source_output=site.output,
        changes=s.changes,
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


def expose_scores(model: onnx.ModelProto, site: ScoreSite) -> tuple[onnx.ModelProto, str]:
    """A copy of ``model`` that outputs the logits laid out like ``site.tensor``.

    When layout ops (Transpose, Reshape, ...) sit between the activation and
    the output, they are replayed on the logits, so captured rows line up
    with the output (and with per-pixel labels shaped like it).
    """
    out = onnx.ModelProto()
    out.CopyFrom(model)
    s = _Surgery(out.graph)
    tensor = site.scores
    for i in site.layout:
        node = onnx.NodeProto()
        node.CopyFrom(out.graph.node[i])
        node.name = s.name(f"onnxcal_{node.op_type.lower()}")
        node.input[0] = tensor
        tensor = s.name(f"{site.scores}_{node.op_type.lower()}")
        node.output[0] = tensor
        s.nodes.append(node)
    s.flush(len(out.graph.node))
    return expose(out, [tensor]), tensor


def _split_external(model: onnx.ModelProto, location: str) -> bytes:
    """Move large initializers of ``model`` (in place) to one external-data blob."""
    blob = bytearray()
    for init in model.graph.initializer:
        if init.HasField("raw_data") and len(init.raw_data) >= EXTERNAL_THRESHOLD:
            raw = init.raw_data
            entries = {"location": location, "offset": str(len(blob)), "length": str(len(raw))}
            blob += raw
            init.ClearField("raw_data")
            init.data_location = onnx.TensorProto.EXTERNAL
            del init.external_data[:]
            for key, value in entries.items():
                entry = init.external_data.add()
                entry.key, entry.value = key, value
    return bytes(blob)


def external_data_path(path: str | os.PathLike) -> Path:
    """Where ``save_model(..., external=True)`` puts the weights of ``path``."""
    p = Path(path)
    return p.with_name(p.name + ".data")


def model_files(model: onnx.ModelProto, path: str | os.PathLike, *, external: bool = False) -> dict[Path, bytes]:
    """The bytes of each file ``save_model`` writes: ``path``, and with ``external`` ``<path>.data``.

    With ``external``, initializers of at least ``EXTERNAL_THRESHOLD`` bytes
    go to ``<path>.data`` beside it.
    """
    if not external:
        return {Path(path): model.SerializeToString()}
    copy = onnx.ModelProto()
    copy.CopyFrom(model)
    data = external_data_path(path)
    blob = _split_external(copy, data.name)
    return {data: blob, Path(path): copy.SerializeToString()}


def save_model(model: onnx.ModelProto, path: str | os.PathLike, *, external: bool = False) -> None:
    """Serialise ``model`` and write it atomically to ``path`` (see :func:`model_files`).

    With external data both files are complete before either is renamed into place.
    """
    atomic_write_files(model_files(model, path, external=external))
