"""The options of the commands, declared once: those several commands take
(``--output``, ``--force``, ``--method`` ...) as ``Annotated`` types, and the
data, image and runtime options of capture, calibrate and verify as the
decorator :func:`data_options`, which hands a command a
:class:`~onnxcal.data.DataSpec` and the ``api`` run keywords.
"""

from __future__ import annotations

import functools
import inspect as _inspect
import typing
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Annotated, Any

import typer
from typer.core import TyperCommand

from ..errors import OnnxcalError
from .defaults import (
    ACTIVATIONS,
    COMPUTE_DTYPES,
    CPU,
    DEFAULT_BATCH,
    HOLDS,
    IMAGE_OPTIONS,
    INTERPOLATIONS,
    MULTILABEL_MODES,
    OPTIMIZATION_LEVELS,
    choices,
)

if typing.TYPE_CHECKING:
    from ..data import DataSpec
    from ..decisions.plan import DecisionOptions

# --------------------------------------------------------------------------
# Help panels: the options of a command are listed under these headings, in
# this order (HelpCommand); an option with no panel goes under "Options".

MODEL_PANEL = "Model"
DATA_PANEL = "Data"
IMAGE_PANEL = "Image preprocessing"
RUNTIME_PANEL = "Runtime"
FIT_PANEL = "Fit"
CHECKS_PANEL = "Checks"
DECISIONS_PANEL = "Decisions"
OUTPUT_PANEL = "Output"
PANELS = (
    "Options", MODEL_PANEL, DATA_PANEL, IMAGE_PANEL, RUNTIME_PANEL, FIT_PANEL, CHECKS_PANEL, DECISIONS_PANEL,
    OUTPUT_PANEL,
)

# --------------------------------------------------------------------------
# Shared options

ModelArg = Annotated[Path, typer.Argument(help="The ONNX model file.", show_default=False, metavar="MODEL")]
OutputOpt = Annotated[
    str | None,
    typer.Option("--output", help="The class-score output (default: the likeliest float output).",
                 metavar="NAME", rich_help_panel=MODEL_PANEL),
]
ForceOpt = Annotated[bool, typer.Option("--force", help="Replace an existing output file.",
                                        rich_help_panel=OUTPUT_PANEL)]
