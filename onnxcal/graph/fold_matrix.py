"""Folding matrix scaling into the linear layer that computes the logits.

Matrix scaling maps the logits z to W z + b (Guo et al., ICML 2017,
sec. 4.2). When z = A h + c comes from a Gemm or a MatMul + Add with
constant weights, the map is itself that layer with weight W A and bias
W c + b: softmax(W (A h + c) + b) = softmax((W A) h + (W c + b)), so the
patched model has no extra node (docs/maths.md, "Folding the maps").
Dirichlet calibration folds the same way when the row sums of its W are
equal (then W log softmax(z) + b and W z + b differ by the same amount in
every class, which the softmax cancels).

Unlike a per-class w_k, W mixes the classes: the original weight is not
the folded one divided by anything, and inverting W would give it back
only up to W's conditioning. So the fold keeps the original weight's and
bias's tensors in the record (serialized, with their SHA-256), and
``unpatch`` puts them back byte for byte.
"""

from __future__ import annotations

import base64
import hashlib
from dataclasses import dataclass, replace
from typing import TYPE_CHECKING

import numpy as np
import onnx

from ..errors import OnnxcalError
from ..scaling import Scaling
from .external import _make_resident, is_external, read_span, span, tensor_array
from .fold import _check_offset, _constants, _fold_site, _FoldSite, _from_end, _recorded_fold, _store

if TYPE_CHECKING:  # imported for annotations only
    from .find import ScoreSite
    from .record import Record
    from .surgery import _Surgery

MIXING = ("matrix", "dirichlet")
"""The maps that fold as a K x K matrix W and an offset b."""

KEEP_LIMIT = 32 << 20
"""Largest weight (bytes) a matrix fold keeps a copy of in the record (in the model's metadata)."""

_WHY_NOT = {
    "beta": "beta calibration is not linear in the logit (a ln p - b ln(1 - p) + c, with softplus terms)",
    "isotonic": "isotonic regression is a lookup table on the probability, not a linear map of the logits",
    "histogram": "histogram binning is a lookup table on the probability, not a linear map of the logits",
    "ensemble-temperature": "ensemble temperature scaling is a weighted mixture of softmaxes, not one softmax of "
                            "a linear map of the logits",
    "ovr-platt": "one-vs-rest Platt scaling renormalises K sigmoids, which no softmax of a linear map of the "
                 "logits gives",
}


def fold_refusal(scaling: Scaling) -> str | None:
    """Why ``scaling`` cannot be folded into a linear layer, or None when it can."""
    if scaling.is_affine or scaling.method == "matrix":
        return None
    if scaling.method == "dirichlet":
        from ..maps import dirichlet  # here, not at the top: patch --temperature loads no map (start-up)

        if dirichlet.row_sums_equal(scaling.parameters):
            return None
        return ("Dirichlet calibration acts on log p = z - logsumexp(z); it folds as matrix scaling only when the "
                "row sums of its W are equal, and this W's are not")
    if scaling.method == "ovr-platt" and scaling.kind == "binary":
        return "one-logit one-vs-rest Platt scaling is Platt scaling: fit --method platt, which folds"
    return _WHY_NOT.get(scaling.method, f"{scaling.method} calibration is not a linear map of the logits")


def folds_matrix(record: Record) -> bool:
    """True when ``record`` is a fold of a map that mixes the classes (its tensors are kept)."""
    return record.folded and record.method in MIXING


def _matrix(scaling: Scaling) -> tuple[np.ndarray, np.ndarray]:
    """W (K x K) and b (K) of a matrix fold, float64."""
    return (np.asarray(scaling.parameters["W"], dtype=np.float64),
            np.asarray(scaling.parameters["b"], dtype=np.float64))


def _mix(v: np.ndarray, w: np.ndarray, axis: int) -> np.ndarray:
    """``v`` with its slices along ``axis`` mixed by ``w``: out_i = sum_k w_ik v_k."""
    return np.moveaxis(np.tensordot(w, np.moveaxis(v, axis, 0), axes=(1, 0)), 0, axis)


