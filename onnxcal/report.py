"""Reports for people: report.html, summary.md, report.json and the plots as PNG files.

``build`` gathers every number of a report into one JSON-ready dictionary
(the content of report.json), computing them with ``metrics`` (``evaluate``,
``reliability``); ``draw`` turns that dictionary into PNG plots with
matplotlib (Agg canvas, no display, no global pyplot state);
``render_html`` and ``render_markdown`` lay it out. Nothing here computes
a metric of its own.

What the figures are computed on (``evaluation``):

* a fit summary and the capture it was made on: the held-out part of the
  fit's split, calibrated with the parameters fitted on the other part,
  exactly as FIT.json's headline (the split is redrawn from its fraction
  and seed, and the before-figures must reproduce FIT.json's);
* a fit summary and another capture: every sample, calibrated with the
  parameters baked into the model;
* a temperature given by hand: every sample.

Colours are the Okabe–Ito palette (Okabe & Ito, "Color Universal Design",
2008), chosen to stay distinct for the common forms of colour blindness;
before and after also differ by hatching and panel, never by colour alone.
"""

from __future__ import annotations

import base64
import html
import io
import json
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from . import __version__, _signals, maps
from .capture import Capture
from .fit import FitSummary, data_warnings
from .metrics import DEFAULT_BINS, METRIC_FIELDS, METRIC_LABELS, Metrics, evaluate, reliability
from .resample import split_holdout
from .scaling import Scaling
from .verify import VerifyResult, format_figure

FORMAT = 1
FORMATS = ("html", "md", "json", "png")
FILES = {"html": ("report.html",), "md": ("summary.md",), "json": ("report.json",)}
PLOTS = ("reliability", "confidence", "classes")
FILES["png"] = tuple(f"{p}.png" for p in PLOTS)

# Okabe-Ito colours (Okabe & Ito 2008): distinct under protanopia,
# deuteranopia and tritanopia.
OKABE_ITO = {
    "black": "#000000",
    "orange": "#E69F00",
    "sky_blue": "#56B4E9",
    "bluish_green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "reddish_purple": "#CC79A7",
}
BEFORE_COLOUR = OKABE_ITO["vermillion"]
AFTER_COLOUR = OKABE_ITO["blue"]
GAP_COLOUR = OKABE_ITO["orange"]
# Every plot is FIGSIZE inches at DPI dots per inch: PLOT_PIXELS wide and high.
FIGSIZE = (10.0, 4.6)
DPI = 100
PLOT_PIXELS = (round(FIGSIZE[0] * DPI), round(FIGSIZE[1] * DPI))
MAX_CLASS_BARS = 40

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
    if not scaling.is_affine:
        return maps.describe(scaling.method, scaling.parameters)
    iv = (intervals or {}).get("parameters", {})
    if scaling.temperature is not None:
        t = iv.get("temperature")
        extra = f" (fit-part 95% interval {t[0]:.4f} to {t[1]:.4f})" if t else ""
        how = "sigmoid(z / T)" if scaling.kind != "multiclass" else "softmax(z / T)"
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
    m = evaluate(cap.logits, cap.labels, 1.0, n_bins, rows=rows)
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
        entries = list(zip(names, counts))
    elif kind == "binary":
        counts = np.bincount(labels, minlength=2)
        entries = [(f"{names[0]} absent (0)", counts[0]), (f"{names[0]} present (1)", counts[1])]
    else:
        entries = list(zip(names, labels.sum(axis=0)))
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
    before = evaluate(cap.logits, cap.labels, 1.0, bins, rows=ev.rows)
    names = list(class_names) if class_names else _default_names(before.kind, k)
    after = evaluate(cap.logits, cap.labels, ev.scaling, bins, rows=ev.rows)
    rel_before = reliability(cap.logits, cap.labels, 1.0, bins, rows=ev.rows)
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
        "created": datetime.now(timezone.utc).replace(microsecond=0).isoformat(),
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
            "choice": summary.choice.to_dict() if summary is not None and summary.choice is not None else None,
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


# --------------------------------------------------------------------------
# Drawing


