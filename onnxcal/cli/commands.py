"""The commands: each parses its options, calls ``onnxcal.api`` and prints.

They are plain functions here; :mod:`onnxcal.cli.app` registers them with
the typer app (the function's name is the command's, its docstring the help).
"""


from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Any

import typer

from .console import err, print_json, progress_bar, say, warn
from .defaults import DEFAULT_BINS, DEFAULT_LATENCY_RUNS, DEFAULT_OUTPUT_NAME, FORMATS, VERIFY_ROWS
from .options import (
    CHECKS_PANEL,
    MAX_MODEL_BYTES,
    OUTPUT_PANEL,
    AcceptConfidenceOpt,
    AcceptErrorOpt,
    AcceptMethodOpt,
    ActivationOpt,
    BinsOpt,
    BootstrapOpt,
    ComputeDtypeOpt,
    DecisionDataOpt,
    DropLogitsOpt,
    DropNonfiniteOpt,
    FoldOpt,
    ForceOpt,
    HoldoutOpt,
    JsonOpt,
    L2Opt,
    MaxModelBytesOpt,
    MethodOpt,
    ModelArg,
    MultilabelOpt,
    OutputHoldsOpt,
    OutputNameOpt,
    OutputOpt,
    QuietOpt,
    ScoreColumnsOpt,
    SeedOpt,
    SetCoverageOpt,
    SetPerClassOpt,
    SetScoreOpt,
    SmoothedTargetsOpt,
    VerifyAcceptConfidenceOpt,
    VerifyAcceptErrorOpt,
    VerifySetCoverageOpt,
    data_options,
    decision_options,
)
from .render import (
    CAUTION,
    describe_fit,
    how_patched,
    render_decisions,
    render_fit,
    render_info,
    render_report,
    render_verify,
    report_line,
    verdict_line,
)

if TYPE_CHECKING:
    from ..data import DataSpec

# The library (onnx, numpy, scipy) is imported inside each command, when it runs: --help and
# --version stay fast (tests/cli/test_cli_startup.py checks that importing this package does not
# import them).


def inspect(model: ModelArg, as_json: JsonOpt = False, max_model_bytes: MaxModelBytesOpt = MAX_MODEL_BYTES) -> None:
    """Show a model's inputs, outputs, opset, class-score output and calibration record."""
    from .. import api

    info = api.inspect(model, max_model_bytes=max_model_bytes)
    print_json(info.to_dict()) if as_json else render_info(info)


@data_options(shard=True)
def capture(
    model: ModelArg,
    out_path: Annotated[
        Path, typer.Option("--out", help="Capture file to write (.npz).", show_default=False, metavar="LOGITS.npz")
    ],
    output: OutputOpt = None,
    activation: ActivationOpt = None,
    output_holds: OutputHoldsOpt = None,
    score_columns: ScoreColumnsOpt = None,
    force: ForceOpt = False,
    quiet: QuietOpt = False,
    max_model_bytes: MaxModelBytesOpt = MAX_MODEL_BYTES,
    *,
    data: "DataSpec",
    runtime: dict[str, Any],
) -> None:
    """Run the model on CPU over a labelled set and save its logits and labels.

    The logits stream into the file batch by batch; it appears only when complete.
    """
    from .. import api

    with progress_bar(quiet) as progress:
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
    for note in cap.notes if not quiet else ():
        say(f"note: {note}")
    say(f"captured {cap.meta.n} x {cap.meta.num_classes} logits from '{cap.meta.scores}' -> {out_path}")


