"""Maps that look the calibrated probability up in a table: isotonic regression and histogram binning.

Both calibrate each class's probability p_k = softmax(z)_k (one logit:
p = sigmoid(z)) on its own against the indicator y = k (one-vs-rest, the
multiclass reduction of Zadrozny & Elkan, KDD 2002, sec. 5), then divide by
the row sum so the K values add up to 1 (as scikit-learn's
``CalibratedClassifierCV`` does; a row whose K values are all 0 becomes
uniform, as there). With one logit there is nothing to renormalise.

This module holds what the two share: the probability columns read in
bounded memory, per-class parameter checks, and the ONNX lookup:

1. p = Softmax(z) (or Sigmoid), N x K;
2. the segment index j = sum_m [t_km <= p_k] (isotonic: knots) or
   sum_m [t_km < p_k] (binning: edges): LessOrEqual / Less against the
   K x M table (per-class knots padded to a common length M with 2.0,
   which no probability reaches), Cast to int32, ReduceSum over m;
3. Gather of the per-class, per-segment table entries at k (M + 1) + j
   from the flattened K x (M + 1) tables;
4. isotonic: y0 + s (p - x0) with (x0, y0, s) gathered (linear
   interpolation between knots, flat beyond the ends); binning: the
   gathered value;
5. renormalise (K > 1).

Cost: N x K x M comparisons and an N x K x M int32 temporary per batch,
plus one to three gathers of N x K; M is the largest number of knots or
edges over the classes (tens to a few hundred in practice).
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from typing import Any, cast

import numpy as np

from ..errors import OnnxcalError
from ._base import (
    GraphBuilder,
    Subgraph,
    check_kind,
    chunks,
    field_array,
    plain,
    require_fields,
    sigmoid,
    softmax,
)

KINDS = ("multiclass", "binary")
PAD = 2.0  # knot/edge padding: above every probability
# The lookups run in float64 whatever the model's dtype: the probability's
# rounding error is multiplied by the slope of a steep isotonic segment, and
# decides the bin of a probability near an edge.
COMPUTE_DTYPE = "float64"
_COLUMN_BYTES = 64 << 20  # at most this much float64 of probability columns at once


def probabilities(scores: np.ndarray) -> np.ndarray:
    """softmax(z) for K > 1 logits, sigmoid(z) for one (float64)."""
    z = np.asarray(scores, dtype=np.float64)
    return sigmoid(z) if z.shape[-1] == 1 else softmax(z, axis=-1)


def kind_of_scores(num_classes: int) -> str:
    return "binary" if num_classes == 1 else "multiclass"


def renormalise(q: np.ndarray) -> np.ndarray:
    """Rows divided by their sum; all-zero rows uniform (scikit-learn's rule)."""
    if q.shape[-1] == 1:
        return q
    total = q.sum(axis=-1, keepdims=True)
    out = np.full_like(q, 1.0 / q.shape[-1])
    np.divide(q, total, out=out, where=total != 0)
    return out


def targets(labels: np.ndarray, k: int, num_classes: int) -> np.ndarray:
    """The indicator of class k (multiclass) or the 0/1 labels (one logit), float64."""
    y = np.asarray(labels)
    if num_classes == 1:
        return y.reshape(len(y)).astype(np.float64)
    return cast(np.ndarray, (y == k).astype(np.float64))


def class_blocks(
    scores: np.ndarray, labels: np.ndarray, rows: np.ndarray | None
) -> Iterator[tuple[range, np.ndarray, np.ndarray]]:
    """Yield (classes, probabilities of those classes for every selected row, labels).

    Reads the scores in row chunks once per block of classes, each block
    holding at most ~64 MiB of float64 columns, so the memory stays
    bounded for large n and K (at the cost of K / block passes).
    """
    n = len(scores) if rows is None else len(rows)
    k = scores.shape[1]
    width = int(max(1, min(k, _COLUMN_BYTES // (8 * max(n, 1)))))
    y_all = np.asarray(labels if rows is None else labels[rows])
    for first in range(0, k, width):
        cols = range(first, min(k, first + width))
        out = np.empty((n, len(cols)))
        at = 0
        for z, _, _ in chunks(scores, labels, rows):
            out[at : at + len(z)] = probabilities(z)[:, first : cols.stop]
            at += len(z)
        yield cols, out, y_all


def fit_per_class(
    scores: np.ndarray,
    labels: np.ndarray,
    rows: np.ndarray | None,
    weights: np.ndarray | None,
    one: Callable[[np.ndarray, np.ndarray, np.ndarray], tuple[np.ndarray, np.ndarray]],
) -> tuple[list[tuple[np.ndarray, np.ndarray]], int]:
    """``one(p, t, w)`` for every class (its probability, indicator, weights), and the passes made.

    Rows with weight 0 (left out of a bootstrap replicate) are dropped.
    """
    k = scores.shape[1]
    w_all = np.ones(len(scores) if rows is None else len(rows)) if weights is None else np.asarray(weights, np.float64)
    keep = w_all > 0
    if not keep.any():
        raise OnnxcalError("no rows to fit on (every weight is 0)")
    result, passes = [], 0
    for cols, p, y in class_blocks(scores, labels, rows):
        passes += 1
        for j, c in enumerate(cols):
            result.append(one(p[keep, j], targets(y[keep], c, k), w_all[keep]))
    return result, passes


# --------------------------------------------------------------------------
# Parameter checks


def check_tables(
    params: dict[str, Any], names: tuple[str, str], num_classes: int | None, method: str, kind: str | None
) -> tuple[list[np.ndarray], list[np.ndarray]]:
    """Two per-class lists of number lists (K of each), finite and within [0, 1]."""
    if kind is not None:
        check_kind(kind, KINDS, method)
    require_fields(params, names, method)
    tables = []
    for name in names:
        value = params[name]
        if not isinstance(value, (list, tuple)) or not value:
            raise OnnxcalError(f"{method} parameter '{name}' must be a list with one list of numbers per class")
        if num_classes is not None and len(value) != num_classes:
            raise OnnxcalError(
                f"{method} parameter '{name}' has {len(value)} per-class lists for {num_classes} classes",
                "fit it on scores from this model",
            )
        rows = []
        for k, entry in enumerate(value):
            arr = field_array({f"{name}[{k}]": entry}, f"{name}[{k}]", method, ndim=1)
            if np.any((arr < 0) | (arr > 1)):
                raise OnnxcalError(f"{method} parameter '{name}[{k}]' holds values outside [0, 1]")
            rows.append(arr)
        tables.append(rows)
    return tables[0], tables[1]


def strictly_increasing(values: np.ndarray, what: str, method: str) -> None:
    if np.any(np.diff(values) <= 0):
        raise OnnxcalError(f"{method} parameter '{what}' must be strictly increasing")


def as_lists(tables: list[np.ndarray]) -> list[Any]:
    return [plain(t) for t in tables]


# --------------------------------------------------------------------------
# Graph


def padded(tables: list[np.ndarray], width: int, fill: float) -> np.ndarray:
    out = np.full((len(tables), width), fill)
    for k, t in enumerate(tables):
        out[k, : len(t)] = t
    return out


def segment_index(g: GraphBuilder, p: str, thresholds: np.ndarray, inclusive: bool) -> str:
    """Flat index k (M + 1) + #{m : t_km <= p_k} (or < with ``inclusive`` False), N x K int32."""
    k, m = thresholds.shape
    p3 = g.node("Unsqueeze", [p, g.const("axis_last", np.array([-1]), "int64")], "p_unsqueezed")
    op = "LessOrEqual" if inclusive else "Less"
    hits = g.node(op, [g.const("thresholds", thresholds), p3], "below")
    hits = g.node("Cast", [hits], "below_int", to=6)  # INT32
    axes = g.const("axes_last_reduce", np.array([-1]), "int64")
    j = g.node("ReduceSum", [hits, axes], "segment", keepdims=0)
    offsets = g.const("class_offsets", np.arange(k) * (m + 1), "int32")
    return g.node("Add", [j, offsets], "table_index")


def start_probabilities(g: GraphBuilder, num_classes: int) -> str:
    z = g.start()
    if num_classes == 1:
        return g.node("Sigmoid", [z], "p")
    return g.node("Softmax", [z], "p", axis=-1)


def gather(g: GraphBuilder, table: np.ndarray, index: str, base: str) -> str:
    return g.node("Gather", [g.const(f"{base}_table", table.ravel()), index], base, axis=0)


def finish(g: GraphBuilder, q: str, num_classes: int) -> Subgraph:
    if num_classes > 1:
        q = g.renormalise(q, num_classes)
    return g.finish(q)
