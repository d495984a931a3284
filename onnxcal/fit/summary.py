"""The fit command's summary: choose the solver, fit, score held out, bootstrap, refit on all.

:func:`summarize` gives the :class:`FitSummary` FIT.json holds
(:mod:`onnxcal.fit.store` writes and reads it).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import replace
from typing import Any
from warnings import warn

import numpy as np

from .. import resample
from ..errors import OnnxcalError, OnnxcalWarning
from ..expansion import Expansion
from ..maps import LOOKUP_METHODS
from ..metrics import Metrics, evaluate
from ..passes import fit_and_score
from ..scaling import MAP_METHODS, METHODS_FOR, MULTILABEL_MODES, SIGMOID_L1, Scaling, kind_of
from ..sweep import one_blas_thread
from . import smoothed
from .affine import _fit_affine
from .auto import fit_all
from .l1 import summarize_l1
from .maps import fit_map, slow_fit_warning
from .options import (
    DEFAULT_OPTIONS,
    T_MAX,
    T_MIN,
    FitOptions,
    FitResult,
)
from .outcome import FitSummary, data_warnings, holdout_notes, split_record
from .temperature import _temperature_result, fit_sigmoid_temperature, fit_temperature

# --------------------------------------------------------------------------
# Dispatch and warnings on the data


AUTO = "auto"  # --method auto: every applicable method, one chosen (fit.auto, onnxcal.choose)

Progress = Callable[[str, int, int], None]
"""``progress(stage, done, total)``: the fit's stages ("fitting", "bootstrap"), as capture's progress."""
FITTING = "fitting"


def _silent(stage: str, done: int, total: int) -> None:
    """The progress callback when none is given."""


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
    With ``options.smoothed_targets`` the fit is to Platt's smoothed targets
    (the same solver on the repeated set of :func:`smoothed.expanded`);
    otherwise a fit that stops at its bound on rows all classified correctly
    says that the maximum-likelihood estimate does not exist.
    """
    if options.smoothed_targets:
        z, y, w = smoothed.expanded(logits, labels, rows, weights)
        plain = replace(options, smoothed_targets=False)
        return _fit_labels(z, y, plain, rows=None, weights=w, start=start)
    result = _fit_labels(logits, labels, options, rows=rows, weights=weights, start=start)
    return _said_if_no_estimate(result, logits, labels, rows, weights)


def _said_if_no_estimate(
    result: FitResult, logits: np.ndarray, labels: np.ndarray, rows: np.ndarray | None = None,
    weights: np.ndarray | None = None,
) -> FitResult:
    """A fit on its bound over rows all classified correctly: its bound note replaced by the no-estimate warning.
    A map of ``smoothed.SEPARATING`` that classifies all of them correctly: ``separable``, and its warning."""
    if result.on_bound and smoothed.all_correct(logits, labels, rows, weights):
        rest = tuple(w for w in result.warnings if " bound" not in w)  # said again, with the reason and the remedies
        return replace(result, warnings=(smoothed.no_estimate_warning(_bound_what(result)), *rest))
    if result.method in smoothed.SEPARATING and smoothed.separates(result.scaling, logits, labels, rows, weights):
        rest = tuple(w for w in result.warnings if " bound" not in w)
        return replace(result, separable=True, warnings=(smoothed.separated_warning(result.method), *rest))
    return result


def _bound_what(result: FitResult) -> str:
    if result.method == "temperature":
        return "the temperature"
    return f"a parameter of {result.method} scaling"


def _fit_labels(
    logits: np.ndarray,
    labels: np.ndarray,
    options: FitOptions,
    *,
    rows: np.ndarray | None = None,
    weights: np.ndarray | None = None,
    start: Scaling | None = None,
) -> FitResult:
    """:func:`fit_scaling` on the labels as they are."""
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


def _fit_map(
    logits: np.ndarray, labels: np.ndarray, options: FitOptions, kind: str, rows: np.ndarray | None,
    weights: np.ndarray | None, start: Scaling | None,
) -> FitResult:
    """A map of onnxcal.maps: its own solver (ensemble temperature scaling: T from fit_temperature)."""
    extra: dict[str, float | None] = {}
    t_bound, t_notes = False, tuple[str, ...]()
    if options.method == "ensemble-temperature":  # its T is temperature scaling's, with its bound and its notes
        t = fit_temperature(logits, labels, rows=rows, weights=weights)
        extra["temperature"], t_bound, t_notes = t.temperature, t.on_bound, t.warnings
    scaling, passes, converged, notes, on_bound = fit_map(
        logits, labels, options.method, kind, options.l2, rows=rows, weights=weights, start=start, **extra
    )
    return FitResult(scaling, passes, converged, on_bound=on_bound or t_bound, warnings=(*t_notes, *notes))


# --------------------------------------------------------------------------
# The summary FIT.json holds

_Scores = tuple[tuple[Metrics, ...], ...]
"""The metrics before and after calibration, per part (fit part, held-out part; or all rows)."""