def fit(
    logits: Annotated[
        list[Path],
        typer.Argument(help="Capture file(s) from 'onnxcal capture'; several (e.g. shards) are merged.",
                       metavar="LOGITS.npz...", show_default=False),
    ],
    out_path: Annotated[Path | None, typer.Option("--out", help="Write the fit to this JSON file.",
                                                  metavar="FIT.json")] = None,
    method: MethodOpt = "temperature",
    multilabel: MultilabelOpt = None,
    l2: L2Opt = 0.0,
    smoothed_targets: SmoothedTargetsOpt = False,
    holdout: HoldoutOpt = 0.25,
    seed: SeedOpt = 0,
    bootstrap: BootstrapOpt = 200,
    bins: BinsOpt = 15,
    drop_nonfinite: DropNonfiniteOpt = False,
    force: ForceOpt = False,
    as_json: JsonOpt = False,
    quiet: QuietOpt = False,
) -> None:
    """Fit a calibration map to captured logits by minimising NLL; print before/after metrics.

    The headline figures are on a held-out part (--holdout), with bootstrap
    95% intervals (--bootstrap); the parameters written are refitted on all samples.
    """
    from .. import api
    from ..fit import FitOptions

    options = FitOptions(method, multilabel, l2, holdout, seed, bootstrap, bins, smoothed_targets)
    with progress_bar(quiet or as_json) as progress:
        summary = api.fit(logits, out=out_path, force=force, options=options, drop_nonfinite=drop_nonfinite,
                          progress=progress)
    if as_json:
        print_json(summary.to_dict())
        return
    if quiet:
        warn(summary.warnings)
        say(describe_fit(summary) + (f"; wrote {out_path}" if out_path is not None else ""))
        return
    render_fit(summary)
    if out_path is not None:
        say(f"wrote {out_path}")
    say(f"caution: {CAUTION}")


def patch(
    model: ModelArg,
    out_path: Annotated[Path, typer.Option("--out", help="Patched model to write.", show_default=False,
                                           metavar="OUT.onnx")],
    temperature: Annotated[float | None, typer.Option("--temperature", help="T to bake in.", metavar="T")] = None,
    fit_file: Annotated[Path | None, typer.Option("--fit", help="FIT.json from 'onnxcal fit --out'.",
                                                  metavar="FIT.json")] = None,
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
    accept_error: AcceptErrorOpt = None,
    accept_confidence: AcceptConfidenceOpt = 0.95,
    set_coverage: SetCoverageOpt = None,
    set_score: SetScoreOpt = "las",
    set_per_class: SetPerClassOpt = False,
    accept_method: AcceptMethodOpt = "ltt",
    decision_data: DecisionDataOpt = None,
    force: ForceOpt = False,
    max_model_bytes: MaxModelBytesOpt = MAX_MODEL_BYTES,
) -> None:
    """Rewrite the graph so the model outputs calibrated probabilities (e.g. softmax(logits / T)).

    With --accept-error or --set-coverage, also decision outputs beside them,
    their thresholds chosen on the labelled set --decision-data.
    """
    from .. import api

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
        decisions=decision_options(accept_error, accept_confidence, set_coverage, set_score, set_per_class,
                                   accept_method),
        decision_data=decision_data,
    )
    r = result.record
    what = f"T = {r.temperature:.4f}" if r.temperature is not None else f"{r.method} scaling"
    say(f"{what}: {how_patched(r)}; calibrated output '{r.output}' -> {result.path}")
    if result.decisions is not None:
        render_decisions(result.decisions.lines())


VERIFY_EPILOG = (
    "Exit status: 0 every check passed (skipped ones do not fail), 1 a check failed, "
    "2 bad input (nothing is written then)."
)
"""The end of ``onnxcal verify --help``."""


