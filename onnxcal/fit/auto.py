"""``--method auto``: cross-fit every applicable method, choose by :mod:`onnxcal.choose`, fit the chosen one.

Every candidate method is fitted :data:`~onnxcal.choose.FOLDS` times, each
time on all stratified folds but one, and the rows of the left-out fold
are calibrated with that fit (:func:`out_of_fold`): every row is scored
once, by a map that did not see it, and every method scores the same rows.
On small sets this is repeated with other folds (:func:`repeats_for`) and
each row's NLL averaged over the repeats. Each fit is to smoothed targets
where its maximum-likelihood estimate does not exist
(:func:`fit_with_estimate`), as the fit baked in would be.
The table's figures are :func:`onnxcal.metrics.evaluate`'s on those
out-of-fold probabilities; their intervals and the paired NLL differences
come from the same bootstrap resamples of rows for every method (no refit:
the resampling is of the per-row terms, so the comparison costs a few
vector sums per resample, not a refit of every method). Only the chosen
method is then summarised as ``--method NAME`` would be (its own held-out
report and bootstrap, its parameters fitted on all rows).

The per-method summariser and the fitter are passed in (as
:mod:`onnxcal.resample` is given its refit), so this module does not import
the one that calls it.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Sequence
from dataclasses import replace
from typing import Any

import numpy as np

from ..choose import (
    FOLDS,
    IDENTITY,
    REPEAT_VALUES,
    REPEATS,
    TABLE_FIELDS,
    Candidate,
    Choice,
    candidate_methods,
    choose,
    n_parameters,
)
from ..errors import OnnxcalError
from ..holdout import _sample_strata, _strata, samples_of
from ..metrics import evaluate
from ..metrics.core import log_softmax
from ..scaling import Scaling
from . import paired, smoothed

# summarize_one(logits, labels, capture_meta, options, threads) -> FitSummary
SummarizeOne = Callable[[np.ndarray, np.ndarray, dict[str, Any], Any, Any], Any]
# refit(logits, labels, options, rows=...) -> FitResult (onnxcal.fit.fit_scaling)
Refit = Callable[..., Any]


def fold_ids(labels: np.ndarray, folds: int, seed: int, groups: np.ndarray | None = None) -> np.ndarray:
    """The fold of each row: stratified (class, or rarest label present), whole samples with ``groups``.

    Within each stratum the units (rows, or samples) are put in a random
    order and dealt to the folds in turn, so every fold holds about its
    share of every class. Fewer folds than ``folds`` when there are fewer
    units.

    Raises
    ------
    OnnxcalError
        Fewer than two units.

    Examples
    --------
    >>> fold_ids(np.array([0, 0, 0, 1, 1, 1]), 3, seed=0).tolist().count(0)
    2
    """
    if groups is None:
        strata = _strata(labels)
    else:
        samples = samples_of(groups)
        strata = _sample_strata(labels, samples)
    n = len(strata)
    k = min(folds, n)
    if k < 2:
        raise OnnxcalError(f"--method auto needs at least 2 samples to cross-fit, but there are {n}")
    rng = np.random.default_rng(seed)
    perm = rng.permutation(n)
    order = perm[np.argsort(strata[perm], kind="stable")]  # a random order within each stratum, strata in turn
    unit_fold = np.empty(n, dtype=np.int64)
    unit_fold[order] = np.arange(n) % k
    return unit_fold if groups is None else np.repeat(unit_fold, samples.sizes)


def out_of_fold(
    logits: np.ndarray, labels: np.ndarray, options: Any, fold: np.ndarray, refit: Refit
) -> tuple[np.ndarray, int, bool, int]:
    """Calibrated logits of every row by the fit on the other folds (:func:`fit_with_estimate`); the largest
    parameter count; all converged; the folds fitted to smoothed targets."""
    out = np.empty(logits.shape, dtype=np.float64)
    sizes, converged, smoothed_folds = [], True, 0
    for f in np.unique(fold):
        rows = np.flatnonzero(fold != f)
        result, smooth = fit_with_estimate(refit, logits, labels, options, rows)
        held = np.flatnonzero(fold == f)
        out[held] = result.scaling.apply(np.asarray(logits[held]))
        sizes.append(n_parameters(result.scaling, logits.shape[1]))
        converged = converged and bool(result.converged)
        smoothed_folds += smooth
    return out, max(sizes), converged, smoothed_folds


def fit_with_estimate(
    refit: Refit, logits: np.ndarray, labels: np.ndarray, options: Any, rows: np.ndarray | None = None
) -> tuple[Any, bool]:
    """A fit, to smoothed targets when the maximum-likelihood estimate does not exist on these rows; and which.

    It does not exist when every fitted row is classified correctly by the
    model, or, for the ``smoothed.SEPARATING`` maps, by the fitted map itself
    (``FitResult.separable``, set by ``fit_scaling``: the rows are separable
    by the map, e.g. vector scaling on a few dozen rows of three classes).
    The ML fit then stops at a bound, or wherever its solver gives up, and is
    overconfident on the first error new data brings. This holds for the
    fit on all rows as for each fold's fit (a fold may have no error when
    the whole set has one), so ``auto`` scores every candidate as it would
    bake it in. Lookups (isotonic, histogram) whose steps reach probability
    0 or 1 keep their fit: smoothing them too made them look better when
    cross-fitted than on new rows (docs/maths.md, "Choosing automatically").
    """
    if options.smoothed_targets or smoothed.without_estimate(logits, labels, rows):
        return refit(logits, labels, replace(options, smoothed_targets=True), rows=rows), True
    result = refit(logits, labels, options, rows=rows)
    if result.separable and smoothed.can_expand(logits, labels, rows):
        return refit(logits, labels, replace(options, smoothed_targets=True), rows=rows), True
    return result, False


def row_nll(calibrated: np.ndarray, labels: np.ndarray) -> np.ndarray:
    """Each row's NLL from calibrated logits (softmax; or sigmoid per column, averaged), as ``evaluate``'s."""
    if np.ndim(labels) == 1 and calibrated.shape[1] > 1:
        lp = log_softmax(calibrated)
        return np.asarray(-lp[np.arange(len(labels)), np.asarray(labels, dtype=np.int64)])
    y = np.asarray(labels, dtype=np.float64).reshape(len(calibrated), -1)
    return np.asarray((np.logaddexp(0.0, calibrated) - y * calibrated).mean(axis=1))


def _resamples(n: int, replicates: int, seed: int, groups: np.ndarray | None) -> Iterator[np.ndarray]:
    """Bootstrap counts per row (whole samples with ``groups``); the same sequence for the same seed."""
    rng = np.random.default_rng(seed)
    samples = None if groups is None else samples_of(groups)
    for _ in range(replicates):
        if samples is None:
            drawn = rng.integers(0, n, n)
        else:
            drawn = samples.rows(rng.integers(0, samples.count, samples.count))
        yield np.bincount(drawn, minlength=n).astype(np.float64)


class _Scored:
    """One candidate's out-of-fold figures, per-row NLL and per-resample NLL means."""

    def __init__(self, method: str, size: int, converged: bool, metrics: dict[str, float],
                 intervals: dict[str, list[float] | None], losses: np.ndarray, draws: np.ndarray,
                 smoothed_folds: int) -> None:
        self.method, self.size, self.converged = method, size, converged
        self.metrics, self.intervals, self.losses, self.draws = metrics, intervals, losses, draws
        self.smoothed_folds = smoothed_folds


