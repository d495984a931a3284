"""``--method auto``: every applicable method fitted on the fit part, one chosen on the held-out part.

The rule (issue 15): the method with the lowest held-out NLL is the *best*;
the chosen one is the simplest (fewest parameters, then the order of
:data:`onnxcal.scaling.METHODS`) whose held-out NLL lies within the best
one's bootstrap percentile interval. With no interval (``--bootstrap 0``)
the best is chosen. A simpler map whose NLL the data cannot tell from the
best's is preferred because it has less to overfit and, for temperature
scaling, keeps every decision of the model (common practice: the principle
of parsimony).

Pure functions over plain numbers: the fitting is ``onnxcal.fit``'s, which
hands :func:`choose` one :class:`Candidate` per method (made by
:func:`candidate`) and stores the :class:`Choice` in FIT.json.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass, field
from typing import Any

from .errors import OnnxcalError
from .scaling import AFFINE_METHODS, METHODS, METHODS_FOR, Scaling

# The metrics of the comparison table, in its column order.
TABLE_FIELDS = ("nll", "ece", "brier", "accuracy")


@dataclass(frozen=True)
class Candidate:
    """One method's fit, scored on the held-out part.

    Attributes
    ----------
    method : str
    n_parameters : int
        Numbers the map holds (a lookup's: its fitted table sizes).
    metrics : dict
        Held-out figures after calibration (:data:`TABLE_FIELDS`).
    intervals : dict
        Their bootstrap percentile intervals, ``[low, high]`` or None.
    converged : bool
        False when the solver's budget ran out.
    """

    method: str
    n_parameters: int
    metrics: dict[str, float]
    intervals: dict[str, list[float] | None] = field(default_factory=dict)
    converged: bool = True

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
        The method with the lowest held-out NLL.
    reason : str
        Why ``chosen``, in one sentence (printed, and in the report).
    basis : str
        ``"held-out"`` or ``"in-sample"`` (``--holdout 0``).
    candidates : tuple of Candidate
        The comparison table, in the order the methods were tried.
    """

    chosen: str
    best: str
    reason: str
    basis: str
    candidates: tuple[Candidate, ...]

    def to_dict(self) -> dict[str, Any]:
        return {
            "chosen": self.chosen,
            "best": self.best,
            "reason": self.reason,
            "basis": self.basis,
            "rule": RULE,
            "candidates": [c.to_dict() for c in self.candidates],
        }


RULE = (
    "lowest held-out NLL; among the methods whose held-out NLL lies within the best one's bootstrap "
    "interval, the one with the fewest parameters"
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


def candidate(
    scaling: Scaling, num_classes: int, after: Mapping[str, float], intervals: Mapping[str, Any] | None,
    converged: bool = True,
) -> Candidate:
    """A :class:`Candidate` from a fit's held-out figures and bootstrap intervals (``intervals["after"]``)."""
    spans = (intervals or {}).get("after") or {}
    return Candidate(
        method=scaling.method,
        n_parameters=n_parameters(scaling, num_classes),
        metrics={f: float(after[f]) for f in TABLE_FIELDS},
        intervals={f: spans.get(f) for f in TABLE_FIELDS},
        converged=converged,
    )


def _order(c: Candidate) -> tuple[int, int]:
    return c.n_parameters, METHODS.index(c.method)


def _count(n: int) -> str:
    return f"{n} parameter{'' if n == 1 else 's'}"


def choose(candidates: Sequence[Candidate], basis: str = "held-out") -> Choice:
    """Apply the rule to the candidates.

    Examples
    --------
    >>> a = Candidate("temperature", 1, {"nll": 0.30, "ece": 0, "brier": 0, "accuracy": 1}, {"nll": [0.27, 0.33]})
    >>> b = Candidate("matrix", 20, {"nll": 0.28, "ece": 0, "brier": 0, "accuracy": 1}, {"nll": [0.25, 0.31]})
    >>> choose([a, b]).chosen
    'temperature'
    """
    if not candidates:
        raise OnnxcalError("no calibration method applies to these scores")
    best = min(candidates, key=lambda c: (c.nll, _order(c)))
    span = best.intervals.get("nll")
    what = "held-out" if basis == "held-out" else "in-sample"
    if span is None:
        reason = (f"{best.method} has the lowest {what} NLL ({best.nll:.4g}); with no bootstrap interval "
                  "(--bootstrap 0) no simpler method is preferred")
        return Choice(best.method, best.method, reason, basis, tuple(candidates))
    within = [c for c in candidates if c.nll <= span[1]]
    chosen = min(within, key=_order)
    interval = f"{span[0]:.4g} to {span[1]:.4g}"
    if chosen is best:
        reason = (f"{best.method} has the lowest {what} NLL ({best.nll:.4g}, 95% bootstrap interval {interval}) "
                  "and no method with fewer parameters lies within that interval")
    else:
        reason = (f"{best.method} has the lowest {what} NLL ({best.nll:.4g}, 95% bootstrap interval {interval}); "
                  f"{chosen.method} ({_count(chosen.n_parameters)} against {best.n_parameters}) has {what} NLL "
                  f"{chosen.nll:.4g}, within that interval, so the simpler {chosen.method} is chosen")
    return Choice(chosen.method, best.method, reason, basis, tuple(candidates))


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
        )
        for c in data["candidates"]
    )
    for name in (data["chosen"], data["best"], *(c.method for c in candidates)):
        if name not in METHODS:
            raise OnnxcalError(f"'choice' names an unknown method {name!r}", f"use one of: {', '.join(METHODS)}")
    return Choice(str(data["chosen"]), str(data["best"]), str(data["reason"]), str(data["basis"]), candidates)
