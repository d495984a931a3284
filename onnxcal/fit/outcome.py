"""What a fit command produces, apart from how it is made: :class:`FitSummary` (what FIT.json holds)
and :func:`data_warnings` (the labels' warnings). Kept apart from :mod:`onnxcal.fit.summary` so that
the solvers of other kinds (:mod:`onnxcal.fit.l1`) can build a summary without importing it.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .. import __version__
from ..metrics import Metrics
from ..scaling import Scaling
from .options import FORMAT, MIN_PER_CLASS, FitOptions, FitResult, _first


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
    """

    result: FitResult
    before: Metrics
    after: Metrics
    capture: dict
    basis: str = "in-sample"
    fit_part: dict | None = None
    holdout_result: FitResult | None = None
    split: dict = field(default_factory=dict)
    intervals: dict | None = None
    options: FitOptions = FitOptions()
    warnings: tuple[str, ...] = ()
    notes: tuple[str, ...] = ()

    @property
    def scaling(self) -> Scaling:
        return self.result.scaling

    @property
    def temperature(self) -> float | None:
        return self.result.temperature

    def to_dict(self) -> dict:
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
        }


