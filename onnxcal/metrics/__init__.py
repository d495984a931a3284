"""Calibration metrics over logits and labels.

Every function here is pure: arrays in, numbers or arrays out. ``evaluate``
works through the logits of a large validation set in row chunks (float32
in, float64 sums), so its temporaries stay a few MiB whatever the number of
samples. Drawing is elsewhere (``report``); this package only computes.

Three kinds of classifier are scored (see :mod:`onnxcal.scaling`):
``multiclass`` (softmax over K logits, integer labels), ``binary`` (one
logit, sigmoid, 0/1 labels) and ``multilabel`` (K sigmoids, an N x K 0/1
label array). Binary and multi-label predictions are scored entry by entry:
each (sample, label) pair is one binary prediction whose top-label
confidence is max(p, 1 - p).

The modules, each importing only those above it:

* ``binning``: equal-width and equal-mass bins, weighted quantiles;
* ``core``: row chunks, softmax, log-softmax, sigmoid, scores from probabilities;
* ``calibration_error``: ECE, MCE, adaptive and classwise ECE of arrays;
* ``score_sums``: the metric sums of a multiclass temperature's :mod:`onnxcal.sweep` pass;
* ``evaluation``: :class:`Metrics` (the before/after table) and :func:`evaluate`;
* ``reliability``: :class:`Reliability`, the figures of a reliability diagram.
"""

from .binning import (
    DEFAULT_BINS,
    bin_ids,
    ece_from_bins,
    equal_mass_bins,
    lerp_quantiles,
    mce_from_bins,
    reliability_bins,
    weighted_quantiles,
)
from .calibration_error import (
    adaptive_calibration_error,
    classwise_calibration_error,
    expected_calibration_error,
    maximum_calibration_error,
)
from .core import (
    chunk_rows,
    iter_chunks,
    log_softmax,
    scores_from_probabilities,
    sigmoid,
    softmax,
)
from .evaluation import METRIC_FIELDS, METRIC_LABELS, Metrics, evaluate, score_metrics
from .reliability import Reliability, reliability
from .score_sums import RowScores, ScoreSums, temperature_pass

__all__ = [
    "DEFAULT_BINS",
    "METRIC_FIELDS",
    "METRIC_LABELS",
    "Metrics",
    "Reliability",
    "RowScores",
    "ScoreSums",
    "adaptive_calibration_error",
    "bin_ids",
    "chunk_rows",
    "classwise_calibration_error",
    "ece_from_bins",
    "equal_mass_bins",
    "evaluate",
    "expected_calibration_error",
    "iter_chunks",
    "lerp_quantiles",
    "log_softmax",
    "maximum_calibration_error",
    "mce_from_bins",
    "reliability",
    "reliability_bins",
    "scores_from_probabilities",
    "score_metrics",
    "sigmoid",
    "softmax",
    "temperature_pass",
    "weighted_quantiles",
]