def _axis_words(quantity: str) -> tuple[str, str, str]:
    """x label, y label, and the word for a prediction, per kind of diagram."""
    if quantity == "top-label":
        return (
            "confidence: probability of the predicted class (0 to 1)",
            "accuracy: fraction of the bin predicted right (0 to 1)",
            "predictions",
        )
    return (
        "predicted probability that the label is present (0 to 1)",
        "fraction of the bin where the label is present (0 to 1)",
        "predictions (sample x label)",
    )


def _new_figure(ncols: int):
    with _signals.deferred():  # a signal inside an extension module's import can crash it
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure

    fig = Figure(figsize=FIGSIZE, dpi=DPI, layout="constrained")
    FigureCanvasAgg(fig)
    axes = fig.subplots(1, ncols, sharey=ncols > 1, squeeze=False)[0]
    return fig, axes


def _png(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=DPI, metadata={"Software": None})
    return buf.getvalue()


def _array(values) -> np.ndarray:
    return np.array([np.nan if v is None else v for v in values], dtype=np.float64)


def _panel_titles(content: dict) -> tuple[str, str]:
    m = content["metrics"]
    after = "after calibration"
    t = Scaling(content["calibration"]["method"], content["calibration"]["figures_use"]).temperature
    if t is not None:
        after += f" (T = {t:.3f})"
    return f"before calibration, {m['before']['n']} samples", after


def _reliability_plot(content: dict) -> bytes:
    rel = content["reliability"]
    x_label, y_label, _ = _axis_words(rel["before"]["quantity"])
    fig, axes = _new_figure(2)
    titles = _panel_titles(content)
    for ax, part, colour, title in zip(axes, ("before", "after"), (BEFORE_COLOUR, AFTER_COLOUR), titles):
        r = rel[part]
        edges = np.array(r["edges"])
        width = np.diff(edges)
        left = edges[:-1]
        observed, confidence = _array(r["observed"]), _array(r["confidence"])
        full = np.array(r["counts"]) > 0
        ax.bar(left[full], observed[full], width=width[full], align="edge", color=colour,
               edgecolor="white", linewidth=0.8, label="observed in bin")
        gap = confidence - observed
        ax.bar(left[full], gap[full], bottom=observed[full], width=width[full], align="edge",
               facecolor="none", edgecolor=GAP_COLOUR, hatch="///", linewidth=0.8,
               label="gap to mean confidence")
        ax.plot([0, 1], [0, 1], color=OKABE_ITO["black"], linestyle="--", linewidth=1.0,
                label="perfect calibration")
        # The band above 1 holds the number of predictions in each bin.
        ax.axhline(1.0, color="#888888", linewidth=0.6)
        for x, w, c in zip(left, width, r["counts"]):
            if c:
                ax.text(x + w / 2, 1.015, str(c), rotation=90, fontsize=6.5, ha="center", va="bottom",
                        color="#333333")
        ax.set_xlim(0, 1)
        ax.set_ylim(0, 1.14)
        ax.set_yticks(np.linspace(0, 1, 6))
        ax.set_xlabel(x_label, fontsize=8.5)
        error = r["error"]
        shown = "-" if error is None else f"{error:.4f}"
        ax.set_title(f"{title}: binned calibration error {shown}\n(numbers along the top: predictions per bin)",
                     fontsize=9)
        ax.grid(True, linewidth=0.3, color="#bbbbbb")
        ax.legend(loc="upper left", bbox_to_anchor=(0.0, 0.87), fontsize=7.5, frameon=True)
    axes[0].set_ylabel(y_label, fontsize=8.5)
    return _png(fig)


def _confidence_plot(content: dict) -> bytes:
    rel = content["reliability"]
    x_label, _, what = _axis_words(rel["before"]["quantity"])
    fig, axes = _new_figure(2)
    for ax, part, colour, title in zip(axes, ("before", "after"), (BEFORE_COLOUR, AFTER_COLOUR), _panel_titles(content)):
        r = rel[part]
        edges = np.array(r["edges"])
        counts = np.array(r["counts"], dtype=np.float64)
        ax.bar(edges[:-1], counts, width=np.diff(edges), align="edge", color=colour, edgecolor="white",
               linewidth=0.8, hatch="" if part == "before" else "..", label=what)
        total = counts.sum()
        conf, obs = _array(r["confidence"]), _array(r["observed"])
        full = counts > 0
        mean_conf = float((conf[full] * counts[full]).sum() / total) if total else np.nan
        mean_obs = float((obs[full] * counts[full]).sum() / total) if total else np.nan
        word = "accuracy" if r["quantity"] == "top-label" else "fraction present"
        ax.axvline(mean_conf, color=OKABE_ITO["black"], linestyle="--", linewidth=1.2,
                   label=f"mean prediction {mean_conf:.3f}")
        ax.axvline(mean_obs, color=OKABE_ITO["bluish_green"], linestyle=":", linewidth=1.6,
                   label=f"{word} {mean_obs:.3f}")
        ax.set_xlim(0, 1)
        ax.set_xlabel(x_label, fontsize=8.5)
        ax.set_title(f"{title}\ndistribution of the predictions", fontsize=9)
        ax.legend(loc="upper left", fontsize=7.5)
        ax.grid(True, axis="y", linewidth=0.3, color="#bbbbbb")
    axes[0].set_ylabel(f"{what} per bin (count)", fontsize=8.5)
    return _png(fig)