def _score(method: str, logits: np.ndarray, labels: np.ndarray, options: Any, folds: Sequence[np.ndarray],
           refit: Refit, groups: np.ndarray | None, threads: int | None) -> _Scored:
    """One candidate over every repeat of the cross-fitting: its figures pooled over the repeats (each row once per
    repeat), its per-row NLL averaged over them."""
    smoothed_folds, size, converged, oofs = 0, 0, True, []
    if method == IDENTITY:  # the model as it is: nothing fitted, every row scored by its own probabilities, the
        folds = folds[:1]   # same in every repeat (scored once: its figures are those of any number of copies)
    for fold in folds:
        if method == IDENTITY:
            oofs.append(Scaling.of_temperature(1.0).apply(np.asarray(logits, dtype=np.float64)))
            continue
        oof, most, ok, smooth = out_of_fold(logits, labels, replace(options, method=method), fold, refit)
        oofs.append(oof)
        size, converged, smoothed_folds = max(size, most), converged and ok, smoothed_folds + smooth
    oof = oofs[0] if len(oofs) == 1 else np.concatenate(oofs)  # one repeat (a large set): no copy
    pooled = np.asarray(labels) if len(oofs) == 1 else np.concatenate([np.asarray(labels)] * len(folds))
    whole = evaluate(oof, pooled, 1.0, options.n_bins, threads=threads).to_dict()
    losses = row_nll(oof, pooled).reshape(len(folds), len(labels)).mean(axis=0)
    per: dict[str, list[float]] = {f: [] for f in TABLE_FIELDS}
    draws = []
    for counts in _resamples(len(losses), options.bootstrap, options.seed, groups):
        draws.append(float(counts @ losses / counts.sum()))
        m = evaluate(oof, pooled, 1.0, options.n_bins, weights=np.tile(counts, len(folds)), threads=threads).to_dict()
        for f in TABLE_FIELDS:
            per[f].append(float(m[f]) if m[f] is not None else float("nan"))
    intervals = {f: paired.percentile(np.asarray(per[f])) if options.bootstrap else None for f in TABLE_FIELDS}
    metrics = {f: float(whole[f]) for f in TABLE_FIELDS}
    return _Scored(method, size, converged, metrics, intervals, losses, np.asarray(draws), smoothed_folds)


