"""Folding a scaling into the weight and bias of the layer that computes the logits."""

from __future__ import annotations

from dataclasses import asdict, dataclass, replace
from typing import TYPE_CHECKING, Any, cast

import numpy as np
import onnx
from onnx import helper, numpy_helper

from ..errors import OnnxcalError
from ..scaling import Scaling
from .external import tensor_array
from .tensors import (
    _FLOAT_TYPES,
    _RESHAPES,
    _attr,
    _axis_through_reshape,
    _producers,
    _Shapes,
    _uses,
    constant_node_value,
    overridable,
)

if TYPE_CHECKING:  # imported for annotations only (record and rewrite import this module)
    from .find import ScoreSite
    from .record import Record
    from .surgery import _Surgery


# -- folding ---------------------------------------------------------------

_QUANTIZED = {"QLinearMatMul", "MatMulInteger", "QGemm", "DequantizeLinear", "QLinearConv"}


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
    ``Record.changes["fold"]``. ``kept``: the weight's and bias's tensors
    before folding, serialized (base64, with their SHA-256), by name, for
    the maps that mix the classes (matrix scaling), whose weight cannot be
    divided back (``graph.fold_matrix``).
    """

    layer: str
    weight: str
    bias: str = ""
    beta: float = 1.0
    weight_axis: int | None = None
    class_from_end: int | None = None
    bias_before: dict[str, Any] | None = None
    kept: dict[str, dict[str, str]] | None = None


def _axis_backward(node: onnx.NodeProto, axis: int, rank: int, shapes: _Shapes) -> tuple[int, int] | None:
    """Class axis and rank of a layout node's input, given its output's (None: lost)."""
    if node.op_type == "Identity":
        return axis, rank
    in_shape = shapes.shape(node.input[0])
    if node.op_type == "Transpose":
        perm = list(_attr(node, "perm", [])) or list(range(rank))[::-1]
        return (perm[axis], rank) if axis < len(perm) else None
    moved = _axis_through_reshape(axis, shapes.shape(node.output[0]), in_shape)
    return None if moved is None or in_shape is None else (moved, len(in_shape))


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
    inits = _constants(graph)
    fed = overridable(model)
    why = "leave out --fold to insert the scaling as nodes instead"
    shapes = _Shapes(model)
    tracked: tuple[int, int] | None
    lost: onnx.NodeProto | None
    tensor, tracked, lost = site.scores, (site.scores_axis, site.scores_rank), None
    node: onnx.NodeProto | None
    # Each tensor on the way down has one reader: the activation (or, for raw
    # logits, the output that --drop-logits removes), then the next node down.
    if site.activation is None:
        if not drop_logits:
            raise OnnxcalError(
                f"--fold would change the logits output '{site.output}' itself (to the calibrated logits)",
                "add --drop-logits to replace it by the probabilities, or " + why,
            )
    while True:
        # a written-out softmax may read the logits twice, both times inside the activation
        if uses.get(tensor, 0) != (max(1, len(site.rewire)) if tensor == site.scores else 1):
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
        assert node is not None  # the loop above raised otherwise
        if node.op_type in _QUANTIZED or (name in producers and graph.node[producers[name]].op_type in _QUANTIZED):
            raise OnnxcalError(f"--fold: the {role} of '{node.name or node.op_type}' is quantized", why)
        if name not in inits or name in fed:
            raise OnnxcalError(
                f"--fold: the {role} '{name}' of '{node.name or node.op_type}' is not a constant initializer "
                "(nor a Constant node)", why
            )
        if inits[name].data_type not in _FLOAT_TYPES:
            raise OnnxcalError(f"--fold: the {role} '{name}' is not floating point (quantized?)", why)
        if uses.get(name, 0) != 1:
            raise OnnxcalError(f"--fold: the {role} '{name}' is shared with other nodes", why)
        return name

    assert node is not None  # the loop above raised otherwise
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
        assert lost is not None  # tracked only becomes None at a layout node
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
    assert axis is not None  # per-class values come with a weight axis
    shape = [1] * ndim
    shape[axis] = v.size
    return v.reshape(shape)


def _from_end(v: np.ndarray, class_from_end: int | None) -> np.ndarray:
    """Per-class values that broadcast (trailing dims aligned) along axis ``-class_from_end``."""
    if v.ndim == 0:
        return v
    assert class_from_end is not None  # per-class values come with a class axis
    return v.reshape((v.size,) + (1,) * (class_from_end - 1))


def _fold_affine(scaling: Scaling) -> tuple[np.ndarray, np.ndarray]:
    """The scaling as per-class (w, b), each 0-d when it is the same for every class."""
    w, b = scaling.affine()
    return _uniform(w), _uniform(b)


def _constants(graph: onnx.GraphProto) -> dict[str, onnx.TensorProto]:
    """The graph's constant tensors by name: its initializers and what its ``Constant`` nodes hold
    (exporters write weights either way; ONNX operator spec, Constant)."""
    found = {i.name: i for i in graph.initializer}
    for node in graph.node:
        value = constant_node_value(node)
        if value is not None:
            found.setdefault(node.output[0], value)
    return found


def _array(graph: onnx.GraphProto, name: str) -> np.ndarray | None:
    tensor = _constants(graph).get(name)
    return None if tensor is None else tensor_array(tensor)


def _put_arrays(graph: onnx.GraphProto, arrays: dict[str, np.ndarray]) -> None:
    """Replace constants (initializers, Constant nodes' values) by float64 ``arrays``, each rounded
    once to the dtype it had."""
    for name, tensor in _constants(graph).items():
        if name in arrays:
            dtype = np.dtype(helper.tensor_dtype_to_np_dtype(tensor.data_type))
            with np.errstate(over="ignore"):
                new = numpy_helper.from_array(np.asarray(arrays[name]).astype(dtype), tensor.name)
            if tensor.HasField("doc_string"):
                new.doc_string = tensor.doc_string
            tensor.CopyFrom(new)


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
    _check_offset(fold, scaling.method, shift)
    weight = _array(s.graph, fold.weight)
    assert weight is not None  # _fold_site checked it is a constant
    arrays = {fold.weight: weight.astype(np.float64) * _along(w, fold.weight_axis, weight.ndim)}
    dtypes = {fold.weight: weight.dtype}
    if fold.bias:
        bias = _array(s.graph, fold.bias)
        assert bias is not None  # _fold_site checked it is a constant
        offset = _from_end(b, fold.class_from_end) / fold.beta if shift else 0.0
        arrays[fold.bias] = bias.astype(np.float64) * _from_end(w, fold.class_from_end) + offset
        dtypes[fold.bias] = bias.dtype
        fold = replace(fold, bias_before={"dims": list(bias.shape), "values": [float(v) for v in bias.ravel()]})
    _store(s, fold, arrays, dtypes)


def _check_offset(fold: _FoldSite, method: str, shift: bool) -> None:
    """Refuse a map with an offset b where the layer cannot take it (no bias, or Gemm's beta = 0)."""
    nodes = "MatMul + Add" if method in ("matrix", "dirichlet") else "Mul + Add"
    if shift and not fold.bias:
        raise OnnxcalError(
            f"--fold: '{fold.layer}' has no bias to take the offset b of {method} scaling",
            f"leave out --fold to insert {nodes} instead, or fit temperature scaling (no offset)",
        )
    if shift and fold.beta == 0:
        raise OnnxcalError(
            f"--fold: '{fold.layer}' multiplies its bias by beta = 0, so it cannot take the offset b "
            f"of {method} scaling", f"leave out --fold to insert {nodes} instead",
        )


def _store(s: _Surgery, fold: _FoldSite, arrays: dict[str, np.ndarray], dtypes: dict[str, np.dtype[Any]]) -> None:
    """Write the folded ``arrays`` (float64) into the graph, each rounded to its dtype, and note the fold."""
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
    assert weight is not None  # check_record found every scaled constant in the graph
    arrays = {fold.weight: weight.astype(np.float64) / _along(w, fold.weight_axis, weight.ndim)}
    if fold.bias_before is not None:
        arrays[fold.bias] = np.reshape(fold.bias_before["values"], fold.bias_before["dims"])
    elif fold.bias:  # a record from before per-class folding: the bias was divided by T
        bias = _array(graph, fold.bias)
        assert bias is not None  # check_record found every scaled constant in the graph
        arrays[fold.bias] = bias.astype(np.float64) / w
    _put_arrays(graph, arrays)


def _roundings(record: Record | None) -> int:
    """How many times the weights of ``unpatch(model)`` were rounded since the source.

    Each fold rounds the folded weight once and each unfold once more; a
    later fold adds one (``FoldedValues.roundings``), so verify's limit can
    follow repeated re-patching.
    """
    if record is None:
        return 0
    mixed = record.method in ("matrix", "dirichlet")  # unfolded from the kept copy: no rounding
    return cast(int, record.changes.get("rounded", 0)) + (2 if record.folded and not mixed else 0)


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
