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
from .fit import FitSummary
from .graph import ModelInfo, Record
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
    return graph.describe(model, model_path, sha256_file(model_path))


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


def _run_options(
    batch_size: int, threads: int, optimization: str, provider: str
) -> RunOptions:
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
    """
    spec = _data_spec(data)
    if out is not None:
        check_output_path(out, [model_path, *spec.files()], force=force)
    options = _run_options(batch_size, threads, optimization, provider)
    model = graph.load_model(model_path)
    return _capture.capture(
        model,
        _load_data(model, spec),
        model_path=model_path,
        model_sha256=sha256_file(model_path),
        output=output,
        options=options,
        progress=progress,
        out=out,
    )


def fit(
    source: Capture | str | os.PathLike | Sequence[str | os.PathLike],
    *,
    out: str | os.PathLike | None = None,
    force: bool = False,
) -> FitSummary:
    """Fit a temperature to captured logits; return (and write) the summary.

    Parameters
    ----------
    source : Capture, path or sequence of paths
        A capture, or capture files (several are merged: same model, output
        and class list, no shared rows; see :func:`onnxcal.capture.merge_captures`).
    out : path, optional
        Where to write FIT.json.
    force : bool
        Replace an existing ``out``.
    """
    inputs = [] if isinstance(source, Capture) else _capture_paths(source)
    if out is not None:
        check_output_path(out, inputs, force=force)
    cap = source if isinstance(source, Capture) else _capture.load_captures(inputs)
    _require_finite(cap.logits, cap.meta.data_source if isinstance(source, Capture) else ", ".join(map(str, inputs)))
    summary = _fit.summarize(cap.logits, cap.labels, cap.meta.to_dict())
    if out is not None:
        _fit.save_fit(out, summary)
    return summary


def _capture_paths(source: str | os.PathLike | Sequence[str | os.PathLike]) -> list:
    return [source] if isinstance(source, (str, os.PathLike)) else list(source)


def _resolve_temperature(
    temperature: float | None, fit_source: FitSummary | str | os.PathLike | None
) -> tuple[float, dict]:
    if (temperature is None) == (fit_source is None):
        raise OnnxcalError("give exactly one of --temperature and --fit")
    if temperature is not None:
        return graph.check_temperature(temperature), {"method": "temperature", "given": True}
    summary = fit_source if isinstance(fit_source, FitSummary) else _fit.load_fit(fit_source)
    return summary.temperature, summary.to_dict()


def patch(
    model_path: str | os.PathLike,
    out: str | os.PathLike,
    *,
    temperature: float | None = None,
    fit: FitSummary | str | os.PathLike | None = None,
    output: str | None = None,
    output_name: str = graph.DEFAULT_OUTPUT_NAME,
    drop_logits: bool = False,
    force: bool = False,
) -> PatchResult:
    """Write a copy of the model that outputs calibrated probabilities.

    Parameters
    ----------
    model_path : path
        The ONNX model; never modified.
    out : path
        The patched model; must differ from ``model_path``.
    temperature : float, optional
        T; or give ``fit``.
    fit : FitSummary or path, optional
        A fit (or FIT.json) whose temperature is used and recorded.
    output : str, optional
        The class-score output.
    output_name : str, default "probabilities"
        Name of the added output when the model ends in raw logits.
    drop_logits : bool
        Remove the logits output in that case.
    force : bool
        Replace an existing ``out``.
    """
    inputs = [model_path] + ([fit] if isinstance(fit, (str, os.PathLike)) else [])
    check_output_path(out, inputs, force=force)
    t, fit_dict = _resolve_temperature(temperature, fit)
    model = graph.load_model(model_path)
    patched = graph.patch(
        model,
        t,
        source_sha256=sha256_file(model_path),
        source_path=Path(model_path).resolve(),
        output=output,
        new_output=output_name,
        drop_logits=drop_logits,
        fit=fit_dict,
    )
    graph.save_model(patched, out)
    return PatchResult(path=str(out), record=graph.read_record(patched))


def _verify_models(
    patched,
    record: Record,
    dataset: Dataset,
    logits: np.ndarray,
    *,
    original: str,
    original_sha: str,
    options: RunOptions,
    progress: ProgressFn | None,
) -> VerifyResult:
    """Run the patched model and compare it with the original's logits."""
    site = graph.find_scores(patched, record.output)
    (probs,) = _capture.run_model(
        patched,
        dataset,
        [record.output],
        options=options,
        progress=progress,
        description="running patched model",
    )
    rows = _capture.as_rows(probs, site.class_axis)
    checks = _verify.compare(rows, logits, record.temperature, record.activation, site.dtype)
    checks += (
        _verify.record_check(record.temperature, graph.temperature_value(patched, record)),
        _verify.source_check(record.source_sha256, original_sha),
    )
    return VerifyResult(checks=checks, n=dataset.n, original=original)


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
    """Check a patched model against softmax(original logits / T) in NumPy.

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
    options = _run_options(batch_size, threads, optimization, provider)
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
    base_site = graph.find_scores(
        base, record.output if record.rewrite == "insert-before-activation" else record.scores
    )
    logits = _capture.capture_scores(base, dataset, base_site, options=options, progress=progress)
    return _verify_models(
        patched,
        record,
        dataset,
        logits,
        original=str(original),
        original_sha=sha256_file(original),
        options=options,
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
    batch_size: int = _capture.DEFAULT_BATCH,
    threads: int = 0,
    optimization: str = "all",
    provider: str = _capture.CPU,
    force: bool = False,
    progress: ProgressFn | None = None,
) -> CalibrateResult:
    """Capture, fit, patch and verify in one go.

    ``data`` and the run options are as for :func:`capture`. The patched
    model is verified in memory against the captured logits before it is
    written; when a check fails nothing is written and ``result.patch`` is None.
    """
    spec = _data_spec(data)
    check_output_path(out, [model_path, *spec.files()], force=force)
    options = _run_options(batch_size, threads, optimization, provider)
    model = graph.load_model(model_path)
    sha = sha256_file(model_path)
    dataset = _load_data(model, spec)
    cap = _capture.capture(
        model,
        dataset,
        model_path=model_path,
        model_sha256=sha,
        output=output,
        options=options,
        progress=progress,
    )
    _require_finite(cap.logits, dataset.source)
    summary = _fit.summarize(cap.logits, cap.labels, cap.meta.to_dict())
    patched = graph.patch(
        model,
        summary.temperature,
        source_sha256=sha,
        source_path=Path(model_path).resolve(),
        output=output,
        new_output=output_name,
        drop_logits=drop_logits,
        fit=summary.to_dict(),
    )
    record = graph.read_record(patched)
    result = _verify_models(
        patched,
        record,
        dataset,
        cap.logits,
        original=str(model_path),
        original_sha=sha,
        options=options,
        progress=progress,
    )
    written = None
    if result.passed:
        graph.save_model(patched, out)
        written = PatchResult(path=str(out), record=record)
    return CalibrateResult(summary=summary, patch=written, verification=result)
