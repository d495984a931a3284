"""Fit a temperature by minimising the negative log-likelihood.

We fit beta = 1/T. The mean NLL

    f(beta) = mean_i [ logsumexp_k(beta z_ik) - beta z_iy ]

is convex in beta: f'(beta) = mean_i (E_p[z_i] - z_iy) and
f''(beta) = mean_i Var_p[z_i] >= 0, where p = softmax(beta z_i). Both come
out of the same pass as f. We take Newton steps on beta in log coordinates
(u = log beta keeps beta positive and makes the step independent of the
logits' scale); since f is convex in beta the sign of f' keeps a bracket,
and a step that leaves it, or a non-positive curvature in u, is replaced by
bisection of the bracket in log-space. Each pass reads the logits in float32 row chunks and
accumulates in float64, so memory stays bounded.

References
----------
Guo, Pleiss, Sun, Weinberger, "On Calibration of Modern Neural Networks",
ICML 2017, sec. 4.2 (temperature scaling).
"""

from __future__ import annotations

import json
import math
import os
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np

from . import __version__
from ._files import atomic_write_bytes, require_file
from .errors import OnnxcalError
from .metrics import Metrics, chunk_rows, evaluate

T_MIN = 0.01
T_MAX = 100.0
_MAX_PASSES = 60
# Newton converges quadratically: once a step in log(beta) is below 1e-7 the
# remaining error after taking it is of order 1e-14 (relative).
_STEP_TOL = 1e-7


@dataclass(frozen=True)
class FitResult:
    """Outcome of fitting one temperature.

    Attributes
    ----------
    temperature : float
        The fitted T (logits are divided by it).
    passes : int
        Passes over the logits the solver made.
    converged : bool
        False only when the pass budget ran out.
    on_bound : bool
        True when the optimum lies on (or beyond) a bound of [T_MIN, T_MAX].
    warnings : tuple of str
        Human-readable notes on the fit (bound hit, T far from 1, ...).
    method : str
        Always ``"temperature"`` for this solver.
    """

    temperature: float
    passes: int
    converged: bool
    on_bound: bool
    warnings: tuple[str, ...] = ()
    method: str = "temperature"

    def to_dict(self) -> dict:
        d = asdict(self)
        d["warnings"] = list(self.warnings)
        return d


def nll_derivatives(
    logits: np.ndarray, labels: np.ndarray, beta: float
) -> tuple[float, float, float]:
    """Mean NLL of softmax(beta * logits) and its first two derivatives in beta.

    One pass over ``logits`` in row chunks, float64 accumulation.

    Returns
    -------
    f, df, d2f : float
    """
    f, g, h, _ = _nll_pass(logits, labels, beta)
    return f, g, h


def _nll_pass(
    logits: np.ndarray, labels: np.ndarray, beta: float, count_ties: bool = False
) -> tuple[float, float, float, int]:
    """f, f', f'' at ``beta``; with ``count_ties``, also the number of samples
    whose true-class score is not the strict maximum (else -1)."""
    n, k = logits.shape
    f = g = h = 0.0
    unseparated = 0
    step = chunk_rows(k)
    rows = np.arange(min(step, n))
    for start in range(0, n, step):
        z = np.asarray(logits[start : start + step], dtype=np.float64)
        y = np.asarray(labels[start : start + step])
        zy = z[rows[: len(y)], y]
        if count_ties:
            unseparated += int(np.count_nonzero((z >= zy[:, None]).sum(axis=1) > 1))
        s = beta * z
        m = s.max(axis=1, keepdims=True)
        e = np.exp(s - m)
        total = e.sum(axis=1)
        p = e / total[:, None]
        mean_z = np.einsum("ij,ij->i", p, z)
        centred = z - mean_z[:, None]
        f += (np.log(total) + m[:, 0] - beta * zy).sum()
        g += (mean_z - zy).sum()
        h += np.einsum("ij,ij,ij->", p, centred, centred)
    return f / n, g / n, h / n, unseparated if count_ties else -1


def _bound_warning(temperature: float, t_min: float, t_max: float) -> str:
    if temperature <= t_min:
        return (
            f"the optimum lies at the lower bound T = {t_min:g}: the model is right on "
            "(nearly) every sample of this set, so the likelihood keeps rising as T "
            "shrinks; use a larger or harder validation set"
        )
    return (
        f"the optimum lies at the upper bound T = {t_max:g}: the scores carry almost "
        "no information about the labels on this set; check that the labels match "
        "the model's classes"
    )


