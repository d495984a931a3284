"""Fit calibration maps to captured logits, and the summary FIT.json holds.

Solvers (each reads the logits in float32 row chunks and accumulates in
float64; see :func:`onnxcal.metrics.iter_chunks`):

* temperature, one T (multiclass softmax, binary sigmoid, multi-label with
  one T shared by all labels) or one T per label: Newton steps on
  beta = 1/T in log coordinates. The mean NLL
  f(beta) = mean_i [ logsumexp_k(beta z_ik) - beta z_iy ] is convex in beta:
  f'(beta) = mean_i (E_p[z_i] - z_iy), f''(beta) = mean_i Var_p[z_i] >= 0
  with p = softmax(beta z_i), and both come out of the same pass as f (the
  binary cross-entropy of sigmoid(beta z) is convex in beta the same way).
  Since f is convex the sign of f' keeps a bracket; a step that leaves it,
  or a non-positive curvature in u = log beta, is replaced by bisection of
  the bracket in log space. On a large set the first steps are taken on a
  strided subsample, so only the last two or three passes read every row.
* vector scaling, softmax(w * z + b) with per-class w, b, and Platt
  scaling, sigmoid(a z + b): the NLL is convex in (w, b) (a convex function
  of an affine map); L-BFGS-B (scipy) with the analytic gradient, optional
  L2 penalty toward w = 1, b = 0.

References
----------
Guo, Pleiss, Sun, Weinberger, "On Calibration of Modern Neural Networks",
ICML 2017, sec. 4.2 (temperature and vector scaling).
Platt, "Probabilistic Outputs for Support Vector Machines and Comparisons to
Regularized Likelihood Methods", Advances in Large Margin Classifiers, 1999.
Byrd, Lu, Nocedal, Zhu, "A Limited Memory Algorithm for Bound Constrained
Optimization", SIAM J. Sci. Comput. 16(5), 1995 (L-BFGS-B).
"""

from __future__ import annotations

import json
import os
from warnings import warn
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np
import scipy.optimize

from . import __version__, resample
from ._files import atomic_write_bytes, require_file
from .errors import OnnxcalError, OnnxcalWarning, first_line
from .metrics import DEFAULT_BINS, Metrics, evaluate, iter_chunks, sigmoid
from .passes import fit_and_score
from .auto import fit_all
from .choose import Choice, choice_from_dict
from .fit_maps import fit_map, slow_fit_warning
from .maps import LOOKUP_METHODS
from .scaling import MAP_METHODS, METHODS_FOR, MULTILABEL_MODES, Scaling, check_scaling, is_far_from_one, kind_of
from .sweep import one_blas_thread
from .tempfit import fit_beta

T_MIN = 0.01
T_MAX = 100.0
B_MAX = 100.0  # bound on the biases of vector and Platt scaling
_MAX_PASSES = 60
# Newton converges quadratically: once a step in log(beta) is below 1e-7 the
# remaining error after taking it is of order 1e-14 (relative).
_STEP_TOL = 1e-7
# Above this many rows, the first Newton steps run on every m-th row only.
_WARM_START_ROWS = 40_000
_WARM_START_SAMPLE = 10_000
MIN_PER_CLASS = 20
AUTO = "auto"  # --method auto: every applicable method, one chosen (onnxcal.auto, onnxcal.choose)
FORMAT = 2


@dataclass(frozen=True)
class FitOptions:
    """How to fit and evaluate (the ``fit`` command's options).

    Attributes
    ----------
    method : str
        ``"temperature"`` (default), ``"vector"`` (multiclass) or ``"platt"`` (binary).
    multilabel : str or None
        ``"shared"`` or ``"per-label"`` temperatures for an N x K 0/1 label
        array; None means ``"shared"`` when the labels are multi-label.
    l2 : float
        Weight of the penalty l2 * (sum (w - 1)^2 + sum b^2) added to the
        mean NLL (vector and Platt scaling).
    holdout : float
        Fraction of the samples held out (stratified) to score the fit on.
    seed : int
        Seed of the split and the bootstrap.
    bootstrap : int
        Bootstrap replicates for the intervals (0: none).
    n_bins : int
        Bins of the ECEs.
    """

    method: str = "temperature"
    multilabel: str | None = None
    l2: float = 0.0
    holdout: float = 0.25
    seed: int = 0
    bootstrap: int = 200
    n_bins: int = DEFAULT_BINS

    def to_dict(self) -> dict:
        return asdict(self)


