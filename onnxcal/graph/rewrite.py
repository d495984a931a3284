"""Rewriting the graph: the rewrites, patch, unpatch (``expose`` holds the copies made for running).

Three rewrites, chosen from the ``ScoreSite``:

* ``_insert_before``: the logits are a tensor the activation pattern reads;
  every place it reads them reads ``scale(z)`` instead (drop-in; a softmax
  written out with its max subtracted reads z twice).
* ``_replace_values``: the logits are computed from other values
  (probabilities, a classifier's raw scores, a dequantized input); the
  values the activation produced are renamed and replaced, under their
  name, by ``activation(scale(logits))`` (drop-in).
* ``_append_activation``: raw logits; ``activation(scale(z))`` is added as a
  new output.

A Sigmoid whose values are L1-normalised after is calibrated as
L1(sigmoid(scale(z))): ``_replace_normalised_sigmoid`` replaces its values
by that, computed without underflow (drop-in; the normalisation stays).

Several outputs of one model may be calibrated (one record each); a head
whose values pass through what another head's patch added is refused.
"""

from __future__ import annotations

import os
from pathlib import Path, PurePosixPath, PureWindowsPath
from typing import Any

import numpy as np
import onnx
from onnx import helper

from ..errors import OnnxcalError
from ..scaling import SIGMOID_L1, Scaling, check_scaling
from .expose import _subgraph
from .external import check_model
from .find import ScoreSite, find_scores, fit_kind, read_as
from .fold import _fold, _roundings, _unfold
from .fold_matrix import MIXING, fold_matrix, fold_refusal, folds_matrix, unfold_matrix
from .post import normalises, to_json
from .record import Record, _damaged, _write_records, check_record, read_records
from .surgery import (
    ScaleFn,
    _cast_back,
    _no_scaling,
    _scaled,
    _softmax_on_axis,
    _Surgery,
    add_default_opset,
    build_logits,
    check_map_site,
    scale_fn,
)
from .tensors import (
    _ELEM,
    COMPUTE_DTYPES,
    DEFAULT_OUTPUT_NAME,
    ML_DOMAIN,
    subgraphs,
)

_SINGLE = ("softmax", "log-softmax", "sigmoid")
_OPS = {"softmax": "Softmax", "logsoftmax": "LogSoftmax", "sigmoid": "Sigmoid"}


def _insert_before(s: _Surgery, site: ScoreSite, scale: ScaleFn, compute: str | None) -> None:
    """Make the activation pattern read ``scale(z)`` wherever it read z; the output keeps its name.

    With a compute dtype, a single activation op runs in it and its result
    is cast back; a written-out activation gets the scaled logits cast back.
    """
    if site.branches:  # the activation sits in subgraphs: insert in every one of them
        for branch in site.branches:
            sub = s.sub(_subgraph(s.graph, branch))
            _insert_before(sub, branch.site, scale, compute)
        return
    single = compute is not None and site.spelling in _SINGLE
    scaled = _scaled(s, site.scores, site.dtype, scale, compute)
    if compute is not None and not single:
        scaled = _cast_back(s, scaled, site.dtype, compute, s.name(f"{site.scores}_calibrated_{site.dtype}"))
    for index, slot in site.rewire:
        s.rename_input(s.graph.node[index], slot, scaled)
    first = min(index for index, _ in site.rewire)
    inserted = len(s.nodes)
    s.flush(first)
    if single:  # the activation now runs in `compute`; cast its result back
        assert site.node is not None  # a single activation op: its index
        at = site.node + inserted
        act = s.graph.node[at]
        wanted = act.output[0]
        inner = s.rename_output(act, 0, f"{wanted}_{compute}")
        _cast_back(s, inner, site.dtype, compute, wanted)
        s.flush(at + 1)


