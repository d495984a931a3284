"""Histogram binning of each class's probability, one-vs-rest, renormalised.

Zadrozny & Elkan, "Obtaining calibrated probability estimates from decision
trees and naive Bayesian classifiers", ICML 2001, sec. 4 ("binning"): sort
the scores, split them into M bins of equal size, and give every score in a
bin the bin's fraction of positives. Guo et al. (ICML 2017, sec. 4.1) use
M equal-width bins of [0, 1] instead; both are offered (``strategy``
``"quantile"``, the default, or ``"uniform"``). Multiclass: one binning per
class on p_k = softmax(z)_k against y = k, then the row is divided by its
sum (Zadrozny & Elkan, KDD 2002, sec. 5; scikit-learn's rule for all-zero
rows: uniform). One logit: p = sigmoid(z), no renormalisation.

**Objective.** Only the bin values are fitted: for fixed bins, a bin's
fraction of positives minimises both the squared error and the Bernoulli
NLL of a constant prediction on the bin (the mean is the least-squares
constant and the maximum-likelihood Bernoulli parameter); the edges come
from the rule (equal mass or equal width), not from any objective. A bin
whose fraction is 0 or 1 predicts exactly 0 or 1, which an NLL scores as
infinite when a held-out row of the other class falls in it.

**Map.** Piecewise constant: bin m holds the probabilities in
(e_{m-1}, e_m] (right-closed, as onnxcal's reliability bins); the edges of
quantile bins lie halfway between the last score of a bin and the first of
the next, so no training score sits on an edge. Every score in a bin gets
the same value (ties), and the per-class maps differ, so binning can change
the ranking of the rows and the argmax.

Parameters (JSON): ``{"edges": [[interior edges of class k] for k],
"values": [[bin values] for k]}``, edges strictly increasing in [0, 1],
values in [0, 1], len(values[k]) = len(edges[k]) + 1.
Graph: see :mod:`onnxcal.maps._lookup` (Less against the padded edges, one
Gather).
"""

from __future__ import annotations

from collections.abc import Collection
from functools import partial
from typing import Any, cast

import numpy as np

from ..errors import OnnxcalError
from . import _lookup
from ._base import GraphBuilder, MapFit, Subgraph

METHOD = "histogram"
KINDS = _lookup.KINDS
DEFAULT_BINS = 10  # Zadrozny & Elkan 2001 used 10 bins (from memory)
STRATEGIES = ("quantile", "uniform")


def n_parameters(num_classes: int, params: dict[str, Any] | None = None) -> int:
    """Edges and values over all classes (the fit decides how many: ``params`` is needed)."""
    if params is None:
        raise ValueError("a binning's size depends on its fit: pass params")
    return sum(len(e) + len(v) for e, v in zip(params["edges"], params["values"], strict=True))


def bin_edges(p: np.ndarray, w: np.ndarray, bins: int, strategy: str) -> np.ndarray:
    """Interior edges: equal-width, or halfway between the scores where the cumulative weight crosses m / M.

    Examples
    --------
    >>> bin_edges(np.array([0.1, 0.2, 0.3, 0.4]), np.ones(4), 2, "quantile").tolist()
    [0.25]
    >>> bin_edges(np.array([0.1]), np.ones(1), 4, "uniform").tolist()
    [0.25, 0.5, 0.75]
    """
    if strategy == "uniform":
        return np.linspace(0.0, 1.0, bins + 1)[1:-1]
    order = np.argsort(p, kind="stable")
    u, first = np.unique(p[order], return_index=True)
    cum = np.cumsum(np.add.reduceat(w[order], first))
    at = np.searchsorted(cum, cum[-1] * np.arange(1, bins) / bins, side="left")
    at = np.unique(at[at < len(u) - 1])
    return cast(np.ndarray, (u[at] + u[at + 1]) / 2.0)


def binned(p: np.ndarray, t: np.ndarray, w: np.ndarray, bins: int, strategy: str) -> tuple[np.ndarray, np.ndarray]:
    """Edges and per-bin weighted fraction of positives; an empty bin gets its midpoint."""
    edges = bin_edges(p, w, bins, strategy)
    ids = np.searchsorted(edges, p, side="left")
    mass = np.bincount(ids, weights=w, minlength=len(edges) + 1)
    hits = np.bincount(ids, weights=w * t, minlength=len(edges) + 1)
    bounds = np.concatenate([[0.0], edges, [1.0]])
    mid = (bounds[:-1] + bounds[1:]) / 2.0
    values = np.where(mass > 0, hits / np.where(mass > 0, mass, 1.0), mid)
    return edges, np.clip(values, 0.0, 1.0)


def calibrate_columns(params: dict[str, Any], p: np.ndarray) -> np.ndarray:
    q = np.empty_like(p)
    for k, (e, v) in enumerate(zip(params["edges"], params["values"], strict=True)):
        q[:, k] = np.asarray(v, dtype=np.float64)[np.searchsorted(np.asarray(e, dtype=np.float64), p[:, k],
                                                                  side="left")]
    return q


