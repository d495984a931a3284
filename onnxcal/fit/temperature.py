"""Temperature scaling: Newton steps on beta = 1/T (see :mod:`onnxcal.fit`).

One T for a multiclass softmax, a binary sigmoid or all labels of a
multi-label classifier, or one T per label.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
from numpy.typing import ArrayLike

from ..metrics import iter_chunks, sigmoid
from ..scaling import Scaling, kind_of
from ..tempfit import fit_beta
from .options import T_MAX, T_MIN, FitResult, _bound_warning, _first, _result

_MAX_PASSES = 60
# Newton converges quadratically: once a step in log(beta) is below 1e-7 the
# remaining error after taking it is of order 1e-14 (relative).
_STEP_TOL = 1e-7
# Above this many rows, the first Newton steps run on every m-th row only.
_WARM_START_ROWS = 40_000
_WARM_START_SAMPLE = 10_000

_Sums = tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]
"""A pass's mean f, f', f'' at each beta and the count of unseparated rows (arrays)."""
_RowsPass = Callable[[np.ndarray, bool, np.ndarray | None, np.ndarray | None], _Sums]
"""``pass_fn(beta, first, rows, weights)``: a pass over those rows (first: count the unseparated ones)."""


# --------------------------------------------------------------------------
# Temperature: Newton on beta = 1/T


def _softmax_terms(z: np.ndarray, y: np.ndarray, beta: float) -> dict[str, np.ndarray]:
    """Per-sample NLL of softmax(beta z) and its first two derivatives in beta.

    ``z`` is left as it is: a float64 chunk of the caller's logits is a view
    of them (``metrics.iter_chunks``), so the shift by the row maximum makes
    a new array.
    """
    r = np.arange(len(y))
    z = z - z.max(axis=1, keepdims=True)
    zy = z[r, y]
    e = np.multiply(z, beta)
    np.exp(e, out=e)
    total = e.sum(axis=1)
    e *= z
    m1 = e.sum(axis=1) / total
    e *= z
    m2 = e.sum(axis=1) / total
    return {
        "f": np.log(total) - beta * zy,
        "g": m1 - zy,
        "h": np.maximum(m2 - m1 * m1, 0.0),
    }


def _softmax_pass(
    logits: np.ndarray, labels: np.ndarray, beta: np.ndarray, rows: np.ndarray | None = None,
    weights: np.ndarray | None = None, count_ties: bool = False,
) -> _Sums:
    """Sums of f, f', f'' at ``beta`` (arrays of one), total weight, unseparated rows."""
    f: float | np.ndarray = 0.0  # a number, or a 0-d array once a chunk is added
    g: float | np.ndarray = 0.0
    h: float | np.ndarray = 0.0
    total = 0.0
    unseparated = 0
    for z, y, w in iter_chunks(logits, labels, rows, weights):
        if count_ties:
            zy = z[np.arange(len(y)), y]
            tied = (z >= zy[:, None]).sum(axis=1) > 1
            unseparated += int(np.count_nonzero(tied if w is None else tied & (w > 0)))
        t = _softmax_terms(z, y, float(beta[0]))
        f += _dot(t["f"], w)
        g += _dot(t["g"], w)
        h += _dot(t["h"], w)
        total += len(y) if w is None else float(w.sum())
    return np.array([f / total]), np.array([g / total]), np.array([h / total]), np.array([unseparated])


def nll_derivatives(
    logits: np.ndarray, labels: np.ndarray, beta: float
) -> tuple[float, float, float]:
    """Mean NLL of softmax(beta * logits) and its first two derivatives in beta.

    One pass over ``logits`` in row chunks, float64 accumulation.

    Returns
    -------
    f, df, d2f : float
    """
    f, g, h, _ = _softmax_pass(logits, labels, np.array([float(beta)]))
    return float(f[0]), float(g[0]), float(h[0])


def _dot(x: np.ndarray, w: np.ndarray | None, axis: int = 0) -> np.ndarray:
    total: np.ndarray = x.sum(axis=axis) if w is None else np.tensordot(w, x, axes=([0], [axis]))
    return total


