"""What a fit command produces, apart from how it is made: :class:`FitSummary` (what FIT.json holds)
and :func:`data_warnings` (the labels' warnings). Kept apart from :mod:`onnxcal.fit.summary` so that
the solvers of other kinds (:mod:`onnxcal.fit.l1`) can build a summary without importing it.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np

from .. import __version__, resample
from ..metrics import Metrics
from ..scaling import Scaling
from .options import FORMAT, MIN_PER_CLASS, FitOptions, FitResult, _first

if TYPE_CHECKING:
    from ..choose import Choice


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
    capture: dict[str, Any]
    basis: str = "in-sample"
    fit_part: dict[str, Any] | None = None
    holdout_result: FitResult | None = None
    split: dict[str, Any] = field(default_factory=dict)
    intervals: dict[str, Any] | None = None
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

    def to_dict(self) -> dict[str, Any]:
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


def holdout_notes(
    options: FitOptions, fit_rows: np.ndarray, eval_rows: np.ndarray, groups: np.ndarray | None
) -> list[str]:
    """What the headline figures stand on: held-out samples (rows of whole samples, for a dense output)."""
    if groups is None:
        n = len(fit_rows) + len(eval_rows)
        held, fit, total, by = f"{len(eval_rows)} held-out samples", f"{len(fit_rows)}", f"{n} samples", []
    else:
        s_fit, s_held = (resample.samples_of(np.asarray(groups)[rows]).count for rows in (fit_rows, eval_rows))
        held = f"{len(eval_rows)} held-out rows of {s_held} samples"
        fit = resample.rows_of_samples(len(fit_rows), s_fit)
        total = resample.rows_of_samples(len(fit_rows) + len(eval_rows), s_fit + s_held)
        by = [f"the holdout and the bootstrap take whole samples ({s_fit} to fit, {s_held} held out, with all "
              "their rows): the rows of one sample are not independent"]
    return [
        f"headline figures are on {held} ({options.holdout:g} of the set, stratified, seed {options.seed}), "
        f"calibrated with the fit on the other {fit}",
        f"the parameters baked in are refitted on all {total}",
        *by,
    ]


def split_record(
    options: FitOptions, labels: np.ndarray, fit_rows: np.ndarray, eval_rows: np.ndarray, groups: np.ndarray | None
) -> dict[str, Any]:
    """FitSummary's ``split``: the holdout fraction, its seed, the rows in each part, what it is stratified by,
    and the samples in each part when rows are grouped by sample."""
    held = options.holdout > 0
    return {
        "fraction": options.holdout,
        "seed": options.seed,
        "n_fit": int(len(fit_rows)),
        "n_holdout": int(len(eval_rows)) if held else 0,
        "stratified_by": resample.strata_name(labels) if held else None,
        **resample.split_samples(groups, fit_rows, eval_rows),
    }