@dataclass(frozen=True)
class FitResult:
    """Outcome of one fit.

    Attributes
    ----------
    scaling : Scaling
        The fitted map (method, parameters, kind).
    passes : float
        Passes over the logits the solver made (a pass over a subsample
        counts as its fraction of the rows).
    converged : bool
        False when the solver's budget ran out.
    on_bound : bool
        True when a parameter lies on (or beyond) its bound.
    warnings : tuple of str
        Human-readable notes on the fit (bound hit and why, T far from 1, ...).
    """

    scaling: Scaling
    passes: float
    converged: bool
    on_bound: bool
    warnings: tuple[str, ...] = ()

    @property
    def temperature(self) -> float | None:
        return self.scaling.temperature

    @property
    def method(self) -> str:
        return self.scaling.method

    def to_dict(self) -> dict:
        return {
            "passes": self.passes,
            "converged": self.converged,
            "on_bound": self.on_bound,
            "warnings": list(self.warnings),
        }


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


def _softmax_pass(logits, labels, beta, rows=None, weights=None, count_ties=False):
    """Sums of f, f', f'' at ``beta`` (arrays of one), total weight, unseparated rows."""
    f = g = h = total = 0.0
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


def _dot(x: np.ndarray, w: np.ndarray | None, axis: int = 0):
    return x.sum(axis=axis) if w is None else np.tensordot(w, x, axes=([0], [axis]))


def _sigmoid_pass(logits, labels, beta, rows=None, weights=None, count_ties=False, shared=True):
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
        for acc, t in zip((f, g, h), terms):
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


def _newton(pass_fn, beta0: np.ndarray, b_min: float, b_max: float):
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


def _solve_beta(pass_fn, n_rows: int, rows, weights, start, size: int):
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


def _bound_warning(temperature: float) -> str:
    if temperature <= T_MIN:
        return (
            f"the optimum lies at the lower bound T = {T_MIN:g}: the model is right on "
            "(nearly) every sample of this set, so the likelihood keeps rising as T "
            "shrinks; use a larger or harder validation set"
        )
    return (
        f"the optimum lies at the upper bound T = {T_MAX:g}: the scores carry almost "
        "no information about the labels on this set; check that the labels match "
        "the model's classes"
    )


def _far_warning(scaling: Scaling) -> str:
    if scaling.temperature is not None:
        return (
            f"T = {scaling.temperature:.3g} is far from 1: check that the chosen output "
            "really holds logits and not probabilities"
        )
    t = 1.0 / np.atleast_1d(scaling.scale())
    return (
        f"the fitted scales amount to temperatures from {t.min():.3g} to {t.max():.3g}, "
        "some far from 1 (outside 0.5 to 5): check that the chosen output really holds "
        "logits and not probabilities"
    )


def _result(scaling: Scaling, passes: float, converged: bool, bound_notes: list[str]) -> FitResult:
    notes = list(bound_notes)
    if not notes and is_far_from_one(scaling):
        notes.append(_far_warning(scaling))
    if not converged:
        notes.append(f"the solver stopped after {passes:.3g} passes without converging")
    return FitResult(scaling, float(passes), bool(converged), bool(bound_notes), tuple(notes))


def _temperature_result(beta: np.ndarray, passes, converged, kind, shared=True) -> FitResult:
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
    start=None,
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

    def pass_fn(beta, first, r, w):
        return _sigmoid_pass(logits, labels, beta, r, w, count_ties=first, shared=not per_label)

    beta0 = None if start is None else 1.0 / np.asarray(start, dtype=np.float64)
    beta, passes, converged = _solve_beta(pass_fn, n_rows, rows, weights, beta0, size)
    return _temperature_result(beta, passes, converged, kind, shared=not per_label)


# --------------------------------------------------------------------------
# Vector and Platt scaling: L-BFGS-B on (w, b)


