"""Fitting the temperature of L1-normalised sigmoids, p = L1(sigmoid(z / T)), and its summary.

The mean NLL of ``l1_sigmoid.nll_terms`` is minimised over u = log T in
[log T_MIN, log T_MAX] (``fit.T_MIN``, ``fit.T_MAX``): since it need not be
convex in 1/T, a grid of ``GRID`` values of u finds the basin of the
smallest NLL; between the grid's neighbours the root of the derivative
dF/du is found by Brent's method (``scipy.optimize.brentq``; Brent,
"Algorithms for Minimization without Derivatives", 1973, ch. 4), or, where
the derivative does not change sign there, the NLL is minimised by Brent's
bounded method (``scipy.optimize.minimize_scalar``, ch. 5). A bound is the
answer when the NLL rises from it. A bootstrap replicate starts from the
fit instead: the bracket around it is widened until the derivative changes
sign. Every evaluation is one chunked pass over the logits (float64 sums,
any row subset and bootstrap weights).

``summarize_l1`` is ``fit.summarize`` for this kind: the stratified
holdout, the fit on the fit part scored before and after on both parts
(``metrics.evaluate`` scores L1(sigmoid(z / T)) for a ``sigmoid-l1``
scaling), the refit on all rows, and bootstrap intervals from exact refits.
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np

from .. import resample
from ..errors import OnnxcalError
from ..l1_sigmoid import SIGMOID_L1, nll_terms
from ..metrics import evaluate, iter_chunks
from ..scaling import Scaling, is_far_from_one
from ..sweep import one_blas_thread
from .options import T_MAX, T_MIN, FitOptions, FitResult
from .outcome import FitSummary, data_warnings, holdout_notes, split_record

GRID = 19  # values of log T on [log T_MIN, log T_MAX]: a step of 0.51 (T x 1.67)
_XATOL = 1e-10  # Brent's tolerance on log T
_WARM_STEP = 0.25  # half-width of a replicate's first bracket, in log T


class _Objective:
    """The mean NLL (and its derivative) of L1(sigmoid(z / T)) as a function of u = log T."""

    def __init__(
        self, logits: np.ndarray, labels: np.ndarray, rows: np.ndarray | None, weights: np.ndarray | None
    ) -> None:
        self.logits, self.labels, self.rows, self.weights = logits, labels, rows, weights
        self.passes = 0.0
        self.share = 1.0 if rows is None else len(rows) / max(len(logits), 1)

    def _sums(self, u: float, order: int) -> tuple[float, ...]:
        beta = math.exp(-u)
        sums, total = np.zeros(order + 1), 0.0
        for z, y, w in iter_chunks(self.logits, self.labels, self.rows, self.weights):
            terms = nll_terms(z, y, beta, order)
            sums += [t.sum() if w is None else float(w @ t) for t in terms]
            total += len(y) if w is None else float(w.sum())
        self.passes += self.share
        return tuple(sums / total)

    def value(self, u: float) -> float:
        return self._sums(u, 0)[0]

    def slope(self, u: float) -> float:
        """dF/du = -beta F'(beta)."""
        return -math.exp(-u) * self._sums(u, 1)[1]


def fit_temperature_l1(
    logits: np.ndarray,
    labels: np.ndarray,
    *,
    rows: np.ndarray | None = None,
    weights: np.ndarray | None = None,
    start: float | None = None,
) -> FitResult:
    """Fit T minimising the mean NLL of L1(sigmoid(logits / T)) against class labels.

    Parameters
    ----------
    logits : ndarray of shape (n, k)
        The logits z that enter the model's Sigmoid (float32 or float64; may be a memory map).
    labels : ndarray of shape (n,)
        Class indices in [0, k).
    rows, weights : ndarray, optional
        Fit on these rows only, with these weights (bootstrap counts).
    start : float, optional
        A nearby T (the fit a bootstrap replicate starts from).

    Returns
    -------
    FitResult
        T within [T_MIN, T_MAX]; an optimum on a bound is returned there with
        ``on_bound`` set and a warning.
    """
    f = _Objective(logits, labels, rows, weights)
    lo, hi = math.log(T_MIN), math.log(T_MAX)
    bracket = None if start is None else _warm_bracket(f, math.log(start), lo, hi)
    u, converged = _minimum(f, *(bracket or _grid_bracket(f, lo, hi)))
    return _result(math.exp(u), f.passes, converged, lo, hi, u)


