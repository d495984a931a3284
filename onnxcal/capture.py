"""Run a model with onnxruntime over a validation set and collect its class scores.

When the model already ends in a Softmax, LogSoftmax or Sigmoid, the tensor
captured is that activation's input (the logits), exposed as an extra output
of an in-memory copy; the model file is never changed.

A capture file is an ``.npz`` with ``logits`` (float32, n x k), ``labels``
(int64, n; or uint8, n x k 0/1 for a multi-label model) and ``meta`` (a JSON string, see :class:`CaptureMeta`).
"""

from __future__ import annotations

import json
import os
import zipfile
from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
import onnx

from . import __version__
from ._files import atomic_path, require_file
from .data import Dataset, check_labels, check_multilabel, match_inputs
from .errors import OnnxcalError
from .graph import ScoreSite, expose_scores, find_scores, fit_kind, tensor_spec

ProgressFn = Callable[[str, int, int], None]
"""Called as ``progress(description, samples_done, samples_total)`` after each batch."""

DEFAULT_BATCH = 64


@dataclass(frozen=True)
class CaptureMeta:
    """Where a capture came from.

    Attributes
    ----------
    model_sha256, model_path : str
        The model file that was run.
    output : str
        The graph output chosen as class scores.
    scores : str
        The tensor captured (the logits behind ``output``).
    activation : str or None
        What the model applies to ``scores`` (None for raw logits;
        ``"softmax"`` for an ai.onnx.ml classifier's probabilities, whose
        logarithm is captured).
    class_axis : int
        Class axis of ``output`` in the model.
    num_classes : int
        K.
    n : int
        Number of captured rows.
    data_source : str
        The validation file.
    fit_as : str
        ``"softmax"`` (labels are class indices, one per row) or
        ``"sigmoid"`` (labels are 0/1, one per logit: binary or multi-label).
    onnxcal_version : str
    """

    model_sha256: str
    model_path: str
    output: str
    scores: str
    activation: str | None
    class_axis: int
    num_classes: int
    n: int
    data_source: str
    fit_as: str = "softmax"
    onnxcal_version: str = __version__

    def to_dict(self) -> dict:
        return asdict(self)


@dataclass(frozen=True)
class Capture:
    """Captured logits, labels and where they came from."""

    logits: np.ndarray
    labels: np.ndarray
    meta: CaptureMeta


def make_session(model: onnx.ModelProto):
    """An onnxruntime session on CPU for an in-memory model."""
    import onnxruntime as ort

    opts = ort.SessionOptions()
    opts.log_severity_level = 3
    try:
        return ort.InferenceSession(
            model.SerializeToString(), sess_options=opts, providers=["CPUExecutionProvider"]
        )
    except Exception as exc:  # onnxruntime raises its own exception types
        raise OnnxcalError(
            f"onnxruntime cannot load the model: {str(exc).splitlines()[0]}",
            "check that the model runs in onnxruntime on CPU",
        ) from exc


def _fixed_batch(model: onnx.ModelProto) -> int | None:
    init = {i.name for i in model.graph.initializer}
    for vi in model.graph.input:
        if vi.name in init:
            continue
        shape = tensor_spec(vi).shape
        if shape and isinstance(shape[0], int) and shape[0] > 0:
            return shape[0]
    return None


