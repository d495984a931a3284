"""A set against the model it feeds: every input supplied, with a dtype and a
shape that fit.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from ..errors import OnnxcalError
from ..graph import TensorSpec
from .spec import LABELS_KEY, Dataset


def _kind_ok(data: np.dtype, model: np.dtype) -> bool:
    if data == model:
        return True
    if model.kind == "f":
        return data.kind in "fiub"
    if model.kind in "iu":
        return data.kind in "iub"
    return model.kind == "b" and data.kind == "b"


def match_inputs(dataset: Dataset, specs: Sequence[TensorSpec]) -> None:
    """Check that the set supplies every model input with a fitting dtype and shape.

    Raises
    ------
    OnnxcalError
        An input is missing or extra, or its dtype or shape cannot feed the model.
    """
    names = [s.name for s in specs]
    missing = [n for n in names if n not in dataset.inputs]
    extra = [n for n in dataset.inputs if n not in names]
    if missing:
        raise OnnxcalError(
            f"'{dataset.source}' has no array for model input '{missing[0]}'",
            f"the model's inputs are: {', '.join(names)}; supply each one "
            f"(an .npz array or --input {missing[0]}=FILE.npy)",
        )
    if extra:
        raise OnnxcalError(
            f"'{dataset.source}' has an array '{extra[0]}' that is not a model input",
            f"the model's inputs are: {', '.join(names)} (plus '{LABELS_KEY}')",
        )
    for spec in specs:
        arr = dataset.inputs[spec.name]
        try:
            want = np.dtype(spec.dtype)
        except TypeError:  # a sequence, a map, or no element type at all
            raise OnnxcalError(
                f"model input '{spec.name}' has type {spec.dtype}, which onnxcal cannot feed from arrays",
                "calibrate a model whose inputs are tensors of numbers",
            ) from None
        if not _kind_ok(arr.dtype, want):
            raise OnnxcalError(
                f"input '{spec.name}' is {arr.dtype} in the data but {want} in the model",
                f"save '{spec.name}' as {want}",
            )
        if spec.shape is None:
            continue
        if arr.ndim != len(spec.shape):
            raise OnnxcalError(
                f"input '{spec.name}' has rank {arr.ndim} (shape {arr.shape}) in the data "
                f"but rank {len(spec.shape)} in the model (shape {show_shape(spec.shape)})",
                "reshape the array so samples are on axis 0 and the rest matches the model",
            )
        for axis, (have, need) in enumerate(zip(arr.shape[1:], spec.shape[1:], strict=True), start=1):
            if isinstance(need, int) and need > 0 and have != need:
                raise OnnxcalError(
                    f"input '{spec.name}' has size {have} on axis {axis} in the data "
                    f"but {need} in the model (shape {show_shape(spec.shape)})",
                    "give data shaped like the model's input",
                )


def show_shape(shape: Sequence[int | str | None] | None) -> str:
    """A shape for messages: ``[N, 3, 224, 224]``, ``?`` for an unknown dim or rank."""
    if shape is None:
        return "?"
    return "[" + ", ".join("?" if d is None else str(d) for d in shape) + "]"
