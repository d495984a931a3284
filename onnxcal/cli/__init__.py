"""Command line: parse, call ``onnxcal.api``, print. Nothing else imports this module.

Exit status: 0 success, 1 a verification check failed, 2 bad input (one line
on stderr; ``onnxcal --debug CMD ...`` shows the traceback), 130 interrupted
by SIGINT (Ctrl-C), 143 by SIGTERM; the run's temporaries are removed first.
"""

from __future__ import annotations

import contextlib
import functools
import inspect as _inspect
import json
import os
import struct
import sys
import time
import traceback
import typing
import warnings
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import Annotated, Optional

import typer
from rich import box
from rich.console import Console
from rich.progress import (
    BarColumn,
    MofNCompleteColumn,
    Progress,
    ProgressColumn,
    TextColumn,
    TimeRemainingColumn,
)
from rich.table import Table
from rich.text import Text

from .. import __version__, _files, _runenv, _signals, api
from ..capture import CPU, DEFAULT_BATCH, OPTIMIZATION_LEVELS, ProgressFn
from ..data import IMAGE_OPTIONS, DataSpec, Selection, parse_shard
from ..errors import OnnxcalError, OnnxcalWarning
from ..fit import FitOptions, FitSummary
from ..graph import DEFAULT_OUTPUT_NAME, ModelInfo, TensorSpec
from ..metrics import DEFAULT_BINS, METRIC_LABELS
from ..report import FORMATS, ReportResult, describe_scaling
from ..verify import VerifyResult, format_figure

app = typer.Typer(
    name="onnxcal",
    help=(
        "Calibrate an exported ONNX classifier: capture its logits on labelled data, "
        "fit a temperature T (or vector or Platt scaling) by minimising NLL, patch the "
        "graph to emit the calibrated probabilities, e.g. softmax(logits / T), and "
        "verify the patched file against NumPy.\n\n"
        "Exit status: 0 success, 1 a check failed, 2 bad input."
    ),
    add_completion=False,
    no_args_is_help=True,
    pretty_exceptions_enable=False,
    rich_markup_mode=None,
)


def printable(text: str) -> str:
    r"""``text`` with every character a terminal would act on shown escaped.

    Names and messages can come from a hostile file (a tensor named with an
    ANSI escape sequence, a label holding a control character, a code point
    numpy allows and Unicode does not); escaped, they cannot drive the
    terminal, and they still show what the file holds.

    >>> print(printable("logits\x1b[2J, été"))
    logits\x1b[2J, été
    """
    if all(line.isprintable() for line in text.split("\n")):
        return text
    raw = text.encode("utf-32-le", "surrogatepass")  # code points, without making a str of each
    kept = []
    for o in struct.unpack(f"<{len(raw) // 4}I", raw):
        c = chr(o) if o <= 0x10FFFF else ""
        kept.append(c if c and (c == "\n" or c.isprintable()) else _escaped(o))
    return "".join(kept)


def _escaped(o: int) -> str:
    if 0xDC80 <= o <= 0xDCFF:  # a byte of a file name that is not UTF-8 (Python's surrogateescape)
        return f"\\x{o - 0xDC00:02x}"
    return f"\\x{o:02x}" if o < 0x100 else f"\\u{o:04x}" if o < 0x10000 else f"\\U{o:08x}"


class _Console(Console):
    """A rich Console whose strings (printed, or in tables) pass through :func:`printable`."""

    def render_str(self, text: str, **kwargs):
        return super().render_str(printable(text), **kwargs)


out = _Console(highlight=False, markup=False)
err = _Console(stderr=True, highlight=False, markup=False)

CAUTION = (
    "Calibration holds only for data like the validation set and drifts under "
    "distribution shift; it is no substitute for validation under local regulations "
    "and licensed professional review."
)

# --------------------------------------------------------------------------
# Shared options

