"""A set against the model it feeds: every input supplied, with a dtype and a
shape that fit.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from ..errors import OnnxcalError
from ..graph import TensorSpec
from .spec import LABELS_KEY, Dataset


def kind_ok(data: np.dtype, model: np.dtype) -> bool:
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
    missing = [n for n in names if n not in dataset.inputs and n not in dataset.constants]
    extra = [n for n in dataset.inputs if n not in names]
    if missing and (spec := next(s for s in specs if s.name == missing[0])).shape == ():
        raise OnnxcalError(
            f"model input '{spec.name}' is a single number (shape []) and '{dataset.source}' does not give it",
            f"give it once with --constant {spec.name}=VALUE",
        )
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
        if spec.name not in dataset.inputs:  # a constant, checked when it was made
            continue
        arr = dataset.inputs[spec.name]
        try:
            want = np.dtype(spec.dtype)
        except TypeError:  # a sequence, a map, or no element type at all
            raise OnnxcalError(
                f"model input '{spec.name}' has type {spec.dtype}, which onnxcal cannot feed from arrays",
                "calibrate a model whose inputs are tensors of numbers",
            ) from None
        if not kind_ok(arr.dtype, want):
            raise OnnxcalError(
                f"input '{spec.name}' is {arr.dtype} in the data but {want} in the model",
                f"save '{spec.name}' as {want}",
            )
        if spec.shape is None:
            continue
        if spec.shape == ():
            raise OnnxcalError(
                f"input '{spec.name}' is a single number (shape []) in the model: it cannot be fed per sample",
                f"give it once with --constant {spec.name}=VALUE",
            )
        axis = dataset.batch_axes.get(spec.name, 0)
        shape = [spec.shape[axis], *spec.shape[:axis], *spec.shape[axis + 1 :]]  # samples first, as the array
        if arr.ndim != len(spec.shape):
            raise OnnxcalError(
                f"input '{spec.name}' has rank {arr.ndim} (shape {arr.shape}) in the data "
                f"but rank {len(spec.shape)} in the model (shape {show_shape(spec.shape)})",
                "reshape the array so samples are on axis 0 and the rest matches the model",
            )
        for at, (have, need) in enumerate(zip(arr.shape[1:], shape[1:], strict=True), start=1):
            if isinstance(need, int) and need > 0 and have != need:
                where = at - 1 if at <= axis else at  # the axis in the model's (and the file's) order
                raise OnnxcalError(
                    f"input '{spec.name}' has size {have} on axis {where} in the data "
                    f"but {need} in the model (shape {show_shape(spec.shape)})",
                    "give data shaped like the model's input",
                )


def show_shape(shape: Sequence[int | str | None] | None) -> str:
    """A shape for messages: ``[N, 3, 224, 224]``, ``?`` for an unknown dim or rank."""
    if shape is None:
        return "?"
    return "[" + ", ".join("?" if d is None else str(d) for d in shape) + "]"