def _affine_pass(logits, labels, w, b, rows, weights, softmax: bool):
    """Mean NLL of act(w * z + b) and its gradient in w and b."""
    k = logits.shape[1]
    f, gw, gb, total = 0.0, np.zeros(k), np.zeros(k), 0.0
    for z, y, wt in iter_chunks(logits, labels, rows, weights):
        s = z * w + b
        if softmax:
            r = np.arange(len(y))
            smax = s.max(axis=1, keepdims=True)
            s -= smax
            e = np.exp(s)
            tot = e.sum(axis=1)
            f += _dot(np.log(tot) - s[r, y], wt)
            resid = e
            resid /= tot[:, None]
            resid[r, y] -= 1.0  # p - onehot(y)
        else:
            yv = y.reshape(len(y), -1).astype(np.float64)
            f += _dot((np.logaddexp(0.0, s) - yv * s).sum(axis=1), wt)
            resid = sigmoid(s) - yv
        gb += _dot(resid, wt)
        resid *= z
        gw += _dot(resid, wt)
        total += len(y) if wt is None else float(wt.sum())
    return f / total, gw / total, gb / total


def _logit_scale(logits, rows) -> float:
    """RMS of the logits on up to ~10 000 evenly spaced rows (to precondition w)."""
    idx = np.arange(len(logits)) if rows is None else rows
    sample = np.asarray(logits[idx[:: max(1, len(idx) // 10_000)]], dtype=np.float64)
    return float(np.sqrt(np.mean(sample * sample))) or 1.0


def _fit_affine(logits, labels, method, l2, rows, weights, start, kind) -> FitResult:
    k = logits.shape[1]
    softmax = method == "vector"
    evals = 0
    # Optimise u = c * w with c the logits' RMS, so a unit step in u moves the
    # scaled logits as much as a unit step in b (L-BFGS starts from an identity
    # Hessian; without this it needs many more passes on large logits).
    c = _logit_scale(logits, rows)

    def objective(x):
        nonlocal evals
        evals += 1
        w, b = x[:k] / c, x[k:]
        f, gw, gb = _affine_pass(logits, labels, w, b, rows, weights, softmax)
        f += l2 * (np.sum((w - 1.0) ** 2) + np.sum(b * b))
        return f, np.concatenate([(gw + 2.0 * l2 * (w - 1.0)) / c, gb + 2.0 * l2 * b])

    if start is None:
        x0 = np.concatenate([np.full(k, c), np.zeros(k)])
    else:
        a = start.arrays()
        x0 = np.concatenate([c * np.broadcast_to(a["w"], (k,)), np.broadcast_to(a["b"], (k,))])
    bounds = [(c / T_MAX, c / T_MIN)] * k + [(-B_MAX, B_MAX)] * k
    res = scipy.optimize.minimize(
        objective, x0, jac=True, method="L-BFGS-B", bounds=bounds,
        options={"maxiter": 2000, "maxfun": 4000, "ftol": 1e-12, "gtol": 1e-8, "maxcor": 20},
    )
    res.x[:k] /= c
    res.jac[:k] *= c
    w, b = res.x[:k], res.x[k:].copy()
    if softmax:
        # softmax(s + c) = softmax(s): report the biases with mean 0 (the L2
        # optimum has it already, as the NLL is flat along b + c).
        b -= b.mean()
    notes = _affine_bound_notes(w, b, labels, softmax)
    if not notes and _unseparated(logits, labels, rows, weights, softmax) == 0:
        notes.append(
            "the model is right on every sample of this set, so the likelihood keeps rising "
            "as the scales grow and the fit stopped at an arbitrary large scale; use a larger "
            "or harder validation set"
        )
    scaling = Scaling.of_affine(w if softmax else w[0], b if softmax else b[0], method, kind)
    n_rows = len(logits) if rows is None else len(rows)
    # L-BFGS-B stops on a small relative change of f or of the projected
    # gradient; "abnormal" line-search ends at the optimum count as converged
    # when the projected gradient is small.
    bounds = [(1.0 / T_MAX, 1.0 / T_MIN)] * k + [(-B_MAX, B_MAX)] * k
    converged = bool(res.success) or float(np.max(np.abs(_projected(res.jac, res.x, bounds)))) < 1e-6
    return _result(scaling, evals * (1.0 if rows is None else len(rows) / max(n_rows, 1)), converged, notes)


def _unseparated(logits, labels, rows, weights, softmax: bool) -> int:
    """Rows (entries) whose true score is not strictly on the right side."""
    count = 0
    for z, y, w in iter_chunks(logits, labels, rows, weights):
        if softmax:
            zy = z[np.arange(len(y)), y]
            bad = (z >= zy[:, None]).sum(axis=1) > 1
        else:
            bad = ((2.0 * y.reshape(len(y), -1) - 1.0) * z <= 0).any(axis=1)
        count += int(np.count_nonzero(bad if w is None else bad & (w > 0)))
    return count


def _projected(grad, x, bounds):
    lo = np.array([b[0] for b in bounds])
    hi = np.array([b[1] for b in bounds])
    g = np.asarray(grad, dtype=np.float64).copy()
    g[(x <= lo) & (g > 0)] = 0.0
    g[(x >= hi) & (g < 0)] = 0.0
    return g


def _first(idx) -> str:
    idx = [int(i) for i in idx]
    return ", ".join(map(str, idx[:5])) + (", ..." if len(idx) > 5 else "")


def _affine_bound_notes(w, b, labels, softmax) -> list[str]:
    notes = []
    high = np.flatnonzero(w >= (1.0 / T_MIN) * (1 - 1e-9))
    low = np.flatnonzero(w <= (1.0 / T_MAX) * (1 + 1e-9))
    edge = np.flatnonzero(np.abs(b) >= B_MAX * (1 - 1e-9))
    which = "classes " if softmax else ""
    if high.size:
        notes.append(
            f"the scale w of {which}{_first(high) if softmax else 'the logit'} lies at its upper bound "
            f"{1 / T_MIN:g}: the model separates them (nearly) perfectly on this set, so the "
            "likelihood keeps rising as the scale grows; use a larger or harder validation set"
        )
    if low.size:
        notes.append(
            f"the scale w of {which}{_first(low) if softmax else 'the logit'} lies at its lower bound "
            f"{1 / T_MAX:g}: the scores carry almost no information about the labels; check "
            "that the labels match the model's classes"
        )
    if edge.size:
        notes.append(
            f"the bias b of {which}{_first(edge) if softmax else 'the logit'} lies at its bound "
            f"±{B_MAX:g}: a class that is absent (or always present) in the labels drives it "
            "there; add samples of every class or use --l2"
        )
    return notes


# --------------------------------------------------------------------------
# Dispatch and warnings on the data


def resolve_kind(logits: np.ndarray, labels: np.ndarray, options: FitOptions) -> str:
    """The kind of classifier, checked against the options.

    Raises
    ------
    OnnxcalError
        A method or ``--multilabel`` that does not fit the logits and labels.
    """
    kind = kind_of(logits.shape[1], np.ndim(labels))
    if options.multilabel is not None:
        if options.multilabel not in MULTILABEL_MODES:
            raise OnnxcalError(
                f"--multilabel {options.multilabel!r} is not one of: {', '.join(MULTILABEL_MODES)}"
            )
        if kind != "multilabel":
            raise OnnxcalError(
                "--multilabel needs an N x K 0/1 label array, but the labels are one class per sample",
                "drop --multilabel, or capture with multi-label labels",
            )
    allowed = METHODS_FOR[kind]
    if options.method not in allowed and options.method != AUTO:
        what = {"multiclass": "a multiclass softmax", "binary": "a single-logit binary", "multilabel": "a multi-label"}[kind]
        raise OnnxcalError(
            f"--method {options.method} does not apply to {what} classifier "
            f"({logits.shape[1]} logits per sample)",
            f"use one of: {', '.join(allowed)}",
        )
    return kind


def fit_scaling(
    logits: np.ndarray,
    labels: np.ndarray,
    options: FitOptions = FitOptions(),
    *,
    rows: np.ndarray | None = None,
    weights: np.ndarray | None = None,
    start: Scaling | None = None,
) -> FitResult:
    """Fit the method of ``options`` to the logits (optionally a weighted subset).

    ``start`` (a previous fit of the same method) warm-starts the solver.
    """
    kind = resolve_kind(logits, labels, options)
    if options.method in ("vector", "platt"):
        return _fit_affine(logits, labels, options.method, options.l2, rows, weights, start, kind)
    if options.method in MAP_METHODS:
        return _fit_map(logits, labels, options, kind, rows, weights, start)
    t0 = None if start is None else start.arrays()["temperature"]
    if kind == "multiclass":
        return fit_temperature(logits, labels, rows=rows, weights=weights, start=None if t0 is None else float(t0))
    per_label = kind == "multilabel" and options.multilabel == "per-label"
    return fit_sigmoid_temperature(logits, labels, per_label=per_label, rows=rows, weights=weights, start=t0)


def _fit_map(logits, labels, options, kind, rows, weights, start) -> FitResult:
    """A map of onnxcal.maps: its own solver (ensemble temperature scaling: T from fit_temperature)."""
    extra = {}
    if options.method == "ensemble-temperature":
        extra["temperature"] = fit_temperature(logits, labels, rows=rows, weights=weights).temperature
    scaling, passes, converged, notes = fit_map(
        logits, labels, options.method, kind, options.l2, rows=rows, weights=weights, start=start, **extra
    )
    return FitResult(scaling, passes, converged, on_bound=False, warnings=notes)


def data_warnings(labels: np.ndarray, num_classes: int) -> list[str]:
    """Warnings about the labels: too few samples per class, absent classes."""
    labels = np.asarray(labels)
    n = len(labels)
    notes = []
    if labels.ndim == 2:  # multi-label: positives and negatives per label
        pos = labels.sum(axis=0)
        missing = np.flatnonzero((pos == 0) | (pos == n))
        if missing.size:
            notes.append(
                f"labels {_first(missing)} are never (or always) present in this set, so "
                "their calibration is not tested; add samples where they differ"
            )
        rare = np.minimum(pos, n - pos).mean()
        if rare < MIN_PER_CLASS:
            notes.append(
                f"only {rare:.3g} samples of the rarer value per label on average (fewer than "
                f"{MIN_PER_CLASS}): the fit and the metrics are noisy; use a larger set"
            )
        return notes
    classes = max(num_classes, 2)
    counts = np.bincount(labels, minlength=classes)
    missing = np.flatnonzero(counts == 0)
    if missing.size:
        notes.append(
            f"{missing.size} of {classes} classes never occur in the labels (classes "
            f"{_first(missing)}), so their calibration is not tested; add samples of every class"
        )
    if n / classes < MIN_PER_CLASS:
        notes.append(
            f"{n / classes:.3g} samples per class on average (fewer than {MIN_PER_CLASS}): "
            "the fit and the metrics are noisy; use a larger validation set"
        )
    return notes


# --------------------------------------------------------------------------
# The summary FIT.json holds


@dataclass(frozen=True)
class FitSummary:
    """A fit with its honest evaluation, as in FIT.json.

    Attributes
    ----------
    result : FitResult
        The fit on all samples: its parameters are the ones baked in.
    before, after : Metrics
        The headline: metrics of the uncalibrated and calibrated
        probabilities on the held-out part (in-sample with ``holdout`` 0),
        calibrated with the fit on the other part.
    capture : dict
        The capture's metadata (model sha256, output, ...).
    basis : str
        ``"held-out"`` or ``"in-sample"``.
    fit_part : dict or None
        ``{"before": Metrics, "after": Metrics}`` on the part fitted on.
    holdout_result : FitResult or None
        The fit on the fit part (scored on the held-out part).
    split : dict
        Holdout fraction, seed, rows in each part, what it is stratified by.
    intervals : dict or None
        Bootstrap percentile intervals (see ``onnxcal.resample``).
    options : FitOptions
    warnings, notes : tuple of str
    choice : Choice or None
        With ``--method auto``: every method's held-out figures and why
        this one was chosen (:mod:`onnxcal.choose`).
    """

    result: FitResult
    before: Metrics
    after: Metrics
    capture: dict
    basis: str = "in-sample"
    fit_part: dict | None = None
    holdout_result: FitResult | None = None
    split: dict = field(default_factory=dict)
    intervals: dict | None = None
    options: FitOptions = FitOptions()
    warnings: tuple[str, ...] = ()
    notes: tuple[str, ...] = ()
    choice: Choice | None = None

    @property
    def scaling(self) -> Scaling:
        return self.result.scaling

    @property
    def temperature(self) -> float | None:
        return self.result.temperature

    def to_dict(self) -> dict:
        s = self.result.scaling
        held = None
        if self.holdout_result is not None:
            held = {"parameters": dict(self.holdout_result.scaling.parameters), "fit": self.holdout_result.to_dict()}
        return {
            "onnxcal_version": __version__,
            "format": FORMAT,
            "method": s.method,
            "kind": s.kind,
            "temperature": s.temperature,
            "parameters": dict(s.parameters),
            "fit": self.result.to_dict(),
            "split": {**self.split, "fit_part": held},
            "metrics": {
                "basis": self.basis,
                "before": self.before.to_dict(),
                "after": self.after.to_dict(),
                "fit_part": None if self.fit_part is None else {k: m.to_dict() for k, m in self.fit_part.items()},
            },
            "intervals": self.intervals,
            "options": self.options.to_dict(),
            "warnings": list(self.warnings),
            "notes": list(self.notes),
            "capture": dict(self.capture),
            "choice": None if self.choice is None else self.choice.to_dict(),
        }


def _fit_and_evaluate(logits, labels, options, fit_rows, eval_rows):
    """Fit on the fit part, score both parts before and after, refit on all (any method)."""
    if fit_rows is eval_rows:
        result = fit_scaling(logits, labels, options)
        before = evaluate(logits, labels, 1.0, options.n_bins)
        after = evaluate(logits, labels, result.scaling, options.n_bins)
        return result, result, ((before,), (after,))
    part = fit_scaling(logits, labels, options, rows=fit_rows)
    scores = tuple(
        tuple(evaluate(logits, labels, s, options.n_bins, rows=rows) for rows in (fit_rows, eval_rows))
        for s in (1.0, part.scaling)
    )
    return part, fit_scaling(logits, labels, options, start=part.scaling), scores


def _temperature_passes(logits, labels, options, fit_rows, eval_rows, threads):
    """The same for a multiclass temperature, in three passes (see :mod:`onnxcal.passes`)."""
    scored = fit_and_score(
        logits, labels, fit_rows, eval_rows, options.n_bins, (1.0 / T_MAX, 1.0 / T_MIN), options.bootstrap > 0,
        threads,
    )
    part, full = (
        _temperature_result(np.array([s.beta]), s.passes, s.converged, "multiclass") for s in (scored.part, scored.full)
    )
    return part, full, (tuple(scored.before), tuple(scored.after)), scored.expansion


def summarize(
    logits: np.ndarray,
    labels: np.ndarray,
    capture_meta: dict,
    options: FitOptions = FitOptions(),
    *,
    threads: int | None = None,
) -> FitSummary:
    """Fit on the fit part, score on the held-out part, bootstrap, refit on all.

    Parameters
    ----------
    logits : ndarray of shape (n, k)
    labels : ndarray of shape (n,) or (n, k)
    capture_meta : dict
        Stored with the summary.
    options : FitOptions
    threads : int, optional
        Threads for the passes over the logits and the bootstrap (default:
        the cores available); the result does not depend on it.

    Returns
    -------
    FitSummary
    """
    with one_blas_thread():
        if options.method == AUTO:
            kind = resolve_kind(logits, labels, options)
            return fit_all(logits, labels, capture_meta, options, kind, _summarize, threads)[0]
        return _summarize(logits, labels, capture_meta, options, threads)


def _summarize(logits, labels, capture_meta, options, threads) -> FitSummary:
    kind = resolve_kind(logits, labels, options)
    n = len(logits)
    notes, warnings = [], data_warnings(labels, logits.shape[1])
    if options.method in LOOKUP_METHODS:
        notes.append(
            f"{options.method} calibration can change the ranking of the classes and the argmax (ties, flat steps): "
            "verify checks its decisions against its reference, not against the original model"
        )
    if slow := slow_fit_warning(options.method, n, logits.shape[1]):
        warn(slow, OnnxcalWarning, stacklevel=3)  # before the fit, which may take minutes
        warnings.append(slow)
    if options.holdout > 0:
        fit_rows, eval_rows = resample.split_holdout(labels, options.holdout, options.seed)
    else:
        fit_rows = eval_rows = np.arange(n)
    if kind == "multiclass" and options.method == "temperature":
        part, result, scores, expansion = _temperature_passes(logits, labels, options, fit_rows, eval_rows, threads)
    else:
        part, result, scores = _fit_and_evaluate(logits, labels, options, fit_rows, eval_rows)
        expansion = None
    if options.holdout > 0:
        (fit_before, before), (fit_after, after) = scores
        fit_part = {"before": fit_before, "after": fit_after}
        basis = "held-out"
        notes.append(
            f"headline figures are on {len(eval_rows)} held-out samples ({options.holdout:g} of the set, "
            f"stratified, seed {options.seed}), calibrated with the fit on the other {len(fit_rows)}"
        )
        notes.append(f"the parameters baked in are refitted on all {n} samples")
    else:
        ((before,), (after,)), fit_part, basis = scores, None, "in-sample"
        notes.append("--holdout 0: the figures are in-sample (on the data the parameters were fitted on), so optimistic")
    intervals = None
    if options.bootstrap > 0:
        intervals = resample.bootstrap(
            logits, labels, options, fit_rows, eval_rows, part.scaling, refit=fit_scaling, expansion=expansion,
            threads=threads,
        )
        notes.extend(intervals.get("notes", []))
    for w in (*part.warnings, *result.warnings):
        if w not in warnings:
            warnings.append(w)
    return FitSummary(
        result=result,
        before=before,
        after=after,
        capture=dict(capture_meta),
        basis=basis,
        fit_part=fit_part,
        holdout_result=part if options.holdout > 0 else None,
        split={
            "fraction": options.holdout,
            "seed": options.seed,
            "n_fit": int(len(fit_rows)),
            "n_holdout": int(len(eval_rows)) if options.holdout > 0 else 0,
            "stratified_by": resample.strata_name(labels) if options.holdout > 0 else None,
        },
        intervals=intervals,
        options=options,
        warnings=tuple(warnings),
        notes=tuple(notes),
    )


def save_fit(path: str | os.PathLike, summary: FitSummary) -> None:
    """Write FIT.json atomically."""
    text = json.dumps(summary.to_dict(), indent=2, sort_keys=True) + "\n"
    atomic_write_bytes(Path(path), text.encode())


def _result_from(parameters: dict, fit: dict, method: str, kind: str) -> FitResult:
    scaling = check_scaling(Scaling(method, dict(parameters), kind))
    return FitResult(
        scaling=scaling,
        passes=float(fit["passes"]),
        converged=bool(fit["converged"]),
        on_bound=bool(fit["on_bound"]),
        warnings=tuple(fit.get("warnings", ())),
    )


def summary_from_dict(data: dict) -> FitSummary:
    """Rebuild a FitSummary from :meth:`FitSummary.to_dict` output.

    Raises
    ------
    KeyError, TypeError, ValueError, OnnxcalError
        Missing fields or invalid parameters.
    """
    method, kind = data["method"], data["kind"]
    if method == "temperature" and isinstance(data["parameters"].get("temperature"), (int, float)):
        if data["temperature"] != data["parameters"]["temperature"]:
            raise OnnxcalError(
                f"temperature {data['temperature']!r} differs from the parameters' "
                f"{data['parameters']['temperature']!r}"
            )
    result = _result_from(data["parameters"], data["fit"], method, kind)
    split = dict(data["split"])
    held = split.pop("fit_part", None)
    metrics = data["metrics"]
    fit_part = metrics.get("fit_part")
    return FitSummary(
        result=result,
        before=Metrics(**metrics["before"]),
        after=Metrics(**metrics["after"]),
        capture=dict(data.get("capture", {})),
        basis=metrics["basis"],
        fit_part=None if fit_part is None else {k: Metrics(**v) for k, v in fit_part.items()},
        holdout_result=None if held is None else _result_from(held["parameters"], held["fit"], method, kind),
        split=split,
        intervals=data.get("intervals"),
        options=FitOptions(**data["options"]),
        warnings=tuple(data.get("warnings", ())),
        notes=tuple(data.get("notes", ())),
        choice=None if data.get("choice") is None else choice_from_dict(data["choice"]),
    )


def load_fit(path: str | os.PathLike) -> FitSummary:
    """Read FIT.json written by :func:`save_fit`, checking the parameters.

    Raises
    ------
    OnnxcalError
        Not JSON, missing fields, or parameters that are not valid (e.g. a
        temperature that is not a positive number).
    """
    p = require_file(path, "fit file")
    hint = "give a file written by 'onnxcal fit --out'"
    try:
        data = json.loads(p.read_text())
        return summary_from_dict(data)
    except OnnxcalError as exc:
        raise OnnxcalError(f"'{p}' holds invalid calibration parameters: {exc.message}", hint) from exc
    except Exception as exc:  # not JSON, or not the JSON onnxcal writes (any field missing or mistyped)
        raise OnnxcalError(f"'{p}' is not an onnxcal fit file ({type(exc).__name__}: {first_line(exc)})", hint) from exc