def apply(params: dict[str, Any], scores: np.ndarray) -> np.ndarray:
    """Calibrated probabilities, float64 (the NumPy reference).

    Examples
    --------
    >>> params = {"edges": [[0.5]], "values": [[0.2, 0.9]]}
    >>> apply(params, np.array([[-1.0], [0.0], [1.0]])).ravel().tolist()
    [0.2, 0.2, 0.9]
    """
    p = _lookup.probabilities(scores)
    return _lookup.renormalise(calibrate_columns(params, p))


def check_parameters(params: dict[str, Any], num_classes: int | None = None, kind: str | None = None) -> dict[str, Any]:
    """Validate parameters read from a file; returns them as plain numbers.

    Raises
    ------
    OnnxcalError
        Naming the field: missing or extra fields, not one list per class,
        values outside [0, 1], edges not strictly increasing, a class with
        not exactly one more value than edges.
    """
    edges, values = _lookup.check_tables(params, ("edges", "values"), num_classes, METHOD, kind)
    if len(edges) != len(values):
        raise OnnxcalError(
            f"histogram parameters 'edges' and 'values' have {len(edges)} and {len(values)} per-class lists"
        )
    for k, (e, v) in enumerate(zip(edges, values, strict=True)):
        if len(v) != len(e) + 1:
            raise OnnxcalError(
                f"histogram parameter 'values[{k}]' has {len(v)} values for {len(e)} edges (needs one more)"
            )
        _lookup.strictly_increasing(e, f"edges[{k}]", METHOD)
    return {"edges": _lookup.as_lists(edges), "values": _lookup.as_lists(values)}


def fit(
    scores: np.ndarray,
    labels: np.ndarray,
    *,
    rows: np.ndarray | None = None,
    weights: np.ndarray | None = None,
    l2: float = 0.0,
    bins: int = DEFAULT_BINS,
    strategy: str = "quantile",
) -> MapFit:
    """Fit one binning per class (one for a one-logit model).

    Parameters
    ----------
    scores, labels, rows, weights
        As :func:`onnxcal.maps.isotonic.fit`.
    l2 : float
        Unused (accepted so every solver takes the same arguments).
    bins : int
        M, the number of bins (fewer when ties leave no score between two
        equal-mass edges).
    strategy : {"quantile", "uniform"}
        Equal-mass bins (Zadrozny & Elkan 2001) or equal-width bins (Guo et
        al. 2017, sec. 4.1).

    References
    ----------
    Zadrozny & Elkan, ICML 2001, sec. 4; KDD 2002, sec. 5.
    """
    del l2
    if strategy not in STRATEGIES:
        raise OnnxcalError(f"unknown binning strategy {strategy!r}", f"use one of: {', '.join(STRATEGIES)}")
    if bins < 1:
        raise OnnxcalError(f"histogram binning needs at least one bin, got {bins}")
    per_class, passes = _lookup.fit_per_class(scores, labels, rows, weights, partial(binned, bins=bins,
                                                                                     strategy=strategy))
    params = {"edges": _lookup.as_lists([e for e, _ in per_class]), "values": _lookup.as_lists([v for _,
                                                                                                v in per_class])}
    return MapFit(METHOD, _lookup.kind_of_scores(scores.shape[1]), params, True, float(passes))


def tables(params: dict[str, Any]) -> dict[str, np.ndarray]:
    """The padded thresholds (K x M) and values (K x (M + 1)) the graph holds."""
    edges = [np.asarray(e, dtype=np.float64) for e in params["edges"]]
    values = [np.asarray(v, dtype=np.float64) for v in params["values"]]
    width = max(1, max(len(e) for e in edges))
    table = np.zeros((len(edges), width + 1))
    for k, v in enumerate(values):
        table[k, : len(v)] = v
        table[k, len(v) :] = v[-1]
    return {"thresholds": _lookup.padded(edges, width, _lookup.PAD), "values": table}


def build(
    x: str,
    dtype: str,
    num_classes: int,
    params: dict[str, Any],
    *,
    taken: Collection[str] = (),
    compute_dtype: str | None = None,
) -> Subgraph:
    """ONNX nodes computing the calibrated probabilities from the logits ``x`` (N x K).

    Softmax (Sigmoid for one logit), the bin index by Less against the
    padded edges, Cast, ReduceSum, one Gather, and the renormalisation for
    K > 1. Cost per row: K x M comparisons, M the most edges of any class.
    Opset >= 13.

    Runs in float64 by default (Casts in and out): a probability within
    rounding of an edge may fall in the neighbouring bin in a lower
    precision than the float64 reference's, and the output then differs by
    the jump between the two bins' values; float64 makes that as rare as
    in the reference itself.
    """
    params = check_parameters(params, num_classes)
    t = tables(params)
    g = GraphBuilder(x, dtype, f"onnxcal_{METHOD}", taken, compute_dtype or _lookup.COMPUTE_DTYPE)
    p = _lookup.start_probabilities(g, num_classes)
    index = _lookup.segment_index(g, p, t["thresholds"], inclusive=False)
    q = _lookup.gather(g, t["values"], index, "value")
    return _lookup.finish(g, q, num_classes)