def repeats_for(logits: np.ndarray) -> int:
    """Repeats of the cross-fitting: :data:`~onnxcal.choose.REPEATS` up to
    :data:`~onnxcal.choose.REPEAT_VALUES` scores, then one."""
    return REPEATS if logits.shape[0] * logits.shape[1] <= REPEAT_VALUES else 1


def compare(
    logits: np.ndarray, labels: np.ndarray, options: Any, kind: str, refit: Refit, *,
    groups: np.ndarray | None = None, threads: int | None = None,
    progress: Callable[[str, int, int], None] | None = None,
) -> tuple[Choice, list[str]]:
    """Cross-fit every candidate method and apply the rule; the choice and notes (methods left out).

    The candidates are the model as it is (:data:`~onnxcal.choose.IDENTITY`)
    and every applicable method, fitted to Platt's smoothed targets when
    every row is classified correctly (or ``options.smoothed_targets``),
    each fold's fit also when its own estimate does not exist
    (:func:`fit_with_estimate`).
    ``progress("cross-fitting", done, total)`` counts the methods compared.
    """
    folds = [fold_ids(labels, FOLDS, options.seed + r, groups) for r in range(repeats_for(logits))]
    scored, notes = [], []
    asked = bool(options.smoothed_targets)
    smooth = smoothed_fits(logits, labels, options, kind)
    options = replace(options, smoothed_targets=smooth)
    methods = (IDENTITY, *candidate_methods(kind))
    for i, method in enumerate(methods):
        if progress is not None:
            progress("cross-fitting", i, len(methods))
        try:
            scored.append(_score(method, logits, labels, options, folds, refit, groups, threads))
        except OnnxcalError as e:  # e.g. a map that cannot be fitted on a fold: left out, said so
            notes.append(f"--method auto left out {method}: {e.message}")
    if progress is not None:
        progress("cross-fitting", len(methods), len(methods))
    maps = [s for s in scored if s.method != IDENTITY]
    if not maps:
        raise OnnxcalError("--method auto could not fit any method on these scores", "; ".join(notes) or None)
    best = min(maps, key=lambda s: float(s.metrics["nll"]))
    candidates = []
    for s in scored:
        diff = None if s is best else _difference(s, best, options, groups)
        candidates.append(Candidate(s.method, s.size, s.metrics, s.intervals, s.converged, diff, s.smoothed_folds))
    n_folds = int(len(np.unique(folds[0])))
    model = next((s for s in scored if s.method == IDENTITY), None)
    keep = model is not None and all(_above_zero(_difference(m, model, options, groups)) for m in maps)
    choice = replace(choose(candidates, "cross-fitted", n_folds, int(options.bootstrap), smooth, keep),
                     repeats=len(folds))
    if smooth and not asked:
        choice = replace(choice, reason=choice.reason + " (every row is classified correctly, so no "
                         "maximum-likelihood fit exists)")
    return choice, notes


