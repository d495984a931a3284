"""The full linear maps before a softmax: matrix scaling and Dirichlet calibration.

Both compute softmax(W x + b) with W a K x K matrix and b a K-vector; the
features x are the logits z (matrix scaling) or the log-probabilities
log softmax(z) (Dirichlet calibration). :mod:`onnxcal.maps.matrix` and
:mod:`onnxcal.maps.dirichlet` are the public faces; this module holds the
shared solver, reference, checks and graph builder.

The solver minimises the mean NLL plus the ODIR penalty of Kull et al.
(2019, sec. 4):

    L(W, b) = mean_i [ logsumexp(W x_i + b) - (W x_i + b)_{y_i} ]
              + lambda / (K (K - 1)) * sum_{j != k} W_jk^2  +  mu / K * sum_k b_k^2

which is convex in (W, b) (the NLL of a softmax of an affine map, plus
convex penalties). Gradient, in one pass over row chunks:
dL/dW = mean_i (p_i - e_{y_i}) x_i^T + 2 lambda / (K (K - 1)) offdiag(W),
dL/db = mean_i (p_i - e_{y_i}) + 2 mu b / K. L-BFGS-B (scipy) on the
flattened (W, b), W in units of each feature's spread and b taken at the features' mean
(a change of variables that conditions the problem; see ``fit``).
One pass costs about 4 n K^2 floating-point operations (two n x K x K matrix
products); :func:`estimate_cost` turns that into seconds on this machine.
"""

from __future__ import annotations

import time
from collections.abc import Collection
from dataclasses import dataclass
from typing import Any, cast

import numpy as np

from ..errors import OnnxcalError
from ._base import (
    CHUNK_ELEMENTS,
    GraphBuilder,
    MapFit,
    Subgraph,
    check_kind,
    chunks,
    field_array,
    log_softmax,
    plain,
    require_fields,
    softmax,
    total_weight,
)

KINDS = ("multiclass",)
# lambda = mu. On the benchmark's calibration sets (44 to 450 rows, 3 to 10
# classes) the held-out NLL fell as lambda rose from 1e-4 to 100 and changed
# little beyond (docs/benchmarks.md). The penalty is added to the *mean* NLL,
# so it weighs as much at any n: with thousands of rows per class a smaller
# lambda lets the off-diagonal terms speak.
DEFAULT_L2 = 100.0
# The solver's budget of L-BFGS-B evaluations (one pass each). On nearly
# separable sets the NLL keeps falling slowly along the unpenalised diagonal
# and the fit stops here (an early stop, reported in the notes); converged
# fits on the benchmark took 6 to 850 passes.
MAX_PASSES = 500
# Passes assumed by estimate_cost: the budget, as a bound.
TYPICAL_PASSES = MAX_PASSES
SLOW_SECONDS = 120.0  # above this estimate, warn the user before fitting
_MAXCOR = 10  # L-BFGS memory: pairs of K^2 + K vectors it keeps


def features(scores: np.ndarray, log_probs: bool) -> np.ndarray:
    """x: the logits themselves, or their log-softmax (float64)."""
    z = np.asarray(scores, dtype=np.float64)
    return log_softmax(z, axis=-1) if log_probs else z


def arrays(params: dict[str, Any]) -> tuple[np.ndarray, np.ndarray]:
    return np.asarray(params["W"], dtype=np.float64), np.asarray(params["b"], dtype=np.float64)


def calibrated_logits(params: dict[str, Any], scores: np.ndarray, log_probs: bool) -> np.ndarray:
    """W x + b for every row (float64), the softmax's input."""
    w, b = arrays(params)
    return cast(np.ndarray, features(scores, log_probs) @ w.T + b)


def apply(params: dict[str, Any], scores: np.ndarray, log_probs: bool) -> np.ndarray:
    return softmax(calibrated_logits(params, scores, log_probs), axis=-1)


def check(params: dict[str, Any], num_classes: int | None, method: str, kind: str = "multiclass") -> dict[str, Any]:
    check_kind(kind, KINDS, method)
    require_fields(params, ("W", "b"), method)
    w = field_array(params, "W", method, ndim=2, shape=(num_classes, num_classes))
    if w.shape[0] != w.shape[1] or w.shape[0] < 2:
        raise OnnxcalError(
            f"{method} parameter 'W' must be a square K x K matrix with K >= 2, got {w.shape[0]} x {w.shape[1]}",
            "fit it on scores from this model",
        )
    field_array(params, "b", method, ndim=1, shape=(w.shape[0],))
    return {"W": plain(w), "b": plain(params["b"])}


