"""Decision outputs beside the calibrated probabilities: ``accept``, ``class_set``, ``class_set_size``.

:func:`add_decisions` takes a model onnxcal has patched and adds, reading
the calibrated output P (which stays as it is), optional graph outputs:

* ``accept`` (bool, N): the row's confidence (max_k p_k; max(p, 1 - p) for
  one sigmoid) is >= tau; bool N x K for a multi-label head, one tau per label.
* ``class_set`` (bool, N x K): the conformal prediction set of each row;
  ``class_set_size`` (int64, N): how many classes it holds.

The thresholds are named initializers (``onnxcal_accept_threshold``,
``onnxcal_set_threshold``). Every node, initializer and output is noted in
the head's record (``changes``), so ``unpatch`` and re-patching remove them
with the rest of the patch, and the record gets a ``decisions`` section.

The operators are those ``onnxcal.decisions.accept`` and
``onnxcal.decisions.class_set`` describe (their NumPy references compute
the same way, in the same dtype): float16 probabilities are cast to float32
first; GreaterOrEqual / LessOrEqual from opset 12 (``Not(Less)`` /
``Not(Greater)`` before); TopK with ``largest``/``sorted``, CumSum and
ScatterElements from opset 11 (the adaptive sets are refused below);
ReduceMax takes its axes as an input from opset 18, ReduceSum from 13 (ONNX
operator spec, each operator's changelog).
"""

from __future__ import annotations

from dataclasses import replace
from typing import Any

import numpy as np
import onnx
from onnx import TensorProto, numpy_helper

from ..decisions import SetThreshold
from ..errors import OnnxcalError
from .external import check_model
from .record import Record, _write_records, read_records
from .surgery import _Surgery
from .tensors import _ELEM, opset_version, tensor_spec

ACCEPT = "accept"
CLASS_SET = "class_set"
CLASS_SET_SIZE = "class_set_size"
DECISION_OUTPUTS = (ACCEPT, CLASS_SET, CLASS_SET_SIZE)
ACCEPT_THRESHOLD = "onnxcal_accept_threshold"
SET_THRESHOLD = "onnxcal_set_threshold"


def _head(model: onnx.ModelProto, output: str | None) -> tuple[tuple[Record, ...], Record]:
    records = read_records(model)
    if not records:
        raise OnnxcalError("decision outputs go beside calibrated probabilities: the model has no calibration record")
    if output is None:
        return records, records[-1]
    found = next((r for r in records if output in (r.output, r.source_output)), None)
    if found is None:
        raise OnnxcalError(f"output '{output}' of the model is not calibrated by onnxcal")
    return records, found


def probabilities_layout(model: onnx.ModelProto, record: Record) -> tuple[str, int, int]:
    """The calibrated output's dtype, rank (1 or 2) and class count (0 when not static).

    Raises
    ------
    OnnxcalError
        The output is not a 1-D or 2-D float tensor of probabilities with the
        classes on the last axis, as the decision outputs need.
    """
    vi = next(o for o in model.graph.output if o.name == record.output)
    spec = tensor_spec(vi)
    shape = spec.shape or ()
    why = ""
    if record.activation not in ("softmax", "sigmoid"):
        why = f"it holds {record.activation} values, not probabilities"
    elif record.post:
        why = "post-processing follows the activation (" + ", ".join(str(p.get("op", "?")) for p in record.post) + ")"
    elif not spec.is_float or len(shape) not in (1, 2):
        why = f"it is a {spec.dtype} tensor of shape {spec.shape}, not N x K probabilities"
    elif len(shape) == 1 and record.kind != "binary":
        why = "it is 1-D, and only a one-sigmoid (binary) head may be"
    if why:
        raise OnnxcalError(
            f"decision outputs need output '{record.output}' to hold N x K probabilities with the classes last: {why}",
            "leave out --accept-error and --set-coverage for this output",
        )
    last = shape[-1]
    k = last if len(shape) == 2 and isinstance(last, int) else 0
    return spec.dtype, len(shape), k


class _Ops:
    """The opset-dependent spellings of the few operators the decisions use."""

    def __init__(self, s: _Surgery, opset: int) -> None:
        self.s, self.opset = s, opset

    def const(self, base: str, value: np.ndarray) -> str:
        return self.s.constant(base, numpy_helper.from_array(value, ""))

    def compare(self, op: str, a: str, b: str, out: str, output: str | None = None) -> str:
        """``GreaterOrEqual`` / ``LessOrEqual`` (opset 12), else ``Not(Less)`` / ``Not(Greater)``."""
        if self.opset >= 12:
            return self.s.node(op, [a, b], out, output=output)
        opposite = {"GreaterOrEqual": "Less", "LessOrEqual": "Greater"}[op]
        return self.s.node("Not", [self.s.node(opposite, [a, b], f"{out}_not")], out, output=output)

    def reduce(self, op: str, x: str, out: str, since: int, output: str | None = None) -> str:
        """``op`` over the last axis without keeping it; axes an input from opset ``since``."""
        if self.opset >= since:
            return self.s.node(op, [x, self.const(f"onnxcal_{op.lower()}_axes", np.array([-1], np.int64))], out,
                               output=output, keepdims=0)
        return self.s.node(op, [x], out, output=output, axes=[-1], keepdims=0)


