"""``patch``: write a copy of the model that outputs calibrated probabilities."""

from __future__ import annotations

import os
from collections.abc import Sequence
from dataclasses import dataclass, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any, cast

import numpy as np
import onnx

from .. import graph
from .._limits import DEFAULT_MAX_MODEL_BYTES
from .._numeric import check_in_dtype
from .._paths import one_command
from ..decisions.plan import NO_DECISIONS, DecisionOptions, Decisions, check_decision_options
from ..errors import OnnxcalError, keyword_errors
from ..graph import Record
from ..scaling import Scaling
from .common import (
    check_columns,
    check_model_outputs,
    file_only_sha256,
    model_byte_limit,
)
from .models import models_in_memory

if TYPE_CHECKING:  # the fit, data and decision stages are imported when the options ask for them
    from ..data import DataSpec
    from ..fit import FitSummary


@dataclass(frozen=True)
class PatchResult:
    """A written patched model and its calibration record."""

    path: str
    record: Record
    decisions: Decisions | None = None


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
        MatMul(+Add) instead of adding nodes (temperature, vector, Platt
        and matrix scaling; refused, with the reason, for the maps that are
        not linear in the logits).
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

    def patch(self, model: onnx.ModelProto, calibration: float | Scaling, *, sha: str, path: str | os.PathLike[str],
              fit: dict[str, Any], reading: dict[str, Any] | None = None,
              fitted_on: str = "", largest_logit: float | None = None) -> onnx.ModelProto:
        """``graph.patch`` with these options, its parameters checked against the dtype the graph
        computes them in (and, given ``largest_logit``, against the logits seen; see ``_numeric``).
        ``reading`` says how a capture read the model."""
        with np.errstate(over="ignore", under="ignore", invalid="ignore", divide="ignore"):  # checked below
            patched = self._patch(model, calibration, sha=sha, path=path, fit=fit, reading=reading, fitted_on=fitted_on)
        for record in graph.read_records(patched):
            dtype = record.compute_dtype or graph.temperature_dtype(patched, record) or "float32"
            check_in_dtype(record.scaling, dtype, largest_logit=largest_logit)
        return patched

    def _patch(self, model: onnx.ModelProto, calibration: float | Scaling, *, sha: str, path: str | os.PathLike[str],
               fit: dict[str, Any], reading: dict[str, Any] | None,
               fitted_on: str) -> onnx.ModelProto:
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


def _portable(fit: dict[str, Any]) -> dict[str, Any]:
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


def _resolve_scaling(
    temperature: float | None, fit_source: FitSummary | str | os.PathLike[str] | None
) -> tuple[float | Scaling, dict[str, Any]]:
    if (temperature is None) == (fit_source is None):
        raise OnnxcalError("give exactly one of --temperature and --fit")
    if temperature is not None:
        return graph.check_temperature(temperature), {"method": "temperature", "given": True}
    assert fit_source is not None  # exactly one of the two is given (checked above)
    from ..fit import FitSummary, load_fit

    summary = fit_source if isinstance(fit_source, FitSummary) else load_fit(fit_source)
    return summary.scaling, summary.to_dict()