# --------------------------------------------------------------------------
# Solver


def _pass(
    scores: np.ndarray,
    labels: np.ndarray,
    w: np.ndarray,
    bias: np.ndarray,
    rows: np.ndarray | None,
    weights: np.ndarray | None,
    log_probs: bool,
    centre: np.ndarray | None = None,
) -> tuple[float, np.ndarray, np.ndarray]:
    """Mean NLL of softmax(W (x - centre) + b) and its gradients in W and b (one pass)."""
    k = w.shape[0]
    f, gw, gb, total = 0.0, np.zeros((k, k)), np.zeros(k), 0.0
    for z, y, wt in chunks(scores, labels, rows, weights):
        x = log_softmax(z) if log_probs else z
        if centre is not None:
            x = x - centre  # not in place: z may be a view of the caller's scores
        s = x @ w.T
        s += bias
        s -= s.max(axis=1, keepdims=True)
        e = np.exp(s)
        tot = e.sum(axis=1)
        r = np.arange(len(y))
        nll = np.log(tot) - s[r, y]
        f += float(nll.sum() if wt is None else nll @ wt)
        e /= tot[:, None]
        e[r, y] -= 1.0  # p - onehot(y)
        if wt is not None:
            e *= wt[:, None]
        gw += e.T @ x
        gb += e.sum(axis=0)
        total += total_weight(len(y), wt)
    return f / total, gw / total, gb / total


