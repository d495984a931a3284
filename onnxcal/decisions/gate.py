"""verify's checks of the decision outputs: against the NumPy reference, and against their targets.

Given what the patched model computed (its calibrated probabilities P and
its ``accept`` / ``class_set`` / ``class_set_size``), the thresholds the
graph holds and the record's ``decisions`` section:

* ``decision-record``: the thresholds in the graph are the record's (in the
  dtype the graph compares in);
* ``decision-outputs``: the outputs equal ``accept``, ``class_set`` and
  ``class_set_size`` of this module's package computed from the model's own
  P, exactly (the same operators in the same dtype);
* ``decision-reference``: computed from verify's float64 reference
  probabilities instead, they agree on every row not within the verify
  tolerance of a threshold (those rows may go either way: the reference and
  the graph round differently);
* on labelled data, the gates: ``accept-error`` (wrong among accepted
  against epsilon, "at most") and ``set-coverage`` (rows whose true class is
  in their set against the coverage the sets reach with probability 0.95
  over the draw of the rows they were chosen on, ``conditional_coverage_floor``,
  "at least"), each with an exact Clopper-Pearson interval: pass when the
  interval is wholly on the right side, fail when wholly on the wrong
  side, undecided when it straddles (``binomial.verdict``).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from ..verify import Check
from ._inputs import compute_dtype
from .binomial import LEVEL, Verdict, verdict
from .conformal import SetThreshold, _mass_before, class_set, class_set_size, conditional_coverage_floor
from .selective import accept

Outputs = dict[str, np.ndarray]


def set_threshold(section: dict[str, Any]) -> SetThreshold | None:
    """The record's set thresholds (``None`` for an infinite quantile) as a SetThreshold."""
    d = section.get("class_set")
    if not isinstance(d, dict):
        return None
    endless = -math.inf if d["score"] == "las" else math.inf
    values = tuple(endless if v is None else float(v) for v in d["thresholds"])
    return SetThreshold(d["score"], float(d["coverage"]), bool(d["class_conditional"]), values,
                        tuple(int(v) for v in d["n"]), tuple(int(v) for v in d["rank"]), str(d["dtype"]))


def accept_threshold(section: dict[str, Any]) -> np.ndarray | None:
    """The record's tau (one per label for multi-label; ``inf`` where none was found), or None."""
    d = section.get("accept")
    if d is None:
        return None
    items = d if isinstance(d, list) else [d]
    return np.array([math.inf if a["threshold"] is None else float(a["threshold"]) for a in items])


def _kind(section: dict[str, Any]) -> str:
    return str(section.get("kind", "multiclass"))


def _tau(section: dict[str, Any], tau: np.ndarray) -> np.ndarray | float:
    return tau if _kind(section) == "multilabel" else float(tau[0])


def expected(p: np.ndarray, section: dict[str, Any]) -> Outputs:
    """The decision outputs computed from ``p`` with the record's thresholds, as the graph computes them."""
    out: Outputs = {}
    tau = accept_threshold(section)
    if tau is not None:
        out["accept"] = accept(p, _tau(section, tau), kind=_kind(section))
    sets = set_threshold(section)
    if sets is not None:
        out["class_set"] = class_set(p, sets)
        out["class_set_size"] = class_set_size(out["class_set"])
    return out


def record_check(section: dict[str, Any], in_graph: dict[str, np.ndarray | None]) -> Check:
    """The thresholds the graph holds against the record's, in the graph's compare dtype."""
    wanted = {"accept": accept_threshold(section), "class_set": None}
    sets = set_threshold(section)
    if sets is not None:
        held = in_graph.get("class_set")
        wanted["class_set"] = sets.vector(held.size if held is not None else len(sets.thresholds))
    bad = []
    for role, want in wanted.items():
        if want is None:
            continue
        held = in_graph.get(role)
        if held is None:
            bad.append(f"the {role} threshold initializer is missing")
        elif not np.array_equal(np.asarray(want, dtype=held.dtype).reshape(-1), held.reshape(-1)):
            shown = np.asarray(want).reshape(-1)[:4].tolist()
            bad.append(f"{role}: graph {held.reshape(-1)[:4].tolist()} vs record {shown}")
    detail = "; ".join(bad) if bad else "the thresholds in the graph are the record's"
    return Check("decision-record", not bad, float(len(bad)), 0.0, detail)


def outputs_check(got: Outputs, p: np.ndarray, section: dict[str, Any]) -> Check:
    """The model's decision outputs against the NumPy reference of its own probabilities: exactly equal."""
    want = expected(p, section)
    differ = {name: int(np.sum(np.any(np.reshape(got[name] != w, (len(w), -1)), axis=1)))
              for name, w in want.items() if name in got}
    missing = [name for name in want if name not in got]
    bad = sum(differ.values()) + len(missing)
    parts = [f"{name}: {n} rows differ" for name, n in differ.items() if n] + [f"{m} missing" for m in missing]
    detail = "; ".join(parts) if parts else (
        f"{', '.join(want)} equal the NumPy reference of the model's own probabilities on all {len(p)} rows")
    return Check("decision-outputs", bad == 0, float(bad), 0.0, detail)


