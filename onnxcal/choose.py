"""``--method auto``: every applicable method cross-fitted on all rows, the simplest of the best chosen.

The rule (issue 15, made robust on small sets):

1. *Cross-fitted NLL.* The rows are split into :data:`FOLDS` stratified
   folds (whole samples when a sample gives several rows); every method is
   fitted on all folds but one and scores the rows of that one, so every
   row is held out exactly once. On small sets (:data:`REPEAT_VALUES`)
   this is done :data:`REPEATS` times with different folds and each row's
   out-of-fold NLL averaged over the repeats (repeated cross-validation):
   which rows share a fold otherwise moves the scores of a set of a few
   dozen rows by more than the methods differ. A method's cross-fitted
   NLL is the mean of these per-row out-of-fold NLLs. One small held-out part (a dozen
   rows of a small set) makes a noisy score that rewards a lucky
   overfitted map; cross-fitting scores every row, with the same rows for
   every method.
2. *Best.* The method with the lowest cross-fitted NLL.
3. *Paired comparison.* For every other method, the per-row differences
   of its out-of-fold NLL and the best one's; their mean's 95 % bootstrap
   percentile interval (:mod:`onnxcal.fit.paired`; the same resamples of
   rows for every method; with ``--bootstrap 0``, mean +- 1.96 standard
   errors). The rows are the same for both methods, so the interval of the
   difference is much narrower than the interval of the best one's NLL
   alone (which holds the rows' own spread, common to both).
4. *Chosen.* The model as it is (:data:`IDENTITY`, no parameters) when
   every map's paired per-row NLL difference to its own probabilities has
   an interval above 0: no map improved on them. Otherwise the method with
   the fewest parameters (then the order of
   :data:`onnxcal.scaling.METHODS`) among the best and the methods whose
   interval reaches 0 or below, i.e. that the data cannot tell from the
   best. A simpler map has less to overfit and, for temperature scaling,
   keeps every decision of the model (common practice: the principle of
   parsimony). The chosen method is then fitted as ``--method NAME`` (its
   held-out report, its bootstrap; the parameters baked in fitted on all
   rows).

When every calibration row is classified correctly the maximum-likelihood
fits do not exist (:mod:`onnxcal.fit.smoothed`); every candidate is then
fitted to Platt's smoothed targets, and ``Choice.smoothed_targets`` says so.
Each single fit, on a fold or on all rows, is also fitted to them when its
own estimate does not exist (:func:`onnxcal.fit.auto.fit_with_estimate`:
a fold without an error, or a map that classifies every row it was fitted
on correctly), so every candidate is scored as it would be baked in.

Pure functions over plain numbers: the fitting is :mod:`onnxcal.fit.auto`'s,
which hands :func:`choose` one :class:`Candidate` per method and stores the
:class:`Choice` in FIT.json.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass, field
from typing import Any

from .errors import OnnxcalError
from .scaling import AFFINE_METHODS, METHODS, METHODS_FOR, Scaling

# The metrics of the comparison table, in its column order.
TABLE_FIELDS = ("nll", "ece", "brier", "accuracy")
# Folds of the cross-fitting (fewer when a set has fewer samples).
FOLDS = 5
# Repeats of the cross-fitting, each with its own folds, on sets of at most REPEAT_VALUES scores (rows x classes):
# on a small set which rows share a fold moves a method's score by more than the methods differ; above it one
# repeat is enough, and every repeat keeps its out-of-fold scores (3 x 16 MB at the limit).
REPEATS = 3
REPEAT_VALUES = 2_000_000
# A paired interval whose lower end is at most this is taken to reach 0 (rounding of equal fits).
_TIE = 1e-12
# The candidate "the model as it is" (no map: temperature scaling at T = 1 is what gets baked in).
IDENTITY = "uncalibrated"


@dataclass(frozen=True)
class Candidate:
    """One method, cross-fitted and scored on every row held out once.

    Attributes
    ----------
    method : str
    n_parameters : int
        Numbers the map holds (a lookup's: the largest fitted table size
        over the folds).
    metrics : dict
        Out-of-fold figures (:data:`TABLE_FIELDS`).
    intervals : dict
        Their bootstrap percentile intervals, ``[low, high]`` or None.
    converged : bool
        False when the solver's budget ran out on any fold.
    difference : list of float or None
        The 95 % interval of the mean per-row NLL difference to the best
        method (this one's minus the best one's); None for the best.
    smoothed_folds : int
        Fold fits (over every repeat) made to Platt's smoothed targets
        because their maximum-likelihood estimate does not exist (the
        fold's rows, or the map fitted to them, classify every row
        correctly).
    """

    method: str
    n_parameters: int
    metrics: dict[str, float]
    intervals: dict[str, list[float] | None] = field(default_factory=dict)
    converged: bool = True
    difference: list[float] | None = None
    smoothed_folds: int = 0

    @property
    def nll(self) -> float:
        return float(self.metrics["nll"])

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


@dataclass(frozen=True)
class Choice:
    """The outcome of ``--method auto``.

    Attributes
    ----------
    chosen : str
        The method baked in.
    best : str
        The method with the lowest cross-fitted NLL.
    reason : str
        Why ``chosen``, in one sentence (printed, and in the report).
    basis : str
        What the figures are: ``"cross-fitted"`` (every row held out once).
    candidates : tuple of Candidate
        The comparison table, in the order the methods were tried.
    folds : int
        Folds of the cross-fitting.
    repeats : int
        Repeats of the cross-fitting, each with its own folds (a
        candidate's per-row NLL is its mean over them).
    replicates : int
        Bootstrap resamples behind the intervals (0: the paired intervals
        are mean +- 1.96 standard errors, the others absent).
    smoothed_targets : bool
        Every candidate was fitted to Platt's smoothed targets (the
        calibration rows are all classified correctly, or the user asked).
        The chosen map alone may be too (its fit on all rows classifies
        every row correctly): the reason says so, and FIT.json's options.
    """

    chosen: str
    best: str
    reason: str
    basis: str
    candidates: tuple[Candidate, ...]
    folds: int = FOLDS
    replicates: int = 0
    smoothed_targets: bool = False
    repeats: int = 1

    @property
    def method(self) -> str:
        """The method baked in (the model as it is: temperature scaling at T = 1)."""
        return "temperature" if self.chosen == IDENTITY else self.chosen

    def to_dict(self) -> dict[str, Any]:
        return {
            "chosen": self.chosen,
            "best": self.best,
            "reason": self.reason,
            "basis": self.basis,
            "rule": RULE,
            "folds": self.folds,
            "repeats": self.repeats,
            "replicates": self.replicates,
            "smoothed_targets": self.smoothed_targets,
            "candidates": [c.to_dict() for c in self.candidates],
        }


RULE = (
    "every method cross-fitted (each row held out once, per repeat on small sets; each fit to Platt's smoothed "
    "targets when its maximum-likelihood estimate does not exist: every row it is fitted on classified correctly, by "
    "the model or by the fitted map); the map with the lowest mean out-of-fold NLL is the best; among it and the "
    "maps whose paired per-row NLL difference to it has a 95% bootstrap interval reaching 0, the one with the fewest "
    "parameters; the model is left as it is when every map's paired difference to its own probabilities has a 95% "
    "interval above 0"
)


def candidate_methods(kind: str) -> tuple[str, ...]:
    """The methods ``auto`` tries for a kind of classifier.

    Every method of :data:`~onnxcal.scaling.METHODS_FOR` except
    one-vs-rest Platt on one logit, which is Platt scaling again.
    """
    if kind not in METHODS_FOR:
        raise OnnxcalError(f"unknown kind of classifier {kind!r}")
    return tuple(m for m in METHODS_FOR[kind] if not (kind == "binary" and m == "ovr-platt"))


def n_parameters(scaling: Scaling, num_classes: int) -> int:
    """The numbers a fitted map holds (T: 1; vector: 2K; Platt: 2; the maps: their module's count)."""
    if scaling.method in AFFINE_METHODS:
        return sum(len(v) if isinstance(v, list) else 1 for v in scaling.parameters.values())
    from . import maps

    return int(maps.module(scaling.method).n_parameters(num_classes, scaling.parameters))


def _order(c: Candidate) -> tuple[int, int]:
    return c.n_parameters, -1 if c.method == IDENTITY else METHODS.index(c.method)


def _count(n: int) -> str:
    return f"{n} parameter{'' if n == 1 else 's'}"


def _span(pair: Sequence[float]) -> str:
    return f"{pair[0]:+.4f} to {pair[1]:+.4f}"


def _reaches_zero(c: Candidate) -> bool:
    return c.difference is not None and c.difference[0] <= _TIE


def choose(candidates: Sequence[Candidate], basis: str = "cross-fitted", folds: int = FOLDS,
           replicates: int = 0, smoothed_targets: bool = False, keep_model: bool = False) -> Choice:
    """Apply the rule to the candidates (each with its paired ``difference`` to the best).

    A candidate without a ``difference`` other than the best counts as
    told apart from it. ``best`` is the map with the lowest NLL (the
    :data:`IDENTITY` row, the model as it is, is not a map: its
    ``difference`` is to that map too). The model as it is is chosen only
    with ``keep_model``: every map is worse than it by a paired interval
    above 0 (:func:`onnxcal.fit.auto.compare` decides). Cross-fitting
    scores a map by fits on part of the rows, which handicaps it against
    the unfitted identity on a small set, so a lower mean alone is not
    enough.

    Examples
    --------
    >>> a = Candidate("temperature", 1, {"nll": 0.30}, difference=[-0.004, 0.03])
    >>> b = Candidate("matrix", 20, {"nll": 0.28})
    >>> choose([a, b]).chosen
    'temperature'
    """
    if not candidates:
        raise OnnxcalError("no calibration method applies to these scores")
    maps = [c for c in candidates if c.method != IDENTITY]
    if not maps:
        raise OnnxcalError("no calibration method applies to these scores")
    best = min(maps, key=lambda c: (c.nll, _order(c)))
    how = "bootstrap" if replicates else "normal-approximation"
    if keep_model:
        model = next(c for c in candidates if c.method == IDENTITY)
        reason = (f"no map improved the {basis} NLL: the model's own probabilities have {model.nll:.4g}, and every "
                  f"map is worse by a paired per-row NLL difference whose 95% {how} interval lies above 0, so the "
                  "model is left as it is (temperature T = 1 is baked in: the same probabilities, with the record)")
        return _choice(model, best, reason, basis, candidates, folds, replicates, smoothed_targets)
    within = [best, *(c for c in maps if c is not best and _reaches_zero(c))]
    chosen = min(within, key=_order)
    if chosen is best:
        simpler = [c for c in maps if _order(c) < _order(best)]
        reason = (f"{best.method} has the lowest {basis} NLL ({best.nll:.4g}) and "
                  + (f"every method with fewer parameters is worse by a paired per-row NLL difference whose 95% "
                     f"{how} interval lies above 0" if simpler else "no method has fewer parameters"))
        if len(maps) == 1:
            reason = f"{best.method} is the only method that applies"
    else:
        assert chosen.difference is not None  # in `within` and not the best
        reason = (f"{best.method} has the lowest {basis} NLL ({best.nll:.4g}); {chosen.method} "
                  f"({_count(chosen.n_parameters)} against {best.n_parameters}) has {chosen.nll:.4g}, and the 95% "
                  f"{how} interval of its paired per-row NLL difference to {best.method} "
                  f"({_span(chosen.difference)}) reaches 0, so the simpler {chosen.method} is chosen")
    return _choice(chosen, best, reason, basis, candidates, folds, replicates, smoothed_targets)


def _choice(chosen: Candidate, best: Candidate, reason: str, basis: str, candidates: Sequence[Candidate], folds: int,
            replicates: int, smoothed_targets: bool) -> Choice:
    if smoothed_targets:
        reason += "; every map fitted to Platt's smoothed targets"
    return Choice(chosen.method, best.method, reason, basis, tuple(candidates), folds, replicates, smoothed_targets)


def choice_from_dict(data: Mapping[str, Any]) -> Choice:
    """Rebuild a :class:`Choice` from :meth:`Choice.to_dict` (FIT.json).

    Raises
    ------
    OnnxcalError
        A method that onnxcal does not know.
    KeyError, TypeError, ValueError
        Missing or mistyped fields.
    """
    candidates = tuple(
        Candidate(
            method=str(c["method"]),
            n_parameters=int(c["n_parameters"]),
            metrics={k: float(v) for k, v in c["metrics"].items()},
            intervals={k: (None if v is None else [float(v[0]), float(v[1])]) for k, v in c["intervals"].items()},
            converged=bool(c["converged"]),
            difference=None if c.get("difference") is None else [float(v) for v in c["difference"][:2]],
            smoothed_folds=int(c.get("smoothed_folds", 0)),
        )
        for c in data["candidates"]
    )
    for name in (data["chosen"], data["best"], *(c.method for c in candidates)):
        if name not in METHODS and name != IDENTITY:
            raise OnnxcalError(f"'choice' names an unknown method {name!r}", f"use one of: {', '.join(METHODS)}")
    return Choice(str(data["chosen"]), str(data["best"]), str(data["reason"]), str(data["basis"]), candidates,
                  int(data.get("folds", FOLDS)), int(data.get("replicates", 0)),
                  bool(data.get("smoothed_targets", False)), int(data.get("repeats", 1)))
