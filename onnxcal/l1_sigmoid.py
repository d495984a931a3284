"""L1-normalised sigmoids: the map, its negative log-likelihood and its beta-derivatives.

Some models give one sigmoid per class and divide them by their sum (a
``Div`` by their ``ReduceSum``/``ReduceL1``, or an ai.onnx.ml
``Normalizer(norm="L1")``): p_k = sigmoid(z_k) / sum_j sigmoid(z_j). onnxcal
calibrates them where the logits enter, so the model keeps its meaning:

    p_k(T) = sigmoid(z_k / T) / sum_j sigmoid(z_j / T)        (kind ``"sigmoid-l1"``)

(the Div by T goes before the Sigmoid; the normalisation stays as it is).
Since every sigmoid is positive, log p_k = l_k - logsumexp_j l_j with
l_k = log sigmoid(beta z_k) (beta = 1/T), i.e. p = softmax(l): the metrics
of ``metrics.evaluate`` apply to ``LogSigmoidRows`` unchanged.

The NLL of a row with label y, f(beta) = logsumexp_j l_j - l_y, has, with
a_k = dl_k/dbeta = (1 - sigmoid(beta z_k)) z_k and
c_k = -d2l_k/dbeta2 = sigmoid(beta z_k) (1 - sigmoid(beta z_k)) z_k^2,

    f'(beta)  = sum_k p_k a_k - a_y
    f''(beta) = Var_p[a] - sum_k p_k c_k + c_y.

Unlike softmax(beta z) this is not convex in beta (the middle term), so
``fit.l1`` searches a grid of T before its bounded 1-D minimisation.
log sigmoid is computed as -softplus(-x) (``scipy.special.log_expit``), so
no logit overflows. Pure NumPy/SciPy: no dependency on the rest of onnxcal
but the kind's name.
"""

from __future__ import annotations

import numpy as np
import scipy.special

from .scaling import SIGMOID_L1, Scaling, kind_of

__all__ = [
    "SIGMOID_L1", "LogSigmoidRows", "capture_kind", "identity", "nll_terms", "probabilities", "uses",
]


def uses(scaling: Scaling | float) -> bool:
    """True for a scaling of L1-normalised sigmoids."""
    return isinstance(scaling, Scaling) and scaling.kind == SIGMOID_L1


def identity(scaling: Scaling) -> Scaling | float:
    """The uncalibrated map of the same kind (T = 1): a Scaling for ``sigmoid-l1``, else 1.0."""
    return Scaling.of_temperature(1.0, SIGMOID_L1) if uses(scaling) else 1.0


def capture_kind(num_classes: int, labels_ndim: int, fit_as: str) -> str:
    """The kind of classifier of captured scores: ``sigmoid-l1`` when the capture says so
    (``CaptureMeta.fit_as``), else what the logits' width and the labels' rank give."""
    return SIGMOID_L1 if fit_as == SIGMOID_L1 else kind_of(num_classes, labels_ndim)


def probabilities(logits: np.ndarray, temperature: float = 1.0) -> np.ndarray:
    """The reference map L1(sigmoid(z / T)) over the last axis, float64.

    Computed as softmax(log sigmoid(z / T)), so rows whose sigmoids all
    underflow (z / T below about -745) still sum to 1.

    Examples
    --------
    >>> probabilities(np.array([[0.0, 0.0], [-2000.0, -1000.0]]))
    array([[0.5, 0.5],
           [0. , 1. ]])
    """
    log_s = -np.logaddexp(0.0, -np.asarray(logits, dtype=np.float64) / temperature)
    out: np.ndarray = np.exp(log_s - scipy.special.logsumexp(log_s, axis=-1, keepdims=True))
    return out


def nll_terms(z: np.ndarray, y: np.ndarray, beta: float, order: int = 1) -> tuple[np.ndarray, ...]:
    """Per-row NLL of L1(sigmoid(beta z)) for labels ``y``, and its beta-derivatives up to ``order``.

    ``z`` is one chunk of logits (n x K, float64), ``y`` class indices.
    Returns (f,), (f, f') or (f, f', f''), each of n values.
    """
    r = np.arange(len(y))
    s = beta * z
    log_s = -np.logaddexp(0.0, -s)  # log sigmoid(s) = -softplus(-s)
    lse = scipy.special.logsumexp(log_s, axis=1)
    f = lse - log_s[r, y]
    if order == 0:
        return (f,)
    p = np.exp(log_s - lse[:, None])
    one_minus = scipy.special.expit(-s)
    a = one_minus * z
    mean_a = np.einsum("ij,ij->i", p, a)
    g = mean_a - a[r, y]
    if order == 1:
        return f, g
    c = (1.0 - one_minus) * one_minus * z * z
    var_a = np.maximum(np.einsum("ij,ij->i", p, a * a) - mean_a * mean_a, 0.0)
    h = var_a - np.einsum("ij,ij->i", p, c) + c[r, y]
    return f, g, h


class LogSigmoidRows:
    """log sigmoid(z / T) of captured logits, computed block by block when read (float64).

    Reads like a 2-D array (``shape``, ``dtype``, ``len``, indexing by a
    slice or an array of rows) and is never made whole, so a memory-mapped
    capture stays on disk. softmax of its rows is L1(sigmoid(z / T)):
    ``metrics.evaluate`` and ``metrics.reliability`` score it at T = 1.
    """

    ndim = 2
    dtype = np.dtype(np.float64)

    def __init__(self, logits: np.ndarray, temperature: float) -> None:
        self.logits = logits
        self.beta = 1.0 / float(temperature)

    @property
    def shape(self) -> tuple[int, int]:
        return (len(self.logits), int(self.logits.shape[1]))

    def __len__(self) -> int:
        return len(self.logits)

    def __getitem__(self, key: slice | np.ndarray) -> np.ndarray:
        z = np.asarray(self.logits[key], dtype=np.float64)
        return -np.logaddexp(0.0, -self.beta * z)
