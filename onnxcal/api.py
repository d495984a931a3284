"""The operations of onnxcal as plain functions over paths.

Each function validates its inputs and output paths before doing any work,
calls the stage modules, writes its outputs atomically and returns a frozen
dataclass. The command line (``cli``) is a thin layer over these functions;
they are also the Python API (``import onnxcal``).
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from . import capture as _capture
from . import fit as _fit
from . import graph, verify as _verify
from ._files import check_output_path, sha256_file
from .capture import Capture, ProgressFn, RunOptions
from .data import DataSpec, Dataset, check_selection, load_dataset
from .errors import OnnxcalError
from .fit import FitOptions, FitSummary
from .graph import ModelInfo, Record
from .scaling import METHODS, MULTILABEL_MODES, Scaling
from .verify import VerifyResult


@dataclass(frozen=True)
class PatchResult:
    """A written patched model and its calibration record."""

    path: str
    record: Record


@dataclass(frozen=True)
class CalibrateResult:
    """Everything ``calibrate`` did: the fit, the patched model and its verification."""

    summary: FitSummary
    patch: PatchResult | None
    verification: VerifyResult


def inspect(model_path: str | os.PathLike) -> ModelInfo:
    """Describe a model: inputs, outputs, opset, class-score output, record."""
    model = graph.load_model(model_path)
    external = tuple(str(f) for f in graph.external_data_files(model_path))
    return graph.describe(model, model_path, sha256_file(model_path), external)


def _require_finite(logits: np.ndarray, source: str) -> None:
    rows = _capture.nonfinite_rows(logits)
    if rows.size:
        first = ", ".join(str(int(i)) for i in rows[:5])
        raise OnnxcalError(
            f"the logits in '{source}' contain NaN or Inf in {rows.size} of {len(logits)} "
            f"rows (first rows: {first})",
            "check the model and the inputs of those rows",
        )


DataSource = str | os.PathLike | DataSpec
"""A validation set: a path (``.npz``, ``.npy``, ``.csv`` or an image folder) or a DataSpec."""


def _data_spec(data: DataSource) -> DataSpec:
    spec = data if isinstance(data, DataSpec) else DataSpec(path=data)
    check_selection(spec.selection)  # before any work
    return spec


def _load_data(model, data: DataSource, require_labels: bool = True) -> Dataset:
    """Load the set for ``model``'s inputs (checked against them)."""
    init = {i.name for i in model.graph.initializer}
    specs = [graph.tensor_spec(vi) for vi in model.graph.input if vi.name not in init]
    return load_dataset(_data_spec(data), specs, require_labels=require_labels)


def _run_options(batch_size: int, threads: int, optimization: str, provider: str) -> RunOptions:
    return _capture.check_run_options(RunOptions(batch_size, threads, optimization, provider))


def capture(
    model_path: str | os.PathLike,
    data: DataSource,
    *,
    out: str | os.PathLike | None = None,
    output: str | None = None,
    batch_size: int = _capture.DEFAULT_BATCH,
    threads: int = 0,
    optimization: str = "all",
    provider: str = _capture.CPU,
    force: bool = False,
    progress: ProgressFn | None = None,
    activation: str | None = None,
) -> Capture:
    """Run the model over a labelled set; return (and write) the logits.

    Parameters
    ----------
    model_path : path
        The ONNX model.
    data : path or DataSpec
        The validation set: ``.npz`` with one array per model input and
        ``labels``, a CSV table, a folder of images, or a
        :class:`~onnxcal.data.DataSpec` for per-input ``.npy`` files, class
        names, preprocessing and ``--limit``/``--shuffle-seed``/``--shard``.
    out : path, optional
        Where to write the capture file; the logits are streamed into it
        and the returned capture's logits are a memory map of it.
    output : str, optional
        The class-score output (the likeliest float output by default).
    batch_size : int, default 64
    threads : int, default 0
        onnxruntime intra-op threads (0: its default).
    optimization : str, default "all"
        Graph optimisation level: disable, basic, extended or all.
    provider : str, default "CPUExecutionProvider"
    force : bool
        Replace an existing ``out``.
    progress : callable, optional
        ``progress(description, done, total)``.
    activation : {"softmax", "sigmoid"}, optional
        How raw logits become probabilities (default: sigmoid for one logit,
        softmax otherwise); decides the labels' form.
    """
    spec = _data_spec(data)
    if out is not None:
        check_output_path(out, [model_path, *spec.files()], force=force)
    run = _run_options(batch_size, threads, optimization, provider)
    model = graph.load_model(model_path)
    return _capture.capture(
        model,
        _load_data(model, spec),
        model_path=model_path,
        model_sha256=sha256_file(model_path),
        output=output,
        options=run,
        progress=progress,
        activation=activation,
        out=out,
    )


