"""Score rows: a tensor's class axis moved last and the rest flattened, and labels lined up with them."""

from __future__ import annotations

import numpy as np

from ..data import check_label_array, check_labels
from ..errors import OnnxcalError
from ..graph import ScoreSite


def as_rows(scores: np.ndarray, class_axis: int) -> np.ndarray:
    """Move the class axis last and flatten the rest: (rows, k)."""
    if scores.ndim == 1:
        return scores.reshape(-1, 1)
    if scores.ndim == 2 and class_axis == 1:
        return scores
    moved = np.moveaxis(scores, class_axis, -1)
    return moved.reshape(-1, moved.shape[-1])


def output_rows(values: np.ndarray, site: ScoreSite) -> np.ndarray:
    """The output's values as rows lined up with the captured logits' rows (class axis last).

    An output holding one class's value gives one column (its other axes
    are those of the logits' rows, in order).
    """
    if site.takes_one:
        return np.asarray(values).reshape(-1, 1)
    if site.columns is not None:  # only these positions of a Concat are class scores
        axis, start, stop = site.columns
        values = np.take(values, np.arange(start, stop), axis=axis)
    return as_rows(values, site.class_axis)


def log_probabilities(p: np.ndarray) -> np.ndarray:
    """log(max(p, tiny)): logits for probabilities, as the patched graph computes them.

    softmax(log p) = p, and softmax(log p / T) = softmax(z / T) for logits z
    with p = softmax(z), since softmax ignores a constant added to every
    class (common practice). ``tiny`` is the dtype's smallest normal number.
    (Capture builds the same in the graph, ``graph.expose_scores``.)
    """
    return np.log(np.maximum(p, np.finfo(p.dtype).tiny))


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
    if kind != "sigmoid":  # softmax, sigmoid-l1: class indices
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
    # binary: one 0/1 class index per row; multi-label: rows x k of 0/1
    return check_label_array(labels.reshape(-1) if k == 1 else labels.reshape(rows, k), rows, k, source)