ModelArg = Annotated[Path, typer.Argument(help="The ONNX model file.", show_default=False)]
OutputOpt = Annotated[
    Optional[str],
    typer.Option("--output", help="The class-score output (default: the likeliest float output)."),
]
ForceOpt = Annotated[bool, typer.Option("--force", help="Replace an existing output file.")]
JsonOpt = Annotated[bool, typer.Option("--json", help="Print JSON instead of a table.")]
QuietOpt = Annotated[bool, typer.Option("--quiet", "-q", help="No progress bar.")]
OutputNameOpt = Annotated[
    str, typer.Option("--output-name", help="Name of the added output when the model ends in logits.")
]
DropLogitsOpt = Annotated[
    bool, typer.Option("--drop-logits", help="Remove the logits output when a new output is added.")
]
ActivationOpt = Annotated[
    Optional[str],
    typer.Option(
        "--activation",
        help="softmax or sigmoid: what turns raw logits into probabilities "
        "(default: sigmoid for one logit, softmax otherwise).",
    ),
]
ComputeDtypeOpt = Annotated[
    Optional[str],
    typer.Option(
        "--compute-dtype",
        help="float32 or float64: run the Div and activation in this dtype (Casts "
        "around them; e.g. for float16 models). The output keeps its dtype.",
    ),
]
OutputHoldsOpt = Annotated[
    Optional[str],
    typer.Option(
        "--output-holds",
        help="logits, probabilities or log-probabilities: what the output holds, when the graph cannot tell "
        "(checked against the data; by default the graph says, and an output of raw logits whose rows are "
        "probabilities is read as probabilities).",
    ),
]
ScoreColumnsOpt = Annotated[
    Optional[str],
    typer.Option(
        "--score-columns",
        metavar="START:STOP",
        help="When the output concatenates class scores with other values (a detector's boxes and "
        "sigmoid scores), calibrate only the scores: positions START to STOP-1 along the Concat's axis, as "
        "the refusal lists them. The other positions stay byte-identical.",
    ),
]
FoldOpt = Annotated[
    bool,
    typer.Option(
        "--fold",
        help="Fold the scaling into the weight and bias of the Gemm / MatMul(+Add) computing the "
        "logits (1/T, or per class w and b for vector, Platt and per-label scaling) instead of adding nodes.",
    ),
]
MethodOpt = Annotated[
    str,
    typer.Option(
        "--method",
        help="temperature (softmax(z/T), or sigmoid(z/T) for one logit), vector "
        "(softmax(w*z+b), per class) or platt (sigmoid(a*z+b), one logit).",
    ),
]
MultilabelOpt = Annotated[
    Optional[str],
    typer.Option(
        "--multilabel",
        help="For N x K 0/1 labels: 'shared' (one T for all labels, the default) or 'per-label' (one T each).",
    ),
]
L2Opt = Annotated[
    float,
    typer.Option("--l2", help="Penalty l2*(sum (w-1)^2 + sum b^2) added to the NLL (vector, platt; 0 to 1e6)."),
]
HoldoutOpt = Annotated[
    float,
    typer.Option(
        "--holdout",
        help="Fraction held out (stratified) to score the fit on, 0 to 0.9; 0 scores in-sample.",
    ),
]
SeedOpt = Annotated[int, typer.Option("--seed", help="Seed of the holdout split and the bootstrap (0 to 2^32-1).")]
BootstrapOpt = Annotated[
    int, typer.Option("--bootstrap", help="Bootstrap replicates for 95% intervals (0 to 10000); 0 skips them.")
]
BinsOpt = Annotated[int, typer.Option("--bins", help="Bins of the ECEs (2 to 100000).")]
MaxModelBytesOpt = Annotated[
    str,
    typer.Option(
        "--max-model-bytes",
        help="Refuse a model file larger than this, before reading it (with its external data when the "
        "command runs the model): bytes, or a size such as 512MiB or 8GiB.",
        metavar="SIZE",
    ),
]
MAX_MODEL_BYTES = "8GiB"
DropNonfiniteOpt = Annotated[
    bool,
    typer.Option(
        "--drop-nonfinite",
        help="Leave out the samples whose logits are NaN or Inf (and say how many) instead of refusing them.",
    ),
]


# --------------------------------------------------------------------------
# Data, image and runtime options, shared by capture, calibrate and verify


def _option(name: str, kind, default, flag: str, help: str, **extra) -> _inspect.Parameter:
    extra.setdefault("show_default", default is not None)
    option = typer.Option(flag, help=help, **extra)
    return _inspect.Parameter(
        name, _inspect.Parameter.KEYWORD_ONLY, default=default, annotation=Annotated[kind, option]
    )