def check_fit_options(options: FitOptions) -> FitOptions:
    """Validate the fit options given by the user.

    Raises
    ------
    OnnxcalError
        An unknown method or multi-label mode, a negative or non-finite
        ``--l2``, a holdout fraction outside [0, 0.9], a negative number of
        bootstrap replicates or fewer than 2 bins.
    """
    if options.method not in METHODS:
        raise OnnxcalError(f"--method {options.method!r} is not one of: {', '.join(METHODS)}")
    if options.multilabel is not None and options.multilabel not in MULTILABEL_MODES:
        raise OnnxcalError(
            f"--multilabel {options.multilabel!r} is not one of: {', '.join(MULTILABEL_MODES)}"
        )
    if not np.isfinite(options.l2) or options.l2 < 0:
        raise OnnxcalError(f"--l2 {options.l2!r} is not a non-negative number", "use 0 for no penalty")
    if options.l2 > 0 and options.method == "temperature":
        raise OnnxcalError("--l2 applies to --method vector and platt, not temperature")
    if not 0 <= options.holdout <= 0.9:
        raise OnnxcalError(
            f"--holdout {options.holdout!r} is not a fraction between 0 and 0.9",
            "use e.g. 0.25, or 0 to score in-sample",
        )
    if options.bootstrap < 0:
        raise OnnxcalError(f"--bootstrap {options.bootstrap} is negative", "use 0 to skip the intervals")
    if options.n_bins < 2:
        raise OnnxcalError(f"--bins {options.n_bins} is fewer than 2 bins")
    return options


def fit(
    source: Capture | str | os.PathLike | Sequence[str | os.PathLike],
    *,
    out: str | os.PathLike | None = None,
    force: bool = False,
    options: FitOptions = FitOptions(),
) -> FitSummary:
    """Fit a calibration map to captured logits; return (and write) the summary.

    Parameters
    ----------
    source : Capture, path or sequence of paths
        A capture, or capture files (several are merged: same model, output
        and class list, no shared rows; see :func:`onnxcal.capture.merge_captures`).
    out : path, optional
        Where to write FIT.json.
    force : bool
        Replace an existing ``out``.
    options : FitOptions
        Method, holdout, bootstrap, ... (see :class:`onnxcal.fit.FitOptions`).
    """
    check_fit_options(options)
    inputs = [] if isinstance(source, Capture) else _capture_paths(source)
    if out is not None:
        check_output_path(out, inputs, force=force)
    cap = source if isinstance(source, Capture) else _capture.load_captures(inputs)
    _require_finite(cap.logits, cap.meta.data_source if isinstance(source, Capture) else ", ".join(map(str, inputs)))
    summary = _fit.summarize(cap.logits, cap.labels, cap.meta.to_dict(), options)
    if out is not None:
        _fit.save_fit(out, summary)
    return summary


def _capture_paths(source: str | os.PathLike | Sequence[str | os.PathLike]) -> list:
    return [source] if isinstance(source, (str, os.PathLike)) else list(source)


def _resolve_scaling(
    temperature: float | None, fit_source: FitSummary | str | os.PathLike | None
) -> tuple[float | Scaling, dict]:
    if (temperature is None) == (fit_source is None):
        raise OnnxcalError("give exactly one of --temperature and --fit")
    if temperature is not None:
        return graph.check_temperature(temperature), {"method": "temperature", "given": True}
    summary = fit_source if isinstance(fit_source, FitSummary) else _fit.load_fit(fit_source)
    return summary.scaling, summary.to_dict()


