"""``--method auto``: cross-fit every applicable method, choose by :mod:`onnxcal.choose`, fit the chosen one.

Every candidate method is fitted :data:`~onnxcal.choose.FOLDS` times, each
time on all stratified folds but one, and the rows of the left-out fold
are calibrated with that fit (:func:`out_of_fold`): every row is scored
once, by a map that did not see it, and every method scores the same rows.
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

from ..choose import FOLDS, IDENTITY, TABLE_FIELDS, Candidate, Choice, candidate_methods, choose, n_parameters
from ..errors import OnnxcalError
from ..holdout import _sample_strata, _strata, samples_of
from ..metrics import evaluate
from ..metrics.core import log_softmax
from ..scaling import Scaling
from . import smoothed

# summarize_one(logits, labels, capture_meta, options, threads) -> FitSummary
SummarizeOne = Callable[[np.ndarray, np.ndarray, dict[str, Any], Any, Any], Any]
# refit(logits, labels, options, rows=...) -> FitResult (onnxcal.fit.fit_scaling)
Refit = Callable[..., Any]
_Z = 1.959963984540054  # the 97.5 % point of the standard normal (scipy.stats.norm.ppf(0.975))


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
) -> tuple[np.ndarray, int, bool]:
    """Calibrated logits of every row by the fit on the other folds; the largest parameter count; all converged."""
    out = np.empty(logits.shape, dtype=np.float64)
    sizes, converged = [], True
    for f in np.unique(fold):
        rows = np.flatnonzero(fold != f)
        result = refit(logits, labels, options, rows=rows)
        held = np.flatnonzero(fold == f)
        out[held] = result.scaling.apply(np.asarray(logits[held]))
        sizes.append(n_parameters(result.scaling, logits.shape[1]))
        converged = converged and bool(result.converged)
    return out, max(sizes), converged


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


def _percentile(values: Sequence[float]) -> list[float] | None:
    v = np.asarray(values, dtype=np.float64)
    if len(v) == 0 or not np.all(np.isfinite(v)):
        return None
    lo, hi = np.percentile(v, [2.5, 97.5])
    return [float(lo), float(hi)]


def _normal_difference(d: np.ndarray, groups: np.ndarray | None) -> list[float]:
    """mean +- 1.96 standard errors of the mean per-row difference (sample sums with ``groups``)."""
    per = d if groups is None else np.add.reduceat(d, samples_of(groups).starts)
    if len(per) < 2:
        return [float("-inf"), float("inf")]
    mean = float(d.sum() / len(d))
    se = float(np.sqrt(len(per)) * np.std(per, ddof=1) / len(d))
    return [mean - _Z * se, mean + _Z * se]


class _Scored:
    """One candidate's out-of-fold figures, per-row NLL and per-resample NLL means."""

    def __init__(self, method: str, size: int, converged: bool, metrics: dict[str, float],
                 intervals: dict[str, list[float] | None], losses: np.ndarray, draws: np.ndarray) -> None:
        self.method, self.size, self.converged = method, size, converged
        self.metrics, self.intervals, self.losses, self.draws = metrics, intervals, losses, draws


def _score(method: str, logits: np.ndarray, labels: np.ndarray, options: Any, fold: np.ndarray, refit: Refit,
           groups: np.ndarray | None, threads: int | None) -> _Scored:
    if method == IDENTITY:  # the model as it is: nothing fitted, every row scored by its own probabilities
        oof, size, converged = Scaling.of_temperature(1.0).apply(np.asarray(logits, dtype=np.float64)), 0, True
    else:
        oof, size, converged = out_of_fold(logits, labels, replace(options, method=method), fold, refit)
    whole = evaluate(oof, labels, 1.0, options.n_bins, threads=threads).to_dict()
    losses = row_nll(oof, labels)
    per: dict[str, list[float]] = {f: [] for f in TABLE_FIELDS}
    draws = []
    for counts in _resamples(len(losses), options.bootstrap, options.seed, groups):
        draws.append(float(counts @ losses / counts.sum()))
        m = evaluate(oof, labels, 1.0, options.n_bins, weights=counts, threads=threads).to_dict()
        for f in TABLE_FIELDS:
            per[f].append(float(m[f]) if m[f] is not None else float("nan"))
    intervals = {f: _percentile(per[f]) if options.bootstrap else None for f in TABLE_FIELDS}
    metrics = {f: float(whole[f]) for f in TABLE_FIELDS}
    return _Scored(method, size, converged, metrics, intervals, losses, np.asarray(draws))


