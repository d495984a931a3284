"""The tables and lines the commands print: a model's description, the
before/after table of a fit, the checks of verify, the files of a report.
"""

from __future__ import annotations

from pathlib import Path

from rich import box
from rich.table import Table

from ..fit import FitSummary
from ..graph import ModelInfo, Record, TensorSpec
from ..metrics import METRIC_LABELS
from ..report import ReportResult, describe_scaling
from ..verify import VerifyResult, format_figure
from .console import out, warn

CAUTION = (
    "Calibration holds only for data like the validation set and drifts under "
    "distribution shift; it is no substitute for validation under local regulations "
    "and licensed professional review."
)


def _shape(spec: TensorSpec) -> str:
    if spec.shape is None:
        return "?"
    return "[" + ", ".join("?" if d is None else str(d) for d in spec.shape) + "]"


def render_info(info: ModelInfo) -> None:
    opsets = ", ".join(f"{d} {v}" for d, v in (info.opsets or {}).items() if d != "ai.onnx")
    opset = f"opset {info.opset}" if info.opset else "no default-domain opset"
    table = Table(title=f"{info.path}  ({opset}{', ' + opsets if opsets else ''})", title_justify="left")
    for col in ("", "name", "dtype", "shape"):
        table.add_column(col)
    for kind, specs in (("input", info.inputs), ("output", info.outputs)):
        for s in specs:
            table.add_row(kind, s.name, s.dtype, _shape(s))
    out.print(table)
    site = info.site
    if site is None:
        out.print(f"class scores: none found ({info.site_problem})", soft_wrap=True)
    else:
        out.print(f"found: {info.reading}", soft_wrap=True)
        out.print(f"class scores: {_describe_site(site)}", soft_wrap=True)
    if info.external_data:
        out.print(f"external data: {', '.join(info.external_data)}", soft_wrap=True)
    out.print(f"batch dim: {'fixed' if info.batch_fixed else 'dynamic'}")
    if info.records:
        for r in info.records:
            what = f"T = {r.temperature:.4f}" if r.temperature is not None else f"{r.method} scaling"
            out.print(f"calibration record: {what} on output '{r.output}' ({how_patched(r)})", soft_wrap=True)
            for line in record_lines(r):
                out.print(f"  {line}", soft_wrap=True)
    else:
        out.print("calibration record: none")
    out.print(f"sha256: {info.sha256}")


_RECORD_METRICS = (("nll", "NLL"), ("ece", "ECE"), ("accuracy", "accuracy"))


def record_lines(r: Record) -> list[str]:
    """What a calibration record says beyond its parameters: the source model (name and sha256, in
    full), the twin it was fitted on, and the fit's figures before and after, on the basis it names."""
    lines = [f"source: {r.source_name}, sha256 {r.source_sha256}"]
    if r.fitted_on_sha256 and r.fitted_on_sha256 != r.source_sha256:
        lines.append(f"fitted on: a twin with sha256 {r.fitted_on_sha256}")
    metrics = (r.fit or {}).get("metrics") or {}
    before, after = metrics.get("before"), metrics.get("after")
    if before and after:
        basis = metrics.get("basis", "")
        where = f"{after.get('n')} {basis} samples" if basis else f"{after.get('n')} samples"
        figures = ", ".join(
            f"{label} {before[key]:.4f} -> {after[key]:.4f}"
            for key, label in _RECORD_METRICS if before.get(key) is not None and after.get(key) is not None
        )
        lines.append(f"fit: {figures} ({where})")
    else:
        lines.append("fit: none recorded (parameters given by hand)")
    return lines


def _describe_site(site) -> str:
    names = {"softmax": "Softmax", "logsoftmax": "LogSoftmax", "sigmoid": "Sigmoid"}
    if site.spelling == "ml-classifier":
        ends = f"probabilities of an ai.onnx.ml classifier, tensor '{site.scores}'"
    elif site.from_probabilities:
        ends = f"{site.holds}; logits from tensor '{site.scores}' ({site.logits_from})"
    elif site.activation:
        ends = f"ends in {names[site.activation]}; logits tensor '{site.scores}'"
    else:
        ends = "raw logits"
    where = f", values in tensor '{site.tensor}'" if site.tensor != site.output else ""
    return (
        f"output '{site.output}' ({ends}{where}; class axis {site.class_axis} of rank "
        f"{site.rank}, {site.num_classes or '?'} class{'' if site.num_classes == 1 else 'es'}, {site.dtype})"
    )


