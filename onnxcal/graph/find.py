"""Finding a model's class scores: which output, what it holds, the logits, the class axis.

``find_scores`` walks back from the output through layout ops and
post-processing (``passes``), trying at every tensor the spellings of an
activation (``patterns.SPELLINGS``) in order. The first that matches says
where the logits are; without one the output holds raw logits. The result
is a ``ScoreSite``: the public description of the reading, which capture,
patch and verify all work from.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
import onnx
from onnx import helper, numpy_helper

from ..errors import OnnxcalError
from . import post as _post
from .match import Found, View
from .passes import RESHAPES, Step, step
from .patterns import BY_NAME, RAW_TRANSFORMS, Spelling, first_match, ml_transform
from .tensors import (
    _ELEM,
    ACTIVATION_CHOICES,
    TensorSpec,
    _attr,
    _axis_through_reshape,
    _rank,
    _Shapes,
    opset_version,
    tensor_spec,
)

HOLDS = ("logits", "probabilities", "log-probabilities")
"""What an output may hold (``--output-holds``)."""


@dataclass(frozen=True)
class ScoreSite:
    """Where a model's class scores are and what turns them into the output.

    The public contract of the score finder (``find_scores``).

    Attributes
    ----------
    output : str
        The graph output chosen.
    holds : str
        What the output holds: ``"logits"``, ``"probabilities"`` or
        ``"log-probabilities"``.
    spelling : str
        The pattern recognised (``patterns.SPELLINGS``: ``"softmax"``,
        ``"softmax-written-out"``, ``"qlinear-softmax"``,
        ``"ml-classifier"``, ...), ``"raw-logits"`` when none matched, or
        ``"stated"`` / ``"data"`` when the output was read as probabilities
        by ``--output-holds`` or by the data (``read_as``).
    scores : str
        The logits tensor z when ``logits_from`` is ``"tensor"``; else the
        tensor the logits are computed from (see ``logits_from``).
    logits_from : str
        How the logits come from ``scores``: ``"tensor"`` (they are it),
        ``"log"`` (log(max(p, tiny)) of probabilities), ``"logit"``
        (log p - log(1 - p)), ``"log-probabilities"`` (the values are
        log-probabilities already), ``"log-sigmoid"`` (log sigmoid(x), for
        L1-normalised sigmoids), ``"dequantized"`` (DequantizeLinear of a
        quantized input) or ``"raw-scores"`` (an ai.onnx.ml classifier's
        scores before its post_transform). ``expose_scores`` builds them.
    activation : str or None
        What turns the logits into the values: ``"softmax"``,
        ``"logsoftmax"``, ``"sigmoid"``, or None for raw logits.
    post : tuple of post.PostOp
        What the model does to the values between the activation and the
        output, in order (``x100``, a clip, one class taken, a
        quantization round trip, an L1 normalisation).
    node : int or None
        Index in ``graph.node`` of the activation (or classifier) node.
    nodes : tuple of int
        Every node of the recognised pattern.
    rewire : tuple of (int, int)
        (node index, input slot) of every place the pattern reads the
        logits (two for a softmax written out with the max subtracted);
        the scaling is inserted there. Empty unless ``logits_from`` is
        ``"tensor"`` and there is an activation.
    values : str
        The tensor the activation produces (before post-processing).
    tensor : str
        The tensor holding the output's values: the output itself, or the
        probabilities a ZipMap turns into a sequence of maps.
    class_axis : int
        The class axis of the logits as captured (laid out like the output
        by replaying ``layout``); also the output's when no class is taken.
    rank : int
        Rank of the captured logits.
    num_classes : int or None
        K, when fixed in the graph.
    dtype : str
        numpy dtype name of the logits (of ``scores``).
    layout : tuple of int
        Layout nodes (Transpose, Reshape, ...) between the activation and
        the output, replayed on the logits when they are captured.
    output_dtype : str
        numpy dtype name of ``tensor``.
    scores_axis, scores_rank : int
        Class axis and rank of the logits where the scaling applies.
    dtypes : tuple of str
        Every float dtype the values pass through, logits to output
        (verify's tolerance follows the coarsest).
    ml_transform : str
        An ai.onnx.ml classifier's ``post_transform``, else "".
    path : tuple of int
        Every node between the logits and the output (the pattern's, the
        layout ops' and the post-processing's).
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
    output_dtype: str = ""
    scores_axis: int = 1
    scores_rank: int = 2
    holds: str = "logits"
    spelling: str = "raw-logits"
    logits_from: str = "tensor"
    post: tuple[_post.PostOp, ...] = ()
    nodes: tuple[int, ...] = ()
    rewire: tuple[tuple[int, int], ...] = ()
    values: str = ""
    dtypes: tuple[str, ...] = ()
    ml_transform: str = ""
    path: tuple[int, ...] = ()

    @property
    def from_probabilities(self) -> bool:
        """True when the logits are computed from the model's values, not read off a tensor."""
        return self.logits_from != "tensor"

    @property
    def takes_one(self) -> bool:
        """True when the output holds one class's value (a class taken by Gather or Slice)."""
        return _post.takes_one(self.post)


# --------------------------------------------------------------------------
# Choosing the output


def _usable(spec: TensorSpec, view: View) -> bool:
    """Float tensors, and the sequence of maps a ZipMap makes."""
    i = view.producer(spec.name)
    return spec.is_float or (i is not None and view.node(i).op_type == "ZipMap")


def _named(view: View, output: str) -> TensorSpec:
    specs = [tensor_spec(vi) for vi in view.graph.output]
    for s in specs:
        if s.name == output:
            if not _usable(s, view):
                raise OnnxcalError(
                    f"output '{output}' has element type {s.dtype}, not a float type",
                    "choose the output that holds class scores",
                )
            return s
    names = ", ".join(s.name for s in specs)
    raise OnnxcalError(f"the model has no output named '{output}'", f"choose one of: {names}")


def _choose(view: View) -> ScoreSite:
    """The output to calibrate when none is named.

    An output produced by a recognised activation or probability pattern
    wins; several such outputs, or (without one) several float outputs that
    could be raw logits, are refused with their names, since taking the
    first could calibrate the wrong values.
    """
    specs = [tensor_spec(vi) for vi in view.graph.output]
    usable = [s for s in specs if _usable(s, view)]
    if len(usable) > 1:  # a single number per model run is no class score
        usable = [s for s in usable if s.shape is None or len(s.shape) > 0 or not s.is_float] or usable[:1]
    if not usable:
        kinds = ", ".join(f"{s.name} ({s.dtype})" for s in specs)
        raise OnnxcalError(
            f"the model has no floating-point output to calibrate (outputs: {kinds})",
            "onnxcal needs an output of class scores or probabilities",
        )
    if len(usable) == 1:
        return _read(view, usable[0])
    readings: list[tuple[TensorSpec, ScoreSite | None]] = []
    for s in usable:
        try:
            readings.append((s, _read(view, s)))
        except OnnxcalError:
            readings.append((s, None))
    found = [site for _, site in readings if site is not None and site.activation is not None]
    if len(found) == 1:
        return found[0]
    if found:
        listed = "; ".join(f"'{s.output}' ({s.holds}: {_words_of(s)})" for s in found)
        raise OnnxcalError(
            f"the model has {len(found)} outputs of class probabilities: {listed}",
            "choose one with --output NAME (calibrate another one afterwards with --output)",
        )
    listed = ", ".join(f"'{s.name}' ({s.dtype}, shape {_shape_text(s.shape)})" for s, _ in readings)
    raise OnnxcalError(
        f"the model has {len(readings)} float outputs that could hold raw logits and none comes from "
        f"an activation onnxcal knows: {listed}",
        "choose the class-score output with --output NAME",
    )


def _shape_text(shape: tuple | None) -> str:
    return "?" if shape is None else "[" + ", ".join("?" if d is None else str(d) for d in shape) + "]"


# --------------------------------------------------------------------------
# Reading an output


def find_scores(
    model: onnx.ModelProto,
    output: str | None = None,
    *,
    holds: str | None = None,
    logits_from: str | None = None,
) -> ScoreSite:
    """Locate the class scores behind ``output`` (or the one output that holds them).

    Walks back from the output through layout ops and post-processing
    (tracking the class axis) to the first spelling of an activation it
    recognises (``patterns.SPELLINGS``). Without one, the output holds raw
    logits with the class axis 1 (NCHW-style layouts; common practice).

    Parameters
    ----------
    model : onnx.ModelProto
    output : str, optional
        The output; by default the one output produced by a recognised
        activation (see ``_choose``).
    holds : {"logits", "probabilities", "log-probabilities"}, optional
        What the output holds, as stated by the user or found in the data:
        it must agree with a recognised activation, and it turns a raw
        output into probabilities or log-probabilities (``read_as``).
    logits_from : str, optional
        ``"log"`` reads an ai.onnx.ml classifier through log p even when its
        raw scores are available.

    Raises
    ------
    OnnxcalError
        No such output, several candidates, no float output, a class axis
        that does not fit or is lost, a Softmax below opset 13 that
        normalises over more than the class axis, scores of a type that is
        not float, or ``holds`` contradicting the graph.
    """
    view = View(model, opset_version(model))
    site = _read(view, _named(view, output)) if output is not None else _choose(view)
    if holds is not None:
        site = read_as(site, holds)
    if logits_from == "log" and site.logits_from == "raw-scores":
        site = replace(site, logits_from="log")
    if site.dtype not in _ELEM:  # the tensor the scaling goes to
        raise OnnxcalError(
            f"the class scores '{site.scores}' behind output '{site.output}' have element type "
            f"{site.dtype}, not a floating-point type",
            "choose an output of float class scores with --output, or repair the model",
        )
    return site


def _read(view: View, spec: TensorSpec) -> ScoreSite:
    view.output = spec.name
    tensor, steps = spec.name, []
    while True:
        found = first_match(tensor, view)
        if found is not None:
            return _site(view, spec, tensor, steps, *found)
        nxt = step(tensor, view)
        if nxt is None or (nxt.zipmap and steps):
            return _raw_site(spec, view.shapes)
        steps.append(nxt)
        tensor = nxt.source


def _rank_zero(scores: str, output: str) -> OnnxcalError:
    return OnnxcalError(
        f"the scores '{scores}' behind output '{output}' are a single number (rank 0), with no class axis",
        "choose an output of class scores with --output, or repair the model's shapes",
    )


def _site(view: View, spec: TensorSpec, values: str, steps: list[Step], spelling: Spelling, found: Found) -> ScoreSite:
    shapes = view.shapes
    act = found.nodes.get("act", min(found.matched))
    node = view.node(act)
    if spelling.name == "ml-classifier":
        z, logits_from = node.output[1], ("raw-scores" if ml_transform(node) in RAW_TRANSFORMS else "log")
    elif spelling.name == "qlinear-softmax":  # the pattern ends in the DequantizeLinear after it
        z, logits_from, values = found.tensors["x_q"], "dequantized", node.output[0]
    else:
        z, logits_from = found.tensors["z"], spelling.logits_from
    z_shape = shapes.shape(z)
    rank = len(z_shape) if z_shape is not None else (_rank(shapes.shape(values)) or 2)
    if rank == 0:
        raise _rank_zero(z, spec.name)
    axis = spelling.axis(found, view, rank)
    tensor = spec.name
    if steps and steps[0].zipmap:
        tensor, steps = steps[0].source, steps[1:]
    forward = list(reversed(steps))
    out_axis, out_rank, layout, taken = _follow(view, values, axis, rank, forward, spelling.words)
    size = z_shape[axis] if z_shape is not None and axis < len(z_shape) else None
    if spelling.name == "ml-classifier":
        size = _ml_classes(node, shapes)
    post = spelling.post(found, view) + tuple(s.post for s in forward if s.post is not None)
    rewire = ()
    if logits_from == "tensor":
        rewire = tuple((i, slot) for i in sorted(found.matched) for slot, name in enumerate(view.node(i).input)
                       if name == z)
    dtype = _logits_dtype(view, z, logits_from, values, spec)
    path = [values, *(s.source for s in steps), tensor]
    dtypes = tuple(dict.fromkeys(d for d in [dtype, *(shapes.dtype(t) for t in path)] if d in _ELEM))
    return ScoreSite(
        output=spec.name,
        scores=z,
        activation=spelling.activation,
        node=act,
        class_axis=out_axis,
        rank=out_rank,
        num_classes=size if isinstance(size, int) and size > 0 else None,
        dtype=dtype,
        tensor=tensor,
        layout=layout,
        output_dtype=shapes.dtype(tensor) or (spec.dtype if spec.is_float else dtype),
        scores_axis=axis,
        scores_rank=rank,
        holds="log-probabilities" if spelling.activation == "logsoftmax" else "probabilities",
        spelling=spelling.name,
        logits_from=logits_from,
        post=post,
        nodes=tuple(sorted(found.matched)),
        rewire=rewire,
        values=values,
        dtypes=dtypes,
        ml_transform=ml_transform(node) if spelling.name == "ml-classifier" else "",
        path=tuple(sorted({i for s in steps for i in s.nodes} | found.matched)),
    )


def _logits_dtype(view: View, z: str, logits_from: str, values: str, spec: TensorSpec) -> str:
    if logits_from == "dequantized":  # DequantizeLinear gives the scale's dtype (ONNX operator spec)
        node = view.node(view.producer(values) or 0)
        scale = view.constant(node.input[1]) if node.op_type == "QLinearSoftmax" else None
        return scale.dtype.name if scale is not None else "float32"
    known = view.shapes.dtype(z) or view.shapes.dtype(values)
    return known or (spec.dtype if spec.is_float else "float32")


def _ml_classes(node: onnx.NodeProto, shapes: _Shapes) -> int | None:
    labels = _class_labels(node)
    shape = shapes.shape(node.output[1])
    k = shape[1] if shape is not None and len(shape) == 2 and isinstance(shape[1], int) else None
    return k or (labels.dims[0] if labels is not None else None)


def _follow(
    view: View, values: str, axis: int, rank: int, forward: list[Step], what: str
) -> tuple[int, int, tuple[int, ...], bool]:
    """Follow the class axis from the activation to the output.

    Returns the class axis and rank of the logits laid out like the output
    (up to a class taken by Gather/Slice), the layout nodes to replay on
    them, and whether one class is taken.
    """
    layout: list[int] = []
    taken = False
    kept = (axis, rank)
    for s in forward:
        if s.axis_op is not None:
            node = view.node(s.axis_op)
            if taken:
                continue  # one value per row: a reshape cannot mix classes any more
            new = _axis_forward(node, axis, view.shapes)
            if new is None:
                raise OnnxcalError(
                    f"the {node.op_type} node '{node.name or node.output[0]}' after the {what} "
                    "does not keep the class axis whole (or its shapes are unknown)",
                    "choose an output whose class axis onnxcal can follow (--output)",
                )
            axis, rank = new, _rank(view.shapes.shape(node.output[0])) or rank
            if node.op_type not in ("Identity", "Cast"):
                layout.append(s.axis_op)
            kept = (axis, rank)
        elif isinstance(s.post, (_post.Take, _post.Normalize)) and s.axis is not None and not taken:
            if s.axis % rank != axis:
                raise OnnxcalError(
                    f"a {type(s.post).__name__.lower()} step after the {what} works on axis {s.axis}, "
                    f"not on the class axis {axis}",
                    "choose an output whose values onnxcal can follow (--output)",
                )
            taken = taken or isinstance(s.post, _post.Take)
    return kept[0], kept[1], tuple(layout), taken


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
        values=spec.name,
        dtypes=(spec.dtype,) if spec.dtype in _ELEM else (),
    )


