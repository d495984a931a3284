"""Inputs that are not one sample per row on axis 0: constants given once
(``--constant NAME=VALUE|FILE.npy|zeros``), and the checks of ``--batch-axis``
(the arrays themselves are in ``axes``).

A constant becomes a :class:`~onnxcal.data.spec.Constant`: its value in the
model's dtype, with the batch axis (when the input has one) of size 1, which
:meth:`Dataset.feed` repeats to every batch's sample count. An array with a
batch axis is kept as a view with that axis moved first, so everything that
slices, pads or checks rows works on samples along axis 0 as before; only
the feed handed to onnxruntime moves it back.
"""

from __future__ import annotations

import hashlib
import os
from collections.abc import Collection, Mapping, Sequence
from dataclasses import replace
from pathlib import Path

import numpy as np

from ..errors import OnnxcalError
from ..graph import TensorSpec
from .arrays import read_npy
from .axes import ZEROS, free_dims, scalar_refusal, shown
from .inputs import kind_ok
from .spec import Constant, Dataset, DataSpec

IN_DATA = "(in the data)"
"""Marks, in a capture's record, a constant that was a single number in the data file."""

ConstantValue = str | os.PathLike[str] | int | float | np.ndarray


def _declared(spec: TensorSpec) -> np.dtype:
    try:
        return np.dtype(spec.dtype)
    except TypeError:
        raise OnnxcalError(
            f"model input '{spec.name}' has type {spec.dtype}, which onnxcal cannot feed from arrays",
            "calibrate a model whose inputs are tensors of numbers",
        ) from None


# --------------------------------------------------------------------------
# Arrays with samples on another axis


def check_feeding(spec: DataSpec, specs: Sequence[TensorSpec]) -> None:
    """Each ``--constant`` names a model input; each ``--batch-axis`` a model input and an
    axis within its declared rank (checked before any data are read)."""
    by_name = {s.name: s for s in specs}
    for name in spec.constants:
        if name not in by_name:
            raise OnnxcalError(
                f"--constant names '{name}', which is not a model input",
                f"the model's inputs are: {', '.join(by_name)}",
            )
    for name, axis in spec.batch_axes.items():
        if name not in by_name:
            raise OnnxcalError(
                f"--batch-axis names '{name}', which is not a model input",
                f"the model's inputs are: {', '.join(by_name)}",
            )
        shape = by_name[name].shape
        rank = len(shape) if shape is not None else None
        if not isinstance(axis, int) or axis < 0 or (rank is not None and axis >= rank):
            raise OnnxcalError(
                f"--batch-axis {name}={axis} is out of range: input '{name}' has rank {rank} "
                f"(shape {shown(shape)})",
                f"give an axis from 0 to {max((rank or 1) - 1, 0)}",
            )
        if rank == 0:
            raise scalar_refusal(by_name[name])


# --------------------------------------------------------------------------
# Constants


def _digest(arr: np.ndarray) -> str:
    return hashlib.sha256(np.ascontiguousarray(arr).tobytes()).hexdigest()


def _number(name: str, text: str) -> int | float:
    for kind in (int, float):
        try:
            return kind(text)
        except ValueError:
            pass
    raise OnnxcalError(
        f"--constant {name}={text}: '{text}' is not a number, 'zeros' or an .npy file",
        f"e.g. --constant {name}=16000, --constant {name}=zeros or --constant {name}=state.npy",
    )


def _read_value(name: str, value: ConstantValue) -> tuple[np.ndarray | None, str]:
    """The array given (None for ``zeros``) and how it was given."""
    if isinstance(value, np.ndarray):
        return value, f"array sha256:{_digest(value)}"
    if isinstance(value, (bool, np.bool_)):
        return np.asarray(value), str(value)
    if isinstance(value, (int, float, np.number)):
        return np.asarray(value), str(value)
    text = str(value).strip()
    if text == ZEROS:
        return None, ZEROS
    if text.lower().endswith(".npy"):
        arr = np.asarray(read_npy(value, f"constant '{name}'"))
        return arr, f"{Path(text).name} sha256:{_digest(arr)}"
    number = _number(name, text)
    return np.asarray(number), str(number)