_SHARED_OPTIONS = (
    _option("data", Optional[Path], None, "--data",
            "Validation set: .npz (one array per model input, plus 'labels'), .npy (a one-input "
            "model), .csv table, or a folder of images (one subfolder per class)."),
    _option("inputs", Optional[list[str]], None, "--input",
            "One .npy per model input (memory-mapped); repeat for each input.", metavar="NAME=FILE.npy"),
    _option("labels", Optional[Path], None, "--labels",
            "Labels .npy (with --input), or a CSV mapping image files to classes "
            "(columns 'file' and the label column)."),
    _option("label_column", Optional[str], None, "--label-column", "Label column of a CSV (default 'label')."),
    _option("feature_columns", Optional[str], None, "--feature-columns",
            "CSV columns fed to the model, in order (default: all but the label).", metavar="A,B,..."),
    _option("classes", Optional[Path], None, "--classes",
            "Class names, one per line, in the model's class order; string labels are mapped through it."),
    _option("limit", Optional[int], None, "--limit", "Use at most N samples (N >= 1).", metavar="N"),
    _option("shuffle_seed", Optional[int], None, "--shuffle-seed",
            "Take --limit/--shard samples from a random permutation with this seed (0 to 2^32-1).", metavar="SEED"),
    _option("shard", Optional[str], None, "--shard",
            "Capture the I-th of N deterministic slices (1 <= I <= N); 'onnxcal fit' merges the files.",
            metavar="I/N"),
    _option("preprocess", Optional[Path], None, "--preprocess",
            "Image options below as a TOML or JSON file (options given here win)."),
    _option("resize", Optional[int], None, "--resize", "Image: resize the shorter side to N pixels (1 to 65535).",
            metavar="N"),
    _option("crop", Optional[str], None, "--crop", "Image: centre crop (sides of 1 to 65535 pixels).", metavar="N|HxW"),
    _option("scale", Optional[bool], None, "--scale/--no-scale",
            "Image: divide pixels by 255 (default: yes for float inputs).", show_default=False),
    _option("mean", Optional[str], None, "--mean", "Image: per-channel mean, subtracted after scaling.",
            metavar="M[,M,M]"),
    _option("std", Optional[str], None, "--std", "Image: per-channel std, divided by after the mean.",
            metavar="S[,S,S]"),
    _option("channel_order", Optional[str], None, "--channel-order", "Image: RGB (default) or BGR.",
            metavar="RGB|BGR"),
    _option("layout", Optional[str], None, "--layout", "Image: NCHW or NHWC (default: from the model).",
            metavar="NCHW|NHWC"),
    _option("dtype", Optional[str], None, "--dtype", "Image: input dtype (default: the model's).", metavar="DTYPE"),
    _option("interpolation", Optional[str], None, "--interpolation",
            "Image: resize filter: nearest, bilinear (default), bicubic, lanczos.", metavar="FILTER"),
    _option("batch_size", Optional[int], None, "--batch-size",
            f"Samples per onnxruntime call, 1 to 16777216 (default: {DEFAULT_BATCH}, doubled while onnxcal's own "
            "work per call costs more than 5 % of the call).", min=1, metavar="N"),
    _option("threads", int, 0, "--threads",
            "onnxruntime intra-op threads (0: its default; at most 4 per core, or 64).", min=0),
    _option("optimization", str, "all", "--optimization",
            f"Graph optimisation level: {', '.join(OPTIMIZATION_LEVELS)}."),
    _option("provider", str, CPU, "--provider", "onnxruntime execution provider."),
)
"""Data, image and runtime options shared by capture, calibrate and verify."""

_RUNTIME_KEYS = ("batch_size", "threads", "optimization", "provider")


def _input_files(values: Sequence[str] | None) -> dict[str, str]:
    files: dict[str, str] = {}
    for item in values or ():
        name, sep, path = item.partition("=")
        if not sep or not name.strip() or not path.strip():
            raise OnnxcalError(f"--input '{item}' is not of the form NAME=FILE.npy", "e.g. --input input_ids=ids.npy")
        if name.strip() in files:
            raise OnnxcalError(f"--input gives model input '{name.strip()}' twice", "give each input once")
        files[name.strip()] = path.strip()
    return files


def _spec(values: dict) -> DataSpec:
    columns = values["feature_columns"]
    shard = values.get("shard")
    return DataSpec(
        path=values["data"],
        inputs=_input_files(values["inputs"]),
        labels=values["labels"],
        label_column=values["label_column"],
        feature_columns=[c.strip() for c in columns.split(",") if c.strip()] if columns is not None else None,
        classes=values["classes"],
        preprocess=values["preprocess"],
        image={k: values[k] for k in IMAGE_OPTIONS if values[k] is not None},
        selection=Selection(values["limit"], values["shuffle_seed"], parse_shard(shard) if shard else None),
    )


