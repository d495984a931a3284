"""Decisions downstream of calibrated probabilities, with finite-sample guarantees.

Calibration makes probabilities honest on average; it does not say which
threshold keeps the error among accepted predictions under 2 %, nor which
classes contain the true one 95 % of the time. This package computes both
from labelled rows, as pure functions over NumPy arrays:

- :mod:`.selective`: the acceptance threshold tau (accept a row when its
  confidence is >= tau) with P(error among accepted <= epsilon) >= 1 - delta
  (Learn then Test, or selection with guaranteed risk), the risk-coverage
  curve, and ``accept`` as the graph computes it.
- :mod:`.conformal`: split conformal prediction sets (least ambiguous sets,
  adaptive prediction sets, class-conditional), and ``class_set`` /
  ``class_set_size`` as the graph computes them.
- :mod:`.binomial`: exact (Clopper-Pearson) intervals, bounds and p-values,
  and the pass / fail / undecided ``verdict`` of a gate.
- :mod:`.plan`: the options of ``calibrate`` and ``patch`` (``DecisionOptions``)
  and choosing the thresholds a patch bakes in (``choose`` -> ``Decisions``,
  with the record's ``decisions`` section).
- :mod:`.gate`: ``verify``'s checks of the decision outputs (against the NumPy
  references, and the gates on labelled data).

Data hygiene: every choosing function takes the ``rows`` to use, and they
must be rows the calibration map was not fitted on (the held-out part of
``onnxcal.resample.split_holdout``, or a separate labelled set). The
guarantees hold only for data exchangeable with those rows: data like the
validation set, not data after a shift. docs/decisions.md has the maths.
"""

from .binomial import Proportion, Verdict, clopper_pearson, proportion, tail_pvalue, upper_bound, verdict
from .conformal import (
    SetThreshold,
    choose_set_threshold,
    class_set,
    class_set_size,
    conditional_coverage_floor,
    conformal_quantile,
    conformal_rank,
)
from .selective import (
    AcceptThreshold,
    RiskCoverage,
    accept,
    choose_accept_threshold,
    choose_accept_thresholds_per_label,
    default_thresholds,
    risk_coverage,
    rows_needed,
    threshold_grid,
)

__all__ = [
    "AcceptThreshold", "Proportion", "RiskCoverage", "SetThreshold", "Verdict", "accept",
    "choose_accept_threshold", "choose_accept_thresholds_per_label", "choose_set_threshold", "class_set",
    "class_set_size", "clopper_pearson", "conditional_coverage_floor", "conformal_quantile", "conformal_rank",
    "default_thresholds", "proportion", "risk_coverage", "rows_needed", "tail_pvalue", "threshold_grid",
    "upper_bound", "verdict",
]
