"""Arrays whose samples lie on another axis than 0 (``--batch-axis NAME=AXIS``, e.g. a recurrent
state 1 x N x H), and the refusals for inputs that cannot be fed per sample on axis 0 (a single
number, a state with its samples on a later axis). Used by the loaders (``arrays``) and by
``feeding`` (the constants).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING

import numpy as np

from ..errors import OnnxcalError
from ..graph import TensorSpec

if TYPE_CHECKING:
    from .images import ImageArray

ZEROS = "zeros"
"""``--constant NAME=zeros``: zeros shaped like the declared input."""


def shown(shape: Sequence[int | str | None] | None) -> str:
    if shape is None:
        return "?"
    return "[" + ", ".join("?" if d is None else str(d) for d in shape) + "]"


def free_dims(shape: Sequence[int | str | None]) -> list[int]:
    """Positions of the dims the model leaves open (symbolic or unknown)."""
    return [i for i, d in enumerate(shape) if not (isinstance(d, int) and d > 0)]


def scalar_refusal(spec: TensorSpec) -> OnnxcalError:
    """The refusal for a rank-0 input fed as per-sample data."""
    return OnnxcalError(
        f"input '{spec.name}' is a single number (shape []) in the model: it cannot be fed per sample",
        f"give it once with --constant {spec.name}=VALUE",
    )


def state_refusal(spec: TensorSpec, axis: int, shape: tuple[int, ...] | None = None) -> OnnxcalError:
    """The refusal for an input whose samples lie on ``axis``, given with samples on axis 0."""
    want = ["n" if i == axis else (str(d) if isinstance(d, int) and d > 0 else "?") for i, d in
            enumerate(spec.shape or ())]
    have = "" if shape is None else f" (the data's array has shape {tuple(shape)})"
    return OnnxcalError(
        f"input '{spec.name}' has shape {shown(spec.shape)} in the model, samples on axis {axis}{have}",
        f"give --batch-axis {spec.name}={axis} with an array of shape ({', '.join(want)}), "
        f"or --constant {spec.name}={ZEROS}",
    )


def state_axis(spec: TensorSpec) -> int | None:
    """The likely batch axis of an input declared with fixed dims before its only open one
    (a recurrent state ``[1, N, 128]``), else None."""
    if not spec.shape:
        return None
    free = free_dims(spec.shape)
    return free[0] if len(free) == 1 and free[0] > 0 else None


# --------------------------------------------------------------------------
# Arrays with samples on another axis


def samples_first(
    arrays: Mapping[str, np.ndarray], batch_axes: Mapping[str, int], source: str
) -> dict[str, np.ndarray]:
    """``arrays`` with each ``batch_axes`` input's samples moved to axis 0 (views)."""
    moved = dict(arrays)
    for name, axis in batch_axes.items():
        if name not in moved:
            continue
        arr = moved[name]
        if axis >= arr.ndim:
            raise OnnxcalError(
                f"--batch-axis {name}={axis}: array '{name}' of '{source}' has shape {arr.shape}, no axis {axis}",
                "give the axis that holds the samples",
            )
        moved[name] = np.moveaxis(arr, axis, 0)
    return moved


def lengths_hint(
    arrays: Mapping[str, np.ndarray | ImageArray], n: int | None, specs: Sequence[TensorSpec],
    batch_axes: Mapping[str, int],
) -> OnnxcalError | None:
    """When arrays disagree on their sample count: a refusal naming an input that
    cannot be fed per sample on axis 0 (a single number; a state with its samples
    on a later axis), or None."""
    by_name = {s.name: s for s in specs}
    for name, arr in arrays.items():
        spec = by_name.get(name)
        if spec is None or name in batch_axes:
            continue
        if arr.ndim == 0 or spec.shape == ():
            return scalar_refusal(spec)
        axis = state_axis(spec)
        if axis is not None and n is not None and arr.shape[0] != n and axis < arr.ndim and arr.shape[axis] == n:
            return state_refusal(spec, axis, arr.shape)
    return None