def _classes_plot(content: dict) -> bytes:
    rel = content["reliability"]
    names = content["data"]["class_names"]
    before, after = _array(rel["before"]["class_error"]), _array(rel["after"]["class_error"])
    order = np.arange(len(names))
    title = "calibration error of each class's probability (the terms of the classwise ECE)"
    if rel["before"]["kind"] != "multiclass":
        title = "calibration error of each label's probability (the terms of the classwise ECE)"
    if len(names) > MAX_CLASS_BARS:
        order = np.argsort(-np.nan_to_num(before), kind="stable")[:MAX_CLASS_BARS]
        title += f"; the {MAX_CLASS_BARS} worst of {len(names)} before calibration"
    fig, (ax,) = _new_figure(1)
    x = np.arange(len(order))
    ax.bar(x - 0.2, before[order], width=0.4, color=BEFORE_COLOUR, label="before calibration")
    ax.bar(x + 0.2, after[order], width=0.4, color=AFTER_COLOUR, hatch="..", edgecolor="white",
           label="after calibration")
    ax.set_xticks(x, [names[i][:18] for i in order], rotation=30 if len(order) > 6 else 0,
                  ha="right" if len(order) > 6 else "center", fontsize=8)
    ax.set_xlabel("class" if rel["before"]["kind"] == "multiclass" else "label", fontsize=8.5)
    ax.set_ylabel("calibration error (probability, 0 to 1)", fontsize=8.5)
    ax.set_title(f"{title}, {content['metrics']['n_bins']} bins", fontsize=9)
    ax.legend(fontsize=7.5)
    ax.grid(True, axis="y", linewidth=0.3, color="#bbbbbb")
    return _png(fig)


def draw(content: dict) -> dict[str, bytes]:
    """The plots of a report as PNG bytes, by name (see ``PLOTS``).

    Each is ``PLOT_PIXELS`` (width, height): the reliability diagrams before
    and after side by side, the confidence histograms before and after, and
    the per-class calibration errors.
    """
    return {
        "reliability": _reliability_plot(content),
        "confidence": _confidence_plot(content),
        "classes": _classes_plot(content),
    }


# --------------------------------------------------------------------------
# Layout


_CAPTIONS = {
    "reliability": (
        "Reliability diagrams, before and after. Each bar is one bin of predictions: its height is "
        "the fraction that came true, the hatched box up to the mean confidence in the bin is the "
        "gap, and a calibrated model keeps the bars on the dashed diagonal."
    ),
    "confidence": "How the predictions spread over the bins, before and after, with the mean prediction "
    "and the observed rate.",
    "classes": "Calibration error of each class's probability, before and after.",
}

_CSS = """
body { font-family: system-ui, -apple-system, "Segoe UI", Roboto, sans-serif; color: #1b1b1b;
       max-width: 64rem; margin: 1.5rem auto; padding: 0 1rem; line-height: 1.45; }
h1 { font-size: 1.5rem; margin-bottom: .2rem; }
h2 { font-size: 1.15rem; margin-top: 2rem; border-bottom: 1px solid #c8c8c8; padding-bottom: .15rem; }
table { border-collapse: collapse; margin: .4rem 0 .8rem; font-size: .92rem; }
th, td { border: 1px solid #c8c8c8; padding: .2rem .55rem; text-align: left; vertical-align: top; }
th { background: #f2f2f2; }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
code { font-family: ui-monospace, "DejaVu Sans Mono", monospace; font-size: .88em; word-break: break-all; }
.meta { color: #555; font-size: .9rem; }
.verdict { border-left: 4px solid #0072B2; padding: .2rem 1rem; background: #f5f9fc; }
.fail { color: #a33a00; font-weight: bold; }
.cautions { border: 2px solid #E69F00; padding: .3rem 1rem; background: #fffaf0; }
figure { margin: 1rem 0 1.5rem; }
figure img { max-width: 100%; height: auto; border: 1px solid #e0e0e0; }
figcaption { font-size: .9rem; color: #333; }
"""