def _replace_values(s: _Surgery, site: ScoreSite, scale: ScaleFn, compute: str | None, opset: int) -> None:
    """Replace the activation's values by ``activation(scale(logits))`` under their name.

    The producer's output is renamed (and left unread, unless the logits are
    computed from it: log p, logit p, log-probabilities); the new values keep
    the name, so everything after (post-processing, ZipMap, other outputs)
    reads them. An ai.onnx.ml classifier's label output is left as it is:
    temperature scaling cannot change the argmax, and the label is the
    classifier's own decision.
    """
    graph = s.graph
    index = next(i for i, n in enumerate(graph.node) if site.values in n.output)
    producer = graph.node[index]
    wanted = site.values
    renamed = s.rename_output(producer, list(producer.output).index(wanted), f"{wanted}_uncalibrated")
    if producer.domain == ML_DOMAIN:  # onnx infers no type for some ai.onnx.ml ops (TreeEnsembleClassifier-1)
        s.value_info(helper.make_tensor_value_info(renamed, _ELEM[site.dtype], [None, site.num_classes]))
    reads_values = site.logits_from in ("log", "logit", "log-probabilities")
    z = build_logits(s, site, renamed if reads_values else site.scores)
    scaled = _scaled(s, z, site.dtype, scale, compute)
    quantized = site.spelling == "qlinear-softmax"
    inner = s.name(f"{wanted}_{compute or 'float'}") if (compute or quantized) else wanted
    if site.activation == "sigmoid":
        s.node("Sigmoid", [scaled], inner, output=inner)
    elif site.activation == "logsoftmax":
        _log_softmax_on_axis(s, scaled, site, opset, inner)
    else:
        _softmax_on_axis(s, scaled, site.scores_axis, site.scores_rank, opset, inner)
    if quantized:
        qlinear = graph.node[site.node]
        y = [qlinear.input[3]] + ([qlinear.input[4]] if len(qlinear.input) > 4 and qlinear.input[4] else [])
        if compute:
            inner = _cast_back(s, inner, site.dtype, compute, s.name(f"{wanted}_float"))
        s.node("QuantizeLinear", [inner, *y], wanted, output=wanted)
    else:
        _cast_back(s, inner, site.dtype, compute, wanted)
    s.flush(index + 1)


def _replace_normalised_sigmoid(s: _Surgery, site: ScoreSite, scale: ScaleFn, compute: str | None, opset: int) -> None:
    """A Sigmoid whose values are L1-normalised after: its values become L1(sigmoid(scale(z))).

    Computed as Softmax(-Softplus(-scale(z))) over the class axis (log
    sigmoid(x) = -softplus(-x); every sigmoid is positive, so softmax of
    their logarithms is their L1 normalisation), under the Sigmoid's output
    name: the model's own normalisation after it then divides by 1. A
    Sigmoid of z / T would do in exact arithmetic, but onnxruntime's float32
    Sigmoid gives 0 below about -17 (measured), so a small T would turn
    whole rows into 0 / 0. The Sigmoid node stays, its output renamed and unread.
    """
    index = site.node
    assert index is not None  # the Sigmoid's index
    act = s.graph.node[index]
    wanted = act.output[0]
    s.rename_output(act, 0, f"{wanted}_uncalibrated")
    scaled = _scaled(s, site.scores, site.dtype, scale, compute)
    minus = s.node("Neg", [scaled], f"{wanted}_neg")
    log_sigmoid = s.node("Neg", [s.node("Softplus", [minus], f"{wanted}_softplus")], f"{wanted}_log_sigmoid")
    inner = s.name(f"{wanted}_{compute}") if compute else wanted
    _softmax_on_axis(s, log_sigmoid, site.scores_axis, site.scores_rank, opset, inner)
    _cast_back(s, inner, site.dtype, compute, wanted)
    s.flush(index + 1)


def _log_softmax_on_axis(s: _Surgery, x: str, site: ScoreSite, opset: int, output: str) -> str:
    axis, rank = site.scores_axis, site.scores_rank
    if opset < 13 and axis != rank - 1:
        raise OnnxcalError(
            f"output '{site.output}' holds log-probabilities over axis {axis} of {rank}, and LogSoftmax "
            f"below opset 13 normalises over every axis from it on (opset {opset})",
            "re-export the model at opset 13 or later",
        )
    return s.node("LogSoftmax", [x], output, output=output, axis=axis)


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


# --------------------------------------------------------------------------
# Undoing a patch


