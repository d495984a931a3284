"""Rewriting the graph: the surgery helper, the rewrites, patch, unpatch, expose."""

from __future__ import annotations

import os
from collections.abc import Callable
from functools import partial

import numpy as np
import onnx
from onnx import helper, numpy_helper

from ..errors import OnnxcalError
from ..scaling import Scaling, check_scaling
from .find import ScoreSite, _class_labels, find_scores, fit_kind
from .fold import _fold, _roundings, _unfold
from .record import Record, _damaged, _write_record, check_record, read_record
from .tensors import (
    _ELEM,
    COMPUTE_DTYPES,
    DEFAULT_OUTPUT_NAME,
    _all_names,
    _scalar,
    np_dtype,
    opset_version,
    unique_name,
)


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