def compare(
    logits: np.ndarray, labels: np.ndarray, options: Any, kind: str, refit: Refit, *,
    groups: np.ndarray | None = None, threads: int | None = None,
    progress: Callable[[str, int, int], None] | None = None,
) -> tuple[Choice, list[str]]:
    """Cross-fit every candidate method and apply the rule; the choice and notes (methods left out).

    The candidates are the model as it is (:data:`~onnxcal.choose.IDENTITY`)
    and every applicable method, fitted to Platt's smoothed targets when
    every row is classified correctly (or ``options.smoothed_targets``).
    ``progress("cross-fitting", done, total)`` counts the methods compared.
    """
    fold = fold_ids(labels, FOLDS, options.seed, groups)
    scored, notes = [], []
    asked = bool(options.smoothed_targets)
    smooth = smoothed_fits(logits, labels, options, kind)
    options = replace(options, smoothed_targets=smooth)
    methods = (IDENTITY, *candidate_methods(kind))
    for i, method in enumerate(methods):
        if progress is not None:
            progress("cross-fitting", i, len(methods))
        try:
            scored.append(_score(method, logits, labels, options, fold, refit, groups, threads))
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
        candidates.append(Candidate(s.method, s.size, s.metrics, s.intervals, s.converged, diff))
    n_folds = int(len(np.unique(fold)))
    model = next((s for s in scored if s.method == IDENTITY), None)
    keep = model is not None and all(_above_zero(_difference(m, model, options, groups)) for m in maps)
    choice = choose(candidates, "cross-fitted", n_folds, int(options.bootstrap), smooth, keep)
    if smooth and not asked:
        choice = replace(choice, reason=choice.reason + " (every row is classified correctly, so no "
                         "maximum-likelihood fit exists)")
    return choice, notes


def _difference(s: _Scored, ref: _Scored, options: Any, groups: np.ndarray | None) -> list[float] | None:
    """The 95 % interval of the mean per-row NLL of ``s`` minus ``ref`` (bootstrap, or normal approximation);
    None when a resample gave a non-finite figure."""
    if options.bootstrap:
        return _percentile(s.draws - ref.draws)
    return _normal_difference(s.losses - ref.losses, groups)


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
    if options.smoothed_targets:
        return True
    k = max(logits.shape[1], 2)
    if len(logits) * k * logits.shape[1] > smoothed.MAX_EXPANDED:  # too large to repeat: the fits warn instead
        return False
    return smoothed.all_correct(logits, labels)


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
    note = (f"--method auto compared {len(choice.candidates)} candidates, each cross-fitted on {choice.folds} "
            f"folds: {choice.reason}")
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


def describe_candidates(choice: Choice) -> Sequence[str]:
    """The comparison as plain lines (the report's Markdown, logs)."""
    lines = []
    for c in choice.candidates:
        span = c.intervals.get("nll")
        interval = "" if span is None else f" [{span[0]:.4f}, {span[1]:.4f}]"
        diff = "" if c.difference is None else f", vs best [{c.difference[0]:+.4f}, {c.difference[1]:+.4f}]"
        mark = " (chosen)" if c.method == choice.chosen else ""
        lines.append(f"{c.method}: {c.n_parameters} parameters, NLL {c.nll:.4f}{interval}{diff}{mark}")
    return lines