def _data_options(*, shard: bool = False) -> Callable:
    """Give a command the shared data/image/runtime options.

    The command declares keyword parameters ``data`` (it receives a
    :class:`~onnxcal.data.DataSpec`) and ``runtime`` (a dict of the
    ``api`` run keywords); the options themselves are :data:`_SHARED_OPTIONS`,
    so every command documents them alike.
    """
    shared = [p for p in _SHARED_OPTIONS if shard or p.name != "shard"]

    def decorate(fn: Callable) -> Callable:
        own_hints = typing.get_type_hints(fn, include_extras=True)
        own = [
            p.replace(kind=_inspect.Parameter.KEYWORD_ONLY, annotation=own_hints[p.name])
            for p in _inspect.signature(fn).parameters.values()
            if p.name not in ("data", "runtime")
        ]
        names = [p.name for p in shared]

        @functools.wraps(fn)
        def command(**kwargs):
            values = {name: kwargs.pop(name) for name in names}
            runtime = {k: values[k] for k in _RUNTIME_KEYS}
            return fn(**kwargs, data=_spec(values), runtime=runtime)

        params = own + shared
        command.__signature__ = _inspect.Signature(params)
        command.__annotations__ = {p.name: p.annotation for p in params}
        del command.__wrapped__  # typer must read the new signature, not fn's
        return command

    return decorate


class _RateColumn(ProgressColumn):
    """Samples per second."""

    def render(self, task) -> Text:
        speed = task.finished_speed or task.speed
        return Text(f"{speed:,.0f} samples/s" if speed else "- samples/s")


@contextlib.contextmanager
def _progress(quiet: bool) -> Iterator[ProgressFn | None]:
    """A rich progress bar on stderr, fed by the stages' progress callback."""
    if quiet:
        yield None
        return
    bar = Progress(
        TextColumn("{task.description}"),
        BarColumn(),
        MofNCompleteColumn(),
        _RateColumn(),
        TimeRemainingColumn(),
        console=err,
        transient=False,
    )
    tasks: dict[str, int] = {}

    shown: dict[str, float] = {}

    def update(description: str, done: int, total: int) -> None:
        if not tasks:  # start drawing at the first batch, not before
            bar.start()
        if description not in tasks:
            tasks[description] = bar.add_task(description, total=total)
        now = time.monotonic()
        if done >= total or now - shown.get(description, 0.0) >= 0.05:  # cheap on tiny batches
            shown[description] = now
            bar.update(tasks[description], completed=done)

    try:
        yield update
    except BaseException:
        bar.live.transient = True  # a failure: its one line, without the bars above it
        raise
    finally:
        if tasks:
            bar.stop()


def _warn(messages: Sequence[str]) -> None:
    for m in messages:
        err.print(f"warning: {m}", soft_wrap=True)


def _print_json(data) -> None:
    sys.stdout.write(json.dumps(data, indent=2, sort_keys=True, default=str) + "\n")


# --------------------------------------------------------------------------
# Rendering


def _shape(spec: TensorSpec) -> str:
    if spec.shape is None:
        return "?"
    return "[" + ", ".join("?" if d is None else str(d) for d in spec.shape) + "]"


def _render_info(info: ModelInfo) -> None:
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
            out.print(f"calibration record: {what} on output '{r.output}' ({_how(r)})", soft_wrap=True)
    else:
        out.print("calibration record: none")
    out.print(f"sha256: {info.sha256}")


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


def _render_fit(summary: FitSummary) -> None:
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
    _warn(summary.warnings)


_REFERENCE_FROM = {
    "original": "the original model",
    "scores": "captured scores",
    "patched-graph": "the patched graph's own logits",
}


def _render_verify(result: VerifyResult) -> None:
    if result.reference_from in _REFERENCE_FROM:
        where = f" ({result.original})" if result.original else ""
        title = f"verify: reference from {_REFERENCE_FROM[result.reference_from]}{where}, {result.n} samples"
    else:
        title = f"verify: no reference (no calibration record), {result.n} samples"
    table = Table(title=title, title_justify="left")
    for col in ("check", "result", "value", "limit", "what"):
        table.add_column(col)
    for c in result.checks:
        status = {"pass": "pass", "fail": "FAIL", "skip": "skipped"}[c.status]
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


def _render_report(result: ReportResult, verdict: bool = True) -> None:
    for line in result.content["verdict"] if verdict else ():
        out.print(f"  {line}", soft_wrap=True)
    out.print(f"wrote {len(result.files)} report files to {result.directory}: "
              + ", ".join(Path(f).name for f in result.files), soft_wrap=True)


# --------------------------------------------------------------------------
# Commands


def _show_version(value: bool) -> None:
    if value:
        out.print(f"onnxcal {__version__}")
        raise typer.Exit(0)