def run_model(
    model: onnx.ModelProto,
    dataset: Dataset,
    names: Sequence[str],
    *,
    batch_size: int = DEFAULT_BATCH,
    progress: ProgressFn | None = None,
    description: str = "running model",
) -> list[np.ndarray]:
    """Run ``model`` over ``dataset`` in batches; return the tensors ``names``.

    Each returned array has the samples along axis 0. Inputs are cast to the
    model's dtypes batch by batch, so memory-mapped inputs are read lazily.
    """
    session = make_session(model)
    specs = {i.name: i.type for i in session.get_inputs()}
    fixed = _fixed_batch(model)
    step = fixed or batch_size
    n = dataset.n
    parts: list[list[np.ndarray]] = [[] for _ in names]
    dtypes = {vi.name: tensor_spec(vi).dtype for vi in model.graph.input}
    for start in range(0, n, step):
        stop = min(start + step, n)
        feed = {}
        for name in specs:
            batch = np.asarray(dataset.inputs[name][start:stop], dtype=dtypes[name])
            if fixed and stop - start < fixed:  # pad the last batch of a fixed-batch model
                pad = np.repeat(batch[-1:], fixed - (stop - start), axis=0)
                batch = np.concatenate([batch, pad])
            feed[name] = batch
        try:
            outs = session.run(list(names), feed)
        except Exception as exc:
            raise OnnxcalError(
                f"onnxruntime failed on samples {start}..{stop - 1} of '{dataset.source}': "
                f"{str(exc).splitlines()[0]}",
                "check that the data matches the model's inputs",
            ) from exc
        for part, out in zip(parts, outs):
            part.append(np.asarray(out)[: stop - start])
        if progress is not None:
            progress(description, stop, n)
    return [np.concatenate(p) for p in parts]


def as_rows(scores: np.ndarray, class_axis: int) -> np.ndarray:
    """Move the class axis last and flatten the rest: (rows, k)."""
    if scores.ndim == 1:
        return scores.reshape(-1, 1)
    moved = np.moveaxis(scores, class_axis, -1)
    return moved.reshape(-1, moved.shape[-1])


def capture_scores(
    model: onnx.ModelProto,
    dataset: Dataset,
    site: ScoreSite,
    *,
    batch_size: int = DEFAULT_BATCH,
    progress: ProgressFn | None = None,
) -> np.ndarray:
    """The logits behind ``site`` for every sample, float32, shape (rows, k).

    Checks the set against the model's inputs first. The class axis is moved
    last and any other axes (e.g. pixels) are flattened into rows.
    """
    init = {i.name for i in model.graph.initializer}
    match_inputs(dataset, [tensor_spec(vi) for vi in model.graph.input if vi.name not in init])
    exposed, name = expose_scores(model, site)
    (scores,) = run_model(
        exposed,
        dataset,
        [name],
        batch_size=batch_size,
        progress=progress,
        description="capturing logits",
    )
    rows = as_rows(scores, site.class_axis)
    if site.from_probabilities:
        rows = log_probabilities(rows)
    return rows.astype(np.float32, copy=False)


def log_probabilities(p: np.ndarray) -> np.ndarray:
    """log(max(p, tiny)): logits for probabilities, as the patched graph computes them.

    softmax(log p) = p, and softmax(log p / T) = softmax(z / T) for logits z
    with p = softmax(z), since softmax ignores a constant added to every
    class (common practice). ``tiny`` is the dtype's smallest normal number.
    """
    return np.log(np.maximum(p, np.finfo(p.dtype).tiny))


def capture(
    model: onnx.ModelProto,
    dataset: Dataset,
    *,
    model_path: str | os.PathLike,
    model_sha256: str,
    output: str | None = None,
    batch_size: int = DEFAULT_BATCH,
    progress: ProgressFn | None = None,
    activation: str | None = None,
) -> Capture:
    """Run the model over a labelled set and return its logits.

    Parameters
    ----------
    model : onnx.ModelProto
        The model, as loaded by :func:`onnxcal.graph.load_model`.
    dataset : Dataset
        Must carry labels.
    model_path, model_sha256 : str
        Recorded in the capture's metadata.
    output : str, optional
        The class-score output (the likeliest float output by default).
    batch_size : int
        Samples per onnxruntime call (ignored for a fixed batch dim).
    progress : callable, optional
        See :data:`ProgressFn`.
    activation : {"softmax", "sigmoid"}, optional
        How raw logits become probabilities (see ``graph.fit_kind``); decides
        the labels' form.

    Returns
    -------
    Capture
    """
    if dataset.labels is None:
        raise OnnxcalError(f"'{dataset.source}' has no labels", "add a 'labels' array")
    site = find_scores(model, output)
    kind = fit_kind(site, activation)
    if site.num_classes is not None and kind == "softmax" and dataset.labels.ndim == 1:
        check_labels(dataset.labels, dataset.n, site.num_classes, dataset.source)  # before the run
    logits = capture_scores(model, dataset, site, batch_size=batch_size, progress=progress)
    k = logits.shape[1]
    labels = label_rows(dataset.labels, logits.shape, kind, dataset.source)
    meta = CaptureMeta(
        model_sha256=model_sha256,
        model_path=str(model_path),
        output=site.output,
        scores=site.scores,
        activation=site.activation,
        class_axis=site.class_axis,
        num_classes=k,
        n=int(logits.shape[0]),
        data_source=dataset.source,
        fit_as=kind,
    )
    return Capture(logits=logits, labels=labels, meta=meta)


