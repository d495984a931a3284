"""The surgery helper, the scalings it inserts, and how the logits are built from a graph.

``_Surgery`` adds nodes and initializers under unique deterministic names
and notes every change, so a patch can be undone. A ``ScaleFn`` inserts the
calibration map (``divide_by_temperature``, ``multiply_add``).
``build_logits`` adds the nodes that compute the logits a ``ScoreSite``
describes (log p, a dequantized input, a classifier's raw scores, ...):
capture and the rewrites both call it, so the logits fitted on are the ones
the patched graph scales.
"""

from __future__ import annotations

from collections.abc import Callable
from functools import partial
from typing import TYPE_CHECKING, Any

import numpy as np
import onnx
from onnx import helper, numpy_helper

from ..errors import OnnxcalError
from ..scaling import Scaling
from .mapped import build_options, is_parameter
from .tensors import _ELEM, _all_names, _scalar, np_dtype, opset_version, unique_name

if TYPE_CHECKING:
    from .find import ScoreSite

# Highest default-domain opset onnxcal adds to a model that imports none
# (onnxruntime 1.20, the oldest the package accepts, runs opset 21).
MAX_ADDED_OPSET = 21


class _Surgery:
    """Adds nodes and initializers to a graph under unique names, noting every change.

    ``changes`` ends up in the record; ``unpatch`` reads it to undo the patch.
    """

    def __init__(self, graph: onnx.GraphProto, ir_version: int = 0) -> None:
        self.graph = graph
        self.ir_version = ir_version
        self.taken = _all_names(graph)
        self.nodes: list[onnx.NodeProto] = []
        self.changes: dict[str, Any] = {"nodes": [], "initializers": [], "outputs": [], "renamed": {}}
        self.parameters: dict[str, str] = {}  # role -> initializer name (e.g. "temperature")
        self.root = self

    def sub(self, graph: onnx.GraphProto) -> _Surgery:
        """A surgery on a subgraph of this graph (an If branch, a Loop/Scan body).

        It shares the names taken (unique across the whole model), the
        changes noted and the parameters; its constants go into the main
        graph, which every subgraph may read (ONNX IR spec, outer scope).
        """
        inner = _Surgery.__new__(_Surgery)
        inner.graph, inner.ir_version, inner.taken, inner.nodes = graph, self.ir_version, self.taken, []
        inner.changes, inner.parameters, inner.root = self.changes, self.parameters, self.root
        return inner

    def name(self, base: str) -> str:
        return unique_name(base, self.taken)

    def constant(self, base: str, tensor: onnx.TensorProto) -> str:
        """Add an initializer (to the main graph); below IR version 4 it is also listed as a graph
        input, as that IR requires of every initializer (ONNX IR spec, IR version 3)."""
        if self.root is not self:
            return self.root.constant(base, tensor)
        tensor.name = self.name(base)
        self.graph.initializer.append(tensor)
        self.changes["initializers"].append(tensor.name)
        if 0 < self.ir_version < 4:
            self.graph.input.append(helper.make_tensor_value_info(tensor.name, tensor.data_type, list(tensor.dims)))
            self.changes.setdefault("inputs", []).append(tensor.name)
        return tensor.name

    def node(self, op: str, inputs: list[str], out: str, output: str | None = None, **attrs: Any) -> str:
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


def _parameter(s: _Surgery, role: str, value: Any, dtype: str, site: ScoreSite) -> str:
    """A parameter initializer: a scalar, or one value per class shaped to
    broadcast along the class axis of the scores (ONNX multidirectional
    broadcasting aligns trailing dims; ONNX operator spec, Broadcasting)."""
    if role in s.parameters:  # the same parameter, read again inside another branch
        return s.parameters[role]
    arr = np.asarray(value, dtype=np_dtype(dtype))
    if arr.ndim == 1:
        arr = arr.reshape((arr.size,) + (1,) * (site.scores_rank - 1 - site.scores_axis))
    name = s.constant(_PARAMETER_NAMES[role], numpy_helper.from_array(arr, ""))
    s.parameters[role] = name
    return name


def divide_by_temperature(
    surgery: _Surgery, x: str, dtype: str, *, temperature: Any, site: ScoreSite
) -> str:
    """Temperature scaling: ``Div(x, T)``, T a scalar (or one per label) in ``dtype``.

    References
    ----------
    Guo, Pleiss, Sun, Weinberger, "On Calibration of Modern Neural Networks",
    ICML 2017, sec. 4.2.
    """
    t_name = _parameter(surgery, "temperature", temperature, dtype, site)
    return surgery.node("Div", [x, t_name], f"{x}_calibrated")


def multiply_add(surgery: _Surgery, x: str, dtype: str, *, w: Any, b: Any, site: ScoreSite) -> str:
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


_BUILD_DTYPES = ("float16", "float32", "float64")


