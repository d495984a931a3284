"""The fit command's summary: choose the solver, fit, score held out, bootstrap, refit on all.

:func:`summarize` gives the :class:`FitSummary` FIT.json holds
(:mod:`onnxcal.fit.store` writes and reads it).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .. import __version__, resample
from ..errors import OnnxcalError
from ..metrics import Metrics, evaluate
from ..passes import fit_and_score
from ..scaling import METHODS_FOR, MULTILABEL_MODES, SIGMOID_L1, Scaling, kind_of
from ..sweep import one_blas_thread
from .affine import _fit_affine
from .l1 import summarize_l1
from .options import (
    DEFAULT_OPTIONS,
    FORMAT,
    MIN_PER_CLASS,
    T_MAX,
    T_MIN,
    FitOptions,
    FitResult,
    _first,
)
from .outcome import FitSummary, data_warnings
from .temperature import _temperature_result, fit_sigmoid_temperature, fit_temperature

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
    if options.method not in allowed:
        what = {
            "multiclass": "a multiclass softmax", "binary": "a single-logit binary", "multilabel": "a multi-label",
        }[kind]
        raise OnnxcalError(
            f"--method {options.method} does not apply to {what} classifier "
            f"({logits.shape[1]} logits per sample)",
            f"use one of: {', '.join(allowed)}",
        )
    return kind


def fit_scaling(
    logits: np.ndarray,
    labels: np.ndarray,
    options: FitOptions = DEFAULT_OPTIONS,
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
    t0 = None if start is None else start.arrays()["temperature"]
    if kind == "multiclass":
        return fit_temperature(logits, labels, rows=rows, weights=weights, start=None if t0 is None else float(t0))
    per_label = kind == "multilabel" and options.multilabel == "per-label"
    return fit_sigmoid_temperature(logits, labels, per_label=per_label, rows=rows, weights=weights, start=t0)


# --------------------------------------------------------------------------
# The summary FIT.json holds


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
    options: FitOptions = DEFAULT_OPTIONS,
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
    if capture_meta.get("fit_as") == SIGMOID_L1:  # L1(sigmoid(z / T)): a fit of its own
        return summarize_l1(logits, labels, capture_meta, options, threads=threads)
    with one_blas_thread():
        return _summarize(logits, labels, capture_meta, options, threads)


def _summarize(logits, labels, capture_meta, options, threads) -> FitSummary:
    kind = resolve_kind(logits, labels, options)
    n = len(logits)
    notes, warnings = [], data_warnings(labels, logits.shape[1])
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
        notes.append(
            "--holdout 0: the figures are in-sample (on the data the parameters were fitted on), so optimistic"
        )
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