@app.callback()
def _root(
    debug: Annotated[
        bool, typer.Option("--debug", help="Show tracebacks for errors (put it before the command).")
    ] = False,
    version: Annotated[
        bool,
        typer.Option("--version", help="Print the version and exit.", is_eager=True, callback=_show_version),
    ] = False,
) -> None:
    pass


@app.command()
def inspect(model: ModelArg, as_json: JsonOpt = False, max_model_bytes: MaxModelBytesOpt = MAX_MODEL_BYTES) -> None:
    """Show a model's inputs, outputs, opset, class-score output and calibration record."""
    info = api.inspect(model, max_model_bytes=max_model_bytes)
    _print_json(info.to_dict()) if as_json else _render_info(info)


@app.command()
@_data_options(shard=True)
def capture(
    model: ModelArg,
    out_path: Annotated[
        Path, typer.Option("--out", help="Capture file to write (.npz).", show_default=False)
    ],
    output: OutputOpt = None,
    activation: ActivationOpt = None,
    output_holds: OutputHoldsOpt = None,
    score_columns: ScoreColumnsOpt = None,
    force: ForceOpt = False,
    quiet: QuietOpt = False,
    max_model_bytes: MaxModelBytesOpt = MAX_MODEL_BYTES,
    *,
    data: DataSpec,
    runtime: dict,
) -> None:
    """Run the model on CPU over a labelled set and save its logits and labels.

    The logits stream into the file batch by batch; it appears only when complete.
    """
    with _progress(quiet) as progress:
        cap = api.capture(
            model,
            data,
            out=out_path,
            output=output,
            force=force,
            progress=progress,
            activation=activation,
            max_model_bytes=max_model_bytes,
            output_holds=output_holds,
            score_columns=score_columns,
            **runtime,
        )
    for note in cap.notes:
        out.print(f"note: {note}", soft_wrap=True)
    out.print(
        f"captured {cap.meta.n} x {cap.meta.num_classes} logits from '{cap.meta.scores}' "
        f"-> {out_path}"
    )


@app.command()
def fit(
    logits: Annotated[
        list[Path],
        typer.Argument(help="Capture file(s) from 'onnxcal capture'; several (e.g. shards) are merged.",
                       metavar="LOGITS.npz...", show_default=False),
    ],
    out_path: Annotated[Optional[Path], typer.Option("--out", help="Write the fit to this JSON file.")] = None,
    method: MethodOpt = "temperature",
    multilabel: MultilabelOpt = None,
    l2: L2Opt = 0.0,
    holdout: HoldoutOpt = 0.25,
    seed: SeedOpt = 0,
    bootstrap: BootstrapOpt = 200,
    bins: BinsOpt = 15,
    drop_nonfinite: DropNonfiniteOpt = False,
    force: ForceOpt = False,
    as_json: JsonOpt = False,
) -> None:
    """Fit a calibration map to captured logits by minimising NLL; print before/after metrics.

    The headline figures are on a held-out part (--holdout), with bootstrap
    95% intervals (--bootstrap); the parameters written are refitted on all samples.
    """
    options = FitOptions(method, multilabel, l2, holdout, seed, bootstrap, bins)
    summary = api.fit(logits, out=out_path, force=force, options=options, drop_nonfinite=drop_nonfinite)
    if as_json:
        _print_json(summary.to_dict())
        return
    _render_fit(summary)
    if out_path is not None:
        out.print(f"wrote {out_path}")
    out.print(f"caution: {CAUTION}", soft_wrap=True)


@app.command()
def patch(
    model: ModelArg,
    out_path: Annotated[Path, typer.Option("--out", help="Patched model to write.", show_default=False)],
    temperature: Annotated[Optional[float], typer.Option("--temperature", help="T to bake in.")] = None,
    fit_file: Annotated[Optional[Path], typer.Option("--fit", help="FIT.json from 'onnxcal fit --out'.")] = None,
    output: OutputOpt = None,
    output_name: OutputNameOpt = DEFAULT_OUTPUT_NAME,
    drop_logits: DropLogitsOpt = False,
    activation: ActivationOpt = None,
    compute_dtype: ComputeDtypeOpt = None,
    fold: FoldOpt = False,
    output_holds: OutputHoldsOpt = None,
    score_columns: ScoreColumnsOpt = None,
    fitted_on_twin: Annotated[
        bool,
        typer.Option(
            "--fitted-on-twin",
            help="The --fit was made on another build of this model (its float16 or quantized twin); "
            "without it a fit of a model with another sha256 is refused.",
        ),
    ] = False,
    force: ForceOpt = False,
    max_model_bytes: MaxModelBytesOpt = MAX_MODEL_BYTES,
) -> None:
    """Rewrite the graph so the model outputs calibrated probabilities (e.g. softmax(logits / T))."""
    result = api.patch(
        model,
        out_path,
        temperature=temperature,
        fit=fit_file,
        output=output,
        output_name=output_name,
        drop_logits=drop_logits,
        activation=activation,
        compute_dtype=compute_dtype,
        fold=fold,
        force=force,
        max_model_bytes=max_model_bytes,
        output_holds=output_holds,
        score_columns=score_columns,
        fitted_on_twin=fitted_on_twin,
    )
    r = result.record
    what = f"T = {r.temperature:.4f}" if r.temperature is not None else f"{r.method} scaling"
    out.print(f"{what}: {_how(r)}; calibrated output '{r.output}' -> {result.path}")


