"""The operations of onnxcal as plain functions over paths.

Each function validates its inputs and output paths before doing any work,
calls the stage modules, writes its outputs atomically and returns a frozen
dataclass. The command line (``cli``) is a thin layer over these functions;
they are also the Python API (``import onnxcal``).

The modules, by concern: ``common`` (the validation set, run options, size
limits, output checks), ``capture_fit`` (``inspect``, ``capture``, ``fit``),
``patching`` (``patch``), ``checks`` (the reference checks ``verify`` and
``calibrate`` share), ``verifying`` (``verify``), ``reporting``
(``report``) and ``calibrating`` (``calibrate``). The names below are the
API; import them from ``onnxcal.api``.
"""

from __future__ import annotations

from ..capture import Capture, ProgressFn, RunOptions
from ..data import DataSpec
from ..fit import FitOptions, FitSummary
from ..graph import ModelInfo, Record
from ..report import ReportResult
from ..scaling import Scaling
from ..verify import Check, VerifyResult
from .calibrating import CalibrateResult, calibrate
from .capture_fit import (
    MAX_BOOTSTRAP,
    MAX_L2,
    MAX_SEED,
    capture,
    check_fit_options,
    fit,
    inspect,
)
from .common import DataSource
from .patching import PatchOptions, PatchResult, patch
from .reporting import report
from .sampling import VERIFY_ROWS
from .verifying import DEFAULT_LATENCY_RUNS, MAX_LATENCY_RUNS, verify

__all__ = [
    "DEFAULT_LATENCY_RUNS",
    "MAX_BOOTSTRAP",
    "MAX_L2",
    "MAX_LATENCY_RUNS",
    "MAX_SEED",
    "VERIFY_ROWS",
    "CalibrateResult",
    "Capture",
    "Check",
    "DataSource",
    "DataSpec",
    "FitOptions",
    "FitSummary",
    "ModelInfo",
    "PatchOptions",
    "PatchResult",
    "ProgressFn",
    "Record",
    "ReportResult",
    "RunOptions",
    "Scaling",
    "VerifyResult",
    "calibrate",
    "capture",
    "check_fit_options",
    "fit",
    "inspect",
    "patch",
    "report",
    "verify",
]