# (a, slope at a, b, slope at b, a is a bound the NLL may rise from, b is a bound it may fall to)
_Bracket = tuple[float, float, float, float, bool, bool]


def _minimum(f: _Objective, a: float, ga: float, b: float, gb: float, low_end: bool, high_end: bool
             ) -> tuple[float, bool]:
    """The minimum in [a, b] (u, converged): a bound when the NLL rises from it (falls to it), else
    the root of the slope (``scipy.optimize.brentq``), else Brent's bounded method on the NLL."""
    import scipy.optimize  # here, not at import: scipy takes ~0.5 s to import and inspect needs none

    if low_end and ga >= 0:
        return a, True
    if high_end and gb <= 0:
        return b, True
    if ga < 0 < gb:
        u, info = scipy.optimize.brentq(f.slope, a, b, xtol=_XATOL, full_output=True, disp=False)
        return float(u), bool(info.converged)
    res = scipy.optimize.minimize_scalar(f.value, bounds=(a, b), method="bounded", options={"xatol": _XATOL})
    return float(res.x), bool(res.success)


def _grid_bracket(f: _Objective, lo: float, hi: float) -> _Bracket:
    """The grid's neighbours of its smallest NLL, with the slopes there (a bound when it is the smallest)."""
    grid = np.linspace(lo, hi, GRID)
    i = int(np.argmin([f.value(float(u)) for u in grid]))
    a, b = float(grid[max(i - 1, 0)]), float(grid[min(i + 1, GRID - 1)])
    ga = f.slope(a)
    if i == 0 and ga >= 0:
        return a, ga, b, 0.0, True, False
    return a, ga, b, f.slope(b), i == 0, i == GRID - 1


def _warm_bracket(f: _Objective, u0: float, lo: float, hi: float) -> _Bracket | None:
    """[a, b] around ``u0`` with dF/du <= 0 at a and >= 0 at b (or a bound), widened in doubling steps;
    None when it would span more than the grid's own bracket (then the grid decides)."""
    u0 = min(max(u0, lo), hi)
    a, step = max(lo, u0 - _WARM_STEP), _WARM_STEP
    ga = f.slope(a)
    while ga > 0 and a > lo:
        step *= 2
        if step > 4:
            return None
        a = max(lo, a - step)
        ga = f.slope(a)
    if a == lo and ga >= 0:
        return a, ga, a, ga, True, False
    b, step = min(hi, u0 + _WARM_STEP), _WARM_STEP
    gb = f.slope(b)
    while gb < 0 and b < hi:
        step *= 2
        if step > 4:
            return None
        b = min(hi, b + step)
        gb = f.slope(b)
    return a, ga, b, gb, a == lo, b == hi


def _result(t: float, passes: float, converged: bool, lo: float, hi: float, u: float) -> FitResult:
    scaling = Scaling.of_temperature(t, SIGMOID_L1)
    notes: list[str] = []
    on_bound = u <= lo or u >= hi
    if u <= lo:
        notes.append(
            f"the optimum lies at the lower bound T = {T_MIN:g}: the likelihood keeps rising as T shrinks on "
            "this set; use a larger or harder validation set"
        )
    elif u >= hi:
        notes.append(
            f"the optimum lies at the upper bound T = {T_MAX:g}: the scores carry almost no information about "
            "the labels on this set; check that the labels match the model's classes"
        )
    elif is_far_from_one(scaling):
        notes.append(
            f"T = {t:.3g} is far from 1: check that the chosen output really holds logits and not probabilities"
        )
    if not converged:
        notes.append(f"the solver stopped after {passes:.3g} passes without converging")
    return FitResult(scaling, float(passes), converged, on_bound, tuple(notes))