def label_rows(labels: np.ndarray, shape: tuple[int, int], kind: str, source: str) -> np.ndarray:
    """Labels lined up with captured rows of ``shape`` (rows, k), as int64.

    ``kind == "softmax"``: class indices, one per row; per-pixel labels
    (e.g. n x H x W for an n x K x H x W output) are flattened in the rows'
    order. ``kind == "sigmoid"``: 0/1 for every logit: (rows,) int64 for one
    logit (binary), (rows, k) uint8 for k labels (multi-label).

    Raises
    ------
    OnnxcalError
        The labels do not fit the rows or are not of the right kind.
    """
    labels = np.asarray(labels)
    rows, k = shape
    if kind == "softmax":
        if labels.ndim > 1 and labels.size == rows:
            labels = labels.reshape(-1)
        elif labels.ndim > 1:
            raise OnnxcalError(
                f"labels in '{source}' have shape {labels.shape}, which does not give one "
                f"class index per score row ({rows} rows)",
                "give per-sample labels, or per-pixel labels shaped like the output without its class axis",
            )
        return check_labels(labels, rows, k, source)
    if labels.size != rows * k:
        raise OnnxcalError(
            f"labels in '{source}' have shape {labels.shape}, but a sigmoid output with "
            f"{k} logit(s) per row needs one 0/1 label per logit ({rows} x {k})",
            "give 0/1 labels shaped like the output",
        )
    if k == 1:  # binary: one 0/1 class index per row
        return check_labels(labels.reshape(-1), rows, 2, source)
    return check_multilabel(labels.reshape(rows, k), rows, k, source)


def nonfinite_rows(logits: np.ndarray) -> np.ndarray:
    """Indices of rows holding NaN or Inf."""
    return np.flatnonzero(~np.isfinite(logits).all(axis=1))


def save_capture(path: str | os.PathLike, cap: Capture) -> None:
    """Write a capture file atomically."""
    with atomic_path(Path(path)) as tmp, open(tmp, "wb") as fh:
        np.savez(
            fh,
            logits=cap.logits,
            labels=cap.labels,
            meta=np.array(json.dumps(cap.meta.to_dict(), sort_keys=True)),
        )


def load_capture(path: str | os.PathLike) -> Capture:
    """Read a capture file written by :func:`save_capture`.

    Raises
    ------
    OnnxcalError
        Not a capture file, or its arrays have the wrong shape or type.
    """
    p = require_file(path, "capture file")
    hint = "give a file written by 'onnxcal capture'"
    try:
        with np.load(p, allow_pickle=False) as npz:
            logits, labels, meta_json = npz["logits"], npz["labels"], str(npz["meta"])
        meta = CaptureMeta(**json.loads(meta_json))
    except (zipfile.BadZipFile, KeyError, ValueError, TypeError, OSError, AttributeError) as exc:
        raise OnnxcalError(f"'{p}' is not an onnxcal capture file ({exc})", hint) from exc
    if logits.ndim != 2 or logits.dtype.kind != "f":
        raise OnnxcalError(f"'{p}' holds logits of shape {logits.shape} ({logits.dtype})", hint)
    labels = label_rows(labels, logits.shape, meta.fit_as, str(p))
    return Capture(logits=logits, labels=labels, meta=meta)