def read_as(site: ScoreSite, holds: str, kind: str | None = None, *, source: str = "stated") -> ScoreSite:
    """``site`` read as holding ``holds`` (what the user states, or what the data show).

    A recognised activation must agree. A raw output read as probabilities
    is calibrated through z = log p (softmax; ``kind`` "sigmoid" or one value
    per row: z = logit p) and as log-probabilities through z = the values;
    the rewrite then replaces the output's values in place (drop-in).
    ``source`` ("stated" or "data") is kept in ``spelling``.

    Raises
    ------
    OnnxcalError
        ``holds`` is not one of ``HOLDS``, or contradicts the graph.
    """
    if holds not in HOLDS:
        raise OnnxcalError(f"--output-holds {holds!r} is not one of: {', '.join(HOLDS)}")
    if site.activation is not None:
        if holds != site.holds:
            raise OnnxcalError(
                f"output '{site.output}' comes from {_words_of(site)}, so it holds {site.holds}, not {holds}",
                "leave out --output-holds, or choose another output with --output",
            )
        return site
    if holds == "logits":
        return site
    single = site.num_classes == 1 or site.rank == 1
    sigmoid = kind == "sigmoid" or (kind is None and single)
    if holds == "log-probabilities":
        activation, logits_from = "logsoftmax", "log-probabilities"
    else:
        activation, logits_from = ("sigmoid", "logit") if sigmoid else ("softmax", "log")
    return replace(site, activation=activation, logits_from=logits_from, holds=holds, spelling=source)


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
            what = "an ai.onnx.ml classifier" if site.spelling == "ml-classifier" else site.activation
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


