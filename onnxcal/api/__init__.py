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

import importlib
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
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

# Where each name lives; imported the first time it is read (PEP 562), so that ``patch`` does not
# import the capture, fit, report and verify stages it does not run (start-up: docs/benchmarks.md).
_WHERE = {
    "Capture": "..capture", "ProgressFn": "..capture", "RunOptions": "..capture", "DataSpec": "..data",
    "FitOptions": "..fit", "FitSummary": "..fit", "ModelInfo": "..graph", "Record": "..graph",
    "ReportResult": "..report", "Scaling": "..scaling", "Check": "..verify", "VerifyResult": "..verify",
    "CalibrateResult": ".calibrating", "calibrate": ".calibrating",
    "MAX_BOOTSTRAP": ".capture_fit", "MAX_L2": ".capture_fit", "MAX_SEED": ".capture_fit", "capture": ".capture_fit",
    "check_fit_options": ".capture_fit", "fit": ".capture_fit", "inspect": ".capture_fit",
    "DataSource": ".common", "PatchOptions": ".patching", "PatchResult": ".patching", "patch": ".patching",
    "report": ".reporting", "VERIFY_ROWS": ".sampling",
    "DEFAULT_LATENCY_RUNS": ".verifying", "MAX_LATENCY_RUNS": ".verifying", "verify": ".verifying",
}


def __getattr__(name: str) -> Any:
    if name not in _WHERE:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(importlib.import_module(_WHERE[name], __name__), name)
    globals()[name] = value  # once imported, an ordinary attribute
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))


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
