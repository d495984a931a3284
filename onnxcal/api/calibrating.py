"""``calibrate``: capture, fit, patch and verify in one go, and write a report."""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any, cast

import numpy as np
import onnx

from .. import graph
from .. import reading as _reading
from .._files import Writer, atomic_write_files
from .._limits import DEFAULT_MAX_MODEL_BYTES, check_bins_memory
from .._numeric import max_abs
from .._paths import one_command
from ..capture import CPU, Capture, ProgressFn, RunOptions, RunPlan, finite_mask
from ..data import Dataset, DataSpec
from ..decisions.plan import NO_DECISIONS, DecisionOptions, Decisions
from ..errors import OnnxcalError, keyword_errors
from ..fit import FitOptions, FitSummary
from ..graph import Record
from ..report import FORMATS, ReportResult
from ..report import build as build_report
from ..verify import Check, VerifyResult, reference_probabilities
from . import deciding
from .capture_fit import check_fit_options, summarize_capture
from .checks import RiderRun, compare_as_it_runs, record_checks
from .common import (
    DataSource,
    capture_read,
    check_columns,
    check_model_outputs,
    data_spec,
    finite_capture,
    load_data,
    model_byte_limit,
    model_files,
    run_options,
    warn_nonfinite_inputs,
    with_note,
)
from .models import models_in_memory
from .patching import PatchOptions, PatchResult
from .reporting import WRITING, capture_names, report_files, report_targets
from .sampling import VERIFY_ROWS, Sample, subset, verification_sample


@dataclass(frozen=True)
class CalibrateResult:
    """Everything ``calibrate`` did: the fit, the patched model, its verification and report."""

    summary: FitSummary
    patch: PatchResult | None
    verification: VerifyResult
    report: ReportResult | None = None
    decisions: Decisions | None = None


def _check_not_calibrated(model: onnx.ModelProto, model_path: str | os.PathLike[str], output: str | None) -> None:
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


@dataclass(frozen=True)
class _Source:
    """The model being calibrated, its data and how to run it."""

    model: onnx.ModelProto
    path: str | os.PathLike[str]
    sha: str
    dataset: Dataset
    run: RunOptions
    progress: ProgressFn | None


@dataclass(frozen=True)
class _Captured:
    """The capture of every row (``full``), the mask of rows with finite logits, and those rows alone (``cap``)."""

    full: Capture
    keep: np.ndarray[Any, Any]
    cap: Capture
    dropped: str | None  # the note on the rows left out, if any
    original: RunPlan | None = None  # the capture's session, which gives the original's outputs unchanged


def _check_outputs(
    out: str | os.PathLike[str], report: str | os.PathLike[str] | None, model_path: str | os.PathLike[str],
    specs: list[DataSpec], force: bool, limit: int,
) -> bool:
    """Check the model's output (and its data file) and the report's files before any work; True if external."""
    files = [f for spec in specs for f in spec.files()]
    external = check_model_outputs(out, [model_path, *files], model_path, force, limit)
    if report is not None:
        outputs = [out, *([graph.external_data_path(out)] if external else [])]
        inputs = [*model_files(model_path, limit), *files, *outputs]
        report_targets(report, FORMATS, inputs, force, "--report")
    return external


def _capture_finite(source: _Source, patching: PatchOptions, drop: bool) -> _Captured:
    """Capture the model's logits; the rows holding NaN or Inf are refused or (``drop``) left out."""
    cap, original = capture_read(
        source.model, source.dataset, source.path, source.sha, patching.output, patching.output_holds,
        patching.activation, source.run, source.progress, columns=patching.score_columns,
    )
    keep = finite_mask(cap)
    kept, dropped = finite_capture(cap, source.dataset.source, drop)
    return _Captured(cap, keep, kept, dropped, original)


def _fit_captured(seen: _Captured, options: FitOptions, progress: ProgressFn | None) -> FitSummary:
    """The fit of the kept rows, with the capture's notes and the note on dropped rows."""
    check_bins_memory(options.n_bins, seen.cap.logits.shape[1])
    summary = summarize_capture(seen.cap, options, progress)
    for note in (*seen.cap.notes, seen.dropped):
        summary = with_note(summary, note)
    return summary


@dataclass(frozen=True)
class _Deciding:
    """The decision options of a calibrate run and the separate set to choose on (None: the held-out rows)."""

    options: DecisionOptions
    separate: DataSpec | None
    fit: FitOptions


