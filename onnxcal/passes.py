"""The ``fit`` command's passes over the logits for multiclass temperature scaling.

Every figure of the command comes out of three passes (plus the
subsample stages of the fit, a fraction of a pass):

1. beta = 1 over all rows: the before-metrics of both parts;
2. the fit on the fit part (:func:`onnxcal.tempfit.fit_beta`): one pass
   over the fit part after the subsamples, with five cumulants;
3. beta = the fit, over all rows: the after-metrics of both parts, the
   NLL's first three derivatives on each part and, with a bootstrap, the
   per-row Taylor terms
   (:class:`onnxcal.expansion.Expansion`).

Pass 3's derivatives on the fit part check the fit (its next step must be
below :data:`onnxcal.tempfit.ACCEPT`, :data:`CHECK_FLOAT32` for float32
logits; if it is not, which needs unusual data, the fit steps on and pass
3 runs again), and their sum over both parts, with the higher derivatives
of pass 2, gives the refit on all rows its step: the refit reads the
logits again only when that step's error bound is too large.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import cast

import numpy as np

from .expansion import SQ_ORDER, TERMS, Expansion, ExpansionRows, expansion_parts, new_expansion
from .metrics import Metrics, score_metrics, temperature_pass
from .sweep import ALL_ROWS, MomentSums, Selection, compute_dtype
from .tempfit import (
    ACCEPT,
    MAX_PASSES,
    ORDER,
    PassFn,
    Solved,
    derivatives,
    fit_beta,
    moment_pass,
    snapped,
    solve,
    taylor_root,
)

FITTING = "fitting"  # the stage progress() is told about

CHECK_FLOAT32 = 1e-7
"""How far (relative) pass 3 may put the fit part's optimum from the fit, for float32 logits.

