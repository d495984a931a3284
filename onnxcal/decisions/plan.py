"""Choosing the decision thresholds a patch bakes in: the options, the rows, the record section.

``calibrate`` and ``patch`` call :func:`choose` with the calibrated
probabilities of labelled rows the map was not fitted on (the held-out part
of the validation set, with the map fitted on the other part; or a separate
labelled set), and hand the result to ``graph.decide.add_decisions``.
``Decisions.section`` is what the calibration record keeps; ``lines`` what
the commands print.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..errors import OnnxcalError
from ._inputs import check_fraction, compute_dtype
from .conformal import SCORES, SetThreshold, choose_set_threshold
from .selective import (
    DEFAULT_CONFIDENCE,
    METHODS,
    AcceptThreshold,
    choose_accept_threshold,
    choose_accept_thresholds_per_label,
    threshold_grid,
)

# Where the rows come from (``Rows.source``).
HOLDOUT = "holdout"
SEPARATE = "separate"


@dataclass(frozen=True)
class DecisionOptions:
    """What to add beside the calibrated probabilities (the options of calibrate and patch).

    Attributes
    ----------
    accept_error : float, optional
        epsilon (``--accept-error``): adds ``accept``.
    accept_confidence : float, default 0.95
        1 - delta (``--accept-confidence``).
    set_coverage : float, optional
        1 - alpha (``--set-coverage``): adds ``class_set`` and ``class_set_size``.
    set_score : {"las", "aps"}
        Least ambiguous sets or adaptive prediction sets (``--set-score``).
    set_per_class : bool
        One quantile per class (``--set-per-class``).
    accept_method : {"ltt", "sgr"}
        Learn then Test (default) or selection with guaranteed risk.
    """

    accept_error: float | None = None
    accept_confidence: float = DEFAULT_CONFIDENCE
    set_coverage: float | None = None
    set_score: str = "las"
    set_per_class: bool = False
    accept_method: str = "ltt"

    @property
    def wanted(self) -> bool:
        """Any decision output asked for."""
        return self.accept_error is not None or self.set_coverage is not None

    def to_dict(self) -> dict[str, Any]:
        return {
            "accept_error": self.accept_error, "accept_confidence": self.accept_confidence,
            "set_coverage": self.set_coverage, "set_score": self.set_score, "set_per_class": self.set_per_class,
            "accept_method": self.accept_method,
        }


NO_DECISIONS = DecisionOptions()
"""The default of the commands' ``decisions``: no decision outputs."""


def check_decision_options(options: DecisionOptions) -> DecisionOptions:
    """Validate the options once, at the command's boundary (before any work)."""
    if options.accept_error is not None:
        check_fraction(options.accept_error, "--accept-error", "e.g. 0.02 for at most 2 % wrong among accepted rows")
    check_fraction(options.accept_confidence, "--accept-confidence", "e.g. 0.95")
    if options.set_coverage is not None:
        check_fraction(options.set_coverage, "--set-coverage",
                       "e.g. 0.9 for sets holding the true class 90 % of the time")
    if options.set_score not in SCORES:
        raise OnnxcalError(f"--set-score {options.set_score!r} is not one of: {', '.join(SCORES)}")
    if options.accept_method not in METHODS:
        raise OnnxcalError(f"--accept-method {options.accept_method!r} is not one of: {', '.join(METHODS)}")
    extras = options.set_score != "las" or options.set_per_class
    if options.set_coverage is None and extras:
        raise OnnxcalError("--set-score and --set-per-class apply to --set-coverage", "add --set-coverage 1-ALPHA")
    return options