def _patch_and_check(
    source: _Source, patching: PatchOptions, seen: _Captured, summary: FitSummary, to_decide: _Deciding,
    verify_rows: int | None,
) -> tuple[onnx.ModelProto, Record, VerifyResult, Decisions | None]:
    """The patched model (in memory), its record, its checks against the captured logits and the original
    (on every row, or with ``verify_rows`` on a sample of them: :func:`.sampling.verification_sample`), and
    the decision thresholds it carries (when asked for)."""
    cap, dataset, logits, keep = seen.cap, source.dataset, seen.full.logits, seen.keep
    # one score row per sample (not a segmentation's rows of pixels): the sample is of samples
    one_row_each = len(logits) == source.dataset.n
    sample = verification_sample(seen.full.labels, logits, keep, verify_rows) if one_row_each else None
    identity_set = dataset
    if sample is not None:
        rows = sample.positions
        dataset, logits, keep = subset(dataset, rows), logits[rows], keep[rows]
        identity_set = subset(source.dataset, sample.identity_positions)
    patched = patching.patch(source.model, summary.scaling, sha=source.sha, path=source.path, fit=summary.to_dict(),
                             reading=_reading.patch_reading(cap.meta.to_dict()), largest_logit=max_abs(cap.logits))
    record = graph.read_record(patched, cap.meta.output)
    assert record is not None  # the patch just wrote the record of this output
    run, progress = source.run, source.progress
    chosen = None
    if to_decide.options.wanted:
        patched, record, chosen = deciding.for_calibrate(
            patched, record, cap.labels, seen.keep, source.dataset, to_decide.separate, to_decide.fit,
            to_decide.options, run, progress)
    prepared = _reading.identity_run(source.model, patched, (record,))
    riding = _riding(patched, prepared, seen.original, dataset.n, sample)
    checks, got = compare_as_it_runs(patched, record, dataset, run, progress, logits, keep, riding)
    if chosen is not None:
        reference = reference_probabilities(cap.logits, record.scaling, record.activation)
        checks += deciding.exact_checks(patched, record, source.dataset, run, progress, reference, seen.keep)[0]
    # other heads: the original's sha256
    source_sha = source.sha if len(graph.read_records(patched)) == 1 else record.source_sha256
    checks += record_checks(record, patched, source.model, source_sha)
    want = _captured_outputs(source.model, seen, prepared, dataset.n if sample is None else None, sample)
    checks.append(_reading.identity(source.model, patched, (record,), identity_set, run, progress, seen.original,
                                    prepared, got, want))
    notes = () if sample is None else (sample.note,)
    result = VerifyResult(checks=tuple(checks), n=dataset.n, original=str(source.path), notes=notes)
    return patched, record, result, chosen


def _riding(
    patched: onnx.ModelProto, prepared: _reading.IdentityRun | Check, original: RunPlan | None, n: int,
    sample: Sample | None,
) -> RiderRun | None:
    """The identity check's run in the patched model's session (:func:`graph.identity_rider`), when the
    capture's session gives the original's side; None to run it in a session of its own.

    The identity compares the sample's identity rows, a subset of the ``n`` rows checked (all of them
    without a sample).
    """
    if original is None or isinstance(prepared, Check):
        return None
    rider = graph.identity_rider(patched, prepared.at_one, prepared.names)
    if rider is None:
        return None
    rows = np.ones(n, bool) if sample is None else np.isin(sample.positions, sample.identity_positions)
    return RiderRun(rider, prepared.out_axes, rows)


def _captured_outputs(
    model: onnx.ModelProto, seen: _Captured, prepared: _reading.IdentityRun | Check, n: int | None,
    sample: Sample | None,
) -> list[np.ndarray] | None:
    """The original's side of the identity check taken from the capture, when the one output it compares is
    the tensor the capture read, row for row (raw logits: its session ran the original on every row
    already, and running it again on the identity's rows would give the same values); else None.

    Rows are the output's own when the capture exposed the output itself (no logits recipe), it is 2-D
    with samples first, and its dtype widens to the capture's float32 exactly (float32, float16).
    """
    plan = seen.original
    if plan is None or isinstance(prepared, Check) or len(prepared.names) != 1 or prepared.out_axes != (0,):
        return None
    (name,) = prepared.names
    if plan.names[:2] != (name, name) or seen.full.logits.ndim != 2:
        return None
    spec = next((graph.tensor_spec(o) for o in model.graph.output if o.name == name), None)
    if spec is None or spec.dtype not in ("float32", "float16") or spec.shape is None or len(spec.shape) != 2:
        return None
    rows = seen.full.logits if sample is None else seen.full.logits[sample.identity_positions]
    if sample is None and len(rows) != n:
        return None
    return [np.asarray(rows, np.float32)]


def _report_files(
    directory: str | os.PathLike[str], out: str | os.PathLike[str], external: bool, patched: onnx.ModelProto,
    cap: Capture, summary: FitSummary, result: VerifyResult,
) -> tuple[dict[Path, bytes], ReportResult]:
    """The report's files, rendered in memory, with the verification (and the written model, when it passed)."""
    calibrated = None if not result.passed else {
        "name": Path(out).name, "path": str(out), "sha256": graph.saved_sha256(patched, out, external=external)
    }
    record = graph.read_record(patched, cap.meta.output)
    assert record is not None  # the patch wrote the record of this output
    content = build_report(
        cap, summary.scaling, summary=summary, class_names=capture_names(cap), calibrated=calibrated,
        verification=result, decisions=record.decisions,
    )
    return report_files(directory, content, FORMATS)


