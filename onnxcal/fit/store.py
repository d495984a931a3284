"""FIT.json: write a :class:`~onnxcal.fit.FitSummary` atomically, read one back checked."""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any

from .._files import atomic_write_bytes
from .._paths import require_file
from ..choose import choice_from_dict
from ..errors import OnnxcalError, first_line
from ..metrics import Metrics
from ..scaling import Scaling, check_scaling
from .options import FitOptions, FitResult
from .outcome import FitSummary


def save_fit(path: str | os.PathLike[str], summary: FitSummary) -> None:
    """Write FIT.json atomically."""
    text = json.dumps(summary.to_dict(), indent=2, sort_keys=True) + "\n"
    atomic_write_bytes(Path(path), text.encode())


def _result_from(parameters: dict[str, Any], fit: dict[str, Any], method: str, kind: str) -> FitResult:
    scaling = check_scaling(Scaling(method, dict(parameters), kind))
    return FitResult(
        scaling=scaling,
        passes=float(fit["passes"]),
        converged=bool(fit["converged"]),
        on_bound=bool(fit["on_bound"]),
        warnings=tuple(fit.get("warnings", ())),
    )


def summary_from_dict(data: dict[str, Any]) -> FitSummary:
    """Rebuild a FitSummary from :meth:`FitSummary.to_dict` output.

    Raises
    ------
    KeyError, TypeError, ValueError, OnnxcalError
        Missing fields or invalid parameters.
    """
    method, kind = data["method"], data["kind"]
    if method == "temperature" and isinstance(data["parameters"].get("temperature"), (int, float)):
        if data["temperature"] != data["parameters"]["temperature"]:
            raise OnnxcalError(
                f"temperature {data['temperature']!r} differs from the parameters' "
                f"{data['parameters']['temperature']!r}"
            )
    result = _result_from(data["parameters"], data["fit"], method, kind)
    split = dict(data["split"])
    held = split.pop("fit_part", None)
    metrics = data["metrics"]
    fit_part = metrics.get("fit_part")
    return FitSummary(
        result=result,
        before=Metrics(**metrics["before"]),
        after=Metrics(**metrics["after"]),
        capture=dict(data.get("capture", {})),
        basis=metrics["basis"],
        fit_part=None if fit_part is None else {k: Metrics(**v) for k, v in fit_part.items()},
        holdout_result=None if held is None else _result_from(held["parameters"], held["fit"], method, kind),
        split=split,
        intervals=data.get("intervals"),
        options=FitOptions(**data["options"]),
        warnings=tuple(data.get("warnings", ())),
        notes=tuple(data.get("notes", ())),
        choice=None if data.get("choice") is None else choice_from_dict(data["choice"]),
    )


def load_fit(path: str | os.PathLike[str]) -> FitSummary:
    """Read FIT.json written by :func:`save_fit`, checking the parameters.

    Raises
    ------
    OnnxcalError
        Not JSON, missing fields, or parameters that are not valid (e.g. a
        temperature that is not a positive number).
    """
    p = require_file(path, "fit file")
    hint = "give a file written by 'onnxcal fit --out'"
    try:
        data = json.loads(p.read_text())
        return summary_from_dict(data)
    except OnnxcalError as exc:
        raise OnnxcalError(f"'{p}' holds invalid calibration parameters: {exc.message}", hint) from exc
    except Exception as exc:  # not JSON, or not the JSON onnxcal writes (any field missing or mistyped)
        raise OnnxcalError(f"'{p}' is not an onnxcal fit file ({type(exc).__name__}: {first_line(exc)})", hint) from exc
