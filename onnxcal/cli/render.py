"""The tables and lines the commands print: a model's description, the
before/after table of a fit, the checks of verify, the files of a report.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING

from .console import Column, Grid, say, show_table, warn

if TYPE_CHECKING:  # the library is imported when a table is drawn, not with the CLI
    from ..choose import Choice
    from ..fit import FitSummary
    from ..graph import ModelInfo, Record, ScoreSite, TensorSpec
    from ..report import ReportResult
    from ..verify import VerifyResult

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
    table = Grid(
        f"{info.path}  ({opset}{', ' + opsets if opsets else ''})",
        [Column(""), Column("name"), Column("dtype"), Column("shape")],
    )
    for kind, specs in (("input", info.inputs), ("output", info.outputs)):
        for s in specs:
            table.add_row(kind, s.name, s.dtype, _shape(s))
    show_table(table)
    site = info.site
    if site is None:
        say(f"class scores: none found ({info.site_problem})")
    else:
        say(f"found: {info.reading}")
        say(f"class scores: {_describe_site(site)}")
    if info.external_data:
        say(f"external data: {', '.join(info.external_data)}")
    say(f"batch dim: {'fixed' if info.batch_fixed else 'dynamic'}")
    if info.records:
        for r in info.records:
            what = f"T = {r.temperature:.4f}" if r.temperature is not None else f"{r.method} scaling"
            say(f"calibration record: {what} on output '{r.output}' ({how_patched(r)})")
            for line in record_lines(r):
                say(f"  {line}", indent=4)
    else:
        say("calibration record: none")
    say(f"sha256: {info.sha256}")


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


def _describe_site(site: ScoreSite) -> str:
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


_CHOICE_LABELS = {"nll": "NLL", "ece": "ECE", "brier": "Brier", "accuracy": "accuracy"}


def _interval(pair: Sequence[float] | None) -> str:
    return "-" if pair is None else f"{pair[0]:.3f} to {pair[1]:.3f}"


def _describe_scaling(summary: FitSummary) -> str:
    from ..report import describe_scaling

    return describe_scaling(summary.scaling, summary.intervals)


def _figures_on(summary: FitSummary) -> str:
    """What the before/after figures are on: rows of how many whole samples, for a dense output."""
    n, held, split = summary.before.n, summary.basis == "held-out", summary.split or {}
    if split.get("grouped_by") == "sample":  # issue 12: several rows per sample, resampled by sample
        samples = split["samples_holdout"] if held else split["samples_fit"]
        return f"{n} held-out rows of {samples} samples" if held else f"{n} rows of {samples} samples, in-sample"
    return f"{n} held-out samples" if held else f"{n} samples, in-sample"


def describe_fit(summary: FitSummary) -> str:
    """The fit's result line: the map and its parameters (with their interval)."""
    return _describe_scaling(summary)


def render_fit(summary: FitSummary) -> None:
    from ..metrics import METRIC_LABELS
    from ..report.tables import MARK, interval_footnote, outside_interval

    b, a = summary.before, summary.after
    where = _figures_on(summary)
    intervals = (summary.intervals or {}).get("after")
    # as in the report: an estimate outside its own interval is marked, and a note says why that is no error
    marks = {"metrics": {"after_interval": intervals, "after": a.to_dict(), "n_bins": b.n_bins}}
    marked = set(outside_interval(marks)) if intervals is not None else set()
    columns = [Column("metric"), Column("before", right=True), Column("after", right=True)]
    if intervals is not None:
        columns.append(Column("after:\n95% interval", right=True))
    if summary.fit_part is not None:
        columns += [Column("fit part\nbefore", right=True), Column("fit part\nafter", right=True)]
    say(_describe_scaling(summary))
    table = Grid(f"before/after on {where}", columns, boxed=False)
    for key, label in METRIC_LABELS.items():
        row = [label.format(bins=b.n_bins), f"{getattr(b, key):.4f}", f"{getattr(a, key):.4f}"]
        if intervals is not None:
            row.append(_interval(intervals.get(key)) + (f" {MARK}" if key in marked else ""))
        if summary.fit_part is not None:
            row += [f"{getattr(summary.fit_part[k], key):.4f}" for k in ("before", "after")]
        table.add_row(*row)
    show_table(table)
    if summary.choice is not None:
        render_choice(summary.choice)
    for note in summary.notes:
        say(f"note: {note}")
    if marked:
        say(f"note: {interval_footnote(marks)}")
    warn(summary.warnings)


def _short(x: float) -> str:
    text = f"{x:.3f}"
    return text[1:] if text.startswith("0.") else text


def _with_interval(value: float, pair: list[float] | None) -> str:
    return f"{value:.4f}" if pair is None else f"{value:.4f} ({_short(pair[0])}-{_short(pair[1])})"


