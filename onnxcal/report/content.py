"""The numbers of a report: one JSON-ready dictionary (what report.json holds).

Which rows the figures are on (``evaluation``, see :mod:`onnxcal.report`), the metrics
before and after from :mod:`onnxcal.metrics`, the class balance, the verdict lines and
the cautions every report carries.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path

import numpy as np

from .. import __version__
from ..capture import Capture
from ..fit import FitSummary, data_warnings
from ..l1_sigmoid import identity
from ..metrics import DEFAULT_BINS, METRIC_FIELDS, Metrics, evaluate, reliability
from ..resample import split_holdout
from ..scaling import SIGMOID_L1, Scaling
from ..verify import VerifyResult

FORMAT = 1

CAUTIONS = (
    "The calibration holds only for data like this validation set. It drifts under distribution "
    "shift: new sensors, sites, populations or seasons, or a retrained upstream model.",
    "Re-check it (capture, fit, verify, report) after any change to the data or to the model.",
    "A lower calibration error is not evidence that the model is fit for a purpose. This report "
    "is no substitute for validation under your local regulations and for review by licensed "
    "professionals where decisions are safety-critical.",
)


@dataclass(frozen=True)
class ReportResult:
    """A written report.

    Attributes
    ----------
    directory : str
        Where the files are.
    files : tuple of str
        The files written (paths).
    content : dict
        Every number of the report (what report.json holds).
    """

    directory: str
    files: tuple[str, ...]
    content: dict


@dataclass(frozen=True)
class Evaluation:
    """Which rows the figures are on and which parameters calibrate them."""

    rows: np.ndarray | None
    scaling: Scaling
    basis: str
    description: str
    summary_reproduced: bool = False


# --------------------------------------------------------------------------
# Describing a scaling (shared with the CLI)


def describe_scaling(scaling: Scaling, intervals: dict | None = None) -> str:
    """One line naming the method and its parameters, with the T interval if any."""
    iv = (intervals or {}).get("parameters", {})
    if scaling.temperature is not None:
        t = iv.get("temperature")
        extra = f" (fit-part 95% interval {t[0]:.4f} to {t[1]:.4f})" if t else ""
        how = {"multiclass": "softmax(z / T)", SIGMOID_L1: "L1(sigmoid(z / T))"}.get(scaling.kind, "sigmoid(z / T)")
        return f"temperature scaling, {how}: T = {scaling.temperature:.4f}{extra}"
    a = scaling.arrays()
    if scaling.method == "temperature":
        t = a["temperature"]
        return f"per-label temperature scaling: {t.size} temperatures from {t.min():.4f} to {t.max():.4f}"
    if scaling.method == "platt":
        return f"Platt scaling, sigmoid(a z + b): a = {float(a['w']):.4f}, b = {float(a['b']):.4f}"
    return (
        f"vector scaling, softmax(w * z + b): {a['w'].size} classes, w from {a['w'].min():.4f} to "
        f"{a['w'].max():.4f}, b from {a['b'].min():.4f} to {a['b'].max():.4f}"
    )


# --------------------------------------------------------------------------
# Gathering the numbers


def _close(a: float, b: float) -> bool:
    return bool(np.isclose(a, b, rtol=1e-9, atol=1e-12))


def _reproduces(cap: Capture, summary: FitSummary, rows: np.ndarray | None, n_bins: int) -> bool:
    """True when the uncalibrated figures on ``rows`` are the summary's own."""
    m = evaluate(cap.logits, cap.labels, identity(summary.scaling), n_bins, rows=rows)
    b = summary.before
    return m.n == b.n and _close(m.nll, b.nll) and _close(m.brier, b.brier) and _close(m.accuracy, b.accuracy)


