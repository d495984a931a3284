"""What the commands share: the validation set and how to run the model over it, the size limit of
model files, the checks of output paths, the non-finite rows of a capture.
"""

from __future__ import annotations

import os
import warnings
from collections.abc import Iterable, Mapping
from dataclasses import replace
from pathlib import Path
from typing import TYPE_CHECKING, Any, cast

import onnx

from .. import graph
from .._limits import check_memory, parse_size
from .._paths import check_output_path, sha256_file
from ..data import Dataset, DataSpec, check_selection, load_dataset
from ..errors import OnnxcalError, OnnxcalWarning

if TYPE_CHECKING:  # the capture, fit and reading stages are imported where they run: patch needs none of them
    from ..capture import Capture, ProgressFn, RunOptions, RunPlan
    from ..fit import FitSummary


def model_byte_limit(max_model_bytes: int | str) -> int:
    return parse_size(max_model_bytes, "--max-model-bytes")


def finite_capture(cap: Capture, source: str, drop: bool) -> tuple[Capture, str | None]:
    """``cap`` when its logits are finite; else refused, or (``drop``) without those samples and a note."""
    from ..capture import nonfinite_logits, without_nonfinite

    bad = nonfinite_logits(cap)
    if not bad.count:
        return cap, None
    what = f"the logits in '{source}' contain NaN or Inf in {bad.describe(len(cap.logits))}"
    if bad.count == len(cap.logits):
        raise OnnxcalError(f"{what}: every row, so nothing is left to work on", "check the model and its inputs")
    if not drop:
        raise OnnxcalError(what,
                           "check the model and the inputs of those rows, or pass --drop-nonfinite to leave them out")
    rows = len(cap.logits) - bad.count
    check_memory(rows * cap.logits.shape[1] * 4, f"a copy of the logits of the {rows} rows kept", "use --limit")
    kept = without_nonfinite(cap)
    return kept, f"dropped {len(cap.logits) - len(kept.logits)} rows: {what}"


def warn_nonfinite_inputs(cap: Capture, source: str) -> None:
    for name, bad in cap.nonfinite_inputs.items():
        warnings.warn(
            OnnxcalWarning(f"input '{name}' of '{source}' holds NaN or Inf in {bad.describe(cap.meta.n)}"),
            stacklevel=3,
        )


def model_files(model_path: str | os.PathLike[str], limit: int) -> list[Any]:
    """A model file and its external data files: inputs that no output may be."""
    return [model_path, *graph.external_data_files(model_path, max_bytes=limit)]


DataSource = str | os.PathLike[str] | DataSpec | Mapping[str, Any] | tuple[Any, Any]
"""A validation set: a path (``.npz``, ``.npy``, ``.csv`` or an image folder), a DataSpec, a
mapping of model input name to array (with the labels under ``"labels"``), or an
``(inputs, labels)`` pair (inputs: such a mapping, or one array for a one-input model)."""


def data_spec(data: DataSource) -> DataSpec:
    """``data`` as a DataSpec; arrays in memory are checked later, as an ``.npz`` of them would be."""
    if isinstance(data, DataSpec):
        spec = data
    elif isinstance(data, (str, os.PathLike)):
        spec = DataSpec(path=data)
    elif isinstance(data, Mapping):
        # a mapping of input name to array: its str keys are a case of DataSpec's str | None keys
        arrays = cast("dict[str | None, object]", dict(data))
        spec = DataSpec(arrays=arrays)
    elif isinstance(data, tuple) and len(data) == 2:
        spec = DataSpec(arrays=data)  # (inputs, labels): data.arrays.memory_arrays reads it
    else:
        raise OnnxcalError(
            f"a validation set cannot be a {type(data).__name__}",
            "give a path, a DataSpec, a mapping of input name to array (labels under 'labels'), "
            "or an (inputs, labels) pair",
        )
    check_selection(spec.selection)  # before any work
    return spec


