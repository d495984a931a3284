"""The defaults and choices the command line shows in its help, as plain values.

``onnxcal --help`` must not import the stages (onnx, numpy, scipy take
seconds to import on a busy machine), so the option declarations read their
defaults and choices from here. Each value is the library's own constant,
written out; ``tests/cli/test_cli_startup.py`` checks that they are equal.
"""

from __future__ import annotations

DEFAULT_BATCH = 64  # onnxcal.capture.DEFAULT_BATCH
CPU = "CPUExecutionProvider"  # onnxcal.capture.CPU
OPTIMIZATION_LEVELS = ("disable", "basic", "extended", "all")  # onnxcal.capture.OPTIMIZATION_LEVELS
IMAGE_OPTIONS = (  # onnxcal.data.IMAGE_OPTIONS
    "resize", "crop", "scale", "mean", "std", "channel_order", "layout", "dtype", "interpolation",
)
INTERPOLATIONS = ("nearest", "bilinear", "bicubic", "lanczos")  # onnxcal.data.preprocess._INTERPOLATION
DEFAULT_OUTPUT_NAME = "probabilities"  # onnxcal.graph.DEFAULT_OUTPUT_NAME
DEFAULT_BINS = 15  # onnxcal.metrics.DEFAULT_BINS
FORMATS = ("html", "md", "json", "png")  # onnxcal.report.FORMATS
DEFAULT_LATENCY_RUNS = 100  # onnxcal.api.DEFAULT_LATENCY_RUNS
VERIFY_ROWS = 256  # onnxcal.api.VERIFY_ROWS
METHODS = (  # onnxcal.scaling.METHODS
    "temperature", "vector", "platt", "matrix", "dirichlet", "beta", "isotonic", "histogram", "ensemble-temperature",
    "ovr-platt",
)
AUTO = "auto"  # onnxcal.fit.summary.AUTO
MULTILABEL_MODES = ("shared", "per-label")  # onnxcal.scaling.MULTILABEL_MODES
HOLDS = ("logits", "probabilities", "log-probabilities")  # onnxcal.graph.site.HOLDS
COMPUTE_DTYPES = ("float32", "float64")  # onnxcal.graph.tensors.COMPUTE_DTYPES
ACTIVATIONS = ("softmax", "sigmoid")  # onnxcal.graph.tensors.ACTIVATION_CHOICES


def choices(values: tuple[str, ...]) -> str:
    """A metavar listing the values an option takes: ``a|b|c``."""
    return "|".join(values)