def unpatch(model: onnx.ModelProto, output: str | None = None) -> onnx.ModelProto:
    """A copy of a patched ``model`` with onnxcal's patch of ``output`` (default: of every
    output) undone.

    Exact for every rewrite that adds nodes. A folded model gets its weight
    divided by w again, restored up to one rounding of its dtype, and its
    bias back exactly (dims and values, from the record). Heads are undone
    last patched first, so undoing them all gives the original back.

    Raises
    ------
    OnnxcalError
        A record is from an older onnxcal that did not note its changes, or
        does not describe the graph.
    """
    records = read_records(model)
    out = onnx.ModelProto()
    out.CopyFrom(model)
    targets = [r for r in records if output is None or output in (r.output, r.source_output)]
    for record in reversed(targets):
        if not record.changes:
            raise OnnxcalError(
                "the model's calibration record does not say what the patch changed "
                f"(record format {record.format})",
                "patch the original, uncalibrated model instead",
            )
        check_record(out, record)
        try:
            _undo(out, record)
        except (KeyError, TypeError, ValueError, IndexError, AttributeError, StopIteration) as exc:
            raise _damaged(exc) from exc  # the record comes from the file: its changes may not fit
    _write_records(out, [r for r in records if r not in targets])
    return out


def _undo(model: onnx.ModelProto, record: Record) -> None:
    """Undo in place the changes ``record`` lists."""
    g = model.graph
    ch = record.changes
    _undo_nodes(g, set(ch["nodes"]), ch["renamed"])
    inits = [i for i in g.initializer if i.name not in set(ch["initializers"])]
    del g.initializer[:]
    g.initializer.extend(inits)
    infos = [vi for vi in g.value_info if vi.name not in set(ch.get("value_info", []))]
    del g.value_info[:]
    g.value_info.extend(infos)
    if ch.get("inputs"):  # initializers listed as inputs (IR version 3)
        kept_inputs = [vi for vi in g.input if vi.name not in set(ch["inputs"])]
        del g.input[:]
        g.input.extend(kept_inputs)
    outputs = list(g.output)
    restored = None
    if ch.get("dropped"):
        index, name = ch["dropped"]
        restored = onnx.ValueInfoProto()
        restored.CopyFrom(next(vi for vi in outputs if vi.name in ch["outputs"]))
        restored.name = name
    outputs = [vi for vi in outputs if vi.name not in set(ch["outputs"])]
    if restored is not None:
        outputs.insert(min(index, len(outputs)), restored)
    del g.output[:]
    g.output.extend(outputs)
    if "opset_import" in ch:
        kept = [i for i in model.opset_import if i.domain not in ("", "ai.onnx")]
        del model.opset_import[:]
        model.opset_import.extend(kept)
    if record.folded:
        (unfold_matrix if folds_matrix(record) else _unfold)(g, record)


def _undo_nodes(g: onnx.GraphProto, added: set[str], renamed: dict[str, str]) -> None:
    """Remove the nodes a patch added and undo its renames, in ``g`` and in every subgraph
    (a head inside If branches or a Loop/Scan body is patched there)."""
    keep = [n for n in g.node if n.name not in added]
    for node in keep:
        for i, name in enumerate(node.input):
            node.input[i] = renamed.get(name, name)
        for i, name in enumerate(node.output):
            node.output[i] = renamed.get(name, name)
        for _, sub in subgraphs(node):
            _undo_nodes(sub, added, renamed)
    del g.node[:]
    g.node.extend(keep)


def _head(records: tuple[Record, ...], output: str | None) -> Record | None:
    """The record of the head to (re-)patch: that of ``output``, or the only one."""
    if output is not None:
        return next((r for r in records if output in (r.output, r.source_output)), None)
    if len(records) > 1:
        heads = ", ".join(f"'{r.source_output}'" for r in records)
        raise OnnxcalError(
            f"the model has calibrated outputs {heads}; which one to patch is not said",
            "choose it with --output NAME",
        )
    return records[0] if records else None