def _axis_for(name: str, spec: TensorSpec, batch_axes: Mapping[str, int], batch_dims: Collection[str],
              given: str) -> int | None:
    """The batch axis of a number or ``zeros``: ``--batch-axis``, else the dim named like the
    batch dim of the inputs fed per sample, else the input's only open dim."""
    if (axis := _named_axis(name, spec, batch_axes, batch_dims)) is not None:
        return axis
    free = free_dims(spec.shape or ())
    if len(free) > 1:
        raise OnnxcalError(
            f"--constant {name}={given}: input '{name}' has several open dims ({shown(spec.shape)}), "
            "so onnxcal cannot tell which one holds the samples",
            f"give --batch-axis {name}=AXIS, or the whole array with --constant {name}=FILE.npy",
        )
    return free[0] if free else None


def _named_axis(name: str, spec: TensorSpec, batch_axes: Mapping[str, int], batch_dims: Collection[str]) -> int | None:
    """``--batch-axis``, else the one dim of ``spec`` whose symbol names the batch (``N`` in ``[1, N, 128]``
    when the per-sample inputs are ``[N, ...]``)."""
    if name in batch_axes:
        return batch_axes[name]
    named = [i for i, d in enumerate(spec.shape or ()) if isinstance(d, str) and d in batch_dims]
    return named[0] if len(named) == 1 else None


def batch_dims(specs: Sequence[TensorSpec], fed: Collection[str], batch_axes: Mapping[str, int]) -> set[str]:
    """The symbols the model gives the batch dim of the inputs fed per sample."""
    dims = set()
    for s in specs:
        axis = batch_axes.get(s.name, 0)
        if s.name in fed and s.shape and axis < len(s.shape) and isinstance(s.shape[axis], str):
            dims.add(str(s.shape[axis]))
    return dims


def _filled(name: str, spec: TensorSpec, arr: np.ndarray | None, axis: int | None, dtype: np.dtype) -> np.ndarray:
    """A number or ``zeros`` filled into the declared shape (size 1 on the batch axis)."""
    shape: list[int] = []
    for i, d in enumerate(spec.shape or ()):
        if i == axis:
            shape.append(1)
        elif isinstance(d, int) and d > 0:
            shape.append(d)
        else:
            raise OnnxcalError(
                f"--constant {name}: input '{name}' has an open dim on axis {i} ({shown(spec.shape)}), "
                "so a single number or zeros cannot fill it",
                f"give the whole array with --constant {name}=FILE.npy",
            )
    value = 0 if arr is None else arr.item()
    return np.full(tuple(shape), value, dtype=dtype)


def _checked_array(name: str, spec: TensorSpec, arr: np.ndarray, axis: int | None) -> int | None:
    """Check an array constant against the declared shape; the axis to repeat it along (None: as is)."""
    shape = spec.shape
    if shape is None:
        return None
    if arr.ndim != len(shape):
        raise OnnxcalError(
            f"constant '{name}' has shape {arr.shape} but the model's input has rank {len(shape)} "
            f"(shape {shown(shape)})",
            "give an array of the input's declared shape (size 1 on its batch axis)",
        )
    for i, (have, need) in enumerate(zip(arr.shape, shape, strict=True)):
        if i != axis and isinstance(need, int) and need > 0 and have != need:
            raise OnnxcalError(
                f"constant '{name}' has size {have} on axis {i} but the model's input has {need} "
                f"(shape {shown(shape)})",
                "give an array of the input's declared shape",
            )
    if axis is not None and arr.shape[axis] != 1:
        raise OnnxcalError(
            f"constant '{name}' has size {arr.shape[axis]} on axis {axis}, the batch axis: a constant is the "
            "same for every sample",
            f"give size 1 on axis {axis} (repeated to every batch), or per-sample data with --input and "
            f"--batch-axis {name}={axis}",
        )
    return axis