def _how(r) -> str:
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


@app.command(
    epilog="Exit status: 0 every check passed (skipped ones do not fail), 1 a check failed, "
    "2 bad input (nothing is written then)."
)
@_data_options()
def verify(
    patched: Annotated[Path, typer.Argument(help="Patched model.", show_default=False)],
    original: Annotated[
        Optional[Path],
        typer.Option("--original", help="The uncalibrated model (default: the path in the record)."),
    ] = None,
    scores: Annotated[
        Optional[list[Path]],
        typer.Option(
            "--scores",
            help="Capture file of the original model on the same data, instead of running it "
            "(repeat for several files, in the data's order).",
            show_default=False,
            metavar="CAPTURE.npz",
        ),
    ] = None,
    max_ece: Annotated[
        Optional[float], typer.Option("--max-ece", help="Fail when the patched model's ECE on the labels is above this.")
    ] = None,
    max_nll: Annotated[
        Optional[float], typer.Option("--max-nll", help="Fail when its NLL on the labels is above this.")
    ] = None,
    min_accuracy: Annotated[
        Optional[float], typer.Option("--min-accuracy", help="Fail when its accuracy on the labels is below this.")
    ] = None,
    bins: BinsOpt = DEFAULT_BINS,
    latency: Annotated[
        bool,
        typer.Option("--latency", help="Time the patched model against the original, alternating runs; report the ratio."),
    ] = False,
    max_latency_ratio: Annotated[
        Optional[float],
        typer.Option("--max-latency-ratio", help="Fail when median patched / original latency is above this (implies --latency)."),
    ] = None,
    latency_runs: Annotated[
        int, typer.Option("--latency-runs", help="Timed runs of each model for --latency (1 to 100000).")
    ] = api.DEFAULT_LATENCY_RUNS,
    junit: Annotated[
        Optional[Path], typer.Option("--junit", help="Also write the checks as JUnit XML to this file.")
    ] = None,
    drop_nonfinite: DropNonfiniteOpt = False,
    force: ForceOpt = False,
    as_json: JsonOpt = False,
    quiet: QuietOpt = False,
    max_model_bytes: MaxModelBytesOpt = MAX_MODEL_BYTES,
    *,
    data: DataSpec,
    runtime: dict,
) -> None:
    """Check a patched model, e.g. for a CI gate; each check is reported with its figure.

    (1) reference: the outputs against softmax(original logits / T) (or the
    method's reference) in float64 NumPy, within the tolerance of the graph's
    dtype, and row sums; (2) argmax or 0.5-threshold decisions as the
    reference's; (3) record: the calibration record is present and its
    parameters are the graph's, source: the original's sha256 is the
    record's; (4) --max-ece, --max-nll, --min-accuracy on the labels; (5)
    --latency. Without --original (or the recorded path) and --scores, (1)
    and (2) use the patched graph's own logits and say so.
    """
    with _progress(quiet or as_json) as progress:
        result = api.verify(
            patched,
            data,
            original=original,
            scores=scores or None,
            max_ece=max_ece,
            max_nll=max_nll,
            min_accuracy=min_accuracy,
            n_bins=bins,
            latency=latency,
            max_latency_ratio=max_latency_ratio,
            latency_runs=latency_runs,
            junit=junit,
            force=force,
            progress=progress,
            max_model_bytes=max_model_bytes,
            drop_nonfinite=drop_nonfinite,
            **runtime,
        )
    _print_json(result.to_dict()) if as_json else _render_verify(result)
    if junit is not None and not as_json:
        out.print(f"wrote {junit}")
    if not result.passed:
        raise typer.Exit(1)