JsonOpt = Annotated[bool, typer.Option("--json", help="Print JSON instead of a table.", rich_help_panel=OUTPUT_PANEL)]
QuietOpt = Annotated[
    bool,
    typer.Option("--quiet", "-q", help="Print only the result line and warnings: no progress, tables or notes.",
                 rich_help_panel=OUTPUT_PANEL),
]
OutputNameOpt = Annotated[
    str, typer.Option("--output-name", help="Name of the added output when the model ends in logits.",
                      metavar="NAME", rich_help_panel=OUTPUT_PANEL)
]
DropLogitsOpt = Annotated[
    bool, typer.Option("--drop-logits", help="Remove the logits output when a new output is added.",
                       rich_help_panel=OUTPUT_PANEL)
]
ActivationOpt = Annotated[
    str | None,
    typer.Option(
        "--activation",
        help="What turns raw logits into probabilities (default: sigmoid for one logit, softmax otherwise).",
        metavar=choices(ACTIVATIONS),
        rich_help_panel=MODEL_PANEL,
    ),
]
ComputeDtypeOpt = Annotated[
    str | None,
    typer.Option(
        "--compute-dtype",
        help="Run the Div and activation in this dtype (Casts "
        "around them; e.g. for float16 models). The output keeps its dtype.",
        metavar=choices(COMPUTE_DTYPES),
        rich_help_panel=OUTPUT_PANEL,
    ),
]
OutputHoldsOpt = Annotated[
    str | None,
    typer.Option(
        "--output-holds",
        help="What the output holds, when the graph cannot tell "
        "(checked against the data; by default the graph says, and an output of raw logits whose rows are "
        "probabilities is read as probabilities).",
        metavar=choices(HOLDS),
        rich_help_panel=MODEL_PANEL,
    ),
]
ScoreColumnsOpt = Annotated[
    str | None,
    typer.Option(
        "--score-columns",
        metavar="START:STOP",
        help="When the output concatenates class scores with other values (a detector's boxes and "
        "sigmoid scores), calibrate only the scores: positions START to STOP-1 along the Concat's axis, as "
        "the refusal lists them. The other positions stay byte-identical.",
        rich_help_panel=MODEL_PANEL,
    ),
]
FoldOpt = Annotated[
    bool,
    typer.Option(
        "--fold",
        help="Fold the scaling into the weight and bias of the Gemm / MatMul(+Add) computing the "
        "logits (1/T, or per class w and b for vector, Platt and per-label scaling; W A and W c + b for "
        "matrix scaling) instead of adding nodes.",
        rich_help_panel=OUTPUT_PANEL,
    ),
]
MethodOpt = Annotated[
    str,
    typer.Option(
        "--method",
        help="One of: temperature (softmax(z/T), or sigmoid(z/T) for one logit), vector "
        "(softmax(w*z+b), per class), platt (sigmoid(a*z+b), one logit), matrix (softmax(W z+b)), dirichlet "
        "(softmax(W log p+b)), beta (one logit), isotonic, histogram (binning), ensemble-temperature, ovr-platt "
        "(one-vs-rest, renormalised), or auto (every applicable method cross-fitted; the model left as it is "
        "when no map lowers the NLL, else the simplest the data cannot tell from the best). isotonic and "
        "histogram can change the ranking and the argmax.",
        metavar="METHOD",  # the eleven choices, as a|b|c, would not fit a narrow terminal's line: the help lists them
        rich_help_panel=FIT_PANEL,
    ),
]
MultilabelOpt = Annotated[
    str | None,
    typer.Option(
        "--multilabel",
        help="For N x K 0/1 labels: 'shared' (one T for all labels, the default) or 'per-label' (one T each).",
        metavar=choices(MULTILABEL_MODES),
        rich_help_panel=FIT_PANEL,
    ),
]
L2Opt = Annotated[
    float,
    typer.Option(
        "--l2",
        help="Penalty weight added to the NLL, 0 to 1e6: vector and platt l2*(sum (w-1)^2 + sum b^2); beta and "
        "ovr-platt a pull toward the identity; matrix and dirichlet the off-diagonal and intercept penalty "
        "(0: the default 100). The other methods have none.",
        metavar="X",
        rich_help_panel=FIT_PANEL,
    ),
]
SmoothedTargetsOpt = Annotated[
    bool,
    typer.Option(
        "--smoothed-targets",
        help="Fit to Platt's smoothed targets instead of the 0/1 labels: (N+1)/(N+2) for a row's class (N: the "
        "rows of that class), the rest shared by the others. The fit stays finite when every row is classified "
        "correctly (auto does this by itself wherever a fit's maximum-likelihood estimate does not exist). Multiclass "
        "and binary only.",
        rich_help_panel=FIT_PANEL,
    ),
]
HoldoutOpt = Annotated[
    float,
    typer.Option(
        "--holdout",
        help="Fraction held out (stratified) to score the fit on, 0 to 0.9; 0 scores in-sample.",
        metavar="FRACTION",
        rich_help_panel=FIT_PANEL,
    ),
]
SeedOpt = Annotated[int, typer.Option("--seed", help="Seed of the holdout split, the bootstrap and auto's folds "
                                      "(0 to 2^32-1).", metavar="SEED", rich_help_panel=FIT_PANEL)]
BootstrapOpt = Annotated[
    int, typer.Option("--bootstrap", help="Bootstrap replicates for 95% intervals (0 to 10000); 0 skips them.",
                      metavar="N", rich_help_panel=FIT_PANEL)
]
BinsOpt = Annotated[int, typer.Option("--bins", help="Bins of the ECEs (2 to 100000).", metavar="N",
                                      rich_help_panel=FIT_PANEL)]