def fit_temperature(
    logits: np.ndarray,
    labels: np.ndarray,
    *,
    t_min: float = T_MIN,
    t_max: float = T_MAX,
) -> FitResult:
    """Fit T minimising the mean NLL of softmax(logits / T).

    Parameters
    ----------
    logits : ndarray of shape (n, k)
        Class scores (float32 or float64; may be a memory map).
    labels : ndarray of shape (n,)
        Integer class indices in [0, k).
    t_min, t_max : float
        Bounds on T. An optimum outside them is returned as the bound, with
        ``on_bound`` set and a warning that says why.

    Returns
    -------
    FitResult

    References
    ----------
    Guo et al., "On Calibration of Modern Neural Networks", ICML 2017, sec. 4.2.

    Examples
    --------
    >>> z = np.array([[2.0, 0.0], [0.0, 2.0], [2.0, 0.0], [0.0, 2.0]])
    >>> round(fit_temperature(z, np.array([0, 1, 1, 0])).temperature, 1)
    100.0
    """
    b_min, b_max = 1.0 / t_max, 1.0 / t_min
    lo, hi = b_min, b_max  # the minimiser lies in [lo, hi]
    beta = min(max(1.0, b_min), b_max)
    passes = 0
    converged = False
    while passes < _MAX_PASSES:
        _, g, h, unseparated = _nll_pass(logits, labels, beta, count_ties=passes == 0)
        passes += 1
        if unseparated == 0:
            # Every true-class score is the strict maximum: f' < 0 for every
            # beta, so the NLL keeps falling as T -> 0 and T_min is optimal.
            beta, converged = b_max, True
            break
        if g == 0.0 or (beta == b_min and g > 0) or (beta == b_max and g < 0):
            converged = True  # stationary, or on a bound with the slope pointing out
            break
        if g > 0:
            hi = beta
        else:
            lo = beta
        # Newton step in u = log(beta): df/du = beta f', d2f/du2 = beta^2 f'' + beta f'.
        curvature = beta * beta * h + beta * g
        step = -(beta * g) / curvature if curvature > 0 else math.copysign(math.inf, -g)
        new = beta * math.exp(max(-50.0, min(50.0, step)))
        if new >= hi:
            # Beyond the bracket: try the bound itself once, else bisect.
            new = b_max if hi == b_max else math.sqrt(lo * hi)
        elif new <= lo:
            new = b_min if lo == b_min else math.sqrt(lo * hi)
        step = math.log(new / beta)
        beta = new
        if abs(step) <= _STEP_TOL:
            converged = True
            break
    temperature = 1.0 / beta
    on_bound = beta in (b_min, b_max)
    notes = []
    if on_bound:
        notes.append(_bound_warning(temperature, t_min, t_max))
    elif temperature < 0.5 or temperature > 5.0:
        notes.append(
            f"T = {temperature:.3g} is far from 1: check that the chosen output "
            "really holds logits and not probabilities"
        )
    if not converged:
        notes.append(f"the solver stopped after {passes} passes without converging")
    return FitResult(
        temperature=float(temperature),
        passes=passes,
        converged=converged,
        on_bound=bool(on_bound),
        warnings=tuple(notes),
    )


@dataclass(frozen=True)
class FitSummary:
    """A fitted temperature with the metrics before and after it, as in FIT.json.

    Attributes
    ----------
    result : FitResult
    before, after : Metrics
        Metrics of softmax(logits) and softmax(logits / T) on the fitting data.
    capture : dict
        The capture's metadata (model sha256, output, ...).
    """

    result: FitResult
    before: Metrics
    after: Metrics
    capture: dict

    @property
    def temperature(self) -> float:
        return self.result.temperature

    def to_dict(self) -> dict:
        return {
            "onnxcal_version": __version__,
            "method": self.result.method,
            "temperature": self.result.temperature,
            "fit": {k: v for k, v in self.result.to_dict().items() if k != "temperature"},
            "metrics": {"before": self.before.to_dict(), "after": self.after.to_dict()},
            "capture": dict(self.capture),
        }


def summarize(logits: np.ndarray, labels: np.ndarray, capture_meta: dict) -> FitSummary:
    """Fit T on the logits and score them before and after."""
    result = fit_temperature(logits, labels)
    return FitSummary(
        result=result,
        before=evaluate(logits, labels),
        after=evaluate(logits, labels, result.temperature),
        capture=capture_meta,
    )


def save_fit(path: str | os.PathLike, summary: FitSummary) -> None:
    """Write FIT.json atomically."""
    text = json.dumps(summary.to_dict(), indent=2, sort_keys=True) + "\n"
    atomic_write_bytes(Path(path), text.encode())


def load_fit(path: str | os.PathLike) -> FitSummary:
    """Read FIT.json written by :func:`save_fit`, checking the temperature.

    Raises
    ------
    OnnxcalError
        Not JSON, missing fields, or a temperature that is not a positive number.
    """
    p = require_file(path, "fit file")
    hint = "give a file written by 'onnxcal fit --out'"
    try:
        data = json.loads(p.read_text())
        fit = dict(data["fit"])
        fit["warnings"] = tuple(fit.get("warnings", ()))
        result = FitResult(temperature=data["temperature"], **fit)
        before = Metrics(**data["metrics"]["before"])
        after = Metrics(**data["metrics"]["after"])
        capture = dict(data.get("capture", {}))
    except (OSError, UnicodeDecodeError, ValueError, KeyError, TypeError) as exc:
        raise OnnxcalError(f"'{p}' is not an onnxcal fit file ({exc})", hint) from exc
    t = result.temperature
    if isinstance(t, bool) or not isinstance(t, (int, float)) or not math.isfinite(t) or t <= 0:
        raise OnnxcalError(
            f"'{p}' holds temperature {t!r}, not a positive finite number", hint
        )
    return FitSummary(result=result, before=before, after=after, capture=capture)