@dataclass(frozen=True)
class Rows:
    """The labelled rows the thresholds are chosen on, and the map their probabilities come from.

    Attributes
    ----------
    source : str
        ``"holdout"`` (the held-out part of the validation set) or
        ``"separate"`` (a labelled set of its own).
    n : int
        Rows chosen on.
    description : str
        In words, for the output and the record.
    detail : dict
        Holdout fraction and seed, or the separate set's name and fingerprint.
    """

    source: str
    n: int
    description: str
    detail: dict[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        return {"source": self.source, "n": self.n, "description": self.description, **self.detail}


@dataclass(frozen=True)
class Decisions:
    """The chosen thresholds, ready for the graph and the record."""

    options: DecisionOptions
    rows: Rows
    accept: tuple[AcceptThreshold, ...] = ()
    sets: SetThreshold | None = None
    kind: str = "multiclass"
    grid: str = ""

    @property
    def accept_threshold(self) -> float | np.ndarray | None:
        """tau for the graph (``inf`` where none meets the target: accept nothing); None without ``accept``."""
        if not self.accept:
            return None
        taus = [math.inf if a.threshold is None else a.threshold for a in self.accept]
        return np.asarray(taus, dtype=np.float64) if self.kind == "multilabel" else taus[0]

    @property
    def unmet(self) -> tuple[int, ...]:
        """Indices (labels for multi-label) where no threshold meets the target."""
        return tuple(i for i, a in enumerate(self.accept) if not a.found)

    def section(self) -> dict[str, Any]:
        """The record's ``decisions`` section (JSON-ready)."""
        out: dict[str, Any] = {"options": self.options.to_dict(), "rows": self.rows.to_dict(), "kind": self.kind}
        if self.accept:
            items = [a.to_dict() for a in self.accept]
            out["accept"] = items if self.kind == "multilabel" else items[0]
            out["grid"] = self.grid
        if self.sets is not None:
            out["class_set"] = self.sets.to_dict()
        return out

    def lines(self) -> list[str]:
        """What the commands print: the thresholds, what they do, the rows they come from."""
        out = [f"decision thresholds chosen on {self.rows.description}"]
        for i, a in enumerate(self.accept):
            who = f"label {i}: " if self.kind == "multilabel" else ""
            if a.found:
                out.append(
                    f"accept: {who}confidence >= {a.threshold:.6g} accepts {a.accepted.successes} of {a.n} rows "
                    f"({a.accepted.rate:.1%}, 95% interval {a.accepted.low:.1%}-{a.accepted.high:.1%}), "
                    f"{a.errors.successes} wrong; error among accepted <= {a.error_target:g} "
                    f"with confidence {a.confidence:g} (bound {a.error_bound:.3g})"
                )
            else:
                out.append(f"accept: {who}NO threshold meets the target, so the model accepts nothing: {a.detail}")
        if self.sets is not None:
            t = self.sets
            q = ", ".join(f"{v:.6g}" for v in t.thresholds)
            per = " per class" if t.class_conditional else ""
            what = "within each class" if t.class_conditional else "marginal"
            out.append(
                f"class_set: {t.score.upper()} sets{per} for coverage {t.coverage:g} ({what}, for exchangeable "
                f"data), threshold{'s' if len(t.thresholds) > 1 else ''} {q} from {', '.join(map(str, t.n))} rows"
            )
            if any(t.infinite):
                out.append("class_set: too few rows for some quantile: those sets hold every class")
        return out


def _confidences(p: np.ndarray, kind: str) -> np.ndarray:
    """Each row's confidence as ``selective.confidence_and_error`` takes it (for the grid)."""
    q = np.asarray(p, dtype=compute_dtype(p.dtype))
    if kind == "multiclass":
        return np.asarray(q.max(axis=-1))
    return np.asarray(np.maximum(q, q.dtype.type(1) - q))


def kind_of(probabilities: np.ndarray, labels: np.ndarray) -> str:
    """``"multilabel"`` (N x K labels), ``"binary"`` (one probability per row) or ``"multiclass"``."""
    if np.ndim(labels) == 2:
        return "multilabel"
    return "binary" if probabilities.ndim == 1 or probabilities.shape[1] == 1 else "multiclass"


def choose(
    probabilities: np.ndarray, labels: np.ndarray, rows: np.ndarray, options: DecisionOptions, where: Rows,
    other_rows: np.ndarray | None = None,
) -> Decisions:
    """Choose the thresholds ``options`` ask for on ``rows`` of ``probabilities``.

    Parameters
    ----------
    probabilities : ndarray
        The calibrated model's own probabilities (its output dtype), N x K or N / N x 1.
    labels : ndarray
        N class indices, or N x K 0/1 for multi-label.
    rows : ndarray
        The rows to choose on: never rows the map was fitted on.
    options : DecisionOptions
    where : Rows
        Where ``rows`` come from (kept in the record and printed).
    other_rows : ndarray, optional
        Rows independent of ``rows`` (e.g. those the map was fitted on); the
        acceptance grid is placed at the quantiles of their confidences
        (``threshold_grid``); without them, the built-in grid.
    """
    kind = kind_of(probabilities, labels)
    if kind == "multilabel" and options.set_coverage is not None:
        raise OnnxcalError(
            "--set-coverage: prediction sets need one true class per row; a multi-label model's output is already "
            "a set of labels", "leave out --set-coverage (--accept-error gives one threshold per label)",
        )
    accept: tuple[AcceptThreshold, ...] = ()
    grid_name = ""
    if options.accept_error is not None:
        grid = None
        if other_rows is not None and len(other_rows) and kind != "multilabel":
            conf = _confidences(probabilities[other_rows], kind).reshape(-1)
            grid = threshold_grid(conf, len(rows), options.accept_error, options.accept_confidence)
            grid_name = f"the confidences of {len(other_rows)} other rows ({len(grid)} thresholds)"
        else:
            grid_name = "built-in (200 thresholds, 1 - tau log-spaced)"
        kw: dict[str, Any] = {"error": options.accept_error, "confidence": options.accept_confidence,
                              "method": options.accept_method, "thresholds": grid}
        if kind == "multilabel":
            accept = choose_accept_thresholds_per_label(probabilities, labels, rows, **kw)
        else:
            accept = (choose_accept_threshold(probabilities, labels, rows, **kw),)
        if options.accept_method == "sgr":
            grid_name = "the rows' own confidences (selection with guaranteed risk)"
    sets = None
    if options.set_coverage is not None:
        sets = choose_set_threshold(probabilities, labels, rows, coverage=options.set_coverage,
                                    score=options.set_score, class_conditional=options.set_per_class)
    return Decisions(options, where, accept, sets, kind, grid_name)
