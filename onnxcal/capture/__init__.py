"""Run a model with onnxruntime over a validation set and collect its class scores.

When the model already ends in a Softmax, LogSoftmax or Sigmoid, the tensor
captured is that activation's input (the logits), exposed as an extra output
of an in-memory copy; the model file is never changed.

Batching. Models with a dynamic batch dim run ``batch_size`` samples per
call. A model exported with a fixed batch dim B (often 1, on edge devices)
is first tried in a copy with that dim made symbolic: the copy runs the
first batch, and its output is compared with B-sample runs of the model as
exported. If they agree the capture runs batched; if not (a Reshape that
hard-codes the batch, say) it falls back to B samples per call with an
:class:`~onnxcal.errors.OnnxcalWarning`.

A capture file is an uncompressed ``.npz`` with ``logits`` (float32,
rows x k), ``labels`` (int64, one per row; or uint8, rows x k 0/1 for a
multi-label model), ``indices`` (int64, the row number of each
sample in the validation set; absent when the capture holds every row in
order) and ``meta`` (a JSON string, see
:class:`CaptureMeta`). :func:`capture` with ``out`` streams the logits into
the file batch by batch, so memory holds one batch whatever the set's size;
the file is written under a temporary name and renamed when complete.

The modules, in the order a capture uses them: ``session`` (onnxruntime,
:class:`RunOptions`, a session, the wording of run-time failures), ``plan``
(:func:`plan_run`: the batch plan, freeing a fixed batch dim; one batch run),
``blocks`` (:func:`run_batches`: blocks of batches, the automatic batch
size; :class:`Pass`, a pass read in parts; :func:`run_model`), ``nonfinite`` (NaN and Inf in inputs and logits),
``rows`` (score rows and the labels lined up with them), ``writer`` (where
rows go: memory or the streamed file; :func:`save_capture`), ``scores``
(:func:`capture`, :func:`capture_scores`, :func:`probe`), ``reader``
(:func:`load_capture`, :func:`merge_captures`, :func:`load_captures`) and
``result`` (:class:`Capture`, :class:`CaptureMeta`, :class:`Nonfinite`).
"""

from __future__ import annotations

from .blocks import (
    AUTO_BATCH_BYTES,
    AUTO_BATCH_ROWS,
    BLOCK_BYTES,
    OVERHEAD,
    RELEASE_BYTES,
    Pass,
    ProgressFn,
    run_batches,
    run_model,
    run_plan,
)
from .nonfinite import InputWatch, finite_mask, nonfinite_logits, nonfinite_rows, without_nonfinite
from .plan import RunPlan, check_input_memory, free_batch_dim, plan_run, run_batch
from .reader import load_capture, load_captures, merge_captures
from .result import Capture, CaptureMeta, Nonfinite
from .rows import as_rows, label_rows, log_probabilities, output_rows
from .scores import Probe, capture, capture_scores, probe
from .session import (
    CPU,
    DEFAULT_BATCH,
    MAX_BATCH,
    OPTIMIZATION_LEVELS,
    RunOptions,
    check_run_options,
    make_session,
    max_threads,
    onnxruntime,
    runtime_failure,
)
from .writer import save_capture

__all__ = [
    "AUTO_BATCH_BYTES",
    "AUTO_BATCH_ROWS",
    "BLOCK_BYTES",
    "CPU",
    "DEFAULT_BATCH",
    "MAX_BATCH",
    "OPTIMIZATION_LEVELS",
    "OVERHEAD",
    "RELEASE_BYTES",
    "Capture",
    "CaptureMeta",
    "InputWatch",
    "Nonfinite",
    "Pass",
    "Probe",
    "ProgressFn",
    "RunOptions",
    "RunPlan",
    "as_rows",
    "capture",
    "capture_scores",
    "check_input_memory",
    "check_run_options",
    "finite_mask",
    "free_batch_dim",
    "label_rows",
    "load_capture",
    "load_captures",
    "log_probabilities",
    "make_session",
    "max_threads",
    "merge_captures",
    "nonfinite_logits",
    "nonfinite_rows",
    "onnxruntime",
    "output_rows",
    "plan_run",
    "probe",
    "run_batch",
    "run_batches",
    "run_model",
    "run_plan",
    "runtime_failure",
    "save_capture",
    "without_nonfinite",
]