MaxModelBytesOpt = Annotated[
    str,
    typer.Option(
        "--max-model-bytes",
        help="Refuse a model file larger than this, before reading it (with its external data when the "
        "command runs the model): bytes, or a size such as 512MiB or 8GiB.",
        metavar="SIZE",
        rich_help_panel=MODEL_PANEL,
    ),
]
MAX_MODEL_BYTES = "8GiB"
AcceptErrorOpt = Annotated[
    float | None,
    typer.Option(
        "--accept-error",
        metavar="EPS",
        help="Add a boolean output 'accept': a row is accepted when its confidence clears a threshold chosen so "
        "that the error among accepted rows is at most EPS with probability --accept-confidence "
        "(docs/decisions.md).",
        rich_help_panel=DECISIONS_PANEL,
    ),
]
AcceptConfidenceOpt = Annotated[
    float,
    typer.Option("--accept-confidence", metavar="1-DELTA",
                 help="The probability that the chosen acceptance threshold meets --accept-error.",
                 rich_help_panel=DECISIONS_PANEL),
]
SetCoverageOpt = Annotated[
    float | None,
    typer.Option(
        "--set-coverage",
        metavar="1-ALPHA",
        help="Add outputs 'class_set' (N x K booleans) and 'class_set_size': conformal prediction sets that "
        "hold the true class with probability at least 1-ALPHA (marginal, for data like the validation set).",
        rich_help_panel=DECISIONS_PANEL,
    ),
]
SetScoreOpt = Annotated[
    str,
    typer.Option("--set-score", help="las (least ambiguous sets) or aps (adaptive prediction sets).",
                 metavar="las|aps", rich_help_panel=DECISIONS_PANEL),
]
SetPerClassOpt = Annotated[
    bool, typer.Option("--set-per-class", help="One set threshold per class (per-class coverage).",
                       rich_help_panel=DECISIONS_PANEL)
]
AcceptMethodOpt = Annotated[
    str,
    typer.Option("--accept-method",
                 help="ltt (Learn then Test) or sgr (selection with guaranteed risk): how the threshold is chosen.",
                 metavar="ltt|sgr", rich_help_panel=DECISIONS_PANEL),
]
DecisionDataOpt = Annotated[
    Path | None,
    typer.Option(
        "--decision-data",
        help="Choose the decision thresholds on this labelled set (same form and options as --data) instead of "
        "the held-out rows; needed by patch.",
        metavar="PATH",
        rich_help_panel=DECISIONS_PANEL,
    ),
]
VerifyAcceptErrorOpt = Annotated[
    float | None,
    typer.Option("--accept-error", metavar="EPS",
                 help="Gate the error among accepted rows against EPS (default: the record's target).",
                 rich_help_panel=CHECKS_PANEL),
]
VerifyAcceptConfidenceOpt = Annotated[
    float | None,
    typer.Option("--accept-confidence", metavar="1-DELTA",
                 help="Level of the gates' intervals (default: the record's --accept-confidence).",
                 rich_help_panel=CHECKS_PANEL),
]
VerifySetCoverageOpt = Annotated[
    float | None,
    typer.Option("--set-coverage", metavar="1-ALPHA",
                 help="Gate the sets' coverage against 1-ALPHA (default: the record's target).",
                 rich_help_panel=CHECKS_PANEL),
]


def decision_options(
    accept_error: float | None, accept_confidence: float, set_coverage: float | None, set_score: str,
    set_per_class: bool, accept_method: str,
) -> DecisionOptions:
    """The decision options of calibrate and patch, as the api takes them."""
    from ..decisions.plan import DecisionOptions

    return DecisionOptions(accept_error, accept_confidence, set_coverage, set_score, set_per_class, accept_method)


DropNonfiniteOpt = Annotated[
    bool,
    typer.Option(
        "--drop-nonfinite",
        help="Leave out the samples whose logits are NaN or Inf (and say how many) instead of refusing them.",
        rich_help_panel=DATA_PANEL,
    ),
]


# --------------------------------------------------------------------------
# Data, image and runtime options, shared by capture, calibrate and verify


def _option(
    name: str, kind: Any, default: Any, flag: str, help: str, panel: str, **extra: Any
) -> _inspect.Parameter:
    extra.setdefault("show_default", default is not None)
    option = typer.Option(flag, help=help, rich_help_panel=panel, **extra)
    return _inspect.Parameter(
        name, _inspect.Parameter.KEYWORD_ONLY, default=default, annotation=Annotated[kind, option]
    )