@app.command()
def report(
    captures: Annotated[
        list[Path],
        typer.Argument(
            help="Capture file(s) from 'onnxcal capture' (several are read as one set).",
            show_default=False,
            metavar="CAPTURE.npz",
        ),
    ],
    out_dir: Annotated[
        Path, typer.Option("--out", help="Directory for the report (created if missing).", show_default=False)
    ],
    temperature: Annotated[Optional[float], typer.Option("--temperature", help="T to report on.")] = None,
    fit_file: Annotated[Optional[Path], typer.Option("--fit", help="FIT.json from 'onnxcal fit --out'.")] = None,
    model: Annotated[
        Optional[Path], typer.Option("--model", help="A patched model: its calibration record gives the parameters.")
    ] = None,
    formats: Annotated[
        str, typer.Option("--format", help=f"Comma-separated outputs among {','.join(FORMATS)}.")
    ] = ",".join(FORMATS),
    class_names: Annotated[
        Optional[Path],
        typer.Option("--classes", help="Class names, one per line, in the model's class order "
                     "(default: those recorded in the capture)."),
    ] = None,
    bins: Annotated[
        Optional[int], typer.Option("--bins", help="Bins, 2 to 100000 (default: the fit's, else 15).")
    ] = None,
    drop_nonfinite: DropNonfiniteOpt = False,
    force: ForceOpt = False,
    max_model_bytes: MaxModelBytesOpt = MAX_MODEL_BYTES,
) -> None:
    """Write report.html (self-contained), summary.md, report.json and the plots as PNG files.

    Give the parameters with one of --temperature, --fit or --model. On the
    capture a fit was made on, the figures are those of its held-out part.
    """
    result = api.report(
        captures,
        out_dir,
        temperature=temperature,
        fit=fit_file,
        model=model,
        formats=formats,
        class_names=class_names,
        n_bins=bins,
        force=force,
        drop_nonfinite=drop_nonfinite,
        max_model_bytes=max_model_bytes,
    )
    for note in result.content["notes"]:
        if note.startswith("dropped "):
            out.print(f"note: {note}", soft_wrap=True)
    _render_report(result)
    out.print(f"caution: {CAUTION}", soft_wrap=True)


@app.command()
@_data_options()
def calibrate(
    model: ModelArg,
    out_path: Annotated[Path, typer.Option("--out", help="Patched model to write.", show_default=False)],
    output: OutputOpt = None,
    output_name: OutputNameOpt = DEFAULT_OUTPUT_NAME,
    drop_logits: DropLogitsOpt = False,
    activation: ActivationOpt = None,
    compute_dtype: ComputeDtypeOpt = None,
    fold: FoldOpt = False,
    output_holds: OutputHoldsOpt = None,
    score_columns: ScoreColumnsOpt = None,
    method: MethodOpt = "temperature",
    multilabel: MultilabelOpt = None,
    l2: L2Opt = 0.0,
    holdout: HoldoutOpt = 0.25,
    seed: SeedOpt = 0,
    bootstrap: BootstrapOpt = 200,
    bins: BinsOpt = 15,
    report_dir: Annotated[
        Optional[Path],
        typer.Option("--report", help="Also write the report (as 'onnxcal report') into this directory."),
    ] = None,
    drop_nonfinite: DropNonfiniteOpt = False,
    force: ForceOpt = False,
    as_json: JsonOpt = False,
    quiet: QuietOpt = False,
    max_model_bytes: MaxModelBytesOpt = MAX_MODEL_BYTES,
    *,
    data: DataSpec,
    runtime: dict,
) -> None:
    """Capture, fit, patch and verify in one go; print the before/after table.

    The patched model is not written when verification fails (exit 1); the
    report, when asked for, is written either way.
    """
    with _progress(quiet or as_json) as progress:
        result = api.calibrate(
            model,
            data,
            out_path,
            output=output,
            output_name=output_name,
            drop_logits=drop_logits,
            activation=activation,
            compute_dtype=compute_dtype,
            fold=fold,
            force=force,
            progress=progress,
            options=FitOptions(method, multilabel, l2, holdout, seed, bootstrap, bins),
            report=report_dir,
            drop_nonfinite=drop_nonfinite,
            max_model_bytes=max_model_bytes,
            output_holds=output_holds,
            score_columns=score_columns,
            **runtime,
        )
    if as_json:
        _print_json(
            {
                "fit": result.summary.to_dict(),
                "verify": result.verification.to_dict(),
                "written": result.patch.path if result.patch else None,
                "report": list(result.report.files) if result.report else None,
            }
        )
    else:
        _render_fit(result.summary)
        _render_verify(result.verification)
        if result.report is not None:
            _render_report(result.report, verdict=False)
        if result.patch is not None:
            r = result.patch.record
            out.print(f"wrote {result.patch.path} (calibrated output '{r.output}')")
            out.print(f"caution: {CAUTION}", soft_wrap=True)
    if result.patch is None:
        err.print(f"error: verification failed; '{out_path}' was not written")
        raise typer.Exit(1)


