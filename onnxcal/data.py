"""Load labelled validation sets and check them against a model's inputs.

A validation set is a :class:`Dataset`: one array per model input (first
axis = samples) and, optionally, integer labels. Arrays may be memory maps;
nothing here copies them whole. Every load uses ``allow_pickle=False``.
"""

from __future__ import annotations

import os
import zipfile
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from ._files import require_file
from .errors import OnnxcalError
from .graph import TensorSpec

LABELS_KEY = "labels"


@dataclass(frozen=True)
class Dataset:
    """Model inputs by name, plus labels when the set is labelled.

    Attributes
    ----------
    inputs : mapping of str to ndarray
        One array per model input, samples along axis 0.
    labels : ndarray or None
        Shape (n,), integer class indices, or None for an unlabelled set.
    source : str
        Where the set came from, for messages.
    """

    inputs: Mapping[str, np.ndarray]
    labels: np.ndarray | None
    source: str

    @property
    def n(self) -> int:
        return len(next(iter(self.inputs.values())))


def load_npz(path: str | os.PathLike, *, require_labels: bool = True) -> Dataset:
    """Read an ``.npz`` whose arrays are named after the model inputs, plus ``labels``.

    Raises
    ------
    OnnxcalError
        Not an npz, pickled (object) arrays, no ``labels`` when required,
        arrays of different lengths.
    """
    p = require_file(path, "data file")
    hint = "save the inputs and labels with numpy.savez(path, <input>=..., labels=...)"
    if not zipfile.is_zipfile(p):
        raise OnnxcalError(f"'{p}' is not an .npz archive", hint)
    try:
        npz = np.load(p, allow_pickle=False)
    except (zipfile.BadZipFile, ValueError, OSError, EOFError) as exc:
        raise OnnxcalError(f"'{p}' is not a readable .npz file ({exc})", hint) from exc
    arrays: dict[str, np.ndarray] = {}
    with npz:
        for key in npz.files:
            try:
                arrays[key] = npz[key]
            except ValueError as exc:  # object arrays need pickle, which we refuse
                raise OnnxcalError(
                    f"array '{key}' in '{p}' holds Python objects, which onnxcal will not unpickle",
                    "save it as a numeric array",
                ) from exc
    labels = arrays.pop(LABELS_KEY, None)
    if labels is None and require_labels:
        raise OnnxcalError(
            f"'{p}' has no array named '{LABELS_KEY}'",
            f"add the integer class labels as '{LABELS_KEY}'",
        )
    if not arrays:
        raise OnnxcalError(f"'{p}' holds no input arrays", "add one array per model input")
    lengths = {k: (a.shape[0] if a.ndim else None) for k, a in arrays.items()}
    if labels is not None:
        lengths[LABELS_KEY] = labels.shape[0] if labels.ndim else None
    if len(set(lengths.values())) != 1 or None in lengths.values():
        shown = ", ".join(f"{k}: {v}" for k, v in lengths.items())
        raise OnnxcalError(
            f"arrays in '{p}' have different numbers of samples ({shown})",
            "every array needs the samples along its first axis, the same count each",
        )
    if next(iter(lengths.values())) == 0:
        raise OnnxcalError(f"'{p}' holds no samples", "give a non-empty validation set")
    return Dataset(inputs=arrays, labels=labels, source=str(p))


def _kind_ok(data: np.dtype, model: np.dtype) -> bool:
    if data == model:
        return True
    if model.kind == "f":
        return data.kind in "fiub"
    if model.kind in "iu":
        return data.kind in "iub"
    return model.kind == "b" and data.kind == "b"