def _sigmoid_pass(
    logits: np.ndarray, labels: np.ndarray, beta: np.ndarray, rows: np.ndarray | None = None,
    weights: np.ndarray | None = None, count_ties: bool = False, shared: bool = True,
) -> _Sums:
    """Binary cross-entropy of sigmoid(beta * z) and its beta-derivatives.

    With ``shared`` one beta for every label (arrays of one), else one per
    label (arrays of K). ``count_ties`` counts entries whose sign disagrees
    with the label (the fit is bounded when there are none).
    """
    k = logits.shape[1]
    m = 1 if shared else k
    f, g, h, unsep = np.zeros(m), np.zeros(m), np.zeros(m), np.zeros(m, dtype=np.int64)
    total = 0.0
    b = beta[0] if shared else beta
    for z, y, w in iter_chunks(logits, labels, rows, weights):
        y = y.reshape(len(y), -1).astype(np.float64)
        s = z * b
        p = sigmoid(s)
        terms = (np.logaddexp(0.0, s) - y * s, (p - y) * z, p * (1.0 - p) * z * z)
        for acc, t in zip((f, g, h), terms, strict=True):
            col = _dot(t, w)
            acc += col.sum(keepdims=True) if shared else col
        if count_ties:
            wrong = (2.0 * y - 1.0) * z <= 0
            if w is not None:
                wrong &= (w > 0)[:, None]
            c = wrong.sum(axis=0)
            unsep += c.sum(keepdims=True) if shared else c
        total += len(y) if w is None else float(w.sum())
    per = total * (k if shared else 1)
    return f / per, g / per, h / per, unsep


def _newton(
    pass_fn: Callable[[np.ndarray, bool], _Sums], beta0: np.ndarray, b_min: float, b_max: float
) -> tuple[np.ndarray, int, np.ndarray]:
    """Newton on log(beta) for each element of ``beta0`` at once.

    ``pass_fn(beta, first)`` returns (f, f', f'', unseparated) arrays; on the
    first pass it counts samples whose true score is not the strict maximum.
    Returns beta, passes, converged (per element).
    """
    beta = np.clip(np.asarray(beta0, dtype=np.float64).copy(), b_min, b_max)
    lo = np.full_like(beta, b_min)
    hi = np.full_like(beta, b_max)
    done = np.zeros(beta.shape, dtype=bool)
    passes = 0
    while passes < _MAX_PASSES and not done.all():
        _, g, h, unseparated = pass_fn(beta, passes == 0)
        if passes == 0:
            # Every true-class score is the strict maximum: f' < 0 for every
            # beta, so the NLL keeps falling as T -> 0 and T_min is optimal.
            perfect = unseparated == 0
            beta[perfect] = b_max
            done |= perfect
        passes += 1
        done |= (g == 0) | ((beta <= b_min) & (g > 0)) | ((beta >= b_max) & (g < 0))
        act = ~done
        hi = np.where(act & (g > 0), beta, hi)
        lo = np.where(act & (g < 0), beta, lo)
        # Newton step in u = log(beta): df/du = beta f', d2f/du2 = beta^2 f'' + beta f'.
        curvature = beta * beta * h + beta * g
        with np.errstate(divide="ignore", invalid="ignore"):
            step = np.where(curvature > 0, -(beta * g) / curvature, -np.sign(g) * 50.0)
        new = beta * np.exp(np.clip(step, -50.0, 50.0))
        mid = np.sqrt(lo * hi)
        # Beyond the bracket: try the bound itself once, else bisect.
        new = np.where(new >= hi, np.where(hi == b_max, b_max, mid), new)
        new = np.where(new <= lo, np.where(lo == b_min, b_min, mid), new)
        small = np.abs(np.log(new / beta)) <= _STEP_TOL
        beta = np.where(act, new, beta)
        done |= act & small
    return beta, passes, done


def _solve_beta(
    pass_fn: _RowsPass, n_rows: int, rows: np.ndarray | None, weights: np.ndarray | None,
    start: np.ndarray | None, size: int,
) -> tuple[np.ndarray, float, bool]:
    """Newton from ``start``; on a large set, warm-started on a strided subsample."""
    beta0 = np.ones(size) if start is None else np.broadcast_to(start, (size,)).astype(float)
    b_min, b_max = 1.0 / T_MAX, 1.0 / T_MIN
    passes = 0.0
    if start is None and n_rows > _WARM_START_ROWS:
        stride = n_rows // _WARM_START_SAMPLE
        sub = (np.arange(n_rows) if rows is None else rows)[::stride]
        sub_w = None if weights is None else weights[::stride]
        beta0, p, _ = _newton(lambda b, first: pass_fn(b, first, sub, sub_w), beta0, b_min, b_max)
        passes += p * len(sub) / n_rows
        beta0 = np.clip(beta0, b_min * 1.0001, b_max / 1.0001)  # let the full data decide bounds
    beta, p, done = _newton(lambda b, first: pass_fn(b, first, rows, weights), beta0, b_min, b_max)
    return beta, passes + p, bool(done.all())