# --------------------------------------------------------------------------
# Entry point


def _one_line(text: str) -> str:
    return " ".join(str(text).split())


def _show_warning(message, category, filename, lineno, file=None, line=None) -> None:
    """Every warning as one 'warning:' line on stderr: onnxcal's as they are, a library's
    (numpy's RuntimeWarning, say) with its category, without Python's source line."""
    if issubclass(category, OnnxcalWarning):
        _warn([_one_line(message)])
    else:
        _warn([f"{category.__name__}: {_one_line(message)}"])


def _written(paths: Sequence[Path]) -> str:
    """What an interrupted run leaves: nothing, or the complete outputs it published before the signal."""
    if not paths:
        return "no output was written"
    shown = ", ".join(f"'{p}'" for p in paths[:3]) + (f" and {len(paths) - 3} more" if len(paths) > 3 else "")
    return f"the outputs were complete and written before it stopped ({shown})"


def main(argv: Sequence[str] | None = None) -> int:
    """Run the CLI; return the exit status (the console script exits with it).

    SIGINT and SIGTERM stop the run like an error (``_signals``): its
    temporaries are removed, one line is printed, and the status is 130 or
    143. Whatever ends the run, the line that reports it is printed with
    both signals ignored, so it is never cut short by a second one.
    """
    args = list(sys.argv[1:] if argv is None else argv)
    debug = "--debug" in args
    if debug:  # accept --debug anywhere on the line
        args = ["--debug"] + [a for a in args if a != "--debug"]
    with _signals.interrupting(), _files.command() as run:
        try:
            with warnings.catch_warnings(), _runenv.private_caches(), _runenv.one_line_logging(lambda m: _warn([m])):
                warnings.simplefilter("always", OnnxcalWarning)
                warnings.showwarning = _show_warning
                rv = app(args=args, prog_name="onnxcal", standalone_mode=False)
        except BaseException as exc:  # noqa: B036 - every ending is reported on one line
            _signals.stopping()
            return _report_failure(exc, debug, run.written)
    return rv if isinstance(rv, int) else 0


def _report_failure(exc: BaseException, debug: bool, written: Sequence[Path]) -> int:
    """Print the one line that says how the run ended; return the exit status."""
    if isinstance(exc, SystemExit):  # typer.Exit and --version end the run normally
        return exc.code if isinstance(exc.code, int) else 0
    if debug and not isinstance(exc, typer.TyperException):
        traceback.print_exception(exc)
    if isinstance(exc, OnnxcalError):
        err.print(f"onnxcal: error: {_one_line(exc)}", soft_wrap=True)
        return exc.exit_code
    if isinstance(exc, typer.TyperException):  # bad usage: the parser's message, on one line too
        if type(exc).__name__ == "NoArgsIsHelpError":  # 'onnxcal' alone: the help
            exc.show()
            return 2
        ctx = getattr(exc, "ctx", None)
        message = exc.format_message() if hasattr(exc, "format_message") else str(exc)
        see = f"; see '{ctx.command_path} --help'" if ctx is not None else ""
        err.print(f"onnxcal: error: {_one_line(message).rstrip('.')}{see}", soft_wrap=True)
        return 2
    if isinstance(exc, (_signals.Interrupted, KeyboardInterrupt, typer.Abort)):
        cause = exc.__cause__ if isinstance(exc, typer.Abort) and exc.__cause__ is not None else exc
        name = _signals.name_of(cause)
        err.print(f"onnxcal: interrupted by {name}; {_written(written)}", soft_wrap=True)
        return _signals.exit_status(name)
    if isinstance(exc, OSError):  # a file error the api did not word (e.g. a file removed meanwhile)
        where = f" '{printable(os.fsdecode(exc.filename))}'" if exc.filename else ""
        err.print(
            f"onnxcal: error: cannot access{where}: {exc.strerror or exc}; check the path and its permissions",
            soft_wrap=True,
        )
        return 2
    if not isinstance(exc, Exception):
        raise exc
    err.print(  # an unexpected failure: still one line unless --debug
        f"onnxcal: internal error: {type(exc).__name__}: {_one_line(exc)} (rerun with --debug and report it)",
        soft_wrap=True,
    )
    return 2


if __name__ == "__main__":
    sys.exit(main())
