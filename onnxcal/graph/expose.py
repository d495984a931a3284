"""Copies of a model for running, never saved: the logits exposed for capture, the
parameters set to the identity for verify.

``expose_scores`` adds the nodes that compute the logits of a ``ScoreSite``
(the same ``surgery.build_logits`` the patch uses) and makes them an
output, laid out like the output the site reads; for a head inside
subgraphs every branch gets one more output and so does the If/Loop/Scan
node. ``at_identity`` gives the patched graph with T = 1 (w = 1, b = 0),
which must reproduce the original's outputs.
"""

from __future__ import annotations

from typing import cast

import numpy as np
import onnx
from onnx import helper, numpy_helper

from .external import tensor_array
from .fold import _constants
from .mapped import map_identity
from .record import Record
from .site import Branch, ScoreSite
from .surgery import _Surgery, add_default_opset, build_logits
from .tensors import _ELEM, _attr


def _copy(model: onnx.ModelProto) -> onnx.ModelProto:
    out = onnx.ModelProto()
    out.CopyFrom(model)
    return out


def _subgraph(graph: onnx.GraphProto, branch: Branch) -> onnx.GraphProto:
    """The subgraph a ``Branch`` reads (an attribute of one of ``graph``'s nodes)."""
    node = graph.node[branch.node]
    return cast(onnx.GraphProto, next(a.g for a in node.attribute if a.name == branch.attribute))


def expose(model: onnx.ModelProto, tensors: list[str], *, copy: bool = True) -> onnx.ModelProto:
    """A copy of ``model`` with ``tensors`` added as graph outputs (for capture).

    Types come from shape inference; the copy is for running, never saved.
    With ``copy=False`` the model itself is returned when every tensor is
    an output already, and changed in place otherwise (a copy the caller
    made): a model of hundreds of MB is not copied for nothing.
    """
    existing = {vi.name for vi in model.graph.output}
    missing = [t for t in tensors if t not in existing]
    out = _copy(model) if copy else model
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


def expose_scores(
    model: onnx.ModelProto, site: ScoreSite, also: tuple[str, ...] = ()
) -> tuple[onnx.ModelProto, str]:
    """A copy of ``model`` that outputs the logits of ``site``, laid out like ``site.tensor``.

    The logits are built as the patch builds them (``build_logits``: log p,
    a classifier's raw scores, ...). When layout ops (Transpose, Reshape,
    ...) sit between the activation and the output, they are replayed on
    the logits, so captured rows line up with the output (and with
    per-pixel labels shaped like it). ``also`` names further tensors to
    output (e.g. the output's values, to check the reading against).
    """
    out = _copy(model)
    s = _Surgery(out.graph, out.ir_version)
    add_default_opset(s, out)
    tensor = _laid_out_logits(s, site)
    return expose(out, [tensor, *also], copy=False), tensor  # ``out`` is this function's copy


def _laid_out_logits(s: _Surgery, site: ScoreSite) -> str:
    """Add to ``s.graph`` the nodes giving the logits of ``site`` laid out like its output; their name."""
    tensor = _branch_logits(s, site) if site.branches else build_logits(s, site, site.scores)
    for i in site.layout:
        node = onnx.NodeProto()
        node.CopyFrom(s.graph.node[i])
        node.name = s.name(f"onnxcal_{node.op_type.lower()}")
        node.input[0] = tensor
        tensor = s.name(f"{site.scores}_{node.op_type.lower()}")
        node.output[0] = tensor
        s.nodes.append(node)
    s.flush(len(s.graph.node))
    return tensor


def _branch_logits(s: _Surgery, site: ScoreSite) -> str:
    """The logits of a head inside subgraphs, as a new output of the If/Loop/Scan node.

    Every branch (the body) gets one more output, its logits laid out like
    the output the values leave by; the node gets one more output, which is
    then the logits of the branch that ran (If) or the logits of every
    iteration stacked like the values (a Loop's or Scan's scan output).
    """
    node = s.graph.node[site.node]
    for branch in site.branches:
        g = _subgraph(s.graph, branch)
        inner = _laid_out_logits(s.sub(g), branch.site)
        g.output.append(helper.make_tensor_value_info(inner, _ELEM[branch.site.dtype], None))
    if node.op_type == "Scan":  # one more scan output, stacked like the one the values leave by
        j = site.branches[0].slot - (len(node.input) - int(_attr(node, "num_scan_inputs", 0)))
        for a in node.attribute:
            if a.name in ("scan_output_axes", "scan_output_directions"):
                a.ints.append(a.ints[j] if j < len(a.ints) else 0)
    name = s.name(f"{site.scores}_exposed")
    node.output.append(name)
    return name


def at_identity(
    model: onnx.ModelProto, records: tuple[Record, ...], original: onnx.ModelProto | None = None
) -> onnx.ModelProto | None:
    """A copy of a patched ``model`` whose calibration parameters are the identity.

    T = 1 and w = 1, b = 0: the rewritten graph must then give the original
    model's outputs (``verify``'s identity check). A folded head gets the
    original's weights back from ``original``; None when it is needed and
    not given.
    """
    out = _copy(model)
    inits = {i.name: i for i in out.graph.initializer}
    for record in records:
        if record.folded:
            if original is None:
                return None
            source, target = _constants(original.graph), _constants(out.graph)
            for name in record.changes.get("scaled", []):
                if name in source and name in target:
                    target[name].CopyFrom(source[name])
            continue
        if not record.scaling.is_affine:
            if not map_identity(out, record):
                return None
            continue
        for role, name in (record.initializers or {"temperature": record.temperature_initializer}).items():
            init = inits.get(name)
            if init is None:
                continue
            arr = tensor_array(init)
            value = np.zeros_like(arr) if role == "b" else np.ones_like(arr)
            init.CopyFrom(numpy_helper.from_array(value, name))
    return out