@data_options()
def verify(
    patched: Annotated[Path, typer.Argument(help="Patched model.", show_default=False, metavar="PATCHED")],
    original: Annotated[
        Path | None,
        typer.Option("--original", help="The uncalibrated model (default: the path in the record).",
                     metavar="MODEL"),
    ] = None,
    scores: Annotated[
        list[Path] | None,
        typer.Option(
            "--scores",
            help="Capture file of the original model on the same data, instead of running it "
            "(repeat for several files, in the data's order).",
            show_default=False,
            metavar="CAPTURE.npz",
        ),
    ] = None,
    max_ece: Annotated[
        float | None,
        typer.Option("--max-ece", help="Fail when the patched model's ECE on the labels is above this.",
                     metavar="X", rich_help_panel=CHECKS_PANEL)
    ] = None,
    max_nll: Annotated[
        float | None,
        typer.Option("--max-nll", help="Fail when its NLL on the labels is above this.", metavar="X",
                     rich_help_panel=CHECKS_PANEL)
    ] = None,
    min_accuracy: Annotated[
        float | None,
        typer.Option("--min-accuracy", help="Fail when its accuracy on the labels is below this.", metavar="X",
                     rich_help_panel=CHECKS_PANEL)
    ] = None,
    bins: BinsOpt = DEFAULT_BINS,
    latency: Annotated[
        bool,
        typer.Option("--latency",
                     help="Time the patched model against the original, alternating runs; report the ratio.",
                     rich_help_panel=CHECKS_PANEL),
    ] = False,
    max_latency_ratio: Annotated[
        float | None,
        typer.Option("--max-latency-ratio",
                     help="Fail when median patched / original latency is above this (implies --latency).",
                     metavar="X", rich_help_panel=CHECKS_PANEL),
    ] = None,
    latency_runs: Annotated[
        int, typer.Option("--latency-runs", help="Timed runs of each model for --latency (1 to 100000).", metavar="N",
                          rich_help_panel=CHECKS_PANEL)
    ] = DEFAULT_LATENCY_RUNS,
    junit: Annotated[
        Path | None, typer.Option("--junit", help="Also write the checks as JUnit XML to this file.",
                                  metavar="FILE.xml",
                     rich_help_panel=OUTPUT_PANEL)
    ] = None,
    drop_nonfinite: DropNonfiniteOpt = False,
    accept_error: VerifyAcceptErrorOpt = None,
    accept_confidence: VerifyAcceptConfidenceOpt = None,
    set_coverage: VerifySetCoverageOpt = None,
    force: ForceOpt = False,
    as_json: JsonOpt = False,
    quiet: QuietOpt = False,
    max_model_bytes: MaxModelBytesOpt = MAX_MODEL_BYTES,
    *,
    data: "DataSpec",
    runtime: dict[str, Any],
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
    from .. import api

    with progress_bar(quiet or as_json) as progress:
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
            accept_error=accept_error,
            accept_confidence=accept_confidence,
            set_coverage=set_coverage,
            **runtime,
        )
    if as_json:
        print_json(result.to_dict())
    elif quiet:
        for c in result.failed:
            say(f"failed: {c.name}: {c.detail}")
        say(verdict_line(result))
    else:
        render_verify(result)
        say(verdict_line(result))
        say(f"caution: {CAUTION}")
    if junit is not None and not as_json:
        say(f"wrote {junit}")
    if not result.passed:
        raise typer.Exit(1)


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
        Path, typer.Option("--out", help="Directory for the report (created if missing).", show_default=False,
                           metavar="DIR")
    ],
    temperature: Annotated[float | None, typer.Option("--temperature", help="T to report on.", metavar="T")] = None,
    fit_file: Annotated[Path | None, typer.Option("--fit", help="FIT.json from 'onnxcal fit --out'.",
                                                  metavar="FIT.json")] = None,
    model: Annotated[
        Path | None, typer.Option("--model", help="A patched model: its calibration record gives the parameters.",
                                  metavar="MODEL")
    ] = None,
    formats: Annotated[
        str, typer.Option("--format", help="Comma-separated outputs, any of these.", metavar=",".join(FORMATS),
                     rich_help_panel=OUTPUT_PANEL)
    ] = ",".join(FORMATS),
    class_names: Annotated[
        Path | None,
        typer.Option("--classes", help="Class names, one per line, in the model's class order "
                     "(default: those recorded in the capture).", metavar="FILE"),
    ] = None,
    bins: Annotated[
        int | None, typer.Option("--bins", help="Bins, 2 to 100000 (default: the fit's, else 15).", metavar="N")
    ] = None,
    drop_nonfinite: DropNonfiniteOpt = False,
    force: ForceOpt = False,
    quiet: QuietOpt = False,
    max_model_bytes: MaxModelBytesOpt = MAX_MODEL_BYTES,
) -> None:
    """Write report.html (self-contained), summary.md, report.json and the plots as PNG files.

    Give the parameters with one of --temperature, --fit or --model. On the
    capture a fit was made on, the figures are those of its held-out part.
    """
    from .. import api

    with progress_bar(quiet) as progress:
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
            progress=progress,
        )
    if not quiet:
        for note in result.content["notes"]:
            if note.startswith("dropped "):
                say(f"note: {note}")
        render_report(result)
    say(report_line(result))
    if not quiet:
        say(f"caution: {CAUTION}")