def _check_heads(model: onnx.ModelProto, site: ScoreSite, others: list[Record]) -> None:
    """Refuse a head whose values pass through what another head's patch added or rewired.

    Calibrating it would scale the same logits twice (two outputs of one
    Softmax, one a post-processed copy of the other), or undoing one head
    would silently undo part of the other.
    """
    graph = model.graph
    nodes = [graph.node[i] for i in site.path]
    tensors = {t for n in nodes for t in n.input} | {site.scores}
    for r in others:
        added = set(r.changes.get("nodes", []))
        touched = set(r.changes.get("renamed", {})) | set(r.changes.get("outputs", []))
        if any(n.name in added for n in nodes) or tensors & touched or site.scores == r.scores:
            raise OnnxcalError(
                f"output '{site.output}' shares its {site.spelling if site.activation else 'logits'} with output "
                f"'{r.source_output}', which is already calibrated: calibrating both would scale the same "
                "logits twice, and undoing one would undo part of the other",
                f"calibrate only one of them (re-patch '{r.source_output}' to change it)",
            )


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
    (softmax: multiclass; sigmoid: binary for one logit, else multi-label;
    a sigmoid then L1 normalisation: sigmoid-l1).
    """
    if isinstance(calibration, Scaling):
        scaling = check_scaling(calibration, site.num_classes)
        # For raw logits the fitted scaling says what to append, unless --activation does.
        requested = activation if (activation or site.activation) else scaling.activation
        if requested == SIGMOID_L1:  # a fit of normalised sigmoids, on raw logits: no such activation to append
            requested = None
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
    if kind == SIGMOID_L1:
        return Scaling.of_temperature(t, SIGMOID_L1)
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
    if fold and (why := fold_refusal(scaling)):
        raise OnnxcalError(
            f"--fold: {why}, so it cannot be folded into a linear layer",
            "leave out --fold (the map is added as nodes in front of the activation)",
        )
    if fold and (site.branches or site.columns):
        where = "inside subgraphs" if site.branches else "in one part of a Concat"
        raise OnnxcalError(f"--fold: the logits of output '{site.output}' are {where}; folding works on one "
                           "linear layer of the main graph", "leave out --fold")
    if fold and site.from_probabilities:
        what = ("an ai.onnx.ml classifier, which has no logits layer" if site.spelling == "ml-classifier"
                else f"logits computed from other values ({site.logits_from}), with no layer")
        raise OnnxcalError(f"--fold: output '{site.output}' comes from {what} to fold the scaling into",
                           "leave out --fold")
    if compute_dtype == site.dtype:
        return None
    return compute_dtype


def _file_name(source: str | os.PathLike[str]) -> str:
    """The file name of a path, POSIX or Windows style (the record holds no directory)."""
    text = os.fspath(source)
    return (PureWindowsPath(text) if "\\" in text else PurePosixPath(text)).name or Path(text).name


def patch(
    model: onnx.ModelProto,
    calibration: float | Scaling,
    *,
    source_sha256: str,
    source_name: str | os.PathLike[str],
    output: str | None = None,
    new_output: str = DEFAULT_OUTPUT_NAME,
    drop_logits: bool = False,
    fit: dict[str, Any] | None = None,
    activation: str | None = None,
    compute_dtype: str | None = None,
    fold: bool = False,
    holds: str | None = None,
    holds_from: str = "stated",
    logits_from: str | None = None,
    fitted_on_sha256: str = "",
    site: ScoreSite | None = None,
    score_columns: str | None = None,
) -> onnx.ModelProto:
    """Return a copy of ``model`` whose output carries calibrated probabilities.

    Parameters
    ----------
    model : onnx.ModelProto
        Not modified. If it carries an onnxcal record for the same output,
        that patch is undone first (see :func:`unpatch`), so patches never
        stack; the records of other outputs are kept.
    calibration : float or Scaling
        A temperature T > 0, or a fitted scaling (temperature, vector, Platt,
        per-label temperatures).
    source_sha256, source_name : str
        Identify the uncalibrated model in the record: its SHA-256 and its
        file name (a path is reduced to its name). Kept from the existing
        records when the model is already patched.
    output : str, optional
        The class-score output; by default the one output that holds class
        scores (see :func:`find_scores`), or the already calibrated one.
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
        Run the scaling and the activation in this dtype (Casts around them);
        the output keeps its dtype.
    fold : bool
        Fold the scaling (any of them: each is w * z + b per class) into the
        weight and bias of the Gemm / MatMul(+Add) producing the logits
        instead of inserting nodes (see ``_fold``).
    holds, holds_from : str, optional
        What the output holds, stated (``"stated"``) or found in the data
        (``"data"``): see :func:`find_scores` and ``read_as``.
    logits_from : {"log"}, optional
        Read an ai.onnx.ml classifier through log p rather than its raw scores.
    fitted_on_sha256 : str
        SHA-256 of the twin model the parameters were fitted on, if not the source.
    site : ScoreSite, optional
        A reading of ``model`` made elsewhere (``find_scores`` and ``read_as``
        on this very model), used as it is. Tests force a wrong reading this
        way to see verify catch it. Not for a model that already calibrates
        that output.
    score_columns : str, optional
        ``"START:STOP"``: calibrate only these positions of an output that
        concatenates class scores with other values (see ``find_scores``).

    Returns
    -------
    onnx.ModelProto
        Checked with ``onnx.checker.check_model(full_check=True)``.
    """
    records = read_records(model)
    if site is not None:
        output = site.output
        if _head(records, output) is not None:
            raise OnnxcalError(f"output '{output}' is already calibrated: a reading of it must be made on the original")
    previous = _head(records, output)
    out = unpatch(model, previous.output) if previous is not None else _copy(model)
    others = [r for r in records if r is not previous]
    if records:
        source_sha256, source_name = records[0].source_sha256, records[0].source_name
    if previous is not None:
        output = output if output not in (None, previous.output) else (previous.source_output or None)
    kind = activation or (calibration.activation if isinstance(calibration, Scaling) else None)
    if site is None:
        site = find_scores(out, output, logits_from=logits_from, score_columns=score_columns)
        if holds is not None:
            site = read_as(site, holds, kind, source=holds_from)
    _check_heads(out, site, others)
    scaling = _site_scaling(calibration, site, activation)
    compute = _check_options(site, compute_dtype, fold, scaling)
    s = _Surgery(out.graph, out.ir_version)
    opset = add_default_opset(s, out)
    if not fold:  # a fold adds no map nodes (the map is in the layer's weights)
        check_map_site(scaling, site, opset)
    if rounded := _roundings(previous):
        s.changes["rounded"] = rounded
    if fold:
        (fold_matrix if scaling.method in MIXING else _fold)(s, out, site, scaling, drop_logits)
    scale: ScaleFn = _no_scaling if fold else scale_fn(scaling, site)
    rewrite, calibrated = _rewrite(s, site, scale, compute, scaling, new_output, drop_logits, opset, fold)
    record = Record(
        temperature=scaling.temperature,
        output=calibrated,
        scores=site.scores,
        rewrite=rewrite,
        activation=site.activation or scaling.activation,
        temperature_initializer=s.parameters.get("temperature", ""),
        source_sha256=source_sha256,
        source_name=_file_name(source_name),
        fit=fit or {},
        method=scaling.method,
        parameters=dict(scaling.parameters),
        initializers=dict(s.parameters),
        kind=scaling.kind,
        folded=fold,
        compute_dtype=compute,
        source_output=site.output,
        changes=s.changes,
        holds=site.holds,
        spelling=site.spelling,
        logits_from=site.logits_from,
        post=to_json(site.post),
        fitted_on_sha256=fitted_on_sha256 if fitted_on_sha256 != source_sha256 else "",
        score_columns=_columns_text(site),
    )
    _write_records(out, [*others, record])
    try:
        check_model(out)
    except Exception as exc:  # a bug on our side, or a model onnx cannot infer
        raise OnnxcalError(
            f"the patched model fails the ONNX checker: {str(exc).splitlines()[0]}",
            "report this with the model's inspect output",
        ) from exc
    return out


def _columns_text(site: ScoreSite) -> str:
    """``"START:STOP"`` of a site that is one part of a Concat, else ""."""
    return "" if site.columns is None else f"{site.columns[1]}:{site.columns[2]}"


def find_recorded(model: onnx.ModelProto, record: Record) -> ScoreSite:
    """The site of the output ``record`` calibrated in the patched ``model``, read as the patch read it."""
    return find_scores(model, record.output, score_columns=record.score_columns or None)


def _copy(model: onnx.ModelProto) -> onnx.ModelProto:
    out = onnx.ModelProto()
    out.CopyFrom(model)
    return out


def _rewrite(
    s: _Surgery, site: ScoreSite, scale: ScaleFn, compute: str | None, scaling: Scaling,
    new_output: str, drop_logits: bool, opset: int, fold: bool,
) -> tuple[str, str]:
    """Apply the rewrite the site calls for; its name and the calibrated output."""
    if site.activation == "sigmoid" and normalises(site.post) and site.rewire == ((site.node, 0),):
        _replace_normalised_sigmoid(s, site, scale, compute, opset)  # scale: none when folded
        return "replace-values", site.output
    if site.inserts:
        if not fold:
            _insert_before(s, site, scale, compute)
        return "insert-before-activation", site.output
    if site.activation is not None:
        _replace_values(s, site, scale, compute, opset)
        return "replace-values", site.output
    if new_output in s.taken:
        raise OnnxcalError(
            f"the model already has a tensor named '{new_output}'",
            "choose another name with --output-name",
        )
    s.taken.add(new_output)
    kind = scaling.activation
    _append_activation(s, site, scale, compute, kind, new_output, drop_logits, opset)
    return f"append-{kind}", new_output