@dataclass(frozen=True)
class PatchOptions:
    """How to rewrite the graph (the patch options shared by patch and calibrate).

    Attributes
    ----------
    output : str, optional
        The class-score output (the likeliest float output by default).
    output_name : str, default "probabilities"
        Name of the added output when the model ends in raw logits.
    drop_logits : bool
        Remove the logits output in that case.
    activation : {"softmax", "sigmoid"}, optional
        What follows raw logits (default: sigmoid for one logit, else softmax).
    compute_dtype : {"float32", "float64"}, optional
        Run the Div and activation in this dtype (e.g. for float16 models).
    fold : bool
        Fold the scaling into the weight and bias of the final Gemm /
        MatMul(+Add) instead of adding nodes (every method).
    """

    output: str | None = None
    output_name: str = graph.DEFAULT_OUTPUT_NAME
    drop_logits: bool = False
    activation: str | None = None
    compute_dtype: str | None = None
    fold: bool = False

    def patch(self, model, calibration: float | Scaling, *, sha: str, path, fit: dict):
        return graph.patch(
            model,
            calibration,
            source_sha256=sha,
            source_path=Path(path).resolve(),
            output=self.output,
            new_output=self.output_name,
            drop_logits=self.drop_logits,
            fit=fit,
            activation=self.activation,
            compute_dtype=self.compute_dtype,
            fold=self.fold,
        )


def _check_outputs(out, inputs: list, model_path, force: bool) -> bool:
    """Check ``out`` (and, for a model with external data, ``out``.data); True if external."""
    check_output_path(out, inputs, force=force)
    sources = graph.external_data_files(model_path)
    if sources:
        check_output_path(
            graph.external_data_path(out), [*inputs, *sources], force=force, option="--out's data file"
        )
    return bool(sources)


def patch(
    model_path: str | os.PathLike,
    out: str | os.PathLike,
    *,
    temperature: float | None = None,
    fit: FitSummary | str | os.PathLike | None = None,
    output: str | None = None,
    output_name: str = graph.DEFAULT_OUTPUT_NAME,
    drop_logits: bool = False,
    activation: str | None = None,
    compute_dtype: str | None = None,
    fold: bool = False,
    force: bool = False,
) -> PatchResult:
    """Write a copy of the model that outputs calibrated probabilities.

    Parameters
    ----------
    model_path : path
        The ONNX model; never modified. A model already patched by onnxcal
        has its patch undone first (so patches never stack).
    out : path
        The patched model; must differ from ``model_path``. A model with
        external data is written with its weights in ``out``.data.
    temperature : float, optional
        T; or give ``fit``.
    fit : FitSummary or path, optional
        A fit (or FIT.json) whose parameters are baked in and recorded.
    output, output_name, drop_logits, activation, compute_dtype, fold
        See :class:`PatchOptions`.
    force : bool
        Replace an existing ``out``.
    """
    inputs = [model_path] + ([fit] if isinstance(fit, (str, os.PathLike)) else [])
    external = _check_outputs(out, inputs, model_path, force)
    calibration, fit_dict = _resolve_scaling(temperature, fit)
    patching = PatchOptions(output, output_name, drop_logits, activation, compute_dtype, fold)
    model = graph.load_model(model_path)
    patched = patching.patch(model, calibration, sha=sha256_file(model_path), path=model_path, fit=fit_dict)
    graph.save_model(patched, out, external=external)
    return PatchResult(path=str(out), record=graph.read_record(patched))


def _verify_models(
    patched,
    record: Record,
    dataset: Dataset,
    logits: np.ndarray,
    *,
    original: str,
    original_model,
    original_sha: str,
    run: RunOptions,
    progress: ProgressFn | None,
) -> VerifyResult:
    """Run the patched model and compare it with the original's logits."""
    site = graph.find_scores(patched, record.output)
    (probs,) = _capture.run_model(
        graph.expose(patched, [site.tensor]),
        dataset,
        [site.tensor],
        options=run,
        progress=progress,
        description="running patched model",
    )
    rows = _capture.as_rows(probs, site.class_axis)
    dtypes = (site.dtype, site.output_dtype or site.dtype)
    checks = _verify.compare(rows, logits, record.scaling, record.activation, dtypes)
    if record.folded:
        found = graph.folded_values(patched, record, original_model)
        record_check = _verify.folded_record_check(record.scaling, found)
    else:
        in_graph = graph.parameter_values(patched, record)
        record_check = _verify.record_check(record.parameters, in_graph, graph.temperature_dtype(patched, record))
    checks += (
        record_check,
        _verify.source_check(record.source_sha256, original_sha),
    )
    return VerifyResult(checks=checks, n=dataset.n, original=original)


def _source_site(base, record: Record):
    """The class-score site of the uncalibrated model the record was made from."""
    if record.source_output:
        return graph.find_scores(base, record.source_output)
    # records written before source_output existed
    return graph.find_scores(
        base, record.output if record.rewrite == "insert-before-activation" else record.scores
    )