def _feature_moments(scores: np.ndarray, rows: np.ndarray | None, log_probs: bool) -> tuple[np.ndarray, np.ndarray]:
    """Per-feature mean and standard deviation on up to ~10 000 evenly spaced rows."""
    idx = np.arange(len(scores)) if rows is None else rows
    sample = features(scores[idx[:: max(1, len(idx) // 10_000)]], log_probs)
    sd = sample.std(axis=0)
    return sample.mean(axis=0), np.where(sd > 0, sd, 1.0)


@dataclass(frozen=True)
class Penalty:
    """ODIR weights: lambda on the off-diagonal of W, mu on b (Kull et al. 2019)."""

    off_diagonal: float
    intercept: float

    def value_and_grad(self, w: np.ndarray, b: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
        k = w.shape[0]
        off = w - np.diag(np.diag(w))
        lam = self.off_diagonal / (k * (k - 1))
        mu = self.intercept / k
        return lam * float(np.sum(off * off)) + mu * float(b @ b), 2.0 * lam * off, 2.0 * mu * b


def fit(
    scores: np.ndarray,
    labels: np.ndarray,
    *,
    method: str,
    log_probs: bool,
    rows: np.ndarray | None = None,
    weights: np.ndarray | None = None,
    l2: float = DEFAULT_L2,
    l2_intercept: float | None = None,
    start: dict[str, Any] | None = None,
    max_passes: int = MAX_PASSES,
) -> MapFit:
    import scipy.optimize  # here, not at import: scipy takes ~0.5 s and inspect needs none
    k = scores.shape[1]
    penalty = Penalty(float(l2), float(l2 if l2_intercept is None else l2_intercept))
    # A change of variables, not of the objective: the solver works on
    # U = W diag(sd) and b' = b + W m (so W x + b = U diag(1/sd) (x - m) + b'),
    # which makes the problem far better conditioned when the features have
    # large means and unequal spreads (log-probabilities near -27 for clipped
    # zeros, decision values of different scales); the penalty stays on W, b.
    m, sd = _feature_moments(scores, rows, log_probs)
    passes = 0

    def unpack(theta: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        w = theta[: k * k].reshape(k, k) / sd
        b_centred = theta[k * k :]
        return w, b_centred, b_centred - w @ m

    def objective(theta: np.ndarray) -> tuple[float, np.ndarray]:
        nonlocal passes
        passes += 1
        w, b_centred, b = unpack(theta)
        f, gw, gb = _pass(scores, labels, w, b_centred, rows, weights, log_probs, centre=m)
        pf, pw, pb = penalty.value_and_grad(w, b)
        gw_total = gw + pw - np.outer(pb, m)  # b = b' - W m
        return f + pf, np.concatenate([(gw_total / sd).ravel(), gb + pb])

    w0, b0 = (np.eye(k), np.zeros(k)) if start is None else arrays(start)
    theta0 = np.concatenate([(w0 * sd).ravel(), b0 + w0 @ m])
    res = scipy.optimize.minimize(
        objective, theta0, jac=True, method="L-BFGS-B",
        options={"maxiter": max_passes, "maxfun": max_passes, "ftol": 1e-12, "gtol": 1e-7, "maxcor": _MAXCOR},
    )
    w, _, b = unpack(res.x)
    b -= b.mean()  # softmax(s + const) = softmax(s); with mu > 0 the optimum has mean 0 already
    grad = float(np.max(np.abs(res.jac)))
    converged = bool(res.success) or grad < 1e-6
    notes = [] if converged else [
        f"the {method} fit stopped after {passes} passes without converging (largest gradient "
        f"{grad:.2g}); the data may be separable: raise --l2"
    ]
    return MapFit(method, "multiclass", {"W": plain(w), "b": plain(b)}, converged, float(passes), tuple(notes))


# --------------------------------------------------------------------------
# Cost of a fit


@dataclass(frozen=True)
class FitCost:
    """What fitting a K x K map to n rows is expected to cost on this machine.

    Attributes
    ----------
    seconds : float
        ``passes`` times the measured time of one pass.
    seconds_per_pass : float
    passes : int
        Assumed passes (L-BFGS-B evaluations): :data:`TYPICAL_PASSES`.
    memory_bytes : int
        The solver's own arrays: L-BFGS's history (2 x maxcor vectors of
        K^2 + K float64) plus the gradient and a chunk's temporaries.
    """

    seconds: float
    seconds_per_pass: float
    passes: int
    memory_bytes: int

    @property
    def slow(self) -> bool:
        return self.seconds > SLOW_SECONDS


def estimate_cost(n: int, k: int, *, log_probs: bool = False, passes: int = TYPICAL_PASSES) -> FitCost:
    """Time and memory of a matrix or Dirichlet fit of n rows x K classes.

    Times one pass over a small random block of the same width (a few
    milliseconds to a second), scales it to n rows, and multiplies by the
    typical number of passes. A caller can warn when ``cost.slow`` (the fit
    would take minutes), e.g. above K ~ 1000 with 50 000 rows.
    """
    rng = np.random.default_rng(0)
    probe_rows = int(min(max(n, 1), max(64, (1 << 21) // k)))
    z = rng.normal(size=(probe_rows, k))
    y = rng.integers(0, k, size=probe_rows)
    w, b = np.eye(k), np.zeros(k)
    _pass(z[:8], y[:8], w, b, None, None, log_probs)  # warm up BLAS threads
    t0 = time.perf_counter()
    _pass(z, y, w, b, None, None, log_probs)
    per_pass = (time.perf_counter() - t0) * n / probe_rows
    memory = 8 * ((2 * _MAXCOR + 4) * (k * k + k) + 4 * max(CHUNK_ELEMENTS, k))
    return FitCost(per_pass * passes, per_pass, passes, int(memory))


def slow_fit_warning(n: int, k: int, method: str, *, log_probs: bool = False) -> str | None:
    """A warning line when a fit is expected to take minutes, else None."""
    cost = estimate_cost(n, k, log_probs=log_probs)
    if not cost.slow:
        return None
    return (
        f"{method} calibration fits {k * k + k} parameters; on {n} rows x {k} classes it is expected "
        f"to take about {cost.seconds / 60:.0f} minutes ({cost.passes} passes of {cost.seconds_per_pass:.2g} s) "
        f"and {cost.memory_bytes / 2**20:.0f} MiB; consider vector or temperature scaling"
    )


# --------------------------------------------------------------------------
# Graph


def build(
    x: str,
    dtype: str,
    num_classes: int,
    params: dict[str, Any],
    *,
    method: str,
    log_probs: bool,
    taken: Collection[str] = (),
    compute_dtype: str | None = None,
    output: str = "probabilities",
) -> Subgraph:
    w, b = arrays(params)
    g = GraphBuilder(x, dtype, f"onnxcal_{method}", taken, compute_dtype)
    feats = g.start()
    if log_probs:
        feats = g.log_softmax(feats)
    s = g.node("MatMul", [feats, g.const("weight_t", w.T)], "matmul")
    s = g.node("Add", [s, g.const("bias", b)], "logits")
    if output == "probabilities":
        s = g.node("Softmax", [s], "probabilities", axis=-1)
    elif output != "logits":
        raise ValueError(f"output must be 'probabilities' or 'logits', got {output!r}")
    return g.finish(s)