def _e(value) -> str:
    return html.escape(str(value), quote=True)


def _num(v, digits: int = 4) -> str:
    return "-" if v is None else f"{v:.{digits}f}"


def _interval(pair, digits: int = 4) -> str:
    return "-" if not pair or pair[0] is None else f"{pair[0]:.{digits}f} to {pair[1]:.{digits}f}"


def _table(head: list[str], rows: list[list[str]], numeric_from: int = 1) -> str:
    out = ["<table>", "<tr>" + "".join(f"<th>{_e(h)}</th>" for h in head) + "</tr>"]
    for row in rows:
        cells = "".join(
            f'<td class="num">{_e(c)}</td>' if i >= numeric_from else f"<td>{_e(c)}</td>" for i, c in enumerate(row)
        )
        out.append(f"<tr>{cells}</tr>")
    out.append("</table>")
    return "\n".join(out)


def metric_rows(content: dict) -> tuple[list[str], list[list[str]]]:
    """Header and rows of the before/after table (HTML and Markdown)."""
    m = content["metrics"]
    head = ["metric", "before", "after"]
    if m["after_interval"]:
        head.append("after, 95% interval")
    if m["fit_part"]:
        head += ["fit part, before", "fit part, after"]
    rows = []
    for key in METRIC_FIELDS:
        row = [METRIC_LABELS[key].format(bins=m["n_bins"]), _num(m["before"][key]), _num(m["after"][key])]
        if m["after_interval"]:
            row.append(_interval(m["after_interval"].get(key)))
        if m["fit_part"]:
            row += [_num(m["fit_part"][p][key]) for p in ("before", "after")]
        rows.append(row)
    return head, rows


def _table_size(value: list) -> str:
    """A nested list of numbers in words: ``10 x 10`` or ``10 tables of 4 to 12 values``."""
    sizes = [len(v) for v in value]
    if len(set(sizes)) == 1:
        return f"{len(value)} x {sizes[0]} table"
    return f"{len(value)} tables of {min(sizes)} to {max(sizes)} values"


def _parameter_rows(content: dict) -> list[list[str]]:
    """One row per parameter value: name, value, 95% interval (when known); a table of a map in words."""
    c = content["calibration"]
    names = content["data"]["class_names"]
    interval = c["interval"] or {}
    rows = []
    for key, value in c["parameters"].items():
        if isinstance(value, list) and value and isinstance(value[0], list):  # W, a lookup's tables
            rows.append([key, _table_size(value), "-"])
            continue
        label = {"temperature": "T", "w": "w (scale)", "b": "b (bias)"}.get(key, key)
        iv = interval.get(key)
        if isinstance(value, list):
            for i, v in enumerate(value):
                rows.append([f"{label}, {names[i] if i < len(names) else i}", _num(v),
                             _interval(iv[i]) if iv else "-"])
        else:
            rows.append([label, _num(value), _interval(iv) if iv else "-"])
    return rows


def _model_rows(content: dict) -> list[list[str]]:
    m = content["model"]
    rows = [["original model", m["name"]], ["original model sha256", m["sha256"]],
            ["class-score output", m["output"]], ["logits tensor", m["scores"]]]
    cal = content["calibrated_model"]
    if cal:
        rows += [["calibrated model", cal["name"]], ["calibrated model sha256", cal["sha256"]]]
    return rows


def _key_table(rows: list[list[str]]) -> str:
    body = "".join(f'<tr><th scope="row">{_e(k)}</th><td><code>{_e(v)}</code></td></tr>' for k, v in rows)
    return f"<table>{body}</table>"


def _verdict_item(line: str) -> str:
    marked = ' class="fail"' if "FAILED" in line else ""
    return f"<li{marked}>{_e(line)}</li>"