def _full_bias(c: np.ndarray, k: int, class_from_end: int) -> np.ndarray:
    """The bias broadcast to hold one entry per class along axis ``-class_from_end``."""
    if c.ndim < class_from_end:
        c = c.reshape((1,) * (class_from_end - c.ndim) + c.shape)
    shape = list(c.shape)
    shape[-class_from_end] = k
    return np.broadcast_to(c, shape)


def _keep(tensor: onnx.TensorProto) -> dict[str, str]:
    """A tensor as kept in the record: its serialized bytes (values in the proto) and their SHA-256."""
    copy = onnx.TensorProto()
    copy.CopyFrom(tensor)
    if is_external(copy):  # bring the values in: unpatch must not need the source's data file
        _make_resident(copy, read_span(span(tensor)))
        copy.ClearField("data_location")  # as a tensor that was never in a file
    data = copy.SerializeToString()
    return {"tensor": base64.b64encode(data).decode("ascii"), "sha256": hashlib.sha256(data).hexdigest()}


def _kept_tensor(kept: dict[str, str], name: str) -> onnx.TensorProto:
    """The tensor a record kept, checked against its SHA-256."""
    data = base64.b64decode(kept["tensor"], validate=True)
    if hashlib.sha256(data).hexdigest() != kept["sha256"]:
        raise ValueError(f"the kept copy of '{name}' does not match its SHA-256")
    tensor = onnx.TensorProto()
    try:
        tensor.ParseFromString(data)
    except Exception as exc:  # protobuf's DecodeError (protobuf ships no type hints for mypy)
        raise ValueError(f"the kept copy of '{name}' is not a tensor") from exc
    return tensor


def _targets(s: _Surgery, fold: _FoldSite, k: int) -> tuple[np.ndarray, np.ndarray | None]:
    """The layer's weight and bias (None: no bias), checked to hold k classes and to fit the record."""
    tensors = _constants(s.graph)
    weight = tensor_array(tensors[fold.weight])
    assert fold.weight_axis is not None  # _fold_site(per_class=True) found the class axis
    if weight.shape[fold.weight_axis] != k:
        raise OnnxcalError(
            f"--fold: axis {fold.weight_axis} of weight '{fold.weight}' holds {weight.shape[fold.weight_axis]} "
            f"classes, the matrix {k}", "leave out --fold to insert MatMul + Add instead",
        )
    sizes = [weight.nbytes] + ([tensor_array(tensors[fold.bias]).nbytes] if fold.bias else [])
    if sum(sizes) > KEEP_LIMIT:
        raise OnnxcalError(
            f"--fold: unpatching a matrix fold needs a copy of weight '{fold.weight}' ({sum(sizes) >> 20} MiB) in "
            f"the calibration record, and onnxcal keeps at most {KEEP_LIMIT >> 20} MiB there",
            "leave out --fold to insert MatMul + Add instead",
        )
    bias = tensor_array(tensors[fold.bias]) if fold.bias else None
    return weight, bias


def fold_matrix(s: _Surgery, model: onnx.ModelProto, site: ScoreSite, scaling: Scaling, drop_logits: bool) -> None:
    """Fold W z + b into the weight and bias of the layer computing z: no extra op.

    Slice i of the weight along its class axis becomes sum_k W_ik (slice k),
    and the bias (expanded to one entry per class) W c + b / beta, so that
    alpha A' (B' W^T) + beta (c W^T + b / beta) = (alpha A' B' + beta c) W^T + b.
    The weight's and bias's tensors before folding are kept in the record.
    """
    w, b = _matrix(scaling)
    fold = _fold_site(model, site, drop_logits, per_class=True)
    _check_offset(fold, scaling.method, bool(np.any(b != 0)))
    weight, bias = _targets(s, fold, len(w))
    assert fold.weight_axis is not None and fold.class_from_end is not None  # per_class=True found both
    tensors = _constants(s.graph)
    kept = {name: _keep(tensors[name]) for name in (fold.weight, fold.bias) if name}
    arrays = {fold.weight: _mix(weight.astype(np.float64), w, fold.weight_axis)}
    dtypes = {fold.weight: weight.dtype}
    if bias is not None:
        c = _full_bias(bias.astype(np.float64), len(w), fold.class_from_end)
        arrays[fold.bias] = _mix(c, w, c.ndim - fold.class_from_end) + _from_end(b, fold.class_from_end) / fold.beta
        dtypes[fold.bias] = bias.dtype
    _store(s, replace(fold, kept=kept), arrays, dtypes)


