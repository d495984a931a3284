"""Matrix scaling: softmax(W z + b) on the logits, W a full K x K matrix.

The most general affine map of the logits before the softmax (Guo, Pleiss,
Sun, Weinberger, "On Calibration of Modern Neural Networks", ICML 2017,
sec. 4.2, "matrix scaling"); vector scaling is its diagonal case and
temperature scaling W = I / T, b = 0. It has K^2 + K parameters and, as Guo
et al. found, overfits with many classes unless regularised: onnxcal fits
it with the off-diagonal and intercept (ODIR) penalty that Kull et al.
proposed for it ("Beyond temperature scaling: Obtaining well-calibrated
multiclass probabilities with Dirichlet calibration", NeurIPS 2019, sec. 4,
"MS-ODIR"). The solver and its cost are in :mod:`onnxcal.maps._linear`.

It does not keep the argmax in general (W mixes the classes), nor is it
invariant to adding the same constant to every logit of a row (a softmax
is): W (z + c 1) = W z + c W 1 shifts the classes unequally unless the row
sums of W are equal. For logits that a model defines only up to such a
shift, prefer Dirichlet calibration (:mod:`onnxcal.maps.dirichlet`).

Parameters (JSON): ``{"W": [[K floats] x K], "b": [K floats]}``, the
calibrated logits being ``z @ W.T + b`` (row i of W gives class i).

Graph: MatMul(z, W^T) + Add(b) (+ Softmax), any opset >= 13. Folding into
a preceding linear layer z = A h + c: W z + b = (W A) h + (W c + b), i.e.
replace the layer's weight by W A and its bias by W c + b (docs/maths.md).
"""

from __future__ import annotations

from collections.abc import Collection
from typing import Any

import numpy as np

from . import _linear
from ._base import MapFit, Subgraph

METHOD = "matrix"
KINDS = _linear.KINDS
DEFAULT_L2 = _linear.DEFAULT_L2


def n_parameters(num_classes: int, params: dict[str, Any] | None = None) -> int:
    return num_classes * num_classes + num_classes


def apply(params: dict[str, Any], scores: np.ndarray) -> np.ndarray:
    """Calibrated probabilities softmax(z W^T + b), float64 (the NumPy reference).

    Examples
    --------
    >>> apply({"W": [[1.0, 0.0], [0.0, 1.0]], "b": [0.0, 0.0]}, np.array([[0.0, np.log(3.0)]]))
    array([[0.25, 0.75]])
    """
    return _linear.apply(params, scores, log_probs=False)


def calibrated_logits(params: dict[str, Any], scores: np.ndarray) -> np.ndarray:
    """z W^T + b, the softmax's input (float64)."""
    return _linear.calibrated_logits(params, scores, log_probs=False)


def check_parameters(params: dict[str, Any], num_classes: int | None = None, kind: str = "multiclass") -> dict[str,
                                                                                                               Any]:
    """Validate parameters read from a file; returns them as plain numbers.

    Raises
    ------
    OnnxcalError
        Naming the field: missing or extra fields, non-finite values, W not
        K x K, b not of length K.
    """
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
    """Fit W, b minimising the mean NLL plus the ODIR penalty.

    Parameters
    ----------
    scores : ndarray of shape (n, K)
        Logits (float32 or float64, may be a memory map), read in row chunks.
    labels : ndarray of shape (n,)
        Class indices in [0, K).
    rows : ndarray of int, optional
        Fit on these rows only (sorted indices).
    weights : ndarray, optional
        One weight per fitted row (bootstrap counts).
    l2 : float
        lambda, the weight of the off-diagonal penalty
        lambda / (K (K - 1)) * sum_{j != k} W_jk^2.
    l2_intercept : float, optional
        mu, the weight of mu / K * sum_k b_k^2 (default: ``l2``).
    start : dict, optional
        Parameters to start from (a previous fit); default W = I, b = 0.

    References
    ----------
    Guo et al., ICML 2017, sec. 4.2 (matrix scaling); Kull et al.,
    NeurIPS 2019, sec. 4 (ODIR).
    """
    return _linear.fit(
        scores, labels, method=METHOD, log_probs=False, rows=rows, weights=weights,
        l2=l2, l2_intercept=l2_intercept, start=start,
    )


def estimate_cost(n: int, num_classes: int) -> _linear.FitCost:
    """Expected time and memory of :func:`fit` on n rows (see ``_linear.estimate_cost``)."""
    return _linear.estimate_cost(n, num_classes, log_probs=False)


def slow_fit_warning(n: int, num_classes: int) -> str | None:
    """A warning line when the fit is expected to take minutes, else None."""
    return _linear.slow_fit_warning(n, num_classes, METHOD, log_probs=False)


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

    Parameters
    ----------
    x : str
        The logits tensor.
    dtype : {"float16", "float32", "float64"}
        Its element type; float16 runs in float32 (Casts in and out).
    num_classes : int
    params : dict
        As :func:`fit` returns (checked with :func:`check_parameters`).
    taken : collection of str
        Names in use in the host graph.
    compute_dtype : str, optional
    output : {"probabilities", "logits"}
        Softmax(W z + b), or W z + b to feed a Softmax the model already has.

    Returns
    -------
    Subgraph
        MatMul + Add (+ Softmax); opset >= 13.
    """
    params = check_parameters(params, num_classes)
    return _linear.build(
        x, dtype, num_classes, params, method=METHOD, log_probs=False,
        taken=taken, compute_dtype=compute_dtype, output=output,
    )


def fold(params: dict[str, Any], weight: np.ndarray, bias: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The weight and bias of a linear layer z = h A^T + c with the map folded in.

    ``weight`` is A (K x d, the layer's z = A h + c), ``bias`` is c (K).
    Returns (W A, W c + b), so that h (W A)^T + (W c + b) = W z + b.

    Examples
    --------
    >>> a, c = np.array([[1.0, 2.0], [0.0, 1.0]]), np.array([0.5, -0.5])
    >>> p = {"W": [[2.0, 0.0], [1.0, 1.0]], "b": [0.0, 1.0]}
    >>> wa, wc = fold(p, a, c)
    >>> h = np.array([[1.0, -1.0]])
    >>> bool(np.allclose(h @ wa.T + wc, calibrated_logits(p, h @ a.T + c)))
    True
    """
    w, b = _linear.arrays(params)
    return w @ np.asarray(weight, dtype=np.float64), w @ np.asarray(bias, dtype=np.float64) + b