def match_inputs(dataset: Dataset, specs: Sequence[TensorSpec]) -> None:
    """Check that the set supplies every model input with a fitting dtype and shape.

    Raises
    ------
    OnnxcalError
        An input is missing or extra, or its dtype or shape cannot feed the model.
    """
    names = [s.name for s in specs]
    missing = [n for n in names if n not in dataset.inputs]
    extra = [n for n in dataset.inputs if n not in names]
    if missing:
        raise OnnxcalError(
            f"'{dataset.source}' has no array for model input '{missing[0]}'",
            f"the model's inputs are: {', '.join(names)}",
        )
    if extra:
        raise OnnxcalError(
            f"'{dataset.source}' has an array '{extra[0]}' that is not a model input",
            f"the model's inputs are: {', '.join(names)} (plus '{LABELS_KEY}')",
        )
    for spec in specs:
        arr = dataset.inputs[spec.name]
        want = np.dtype(spec.dtype)
        if not _kind_ok(arr.dtype, want):
            raise OnnxcalError(
                f"input '{spec.name}' is {arr.dtype} in the data but {want} in the model",
                f"save '{spec.name}' as {want}",
            )
        if spec.shape is None:
            continue
        if arr.ndim != len(spec.shape):
            raise OnnxcalError(
                f"input '{spec.name}' has rank {arr.ndim} (shape {arr.shape}) in the data "
                f"but rank {len(spec.shape)} in the model (shape {_show(spec.shape)})",
                "reshape the array so samples are on axis 0 and the rest matches the model",
            )
        for axis, (have, need) in enumerate(zip(arr.shape[1:], spec.shape[1:]), start=1):
            if isinstance(need, int) and need > 0 and have != need:
                raise OnnxcalError(
                    f"input '{spec.name}' has size {have} on axis {axis} in the data "
                    f"but {need} in the model (shape {_show(spec.shape)})",
                    "give data shaped like the model's input",
                )


def _show(shape: Sequence[int | str | None]) -> str:
    return "[" + ", ".join("?" if d is None else str(d) for d in shape) + "]"


def check_labels(labels: np.ndarray, n: int, num_classes: int, source: str) -> np.ndarray:
    """Return ``labels`` as int64 after checking count, integrality and range.

    Raises
    ------
    OnnxcalError
        Wrong count, non-integer values, or values outside [0, num_classes).
    """
    labels = np.asarray(labels)
    if labels.ndim != 1:
        raise OnnxcalError(
            f"labels in '{source}' have shape {labels.shape}, expected one label per sample",
            "give a 1-D array of class indices",
        )
    if labels.shape[0] != n:
        raise OnnxcalError(
            f"'{source}' has {labels.shape[0]} labels for {n} samples",
            "give exactly one label per sample",
        )
    if labels.dtype.kind == "f":
        bad = ~np.isfinite(labels) | (labels != np.round(labels))
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise OnnxcalError(
                f"label {labels[i].item()!r} at row {i} in '{source}' is not a whole class index",
                "labels must be integer class indices",
            )
    elif labels.dtype.kind not in "iub":
        raise OnnxcalError(
            f"labels in '{source}' have dtype {labels.dtype}, not integers",
            "labels must be integer class indices",
        )
    out = labels.astype(np.int64)
    bad = (out < 0) | (out >= num_classes)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise OnnxcalError(
            f"label {out[i]} at row {i} in '{source}' is outside [0, {num_classes}) "
            f"for a model with {num_classes} classes ({int(bad.sum())} such labels)",
            "check that the labels use the model's class indices",
        )
    return out


def check_multilabel(labels: np.ndarray, n: int, num_labels: int, source: str) -> np.ndarray:
    """Return an N x K 0/1 multi-label array as uint8 after checking it.

    Raises
    ------
    OnnxcalError
        Wrong shape, or values other than 0 and 1.
    """
    labels = np.asarray(labels)
    if labels.ndim != 2 or labels.shape != (n, num_labels):
        raise OnnxcalError(
            f"multi-label labels in '{source}' have shape {labels.shape}, expected ({n}, {num_labels}): "
            "one 0/1 column per model output",
            "give an N x K array of 0 and 1",
        )
    if labels.dtype.kind not in "iubf":
        raise OnnxcalError(f"labels in '{source}' have dtype {labels.dtype}, not numbers", "give 0 and 1")
    bad = (labels != 0) & (labels != 1)
    if bad.any():
        i, j = (int(v) for v in np.argwhere(bad)[0])
        raise OnnxcalError(
            f"label {labels[i, j].item()!r} at row {i}, column {j} in '{source}' is not 0 or 1",
            "multi-label labels must be 0 (absent) or 1 (present)",
        )
    return labels.astype(np.uint8)


def check_label_array(labels: np.ndarray, n: int, num_classes: int, source: str) -> np.ndarray:
    """Check class labels (1-D; 0/1 for a single-logit binary model) or an N x K multi-label array."""
    if np.ndim(labels) == 2:
        return check_multilabel(labels, n, num_classes, source)
    return check_labels(labels, n, max(num_classes, 2), source)