def make_constant(
    name: str, value: ConstantValue, spec: TensorSpec, batch_axes: Mapping[str, int],
    batch_dims: Collection[str] = (),
) -> Constant:
    """The constant ``value`` for model input ``spec``, checked and cast.

    Its batch axis (repeated to each batch's count) is ``batch_axes[name]``,
    else the dim named by one of ``batch_dims`` (the symbols of the batch dim
    of the inputs fed per sample), else, for a number or ``zeros``, the
    input's only open dim, and for an array its only open dim when the array
    has size 1 there (otherwise the array is fed as it is).

    Raises
    ------
    OnnxcalError
        Not a number, ``zeros`` or a readable ``.npy``; a dtype that cannot
        be cast (a fraction for an integer input); a shape that does not fit.
    """
    dtype = _declared(spec)
    arr, given = _read_value(name, value)
    if arr is not None and not kind_ok(arr.dtype, dtype):
        raise OnnxcalError(
            f"constant '{name}' is {arr.dtype} ({given}) but the model's input is {dtype}",
            f"give a value of type {dtype}",
        )
    if spec.shape is None:
        if arr is None:
            raise OnnxcalError(f"--constant {name}={ZEROS}: the model does not declare the shape of '{name}'",
                               f"give the array with --constant {name}=FILE.npy")
        return Constant(arr.astype(dtype), None, given)
    if arr is None or arr.ndim == 0:
        axis = _axis_for(name, spec, batch_axes, batch_dims, given) if spec.shape else None
        return Constant(_filled(name, spec, arr, axis, dtype), axis, given)
    axis = _named_axis(name, spec, batch_axes, batch_dims)
    if axis is None and (free := free_dims(spec.shape)) and len(free) == 1 and arr.ndim == len(spec.shape) \
            and arr.shape[free[0]] == 1:
        axis = free[0]
    axis = _checked_array(name, spec, arr, axis)
    return Constant(np.ascontiguousarray(arr, dtype=dtype), axis, given)


def with_constants(ds: Dataset, spec: DataSpec, specs: Sequence[TensorSpec]) -> Dataset:
    """``ds`` with its constants: those of ``spec`` and the single numbers the data
    hold for inputs (an ``.npz`` array of rank 0), each checked against the model.

    Raises
    ------
    OnnxcalError
        A constant names no model input, or an input given both ways, or
        no input left to carry the samples.
    """
    by_name = {s.name: s for s in specs}
    for name in spec.constants:
        if name in ds.inputs and getattr(ds.inputs[name], "ndim", 1) > 0:
            raise OnnxcalError(
                f"input '{name}' is given both in '{ds.source}' and by --constant",
                f"drop one of them (the array '{name}' or --constant {name}=...)",
            )
    scalars = {k: v for k, v in ds.inputs.items() if getattr(v, "ndim", 1) == 0 and k in by_name}
    values: dict[str, ConstantValue] = {k: np.asarray(v)[()] for k, v in scalars.items()}
    values.update(spec.constants)
    if not values:
        return ds
    fed = [k for k in ds.inputs if k not in values]
    dims = batch_dims(specs, fed, spec.batch_axes)
    constants = {k: make_constant(k, v, by_name[k], spec.batch_axes, dims) for k, v in values.items()}
    for k in scalars.keys() - spec.constants.keys():  # not re-used from a record: the data give it again
        constants[k] = replace(constants[k], given=f"{constants[k].given} {IN_DATA}")
    inputs = {k: v for k, v in ds.inputs.items() if k not in constants}
    if not inputs:
        raise OnnxcalError(
            f"every model input is a constant, so nothing in '{ds.source}' gives the samples",
            "give at least one input per sample (an array with the samples on its batch axis)",
        )
    return replace(ds, inputs=inputs, constants=constants)


def constant_record(ds: Dataset) -> dict[str, str]:
    """How each constant was given, for the capture's record."""
    return {name: c.given for name, c in sorted(ds.constants.items())}


def recorded_feeding(spec: DataSpec, capture: Mapping[str, object] | None, where: str) -> DataSpec:
    """``spec`` with the constants and batch axes a capture was run with, when it gives none.

    Numbers and ``zeros`` are re-used as recorded; an array given from a
    file is not (only its SHA-256 is kept): that refusal names the input.

    Raises
    ------
    OnnxcalError
        The capture gave an input as an array and ``spec`` does not.
    """
    if capture is None or spec.constants or spec.batch_axes:
        return spec
    recorded = capture.get("constants")
    axes = capture.get("batch_axes")
    constants = {k: v for k, v in recorded.items() if not str(v).endswith(IN_DATA)} \
        if isinstance(recorded, Mapping) else {}
    batch_axes = {str(k): int(v) for k, v in axes.items()} if isinstance(axes, Mapping) else {}
    if not constants and not batch_axes:
        return spec
    for name, given in constants.items():
        if not isinstance(given, str) or "sha256:" in given:
            raise OnnxcalError(
                f"input '{name}' was given to the capture behind {where} as an array ({given}), "
                "which onnxcal cannot re-use from the record",
                f"give it again with --constant {name}=FILE.npy",
            )
    return replace(spec, constants=constants, batch_axes=batch_axes)