def verify(
    patched_path: str | os.PathLike,
    data: DataSource,
    *,
    original: str | os.PathLike | None = None,
    batch_size: int = _capture.DEFAULT_BATCH,
    threads: int = 0,
    optimization: str = "all",
    provider: str = _capture.CPU,
    progress: ProgressFn | None = None,
) -> VerifyResult:
    """Check a patched model against its NumPy reference (e.g. softmax(original logits / T)).

    Parameters
    ----------
    patched_path : path
        A model written by :func:`patch`.
    data : path or DataSpec
        The inputs, in any form :func:`capture` takes (labels optional).
    original : path, optional
        The uncalibrated model; by default the path in the record, if it exists.
    batch_size, threads, optimization, provider
        As for :func:`capture`.
    """
    spec = _data_spec(data)
    run = _run_options(batch_size, threads, optimization, provider)
    patched = graph.load_model(patched_path)
    record = graph.read_record(patched)
    if record is None:
        raise OnnxcalError(
            f"'{patched_path}' has no onnxcal calibration record",
            "verify a model written by 'onnxcal patch' or 'onnxcal calibrate'",
        )
    if original is None:
        if not Path(record.source_path).is_file():
            raise OnnxcalError(
                f"the original model recorded in '{patched_path}' ({record.source_path}) "
                "is not there",
                "pass --original PATH",
            )
        original = record.source_path
    base = graph.load_model(original)
    dataset = _load_data(base, spec, require_labels=False)
    base_site = _source_site(base, record)
    logits = _capture.capture_scores(base, dataset, base_site, options=run, progress=progress)
    return _verify_models(
        patched,
        record,
        dataset,
        logits,
        original=str(original),
        original_model=base,
        original_sha=sha256_file(original),
        run=run,
        progress=progress,
    )


def calibrate(
    model_path: str | os.PathLike,
    data: DataSource,
    out: str | os.PathLike,
    *,
    output: str | None = None,
    output_name: str = graph.DEFAULT_OUTPUT_NAME,
    drop_logits: bool = False,
    activation: str | None = None,
    compute_dtype: str | None = None,
    fold: bool = False,
    batch_size: int = _capture.DEFAULT_BATCH,
    threads: int = 0,
    optimization: str = "all",
    provider: str = _capture.CPU,
    force: bool = False,
    progress: ProgressFn | None = None,
    options: FitOptions = FitOptions(),
) -> CalibrateResult:
    """Capture, fit, patch and verify in one go.

    The patched model is verified in memory against the captured logits
    before it is written; when a check fails nothing is written and
    ``result.patch`` is None. ``data`` and ``batch_size`` ... ``provider``: as
    for :func:`capture`; ``output`` ... ``fold``: see :class:`PatchOptions`;
    ``options`` are those of :func:`fit`.
    """
    check_fit_options(options)
    spec = _data_spec(data)
    external = _check_outputs(out, [model_path, *spec.files()], model_path, force)
    run = _run_options(batch_size, threads, optimization, provider)
    patching = PatchOptions(output, output_name, drop_logits, activation, compute_dtype, fold)
    model = graph.load_model(model_path)
    if (previous := graph.read_record(model)) is not None:
        raise OnnxcalError(
            f"'{model_path}' is already calibrated by onnxcal ({previous.method} scaling)",
            f"calibrate the original model ({previous.source_path}), or change T with 'onnxcal patch'",
        )
    sha = sha256_file(model_path)
    dataset = _load_data(model, spec)
    cap = _capture.capture(
        model,
        dataset,
        model_path=model_path,
        model_sha256=sha,
        output=output,
        options=run,
        progress=progress,
        activation=activation,
    )
    _require_finite(cap.logits, dataset.source)
    summary = _fit.summarize(cap.logits, cap.labels, cap.meta.to_dict(), options)
    patched = patching.patch(model, summary.scaling, sha=sha, path=model_path, fit=summary.to_dict())
    record = graph.read_record(patched)
    result = _verify_models(
        patched,
        record,
        dataset,
        cap.logits,
        original=str(model_path),
        original_model=model,
        original_sha=sha,
        run=run,
        progress=progress,
    )
    written = None
    if result.passed:
        graph.save_model(patched, out, external=external)
        written = PatchResult(path=str(out), record=record)
    return CalibrateResult(summary=summary, patch=written, verification=result)
