"""Multiclass temperature scaling in one or two passes over the logits.

The mean NLL f(beta) = mean_i [L_i(beta) - beta z_iy] (beta = 1/T,
L_i = log sum_k exp(beta z_ik)) has the derivatives

    f'(beta)      = mean_i (kappa_1,i - z_iy),
    f^(j)(beta)   = mean_i kappa_j,i          (j >= 2),

kappa_j,i the j-th cumulant of z_i under softmax(beta z_i), all from one
:mod:`onnxcal.sweep` pass. Newton's method uses the first two; with
``ORDER`` = 5 cumulants a pass gives the Taylor polynomial of f' of degree
4, whose root is the next iterate. From a start within a few standard
errors of the optimum (the fit of a subsample) that root is the optimum
to about 1e-14, and the size of the last term kept, |f^(5) d^4 / 4!| / f'',
bounds the error the step leaves with a wide margin; a step whose bound
is below ``ACCEPT`` (relative) ends the solve without another pass. Far
from the optimum the step is the safeguarded Newton step in log(beta)
(a bracket from the sign of f', bisection when a step leaves it), as
before.

On a large set the solve starts on strided subsamples of growing size
(10 000 rows, then 100 000 when the set is over four times that), each
warm-starting the next, so the full set is read once or twice.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from math import factorial
from typing import cast

import numpy as np

from .sweep import ALL_ROWS, MomentSums, Selection, compute_dtype, run_pass

ORDER = 5
"""Cumulants per solver pass (the Taylor polynomial of f' has degree ORDER - 1)."""
ACCEPT = 1e-10
"""A step whose error bound is below this (relative to beta) is final."""
STAGE_ACCEPT = 1e-6
"""The same for a subsample stage (only a warm start)."""
STEP_TOL = 1e-7
"""A step in log(beta) below this is final (after taking it)."""
MAX_PASSES = 60
STAGE_ROWS = (10_000, 100_000)
STAGE_FACTOR = 4  # a stage of m rows runs when the set has more than STAGE_FACTOR * m rows
BORROWING = 3
"""Derivatives the first full-set pass takes after a subsample stage (the stage's last pass gives
the rest; their terms, small a step from the optimum, count in the bound)."""
BORROW_FROM_CLASSES = 32
"""Below this many classes per row the two products a pass saves by borrowing cost next to nothing."""

PassFn = Callable[[float], tuple[np.ndarray, float, float]]
"""beta -> (mean derivatives [f', f'', ...] at beta', weight of rows whose label is not the top logit, beta').

beta' is the beta the pass was made at: beta, or beta rounded to float32
for float32 logits (where the pass then needs no correction to the exact
beta; the solver only needs to know where it stands)."""


def taylor_root(derivs: np.ndarray) -> tuple[float, float] | None:
    """Root d of sum_j derivs[j] d^j / j! near -derivs[0] / derivs[1], and its error bound.

    None when the polynomial is not increasing along the way (then the
    caller keeps the Newton step).
    """
    coef = np.asarray(derivs, dtype=np.float64) / np.array([factorial(j) for j in range(len(derivs))])
    poly = np.polynomial.Polynomial(coef)
    slope = poly.deriv()
    if coef[1] <= 0:
        return None
    d = -coef[0] / coef[1]
    for _ in range(50):
        s = float(slope(d))
        if not s > 0:
            return None
        step = float(poly(d)) / s
        d -= step
        if abs(step) <= 1e-16 * max(abs(d), 1e-300):
            break
    return d, abs(coef[-1] * d ** (len(coef) - 1)) / coef[1]


def _newton_step(beta: float, g: float, h: float, lo: float, hi: float, b_min: float, b_max: float) -> float:
    """The safeguarded Newton step in u = log(beta) (see :mod:`onnxcal.fit`)."""
    curvature = beta * beta * h + beta * g  # d2f/du2
    step = -(beta * g) / curvature if curvature > 0 else -np.sign(g) * 50.0
    new = beta * float(np.exp(np.clip(step, -50.0, 50.0)))
    mid = float(np.sqrt(lo * hi))
    if new >= hi:
        new = b_max if hi == b_max else mid
    if new <= lo:
        new = b_min if lo == b_min else mid
    return new


BORROWED_ERROR = 0.1
"""Relative error assumed of derivatives borrowed from a nearby pass (see :func:`next_beta`)."""


def next_beta(
    beta: float, derivs: np.ndarray, lo: float, hi: float, b_min: float, b_max: float, accept: float, own: int = 0
) -> tuple[float, bool]:
    """The next iterate and whether it is final (its error bound is below ``accept``).

    ``derivs[own:]`` (when ``own``) were borrowed from a pass at a nearby
    beta or over a subsample: their terms, assumed BORROWED_ERROR wrong,
    count in the bound.
    """
    g, h = float(derivs[0]), float(derivs[1])
    new = _newton_step(beta, g, h, lo, hi, b_min, b_max)
    if abs(np.log(new / beta)) <= 0.05 and h > 0:
        root = taylor_root(derivs)
        if root is not None:
            d, bound = root
            if own:
                bound += BORROWED_ERROR * borrowed_terms(derivs, own, d) / h
            cand = beta + d
            if lo < cand < hi and abs(np.log(cand / beta)) <= 0.1:
                return cand, bool(bound <= accept * cand)
    return new, bool(abs(np.log(new / beta)) <= STEP_TOL)


def borrowed_terms(derivs: np.ndarray, own: int, d: float) -> float:
    """sum_{j >= own} |derivs[j] d^j / j!|: the terms of f' that borrowed derivatives make."""
    return sum(abs(float(derivs[j]) * d**j / factorial(j)) for j in range(own, len(derivs)))


@dataclass(frozen=True)
class Solved:
    """A solve's outcome: beta, passes, whether it converged, and the mean derivatives
    [f', f'', ...] of its last pass (at ``at``)."""

    beta: float
    passes: float
    converged: bool
    derivs: np.ndarray | None = None
    at: float | None = None


def solve(
    pass_fn: PassFn, beta0: float, b_min: float, b_max: float, accept: float = ACCEPT,
    borrowed: np.ndarray | None = None,
) -> Solved:
    """Minimise f from ``beta0``.

    On the first pass, if every row's label is the (first) top logit,
    f' < 0 for every beta (the NLL keeps falling as beta grows) and
    ``b_max`` is the answer. When a pass gives fewer derivatives than
    ``borrowed`` (from a nearby pass), the higher ones are taken from it.
    """
    beta = float(np.clip(beta0, b_min, b_max))
    lo, hi = b_min, b_max
    derivs, at = None, None
    for passes in range(1, MAX_PASSES + 1):
        derivs, wrong, beta = pass_fn(beta)
        own = len(derivs)
        if borrowed is not None and own < len(borrowed):
            derivs = np.concatenate([derivs, borrowed[own:]])
        else:
            own = 0
        at = beta
        g = float(derivs[0])
        if passes == 1 and wrong == 0 and g < 0:
            return Solved(b_max, passes, True, derivs, at)
        if g == 0 or (beta <= b_min and g > 0) or (beta >= b_max and g < 0):
            return Solved(beta, passes, True, derivs, at)
        if g > 0:
            hi = beta
        else:
            lo = beta
        beta, final = next_beta(beta, derivs, lo, hi, b_min, b_max, accept, own)
        if final:
            return Solved(beta, passes, True, derivs, at)
    return Solved(beta, MAX_PASSES, False, derivs, at)


def moment_pass(
    logits: np.ndarray, labels: np.ndarray, beta: float, selection: Selection = ALL_ROWS,
    threads: int | None = None, order: int = ORDER,
) -> MomentSums:
    """Weighted sums of the NLL's first ``order`` derivatives at beta (one part)."""
    lanes = run_pass(
        logits, labels, beta, lambda: (MomentSums(1, order),), selection=selection, moments=order,
        threads=threads,
    )
    return MomentSums.merge([cast(MomentSums, lane[0]) for lane in lanes])  # the consumers made above


def derivatives(sums: MomentSums, beta: float, part: int = 0) -> tuple[np.ndarray, float, float]:
    """Mean derivatives of f, the weight of wrong rows and beta, from a pass's sums (a :data:`PassFn` result)."""
    return sums.sums[part] / sums.weight[part], float(sums.wrong[part]), beta


def snapped(logits: np.ndarray) -> Callable[[float], float]:
    """Where a solver pass is made: beta itself, or for float32 logits the nearest float32 number."""
    if compute_dtype(logits) == np.float32:
        return lambda beta: float(np.float32(beta))
    return float


def fit_beta(
    logits: np.ndarray,
    labels: np.ndarray,
    rows: np.ndarray | None,
    weights: np.ndarray | None,
    start: float | None,
    bounds: tuple[float, float],
    threads: int | None = None,
) -> Solved:
    """beta minimising the mean NLL on ``rows`` (weighted), with its passes and last derivatives.

    Without ``start`` a large set is first fitted on subsamples (see the
    module docstring); their passes count by their fraction of the rows.
    """
    n = len(logits) if rows is None else len(rows)
    b_min, b_max = bounds

    snap = snapped(logits)

    def on(r: np.ndarray | None, w: np.ndarray | None, first_order: int = ORDER) -> PassFn:
        sel = Selection(rows=r, weights=w)
        orders = [first_order]

        def pass_fn(beta: float) -> tuple[np.ndarray, float, float]:
            at = snap(beta)
            order = orders.pop() if orders else ORDER
            return derivatives(moment_pass(logits, labels, at, sel, threads, order), at)

        return pass_fn

    beta, passes, stage = (1.0 if start is None else float(start)), 0.0, None
    if start is None:
        for size in STAGE_ROWS:
            if n <= STAGE_FACTOR * size:
                break
            stride = n // size
            sub = (np.arange(n) if rows is None else rows)[::stride]
            sub_w = None if weights is None else weights[::stride]
            stage = solve(on(sub, sub_w), beta, b_min, b_max, STAGE_ACCEPT)
            passes += stage.passes * len(sub) / n
            beta = float(np.clip(stage.beta, b_min * 1.0001, b_max / 1.0001))  # let the full data decide bounds
    wide = logits.shape[1] >= BORROW_FROM_CLASSES
    if wide and stage is not None and stage.derivs is not None and len(stage.derivs) == ORDER:
        # the first full-set pass takes three derivatives; the fourth and fifth come from the last stage
        done = solve(on(rows, weights, BORROWING), beta, b_min, b_max, borrowed=stage.derivs)
    else:
        done = solve(on(rows, weights), beta, b_min, b_max)
    return Solved(done.beta, passes + done.passes, done.converged, done.derivs, done.at)
