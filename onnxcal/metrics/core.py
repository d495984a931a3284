"""Row chunks and the activations every metric starts from.

:func:`iter_chunks` reads the logits of a large set (float32, a memory map)
in row chunks as float64, so the temporaries of a computation stay a few
hundred KiB whatever the number of rows; :func:`softmax`,
:func:`log_softmax` and :func:`sigmoid` are the float64 references;
:func:`scores_from_probabilities` turns a model's probability output back
into scores for :func:`onnxcal.metrics.evaluate`.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import cast

import numpy as np

# float64 elements per chunk: 512 KiB per temporary array, a handful at a time
# (measured fastest on this machine among 2^15 to 2^20: larger chunks fall out
# of cache and pay page faults for every temporary).
_CHUNK_ELEMENTS = 1 << 16


def chunk_rows(n_classes: int) -> int:
    """Rows per chunk so one float64 chunk of ``n_classes`` columns is ~512 KiB."""
    return max(1, _CHUNK_ELEMENTS // max(1, n_classes))


def iter_chunks(
    logits: np.ndarray,
    labels: np.ndarray,
    rows: np.ndarray | None = None,
    weights: np.ndarray | None = None,
) -> Iterator[tuple[np.ndarray, np.ndarray, np.ndarray | None]]:
    """Yield ``(z, y, w)`` row chunks: logits as float64, labels, weights.

    ``rows`` (sorted indices) restricts to a subset, gathered chunk by chunk
    so no copy of the subset is made; ``weights`` has one entry per selected
    row (bootstrap counts), or is None.
    """
    total = len(logits) if rows is None else len(rows)
    step = chunk_rows(logits.shape[1])
    for start in range(0, total, step):
        pick = slice(start, start + step) if rows is None else rows[start : start + step]
        z = np.asarray(logits[pick], dtype=np.float64)
        y = np.asarray(labels[pick])
        w = None if weights is None else np.asarray(weights[start : start + step], dtype=np.float64)
        yield z, y, w


def log_softmax(z: np.ndarray, axis: int = -1) -> np.ndarray:
    """Numerically stable log-softmax, ``z - logsumexp(z)`` along ``axis``.

    Computed in float64 whatever the input dtype.

    Examples
    --------
    >>> np.round(np.exp(log_softmax(np.array([0.0, np.log(3.0)]))), 3)
    array([0.25, 0.75])
    """
    z = np.asarray(z, dtype=np.float64)
    shifted = z - np.max(z, axis=axis, keepdims=True)
    return cast(np.ndarray, shifted - np.log(np.sum(np.exp(shifted), axis=axis, keepdims=True)))


def softmax(z: np.ndarray, axis: int = -1) -> np.ndarray:
    """Numerically stable softmax along ``axis``, in float64.

    Examples
    --------
    >>> softmax(np.array([[1.0, 1.0]]))
    array([[0.5, 0.5]])
    """
    return cast(np.ndarray, np.exp(log_softmax(z, axis=axis)))


def sigmoid(z: np.ndarray) -> np.ndarray:
    """The logistic function 1 / (1 + exp(-z)) in float64, without overflow.

    Examples
    --------
    >>> sigmoid(np.array([0.0, 1e4, -1e4]))
    array([0.5, 1. , 0. ])
    """
    z = np.asarray(z, dtype=np.float64)
    e = np.exp(-np.abs(z))
    return cast(np.ndarray, np.where(z >= 0, 1.0 / (1.0 + e), e / (1.0 + e)))


def scores_from_probabilities(output: np.ndarray, activation: str) -> np.ndarray:
    """Logits that give back a model's probability output, float64, for :func:`evaluate`.

    ``"softmax"``: log(max(p, tiny)), since softmax(log p) = p for rows
    that sum to 1 (common practice). ``"logsoftmax"``: the output itself.
    ``"sigmoid"``: the logit log(p) - log(1 - p), each clamped the same
    way. ``tiny`` is the smallest normal number of the output's dtype, so
    a probability rounded to 0 or 1 gives a large finite logit, as the
    output's own precision allows.

    Examples
    --------
    >>> scores_from_probabilities(np.array([[0.5]]), "sigmoid")
    array([[0.]])
    """
    if activation == "logsoftmax":
        return np.asarray(output, dtype=np.float64)
    p = np.asarray(output)
    if p.dtype.kind != "f":
        p = p.astype(np.float64)
    tiny = np.finfo(p.dtype).tiny
    log_p = np.log(np.maximum(p, tiny).astype(np.float64))
    if activation == "sigmoid":
        return cast(np.ndarray, log_p - np.log(np.maximum(1.0 - p, tiny).astype(np.float64)))
    return cast(np.ndarray, log_p)