def _difference(s: _Scored, ref: _Scored, options: Any, groups: np.ndarray | None) -> list[float] | None:
    """The 95 % interval of the mean per-row NLL of ``s`` minus ``ref`` (bootstrap percentiles, or normal
    approximation); None when a resample gave a non-finite figure."""
    if options.bootstrap:
        return paired.percentile(s.draws - ref.draws)
    return paired.normal(s.losses - ref.losses, groups)


def _above_zero(interval: list[float] | None) -> bool:
    return interval is not None and interval[0] > 0


def smoothed_fits(logits: np.ndarray, labels: np.ndarray, options: Any, kind: str) -> bool:
    """Whether ``auto`` fits its candidates to smoothed targets: asked for, or every row classified correctly
    (then no maximum-likelihood fit exists) on a set small enough to repeat once per class (else the fits say
    that no maximum-likelihood estimate exists); never for multi-label labels."""
    if kind == "multilabel":
        if options.smoothed_targets:
            smoothed.expanded(logits[:1], labels[:1])  # raises: no smoothed targets for multi-label labels
        return False
    return bool(options.smoothed_targets) or smoothed.without_estimate(logits, labels)


def fit_all(
    logits: np.ndarray,
    labels: np.ndarray,
    capture_meta: dict[str, Any],
    options: Any,
    kind: str,
    summarize_one: SummarizeOne,
    refit: Refit,
    *,
    groups: np.ndarray | None = None,
    threads: int | None = None,
    progress: Callable[[str, int, int], None] | None = None,
) -> tuple[Any, Choice]:
    """Choose by :func:`compare`; the chosen method's summary (with ``choice``) and the choice.

    ``options`` is a ``FitOptions`` with ``method="auto"``; the chosen
    method is summarised with a copy naming it.
    """
    choice, left_out = compare(logits, labels, options, kind, refit, groups=groups, threads=threads,
                               progress=progress)
    options = replace(options, smoothed_targets=choice.smoothed_targets)
    if choice.chosen == IDENTITY:
        chosen = _as_it_is(summarize_one(logits, labels, capture_meta,
                                         replace(options, method="temperature", smoothed_targets=False, bootstrap=0),
                                         threads))
    else:
        chosen = summarize_one(logits, labels, capture_meta, replace(options, method=choice.chosen), threads)
        if not options.smoothed_targets and chosen.result.separable and smoothed.can_expand(logits, labels):
            # as fit_with_estimate does for each fold: the map fitted on all rows classifies every one correctly
            options = replace(options, smoothed_targets=True)
            chosen = summarize_one(logits, labels, capture_meta, replace(options, method=choice.chosen), threads)
            choice = replace(choice, reason=f"{choice.reason}; {choice.chosen} fitted on all rows classifies every "
                             "one correctly, so its maximum-likelihood fit does not exist: it is fitted to Platt's "
                             "smoothed targets")
    times = "" if choice.repeats == 1 else f" {choice.repeats} times"
    note = (f"--method auto compared {len(choice.candidates)} candidates, each cross-fitted on {choice.folds} "
            f"folds{times}: {choice.reason}")
    return replace(chosen, choice=choice, options=options, notes=(*chosen.notes, *left_out, note)), choice


def _as_it_is(summary: Any) -> Any:
    """A temperature summary (without bootstrap) turned into the model as it is: T = 1, after = before."""
    result = summary.result
    same = replace(result, scaling=Scaling.of_temperature(1.0, result.scaling.kind), passes=0.0, converged=True,
                   on_bound=False, warnings=())
    fit_part = None if summary.fit_part is None else {"before": summary.fit_part["before"],
                                                      "after": summary.fit_part["before"]}
    return replace(summary, result=same, after=summary.before, fit_part=fit_part,
                   holdout_result=None if summary.holdout_result is None else same, intervals=None,
                   warnings=tuple(w for w in summary.warnings if w not in result.warnings),
                   notes=(*summary.notes, "the model is left as it is (T = 1): no map to put intervals on"))