@data_options()
def calibrate(
    model: ModelArg,
    out_path: Annotated[Path, typer.Option("--out", help="Patched model to write.", show_default=False,
                                           metavar="OUT.onnx")],
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
    smoothed_targets: SmoothedTargetsOpt = False,
    holdout: HoldoutOpt = 0.25,
    seed: SeedOpt = 0,
    bootstrap: BootstrapOpt = 200,
    bins: BinsOpt = 15,
    report_dir: Annotated[
        Path | None,
        typer.Option("--report", help="Also write the report (as 'onnxcal report') into this directory.",
                     metavar="DIR", rich_help_panel=OUTPUT_PANEL),
    ] = None,
    drop_nonfinite: DropNonfiniteOpt = False,
    accept_error: AcceptErrorOpt = None,
    accept_confidence: AcceptConfidenceOpt = 0.95,
    set_coverage: SetCoverageOpt = None,
    set_score: SetScoreOpt = "las",
    set_per_class: SetPerClassOpt = False,
    accept_method: AcceptMethodOpt = "ltt",
    decision_data: DecisionDataOpt = None,
    force: ForceOpt = False,
    as_json: JsonOpt = False,
    quiet: QuietOpt = False,
    max_model_bytes: MaxModelBytesOpt = MAX_MODEL_BYTES,
    verify_rows: Annotated[
        int,
        typer.Option("--verify-rows", min=1, metavar="N", rich_help_panel=CHECKS_PANEL,
                     help="Check the patched model on at most N rows (N >= 1), stratified by label "
                     "(verify checks all)."),
    ] = VERIFY_ROWS,
    verify_all: Annotated[
        bool, typer.Option("--verify-all", help="Check the patched model on every row, not a sample.",
                           rich_help_panel=CHECKS_PANEL)
    ] = False,
    *,
    data: "DataSpec",
    runtime: dict[str, Any],
) -> None:
    """Capture, fit, patch and verify in one go; print the before/after table.

    The patched model is not written when verification fails (exit 1); the
    report, when asked for, is written either way. With --accept-error or
    --set-coverage, decision outputs are added beside the probabilities, their
    thresholds chosen on the held-out rows (the map baked in is then the one
    fitted on the other rows) or on --decision-data.
    """
    from .. import api
    from ..fit import FitOptions

    with progress_bar(quiet or as_json) as progress:
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
            options=FitOptions(method, multilabel, l2, holdout, seed, bootstrap, bins, smoothed_targets),
            report=report_dir,
            drop_nonfinite=drop_nonfinite,
            max_model_bytes=max_model_bytes,
            output_holds=output_holds,
            score_columns=score_columns,
            decisions=decision_options(accept_error, accept_confidence, set_coverage, set_score, set_per_class,
                                       accept_method),
            decision_data=decision_data,
            verify_rows=None if verify_all else verify_rows,
            **runtime,
        )
    if as_json:
        print_json(
            {
                "fit": result.summary.to_dict(),
                "decisions": result.decisions.section() if result.decisions else None,
                "verify": result.verification.to_dict(),
                "written": result.patch.path if result.patch else None,
                "report": list(result.report.files) if result.report else None,
            }
        )
    else:
        if quiet:
            warn(result.summary.warnings)
        else:
            render_fit(result.summary)
            if result.decisions is not None:
                render_decisions(result.decisions.lines())
            render_verify(result.verification)
        if not quiet or not result.verification.passed:
            say(verdict_line(result.verification))
        if result.report is not None:
            say(report_line(result.report))
        if result.patch is not None:
            r = result.patch.record
            say(f"{describe_fit(result.summary)}; wrote {result.patch.path} (calibrated output '{r.output}')")
        if not quiet:
            say(f"caution: {CAUTION}")
    if result.patch is None:
        err.print(f"error: verification failed; '{out_path}' was not written", soft_wrap=True)
        raise typer.Exit(1)