def evaluation(cap: Capture, scaling: Scaling, summary: FitSummary | None, n_bins: int) -> Evaluation:
    """Decide what the figures are computed on (see the module docstring)."""
    n = len(cap.logits)
    if summary is None:
        return Evaluation(
            None,
            scaling,
            "given",
            f"all {n} samples of the capture, calibrated with the given parameters (not fitted "
            "here; if they were fitted on these same samples the figures are in-sample, so optimistic)",
        )
    same_source = summary.capture.get("model_sha256") in (None, cap.meta.model_sha256)
    if same_source and summary.basis == "held-out" and summary.holdout_result is not None:
        split = summary.split
        fit_rows, eval_rows = split_holdout(cap.labels, float(split["fraction"]), int(split["seed"]))
        if _reproduces(cap, summary, eval_rows, n_bins):
            return Evaluation(
                eval_rows,
                summary.holdout_result.scaling,
                "held-out",
                f"{len(eval_rows)} held-out samples ({float(split['fraction']):g} of {n}, stratified, "
                f"seed {int(split['seed'])}), calibrated with the parameters fitted on the other "
                f"{len(fit_rows)}; the parameters baked into the model are refitted on all {n}",
                summary_reproduced=True,
            )
    if same_source and summary.basis == "in-sample" and _reproduces(cap, summary, None, n_bins):
        return Evaluation(
            None,
            summary.scaling,
            "in-sample",
            f"all {n} samples, the same the parameters were fitted on (in-sample, so optimistic)",
            summary_reproduced=True,
        )
    return Evaluation(
        None,
        summary.scaling,
        "other data",
        f"all {n} samples of a capture other than the one the fit was made on, calibrated with the "
        "parameters baked into the model",
    )


def _balance(labels: np.ndarray, kind: str, names: list[str]) -> list[dict]:
    n = len(labels)
    if kind == "multiclass":
        counts = np.bincount(labels, minlength=len(names))
        entries = list(zip(names, counts, strict=False))
    elif kind == "binary":
        counts = np.bincount(labels, minlength=2)
        entries = [(f"{names[0]} absent (0)", counts[0]), (f"{names[0]} present (1)", counts[1])]
    else:
        entries = list(zip(names, labels.sum(axis=0), strict=False))
    return [{"name": name, "count": int(c), "fraction": float(c) / n if n else None} for name, c in entries]


def _default_names(kind: str, k: int) -> list[str]:
    if kind == "binary":
        return ["positive class"]
    word = "label" if kind == "multilabel" else "class"
    return [f"{word} {i}" for i in range(k)]


def _metric_table(metrics: Metrics) -> dict:
    return {f: _plain(getattr(metrics, f)) for f in METRIC_FIELDS} | {"n": metrics.n, "n_bins": metrics.n_bins}


def _plain(v):
    """A JSON-safe number: NaN and infinities become None."""
    if v is None:
        return None
    v = float(v)
    return v if np.isfinite(v) else None


def _verdict(content: dict) -> list[str]:
    """Short plain sentences a reviewer reads first."""
    m = content["metrics"]
    before, after = m["before"], m["after"]
    where = {
        "held-out": f"on {before['n']} held-out samples",
        "in-sample": f"on the {before['n']} samples the fit used (in-sample, optimistic)",
        "given": f"on all {before['n']} samples, with parameters given by hand",
        "other data": f"on {before['n']} samples the fit was not made on",
    }[m["basis"]]
    lines = []
    for key, name in (("ece", "ECE"), ("nll", "NLL")):
        b, a = before[key], after[key]
        if b is None or a is None:
            lines.append(f"{name} could not be computed {where}.")
            continue
        if a == b:
            lines.append(f"{name} is unchanged at {a:.4f} {where}.")
        else:
            lines.append(f"{name} {'fell' if a < b else 'rose'} from {b:.4f} to {a:.4f} {where}.")
    b, a = before["accuracy"], after["accuracy"]
    if b == a:
        lines.append(f"Accuracy is unchanged at {a:.4f}.")
    else:
        lines.append(f"Accuracy changed from {b:.4f} to {a:.4f}.")
    warnings = content["warnings"]
    lines.append(
        "No warnings from fitting or about the data." if not warnings
        else f"{len(warnings)} warning(s) from fitting or about the data: see Warnings."
    )
    v = content.get("verification")
    if v is not None:
        checks = v["checks"]
        failed = [c["name"] for c in checks if c["status"] == "fail"]
        lines.append(
            f"Verification passed: {len(checks) - len(failed)} of {len(checks)} checks." if not failed
            else f"Verification FAILED: {', '.join(failed)}."
        )
    return lines


