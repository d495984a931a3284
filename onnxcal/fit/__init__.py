"""Fit calibration maps to captured logits, and the summary FIT.json holds.

Solvers (each reads the logits in float32 row chunks and accumulates in
float64; see :func:`onnxcal.metrics.iter_chunks`):

* temperature, one T (multiclass softmax, binary sigmoid, multi-label with
  one T shared by all labels) or one T per label: Newton steps on
  beta = 1/T in log coordinates. The mean NLL
  f(beta) = mean_i [ logsumexp_k(beta z_ik) - beta z_iy ] is convex in beta:
  f'(beta) = mean_i (E_p[z_i] - z_iy), f''(beta) = mean_i Var_p[z_i] >= 0
  with p = softmax(beta z_i), and both come out of the same pass as f (the
  binary cross-entropy of sigmoid(beta z) is convex in beta the same way).
  Since f is convex the sign of f' keeps a bracket; a step that leaves it,
  or a non-positive curvature in u = log beta, is replaced by bisection of
  the bracket in log space. On a large set the first steps are taken on a
  strided subsample, so only the last two or three passes read every row.
* vector scaling, softmax(w * z + b) with per-class w, b, and Platt
  scaling, sigmoid(a z + b): the NLL is convex in (w, b) (a convex function
  of an affine map); L-BFGS-B (scipy) with the analytic gradient, optional
  L2 penalty toward w = 1, b = 0.

References
----------
Guo, Pleiss, Sun, Weinberger, "On Calibration of Modern Neural Networks",
ICML 2017, sec. 4.2 (temperature and vector scaling).
Platt, "Probabilistic Outputs for Support Vector Machines and Comparisons to
Regularized Likelihood Methods", Advances in Large Margin Classifiers, 1999.
Byrd, Lu, Nocedal, Zhu, "A Limited Memory Algorithm for Bound Constrained
Optimization", SIAM J. Sci. Comput. 16(5), 1995 (L-BFGS-B).

The modules, each importing only those above it:

* ``options``: :class:`FitOptions`, :class:`FitResult`, the bounds, the notes of a result;
* ``temperature``: the Newton solver on beta (:func:`fit_temperature`,
  :func:`fit_sigmoid_temperature`, :func:`nll_derivatives`);
* ``affine``: vector and Platt scaling by L-BFGS-B;
* ``summary``: :func:`fit_scaling` (the method of the options), the warnings on
  the data, :class:`FitSummary` and :func:`summarize`;
* ``store``: FIT.json (:func:`save_fit`, :func:`load_fit`).
"""

from .affine import (
    _affine_pass as _affine_pass,  # re-exported: tests check its gradient
)
from .options import (
    B_MAX,
    DEFAULT_OPTIONS,
    FORMAT,
    MIN_PER_CLASS,
    T_MAX,
    T_MIN,
    FitOptions,
    FitResult,
)
from .store import load_fit, save_fit, summary_from_dict
from .summary import FitSummary, data_warnings, fit_scaling, resolve_kind, summarize
from .temperature import fit_sigmoid_temperature, fit_temperature, nll_derivatives

__all__ = [
    "B_MAX",
    "DEFAULT_OPTIONS",
    "FORMAT",
    "MIN_PER_CLASS",
    "T_MAX",
    "T_MIN",
    "FitOptions",
    "FitResult",
    "FitSummary",
    "data_warnings",
    "fit_scaling",
    "fit_sigmoid_temperature",
    "fit_temperature",
    "load_fit",
    "nll_derivatives",
    "resolve_kind",
    "save_fit",
    "summarize",
    "summary_from_dict",
]