def unfold_matrix(graph: onnx.GraphProto, record: Record) -> None:
    """Undo ``fold_matrix`` in place: the kept tensors back, byte for byte."""
    fold = _recorded_fold(record)
    if not fold.kept:
        raise ValueError("the record of a matrix fold keeps no copy of the original weight")
    tensors = _constants(graph)
    for name, kept in fold.kept.items():
        tensors[name].CopyFrom(_kept_tensor(kept, name))


@dataclass(frozen=True)
class MatrixFoldError:
    """How far a matrix fold's weights are from the record's W and b folded into the original's.

    ``difference``: the largest difference of a folded weight or bias entry
    from the record's map folded into the original's, relative to the sum
    of the absolute terms it is made of (sum_k |W_ik| |A_k|, plus |b_i / beta|
    for the bias), where one rounding to the weights' dtype gives at most
    its unit roundoff; and of the record's kept copies from the original's
    tensors, entry by entry relative to the original's. ``roundings``: how
    many times the weights were rounded (1, more after re-patching a
    vector or temperature fold, whose unfold rounds).
    """

    difference: float
    dtype: str
    detail: str
    roundings: int = 1


def matrix_fold_error(model: onnx.ModelProto, record: Record, original: onnx.ModelProto) -> MatrixFoldError | None:
    """See :class:`MatrixFoldError`; None when a folded tensor is missing or its shape does not fit."""
    fold = _recorded_fold(record)
    w, b = _matrix(record.scaling)
    before, after = _constants(original.graph), _constants(model.graph)
    if any(name not in before or name not in after for name in record.changes.get("scaled", [])):
        return None
    a0, a1 = tensor_array(before[fold.weight]), tensor_array(after[fold.weight])
    axis, cfe = fold.weight_axis, fold.class_from_end
    if axis is None or cfe is None or a0.shape != a1.shape or a0.shape[axis] != len(w):
        return None
    pairs = [(a1, _mix(a0.astype(np.float64), w, axis), _mix(np.abs(a0.astype(np.float64)), np.abs(w), axis))]
    if fold.bias:
        c0 = _full_bias(tensor_array(before[fold.bias]).astype(np.float64), len(w), cfe)
        c1 = tensor_array(after[fold.bias])
        if c1.shape != c0.shape:
            return None
        offset = _from_end(b, cfe) / fold.beta
        pairs.append((c1, _mix(c0, w, c0.ndim - cfe) + offset,
                      _mix(np.abs(c0), np.abs(w), c0.ndim - cfe) + np.abs(offset)))
    for name, kept in (fold.kept or {}).items():
        try:
            copy = tensor_array(_kept_tensor(kept, name)).astype(np.float64)
        except (ValueError, TypeError, KeyError):  # a damaged copy
            return MatrixFoldError(float("inf"), a1.dtype.name, f"the record's copy of '{name}' is damaged")
        original_values = tensor_array(before[name]).astype(np.float64)
        if copy.shape != original_values.shape:
            return MatrixFoldError(float("inf"), a1.dtype.name, f"the record's copy of '{name}' has another shape")
        pairs.append((copy, original_values, np.abs(original_values)))
    tiny = np.finfo(np.float64).tiny
    with np.errstate(invalid="ignore"):
        diff = max(float(np.max(np.abs(got.astype(np.float64) - want) / np.maximum(scale, tiny), initial=0.0))
                   for got, want, scale in pairs)
    detail = (f"{record.method} W, b of {len(w)} classes folded into the original's weights, and the record's "
              "copy of them")
    return MatrixFoldError(diff, a1.dtype.name, detail, int(record.changes.get("rounded", 0)) + 1)