_METRIC_ROWS = tuple(METRIC_LABELS.items())


def _interval(pair) -> str:
    return "-" if pair is None else f"{pair[0]:.3f} to {pair[1]:.3f}"


def _describe_scaling(summary: FitSummary) -> str:
    return describe_scaling(summary.scaling, summary.intervals)


def render_fit(summary: FitSummary) -> None:
    b, a = summary.before, summary.after
    where = f"{b.n} held-out samples" if summary.basis == "held-out" else f"{b.n} samples, in-sample"
    table = Table(
        title=f"{_describe_scaling(summary)}\nbefore/after on {where}",
        title_justify="left",
        box=box.SIMPLE_HEAD,
    )
    table.add_column("metric", no_wrap=True)
    table.add_column("before", justify="right", no_wrap=True)
    table.add_column("after", justify="right", no_wrap=True)
    intervals = (summary.intervals or {}).get("after")
    if intervals is not None:
        table.add_column("after:\n95% interval", justify="right", no_wrap=True)
    if summary.fit_part is not None:
        table.add_column("fit part\nbefore", justify="right", no_wrap=True)
        table.add_column("fit part\nafter", justify="right", no_wrap=True)
    for key, label in _METRIC_ROWS:
        row = [label.format(bins=b.n_bins), f"{getattr(b, key):.4f}", f"{getattr(a, key):.4f}"]
        if intervals is not None:
            row.append(_interval(intervals.get(key)))
        if summary.fit_part is not None:
            row += [f"{getattr(summary.fit_part[k], key):.4f}" for k in ("before", "after")]
        table.add_row(*row)
    out.print(table)
    for note in summary.notes:
        out.print(f"note: {note}", soft_wrap=True)
    warn(summary.warnings)


_REFERENCE_FROM = {
    "original": "the original model",
    "scores": "captured scores",
    "patched-graph": "the patched graph's own logits",
}


def render_verify(result: VerifyResult) -> None:
    if result.reference_from in _REFERENCE_FROM:
        where = f" ({result.original})" if result.original else ""
        title = f"verify: reference from {_REFERENCE_FROM[result.reference_from]}{where}, {result.n} samples"
    else:
        title = f"verify: no reference (no calibration record), {result.n} samples"
    table = Table(title=title, title_justify="left")
    for col in ("check", "result", "value", "limit", "what"):
        table.add_column(col)
    for c in result.checks:
        status = {"pass": "pass", "fail": "FAIL", "skip": "skipped", "undecided": "undecided"}[c.status]
        table.add_row(c.name, status, format_figure(c.value), format_figure(c.limit), c.detail)
    out.print(table)
    for note in result.notes:
        out.print(f"note: {note}", soft_wrap=True)
    if result.passed:
        out.print("verify: all checks passed")
    else:
        for c in result.failed:  # each failure as a full sentence, unwrapped
            out.print(f"failed: {c.name}: {c.detail}", soft_wrap=True)
        out.print(f"verify: FAILED ({', '.join(c.name for c in result.failed)})")


def render_report(result: ReportResult, verdict: bool = True) -> None:
    for line in result.content["verdict"] if verdict else ():
        out.print(f"  {line}", soft_wrap=True)
    out.print(f"wrote {len(result.files)} report files to {result.directory}: "
              + ", ".join(Path(f).name for f in result.files), soft_wrap=True)


def how_patched(r) -> str:
    """One line on what the patch did to the graph."""
    if r.folded:
        what = "1/T" if r.temperature is not None else f"{r.method} scaling"
        how = f"{what} folded into the weight and bias of the logits layer"
        how += "; Softmax appended" if r.rewrite == "append-softmax" else ""
        how += "; Sigmoid appended" if r.rewrite == "append-sigmoid" else ""
        return how
    nodes = "Div" if r.method == "temperature" else "Mul + Add"
    how = {
        "insert-before-activation": f"{nodes} inserted before the existing activation",
        "append-softmax": f"{nodes} + Softmax appended",
        "append-sigmoid": f"{nodes} + Sigmoid appended",
        "ml-log-probabilities": "classifier probabilities replaced by softmax(scaled log p)",
        "replace-values": f"values replaced in place by the activation of the scaled logits ({r.logits_from})",
    }.get(r.rewrite, r.rewrite)
    if r.compute_dtype:
        how += f", computed in {r.compute_dtype}"
    return how