def render_choice(choice: Choice) -> None:
    """The comparison table of ``--method auto`` (each figure with its 95% interval) and the choice."""
    from ..choose import IDENTITY, TABLE_FIELDS

    columns = [Column("method"), Column("params", right=True)]
    columns += [Column(_CHOICE_LABELS[f], right=True) for f in TABLE_FIELDS]
    columns += [Column("NLL - best", right=True)]
    targets = "; every map fitted to Platt's smoothed targets" if choice.smoothed_targets else ""
    times = "" if choice.repeats == 1 else f", {choice.repeats} times"
    table = Grid(f"--method auto: every applicable method, {choice.basis} on {choice.folds} folds{times} (every row "
                 "held out once per repeat; in brackets: 95% interval; NLL - best: paired per-row difference to the "
                 "map with the "
                 f"lowest NLL; {IDENTITY}: the model as it is{targets})",
                 columns, boxed=False)
    for c in choice.candidates:
        marks = ["chosen"] if c.method == choice.chosen else []
        marks += ["lowest NLL"] if c.method == choice.best else []
        marks += ["not converged"] if not c.converged else []
        marks += [f"smoothed targets on {c.smoothed_folds} of {choice.folds * choice.repeats} fold fits"] if (
            c.smoothed_folds and not choice.smoothed_targets) else []
        name = c.method + (f" ({', '.join(marks)})" if marks else "")
        figures = (_with_interval(c.metrics[f], c.intervals.get(f)) for f in TABLE_FIELDS)
        diff = "-" if c.difference is None else f"{_short(c.difference[0])} to {_short(c.difference[1])}"
        table.add_row(name, str(c.n_parameters), *figures, diff)
    show_table(table)
    chosen = "the model as it is (T = 1)" if choice.chosen == IDENTITY else choice.chosen
    say(f"chosen: {chosen}: {choice.reason}")


_REFERENCE_FROM = {
    "original": "the original model",
    "scores": "captured scores",
    "patched-graph": "the patched graph's own logits",
}


def render_decisions(lines: list[str]) -> None:
    """The decision thresholds chosen, what they do on the rows they come from, and where those are."""
    for line in lines:
        say(line)


def render_verify(result: VerifyResult) -> None:
    from ..verify import format_figure

    if result.reference_from in _REFERENCE_FROM:
        where = f" ({result.original})" if result.original else ""
        title = f"verify: reference from {_REFERENCE_FROM[result.reference_from]}{where}, {result.n} samples"
    else:
        title = f"verify: no reference (no calibration record), {result.n} samples"
    table = Grid(title, [Column("check"), Column("result"), Column("value", right=True),
                         Column("limit", right=True), Column("what", prose=True)])
    for c in result.checks:
        status = {"pass": "pass", "fail": "FAIL", "skip": "skipped", "undecided": "undecided"}[c.status]
        table.add_row(c.name, status, format_figure(c.value), format_figure(c.limit), c.detail)
    show_table(table)
    for note in result.notes:
        say(f"note: {note}")
    undecided = [c.name for c in result.checks if c.status == "undecided"]
    for name in undecided:  # not a failure: the data cannot tell either way
        say(f"undecided: {name}: the interval straddles the target; more labelled rows would tell")
    if not result.passed:
        for c in result.failed:  # each failure as a full sentence
            say(f"failed: {c.name}: {c.detail}")


def verdict_line(result: VerifyResult) -> str:
    """verify's verdict, the line ``--quiet`` keeps."""
    if result.passed:
        undecided = sum(c.status == "undecided" for c in result.checks)
        return "verify: all checks passed" + (f" ({undecided} undecided)" if undecided else "")
    return f"verify: FAILED ({', '.join(c.name for c in result.failed)})"


def render_report(result: ReportResult, verdict: bool = True) -> None:
    for line in result.content["verdict"] if verdict else ():
        say(f"  {line}", indent=4)


def report_line(result: ReportResult) -> str:
    """The line that says what a report wrote."""
    n = len(result.files)
    return (f"wrote {n} report file{'' if n == 1 else 's'} to {result.directory}: "
            + ", ".join(Path(f).name for f in result.files))


_NODES = {"temperature": "Div", "vector": "Mul + Add", "platt": "Mul + Add", "matrix": "MatMul + Add",
          "dirichlet": "log-softmax + MatMul + Add", "beta": "the beta map (softplus, Mul, Add)"}


def how_patched(r: Record) -> str:
    """One line on what the patch did to the graph."""
    if r.folded:
        what = "1/T" if r.temperature is not None else f"{r.method} scaling"
        how = f"{what} folded into the weight and bias of the logits layer"
        how += "; Softmax appended" if r.rewrite == "append-softmax" else ""
        how += "; Sigmoid appended" if r.rewrite == "append-sigmoid" else ""
        return how
    nodes = _NODES.get(r.method, f"the {r.method} map (standard operators)")
    how = {
        "insert-before-activation": f"{nodes} inserted before the existing activation",
        "append-softmax": f"{nodes} + Softmax appended",
        "append-sigmoid": f"{nodes} + Sigmoid appended",
        "ml-log-probabilities": "classifier probabilities replaced by softmax(scaled log p)",
        "replace-values": f"values replaced in place by the activation of the scaled logits ({r.logits_from})",
    }.get(r.rewrite, str(r.rewrite))
    if r.compute_dtype:
        how += f", computed in {r.compute_dtype}"
    return how