def _temperature_result(
    beta: np.ndarray, passes: float, converged: bool, kind: str, shared: bool = True
) -> FitResult:
    t = 1.0 / beta
    at_bound = (beta <= 1.0 / T_MAX) | (beta >= 1.0 / T_MIN)
    notes = []
    if at_bound.any():
        which = "" if shared else f" for labels {_first(np.flatnonzero(at_bound))}"
        notes = [_bound_warning(float(t[at_bound][0])) + which]
    scaling = Scaling.of_temperature(float(t[0]) if shared else t, kind)
    return _result(scaling, passes, converged, notes)


def fit_temperature(
    logits: np.ndarray,
    labels: np.ndarray,
    *,
    rows: np.ndarray | None = None,
    weights: np.ndarray | None = None,
    start: float | None = None,
    threads: int | None = None,
) -> FitResult:
    """Fit T minimising the mean NLL of softmax(logits / T).

    Parameters
    ----------
    logits : ndarray of shape (n, k)
        Class scores (float32 or float64; may be a memory map).
    labels : ndarray of shape (n,)
        Integer class indices in [0, k).
    rows : ndarray of int, optional
        Fit on these rows only (sorted indices).
    weights : ndarray, optional
        One weight per fitted row (bootstrap counts).
    start : float, optional
        Starting T (e.g. the fit on all samples, for a bootstrap replicate).
    threads : int, optional
        Threads for the passes over the logits (see
        :func:`onnxcal.sweep.default_threads`); the result does not depend on it.

    Returns
    -------
    FitResult
        T is bounded to [T_MIN, T_MAX]; an optimum outside is returned as the
        bound, with ``on_bound`` set and a warning that says why.

    References
    ----------
    Guo et al., "On Calibration of Modern Neural Networks", ICML 2017, sec. 4.2.

    Examples
    --------
    >>> z = np.array([[2.0, 0.0], [0.0, 2.0], [2.0, 0.0], [0.0, 2.0]])
    >>> round(fit_temperature(z, np.array([0, 1, 1, 0])).temperature, 1)
    100.0
    """
    done = fit_beta(
        logits, labels, rows, weights, None if start is None else 1.0 / start, (1.0 / T_MAX, 1.0 / T_MIN),
        threads,
    )
    return _temperature_result(np.array([done.beta]), done.passes, done.converged, "multiclass")


def fit_sigmoid_temperature(
    logits: np.ndarray,
    labels: np.ndarray,
    *,
    per_label: bool = False,
    rows: np.ndarray | None = None,
    weights: np.ndarray | None = None,
    start: ArrayLike | None = None,
) -> FitResult:
    """Fit T (or one T per label) minimising the binary cross-entropy of sigmoid(z / T).

    Parameters
    ----------
    logits : ndarray of shape (n, k)
        One logit (binary, k = 1) or one per label.
    labels : ndarray of shape (n,) or (n, k)
        0/1 targets.
    per_label : bool
        One T per label instead of one shared by all.

    References
    ----------
    Guo et al. 2017, sec. 4.2 (temperature scaling); the binary form is
    Platt scaling with the bias fixed at 0 (Platt 1999).

    Examples
    --------
    >>> z = np.array([[2.0], [2.0], [-2.0], [-2.0]])
    >>> round(fit_sigmoid_temperature(z, np.array([1, 0, 0, 0])).temperature, 2)
    1.82
    """
    n_rows = len(logits) if rows is None else len(rows)
    kind = kind_of(logits.shape[1], np.ndim(labels))
    size = logits.shape[1] if per_label else 1

    def pass_fn(beta: np.ndarray, first: bool, r: np.ndarray | None, w: np.ndarray | None) -> _Sums:
        return _sigmoid_pass(logits, labels, beta, r, w, count_ties=first, shared=not per_label)

    beta0 = None if start is None else 1.0 / np.asarray(start, dtype=np.float64)
    beta, passes, converged = _solve_beta(pass_fn, n_rows, rows, weights, beta0, size)
    return _temperature_result(beta, passes, converged, kind, shared=not per_label)