def map_logits(surgery: _Surgery, x: str, dtype: str, *, scaling: Scaling, site: ScoreSite) -> str:
    """A map of :mod:`onnxcal.maps` as calibrated logits for the site's activation.

    The map's own subgraph (standard operators, opset >= 13) is added:
    matrix, Dirichlet and beta stop at their logits; the others end in
    probabilities p, turned into log max(p, tiny) (softmax of it is p, as
    p sums to 1) or, for one logit, log p - log(1 - p) (sigmoid of it is p),
    so every rewrite feeds the model's own activation, drop-in. The
    reference (``Scaling.apply``) makes the same logits in float64.
    """
    from ..maps import module

    if dtype not in _BUILD_DTYPES:
        raise OnnxcalError(
            f"{scaling.method} calibration cannot run in {dtype}",
            f"patch with --compute-dtype float32 (the map runs in one of {', '.join(_BUILD_DTYPES)})",
        )
    one_dim = site.scores_rank == 1
    if one_dim:  # one score per row: the map reads N x 1
        axes = surgery.constant("onnxcal_axes_last", numpy_helper.from_array(np.array([-1], dtype=np.int64), ""))
        x = surgery.node("Unsqueeze", [x, axes], f"{x}_column")
    extra = build_options(scaling.method)
    num_classes = map_width(site)
    build = module(scaling.method).build
    sub = build(x, dtype, num_classes, scaling.parameters, taken=surgery.taken, **extra)
    alone = build("x", dtype, num_classes, scaling.parameters, **extra)  # the roles: names in a graph of its own
    surgery.taken.update(sub.names)
    for tensor, role in zip(sub.initializers, alone.initializers, strict=True):
        surgery.root.graph.initializer.append(tensor)
        surgery.changes["initializers"].append(tensor.name)
        if is_parameter(tensor):
            surgery.parameters.setdefault(role.name, tensor.name)
    for node in sub.nodes:
        surgery.nodes.append(node)
        surgery.changes["nodes"].append(node.name)
    out: str = sub.output
    if not extra:
        out = _probabilities_as_logits(surgery, out, dtype, num_classes)
    if one_dim:
        out = surgery.node("Squeeze", [out, axes], f"{x}_calibrated")
    return out


def map_width(site: ScoreSite) -> int:
    """The width of the logits a map reads at ``site`` (one score per row: 1)."""
    return 1 if site.scores_rank == 1 else int(site.num_classes or 1)


def _probabilities_as_logits(surgery: _Surgery, p: str, dtype: str, num_classes: int) -> str:
    if num_classes > 1:
        return _log_clamped(surgery, p, dtype)
    one = surgery.constant("onnxcal_one", _scalar("", 1.0, dtype))
    rest = surgery.node("Sub", [one, p], f"{p}_complement")
    return surgery.node("Sub", [_log_clamped(surgery, p, dtype), _log_clamped(surgery, rest, dtype)], f"{p}_logit")


def check_map_site(scaling: Scaling, site: ScoreSite, opset: int) -> None:
    """Refuse a map of :mod:`onnxcal.maps` where its subgraph cannot go."""
    if scaling.is_affine:
        return
    if opset < 13:
        raise OnnxcalError(
            f"{scaling.method} calibration needs default-domain opset 13 or later, the model imports opset {opset}",
            "re-export the model at opset 13 or later, or use --method temperature",
        )
    if site.scores_rank > 1 and site.scores_axis != site.scores_rank - 1:
        raise OnnxcalError(
            f"{scaling.method} calibration needs the class axis last; output '{site.output}' has its classes on "
            f"axis {site.scores_axis} of {site.scores_rank}",
            "use --method temperature or vector, which work on any class axis",
        )


def scale_fn(scaling: Scaling, site: ScoreSite) -> ScaleFn:
    """The ``ScaleFn`` that bakes ``scaling`` in front of ``site``'s activation."""
    if not scaling.is_affine:
        return partial(map_logits, scaling=scaling, site=site)
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