@keyword_errors
@models_in_memory("model_path")
@one_command
def patch(
    model_path: str | os.PathLike[str] | onnx.ModelProto,
    out: str | os.PathLike[str],
    *,
    temperature: float | None = None,
    fit: FitSummary | str | os.PathLike[str] | None = None,
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
    decisions: DecisionOptions = NO_DECISIONS,
    decision_data: str | os.PathLike[str] | DataSpec | None = None,
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
    decisions, decision_data
        Decision outputs beside the calibrated probabilities (``accept``,
        ``class_set``, ``class_set_size``; docs/decisions.md), their
        thresholds chosen on ``decision_data``, a labelled set the map was
        not fitted on, run through the patched model (required with them).
    """
    limit = model_byte_limit(max_model_bytes)
    check_columns(score_columns)
    separate = _decision_set(decisions, decision_data)
    inputs = [model_path] + ([fit] if isinstance(fit, (str, os.PathLike)) else [])
    inputs += separate.files() if separate is not None else []
    external = check_model_outputs(out, inputs, model_path, force, limit)
    calibration, fit_dict = _resolve_scaling(temperature, fit)
    if fitted_on_twin and fit is None:
        raise OnnxcalError("--fitted-on-twin applies to --fit (a fit made on another build of the model)")
    model = graph.load_model(model_path, max_bytes=limit, count_external=False)
    with graph.SourceHash(model_path) as sha:  # hashed on a second thread while the weights are copied
        return _patch_and_save(model, model_path, out, sha, calibration, fit_dict, fit, fitted_on_twin, external,
                               PatchOptions(output, output_name, drop_logits, activation, compute_dtype, fold,
                                            output_holds, score_columns), separate, decisions)


def _patch_and_save(
    model: onnx.ModelProto, model_path: str | os.PathLike[str], out: str | os.PathLike[str], sha: graph.SourceHash,
    calibration: float | Scaling, fit_dict: dict[str, Any], fit: FitSummary | str | os.PathLike[str] | None,
    fitted_on_twin: bool, external: bool, patching: PatchOptions, separate: DataSpec | None,
    decisions: DecisionOptions,
) -> PatchResult:
    """``patch`` once the model is loaded, while ``sha`` is computed: the record holds
    ``PENDING_SHA256`` until the weights are copied, then the hash (waited for only here, or
    earlier by ``_provenance``, before anything is written, when the fit's model must be compared)."""
    records = graph.read_records(model)
    for previous in records:  # re-patching undoes a head: its record must fit the graph
        graph.check_record(model, previous, f"'{model_path}'")
    fitted_on = _provenance(fit_dict, fit, model_path, sha, records, fitted_on_twin)
    meta = cast("dict[str, Any]", fit_dict.get("capture")) if isinstance(fit_dict.get("capture"), dict) else {}
    if patching.output is None and meta.get("output") in {o.name for o in model.graph.output} and not records:
        patching = replace(patching, output=meta["output"])
    reading = None
    if patching.output_holds is None and meta:
        from .. import reading as _reading

        reading = _reading.patch_reading(meta)
    patched = patching.patch(model, calibration, sha=graph.PENDING_SHA256, path=model_path, fit=fit_dict,
                             reading=reading, fitted_on=fitted_on)
    chosen = None
    if separate is not None:
        from . import deciding

        patched, chosen = deciding.for_patch(patched, patching.output, separate, decisions)

    def fill(message: onnx.ModelProto) -> None:
        graph.fill_source_sha256(message, sha.result())

    graph.save_model(patched, out, external=external, finish=fill)
    fill(patched)
    record = graph.read_record(patched, patching.output)
    assert record is not None  # the patch just wrote the record of this output (or, without output, the last one)
    return PatchResult(path=str(out), record=record, decisions=chosen)


def _decision_set(decisions: DecisionOptions, decision_data: str | os.PathLike[str] | DataSpec | None
                  ) -> DataSpec | None:
    """The labelled set to choose decision thresholds on (None: no decision outputs), checked before any work.

    The decision stage (onnxruntime, the data loaders) is imported only when decisions are asked for.
    """
    if not decisions.wanted:
        check_decision_options(decisions)  # deciding.check_request's whole check when none are wanted
        return None
    from . import deciding

    deciding.check_request(decisions, decision_data is not None, None)
    return deciding.decision_spec(decisions, decision_data, None)


def _provenance(
    fit_dict: dict[str, Any], fit: FitSummary | str | os.PathLike[str] | None, model_path: str | os.PathLike[str],
    sha: graph.SourceHash, records: Sequence[Record], twin: bool,
) -> str:
    """The sha256 of the twin the fit was made on ("" for this model); a fit of another model is refused.

    The fit's capture names the model it ran (sha256). It may be this file,
    or, for a model already patched, the original the records name. The
    model's own hash is waited for only when the others do not match.
    """
    meta = cast("dict[str, Any]", fit_dict.get("capture")) if isinstance(fit_dict.get("capture"), dict) else {}
    fitted = cast("str", meta.get("model_sha256")) if isinstance(meta.get("model_sha256"), str) else None
    if fit is None or not fitted:
        return ""
    if fitted in {file_only_sha256(model_path), *(r.source_sha256 for r in records)} or fitted == sha.result():
        return ""
    if not twin:
        where = f"'{fit}'" if isinstance(fit, (str, os.PathLike)) else "the fit"
        raise OnnxcalError(
            f"{where} was fitted on the model with sha256 {fitted[:12]}..., not on '{model_path}' "
            f"(sha256 {sha.result()[:12]}...)",
            "patch the model the fit was made on, or add --fitted-on-twin if this model is a build of it "
            "(its float16 or quantized twin)",
        )
    return fitted