_D, _I, _R = DATA_PANEL, IMAGE_PANEL, RUNTIME_PANEL
_SHARED_OPTIONS = (
    _option("data", Path | None, None, "--data",
            "Validation set: .npz (one array per model input, plus 'labels'), .npy (a one-input "
            "model), .csv table, or a folder of images (one subfolder per class).", _D, metavar="PATH"),
    _option("inputs", list[str] | None, None, "--input",
            "One .npy per model input (memory-mapped); repeat for each input.", _D, metavar="NAME=FILE.npy"),
    _option("labels", Path | None, None, "--labels",
            "Labels .npy (with --input), or a CSV mapping image files to classes "
            "(columns 'file' and the label column).", _D, metavar="FILE"),
    _option("label_column", str | None, None, "--label-column", "Label column of a CSV (default 'label').",
            _D, metavar="NAME"),
    _option("feature_columns", str | None, None, "--feature-columns",
            "CSV columns fed to the model, in order (default: all but the label).", _D, metavar="A,B,..."),
    _option("classes", Path | None, None, "--classes",
            "Class names, one per line, in the model's class order; string labels are mapped through it.", _D,
            metavar="FILE"),
    _option("limit", int | None, None, "--limit", "Use at most N samples (N >= 1).", _D, metavar="N"),
    _option("shuffle_seed", int | None, None, "--shuffle-seed",
            "Take --limit/--shard samples from a random permutation with this seed (0 to 2^32-1).", _D,
            metavar="SEED"),
    _option("shard", str | None, None, "--shard",
            "Capture the I-th of N deterministic slices (1 <= I <= N); 'onnxcal fit' merges the files.", _D,
            metavar="I/N"),
    _option("preprocess", Path | None, None, "--preprocess",
            "The image options below as a TOML or JSON file (options given here win).", _I, metavar="FILE"),
    _option("resize", int | None, None, "--resize", "Resize the shorter side to N pixels (1 to 65535).", _I,
            metavar="N"),
    _option("crop", str | None, None, "--crop", "Centre crop (sides of 1 to 65535 pixels).", _I,
            metavar="N|HxW"),
    _option("scale", bool | None, None, "--scale/--no-scale",
            "Divide pixels by 255 (default: yes for float inputs).", _I, show_default=False),
    _option("mean", str | None, None, "--mean", "Per-channel mean, subtracted after scaling.", _I,
            metavar="M[,M,M]"),
    _option("std", str | None, None, "--std", "Per-channel std, divided by after the mean.", _I,
            metavar="S[,S,S]"),
    _option("channel_order", str | None, None, "--channel-order", "Channel order (default RGB).", _I,
            metavar="RGB|BGR"),
    _option("layout", str | None, None, "--layout", "Layout of the input (default: from the model).", _I,
            metavar="NCHW|NHWC"),
    _option("dtype", str | None, None, "--dtype", "Input dtype (default: the model's).", _I, metavar="DTYPE"),
    _option("interpolation", str | None, None, "--interpolation", "Resize filter (default bilinear).", _I,
            metavar=choices(INTERPOLATIONS)),
    _option("batch_size", int | None, None, "--batch-size",
            f"Samples per onnxruntime call, 1 to 16777216 (default: {DEFAULT_BATCH}, doubled while onnxcal's own "
            "work per call costs more than 5 % of the call).", _R, min=1, metavar="N"),
    _option("threads", int, 0, "--threads",
            "onnxruntime intra-op threads (0: its default; at most 4 per core, or 64).", _R, min=0, metavar="N"),
    _option("optimization", str, "all", "--optimization", "Graph optimisation level of onnxruntime.", _R,
            metavar=choices(OPTIMIZATION_LEVELS)),
    _option("provider", str, CPU, "--provider", "onnxruntime execution provider.", _R, metavar="NAME"),
)
"""Data, image and runtime options shared by capture, calibrate and verify."""

# -- Inputs that are not samples (issue 12): --constant, --batch-axis ---------------------------

_FEEDING_OPTIONS = (
    _option("constants", list[str] | None, None, "--constant",
            "A model input given once and fed with every batch: a number, an .npy array, or 'zeros' "
            "(shaped like the declared input, its batch dim set per batch); e.g. a sample rate or a "
            "recurrent state. Repeat for each input.", _D, metavar="NAME=VALUE|FILE.npy|zeros"),
    _option("batch_axes", list[str] | None, None, "--batch-axis",
            "The axis of an input that holds the samples, when not 0 (e.g. h0=1 for a state shaped "
            "1 x N x H); its array in the data has the samples on that axis. Repeat for each input.",
            _D, metavar="NAME=AXIS"),
)


def _pairs(values: Sequence[str] | None, option: str, example: str) -> dict[str, str]:
    """``NAME=VALUE`` items of a repeated option, each name once."""
    pairs: dict[str, str] = {}
    for item in values or ():
        name, sep, value = item.partition("=")
        if not sep or not name.strip() or not value.strip():
            raise OnnxcalError(f"{option} '{item}' is not of the form NAME=VALUE", f"e.g. {option} {example}")
        if name.strip() in pairs:
            raise OnnxcalError(f"{option} gives model input '{name.strip()}' twice", "give each input once")
        pairs[name.strip()] = value.strip()
    return pairs


def _batch_axes(values: Sequence[str] | None) -> dict[str, int]:
    axes = {}
    for name, text in _pairs(values, "--batch-axis", "h0=1").items():
        if not text.isdigit():
            raise OnnxcalError(f"--batch-axis {name}={text}: the axis must be a whole number from 0",
                               f"e.g. --batch-axis {name}=1")
        axes[name] = int(text)
    return axes

# -- end of the options of inputs that are not samples -------------------------------------------

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