def load_data(
    model: onnx.ModelProto, data: DataSource, require_labels: bool = True, batch_size: int | None = None
) -> Dataset:
    """Load the set for ``model``'s inputs (checked against them).

    A model whose declared input shapes need more memory per batch than is
    available is refused first, before any data file is opened.
    """
    from ..capture import DEFAULT_BATCH, check_input_memory

    check_input_memory(model, batch_size or DEFAULT_BATCH)
    init = {i.name for i in model.graph.initializer}
    specs = [graph.tensor_spec(vi) for vi in model.graph.input if vi.name not in init]
    return load_dataset(data_spec(data), specs, require_labels=require_labels)


def run_options(batch_size: int | None, threads: int, optimization: str, provider: str) -> RunOptions:
    from ..capture import RunOptions, check_run_options

    return check_run_options(RunOptions(batch_size, threads, optimization, provider))


def check_columns(score_columns: str | None) -> None:
    if score_columns is not None:
        graph.parse_columns(score_columns)


def read_and_capture(
    model: onnx.ModelProto, dataset: Dataset, model_path: str | os.PathLike[str], sha: str, output: str | None,
    holds: str | None, activation: str | None, run: RunOptions, progress: ProgressFn | None,
    out: str | os.PathLike[str] | None = None, columns: str | None = None,
) -> Capture:
    """Read the model (checked on the first rows), check the labels against it, capture its logits."""
    return capture_read(model, dataset, model_path, sha, output, holds, activation, run, progress, out, columns)[0]


def capture_read(
    model: onnx.ModelProto, dataset: Dataset, model_path: str | os.PathLike[str], sha: str, output: str | None,
    holds: str | None, activation: str | None, run: RunOptions, progress: ProgressFn | None,
    out: str | os.PathLike[str] | None = None, columns: str | None = None,
) -> tuple[Capture, RunPlan | None]:
    """:func:`read_and_capture`, and the session that ran the original's copy when it gives the original's
    outputs unchanged (no head inside subgraphs: the copy only adds nodes), for the identity check.

    The rows the reading was checked on are the capture's first rows, run once.
    """
    from .. import reading as _reading
    from ..capture import DEFAULT_BATCH, check_input_memory
    from ..capture import capture as capture_logits

    if dataset.labels is None:
        raise OnnxcalError(f"'{dataset.source}' has no labels", "add a 'labels' array")
    check_input_memory(model, run.batch_size or DEFAULT_BATCH, dataset)
    read = _reading.read_model(model, dataset, output=output, holds=holds, activation=activation, run=run,
                               score_columns=columns)
    try:
        site = read.site
        kind = graph.fit_kind(site, activation)
        if kind != "sigmoid":  # class labels (softmax, sigmoid-l1)
            _reading.check_label_coverage(dataset.labels, read.k, site, dataset.class_names, dataset.source)
        cap = capture_logits(
            model, dataset, model_path=Path(model_path).name, model_sha256=sha, options=run, progress=progress,
            activation=activation, out=out, site=site, check=_reading.capture_check(site, kind), head=read.head,
        )
    finally:
        read.close()
    _reading.warn_saturated(site, cap.stats)
    original = read.head.plan if read.head is not None and not site.branches else None
    return replace(cap, notes=read.notes), original


def with_note(summary: FitSummary, note: str | None) -> FitSummary:
    return summary if note is None else replace(summary, notes=(*summary.notes, note))


def as_paths(value: str | os.PathLike[str] | Iterable[str | os.PathLike[str]] | None) -> list[Any]:
    if value is None:
        return []
    if isinstance(value, (str, os.PathLike)):
        return [value]
    return list(value)


def file_only_sha256(model_path: str | os.PathLike[str]) -> str | None:
    """The sha256 of the .onnx file alone, for a model with external data (None without).

    onnxcal before external data were hashed (docs/graph.md, "What the source
    hash covers") recorded this in captures and records; they are still read.
    """
    return sha256_file(model_path) if graph.external_data_files(model_path) else None


def check_model_outputs(
    out: str | os.PathLike[str], inputs: list[Any], model_path: str | os.PathLike[str], force: bool, limit: int
) -> bool:
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