def build(
    cap: Capture,
    scaling: Scaling,
    *,
    summary: FitSummary | None = None,
    class_names: list[str] | None = None,
    n_bins: int | None = None,
    calibrated: dict | None = None,
    verification: VerifyResult | None = None,
) -> dict:
    """Every number of the report, as the JSON-ready dictionary report.json holds.

    Parameters
    ----------
    cap : Capture
        Logits and labels (the figures are computed on them).
    scaling : Scaling
        The parameters baked into the model (or given).
    summary : FitSummary, optional
        The fit: intervals, warnings, the held-out split.
    class_names : list of str, optional
        One per logit; ``class 0``, ``class 1``, ... by default.
    n_bins : int, optional
        Bins of the ECEs and plots (default: the fit's, else 15).
    calibrated : dict, optional
        ``name``, ``path``, ``sha256`` of the patched model.
    verification : VerifyResult, optional
        Shown when given (``calibrate --report``).
    """
    bins = n_bins or (summary.options.n_bins if summary is not None else DEFAULT_BINS)
    k = cap.logits.shape[1]
    ev = evaluation(cap, scaling, summary, bins)
    before = evaluate(cap.logits, cap.labels, identity(scaling), bins, rows=ev.rows)
    names = list(class_names) if class_names else _default_names(before.kind, k)
    after = evaluate(cap.logits, cap.labels, ev.scaling, bins, rows=ev.rows)
    rel_before = reliability(cap.logits, cap.labels, identity(scaling), bins, rows=ev.rows)
    rel_after = reliability(cap.logits, cap.labels, ev.scaling, bins, rows=ev.rows)
    intervals = summary.intervals if summary is not None else None
    use_intervals = ev.summary_reproduced and intervals is not None
    warnings = list(summary.warnings) if summary is not None else data_warnings(cap.labels, k)
    notes = list(summary.notes) if summary is not None else []
    if summary is not None and not ev.summary_reproduced:
        notes.append(
            "the fit's own held-out figures and intervals (in FIT.json) are for the data it was made "
            "on, so this report shows no intervals for the metrics"
        )
    meta = cap.meta
    content = {
        "format": FORMAT,
        "onnxcal_version": __version__,
        "created": datetime.now(UTC).replace(microsecond=0).isoformat(),
        "model": {
            "name": Path(meta.model_path).name,
            "path": meta.model_path,
            "sha256": meta.model_sha256,
            "output": meta.output,
            "scores": meta.scores,
        },
        "calibrated_model": calibrated,
        "data": {
            "source": meta.data_source,
            "n": int(len(cap.logits)),
            "kind": before.kind,
            "num_classes": k,
            "class_names": names,
            "balance": _balance(cap.labels, before.kind, names),
            "evaluated": int(before.n),
        },
        "calibration": {
            "method": scaling.method,
            "kind": scaling.kind,
            "description": describe_scaling(scaling, intervals),
            "temperature": scaling.temperature,
            "parameters": dict(scaling.parameters),
            "interval": (intervals or {}).get("parameters"),
            "interval_level": (intervals or {}).get("level"),
            "given": summary is None,
            "figures_use": dict(ev.scaling.parameters),
        },
        "metrics": {
            "basis": ev.basis,
            "description": ev.description,
            "n_bins": bins,
            "before": _metric_table(before),
            "after": _metric_table(after),
            "after_interval": intervals.get("after") if use_intervals else None,
            "fit_part": (
                {part: _metric_table(m) for part, m in summary.fit_part.items()}
                if ev.summary_reproduced and summary.fit_part is not None
                else None
            ),
        },
        "reliability": {"before": rel_before.to_dict(), "after": rel_after.to_dict()},
        "warnings": warnings,
        "notes": notes,
        "verification": verification.to_dict() if verification is not None else None,
        "cautions": list(CAUTIONS),
    }
    content["verdict"] = _verdict(content)
    return content
