"""Checks of the arrays the decision functions are given, once, at their entry.

Probabilities come as the calibrated model emits them: an N x K array of
class probabilities (softmax), one probability per row (a binary sigmoid
head, shape N or N x 1), or N x K per-label probabilities (multi-label
sigmoid head, with an N x K 0/1 label array). The decision subgraph is to
compute in float32 for float16 outputs (a Cast first: a float16 running sum
over K classes accumulates K roundings of up to 2**-11 each; onnxruntime
1.32 has float16 TopK and CumSum kernels on CPU, older releases were not
checked) and in the output's own type otherwise. :func:`compute_dtype`
is that choice, and the NumPy functions here compute in it too, so that
they give what the graph gives.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import OnnxcalError


def compute_dtype(dtype: np.dtype) -> np.dtype:
    """float32 for float16 (and narrower) probabilities, else their own float type."""
    return np.dtype(np.result_type(dtype, np.float32))


def check_fraction(value: float, name: str, hint: str) -> float:
    """A number strictly between 0 and 1, or an OnnxcalError naming ``name``."""
    if isinstance(value, bool) or not isinstance(value, (int, float, np.floating)) or not 0.0 < value < 1.0:
        raise OnnxcalError(f"{name} must be a number strictly between 0 and 1, got {value!r}", hint)
    return float(value)


@dataclass(frozen=True)
class Predictions:
    """The rows a decision is chosen on, checked.

    Attributes
    ----------
    kind : str
        ``"multiclass"``, ``"binary"`` or ``"multilabel"``.
    probabilities : ndarray
        The selected rows in the compute dtype: N x K (multiclass,
        multi-label) or N (binary: the probability of class 1).
    labels : ndarray
        N class indices (int64), or N x K 0/1 (uint8) for multi-label.
    """

    kind: str
    probabilities: np.ndarray
    labels: np.ndarray


def _rows(rows: np.ndarray, n: int) -> np.ndarray:
    r = np.asarray(rows)
    if r.dtype == bool:
        if r.shape != (n,):
            raise OnnxcalError(f"the row mask has shape {r.shape}, not ({n},)", "give one flag per row")
        r = np.flatnonzero(r)
    elif r.ndim != 1 or not np.issubdtype(r.dtype, np.integer):
        raise OnnxcalError("rows must be a 1-D array of row indices or a boolean mask")
    if r.size == 0:
        raise OnnxcalError("no rows were given to choose the threshold on", "pass the held-out rows")
    if r.min() < -n or r.max() >= n:
        raise OnnxcalError(f"row indices must lie in [0, {n}), got {int(r.min())} to {int(r.max())}")
    return r


def _labels(labels: np.ndarray, shape: tuple[int, ...], kind: str) -> np.ndarray:
    y = np.asarray(labels)
    if not (np.issubdtype(y.dtype, np.integer) or y.dtype == bool):
        raise OnnxcalError(f"labels must be integers, got {y.dtype}")
    if kind == "multilabel":
        if y.shape != shape or np.any((y != 0) & (y != 1)):
            raise OnnxcalError(f"multi-label labels must be a 0/1 array of shape {shape}, got {y.shape}")
        return y.astype(np.uint8)
    n_classes = 2 if kind == "binary" else shape[1]
    if y.shape != shape[:1]:
        raise OnnxcalError(f"labels have shape {y.shape} for {shape[0]} rows of probabilities")
    if y.size and (y.min() < 0 or y.max() >= n_classes):
        raise OnnxcalError(
            f"labels must be class indices in [0, {n_classes}), got {int(y.min())} to {int(y.max())}",
            "check that the labels belong to this model's classes",
        )
    return y.astype(np.int64)


def predictions(probabilities: np.ndarray, labels: np.ndarray, rows: np.ndarray) -> Predictions:
    """Check probabilities, labels and rows; return the selected rows.

    Raises
    ------
    OnnxcalError
        Probabilities that are not finite numbers in [0, 1] (logits, most
        likely), labels that do not fit them, rows out of range or none.
    """
    p = np.asarray(probabilities)
    if not np.issubdtype(p.dtype, np.floating) or p.ndim not in (1, 2) or p.size == 0:
        raise OnnxcalError(
            f"probabilities must be a non-empty 1-D or 2-D float array, got {p.dtype} of shape {p.shape}"
        )
    y_ndim = np.ndim(labels)
    kind = "multilabel" if y_ndim == 2 else ("binary" if p.ndim == 1 or p.shape[1] == 1 else "multiclass")
    if kind == "binary":
        p = p.reshape(-1)
    r = _rows(rows, len(p))
    picked = np.asarray(p[r], dtype=compute_dtype(p.dtype))
    if not np.all(np.isfinite(picked)) or picked.min() < 0 or picked.max() > 1:
        raise OnnxcalError(
            "probabilities must be finite numbers in [0, 1]",
            "pass the calibrated model's probabilities, not its logits",
        )
    y = _labels(labels, p.shape if kind != "binary" else (len(p),), kind)
    return Predictions(kind, picked, y[r])


def two_classes(p: np.ndarray) -> np.ndarray:
    """N x 2 probabilities (1 - p, p) of a binary head's N probabilities of class 1, in p's dtype."""
    return np.stack([p.dtype.type(1) - p, p], axis=-1)