def _fit_and_evaluate(
    logits: np.ndarray, labels: np.ndarray, options: FitOptions, fit_rows: np.ndarray, eval_rows: np.ndarray,
    progress: Progress = _silent,
) -> tuple[FitResult, FitResult, _Scores]:
    """Fit on the fit part, score both parts before and after, refit on all (any method);
    ``progress("fitting", done, 3)`` after each of the three steps."""
    progress(FITTING, 0, 3)
    if fit_rows is eval_rows:
        result = fit_scaling(logits, labels, options)
        progress(FITTING, 1, 3)
        before = evaluate(logits, labels, 1.0, options.n_bins)
        after = evaluate(logits, labels, result.scaling, options.n_bins)
        progress(FITTING, 3, 3)
        return result, result, ((before,), (after,))
    part = fit_scaling(logits, labels, options, rows=fit_rows)
    progress(FITTING, 1, 3)
    scores = tuple(
        tuple(evaluate(logits, labels, s, options.n_bins, rows=rows) for rows in (fit_rows, eval_rows))
        for s in (1.0, part.scaling)
    )
    progress(FITTING, 2, 3)
    full = fit_scaling(logits, labels, options, start=part.scaling)
    progress(FITTING, 3, 3)
    return part, full, scores


def _temperature_passes(
    logits: np.ndarray, labels: np.ndarray, options: FitOptions, fit_rows: np.ndarray, eval_rows: np.ndarray,
    threads: int | None, progress: Progress = _silent,
) -> tuple[FitResult, FitResult, _Scores, Expansion | None]:
    """The same for a multiclass temperature, in three passes (see :mod:`onnxcal.passes`)."""
    scored = fit_and_score(
        logits, labels, fit_rows, eval_rows, options.n_bins, (1.0 / T_MAX, 1.0 / T_MIN), options.bootstrap > 0,
        threads, progress=progress,
    )
    part, full = (
        _temperature_result(np.array([s.beta]), s.passes, s.converged, "multiclass") for s in (scored.part, scored.full)
    )
    part = _said_if_no_estimate(part, logits, labels, fit_rows)
    full = _said_if_no_estimate(full, logits, labels)
    return part, full, (tuple(scored.before), tuple(scored.after)), scored.expansion


def summarize(
    logits: np.ndarray,
    labels: np.ndarray,
    capture_meta: dict[str, Any],
    options: FitOptions = DEFAULT_OPTIONS,
    *,
    threads: int | None = None,
    groups: np.ndarray | None = None,
    progress: Progress | None = None,
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
    groups : ndarray of int, optional
        The sample of each row (sorted), when a sample gives several rows (a
        per-position or per-pixel output: ``Capture.groups()``): the holdout
        and the bootstrap then take whole samples, and the notes and
        ``split`` say how many.
    progress : callable, optional
        ``progress(stage, done, total)`` as the fit goes: ``"fitting"`` (its
        passes or steps, out of 3) and ``"bootstrap"`` (replicates done, out
        of ``options.bootstrap``); with ``method="auto"`` each stage is
        prefixed by the method (``"vector: bootstrap"``).

    Returns
    -------
    FitSummary
    """
    told = progress or _silent
    if capture_meta.get("fit_as") == SIGMOID_L1:  # L1(sigmoid(z / T)): a fit of its own
        return summarize_l1(logits, labels, capture_meta, options, threads=threads, groups=groups, progress=told)
    with one_blas_thread():
        if options.method == AUTO:
            kind = resolve_kind(logits, labels, options)

            def one(  # the chosen method, summarised as --method NAME (whole samples with groups)
                lg: np.ndarray, lb: np.ndarray, meta: dict[str, Any], opts: FitOptions, th: int | None
            ) -> FitSummary:
                def each(stage: str, done: int, total: int) -> None:
                    told(f"{opts.method}: {stage}", done, total)

                return _summarize(lg, lb, meta, opts, th, groups, each)

            chosen: FitSummary = fit_all(
                logits, labels, capture_meta, options, kind, one, fit_scaling, groups=groups, threads=threads,
                progress=told,
            )[0]
            return chosen
        return _summarize(logits, labels, capture_meta, options, threads, groups, told)


def _summarize(
    logits: np.ndarray, labels: np.ndarray, capture_meta: dict[str, Any], options: FitOptions, threads: int | None,
    groups: np.ndarray | None = None, progress: Progress = _silent,
) -> FitSummary:
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
        fit_rows, eval_rows = resample.split_holdout(labels, options.holdout, options.seed, groups=groups)
    else:
        fit_rows = eval_rows = np.arange(n)
    if kind == "multiclass" and options.method == "temperature" and not options.smoothed_targets:
        part, result, scores, expansion = _temperature_passes(
            logits, labels, options, fit_rows, eval_rows, threads, progress
        )
    else:
        part, result, scores = _fit_and_evaluate(logits, labels, options, fit_rows, eval_rows, progress)
        expansion = None
    if options.holdout > 0:
        (fit_before, before), (fit_after, after) = scores
        fit_part = {"before": fit_before, "after": fit_after}
        basis = "held-out"
        notes.extend(holdout_notes(options, fit_rows, eval_rows, groups))
    else:
        ((before,), (after,)), fit_part, basis = scores, None, "in-sample"
        notes.append(
            "--holdout 0: the figures are in-sample (on the data the parameters were fitted on), so optimistic"
        )
    intervals = None
    if options.bootstrap > 0:
        intervals = resample.bootstrap(
            logits, labels, options, fit_rows, eval_rows, part.scaling, refit=fit_scaling, expansion=expansion,
            threads=threads, groups=groups, progress=progress,
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
        split=split_record(options, labels, fit_rows, eval_rows, groups),
        intervals=intervals,
        options=options,
        warnings=tuple(warnings),
        notes=tuple(notes),
    )
