"""``report``: the report files on a calibration (HTML, Markdown, JSON, plots)."""

from __future__ import annotations

import os
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, cast

import onnx
from numpy.typing import ArrayLike

from .. import graph
from .._files import Writer, atomic_write_files
from .._limits import DEFAULT_MAX_MODEL_BYTES, MAX_BINS, check_bins_memory, check_range
from .._numeric import check_in_dtype, max_abs
from .._paths import check_not_input, check_output_path, check_writable, one_command, require_file
from ..capture import Capture, ProgressFn, load_captures
from ..errors import OnnxcalError, keyword_errors
from ..fit import FitSummary, load_fit, summary_from_dict
from ..graph import Record
from ..l1_sigmoid import capture_kind
from ..metrics import DEFAULT_BINS
from ..report import FORMATS, ReportResult
from ..report import build as build_report
from ..report import outputs as report_outputs
from ..report import render as render_report
from ..scaling import Scaling, check_scaling
from ..verify import record_check
from .common import as_paths, finite_capture, model_byte_limit, model_files
from .models import models_in_memory


def _check_formats(formats: str | Sequence[str]) -> tuple[str, ...]:
    if isinstance(formats, str):
        formats = [f.strip() for f in formats.split(",") if f.strip()]
    bad = [f for f in formats if f not in FORMATS]
    if bad or not formats:
        raise OnnxcalError(
            f"--format {','.join(formats)!r} is not a comma-separated list of: {', '.join(FORMATS)}",
            "e.g. --format html,md",
        )
    return tuple(f for f in FORMATS if f in formats)


def report_targets(
    directory: str | os.PathLike[str], formats: Sequence[str], inputs: Sequence[str | os.PathLike[str]], force: bool,
    option: str,
) -> list[Path]:
    """The report's files, checked before any work; the directory may not exist yet."""
    d = check_not_input(directory, inputs, option)
    if d.exists() and not d.is_dir():
        raise OnnxcalError(f"{option} '{d}' is a file, not a directory", "give a directory for the report")
    parent = d.parent if str(d.parent) else Path(".")
    if not d.exists() and not parent.is_dir():
        raise OnnxcalError(f"the directory '{parent}' that would hold {option} '{d}' does not exist", "create it first")
    check_writable(d if d.is_dir() else parent, option)
    targets = [d / name for name in report_outputs(formats)]
    if d.is_dir():
        for target in targets:
            check_output_path(target, inputs, force=force, option=f"{option} file")
    return targets


def report_files(
    directory: str | os.PathLike[str], content: dict[str, Any], formats: Sequence[str]
) -> tuple[dict[Path, bytes], ReportResult]:
    """Every file of a report, rendered in memory, and the result that describes them."""
    d = Path(directory)
    files = {d / name: data for name, data in render_report(content, formats).items()}
    return files, ReportResult(directory=str(d), files=tuple(map(str, files)), content=content)


def _write_report(directory: str | os.PathLike[str], content: dict[str, Any], formats: Sequence[str]) -> ReportResult:
    """Render every file in memory, then write them together (a new directory is removed again if writing fails)."""
    files, result = report_files(directory, content, formats)
    # the Mapping's key type is invariant: a dict keyed by Path is the str | PathLike keys it accepts
    atomic_write_files(cast("dict[str | os.PathLike[str], bytes | Writer]", files))
    return result


def _class_names(value: str | os.PathLike[str] | Sequence[str] | None, k: int) -> list[str] | None:
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


def capture_names(cap: Capture) -> list[str] | None:
    """The class names a capture recorded (``--classes``, image folders), if they fit its logits."""
    names = cap.meta.class_names
    k = cap.logits.shape[1]
    if not names:
        return None
    if k == 1 and len(names) == 2:  # binary: (negative, positive); the logit is the positive class's
        return list(names[1:])
    return list(names) if len(names) == k else None


def _fit_from_record(record: Record, model_path: str | os.PathLike[str]) -> FitSummary | None:
    if "metrics" not in record.fit:  # patched with a given T: no fit to show
        return None
    try:
        return summary_from_dict(record.fit)
    except (OnnxcalError, KeyError, TypeError, ValueError) as exc:
        raise OnnxcalError(
            f"the fit summary in the calibration record of '{model_path}' is damaged ({exc})",
            "patch the original model again with 'onnxcal patch --fit FIT.json'",
        ) from exc


def _check_report_scaling(scaling: Scaling, cap: Capture, source_sha: str | None, what: str) -> None:
    kind = capture_kind(cap.logits.shape[1], cap.labels.ndim, cap.meta.fit_as)
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


@dataclass(frozen=True)
class _Calibration:
    """What a report is on: the parameters, their fit (if any), the model they were made for, and their name."""

    scaling: Scaling
    summary: FitSummary | None
    source_sha: str | None  # the sha256 of the model they were made for, when known
    what: str  # how messages name them
    calibrated: dict[str, Any] | None = None  # the patched model given with --model: name, path, sha256
    decisions: dict[str, Any] | None = None  # its record's decisions section (docs/decisions.md)