# --------------------------------------------------------------------------
# In words


def _words_of(site: ScoreSite) -> str:
    spelling = BY_NAME.get(site.spelling)
    return spelling.words if spelling is not None else site.spelling


def _axis_forward(node: onnx.NodeProto, axis: int, shapes: _Shapes) -> int | None:
    """Class axis of a layout node's output given that of its input (None: lost)."""
    if node.op_type in ("Identity", "Cast"):
        return axis
    if node.op_type == "Transpose":
        rank = _rank(shapes.shape(node.input[0]))
        perm = list(_attr(node, "perm", [])) or (list(range(rank))[::-1] if rank else [])
        return perm.index(axis) if axis in perm else None
    assert node.op_type in RESHAPES
    return _axis_through_reshape(axis, shapes.shape(node.input[0]), shapes.shape(node.output[0]))


def _class_labels(node: onnx.NodeProto) -> onnx.TensorProto | None:
    # LinearClassifier and SVMClassifier call it classlabels_ints (ONNX-ML operator spec).
    ints = _attr(node, "classlabels_int64s", None) or _attr(node, "classlabels_ints", None)
    if ints:
        return numpy_helper.from_array(np.array(ints, dtype=np.int64))
    strings = _attr(node, "classlabels_strings", None)
    if strings:
        return helper.make_tensor("", onnx.TensorProto.STRING, [len(strings)], list(strings))
    return None