def build_logits(s: _Surgery, site: ScoreSite, source: str) -> str:
    """Add the nodes computing the logits of ``site`` from ``source``; return their name.

    ``source`` is ``site.scores`` (or its name after a rewrite renamed it);
    see ``ScoreSite.logits_from``. Nothing is added when the logits are a
    tensor of the graph.
    """
    how = site.logits_from
    if how in ("tensor", "log-probabilities"):
        return source
    if how == "log":  # log(max(p, tiny)): softmax(log p) = p, and 0 stays finite
        return _log_clamped(s, source, site.dtype)
    if how == "logit":  # log p - log(1 - p): sigmoid of it is p
        one = s.constant("onnxcal_one", _scalar("", 1.0, site.dtype))
        rest = s.node("Sub", [one, source], f"{source}_complement")
        return s.node("Sub", [_log_clamped(s, source, site.dtype), _log_clamped(s, rest, site.dtype)],
                      f"{source}_logit")
    if how == "log-sigmoid":  # log sigmoid(x) = -softplus(-x)
        neg = s.node("Neg", [source], f"{source}_negated")
        return s.node("Neg", [s.node("Softplus", [neg], f"{source}_softplus")], f"{source}_log_sigmoid")
    if how == "dequantized":
        qlinear = s.graph.node[site.node]
        inputs = [source,
                  qlinear.input[1]] + ([qlinear.input[2]] if len(qlinear.input) > 2 and qlinear.input[2] else [])
        return s.node("DequantizeLinear", inputs, f"{source}_dequantized")
    if how == "raw-scores":
        return _raw_scores(s, site)
    raise OnnxcalError(f"unknown way to the logits: {how!r}")  # a damaged record


def _log_clamped(s: _Surgery, p: str, dtype: str) -> str:
    tiny = s.constant("onnxcal_smallest_probability", _scalar("", np.finfo(np_dtype(dtype)).tiny, dtype))
    return s.node("Log", [s.node("Max", [p, tiny], f"{p}_clamped")], f"{p}_log")


def _raw_scores(s: _Surgery, site: ScoreSite) -> str:
    """An ai.onnx.ml classifier's scores before its post_transform, as logits.

    A copy of the classifier with ``post_transform`` NONE gives the raw
    scores R. SOFTMAX: p = softmax(R), so R are the logits. LOGISTIC with
    K > 2 labels (one-vs-rest): p_k = sigmoid(R_k), L1-normalised after, so
    the logits are log sigmoid(R). LOGISTIC with two labels: onnxruntime
    writes [1 - sigmoid(s), sigmoid(s)] with s in column 1 of R (measured
    with onnxruntime 1.32; the ONNX-ML spec leaves the binary layout open),
    so the logits are [0, s]. Capture checks on the data that the logits
    reproduce the probabilities before it uses them.
    """
    ml = s.graph.node[site.node]
    copy = onnx.NodeProto()
    copy.CopyFrom(ml)
    copy.name = s.name(f"onnxcal_{ml.op_type.lower()}_raw")
    del copy.output[:]
    copy.output.extend([s.name(f"{ml.output[0]}_raw"), s.name(f"{site.values}_raw")])
    kept = [a for a in copy.attribute if a.name != "post_transform"]
    del copy.attribute[:]
    copy.attribute.extend(kept)
    s.nodes.append(copy)
    s.changes["nodes"].append(copy.name)
    raw: str = copy.output[1]
    # onnx infers no type for some ai.onnx.ml ops (TreeEnsembleClassifier-1); strict inference needs one
    s.value_info(helper.make_tensor_value_info(raw, _ELEM[site.dtype], [None, None]))
    if site.ml_transform == "SOFTMAX":
        return raw
    if site.num_classes == 2:
        mask = s.constant("onnxcal_positive_column", numpy_helper.from_array(np.array([0.0, 1.0],
                                                                                      np_dtype(site.dtype))))
        return s.node("Mul", [raw, mask], f"{raw}_logits")
    neg = s.node("Neg", [raw], f"{raw}_negated")
    return s.node("Neg", [s.node("Softplus", [neg], f"{raw}_softplus")], f"{raw}_log_sigmoid")


def default_opset(model: onnx.ModelProto) -> int:
    """The default-domain opset the patched graph uses: the model's, or the one onnxcal adds.

    A graph that imports only ai.onnx.ml (a converter's tree-ensemble
    export) gets the highest default-domain opset, up to
    ``MAX_ADDED_OPSET``, that its IR version allows beside its other
    imports (onnx's table of IR versions and opsets).

    Raises
    ------
    OnnxcalError
        No default-domain opset fits the model's IR version.
    """
    have = opset_version(model)
    if have:
        return have
    others = [i for i in model.opset_import if i.domain not in ("", "ai.onnx")]
    for version in range(min(MAX_ADDED_OPSET, onnx.defs.onnx_opset_version()), 0, -1):
        wanted = [*others, helper.make_opsetid("", version)]
        try:
            if helper.find_min_ir_version_for(wanted, ignore_unknown=True) <= model.ir_version:
                return version
        except ValueError:
            continue
    raise OnnxcalError(
        f"the model imports no default ONNX opset and its IR version {model.ir_version} allows none "
        "for the operators onnxcal adds",
        "re-export the model with a newer IR version",
    )


def add_default_opset(s: _Surgery, model: onnx.ModelProto) -> int:
    """Import the default domain when the model does not (noted so ``unpatch`` removes it)."""
    version = default_opset(model)
    if not opset_version(model):
        model.opset_import.append(helper.make_opsetid("", version))
        s.changes["opset_import"] = version
    return version