def check_verify_rows(verify_rows: int | None) -> int | None:
    if verify_rows is not None and (isinstance(verify_rows, bool) or not isinstance(verify_rows, int)
                                    or verify_rows < 1):
        raise OnnxcalError(f"verify_rows must be a whole number of rows of at least 1, or None for every row; got "
                           f"{verify_rows!r}", "pass verify_rows=None to check every row")
    return verify_rows


@keyword_errors
@models_in_memory("model_path")
@one_command
def calibrate(
    model_path: str | os.PathLike[str] | onnx.ModelProto,
    data: DataSource,
    out: str | os.PathLike[str],
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
    provider: str = CPU,
    force: bool = False,
    progress: ProgressFn | None = None,
    options: FitOptions = FitOptions(),
    report: str | os.PathLike[str] | None = None,
    drop_nonfinite: bool = False,
    max_model_bytes: int | str = DEFAULT_MAX_MODEL_BYTES,
    output_holds: str | None = None,
    score_columns: str | None = None,
    decisions: DecisionOptions = NO_DECISIONS,
    decision_data: DataSource | None = None,
    verify_rows: int | None = VERIFY_ROWS,
) -> CalibrateResult:
    """Capture, fit, patch and verify in one go (and write a report).

    The patched model is verified in memory against the captured logits
    (and, with its parameters at the identity, against the original's own
    outputs) before it is written; when a check fails nothing is written and
    ``result.patch`` is None. A model already calibrated by onnxcal may
    have another output calibrated (``output``); each has its own record. ``data`` and ``batch_size`` ...
    ``provider``: as for :func:`capture`; ``output`` ... ``fold``: see :class:`PatchOptions`;
    ``options`` are those of :func:`fit`. With ``report`` (a directory),
    every file of :func:`report` is written there too, with the
    verification, also when it failed. The model and the report are written
    together, only once everything is computed. ``drop_nonfinite`` leaves out
    samples whose logits hold NaN or Inf (a note says how many; by default
    they are refused); ``max_model_bytes`` as for :func:`capture`.
    ``decisions`` adds decision outputs beside the probabilities
    (docs/decisions.md), their thresholds chosen on the held-out rows (the
    map baked in is then the one fitted on the other rows) or on
    ``decision_data``, a separate labelled set (read with ``data``'s options).
    ``verify_rows``: the patched model is checked on at most this many
    rows (stratified by label, with the rows of largest absolute logit;
    :data:`VERIFY_ROWS` by default), or on every row with None; ``verify``
    always checks every row.
    """
    check_fit_options(options)
    check_columns(score_columns)
    verify_rows = check_verify_rows(verify_rows)
    spec = data_spec(data)
    deciding.check_request(decisions, decision_data is not None, options)
    to_decide = _Deciding(decisions, deciding.decision_spec(decisions, decision_data, spec), options)
    limit = model_byte_limit(max_model_bytes)
    external = _check_outputs(out, report, model_path, [spec, *filter(None, [to_decide.separate])], force, limit)
    run = run_options(batch_size, threads, optimization, provider)
    patching = PatchOptions(output, output_name, drop_logits, activation, compute_dtype, fold, output_holds,
                            score_columns)
    with graph.SourceHash(model_path) as hashing:  # hashed on a second thread while the model and data load
        model = graph.load_model(model_path, max_bytes=limit)
        _check_not_calibrated(model, model_path, output)
        graph.default_opset(model)  # before the capture: can the patch import the operators it adds?
        dataset = load_data(model, spec, batch_size=run.batch_size)
        sha = hashing.result()
    source = _Source(model, model_path, sha, dataset, run, progress)
    seen = _capture_finite(source, patching, drop_nonfinite)
    warn_nonfinite_inputs(seen.full, dataset.source)
    summary = deciding.baked_summary(_fit_captured(seen, options, progress), decisions, to_decide.separate is not None)
    patched, record, result, chosen = _patch_and_check(source, patching, seen, summary, to_decide, verify_rows)
    written = PatchResult(path=str(out), record=record) if result.passed else None
    files: dict[Path, bytes | Writer] = (
        graph.model_files(patched, out, external=external) if written is not None else {}
    )
    written_report = None
    if report is not None:
        told = progress or (lambda stage, done, total: None)
        told(WRITING, 0, 1)  # its plots take a second or more
        report_content, written_report = _report_files(report, out, external, patched, seen.cap, summary, result)
        files.update(report_content)
        told(WRITING, 1, 1)
    # the Mapping's key type is invariant: a dict keyed by Path is the str | PathLike keys it accepts
    atomic_write_files(cast("dict[str | os.PathLike[str], bytes | Writer]", files))
    return CalibrateResult(summary=summary, patch=written, verification=result, report=written_report,
                           decisions=chosen)
