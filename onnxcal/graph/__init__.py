"""ONNX graph reading and surgery.

Plain functions over ``onnx.ModelProto``. A model passed in is never changed:
rewrites work on a copy and return it, checked with
``onnx.checker.check_model(full_check=True)``. ``docs/graph.md`` explains how
the class scores are found and rewritten, with the ONNX operator spec
references.

The modules show the job: ``io`` (load with checked external data, hash, save),
``external`` (weights left in their files: read one tensor, hand them to onnxruntime),
``find`` (the score finder: ``match`` is a small declarative matcher,
``patterns`` the spellings of an activation, ``passes`` the layout ops and
post-processing walked through, ``post`` what post-processing does),
``surgery`` (unique names, the scalings, the logits recipes), ``rewrite``
(the rewrites, patch, unpatch, expose), ``fold`` and ``record``.

Finding the scores (``find_scores``): walk back from the chosen output
through layout ops (Identity, Cast, Reshape, Flatten, Squeeze, Unsqueeze,
Transpose, tracking the class axis) and post-processing that keeps the
probabilities meaningful (a constant factor, a clip, one class taken, a
quantization round trip, an L1 normalisation, ZipMap), trying at every
tensor the spellings of an activation in ``patterns.SPELLINGS``.

The rewrites (one function each), all built on ``rewrite._Surgery``, which gives
unique deterministic names and notes every change so it can be undone:

* ``_insert_before_activation``: the scores pass through a Softmax,
  LogSoftmax or Sigmoid; put the scaling in front of it (drop-in).
* ``_append_activation``: raw logits; add the scaling and a Softmax (per
  class axis, also below opset 13) or Sigmoid as a new output.
* ``_rewrite_ml``: probabilities from an ai.onnx.ml classifier; replace
  them by softmax(scale(z)), z its raw scores (``post_transform`` NONE) when
  they reproduce p, else log max(p, tiny). Its label output is kept as the
  converter wrote it: temperature scaling cannot change the argmax, and a
  label that disagreed with the argmax before (an SVM with Platt
  probabilities) must not change.
* ``_fold``: fold the scaling (w * z + b per class) into a Gemm /
  MatMul(+Add)'s weight and bias instead of adding nodes;
  ``fold_matrix.fold_matrix`` folds matrix scaling (W z + b) there, keeping
  the original weight and bias in the record for ``unpatch``.

What goes in front of the activation is one function of type ``ScaleFn``,
made by ``scale_fn`` from the fitted ``Scaling``: ``divide_by_temperature``
(temperature scaling: ``Div(scores, T)``, T a scalar or one per label) or
``multiply_add`` (vector and Platt scaling: ``Add(Mul(scores, w), b)``).
Re-patching a patched model first undoes the previous patch (``unpatch``),
so patches never stack.

``decide.add_decisions`` adds decision outputs (``accept``, ``class_set``,
``class_set_size``) beside a patched model's calibrated probabilities.

The calibration record is JSON in ``metadata_props`` under ``RECORD_KEY``.
"""

from . import post
from .describe import ModelInfo, describe, describe_site
from .expose import at_identity, expose, expose_scores
from .external import _model_tensors as _model_tensors
from .external import check_model, for_onnxruntime, tensor_array
from .find import HOLDS, Branch, ScoreSite, find_scores, fit_kind, read_as
from .fold import FoldedValues, folded_values
from .fold_matrix import MatrixFoldError, folds_matrix, matrix_fold_error
from .io import (
    SourceHash,
    external_data_files,
    external_data_path,
    load_model,
    model_files,
    model_sha256,
    save_model,
    saved_sha256,
)
from .mapped import identity_unavailable, recorded_values
from .nested import parse_columns
from .record import (
    PENDING_SHA256,
    Record,
    check_record,
    fill_source_sha256,
    parameter_values,
    read_record,
    read_records,
    temperature_dtype,
    temperature_value,
)
from .record import _write_record as _write_record
from .record import _write_records as _write_records
from .rewrite import (
    check_temperature,
    find_recorded,
    patch,
    unpatch,
)
from .rider import Rider, identity_rider
from .surgery import (
    ScaleFn,
    default_opset,
    divide_by_temperature,
    multiply_add,
    scale_fn,
)
from .tensors import (
    ACTIVATION_CHOICES,
    ACTIVATIONS,
    COMPUTE_DTYPES,
    DEFAULT_OUTPUT_NAME,
    EXTERNAL_THRESHOLD,
    ML_DOMAIN,
    RECORD_FORMAT,
    RECORD_KEY,
    TensorSpec,
    np_dtype,
    opset_version,
    tensor_spec,
    unique_name,
)
from .tensors import _attr as _attr
from .tensors import _initializer as _initializer

__all__ = [
    "ACTIVATIONS", "ACTIVATION_CHOICES", "COMPUTE_DTYPES", "DEFAULT_OUTPUT_NAME", "EXTERNAL_THRESHOLD", "HOLDS",
    "ML_DOMAIN", "PENDING_SHA256", "RECORD_FORMAT", "RECORD_KEY", "Branch", "FoldedValues", "ModelInfo", "Record",
    "ScaleFn", "ScoreSite", "SourceHash", "TensorSpec", "Rider", "at_identity", "check_model", "check_record",
    "check_temperature", "default_opset",
    "describe", "describe_site", "divide_by_temperature", "expose", "expose_scores", "external_data_files",
    "identity_rider",
    "external_data_path", "fill_source_sha256", "find_recorded", "find_scores", "fit_kind", "folded_values",
    "folds_matrix",
    "for_onnxruntime", "identity_unavailable", "matrix_fold_error", "MatrixFoldError",
    "load_model", "model_files", "model_sha256", "multiply_add", "np_dtype", "opset_version", "parameter_values",
    "parse_columns", "patch", "post", "read_as", "read_record", "read_records", "recorded_values", "save_model",
    "saved_sha256",
    "scale_fn", "temperature_dtype", "temperature_value", "tensor_array", "tensor_spec", "unique_name", "unpatch",
]
