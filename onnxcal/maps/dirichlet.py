"""Dirichlet calibration: softmax(W log p + b) on the probabilities p = softmax(z).

Kull, Perello-Nieto, Kängsepp, Silva Filho, Song, Flach, "Beyond temperature
scaling: Obtaining well-calibrated multiclass probabilities with Dirichlet
calibration", NeurIPS 2019: the calibrated probabilities are those of a
model in which the class-conditional distributions of p are Dirichlet,
which comes out as a multinomial logistic regression on log p (sec. 3);
fitted with the off-diagonal and intercept regularisation ODIR (sec. 4):
lambda / (K (K - 1)) * sum_{j != k} W_jk^2 + mu / K * sum_k b_k^2 added to
the mean NLL. Solver and cost: :mod:`onnxcal.maps._linear`.

Unlike matrix scaling on the logits, it reads only the probabilities, so
adding a constant to every logit of a row changes nothing, and it applies
as it stands to a model that outputs probabilities (give it log p as the
logits: log_softmax(log p) = log p). It does not keep the argmax in
general. Note log p = z - logsumexp(z) 1, so W log p + b = W z + b -
logsumexp(z) W 1: when the row sums of W are equal the last term is the
same for every class and the map equals matrix scaling on the logits.

Parameters (JSON): ``{"W": [[K floats] x K], "b": [K floats]}``, the
calibrated logits being ``log_softmax(z) @ W.T + b``.

Graph: log-softmax(z) (TopK, Sub, Exp, ReduceSum, Log, Sub) then MatMul + Add (+ Softmax), any opset >= 13. The
log-softmax keeps it from folding into a preceding linear layer, except
when W's row sums are equal (then fold as matrix scaling; see
:func:`row_sums_equal`).
"""

from __future__ import annotations

from collections.abc import Collection
from typing import Any

import numpy as np

from . import _linear
from ._base import MapFit, Subgraph

METHOD = "dirichlet"
KINDS = _linear.KINDS
DEFAULT_L2 = _linear.DEFAULT_L2


def n_parameters(num_classes: int, params: dict[str, Any] | None = None) -> int:
    return num_classes * num_classes + num_classes


def apply(params: dict[str, Any], scores: np.ndarray) -> np.ndarray:
    """Calibrated probabilities softmax(log_softmax(z) W^T + b), float64 (the NumPy reference).

    Examples
    --------
    >>> apply({"W": [[2.0, 0.0], [0.0, 2.0]], "b": [0.0, 0.0]}, np.log(np.array([[0.25, 0.75]])))
    array([[0.1, 0.9]])
    """
    return _linear.apply(params, scores, log_probs=True)


def calibrated_logits(params: dict[str, Any], scores: np.ndarray) -> np.ndarray:
    """log_softmax(z) W^T + b, the softmax's input (float64)."""
    return _linear.calibrated_logits(params, scores, log_probs=True)


def check_parameters(params: dict[str, Any], num_classes: int | None = None, kind: str = "multiclass") -> dict[str,
                                                                                                               Any]:
    """Validate parameters read from a file (see :func:`onnxcal.maps.matrix.check_parameters`)."""
    return _linear.check(params, num_classes, METHOD, kind)


def fit(
    scores: np.ndarray,
    labels: np.ndarray,
    *,
    rows: np.ndarray | None = None,
    weights: np.ndarray | None = None,
    l2: float = DEFAULT_L2,
    l2_intercept: float | None = None,
    start: dict[str, Any] | None = None,
) -> MapFit:
    """Fit W, b minimising the mean NLL plus the ODIR penalty, on log_softmax(scores).

    Parameters as :func:`onnxcal.maps.matrix.fit`; ``scores`` are logits (or
    log-probabilities: the result is the same).

    References
    ----------
    Kull et al., NeurIPS 2019, sec. 3 (Dirichlet calibration as logistic
    regression on log p) and sec. 4 (ODIR).
    """
    return _linear.fit(
        scores, labels, method=METHOD, log_probs=True, rows=rows, weights=weights,
        l2=l2, l2_intercept=l2_intercept, start=start,
    )


def estimate_cost(n: int, num_classes: int) -> _linear.FitCost:
    """Expected time and memory of :func:`fit` on n rows (see ``_linear.estimate_cost``)."""
    return _linear.estimate_cost(n, num_classes, log_probs=True)


def slow_fit_warning(n: int, num_classes: int) -> str | None:
    """A warning line when the fit is expected to take minutes, else None."""
    return _linear.slow_fit_warning(n, num_classes, METHOD, log_probs=True)


def build(
    x: str,
    dtype: str,
    num_classes: int,
    params: dict[str, Any],
    *,
    taken: Collection[str] = (),
    compute_dtype: str | None = None,
    output: str = "probabilities",
) -> Subgraph:
    """ONNX nodes computing the map from the logits ``x`` (N x K, class axis last).

    log-softmax (spelled out, see ``GraphBuilder.log_softmax``) + MatMul + Add
    (+ Softmax, unless ``output="logits"``);
    opset >= 13; dtypes float16 (run in float32), float32, float64. Other
    arguments as :func:`onnxcal.maps.matrix.build`.
    """
    params = check_parameters(params, num_classes)
    return _linear.build(
        x, dtype, num_classes, params, method=METHOD, log_probs=True,
        taken=taken, compute_dtype=compute_dtype, output=output,
    )


def row_sums_equal(params: dict[str, Any], tol: float = 1e-12) -> bool:
    """True when W 1 is a multiple of 1: then the map equals matrix scaling of the logits."""
    w, _ = _linear.arrays(params)
    sums = w.sum(axis=1)
    return bool(np.ptp(sums) <= tol * max(1.0, float(np.abs(sums).max())))