def _verification_html(v: dict) -> str:
    rows = [[c["name"], c["status"].upper() if c["status"] == "fail" else c["status"],
             format_figure(c["value"]), format_figure(c["limit"]), c["detail"]] for c in v["checks"]]
    head = f"<p>{v['n']} samples; reference from: {_e(v['reference_from'])} ({_e(v['original'])}).</p>"
    return head + _table(["check", "result", "value", "limit", "what"], rows, numeric_from=9)


def choice_rows(choice: dict) -> tuple[list[str], list[list[str]]]:
    """The comparison table of ``--method auto``: head and rows (figure and 95% interval per metric)."""
    head = ["method", "parameters", "NLL", "ECE", "Brier score", "accuracy", ""]
    rows = []
    for cand in choice["candidates"]:
        mark = ", ".join(
            w for w, on in (("chosen", cand["method"] == choice["chosen"]), ("lowest NLL", cand["method"] == choice["best"]),
                            ("did not converge", not cand["converged"])) if on
        )
        figures = [f"{_num(cand['metrics'][f])} ({_interval(cand['intervals'].get(f))})" if cand["intervals"].get(f)
                   else _num(cand["metrics"][f]) for f in ("nll", "ece", "brier", "accuracy")]
        rows.append([cand["method"], str(cand["n_parameters"]), *figures, mark])
    return head, rows


def _choice_html(choice: dict | None) -> list[str]:
    if choice is None:
        return []
    head, rows = choice_rows(choice)
    where = "held-out" if choice["basis"] == "held-out" else "in-sample"
    return [
        '<h3 id="choice">How the method was chosen (--method auto)</h3>',
        f"<p>Every applicable method was fitted on the fit part and scored on the {where} part "
        f"(figures with their 95% bootstrap intervals). Rule: {_e(choice['rule'])}. {_e(choice['reason'])}.</p>",
        _table(head, rows, numeric_from=1),
    ]


def render_html(content: dict, pngs: dict[str, bytes]) -> str:
    """The self-contained report.html: inline CSS, plots as base64 PNG, no external links."""
    d, c, m = content["data"], content["calibration"], content["metrics"]
    title = f"Calibration report: {content['model']['name']}"
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en">',
        '<head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{_e(title)}</title>",
        f"<style>{_CSS}</style></head>",
        "<body>",
        f"<h1>{_e(title)}</h1>",
        f'<p class="meta">onnxcal {_e(content["onnxcal_version"])}, {_e(content["created"])}</p>',
        '<h2 id="verdict">Verdict</h2><div class="verdict"><ul>',
        *[_verdict_item(line) for line in content["verdict"]],
        "</ul></div>",
        '<h2 id="model">Model</h2>',
        _key_table(_model_rows(content)),
        '<h2 id="data">Data</h2>',
        f"<p>{d['n']} samples from <code>{_e(d['source'])}</code>; {d['num_classes']} "
        f"{'classes' if d['kind'] == 'multiclass' else 'logit(s)'} ({_e(d['kind'])}). "
        f"The figures below are on {_e(m['description'])}.</p>",
        _table(["class" if d["kind"] == "multiclass" else "label", "samples", "fraction"],
               [[b["name"], str(b["count"]), _num(b["fraction"], 3)] for b in d["balance"]]),
        '<h2 id="calibration">Calibration map</h2>',
        f"<p>{_e(c['description'])}"
        + (" (given by hand, not fitted: no interval)." if c["given"] else ".")
        + "</p>",
        _table(["parameter", "value baked in", "95% interval"], _parameter_rows(content)),
        *_choice_html(c["choice"]),
    ]
    if c["figures_use"] != c["parameters"]:
        t = Scaling(c["method"], c["figures_use"]).temperature
        used = f"T = {t:.4f}" if t is not None else "the parameters"
        parts.append(f"<p>The held-out figures use {_e(used)} as fitted on the fit part alone, "
                     "without the held-out samples.</p>")
    head, rows = metric_rows(content)
    parts += [
        '<h2 id="metrics">Metrics before and after</h2>',
        f"<p>On {_e(m['description'])}. Lower is better for every row except accuracy; the gap is "
        "mean confidence minus accuracy (positive: overconfident).</p>",
        _table(head, rows),
        '<h2 id="plots">Plots</h2>',
    ]
    for name in PLOTS:
        data = base64.b64encode(pngs[name]).decode("ascii")
        parts.append(
            f'<figure id="plot-{name}"><img src="data:image/png;base64,{data}" width="{PLOT_PIXELS[0]}" '
            f'height="{PLOT_PIXELS[1]}" alt="{_e(_CAPTIONS[name])}">'
            f"<figcaption>{_e(_CAPTIONS[name])}</figcaption></figure>"
        )
    if content["verification"] is not None:
        parts += ['<h2 id="verification">Verification</h2>', _verification_html(content["verification"])]
    parts.append('<h2 id="warnings">Warnings</h2>')
    parts.append(
        "<ul>" + "".join(f"<li>{_e(w)}</li>" for w in content["warnings"]) + "</ul>" if content["warnings"]
        else "<p>None.</p>"
    )
    parts += [
        '<h2 id="notes">Notes</h2>',
        "<ul>" + "".join(f"<li>{_e(n)}</li>" for n in content["notes"]) + "</ul>" if content["notes"]
        else "<p>None.</p>",
        '<h2 id="cautions">Cautions</h2><div class="cautions"><ul>',
        *[f"<li>{_e(x)}</li>" for x in content["cautions"]],
        "</ul></div>",
        "</body></html>",
        "",
    ]
    return "\n".join(parts)


