"""``inspect``, ``capture`` and ``fit``: describe a model, run it over a labelled set, fit a calibration map."""

from __future__ import annotations

import os
import warnings
from collections.abc import Sequence
from dataclasses import replace
from typing import Any

import onnx

from .. import graph
from .. import reading as _reading
from .._limits import DEFAULT_MAX_MODEL_BYTES, MAX_BINS, check_bins_memory, check_range
from .._paths import check_output_path, one_command
from ..capture import CPU, Capture, ProgressFn, load_captures, nonfinite_logits
from ..errors import OnnxcalError, OnnxcalWarning, keyword_errors
from ..fit import T_MAX, T_MIN, FitOptions, FitSummary, save_fit, summarize
from ..graph import ModelInfo
from ..scaling import METHODS, MULTILABEL_MODES, PENALISED_METHODS
from .common import (
    DataSource,
    check_columns,
    data_spec,
    finite_capture,
    load_data,
    model_byte_limit,
    model_files,
    read_and_capture,
    run_options,
    warn_nonfinite_inputs,
    with_note,
)
from .models import models_in_memory


@keyword_errors
@models_in_memory("model_path")
def inspect(
    model_path: str | os.PathLike[str] | onnx.ModelProto, *, max_model_bytes: int | str = DEFAULT_MAX_MODEL_BYTES
) -> ModelInfo:
    """Describe a model: inputs, outputs, opset, class-score output, record.

    ``max_model_bytes`` (an int or a size such as ``"8GiB"``): larger model
    files, with their external data, are refused before they are read.
    """
    limit = model_byte_limit(max_model_bytes)
    model = graph.load_model(model_path, max_bytes=limit, count_external=False)
    external = tuple(str(f) for f in graph.external_data_files(model_path, max_bytes=limit))
    return graph.describe(model, model_path, graph.model_sha256(model_path), external)


@keyword_errors
@models_in_memory("model_path")
@one_command
def capture(
    model_path: str | os.PathLike[str] | onnx.ModelProto,
    data: DataSource,
    *,
    out: str | os.PathLike[str] | None = None,
    output: str | None = None,
    batch_size: int | None = None,
    threads: int = 0,
    optimization: str = "all",
    provider: str = CPU,
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
    spec = data_spec(data)
    limit = model_byte_limit(max_model_bytes)
    check_columns(score_columns)
    if out is not None:
        check_output_path(out, [*model_files(model_path, limit), *spec.files()], force=force)
    run = run_options(batch_size, threads, optimization, provider)
    model = graph.load_model(model_path, max_bytes=limit)
    dataset = load_data(model, spec, batch_size=run.batch_size)
    cap = read_and_capture(
        model, dataset, model_path, graph.model_sha256(model_path), output, output_holds, activation, run, progress,
        out, columns=score_columns,
    )
    warn_nonfinite_inputs(cap, cap.meta.data_source)
    if (bad := nonfinite_logits(cap)).count:
        warnings.warn(
            OnnxcalWarning(
                f"the logits of {bad.describe(len(cap.logits))} are NaN or Inf; 'onnxcal fit' refuses them "
                "unless --drop-nonfinite"
            ),
            stacklevel=2,
        )
    return cap


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


@keyword_errors
@one_command
def fit(
    source: Capture | str | os.PathLike[str] | Sequence[str | os.PathLike[str]],
    *,
    out: str | os.PathLike[str] | None = None,
    force: bool = False,
    options: FitOptions = FitOptions(),
    drop_nonfinite: bool = False,
    progress: ProgressFn | None = None,
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
    progress : callable, optional
        ``progress(stage, done, total)`` as the fit goes: ``"fitting"`` (its
        passes or steps) and ``"bootstrap"`` (replicates done, out of
        ``options.bootstrap``); see :func:`onnxcal.fit.summarize`.
    """
    check_fit_options(options)
    inputs = [] if isinstance(source, Capture) else _capture_paths(source)
    if out is not None:
        check_output_path(out, inputs, force=force)
    cap = source if isinstance(source, Capture) else load_captures(inputs)
    where = cap.meta.data_source if isinstance(source, Capture) else ", ".join(map(str, inputs))
    cap, dropped = finite_capture(cap, where, drop_nonfinite)
    check_bins_memory(options.n_bins, cap.logits.shape[1])
    summary = with_note(summarize_capture(cap, options, progress), dropped)
    if out is not None:
        save_fit(out, summary)
    return summary


def summarize_capture(cap: Capture, options: FitOptions, progress: ProgressFn | None = None) -> FitSummary:
    """``fit.summarize`` on a capture, with the checks that need what the fit does not know:
    how the capture read the logits (``reading.fit_read_logits``) and the search bounds of T.
    The rows of a sample (a per-position or per-pixel output) are split and resampled together."""
    fitted = summarize(cap.logits, cap.labels, cap.meta.to_dict(), options, groups=cap.groups(), progress=progress)
    summary = _reading.fit_read_logits(fitted)
    bound = _bound_warnings(summary.intervals)
    return replace(summary, warnings=(*summary.warnings, *bound)) if bound else summary


def _bound_warnings(intervals: dict[str, Any] | None) -> list[str]:
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
    low = any(p[0] <= T_MIN * (1 + 1e-6) for p in pairs)
    high = any(p[1] >= T_MAX * (1 - 1e-6) for p in pairs)
    out = []
    if low:
        out.append(
            f"the bootstrap interval of T reaches the search bound T = {T_MIN:g}: in some replicates the "
            "resampled fit part is (nearly) separated perfectly and the likelihood keeps rising as T shrinks, so "
            "the interval's lower end is the bound, not an estimate; use a larger or harder validation set"
        )
    if high:
        out.append(
            f"the bootstrap interval of T reaches the search bound T = {T_MAX:g}: in some replicates the "
            "scores carry almost no information about the labels, so the interval's upper end is the bound, "
            "not an estimate"
        )
    return out


def _capture_paths(source: str | os.PathLike[str] | Sequence[str | os.PathLike[str]]) -> list[Any]:
    return [source] if isinstance(source, (str, os.PathLike)) else list(source)