def refit(
    logits: np.ndarray, labels: np.ndarray, options: FitOptions, *, rows: np.ndarray | None = None,
    weights: np.ndarray | None = None, start: Scaling | None = None,
) -> FitResult:
    """``resample.bootstrap``'s refit: a replicate's T, starting from ``start``'s."""
    t0 = None if start is None else start.temperature
    return fit_temperature_l1(logits, labels, rows=rows, weights=weights, start=t0)


def check_options(labels: np.ndarray, options: FitOptions) -> None:
    """Only a temperature fits L1-normalised sigmoids, against one class index per row.

    Raises
    ------
    OnnxcalError
        Another method, ``--multilabel``, or labels that are not class indices.
    """
    if options.method != "temperature":
        raise OnnxcalError(
            f"--method {options.method} does not apply to L1-normalised sigmoids (one sigmoid per class "
            "divided by their sum): onnxcal fits one temperature, L1(sigmoid(z / T))",
            "use --method temperature",
        )
    if options.multilabel is not None or np.ndim(labels) != 1:
        raise OnnxcalError(
            "L1-normalised sigmoids are fitted against one class index per sample, not multi-label labels",
            "drop --multilabel, and capture with one class label per sample",
        )


def summarize_l1(
    logits: np.ndarray, labels: np.ndarray, capture_meta: dict[str, object], options: FitOptions,
    *, threads: int | None = None, groups: np.ndarray | None = None,
    progress: Callable[[str, int, int], None] | None = None,
) -> FitSummary:
    """``fit.summarize`` for L1-normalised sigmoids: holdout, fit, scores, bootstrap, refit on all
    (``groups``: the sample of each row, to split and resample whole samples; ``progress`` as for
    ``fit.summarize``)."""
    check_options(labels, options)
    with one_blas_thread():
        return _summarize(logits, labels, capture_meta, options, threads, groups, progress)


def _summarize(
    logits: np.ndarray, labels: np.ndarray, capture_meta: dict[str, object], options: FitOptions, threads: int | None,
    groups: np.ndarray | None = None, progress: Callable[[str, int, int], None] | None = None,
) -> FitSummary:
    told = progress or (lambda stage, done, total: None)
    told("fitting", 0, 1)
    n = len(logits)
    notes: list[str] = []
    warnings = data_warnings(labels, logits.shape[1])
    one = Scaling.of_temperature(1.0, SIGMOID_L1)  # the model as it is
    if options.holdout > 0:
        fit_rows, eval_rows = resample.split_holdout(labels, options.holdout, options.seed, groups=groups)
        part = fit_temperature_l1(logits, labels, rows=fit_rows)
        (fit_before, before), (fit_after, after) = (
            tuple(evaluate(logits, labels, s, options.n_bins, rows=r, threads=threads) for r in (fit_rows, eval_rows))
            for s in (one, part.scaling)
        )
        result = fit_temperature_l1(logits, labels, start=part.temperature)
        fit_part, basis = {"before": fit_before, "after": fit_after}, "held-out"
        notes.extend(holdout_notes(options, fit_rows, eval_rows, groups))
    else:
        fit_rows = eval_rows = np.arange(n)
        part = result = fit_temperature_l1(logits, labels)
        before = evaluate(logits, labels, one, options.n_bins, threads=threads)
        after = evaluate(logits, labels, result.scaling, options.n_bins, threads=threads)
        fit_part, basis = None, "in-sample"
        notes.append(
            "--holdout 0: the figures are in-sample (on the data the parameters were fitted on), so optimistic"
        )
    told("fitting", 1, 1)
    intervals = None
    if options.bootstrap > 0:
        intervals = resample.bootstrap(
            logits, labels, options, fit_rows, eval_rows, part.scaling, refit=refit, threads=threads, groups=groups,
            progress=progress,
        )
        notes.extend(intervals.get("notes", []))
    for w in (*part.warnings, *result.warnings):
        if w not in warnings:
            warnings.append(w)
    return FitSummary(
        result=result, before=before, after=after, capture=dict(capture_meta), basis=basis, fit_part=fit_part,
        holdout_result=part if options.holdout > 0 else None,
        split=split_record(options, labels, fit_rows, eval_rows, groups),
        intervals=intervals, options=options, warnings=tuple(warnings), notes=tuple(notes),
    )