def _spec(values: dict[str, Any]) -> DataSpec:
    from ..data import DataSpec, Selection, parse_shard

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
        constants=_pairs(values["constants"], "--constant", "sr=16000"),  # _FEEDING_OPTIONS
        batch_axes=_batch_axes(values["batch_axes"]),
    )


def data_options(*, shard: bool = False) -> Callable[..., Any]:
    """Give a command the shared data/image/runtime options.

    The command declares keyword parameters ``data`` (it receives a
    :class:`~onnxcal.data.DataSpec`) and ``runtime`` (a dict of the
    ``api`` run keywords); the options themselves are :data:`_SHARED_OPTIONS`,
    so every command documents them alike.
    """
    shared = [p for p in (*_SHARED_OPTIONS, *_FEEDING_OPTIONS) if shard or p.name != "shard"]

    def decorate(fn: Callable[..., Any]) -> Callable[..., Any]:
        # DataSpec is imported only when a command runs (a fast --help); the annotation of
        # ``data`` is not read, since typer gets the signature below.
        own_hints = typing.get_type_hints(fn, localns={"DataSpec": object}, include_extras=True)
        own = [
            p.replace(kind=_inspect.Parameter.KEYWORD_ONLY, annotation=own_hints[p.name])
            for p in _inspect.signature(fn).parameters.values()
            if p.name not in ("data", "runtime")
        ]
        names = [p.name for p in shared]

        @functools.wraps(fn)
        def command(**kwargs: Any) -> Any:
            values = {name: kwargs.pop(name) for name in names}
            runtime = {k: values[k] for k in _RUNTIME_KEYS}
            return fn(**kwargs, data=_spec(values), runtime=runtime)

        params = own + shared
        command.__signature__ = _inspect.Signature(params)  # type: ignore[attr-defined]  # read by typer
        command.__annotations__ = {p.name: p.annotation for p in params}
        del command.__wrapped__  # typer must read the new signature, not fn's
        return command

    return decorate


class HelpCommand(TyperCommand):
    """A command whose ``--help`` lists its options under the headings of :data:`PANELS`.

    The options carry their heading as typer's ``rich_help_panel``; this
    class prints them as plain sections (no rich boxes), so the help reads
    the same in a terminal, a pipe and a CI log. Values are shown by their
    metavar (``N``, ``PATH``, ``a|b|c``), never by a Python type such as
    ``<int range>`` or ``<list[Path]>``, and arguments by their name only.
    """

    def _metavars(self, ctx: Any) -> list[Any]:
        params = self.get_params(ctx)
        for param in params:  # an option or argument declared without one gets its name in capitals
            if param.metavar is None and not getattr(param, "is_flag", False) and param.name:
                param.metavar = param.name.upper()
        return params

    def collect_usage_pieces(self, ctx: Any) -> list[str]:
        pieces = [self.options_metavar] if self.options_metavar else []
        for param in self._metavars(ctx):
            if param.param_type_name == "argument":
                name = param.metavar + ("..." if param.nargs != 1 and not param.metavar.endswith("...") else "")
                pieces.append(name if param.required else f"[{name}]")
        return pieces

    def format_options(self, ctx: Any, formatter: Any) -> None:  # click's Context and HelpFormatter
        arguments: list[tuple[str, str]] = []
        panels: dict[str, list[tuple[str, str]]] = {}
        for param in self._metavars(ctx):
            if param.param_type_name == "argument":
                arguments.append((param.metavar, param.help or ""))
                continue
            record = _help_record(param, ctx)
            if record is not None:
                panels.setdefault(getattr(param, "rich_help_panel", None) or PANELS[0], []).append(record)
        if arguments:
            with formatter.section("Arguments"):
                formatter.write_dl(arguments)
        for name in sorted(panels, key=lambda p: PANELS.index(p) if p in PANELS else len(PANELS)):
            with formatter.section(name if name == PANELS[0] else f"{name} options"):
                formatter.write_dl(panels[name])


def _help_record(param: Any, ctx: Any) -> tuple[str, str] | None:
    """The option's help line without the range hint typer adds for ``min=``/``max=`` ("x>=1"):
    the help text says the range in words, and the bounds still apply when the value is parsed."""
    bounds = getattr(param, "min", None), getattr(param, "max", None)
    if bounds == (None, None):
        record: tuple[str, str] | None = param.get_help_record(ctx)
        return record
    param.min = param.max = None
    try:
        record = param.get_help_record(ctx)
    finally:
        param.min, param.max = bounds
    return record
