"""The operations of onnxcal as plain functions over paths.

Each function validates its inputs and output paths before doing any work,
calls the stage modules, writes its outputs atomically and returns a frozen
dataclass. The command line (``cli``) is a thin layer over these functions;
they are also the Python API (``import onnxcal``).
"""

from __future__ import annotations

import os
import time
import warnings
from collections.abc import Sequence
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np
import onnx

from . import capture as _capture
from . import fit as _fit
from . import graph
from . import guard as _guard
from . import reading as _reading
from . import report as _report
from . import verify as _verify
from ._files import (
    atomic_write_bytes,
    atomic_write_files,
    check_not_input,
    check_output_path,
    check_writable,
    one_command,
    require_file,
    sha256_file,
)
from ._limits import DEFAULT_MAX_MODEL_BYTES, MAX_BINS, check_bins_memory, check_memory, check_range, parse_size
from ._numeric import check_in_dtype, max_abs
from .capture import Capture, ProgressFn, RunOptions
from .data import Dataset, DataSpec, check_selection, load_dataset
from .errors import OnnxcalError, OnnxcalWarning
from .fit import FitOptions, FitSummary
from .graph import ModelInfo, Record
from .metrics import DEFAULT_BINS, evaluate, scores_from_probabilities
from .report import ReportResult
from .scaling import METHODS, MULTILABEL_MODES, PENALISED_METHODS, Scaling, check_scaling, kind_of
from .verify import Check, VerifyResult

DEFAULT_LATENCY_RUNS = 100
MAX_LATENCY_RUNS = 100_000


@dataclass(frozen=True)
class PatchResult:
    """A written patched model and its calibration record."""

    path: str
    record: Record


@dataclass(frozen=True)
class CalibrateResult:
    """Everything ``calibrate`` did: the fit, the patched model, its verification and report."""

    summary: FitSummary
    patch: PatchResult | None
    verification: VerifyResult
    report: ReportResult | None = None


def _max_bytes(max_model_bytes: int | str) -> int:
    return parse_size(max_model_bytes, "--max-model-bytes")


def inspect(model_path: str | os.PathLike, *, max_model_bytes: int | str = DEFAULT_MAX_MODEL_BYTES) -> ModelInfo:
    """Describe a model: inputs, outputs, opset, class-score output, record.

    ``max_model_bytes`` (an int or a size such as ``"8GiB"``): larger model
    files, with their external data, are refused before they are read.
    """
    limit = _max_bytes(max_model_bytes)
    model = graph.load_model(model_path, max_bytes=limit, count_external=False)
    external = tuple(str(f) for f in graph.external_data_files(model_path, max_bytes=limit))
    return graph.describe(model, model_path, graph.model_sha256(model_path), external)


def _finite(cap: Capture, source: str, drop: bool) -> tuple[Capture, str | None]:
    """``cap`` when its logits are finite; else refused, or (``drop``) without those samples and a note."""
    bad = _capture.nonfinite_logits(cap)
    if not bad.count:
        return cap, None
    what = f"the logits in '{source}' contain NaN or Inf in {bad.describe(len(cap.logits))}"
    if bad.count == len(cap.logits):
        raise OnnxcalError(f"{what}: every row, so nothing is left to work on", "check the model and its inputs")
    if not drop:
        raise OnnxcalError(what, "check the model and the inputs of those rows, or pass --drop-nonfinite to leave them out")
    rows = len(cap.logits) - bad.count
    check_memory(rows * cap.logits.shape[1] * 4, f"a copy of the logits of the {rows} rows kept", "use --limit")
    kept = _capture.without_nonfinite(cap)
    return kept, f"dropped {len(cap.logits) - len(kept.logits)} rows: {what}"


def _warn_nonfinite_inputs(cap: Capture, source: str) -> None:
    for name, bad in cap.nonfinite_inputs.items():
        warnings.warn(
            OnnxcalWarning(f"input '{name}' of '{source}' holds NaN or Inf in {bad.describe(cap.meta.n)}"),
            stacklevel=3,
        )


def _model_files(model_path, limit: int) -> list:
    """A model file and its external data files: inputs that no output may be."""
    return [model_path, *graph.external_data_files(model_path, max_bytes=limit)]


DataSource = str | os.PathLike | DataSpec
"""A validation set: a path (``.npz``, ``.npy``, ``.csv`` or an image folder) or a DataSpec."""


def _data_spec(data: DataSource) -> DataSpec:
    spec = data if isinstance(data, DataSpec) else DataSpec(path=data)
    check_selection(spec.selection)  # before any work
    return spec


def _load_data(model, data: DataSource, require_labels: bool = True, batch_size: int | None = None) -> Dataset:
    """Load the set for ``model``'s inputs (checked against them).

    A model whose declared input shapes need more memory per batch than is
    available is refused first, before any data file is opened.
    """
    _capture.check_input_memory(model, batch_size or _capture.DEFAULT_BATCH)
    init = {i.name for i in model.graph.initializer}
    specs = [graph.tensor_spec(vi) for vi in model.graph.input if vi.name not in init]
    return load_dataset(_data_spec(data), specs, require_labels=require_labels)


def _run_options(batch_size: int | None, threads: int, optimization: str, provider: str) -> RunOptions:
    return _capture.check_run_options(RunOptions(batch_size, threads, optimization, provider))