def _near(ref: np.ndarray, section: dict[str, Any], tol: float) -> np.ndarray:
    """Rows whose reference probabilities lie within ``tol`` of a threshold (either way is right there)."""
    kind = _kind(section)
    near = np.zeros(len(ref), dtype=bool)
    tau = accept_threshold(section)
    if tau is not None:
        conf = ref.max(axis=-1) if kind == "multiclass" else np.maximum(ref, 1 - ref)
        gap = np.abs(conf.reshape(len(ref), -1) - tau.reshape(1, -1))
        near |= np.any(gap <= tol, axis=1)
    sets = set_threshold(section)
    if sets is not None:
        p = ref.reshape(len(ref), -1)
        p = np.concatenate([1 - p, p], axis=1) if kind == "binary" else p
        t = sets.vector(p.shape[1]).astype(np.float64)
        if sets.score == "las":
            near |= np.any(np.abs(p - t) <= tol, axis=1)
        else:  # the mass before a class adds up to K roundings; classes within tol may rank either way
            slack = tol * p.shape[1]
            near |= np.any(np.abs(_mass_before(p) - t) <= slack, axis=1)
            ranked = -np.sort(-p, axis=1)
            before = np.cumsum(ranked, axis=1) - ranked
            tied = ranked[:, :-1] - ranked[:, 1:] <= tol
            # a swap of two tied classes moves the mass before them within [before, before + both]
            span_low, span_high = before[:, :-1] - slack, before[:, :-1] + ranked[:, :-1] + ranked[:, 1:] + slack
            crosses = (span_low <= t.max()) & (span_high >= t.min())  # any class's threshold (one when marginal)
            near |= np.any(tied & crosses, axis=1)
    return near


def reference_check(got: Outputs, ref: np.ndarray, section: dict[str, Any], tol: float) -> Check:
    """The model's decision outputs against those of verify's float64 reference probabilities."""
    want = expected(np.asarray(ref, dtype=np.float64), section)
    near = _near(np.asarray(ref, dtype=np.float64), section, tol)
    differ = np.zeros(len(ref), dtype=bool)
    for name, w in want.items():
        if name in got:
            differ |= np.any(np.reshape(got[name] != w, (len(w), -1)), axis=1)
    bad = int(np.sum(differ & ~near))
    detail = (f"{bad} of {int(np.sum(~near))} rows away from every threshold decide differently from the float64 "
              f"reference ({int(np.sum(near))} rows within {tol:g} of a threshold not compared; "
              f"{int(np.sum(differ & near))} of them differ)")
    return Check("decision-reference", bad == 0, float(bad), 0.0, detail)


def _check(name: str, v: Verdict, what: str) -> Check:
    m = v.measured
    rate = "n/a" if not m.trials else f"{m.rate:.4g}"
    detail = (f"{what}: {m.successes} of {m.trials} = {rate}, {m.level:.0%} interval [{m.low:.4g}, {m.high:.4g}], "
              f"target {v.side} {v.target:.4g}: {v.outcome}")
    return Check(name, v.outcome != "fail", None if not m.trials else m.rate, v.target, detail,
                 undecided=v.outcome == "undecided")


def _worst(verdicts: list[Verdict]) -> Verdict:
    order = {"fail": 0, "undecided": 1, "pass": 2}
    return min(verdicts, key=lambda v: (order[v.outcome], -abs(v.measured.rate - v.target) if v.measured.trials else 0))


def error_gate(got: Outputs, p: np.ndarray, labels: np.ndarray, kind: str, error: float, level: float) -> Check:
    """Wrong among accepted rows against ``error`` (per label for multi-label, Bonferroni over labels)."""
    q = np.asarray(p, dtype=compute_dtype(p.dtype))
    taken = np.asarray(got["accept"], dtype=bool)
    if kind == "multilabel":
        wrong = (q > 0.5) != (np.asarray(labels) == 1)
        lvl = 1 - (1 - level) / q.shape[1]
        verdicts = [verdict(int(np.sum(wrong[taken[:, j], j])), int(taken[:, j].sum()), error, "at most", lvl)
                    for j in range(q.shape[1])]
        v = _worst(verdicts)
        return _check("accept-error", v, f"worst of {len(verdicts)} labels, wrong among accepted")
    if kind == "binary":
        wrong = (q.reshape(-1) > 0.5) != (np.asarray(labels) == 1)
    else:
        wrong = q.argmax(axis=1) != np.asarray(labels)
    n_acc = int(taken.sum())
    v = verdict(int(np.sum(wrong[taken])), n_acc, error, "at most", level)
    check = _check("accept-error", v, f"wrong among accepted ({n_acc} of {len(taken)} rows accepted)")
    if not n_acc:
        return Check("accept-error", True, None, error, "no row was accepted: nothing to gate (undecided)",
                     undecided=True)
    return check


def coverage_gate(got: Outputs, labels: np.ndarray, sets: SetThreshold, coverage: float, level: float) -> Check:
    """Rows whose true class is in their set, against the floor the sets reach (per class when per class)."""
    y = np.asarray(labels, dtype=np.int64)
    covered = np.take_along_axis(np.asarray(got["class_set"], dtype=bool), y[:, None], axis=1)[:, 0]
    alpha = 1.0 - coverage
    if not sets.class_conditional:
        floor = conditional_coverage_floor(sets.n[0], alpha, level)
        v = verdict(int(covered.sum()), len(y), floor, "at least", level)
        return _check("set-coverage", v, f"true class in its set (target {coverage:g}; floor after {sets.n[0]} rows)")
    k = len(sets.n)
    lvl = 1 - (1 - level) / k
    verdicts = [verdict(int(covered[y == c].sum()), int(np.sum(y == c)),
                        conditional_coverage_floor(sets.n[c], alpha, level), "at least", lvl) for c in range(k)]
    v = _worst([w for w in verdicts if w.measured.trials] or verdicts)
    return _check("set-coverage", v, f"worst of {k} classes, true class in its set (target {coverage:g} per class)")


def gate_level(section: dict[str, Any], confidence: float | None) -> float:
    """The level of the gate's intervals: 1 - delta given to verify, else the record's, else 0.95."""
    if confidence is not None:
        return confidence
    options = section.get("options", {})
    return float(options.get("accept_confidence", LEVEL)) if isinstance(options, dict) else LEVEL