def _confidence_inputs(ops: _Ops, p: str, kind: str, dtype: str) -> str:
    """max(p, 1 - p) for sigmoid heads, p itself for softmax."""
    if kind == "multiclass":
        return p
    one = ops.const("onnxcal_one", np.array(1, dtype=dtype))
    return ops.s.node("Max", [p, ops.s.node("Sub", [one, p], f"{p}_complement")], f"{p}_confidence")


def _accept(ops: _Ops, p: str, kind: str, dtype: str, rank: int, tau: np.ndarray) -> str:
    """Add ``accept``; return the threshold initializer's name."""
    x = _confidence_inputs(ops, p, kind, dtype)
    if kind != "multilabel" and rank == 2:
        x = ops.reduce("ReduceMax", x, f"{p}_max", 18)
    t = ops.const(ACCEPT_THRESHOLD, tau.astype(dtype))
    ops.compare("GreaterOrEqual", x, t, ACCEPT, output=ACCEPT)
    return t


def _two_classes(ops: _Ops, p: str, dtype: str, rank: int) -> str:
    """Concat(1 - p, p) on the last axis: the N x 2 probabilities of one sigmoid."""
    if rank == 1:
        axes = ops.const("onnxcal_unsqueeze_axes", np.array([-1], np.int64))
        p = ops.s.node("Unsqueeze", [p, axes], f"{p}_column") if ops.opset >= 13 else ops.s.node(
            "Unsqueeze", [p], f"{p}_column", axes=[-1])
    one = ops.const("onnxcal_one", np.array(1, dtype=dtype))
    return ops.s.node("Concat", [ops.s.node("Sub", [one, p], f"{p}_complement"), p], f"{p}_two_classes", axis=-1)


def _class_set(ops: _Ops, p: str, sets: SetThreshold, k: int) -> str:
    """Add ``class_set`` and ``class_set_size``; return the threshold initializer's name."""
    t = ops.const(SET_THRESHOLD, sets.vector(k).astype(sets.dtype))
    if sets.score == "las":
        member = ops.compare("GreaterOrEqual", p, t, CLASS_SET, output=CLASS_SET)
    else:
        member = _adaptive_set(ops, p, t, k)
    counted = ops.s.node("Cast", [member], f"{CLASS_SET}_int64", to=TensorProto.INT64)
    ops.reduce("ReduceSum", counted, CLASS_SET_SIZE, 13, output=CLASS_SET_SIZE)
    return t


def _adaptive_set(ops: _Ops, p: str, t: str, k: int) -> str:
    """Class k is in the set when the mass ranked before it is <= q_k (TopK, CumSum, ScatterElements)."""
    if ops.opset < 11:
        raise OnnxcalError(
            "adaptive prediction sets need TopK, CumSum and ScatterElements of opset 11; "
            f"the model has opset {ops.opset}",
            "use --set-score las, or re-export the model at opset 11 or later",
        )
    s = ops.s
    count = ops.const("onnxcal_class_count", np.array([k], np.int64))
    axis = ops.const("onnxcal_class_axis", np.array(-1, np.int64))
    ranked = s.name(f"{p}_ranked")
    order = s.name(f"{p}_order")
    s.nodes.append(onnx.helper.make_node("TopK", [p, count], [ranked, order], name=s.name("onnxcal_topk"),
                                         axis=-1, largest=1, sorted=1))
    s.changes["nodes"].append(s.nodes[-1].name)
    before = s.node("CumSum", [ranked, axis], f"{p}_mass_before_ranked", exclusive=1)
    by_class = s.node("ScatterElements", [p, order, before], f"{p}_mass_before", axis=-1)
    return ops.compare("LessOrEqual", by_class, t, CLASS_SET, output=CLASS_SET)


def _outputs(s: _Surgery, names: list[str], n_dim: Any, k: int, multilabel: bool) -> None:
    """Declare the decision outputs (noted, so unpatch removes them)."""
    shapes = {ACCEPT: [n_dim, k or None] if multilabel else [n_dim], CLASS_SET: [n_dim, k or None],
              CLASS_SET_SIZE: [n_dim]}
    types = {ACCEPT: TensorProto.BOOL, CLASS_SET: TensorProto.BOOL, CLASS_SET_SIZE: TensorProto.INT64}
    for name in names:
        s.graph.output.append(onnx.helper.make_tensor_value_info(name, types[name], shapes[name]))
        s.changes["outputs"].append(name)