@one_command
def capture(
    model_path: str | os.PathLike,
    data: DataSource,
    *,
    out: str | os.PathLike | None = None,
    output: str | None = None,
    batch_size: int | None = None,
    threads: int = 0,
    optimization: str = "all",
    provider: str = _capture.CPU,
    force: bool = False,
    progress: ProgressFn | None = None,
    activation: str | None = None,
    max_model_bytes: int | str = DEFAULT_MAX_MODEL_BYTES,
    output_holds: str | None = None,
    score_columns: str | None = None,
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
    batch_size : int, optional
        Samples per onnxruntime call; by default 64, doubled while onnxcal's
        own work per call costs more than 5 % of the call (a very small model).
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
    max_model_bytes : int or str, default 8 GiB
        Larger model files (with external data) are refused unread.
    output_holds : {"logits", "probabilities", "log-probabilities"}, optional
        What the output holds; by default the graph says, and the data are
        checked (an output of raw logits whose rows are probabilities is
        read as probabilities, with a note in ``Capture.notes``).
    score_columns : str, optional
        ``"START:STOP"``: the output concatenates class scores with other
        values (a detector's boxes and scores); capture only the scores at
        positions START..STOP-1 along the Concat's axis.

    Rows of the inputs or logits holding NaN or Inf are reported as
    :class:`~onnxcal.errors.OnnxcalWarning` (count and first rows); the
    capture keeps them, and ``fit`` refuses them unless told to drop them.
    """
    spec = _data_spec(data)
    limit = _max_bytes(max_model_bytes)
    _check_columns(score_columns)
    if out is not None:
        check_output_path(out, [*_model_files(model_path, limit), *spec.files()], force=force)
    run = _run_options(batch_size, threads, optimization, provider)
    model = graph.load_model(model_path, max_bytes=limit)
    dataset = _load_data(model, spec, batch_size=run.batch_size)
    cap = _read_and_capture(
        model, dataset, model_path, graph.model_sha256(model_path), output, output_holds, activation, run, progress,
        out, columns=score_columns,
    )
    _warn_nonfinite_inputs(cap, cap.meta.data_source)
    if (bad := _capture.nonfinite_logits(cap)).count:
        warnings.warn(
            OnnxcalWarning(
                f"the logits of {bad.describe(len(cap.logits))} are NaN or Inf; 'onnxcal fit' refuses them "
                "unless --drop-nonfinite"
            ),
            stacklevel=2,
        )
    return cap


def _check_columns(score_columns: str | None) -> None:
    if score_columns is not None:
        graph.parse_columns(score_columns)


def _read_and_capture(
    model, dataset: Dataset, model_path, sha: str, output, holds, activation, run: RunOptions, progress, out=None,
    columns: str | None = None,
) -> Capture:
    """Read the model (checked on the first rows), check the labels against it, capture its logits."""
    if dataset.labels is None:
        raise OnnxcalError(f"'{dataset.source}' has no labels", "add a 'labels' array")
    _capture.check_input_memory(model, run.batch_size or _capture.DEFAULT_BATCH, dataset)
    read = _reading.read_model(model, dataset, output=output, holds=holds, activation=activation, run=run,
                               score_columns=columns)
    site = read.site
    kind = graph.fit_kind(site, activation)
    if kind == "softmax":
        _reading.check_label_coverage(dataset.labels, read.k, site, dataset.class_names, dataset.source)
    cap = _capture.capture(
        model, dataset, model_path=Path(model_path).name, model_sha256=sha, options=run, progress=progress,
        activation=activation, out=out, site=site, check=_reading.capture_check(site, kind),
    )
    _reading.warn_saturated(site, cap.stats)
    return replace(cap, notes=read.notes)


MAX_SEED = 2**32 - 1
MAX_BOOTSTRAP = 10_000
MAX_L2 = 1e6


def check_fit_options(options: FitOptions) -> FitOptions:
    """Validate the fit options given by the user, each against its range.

    Raises
    ------
    OnnxcalError
        An unknown method or multi-label mode, or a number out of its range
        (named in the message): ``--l2`` 0 to 1e6 (and 0 for temperature
        scaling), ``--holdout`` 0 to 0.9, ``--seed`` 0 to 2^32 - 1,
        ``--bootstrap`` 0 to 10 000, ``--bins`` 2 to 100 000.
    """
    if options.method not in (*METHODS, "auto"):
        raise OnnxcalError(f"--method {options.method!r} is not one of: {', '.join(METHODS)}, auto")
    if options.multilabel is not None and options.multilabel not in MULTILABEL_MODES:
        raise OnnxcalError(
            f"--multilabel {options.multilabel!r} is not one of: {', '.join(MULTILABEL_MODES)}"
        )
    # 1e6 times the penalty pins w to 1 and b to 0 already (the NLL is a mean, of order 1)
    check_range(options.l2, 0.0, MAX_L2, "--l2", "a penalty (0 for none)")
    if options.l2 > 0 and options.method not in (*PENALISED_METHODS, "auto"):
        raise OnnxcalError(f"--l2 applies to --method {', '.join(PENALISED_METHODS)} and auto, not {options.method}")
    check_range(options.holdout, 0.0, 0.9, "--holdout", "a fraction (0 scores in-sample)")
    check_range(options.seed, 0, MAX_SEED, "--seed", "a seed")
    check_range(options.bootstrap, 0, MAX_BOOTSTRAP, "--bootstrap", "a number of replicates (0 skips the intervals)")
    check_range(options.n_bins, 2, MAX_BINS, "--bins", "a number of bins")
    return options


@one_command
def fit(
    source: Capture | str | os.PathLike | Sequence[str | os.PathLike],
    *,
    out: str | os.PathLike | None = None,
    force: bool = False,
    options: FitOptions = FitOptions(),
    drop_nonfinite: bool = False,
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
    drop_nonfinite : bool
        Leave out the samples whose logits hold NaN or Inf (a note says how
        many); by default they are refused, with their count and first rows.
    """
    check_fit_options(options)
    inputs = [] if isinstance(source, Capture) else _capture_paths(source)
    if out is not None:
        check_output_path(out, inputs, force=force)
    cap = source if isinstance(source, Capture) else _capture.load_captures(inputs)
    where = cap.meta.data_source if isinstance(source, Capture) else ", ".join(map(str, inputs))
    cap, dropped = _finite(cap, where, drop_nonfinite)
    check_bins_memory(options.n_bins, cap.logits.shape[1])
    summary = _with_note(_summarize(cap, options), dropped)
    if out is not None:
        _fit.save_fit(out, summary)
    return summary


def _summarize(cap: Capture, options: FitOptions) -> FitSummary:
    """``fit.summarize`` on a capture, with the checks that need what the fit does not know:
    how the capture read the logits (``reading.fit_read_logits``) and the search bounds of T."""
    summary = _reading.fit_read_logits(_fit.summarize(cap.logits, cap.labels, cap.meta.to_dict(), options))
    bound = _bound_warnings(summary.intervals)
    return replace(summary, warnings=(*summary.warnings, *bound)) if bound else summary


def _bound_warnings(intervals: dict | None) -> list[str]:
    """Warnings for bootstrap intervals of T that reach the fit's search bounds.

    A replicate whose resampled fit part is (nearly) separated perfectly
    has its likelihood rise as T shrinks, and its T stops at the bound
    ``fit.T_MIN`` (or, with scores carrying no information, at ``T_MAX``):
    an interval ending there ends at the bound, not at an estimate.
    """
    found = (intervals or {}).get("parameters", {}).get("temperature")
    if not found:
        return []
    pairs = [found] if isinstance(found[0], (int, float)) else [p for p in found if p is not None]
    low = any(p[0] <= _fit.T_MIN * (1 + 1e-6) for p in pairs)
    high = any(p[1] >= _fit.T_MAX * (1 - 1e-6) for p in pairs)
    out = []
    if low:
        out.append(
            f"the bootstrap interval of T reaches the search bound T = {_fit.T_MIN:g}: in some replicates the "
            "resampled fit part is (nearly) separated perfectly and the likelihood keeps rising as T shrinks, so "
            "the interval's lower end is the bound, not an estimate; use a larger or harder validation set"
        )
    if high:
        out.append(
            f"the bootstrap interval of T reaches the search bound T = {_fit.T_MAX:g}: in some replicates the "
            "scores carry almost no information about the labels, so the interval's upper end is the bound, "
            "not an estimate"
        )
    return out


def _with_note(summary: FitSummary, note: str | None) -> FitSummary:
    return summary if note is None else replace(summary, notes=(*summary.notes, note))


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
    output_holds : {"logits", "probabilities", "log-probabilities"}, optional
        What the output holds, when the graph cannot tell.
    score_columns : str, optional
        ``"START:STOP"``: calibrate only these positions of an output that
        concatenates class scores with other values.
    """

    output: str | None = None
    output_name: str = graph.DEFAULT_OUTPUT_NAME
    drop_logits: bool = False
    activation: str | None = None
    compute_dtype: str | None = None
    fold: bool = False
    output_holds: str | None = None
    score_columns: str | None = None

    def patch(self, model, calibration: float | Scaling, *, sha: str, path, fit: dict, reading: dict | None = None,
              fitted_on: str = "", largest_logit=None):
        """``graph.patch`` with these options, its parameters checked against the dtype the graph
        computes them in (and, given ``largest_logit``, against the logits seen; see ``_numeric``).
        ``reading`` says how a capture read the model."""
        with np.errstate(over="ignore", under="ignore", invalid="ignore", divide="ignore"):  # checked below
            patched = self._patch(model, calibration, sha=sha, path=path, fit=fit, reading=reading, fitted_on=fitted_on)
        for record in graph.read_records(patched):
            dtype = record.compute_dtype or graph.temperature_dtype(patched, record) or "float32"
            check_in_dtype(record.scaling, dtype, largest_logit=largest_logit)
        return patched

    def _patch(self, model, calibration: float | Scaling, *, sha: str, path, fit: dict, reading: dict | None,
               fitted_on: str):
        if reading is None:
            reading = {} if self.output_holds is None else {"holds": self.output_holds, "holds_from": "stated"}
        if self.score_columns is not None:
            reading = {**reading, "score_columns": self.score_columns}
        return graph.patch(
            model,
            calibration,
            source_sha256=sha,
            source_name=Path(path).name,
            output=self.output,
            new_output=self.output_name,
            drop_logits=self.drop_logits,
            fit=_portable(fit),
            activation=self.activation,
            compute_dtype=self.compute_dtype,
            fold=self.fold,
            fitted_on_sha256=fitted_on,
            **reading,
        )


def _portable(fit: dict) -> dict:
    """A fit summary without the user's directories: file names only (the record goes inside the model)."""
    capture = fit.get("capture")
    if not isinstance(capture, dict):
        return fit
    capture = dict(capture)
    for key in ("model_path", "data_source"):
        if isinstance(capture.get(key), str):
            capture[key] = " + ".join(_name(part) for part in capture[key].split(" + "))
    if isinstance(capture.get("merged_from"), (list, tuple)):
        capture["merged_from"] = [_name(p) for p in capture["merged_from"]]
    return {**fit, "capture": capture}


def _name(text: str) -> str:
    """The last component of a path written POSIX or Windows style."""
    return text.replace("\\", "/").rstrip("/").rsplit("/", 1)[-1] or text


def _check_outputs(out, inputs: list, model_path, force: bool, limit: int) -> bool:
    """Check ``out`` (and, for a model with external data, ``out``.data); True if external.

    Neither may be one of ``inputs`` or of the model's external data files.
    """
    sources = graph.external_data_files(model_path, max_bytes=limit)
    check_output_path(out, [*inputs, *sources], force=force)
    if sources:
        check_output_path(
            graph.external_data_path(out), [*inputs, *sources], force=force, option="--out's data file"
        )
    return bool(sources)


@one_command
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
    max_model_bytes: int | str = DEFAULT_MAX_MODEL_BYTES,
    output_holds: str | None = None,
    fitted_on_twin: bool = False,
    score_columns: str | None = None,
) -> PatchResult:
    """Write a copy of the model that outputs calibrated probabilities.

    Parameters
    ----------
    model_path : path
        The ONNX model; never modified. A model already patched by onnxcal
        has the patch of the same output undone first (so patches never
        stack); the calibration of other outputs is kept.
    out : path
        The patched model; must differ from ``model_path``. A model with
        external data is written with its weights in ``out``.data, streamed
        from the model's files (never loaded; only ``fold`` reads the one
        weight it scales).
    temperature : float, optional
        T; or give ``fit``.
    fit : FitSummary or path, optional
        A fit (or FIT.json) whose parameters are baked in and recorded.
    output, output_name, drop_logits, activation, compute_dtype, fold, output_holds, score_columns
        See :class:`PatchOptions`. With ``fit``, the output and how it was
        read (e.g. probabilities read through log p, the score columns)
        are the capture's, unless given.
    force : bool
        Replace an existing ``out``.
    max_model_bytes : int or str, default 8 GiB
        Larger model files are refused unread (the external data do not count: patch never loads them).
    fitted_on_twin : bool
        The fit was made on another build of this model (its float16 or
        quantized twin): a fit whose capture's model sha256 differs from
        this model's (and from its recorded original's) is refused without
        it. The record then holds both hashes.
    """
    limit = _max_bytes(max_model_bytes)
    _check_columns(score_columns)
    inputs = [model_path] + ([fit] if isinstance(fit, (str, os.PathLike)) else [])
    external = _check_outputs(out, inputs, model_path, force, limit)
    calibration, fit_dict = _resolve_scaling(temperature, fit)
    if fitted_on_twin and fit is None:
        raise OnnxcalError("--fitted-on-twin applies to --fit (a fit made on another build of the model)")
    model = graph.load_model(model_path, max_bytes=limit, count_external=False)
    sha = graph.model_sha256(model_path)
    records = graph.read_records(model)
    for previous in records:  # re-patching undoes a head: its record must fit the graph
        graph.check_record(model, previous, f"'{model_path}'")
    fitted_on = _provenance(fit_dict, fit, model_path, sha, records, fitted_on_twin)
    meta = fit_dict.get("capture") if isinstance(fit_dict.get("capture"), dict) else {}
    if output is None and meta.get("output") in {o.name for o in model.graph.output} and not records:
        output = meta["output"]
    patching = PatchOptions(output, output_name, drop_logits, activation, compute_dtype, fold, output_holds,
                            score_columns)
    reading = _reading.patch_reading(meta) if output_holds is None and meta else None
    patched = patching.patch(model, calibration, sha=sha, path=model_path, fit=fit_dict, reading=reading,
                             fitted_on=fitted_on)
    graph.save_model(patched, out, external=external)
    return PatchResult(path=str(out), record=graph.read_record(patched, output))


def _file_only_sha256(model_path) -> str | None:
    """The sha256 of the .onnx file alone, for a model with external data (None without).

    onnxcal before external data were hashed (docs/graph.md, "What the source
    hash covers") recorded this in captures and records; they are still read.
    """
    return sha256_file(model_path) if graph.external_data_files(model_path) else None


def _provenance(fit_dict: dict, fit, model_path, sha: str, records, twin: bool) -> str:
    """The sha256 of the twin the fit was made on ("" for this model); a fit of another model is refused.

    The fit's capture names the model it ran (sha256). It may be this file,
    or, for a model already patched, the original the records name.
    """
    meta = fit_dict.get("capture") if isinstance(fit_dict.get("capture"), dict) else {}
    fitted = meta.get("model_sha256") if isinstance(meta.get("model_sha256"), str) else None
    mine = {sha, _file_only_sha256(model_path), *(r.source_sha256 for r in records)}
    if fit is None or not fitted or fitted in mine:
        return ""
    if not twin:
        where = f"'{fit}'" if isinstance(fit, (str, os.PathLike)) else "the fit"
        raise OnnxcalError(
            f"{where} was fitted on the model with sha256 {fitted[:12]}..., not on '{model_path}' "
            f"(sha256 {sha[:12]}...)",
            "patch the model the fit was made on, or add --fitted-on-twin if this model is a build of it "
            "(its float16 or quantized twin)",
        )
    return fitted


# --------------------------------------------------------------------------
# Capture files, the patched model's outputs, the reference checks


def _as_paths(value) -> list:
    if value is None:
        return []
    if isinstance(value, (str, os.PathLike)):
        return [value]
    return list(value)


def _run_output(model, site, dataset: Dataset, run: RunOptions, progress) -> np.ndarray:
    """The values of ``site``'s output for every sample, class axis last: (rows, k)."""
    (values,) = _capture.run_model(
        graph.expose(model, [site.tensor]),
        dataset,
        [site.tensor],
        options=run,
        progress=progress,
        description="running patched model",
    )
    return _capture.output_rows(values, site)


def _reference_checks(
    rows: np.ndarray, site, record: Record, logits: np.ndarray, patched, original_model, source_sha: str | None,
    file_only_sha: str | None = None,
) -> list[Check]:
    """Checks (1)-(3): the outputs against the reference, the record against the graph and the source.

    The reference is post(activation(scale(logits))) with the post-processing
    the record noted when the model was patched; the tolerance follows every
    dtype the values pass through in the patched graph (``site.dtypes``).
    """
    checks = list(_verify.compare(rows, logits, record.scaling, record.activation, _site_dtypes(site),
                                  graph.post.from_json(record.post)))
    return checks + _record_checks(record, patched, original_model, source_sha, file_only_sha)


def _site_dtypes(site) -> tuple[str, ...]:
    """Every dtype the calibrated values pass through (the tolerance follows the coarsest)."""
    return tuple(dict.fromkeys([site.dtype, site.output_dtype or site.dtype, *site.dtypes]))


def _record_checks(
    record: Record, patched, original_model, source_sha: str | None, file_only_sha: str | None = None
) -> list[Check]:
    """Check (3): the record against the graph's parameters, and the original's sha256 against the record's."""
    checks: list[Check] = []
    if record.folded and original_model is None:
        checks.append(
            _verify.skipped(
                "record", "the parameters are folded into the weights; reading them back needs the "
                "original model (--original)"
            )
        )
    elif record.folded:
        found = graph.folded_values(patched, record, original_model)
        checks.append(_verify.folded_record_check(record.scaling, found))
    else:
        in_graph = graph.parameter_values(patched, record)
        expected = graph.recorded_values(patched, record)
        checks.append(_verify.record_check(expected, in_graph, graph.temperature_dtype(patched, record)))
    if source_sha is None:
        checks.append(
            _verify.skipped(
                "source", f"no original model or scores to compare with the record's sha256 {record.source_sha256[:12]}..."
            )
        )
    else:
        checks.append(_verify.source_check(record.source_sha256, source_sha, file_only_sha))
    return checks


def _compare_as_it_runs(
    patched: onnx.ModelProto, record: Record, dataset: Dataset, run: RunOptions, progress: ProgressFn | None,
    logits: np.ndarray, keep: np.ndarray,
) -> list[Check]:
    """Checks (1)-(2) of ``calibrate``: the patched model run batch by batch, each batch compared
    with the captured logits of its rows (those in ``keep``) as it comes.

    Nothing of the patched outputs is kept beyond a batch, so the command
    holds the logits and little else (docs/benchmarks.md, calibrate's memory).
    """
    site = graph.find_recorded(patched, record)
    plan = _capture.plan_run(graph.expose(patched, [site.tensor]), dataset, [site.tensor], run)
    post = graph.post.from_json(record.post)
    comparison = _verify.Comparison(record.scaling, record.activation, _site_dtypes(site), post)
    done = 0
    batches = _capture.run_batches(plan, dataset, progress=progress, description="running patched model")
    for _, _, (values,) in batches:
        rows = _capture.output_rows(values, site)
        span = slice(done, done + len(rows))
        done += len(rows)
        if done > len(logits):
            break
        mask = keep[span]
        if mask.all():
            comparison.add(rows, logits[span])
        else:
            comparison.add(rows[mask], logits[span][mask])
    if done != len(logits):
        raise OnnxcalError(
            f"the patched model gives {done} rows of scores but the original gave {len(logits)} on '{dataset.source}'",
            "report this with the model's inspect output",
        )
    return list(comparison.checks())


def _source_site(base, record: Record):
    """The class-score site of the uncalibrated model the record was made from, read as then."""
    kw = _reading.patch_reading({"spelling": record.spelling, "holds": record.holds, "logits_from": record.logits_from,
                                 "score_columns": record.score_columns})
    if record.rewrite == "ml-log-probabilities":  # format 2: ai.onnx.ml probabilities were read through log p
        kw["logits_from"] = "log"
    # records written before source_output existed name the output or the scores
    output = record.source_output or (record.output if record.rewrite == "insert-before-activation" else record.scores)
    site = graph.find_scores(base, output, logits_from=kw.get("logits_from"), score_columns=kw.get("score_columns"))
    if "holds" in kw:
        site = graph.read_as(site, kw["holds"], record.scaling.activation, source=kw["holds_from"])
    return site


def _unpatched(patched, patched_path):
    try:
        return graph.unpatch(patched)
    except OnnxcalError as exc:
        raise OnnxcalError(
            f"cannot recover the uncalibrated graph from '{patched_path}': {exc.message}",
            "pass --original MODEL or --scores CAPTURE",
        ) from exc


# --------------------------------------------------------------------------
# verify: the CI gate


@dataclass(frozen=True)
class _Reference:
    """Where verify's reference logits came from (see ``VerifyResult.reference_from``)."""

    logits: np.ndarray | None
    mode: str
    where: str
    source_sha: str | None  # the original's sha256, when known
    original_model: object | None  # to read folded parameters back against
    notes: tuple[str, ...] = ()
    file_only_sha: str | None = None  # the original's .onnx file alone, when it has external data


def _reference(patched, patched_path, record: Record, dataset, cap, original, base, score_paths, run, progress) -> _Reference:
    """The original's logits: captured (``--scores``), run (``--original``, loaded as ``base``), or the patched graph's own."""
    if cap is not None:
        return _Reference(cap.logits, "scores", ", ".join(map(str, score_paths)), cap.meta.model_sha256, None)
    if base is not None:
        logits = _capture.capture_scores(base, dataset, _source_site(base, record), options=run, progress=progress)
        return _Reference(logits, "original", str(original), graph.model_sha256(original), base,
                          file_only_sha=_file_only_sha256(original))
    unpatched = _unpatched(patched, patched_path)
    logits = _capture.capture_scores(unpatched, dataset, _source_site(unpatched, record), options=run, progress=progress)
    notes = [
        "no original model (--original, or the recorded original beside the patched model) and no --scores: the "
        f"reference is recomputed from the patched graph's own logits tensor '{record.scores}' (the patch undone in "
        "memory), so it checks the calibration nodes, not that the logits are the original model's"
    ]
    if record.folded:
        notes.append("the parameters are folded into the weights, so that reference only re-checks the "
                     "activation; give --original or --scores to check the parameters")
    return _Reference(logits, "patched-graph", str(patched_path), None, None, tuple(notes))


def _raw_reading_check(logits: np.ndarray, record: Record) -> Check:
    """Check (1b): an output patched as raw logits does not in fact hold probabilities (``guard``)."""
    stats = _guard.RowStats()
    stats.add(np.asarray(logits))
    seen = _guard.looks_like(stats, record.scaling.activation)
    return _verify.reading_check(None if seen == "logits" else _guard.describe(stats))


def _head_checks(patched, patched_path, records, dataset, cap, original, base, score_paths, run, progress, drop):
    """Checks (1)-(3) of every calibrated output; the last head's rows, site and keep mask; the reference."""
    several = len(records) > 1
    checks: list[Check] = []
    ref = None
    for record in records:
        own = cap if cap is not None and (not several or cap.meta.output == record.source_output) else None
        ref = _reference(patched, patched_path, record, dataset, own, original, base, score_paths, run, progress)
        site = graph.find_recorded(patched, record)
        rows = _run_output(patched, site, dataset, run, progress)
        if len(rows) != len(ref.logits):
            raise OnnxcalError(
                f"the reference holds {len(ref.logits)} rows of scores but the patched model gives {len(rows)} "
                f"rows on '{dataset.source}'",
                "capture the original model on the same data file",
            )
        keep, dropped = _finite_outputs(rows, ref.logits, dataset, drop)
        kept = (rows, ref.logits) if keep is None else (rows[keep], ref.logits[keep])
        head = _reference_checks(
            kept[0], site, record, kept[1], patched, ref.original_model, ref.source_sha, ref.file_only_sha
        )
        if record.rewrite.startswith("append-"):
            head.append(_raw_reading_check(kept[1], record))
        checks += [replace(c, name=f"{c.name} ({record.source_output})") for c in head] if several else head
        notes = [*ref.notes, *([dropped] if dropped else [])]
        if record.fitted_on_sha256:
            notes.append(
                f"output '{record.output}': the parameters were fitted on a twin of the original (sha256 "
                f"{record.fitted_on_sha256[:12]}..., stated with --fitted-on-twin when patching); the original's "
                f"sha256 is {record.source_sha256[:12]}..."
            )
        ref = replace(ref, notes=tuple(dict.fromkeys([*(ref.notes or ()), *notes])))
    return checks, rows, site, keep, ref


def _default_original(patched_path, records) -> tuple[Path | None, str | None]:
    """The recorded original beside the patched model, when its sha256 is the record's; else a note why not."""
    if not records:
        return None, None
    candidate = Path(patched_path).parent / records[0].source_name
    if not records[0].source_name or not candidate.is_file() or candidate.resolve() == Path(patched_path).resolve():
        return None, None
    if records[0].source_sha256 not in (graph.model_sha256(candidate), _file_only_sha256(candidate)):
        return None, (f"'{candidate}' beside the patched model is not the recorded original (its sha256 differs "
                      "from the record's), so it was not used")
    return candidate, None


def _unrecorded_checks(site) -> list[Check]:
    """A model without a calibration record: the record check fails, the reference checks cannot run."""
    decision = "decisions" if site.activation == "sigmoid" else "argmax"
    return [
        _verify.skipped("reference", "no calibration record: no parameters to build a reference from"),
        _verify.skipped(decision, "no calibration record: no reference to compare the decisions with"),
        Check(
            "record",
            False,
            None,
            None,
            f"the model carries no onnxcal calibration record (metadata key '{graph.RECORD_KEY}'); "
            "tools that re-save a model may drop it",
        ),
        _verify.skipped("source", "no calibration record"),
    ]


def _check_gate(max_ece, max_nll, min_accuracy, n_bins, max_latency_ratio, latency_runs) -> None:
    for option, value in (("--max-ece", max_ece), ("--min-accuracy", min_accuracy)):
        if value is not None and not (np.isfinite(value) and 0 <= value <= 1):
            raise OnnxcalError(f"{option} {value!r} is not a number between 0 and 1")
    if max_nll is not None and not (np.isfinite(max_nll) and max_nll >= 0):
        raise OnnxcalError(f"--max-nll {max_nll!r} is not a non-negative number")
    if max_latency_ratio is not None and not (np.isfinite(max_latency_ratio) and max_latency_ratio > 0):
        raise OnnxcalError(
            f"--max-latency-ratio {max_latency_ratio!r} is not a positive number", "use e.g. 1.05 for 5 % slower"
        )
    check_range(latency_runs, 1, MAX_LATENCY_RUNS, "--latency-runs", "a number of runs")
    check_range(n_bins, 2, MAX_BINS, "--bins", "a number of bins")


def _latency(base, patched, dataset: Dataset, run: RunOptions, runs: int, max_ratio, against: str) -> Check:
    """Check (5): both models on the first batch of the data, timed alternately."""
    plans = [_capture.plan_run(m, dataset, [o.name for o in m.graph.output], run) for m in (base, patched)]
    size = min(plans[1].step, dataset.n)
    feeds = []
    for plan in plans:
        feed = dataset.batch(0, size, plan.dtypes)
        if plan.pad is not None and size < plan.pad:  # a fixed batch dim: pad as the runs do
            feed = {k: np.concatenate([v, np.repeat(v[-1:], plan.pad - size, axis=0)]) for k, v in feed.items()}
        feeds.append(feed)
    calls = [lambda p=p, f=f: p.session.run(None, f) for p, f in zip(plans, feeds)]
    times = _verify.time_alternately(calls, runs, warmup=max(3, runs // 10))
    return _verify.latency_check(times[0], times[1], max_ratio, batch=size, against=against)


def _threshold_checks(
    rows, activation, site, dataset: Dataset, cap: Capture | None, n_bins, limits, keep=None, record=None
) -> tuple:
    """Check (4): metrics of the patched model's own outputs against the labels (the rows ``keep`` only).

    Post-processing the output carries (x100, one class of two) is undone
    first (``graph.post.invert``).
    """
    post = graph.post.from_json(record.post) if record is not None else ()
    if post:
        rows = graph.post.invert(rows, post, site.num_classes or 0)
        if rows is None:
            raise OnnxcalError(
                f"--max-ece, --max-nll and --min-accuracy need every class's probability, and output "
                f"'{site.output}' holds one class's of {site.num_classes}",
                "leave out the thresholds, or verify an output that holds every class",
            )
    if activation is None:  # raw logits (a model without a record)
        logits, kind = rows, graph.fit_kind(site)
    else:
        logits, kind = scores_from_probabilities(rows, activation), "sigmoid" if activation == "sigmoid" else "softmax"
    if dataset.labels is not None:
        labels = _capture.label_rows(dataset.labels, rows.shape, kind, dataset.source)
    else:
        labels = cap.labels
        if len(labels) != len(rows):
            raise OnnxcalError(
                f"the labels of --scores hold {len(labels)} rows but the patched model gives {len(rows)} rows",
                "capture the original model on the same data file",
            )
    if keep is not None:
        logits, labels = logits[keep], labels[keep]
    check_bins_memory(n_bins, logits.shape[1])
    return _verify.threshold_checks(evaluate(logits, labels, 1.0, n_bins), **limits)


def _finite_outputs(rows: np.ndarray, reference, dataset: Dataset, drop: bool) -> tuple[np.ndarray | None, str | None]:
    """The rows where the patched outputs (and the reference logits) are finite; None when all are.

    Refused, with the count and first rows of the set, unless ``drop``; then a note says how many.
    """
    bad = ~np.isfinite(rows).all(axis=1)
    if reference is not None:
        bad |= ~np.isfinite(reference).all(axis=1)
    if not bad.any():
        return None, None
    found = _capture.Nonfinite()
    found.add(bad, np.repeat(dataset.row_numbers(), max(1, len(rows) // dataset.n)))
    what = (
        f"the patched model's outputs{'' if reference is None else ' or the reference logits'} on "
        f"'{dataset.source}' hold NaN or Inf in {found.describe(len(rows))}"
    )
    if bad.all():  # a check over no rows is no pass
        raise OnnxcalError(
            f"{what}: every row, so there is nothing left to check ({len(rows)} of {len(rows)} rows would be dropped)",
            "check the patched model (its parameters, its dtype) and the data",
        )
    if not drop:
        raise OnnxcalError(what, "check those rows of the data, or pass --drop-nonfinite to leave them out")
    return ~bad, f"dropped {int(bad.sum())} rows: {what}"


@one_command
def verify(
    patched_path: str | os.PathLike,
    data: DataSource,
    *,
    original: str | os.PathLike | None = None,
    scores: str | os.PathLike | Sequence[str | os.PathLike] | None = None,
    max_ece: float | None = None,
    max_nll: float | None = None,
    min_accuracy: float | None = None,
    n_bins: int = DEFAULT_BINS,
    latency: bool = False,
    max_latency_ratio: float | None = None,
    latency_runs: int = DEFAULT_LATENCY_RUNS,
    junit: str | os.PathLike | None = None,
    force: bool = False,
    batch_size: int | None = None,
    threads: int = 0,
    optimization: str = "all",
    provider: str = _capture.CPU,
    progress: ProgressFn | None = None,
    max_model_bytes: int | str = DEFAULT_MAX_MODEL_BYTES,
    drop_nonfinite: bool = False,
) -> VerifyResult:
    """Check a patched model for CI: reference, decisions, record, thresholds, latency.

    The checks, each with its figure (see ``docs/ci.md``):

    1. ``reference`` (and ``row-sums`` for softmax outputs): the patched
       outputs against the NumPy reference, e.g. softmax(original logits / T),
       within the tolerance of the dtype the graph computes in.
    2. ``argmax`` (softmax) or ``decisions`` (sigmoid): every row decides
       as the reference does.
    3. ``record``: the calibration record is present and its parameters are
       the graph's; ``source``: the original's sha256 is the record's.
    4. ``max-ece``, ``max-nll``, ``min-accuracy``, when a bound is given:
       metrics of the patched model's outputs against the labels.
    5. ``latency``, with ``latency`` or ``max_latency_ratio``: median
       latency of the patched model over the original's (or, without one,
       over the uncalibrated graph recovered from the patched one),
       measured alternately in this process.

    Parameters
    ----------
    patched_path : path
        A model written by :func:`patch` or :func:`calibrate`.
    data : path or DataSpec
        The inputs, in any form :func:`capture` takes (labels needed for
        the thresholds, unless ``scores`` carry them).
    original : path, optional
        The uncalibrated model; by default the path in the record, if that
        file exists.
    scores : path or list of paths, optional
        Capture file(s) of the original model on the same data, used
        instead of running it. With neither ``original`` (nor the recorded
        path) nor ``scores``, the reference is recomputed from the patched
        graph's own logits tensor, and the result says so.
    max_ece, max_nll, min_accuracy : float, optional
        Bounds for check 4; ``n_bins`` bins for the ECE.
    latency, max_latency_ratio, latency_runs
        Check 5: measure (``latency_runs`` runs of each model on one batch
        of ``batch_size`` samples), and fail above ``max_latency_ratio``.
    junit : path, optional
        Also write the checks as JUnit XML here (``force`` to replace it).
    batch_size, threads, optimization, provider
        As for :func:`capture` (the latency runs use them too).
    max_model_bytes : int or str, default 8 GiB
        Larger model files (with external data) are refused unread.
    drop_nonfinite : bool
        Leave out the rows where the patched outputs or the reference
        logits hold NaN or Inf (a note says how many); by default they are
        refused.

    Returns
    -------
    VerifyResult
        ``passed`` is False when a check failed (the CLI exits 1).

    Raises
    ------
    OnnxcalError
        Bad input (the CLI exits 2): unreadable files, options out of
        range, ``original`` and ``scores`` together, thresholds without
        labels, scores that do not line up with the data.
    """
    started = time.perf_counter()
    spec = _data_spec(data)
    run = _run_options(batch_size, threads, optimization, provider)
    _check_gate(max_ece, max_nll, min_accuracy, n_bins, max_latency_ratio, latency_runs)
    score_paths = _as_paths(scores)
    if original is not None and score_paths:
        raise OnnxcalError(
            "give --original or --scores, not both", "--scores stands in for running the original model"
        )
    limit = _max_bytes(max_model_bytes)
    patched = graph.load_model(patched_path, max_bytes=limit)
    records = graph.read_records(patched)
    record = records[-1] if records else None
    beside, why_not = (None, None) if original is not None or score_paths else _default_original(patched_path, records)
    if junit is not None:
        models = [patched_path, *([original] if original is not None else []), *([beside] if beside else [])]
        inputs = [f for m in models for f in _model_files(m, limit)] + [*spec.files(), *score_paths]
        check_output_path(junit, inputs, force=force, option="--junit")
    latency = latency or max_latency_ratio is not None
    limits = {"max_ece": max_ece, "max_nll": max_nll, "min_accuracy": min_accuracy}
    thresholds = any(v is not None for v in limits.values())
    dataset = _load_data(patched, spec, require_labels=False, batch_size=run.batch_size)
    cap = _capture.load_captures(score_paths) if score_paths else None
    if thresholds and dataset.labels is None and cap is None:
        raise OnnxcalError(
            f"--max-ece, --max-nll and --min-accuracy need labels, and '{dataset.source}' has none",
            "add a 'labels' array, or give --scores with a capture of the same data",
        )
    original = original if original is not None else beside
    if record is None and latency and original is None:
        raise OnnxcalError(
            f"--latency: '{patched_path}' has no calibration record, so there is no uncalibrated graph "
            "to compare its speed with",
            "pass --original MODEL",
        )
    if record is None:
        site = graph.find_scores(patched)
        rows = _run_output(patched, site, dataset, run, progress)
        note = f"'{patched_path}' carries no onnxcal calibration record, so there is no reference to compare with"
        ref = _Reference(None, "none", str(original or ""), None, None, (note,))
        keep, dropped = _finite_outputs(rows, None, dataset, drop_nonfinite)
        activation, checks = site.activation, _unrecorded_checks(site)
        if dropped is not None:
            ref = replace(ref, notes=(*ref.notes, dropped))
    else:
        base = graph.load_model(original, max_bytes=limit) if original is not None else None
        checks, rows, site, keep, ref = _head_checks(
            patched, patched_path, records, dataset, cap, original, base, score_paths, run, progress, drop_nonfinite
        )
        activation = record.activation
        checks.append(_reading.identity(base or _unpatched(patched, patched_path), patched, records, dataset, run,
                                        progress))
    if why_not is not None:
        ref = replace(ref, notes=(why_not, *ref.notes))
    if thresholds:
        checks += _threshold_checks(rows, activation, site, dataset, cap, n_bins, limits, keep, record)
    if latency:
        against = "original" if original is not None else "uncalibrated copy"
        if ref.original_model is not None:
            reference_model = ref.original_model
        elif original is not None:
            reference_model = graph.load_model(original, max_bytes=limit)
        else:
            reference_model = _unpatched(patched, patched_path)
        checks.append(
            _latency(reference_model, patched, dataset, run, latency_runs, max_latency_ratio, against)
        )
    result = VerifyResult(
        checks=tuple(checks), n=dataset.n, original=ref.where, reference_from=ref.mode, notes=ref.notes
    )
    if junit is not None:
        xml = _verify.junit_xml(
            result, suite=f"onnxcal verify {Path(patched_path).name}", elapsed=time.perf_counter() - started
        )
        atomic_write_bytes(junit, xml)
    return result


# --------------------------------------------------------------------------
# report


def _check_formats(formats) -> tuple[str, ...]:
    if isinstance(formats, str):
        formats = [f.strip() for f in formats.split(",") if f.strip()]
    bad = [f for f in formats if f not in _report.FORMATS]
    if bad or not formats:
        raise OnnxcalError(
            f"--format {','.join(formats)!r} is not a comma-separated list of: {', '.join(_report.FORMATS)}",
            "e.g. --format html,md",
        )
    return tuple(f for f in _report.FORMATS if f in formats)


def _report_targets(directory, formats, inputs, force: bool, option: str) -> list[Path]:
    """The report's files, checked before any work; the directory may not exist yet."""
    d = check_not_input(directory, inputs, option)
    if d.exists() and not d.is_dir():
        raise OnnxcalError(f"{option} '{d}' is a file, not a directory", "give a directory for the report")
    parent = d.parent if str(d.parent) else Path(".")
    if not d.exists() and not parent.is_dir():
        raise OnnxcalError(f"the directory '{parent}' that would hold {option} '{d}' does not exist", "create it first")
    check_writable(d if d.is_dir() else parent, option)
    targets = [d / name for name in _report.outputs(formats)]
    if d.is_dir():
        for target in targets:
            check_output_path(target, inputs, force=force, option=f"{option} file")
    return targets


def _report_files(directory, content: dict, formats) -> tuple[dict[Path, bytes], ReportResult]:
    """Every file of a report, rendered in memory, and the result that describes them."""
    d = Path(directory)
    files = {d / name: data for name, data in _report.render(content, formats).items()}
    return files, ReportResult(directory=str(d), files=tuple(map(str, files)), content=content)


def _write_report(directory, content: dict, formats) -> ReportResult:
    """Render every file in memory, then write them together (a new directory is removed again if writing fails)."""
    files, result = _report_files(directory, content, formats)
    atomic_write_files(files)
    return result


def _class_names(value, k: int) -> list[str] | None:
    """Class names from a list or a text file (one per line), checked against K."""
    if value is None:
        return None
    if isinstance(value, (str, os.PathLike)):
        path = require_file(value, "class names file")
        try:
            names = [line.strip() for line in path.read_text().splitlines() if line.strip()]
        except (OSError, UnicodeDecodeError) as exc:
            raise OnnxcalError(f"cannot read class names from '{path}' ({exc})", "give a UTF-8 text file") from exc
        where = f"'{path}'"
    else:
        names, where = [str(v) for v in value], "the class names"
    if k == 1 and len(names) == 2:  # binary: (negative, positive); the logit is the positive label's
        names = names[1:]
    if len(names) != k:
        raise OnnxcalError(
            f"{where} give {len(names)} names for a model with {k} logit(s) per sample",
            "give one name per line, in the order of the model's classes",
        )
    return names


def _capture_names(cap: Capture) -> list[str] | None:
    """The class names a capture recorded (``--classes``, image folders), if they fit its logits."""
    names = cap.meta.class_names
    k = cap.logits.shape[1]
    if not names:
        return None
    if k == 1 and len(names) == 2:  # binary: (negative, positive); the logit is the positive class's
        return list(names[1:])
    return list(names) if len(names) == k else None


def _fit_from_record(record: Record, model_path) -> FitSummary | None:
    if "metrics" not in record.fit:  # patched with a given T: no fit to show
        return None
    try:
        return _fit.summary_from_dict(record.fit)
    except (OnnxcalError, KeyError, TypeError, ValueError) as exc:
        raise OnnxcalError(
            f"the fit summary in the calibration record of '{model_path}' is damaged ({exc})",
            "patch the original model again with 'onnxcal patch --fit FIT.json'",
        ) from exc


def _check_report_scaling(scaling: Scaling, cap: Capture, source_sha: str | None, what: str) -> None:
    kind = kind_of(cap.logits.shape[1], cap.labels.ndim)
    if scaling.kind != kind:
        raise OnnxcalError(
            f"{what} is for a {scaling.kind} classifier, but the capture holds {kind} scores",
            "give a capture of the model it was fitted on",
        )
    check_scaling(scaling, cap.logits.shape[1])
    if source_sha is not None and source_sha != cap.meta.model_sha256:
        raise OnnxcalError(
            f"{what} was made for the model with sha256 {source_sha[:12]}..., but the capture is of "
            f"the model with sha256 {cap.meta.model_sha256[:12]}...",
            "capture the model the calibration was made for",
        )


@one_command
def report(
    captures: Capture | str | os.PathLike | Sequence[str | os.PathLike],
    out: str | os.PathLike,
    *,
    temperature: float | None = None,
    fit: FitSummary | str | os.PathLike | None = None,
    model: str | os.PathLike | None = None,
    formats: str | Sequence[str] = _report.FORMATS,
    class_names: str | os.PathLike | Sequence[str] | None = None,
    n_bins: int | None = None,
    force: bool = False,
    drop_nonfinite: bool = False,
    max_model_bytes: int | str = DEFAULT_MAX_MODEL_BYTES,
) -> ReportResult:
    """Write a report on a calibration into the directory ``out``.

    Files (by ``formats``): ``report.html`` (self-contained: inline CSS,
    plots as base64 PNG), ``summary.md`` (a before/after table and verdict
    lines for a pull-request comment), ``report.json`` (every number) and
    ``reliability.png``, ``confidence.png``, ``classes.png``.

    Parameters
    ----------
    captures : Capture, path or list of paths
        Logits and labels (capture files are read as one set).
    out : path
        The report directory; created if missing (its parent must exist).
    temperature : float, optional
        A temperature given by hand; or give ``fit`` or ``model``.
    fit : FitSummary or path, optional
        A fit (FIT.json). On the capture it was made on, the figures are
        those of its held-out part, with its bootstrap intervals.
    model : path, optional
        A patched model: its calibration record gives the parameters and
        the fit, and its name and sha256 go into the report.
    formats : str or list of str
        Any of ``html``, ``md``, ``json``, ``png`` (default: all).
    class_names : path or list of str, optional
        One name per class (a text file: one per line).
    n_bins : int, optional
        Bins of the ECEs and the plots (default: the fit's, else 15).
    force : bool
        Replace existing report files.
    drop_nonfinite : bool
        Leave out samples whose logits hold NaN or Inf (noted in the
        report); by default they are refused.
    max_model_bytes : int or str, default 8 GiB
        A larger ``model`` file is refused unread.

    Returns
    -------
    ReportResult
    """
    if sum(x is not None for x in (temperature, fit, model)) != 1:
        raise OnnxcalError("give exactly one of --temperature, --fit and --model")
    if n_bins is not None:
        check_range(n_bins, 2, MAX_BINS, "--bins", "a number of bins")
    formats = _check_formats(formats)
    limit = _max_bytes(max_model_bytes)
    capture_paths = [] if isinstance(captures, Capture) else _as_paths(captures)
    inputs = [*capture_paths, *[p for p in (fit, class_names) if isinstance(p, (str, os.PathLike))]]
    inputs += _model_files(model, limit) if model is not None else []
    _report_targets(out, formats, inputs, force, "--out")
    cap = captures if isinstance(captures, Capture) else _capture.load_captures(capture_paths)
    cap, dropped = _finite(cap, ", ".join(map(str, capture_paths)) or cap.meta.data_source, drop_nonfinite)
    calibrated = None
    if temperature is not None:
        kind = kind_of(cap.logits.shape[1], cap.labels.ndim)
        summary, scaling = None, Scaling.of_temperature(graph.check_temperature(temperature), kind)
        source_sha, what = None, "the temperature"
    elif fit is not None:
        summary = fit if isinstance(fit, FitSummary) else _fit.load_fit(fit)
        scaling, source_sha, what = summary.scaling, summary.capture.get("model_sha256"), "the fit"
    else:
        record = _record_of(model, limit)
        summary, scaling = _fit_from_record(record, model), record.scaling
        source_sha, what = record.source_sha256, f"the calibration in '{model}'"
        calibrated = {"name": Path(model).name, "path": str(model), "sha256": graph.model_sha256(model)}
    _check_report_scaling(scaling, cap, source_sha, what)
    check_in_dtype(scaling, "float64", largest_logit=max_abs(cap.logits), computes="the report computes in",
                   hint="check the parameters")
    check_bins_memory(n_bins or (summary.options.n_bins if summary is not None else DEFAULT_BINS), cap.logits.shape[1])
    names = _class_names(class_names, cap.logits.shape[1]) or _capture_names(cap)
    content = _report.build(
        cap, scaling, summary=summary, class_names=names, n_bins=n_bins, calibrated=calibrated
    )
    if dropped is not None:
        content["notes"] = [*content.get("notes", []), dropped]
    return _write_report(out, content, formats)


def _check_not_calibrated(model, model_path, output: str | None) -> None:
    """``calibrate`` fits an output once: another output of a calibrated model may be calibrated."""
    records = graph.read_records(model)
    if not records:
        return
    done = next((r for r in records if output in (r.output, r.source_output)), None)
    if output is None or done is not None:
        what = done or records[-1]
        raise OnnxcalError(
            f"'{model_path}' is already calibrated by onnxcal ({what.method} scaling of output '{what.source_output}')",
            f"calibrate the original model ({what.source_name}), change T with 'onnxcal patch', or calibrate "
            "another output with --output",
        )


def _record_of(model_path, limit: int) -> Record:
    """The calibration record of a patched model, checked to describe its graph and its parameters.

    For a folded model the parameters cannot be read back without the
    original (``onnxcal verify --original`` checks them).
    """
    model = graph.load_model(model_path, max_bytes=limit, count_external=False)
    record = graph.read_record(model)
    if record is None:
        raise OnnxcalError(
            f"'{model_path}' has no onnxcal calibration record", "give a model written by 'onnxcal patch' or 'calibrate'"
        )
    graph.check_record(model, record, f"'{model_path}'")
    if not record.folded:
        check = _verify.record_check(
            record.parameters, graph.parameter_values(model, record), graph.temperature_dtype(model, record)
        )
        if not check.passed:
            raise OnnxcalError(
                f"the calibration record of '{model_path}' does not match the parameters in its graph ({check.detail})",
                f"run 'onnxcal verify {model_path}' to see what differs, and patch the original model again",
            )
    return record


# --------------------------------------------------------------------------
# calibrate


@one_command
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
    batch_size: int | None = None,
    threads: int = 0,
    optimization: str = "all",
    provider: str = _capture.CPU,
    force: bool = False,
    progress: ProgressFn | None = None,
    options: FitOptions = FitOptions(),
    report: str | os.PathLike | None = None,
    drop_nonfinite: bool = False,
    max_model_bytes: int | str = DEFAULT_MAX_MODEL_BYTES,
    output_holds: str | None = None,
    score_columns: str | None = None,
) -> CalibrateResult:
    """Capture, fit, patch and verify in one go (and write a report).

    The patched model is verified in memory against the captured logits
    (and, with its parameters at the identity, against the original's own
    outputs) before it is written; when a check fails nothing is written and
    ``result.patch`` is None. A model already calibrated by onnxcal may
    have another output calibrated (``output``); each has its own record. ``data`` and ``batch_size`` ... ``provider``: as
    for :func:`capture`; ``output`` ... ``fold``: see :class:`PatchOptions`;
    ``options`` are those of :func:`fit`. With ``report`` (a directory),
    every file of :func:`report` is written there too, with the
    verification, also when it failed. The model and the report are written
    together, only once everything is computed. ``drop_nonfinite`` leaves out
    samples whose logits hold NaN or Inf (a note says how many; by default
    they are refused); ``max_model_bytes`` as for :func:`capture`.
    """
    check_fit_options(options)
    _check_columns(score_columns)
    spec = _data_spec(data)
    limit = _max_bytes(max_model_bytes)
    external = _check_outputs(out, [model_path, *spec.files()], model_path, force, limit)
    if report is not None:
        outputs = [out, *([graph.external_data_path(out)] if external else [])]
        inputs = [*_model_files(model_path, limit), *spec.files(), *outputs]
        _report_targets(report, _report.FORMATS, inputs, force, "--report")
    run = _run_options(batch_size, threads, optimization, provider)
    patching = PatchOptions(output, output_name, drop_logits, activation, compute_dtype, fold, output_holds,
                            score_columns)
    model = graph.load_model(model_path, max_bytes=limit)
    _check_not_calibrated(model, model_path, output)
    graph.default_opset(model)  # before the capture: can the patch import the operators it adds?
    sha = graph.model_sha256(model_path)
    dataset = _load_data(model, spec, batch_size=run.batch_size)
    cap = _read_and_capture(model, dataset, model_path, sha, output, output_holds, activation, run, progress,
                            columns=score_columns)
    keep = _capture.finite_mask(cap)
    full = cap
    cap, dropped = _finite(cap, dataset.source, drop_nonfinite)
    _warn_nonfinite_inputs(full, dataset.source)
    check_bins_memory(options.n_bins, cap.logits.shape[1])
    summary = _summarize(cap, options)
    for note in (*cap.notes, dropped):
        summary = _with_note(summary, note)
    patched = patching.patch(model, summary.scaling, sha=sha, path=model_path, fit=summary.to_dict(),
                             reading=_reading.patch_reading(cap.meta.to_dict()), largest_logit=max_abs(cap.logits))
    record = graph.read_record(patched, cap.meta.output)
    checks = _compare_as_it_runs(patched, record, dataset, run, progress, full.logits, keep)
    source_sha = sha if len(graph.read_records(patched)) == 1 else record.source_sha256  # other heads: the original's
    checks += _record_checks(record, patched, model, source_sha)
    checks.append(_reading.identity(model, patched, (record,), dataset, run, progress))
    result = VerifyResult(checks=tuple(checks), n=dataset.n, original=str(model_path))
    files: dict[Path, bytes] = {}
    written = None
    if result.passed:
        files = graph.model_files(patched, out, external=external)
        written = PatchResult(path=str(out), record=record)
    written_report = None
    if report is not None:
        calibrated = None if written is None else {
            "name": Path(out).name, "path": str(out), "sha256": graph.saved_sha256(patched, out, external=external)
        }
        content = _report.build(
            cap, summary.scaling, summary=summary, class_names=_capture_names(cap), calibrated=calibrated,
            verification=result,
        )
        report_files, written_report = _report_files(report, content, _report.FORMATS)
        files.update(report_files)
    atomic_write_files(files)
    return CalibrateResult(summary=summary, patch=written, verification=result, report=written_report)
