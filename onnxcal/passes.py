"""The ``fit`` command's passes over the logits for multiclass temperature scaling.

Every figure of the command comes out of three passes (plus the
subsample stages of the fit, a fraction of a pass):

1. beta = 1 over all rows: the before-metrics of both parts;
2. the fit on the fit part (:func:`onnxcal.tempfit.fit_beta`): one pass
   over the fit part after the subsamples;
3. beta = the fit, over all rows: the after-metrics of both parts, the
   NLL's derivatives on each part and, with a bootstrap, the per-row
   Taylor terms (:class:`onnxcal.resample.Expansion`).

Pass 3's derivatives on the fit part check the fit (its next step must be
below :data:`onnxcal.tempfit.ACCEPT`, :data:`CHECK_FLOAT32` for float32
logits; if it is not, which needs unusual data, the fit steps on and pass
3 runs again), and their sum over both
parts gives the refit on all rows its first step: the refit reads the
logits again only when that step's error bound is too large.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .expansion import SQ_ORDER, Expansion, ExpansionRows, expansion_parts, new_expansion
from .metrics import Metrics, score_metrics, temperature_pass
from .sweep import MomentSums, Selection, compute_dtype
from .tempfit import ACCEPT, MAX_PASSES, ORDER, derivatives, fit_beta, moment_pass, solve, taylor_root

Solved = tuple[float, float, bool]
"""(beta, passes, converged)"""


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


CHECK_FLOAT32 = 1e-8
"""How far (relative) pass 3 may put the fit part's optimum from the fit, for float32 logits.

Pass 2 (rows gathered from the fit part) and pass 3 (all rows) round the
float32 exponentials of a row alike only up to the chunk layout of the
row sums, and the noise this leaves in f' moves its root by about 1e-9
(relative) on 750 000 rows; float64 logits are checked to ACCEPT.
"""


def _settled(beta: float, derivs: np.ndarray, bounds: tuple[float, float], tol: float) -> bool:
    """Whether beta is the optimum (within ``tol``) or a bound the optimum lies beyond."""
    g = float(derivs[0])
    if (beta >= bounds[1] and g <= 0) or (beta <= bounds[0] and g >= 0):
        return True
    root = taylor_root(derivs)
    return root is not None and abs(root[0]) <= tol * beta


def _from(first, logits, labels, rows, threads):
    """A solver pass function whose first call returns ``first`` (a pass already made)."""
    pending = [first]

    def pass_fn(beta):
        if pending:
            return pending.pop()
        return derivatives(moment_pass(logits, labels, beta, Selection(rows=rows), threads))

    return pass_fn


def fit_and_score(
    logits: np.ndarray,
    labels: np.ndarray,
    fit_rows: np.ndarray,
    eval_rows: np.ndarray,
    n_bins: int,
    bounds: tuple[float, float],
    bootstrap: bool,
    threads: int | None = None,
) -> Scored:
    """Fit a temperature on ``fit_rows``, score both parts before and after, refit on all rows.

    ``eval_rows is fit_rows`` means an in-sample evaluation (one part, all rows).
    """
    holdout = fit_rows is not eval_rows
    part, local = expansion_parts(len(logits), fit_rows, eval_rows)
    parts = 2 if holdout else 1
    masks = [part == p for p in range(parts)] if holdout else [None]
    sel = Selection(part=part)
    first, _ = temperature_pass(logits, labels, 1.0, n_bins, selection=sel, parts=parts, threads=threads)
    before = [score_metrics(first, p, masks[p], None) for p in range(parts)]
    fit_on = fit_rows if holdout else None
    tol = CHECK_FLOAT32 if compute_dtype(logits) == np.float32 else ACCEPT
    beta, passes, converged = fit_beta(logits, labels, fit_on, None, None, bounds, threads)
    for _ in range(MAX_PASSES):
        exp = new_expansion(beta, len(fit_rows), len(eval_rows)) if bootstrap else None

        def extra(exp=exp):
            return (MomentSums(parts, ORDER),) + ((ExpansionRows(exp, local),) if exp is not None else ())

        scores, lanes = temperature_pass(
            logits, labels, beta, n_bins, selection=sel, parts=parts, moments=ORDER,
            sq_moments=SQ_ORDER if bootstrap else 0, sq_part=1 if holdout else None, extra=extra,
            threads=threads,
        )
        sums = MomentSums.merge([lane[0] for lane in lanes])
        passes += 1  # the check of the fit, shared with the scores
        on_fit = derivatives(sums, 0)
        if _settled(beta, on_fit[0], bounds, tol):
            break
        beta, p, converged = solve(_from(on_fit, logits, labels, fit_on, threads), beta, *bounds)
        passes += p - 1
    after = [score_metrics(scores, p, masks[p], None) for p in range(parts)]
    if holdout:
        total = MomentSums(1, ORDER)
        total.sums[0], total.weight[0], total.wrong[0] = sums.sums.sum(0), sums.weight.sum(), sums.wrong.sum()
        full = solve(_from(derivatives(total), logits, labels, None, threads), beta, *bounds)
    else:
        full = (beta, passes, converged)
    return Scored(
        (beta, passes, converged), full, before, after, None if exp is None else exp.finish()
    )