For float32 logits the fit part's beta is taken to the nearest float32
number (up to 3e-8 away, a ten-thousandth of its standard error on a
million rows), so that pass 3 takes its exponentials at exactly that
beta and needs no correction terms (see :mod:`onnxcal.sweep`); the
metrics of both parts and the T reported for the fit part are at that
beta. Besides, pass 2 (rows gathered from the fit part) and pass 3 (all
rows) round a row's float32 exponentials alike only up to the chunk
layout of the row sums, which moves the root of f' by about 1e-9 on
750 000 rows. Float64 logits are used as they are and checked to ACCEPT.
"""


@dataclass(frozen=True)
class Scored:
    """What the passes give: the two fits, the metrics per part and the expansion.

    ``before`` and ``after`` list the metrics of the fit part and the
    held-out part (one entry, all rows, for an in-sample evaluation).
    """

    part: Solved
    full: Solved
    before: list[Metrics]
    after: list[Metrics]
    expansion: Expansion | None


def _settled(beta: float, derivs: np.ndarray, bounds: tuple[float, float], tol: float) -> bool:
    """Whether beta is the optimum (within ``tol``) or a bound the optimum lies beyond."""
    g = float(derivs[0])
    if (beta >= bounds[1] and g <= 0) or (beta <= bounds[0] and g >= 0):
        return True
    root = taylor_root(derivs)
    return root is not None and abs(root[0]) <= tol * beta


def _passes(
    logits: np.ndarray, labels: np.ndarray, rows: np.ndarray | None, threads: int | None,
    first: tuple[np.ndarray, float, float] | None = None,
) -> PassFn:
    """A solver pass function over ``rows``; its first call returns ``first`` when given (a pass already made)."""
    pending = [] if first is None else [first]
    snap = snapped(logits)

    def pass_fn(beta: float) -> tuple[np.ndarray, float, float]:
        if pending:
            return pending.pop()
        at = snap(beta)
        return derivatives(moment_pass(logits, labels, at, Selection(rows=rows), threads), at)

    return pass_fn


def _refit(
    logits: np.ndarray, labels: np.ndarray, sums: MomentSums, beta: float, high: np.ndarray,
    bounds: tuple[float, float], threads: int | None,
) -> Solved:
    """The refit on all rows from pass 3's sums and pass 2's higher derivatives.

    Pass 3 gives the first three derivatives of f over all rows at the fit
    part's beta; the fourth and fifth are the fit part's, borrowed from pass
    2 (see :func:`onnxcal.tempfit.next_beta`). Their terms are small (the
    step is about the difference between the two optima, 3e-5 of beta on a
    million rows of 1000 classes, 1e-3 with 4 classes), so the step is
    usually final without reading the logits again.
    """
    own = sums.sums.sum(axis=0) / sums.weight.sum()
    first = (own, float(sums.wrong.sum()), beta)
    return solve(_passes(logits, labels, None, threads, first), beta, *bounds, borrowed=high)


def fit_and_score(
    logits: np.ndarray,
    labels: np.ndarray,
    fit_rows: np.ndarray,
    eval_rows: np.ndarray,
    n_bins: int,
    bounds: tuple[float, float],
    bootstrap: bool,
    threads: int | None = None,
    progress: Callable[[str, int, int], None] | None = None,
) -> Scored:
    """Fit a temperature on ``fit_rows``, score both parts before and after, refit on all rows.

    ``eval_rows is fit_rows`` means an in-sample evaluation (one part, all rows).
    ``progress("fitting", done, 3)`` hears of each of the three passes.
    """
    told = progress or (lambda stage, done, total: None)
    told(FITTING, 0, 3)
    holdout = fit_rows is not eval_rows
    part, local = expansion_parts(len(logits), fit_rows, eval_rows, local=bootstrap)
    parts = 2 if holdout else 1
    masks: list[np.ndarray | None] = [None]
    if holdout:
        assert part is not None  # expansion_parts gives every row's part whenever there is a held-out part
        masks = [np.asarray(part == p) for p in range(parts)]
    sel = Selection(part=part) if holdout else ALL_ROWS
    first, _ = temperature_pass(logits, labels, 1.0, n_bins, selection=sel, parts=parts, threads=threads)
    before = [score_metrics(first, p, masks[p], None) for p in range(parts)]
    del first  # its per-row scores
    told(FITTING, 1, 3)
    fit_on = fit_rows if holdout else None
    tol = CHECK_FLOAT32 if compute_dtype(logits) == np.float32 else ACCEPT
    fit = fit_beta(logits, labels, fit_on, None, None, bounds, threads)
    beta, passes, converged = snapped(logits)(fit.beta), fit.passes, fit.converged
    high = fit.derivs if fit.derivs is not None and len(fit.derivs) == ORDER else np.zeros(ORDER)
    told(FITTING, 2, 3)
    order = TERMS  # the first three derivatives on all rows: the check, the refit's step, the expansion
    for _ in range(MAX_PASSES):
        exp = new_expansion(beta, len(fit_rows), len(eval_rows)) if bootstrap else None

        def extra(exp: Expansion | None = exp) -> tuple[MomentSums | ExpansionRows, ...]:
            return (MomentSums(parts, order),) + ((ExpansionRows(exp, local),) if exp is not None else ())

        scores, lanes = temperature_pass(
            logits, labels, beta, n_bins, selection=sel, parts=parts, moments=order,
            sq_moments=SQ_ORDER if bootstrap else 0, sq_part=1 if holdout else None, extra=extra,
            threads=threads,
        )
        sums = MomentSums.merge([cast(MomentSums, lane[0]) for lane in lanes])  # extra()'s first consumer
        passes += 1  # the check of the fit, shared with the scores
        own, wrong, _ = derivatives(sums, beta, 0)
        check = np.concatenate([own, high[order:]])
        if _settled(beta, check, bounds, tol):
            break
        redo = solve(_passes(logits, labels, fit_on, threads, (check, wrong, beta)), beta, *bounds)
        beta, converged, passes = snapped(logits)(redo.beta), redo.converged, passes + redo.passes - 1
        if redo.derivs is not None and len(redo.derivs) == ORDER:
            high = redo.derivs
    after = [score_metrics(scores, p, masks[p], None) for p in range(parts)]
    told(FITTING, 3, 3)
    if holdout:
        full = _refit(logits, labels, sums, beta, high, bounds, threads)
    else:
        full = Solved(beta, passes, converged)
    if exp is not None:
        exp.finish(high[TERMS:ORDER])
    return Scored(Solved(beta, passes, converged), full, before, after, exp)
