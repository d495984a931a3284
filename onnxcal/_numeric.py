"""Calibration parameters checked against the floating-point type that computes with them.

A patched graph computes the calibration map in one dtype (the scores',
or ``--compute-dtype``): ``logits / T`` or ``w * logits + b``. A parameter
that type cannot hold, or a map that overflows it for the logits the model
gives, yields NaN probabilities on every row: ``T = 1e-45`` is a float32
subnormal, and ``z / T`` is then infinite for any logit above 3.4e-7, so
softmax computes inf - inf. Such parameters are refused before a model is
written, naming the limit.

The bounds are the dtype's own (IEEE 754, through ``numpy.finfo``): the
largest finite number, and the smallest normal number (``tiny``), below
which T loses precision and ``1 / T`` overflows.
"""

from __future__ import annotations

import numpy as np

from .errors import OnnxcalError
from .scaling import Scaling

_CHUNK_ELEMENTS = 1 << 18


def max_abs(logits: np.ndarray) -> float:
    """The largest |logit| among the finite values, read in row chunks (``logits`` may be a memory map)."""
    top = 0.0
    step = max(1, _CHUNK_ELEMENTS // max(1, int(np.prod(logits.shape[1:]))))
    for start in range(0, len(logits), step):
        block = np.asarray(logits[start : start + step])
        finite = np.abs(block[np.isfinite(block)])
        if finite.size:
            top = max(top, float(finite.max()))
    return top


def _name(scaling: Scaling) -> str:
    return "temperature" if scaling.method == "temperature" else f"{scaling.method} scaling"


def check_in_dtype(
    scaling: Scaling,
    dtype: str,
    *,
    largest_logit: float | None = None,
    computes: str = "the patched model computes the calibration in",
    hint: str | None = None,
) -> Scaling:
    """Refuse a scaling whose graph computation overflows or underflows in ``dtype``.

    Parameters
    ----------
    scaling : Scaling
    dtype : str
        The floating-point type the map is computed in (``float16``, ``float32``, ``float64``).
    largest_logit : float, optional
        The largest |logit| seen (e.g. on the validation set); then
        ``|z| / T`` (or ``|w| |z| + |b|``) must stay finite in ``dtype`` too.
    computes : str
        Says where ``dtype`` comes from, in the message.
    hint : str, optional
        What to do instead (default: a larger T, or ``--compute-dtype float64``).

    Raises
    ------
    OnnxcalError
        Naming the parameter, the limit and the dtype.

    Examples
    --------
    >>> check_in_dtype(Scaling.of_temperature(1e-45), "float32")  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    onnxcal.errors.OnnxcalError: temperature 1e-45 is below 1.18e-38, the smallest normal float32 number ...
    """
    if not scaling.is_affine:
        # The maps of onnxcal.maps run float16 in float32 and the lookups in float64; their
        # parameters were checked finite and in range by their module.
        return scaling
    info = np.finfo(np.dtype(dtype))
    big, tiny = float(info.max), float(info.tiny)
    wider = "" if dtype == "float64" else ", or --compute-dtype float64"
    where = f"({computes} {dtype})"
    a = scaling.arrays()
    if scaling.method == "temperature":
        t = np.atleast_1d(a["temperature"])
        low, high = float(t.min()), float(t.max())
        if low < tiny:
            raise OnnxcalError(
                f"temperature {low:g} is below {tiny:.3g}, the smallest normal {dtype} number {where}: "
                "logits / T would overflow and every probability would be NaN",
                hint or f"use a larger T{wider}",
            )
        if high > big:
            raise OnnxcalError(
                f"temperature {high:g} is above {big:.3g}, the largest {dtype} number {where}",
                hint or "use a smaller T",
            )
        worst = None if largest_logit is None else largest_logit / low
        limit = None if largest_logit is None else largest_logit / big
        what = f"temperature {low:g}"
    else:
        w, b = np.abs(np.atleast_1d(a["w"])), np.abs(np.atleast_1d(a["b"]))
        if float(w.max()) > big or float(b.max()) > big:
            raise OnnxcalError(
                f"{_name(scaling)} parameters up to {max(float(w.max()), float(b.max())):g} exceed {big:.3g}, "
                f"the largest {dtype} number {where}",
                hint or f"refit with a larger --l2{wider}",
            )
        worst = None if largest_logit is None else float((w * largest_logit + b).max())
        limit, what = None, f"{_name(scaling)} (w up to {float(w.max()):g}, b up to {float(b.max()):g})"
    if worst is not None and not worst <= big:
        at_least = f"; T must be at least {limit:.3g} for them" if limit is not None else ""
        default = f"use a larger T{wider}" if scaling.method == "temperature" else f"refit with a larger --l2{wider}"
        raise OnnxcalError(
            f"{what} makes the calibrated logits overflow {dtype} {where}: the largest |logit| seen is "
            f"{largest_logit:g}, and {dtype} holds at most {big:.3g}{at_least}; every such row would be NaN",
            hint or default,
        )
    return scaling
