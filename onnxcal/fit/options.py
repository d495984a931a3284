"""What a fit is asked for and what it gives: :class:`FitOptions`, :class:`FitResult`.

Also the parameter bounds every solver shares and the notes a result carries
(a bound hit and why, a temperature far from 1, a solver out of budget).
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np

from ..metrics import DEFAULT_BINS
from ..scaling import Scaling, is_far_from_one

T_MIN = 0.01
T_MAX = 100.0
B_MAX = 100.0  # bound on the biases of vector and Platt scaling
MIN_PER_CLASS = 20
FORMAT = 2


@dataclass(frozen=True)
class FitOptions:
    """How to fit and evaluate (the ``fit`` command's options).

    Attributes
    ----------
    method : str
        ``"temperature"`` (default), ``"vector"`` (multiclass) or ``"platt"`` (binary).
    multilabel : str or None
        ``"shared"`` or ``"per-label"`` temperatures for an N x K 0/1 label
        array; None means ``"shared"`` when the labels are multi-label.
    l2 : float
        Weight of the penalty l2 * (sum (w - 1)^2 + sum b^2) added to the
        mean NLL (vector and Platt scaling).
    holdout : float
        Fraction of the samples held out (stratified) to score the fit on.
    seed : int
        Seed of the split and the bootstrap.
    bootstrap : int
        Bootstrap replicates for the intervals (0: none).
    n_bins : int
        Bins of the ECEs.
    smoothed_targets : bool
        Fit to Platt's smoothed targets instead of the 0/1 labels
        (:mod:`onnxcal.fit.smoothed`; multiclass and binary).
    """

    method: str = "temperature"
    multilabel: str | None = None
    l2: float = 0.0
    holdout: float = 0.25
    seed: int = 0
    bootstrap: int = 200
    n_bins: int = DEFAULT_BINS
    smoothed_targets: bool = False

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


DEFAULT_OPTIONS = FitOptions()
"""The options of a call that gives none (frozen, so one object serves every call)."""


@dataclass(frozen=True)
class FitResult:
    """Outcome of one fit.

    Attributes
    ----------
    scaling : Scaling
        The fitted map (method, parameters, kind).
    passes : float
        Passes over the logits the solver made (a pass over a subsample
        counts as its fraction of the rows).
    converged : bool
        False when the solver's budget ran out.
    on_bound : bool
        True when a parameter lies on (or beyond) its bound.
    warnings : tuple of str
        Human-readable notes on the fit (bound hit and why, T far from 1, ...).
    separable : bool
        True when the map, fitted by maximum likelihood, classifies every
        row it was fitted on correctly (the maps that can move the decision:
        ``onnxcal.fit.smoothed.SEPARATING``): its maximum-likelihood
        estimate does not exist. Not stored in FIT.json (its warning is).
    """

    scaling: Scaling
    passes: float
    converged: bool
    on_bound: bool
    warnings: tuple[str, ...] = ()
    separable: bool = False

    @property
    def temperature(self) -> float | None:
        return self.scaling.temperature

    @property
    def method(self) -> str:
        return self.scaling.method

    def to_dict(self) -> dict[str, Any]:
        return {
            "passes": self.passes,
            "converged": self.converged,
            "on_bound": self.on_bound,
            "warnings": list(self.warnings),
        }


def _first(idx: Iterable[int]) -> str:
    shown = [int(i) for i in idx]
    return ", ".join(map(str, shown[:5])) + (", ..." if len(shown) > 5 else "")


def _bound_warning(temperature: float) -> str:
    if temperature <= T_MIN:
        return (
            f"the optimum lies at the lower bound T = {T_MIN:g}: the model is right on "
            "(nearly) every sample of this set, so the likelihood keeps rising as T "
            "shrinks; use a larger or harder validation set"
        )
    return (
        f"the optimum lies at the upper bound T = {T_MAX:g}: the scores carry almost "
        "no information about the labels on this set; check that the labels match "
        "the model's classes"
    )


def _far_warning(scaling: Scaling) -> str:
    if scaling.temperature is not None:
        return (
            f"T = {scaling.temperature:.3g} is far from 1: check that the chosen output "
            "really holds logits and not probabilities"
        )
    t = 1.0 / np.atleast_1d(scaling.scale())
    return (
        f"the fitted scales amount to temperatures from {t.min():.3g} to {t.max():.3g}, "
        "some far from 1 (outside 0.5 to 5): check that the chosen output really holds "
        "logits and not probabilities"
    )


def _result(scaling: Scaling, passes: float, converged: bool, bound_notes: list[str]) -> FitResult:
    notes = list(bound_notes)
    if not notes and is_far_from_one(scaling):
        notes.append(_far_warning(scaling))
    if not converged:
        notes.append(f"the solver stopped after {passes:.3g} passes without converging")
    return FitResult(scaling, float(passes), bool(converged), bool(bound_notes), tuple(notes))