def _calibration_of(
    temperature: float | None, fit: FitSummary | str | os.PathLike[str] | None, model: str | os.PathLike[str] | None,
    cap: Capture, limit: int,
) -> _Calibration:
    """The calibration given by hand (``temperature``), by a fit, or by a patched model's record."""
    summary: FitSummary | None  # the fit's, or the record's (None when patched with a given T)
    if temperature is not None:
        kind = capture_kind(cap.logits.shape[1], cap.labels.ndim, cap.meta.fit_as)
        return _Calibration(Scaling.of_temperature(graph.check_temperature(temperature), kind), None, None,
                            "the temperature")
    if fit is not None:
        summary = fit if isinstance(fit, FitSummary) else load_fit(fit)
        return _Calibration(summary.scaling, summary, summary.capture.get("model_sha256"), "the fit")
    assert model is not None  # report() checked that exactly one of temperature, fit and model is given
    record = _record_of(model, limit)
    summary = _fit_from_record(record, model)
    calibrated = {"name": Path(model).name, "path": str(model), "sha256": graph.model_sha256(model)}
    return _Calibration(record.scaling, summary, record.source_sha256, f"the calibration in '{model}'", calibrated,
                        record.decisions)


@keyword_errors
@models_in_memory("model")
@one_command
def report(
    captures: Capture | str | os.PathLike[str] | Sequence[str | os.PathLike[str]],
    out: str | os.PathLike[str],
    *,
    temperature: float | None = None,
    fit: FitSummary | str | os.PathLike[str] | None = None,
    model: str | os.PathLike[str] | onnx.ModelProto | None = None,
    formats: str | Sequence[str] = FORMATS,
    class_names: str | os.PathLike[str] | Sequence[str] | None = None,
    n_bins: int | None = None,
    force: bool = False,
    drop_nonfinite: bool = False,
    max_model_bytes: int | str = DEFAULT_MAX_MODEL_BYTES,
    progress: ProgressFn | None = None,
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
    progress : callable, optional
        ``progress("writing the report", done, 1)`` before and after the
        figures and plots are computed and written (a second or more).

    Returns
    -------
    ReportResult
    """
    if sum(x is not None for x in (temperature, fit, model)) != 1:
        raise OnnxcalError("give exactly one of --temperature, --fit and --model")
    if n_bins is not None:
        check_range(n_bins, 2, MAX_BINS, "--bins", "a number of bins")
    formats = _check_formats(formats)
    limit = model_byte_limit(max_model_bytes)
    capture_paths = [] if isinstance(captures, Capture) else as_paths(captures)
    inputs = [*capture_paths, *[p for p in (fit, class_names) if isinstance(p, (str, os.PathLike))]]
    inputs += model_files(model, limit) if model is not None else []
    report_targets(out, formats, inputs, force, "--out")
    cap = captures if isinstance(captures, Capture) else load_captures(capture_paths)
    cap, dropped = finite_capture(cap, ", ".join(map(str, capture_paths)) or cap.meta.data_source, drop_nonfinite)
    cal = _calibration_of(temperature, fit, model, cap, limit)
    _check_report_scaling(cal.scaling, cap, cal.source_sha, cal.what)
    check_in_dtype(cal.scaling, "float64", largest_logit=max_abs(cap.logits), computes="the report computes in",
                   hint="check the parameters")
    summary = cal.summary
    check_bins_memory(n_bins or (summary.options.n_bins if summary is not None else DEFAULT_BINS), cap.logits.shape[1])
    names = _class_names(class_names, cap.logits.shape[1]) or capture_names(cap)
    told = progress or (lambda stage, done, total: None)
    told(WRITING, 0, 1)
    content = build_report(
        cap, cal.scaling, summary=summary, class_names=names, n_bins=n_bins, calibrated=cal.calibrated,
        decisions=cal.decisions,
    )
    if dropped is not None:
        content["notes"] = [*content.get("notes", []), dropped]
    written = _write_report(out, content, formats)
    told(WRITING, 1, 1)
    return written


WRITING = "writing the report"
"""The stage ``progress`` is told about while the report is computed and written."""


def _record_of(model_path: str | os.PathLike[str], limit: int) -> Record:
    """The calibration record of a patched model, checked to describe its graph and its parameters.

    For a folded model the parameters cannot be read back without the
    original (``onnxcal verify --original`` checks them).
    """
    model = graph.load_model(model_path, max_bytes=limit, count_external=False)
    record = graph.read_record(model)
    if record is None:
        raise OnnxcalError(
            f"'{model_path}' has no onnxcal calibration record",
            "give a model written by 'onnxcal patch' or 'calibrate'",
        )
    graph.check_record(model, record, f"'{model_path}'")
    if not record.folded:
        check = record_check(
            record.parameters,
            # dict is invariant in its values: arrays are the ArrayLike record_check reads
            cast("dict[str, ArrayLike] | None", graph.parameter_values(model, record)),
            graph.temperature_dtype(model, record),
        )
        if not check.passed:
            raise OnnxcalError(
                f"the calibration record of '{model_path}' does not match the parameters in its graph ({check.detail})",
                f"run 'onnxcal verify {model_path}' to see what differs, and patch the original model again",
            )
    return record
