"""Class names and labels: the class list (``--classes``), string labels mapped
through it, and the checks of class indices and multi-label 0/1 arrays.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Sequence

import numpy as np

from .._paths import require_file
from ..errors import OnnxcalError


def read_classes(path: str | os.PathLike[str]) -> tuple[str, ...]:
    """Class names from a text file, one per line, in the model's class order.

    Raises
    ------
    OnnxcalError
        No names, a blank line between names, or a name given twice.
    """
    p = require_file(path, "classes file")
    try:
        lines = p.read_text(encoding="utf-8-sig").splitlines()
    except (OSError, UnicodeDecodeError) as exc:
        raise OnnxcalError(f"classes file '{p}' is not readable UTF-8 text ({exc})") from exc
    names = [line.strip() for line in lines]
    while names and not names[-1]:
        names.pop()
    if not names:
        raise OnnxcalError(f"classes file '{p}' lists no class names", "write one class name per line")
    if "" in names:
        raise OnnxcalError(
            f"line {names.index('') + 1} of classes file '{p}' is blank",
            "write one class name per line, with no blank lines between them",
        )
    seen: dict[str, int] = {}
    for i, name in enumerate(names, start=1):
        if name in seen:
            raise OnnxcalError(
                f"class '{name}' is listed twice in '{p}' (lines {seen[name]} and {i})",
                "list each class once",
            )
        seen[name] = i
    return tuple(names)


def class_indices(
    values: np.ndarray,
    classes: Sequence[str],
    describe: Callable[[int], str],
    classes_file: str | os.PathLike[str] | None = None,
) -> np.ndarray:
    """Map class names to their indices in ``classes`` (vectorised).

    ``describe(i)`` names where value ``i`` came from, for the error.
    """
    names = np.asarray(classes)
    order = np.argsort(names, kind="stable")
    ordered = names[order]
    wanted = np.char.strip(np.asarray(values).astype(str))
    pos = np.clip(np.searchsorted(ordered, wanted), 0, len(ordered) - 1)
    found = ordered[pos] == wanted
    if not found.all():
        i = int(np.flatnonzero(~found)[0])
        listed = ", ".join(classes[:8]) + (", ..." if len(classes) > 8 else "")
        where = f"the class list '{classes_file}'" if classes_file else "the class list"
        raise OnnxcalError(
            f"label '{wanted[i]}' at {describe(i)} is not in {where} ({listed}; "
            f"{int((~found).sum())} unknown in all)",
            "fix the label or add the class to the class list",
        )
    return order[pos].astype(np.int64)


def map_labels(
    labels: np.ndarray,
    classes: Sequence[str] | None,
    source: str,
    *,
    classes_file: str | os.PathLike[str] | None = None,
    describe: Callable[[int], str] | None = None,
) -> np.ndarray:
    """String labels mapped to class indices; numeric labels unchanged."""
    labels = np.asarray(labels)
    if labels.dtype.kind not in "US":
        return labels
    if classes is None:
        first = str(labels.reshape(-1)[0]) if labels.size else ""
        raise OnnxcalError(
            f"the labels in '{source}' are names (e.g. '{first}'), not class indices",
            "pass --classes FILE with the class names, one per line, in the model's class order",
        )
    return class_indices(labels, classes, describe or (lambda i: f"row {i} of '{source}'"), classes_file)


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