def _md(text) -> str:
    return str(text).replace("|", "\\|")


def render_markdown(content: dict) -> str:
    """summary.md: a short before/after table and the verdict, for a pull-request comment."""
    c, m = content["calibration"], content["metrics"]
    head, rows = metric_rows(content)
    keep = [i for i, h in enumerate(head) if not h.startswith("fit part")]
    lines = [
        f"### Calibration of `{_md(content['model']['name'])}`",
        "",
        f"{_md(c['description'])}" + (" (given, not fitted)." if c["given"] else "."),
        f"Figures on {_md(m['description'])}.",
        "",
        "| " + " | ".join(head[i] for i in keep) + " |",
        "|---|" + "---:|" * (len(keep) - 1),
        *["| " + " | ".join(_md(row[i]) for i in keep) + " |" for row in rows],
        "",
        *[f"- {_md(line)}" for line in content["verdict"]],
    ]
    if c["choice"] is not None:
        chead, crows = choice_rows(c["choice"])
        lines += ["", f"`--method auto`: {_md(c['choice']['reason'])}.", "",
                  "| " + " | ".join(chead) + " |", "|---|" + "---:|" * (len(chead) - 2) + "---|",
                  *["| " + " | ".join(_md(x) for x in row) + " |" for row in crows]]
    if content["warnings"]:
        lines += ["", "Warnings:", *[f"- {_md(w)}" for w in content["warnings"]]]
    lines += ["", "> **Cautions.** " + " ".join(content["cautions"]), ""]
    return "\n".join(lines)


def render_json(content: dict) -> str:
    return json.dumps(content, indent=2, sort_keys=True, allow_nan=False) + "\n"


def outputs(formats) -> list[str]:
    """File names written for ``formats``, in order."""
    return [name for f in FORMATS if f in formats for name in FILES[f]]


def _utf8(text: str) -> bytes:
    r"""UTF-8 bytes of a page; a path that is not UTF-8 (its bytes kept as lone surrogates) shows as ``\xNN``.

    >>> _utf8("model in 'caf\udce9/'")
    b"model in 'caf\\xe9/'"
    """
    try:
        return text.encode()
    except UnicodeEncodeError:
        escaped = all(not 0xD800 <= ord(c) <= 0xDFFF or 0xDC80 <= ord(c) <= 0xDCFF for c in text)
        raw = text.encode("utf-8", "surrogateescape" if escaped else "backslashreplace")
        return raw.decode("utf-8", "backslashreplace").encode()


def render(content: dict, formats) -> dict[str, bytes]:
    """Every file of the report for ``formats``, by file name, in memory."""
    pngs = draw(content)
    files: dict[str, bytes] = {}
    if "html" in formats:
        files["report.html"] = _utf8(render_html(content, pngs))
    if "md" in formats:
        files["summary.md"] = _utf8(render_markdown(content))
    if "json" in formats:
        files["report.json"] = render_json(content).encode()
    if "png" in formats:
        files.update({f"{name}.png": pngs[name] for name in PLOTS})
    return files