def _batch_dim(g: onnx.GraphProto, output: str) -> Any:
    dims = next(o for o in g.output if o.name == output).type.tensor_type.shape.dim
    return (dims[0].dim_param or dims[0].dim_value or None) if len(dims) else None


def add_decisions(
    model: onnx.ModelProto,
    *,
    output: str | None = None,
    accept_threshold: float | np.ndarray | None = None,
    sets: SetThreshold | None = None,
    section: dict[str, Any] | None = None,
) -> onnx.ModelProto:
    """A copy of the patched ``model`` with decision outputs beside its calibrated ``output``.

    Parameters
    ----------
    model : onnx.ModelProto
        Patched by onnxcal (not modified). Decision outputs it already has
        for ``output`` are an error: re-patch to change them.
    output : str, optional
        The calibrated output (its original or calibrated name); default the
        head patched last.
    accept_threshold : float or ndarray, optional
        tau, or one per label for a multi-label head (``inf``: accept nothing).
        Adds ``accept``.
    sets : SetThreshold, optional
        From ``decisions.choose_set_threshold``. Adds ``class_set`` and
        ``class_set_size``.
    section : dict, optional
        Stored as the record's ``decisions`` (how the thresholds were chosen);
        the initializer names are added to it.

    Returns
    -------
    onnx.ModelProto
        Checked with onnx's full checker.
    """
    records, record = _head(model, output)
    _check_request(record, accept_threshold, sets)
    dtype, rank, k = probabilities_layout(model, record)
    out = onnx.ModelProto()
    out.CopyFrom(model)
    wanted = ([ACCEPT] if accept_threshold is not None else []) + ([CLASS_SET, CLASS_SET_SIZE] if sets else [])
    s = _Surgery(out.graph, out.ir_version)
    taken = next((n for n in wanted if n in s.taken), None)
    if taken is not None:
        raise OnnxcalError(f"the model already has a tensor named '{taken}', the name of a decision output",
                           "rename that tensor in the model, or leave out the option that adds it")
    s.taken.update(wanted)
    ops = _Ops(s, opset_version(out))
    compute = "float32" if dtype in ("float16", "bfloat16") else dtype
    p = record.output
    if compute != dtype:
        p = s.node("Cast", [p], f"{p}_float32", to=_ELEM["float32"])
    names = {"accept": "", "class_set": ""}
    if accept_threshold is not None:
        tau = np.asarray(accept_threshold, dtype=np.float64)
        if record.kind == "multilabel":
            tau = np.broadcast_to(tau.reshape(-1), (k or tau.size,)).copy()
        names["accept"] = _accept(ops, p, record.kind, compute, rank, tau.reshape(tau.shape if tau.ndim else ()))
    if sets is not None:
        two = record.kind == "binary"
        if not two and not k:
            raise OnnxcalError(f"output '{record.output}' has no static class count to give the set thresholds",
                               "leave out --set-coverage")
        x = _two_classes(ops, p, compute, rank) if two else p
        names["class_set"] = _class_set(ops, x, replace(sets, dtype=compute), 2 if two else k)
    s.flush(len(out.graph.node))
    _outputs(s, wanted, _batch_dim(out.graph, record.output), 2 if record.kind == "binary" else k,
             record.kind == "multilabel")
    changes = {key: list(value) if isinstance(value, list) else value for key, value in record.changes.items()}
    for key in ("nodes", "initializers", "outputs", "inputs"):
        if s.changes.get(key):
            changes[key] = [*changes.get(key, []), *s.changes[key]]
    section = {**(section or {}), "initializers": names, "outputs": wanted, "compute_dtype": compute}
    new = replace(record, changes=changes, decisions=section)
    _write_records(out, [new if r is record else r for r in records])
    try:
        check_model(out)
    except Exception as exc:  # a bug on our side
        raise OnnxcalError(
            f"the model with decision outputs fails the ONNX checker: {str(exc).splitlines()[0]}",
            "report this with the model's inspect output",
        ) from exc
    return out


def _check_request(record: Record, accept_threshold: float | np.ndarray | None, sets: SetThreshold | None) -> None:
    if accept_threshold is None and sets is None:
        raise OnnxcalError("add_decisions needs an acceptance threshold or set thresholds")
    if record.decisions:
        raise OnnxcalError(f"output '{record.output}' already has decision outputs",
                           "re-patch the model to change them")
    if record.kind == "multilabel" and sets is not None:
        raise OnnxcalError("prediction sets need one true class per row; a multi-label head's output is already "
                           "a set of labels", "leave out --set-coverage (per-label acceptance works)")
    if accept_threshold is not None and record.kind != "multilabel" and np.size(accept_threshold) != 1:
        raise OnnxcalError("one acceptance threshold is needed for a softmax or one-sigmoid head")
