"""Image preprocessing: the options (``--resize`` ... or a TOML/JSON file),
validated into :class:`ImageOptions`, and resolved against the model input
(layout, channels, dtype) into the plan that :class:`~onnxcal.data.images.ImageArray`
follows.
"""

from __future__ import annotations

import json
import os
import re
import tomllib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Never

import numpy as np

from .._paths import require_file
from ..errors import OnnxcalError
from ..graph import TensorSpec
from .inputs import show_shape

IMAGE_OPTIONS = (
    "resize", "crop", "scale", "mean", "std", "channel_order", "layout", "dtype", "interpolation",
)
"""Preprocessing keys, as ``--resize`` etc. on the command line or keys of the file."""

_INTERPOLATION = ("nearest", "bilinear", "bicubic", "lanczos")
MAX_SIDE = 65535
"""Largest ``--resize`` and ``--crop`` side in pixels (PNG and most formats stop there or near)."""


@dataclass(frozen=True)
class ImageOptions:
    """How images become model input, in this order.

    Attributes
    ----------
    resize : int or None
        Resize so the shorter side is this many pixels (aspect kept).
    crop : (int, int) or None
        Centre crop to (height, width).
    scale : bool or None
        Divide by 255 to [0, 1]; None: yes for a float input, no for an integer one.
    mean, std : tuple of float or None
        Per channel (in the channel order of the model), applied after scaling:
        ``(x - mean) / std``.
    channel_order : str
        ``"RGB"`` or ``"BGR"``.
    layout : str or None
        ``"NCHW"`` or ``"NHWC"``; None: read from the model's input shape
        (NCHW when it cannot tell).
    dtype : str or None
        The input dtype; None: the model's.
    interpolation : str
        Resampling filter for ``resize``.
    """

    resize: int | None = None
    crop: tuple[int, int] | None = None
    scale: bool | None = None
    mean: tuple[float, ...] | None = None
    std: tuple[float, ...] | None = None
    channel_order: str = "RGB"
    layout: str | None = None
    dtype: str | None = None
    interpolation: str = "bilinear"


def read_preprocess_file(path: str | os.PathLike[str]) -> dict[str, Any]:
    """The preprocessing options of a ``.toml`` or ``.json`` file."""
    p = require_file(path, "preprocessing file")
    try:
        if p.suffix.lower() == ".toml":
            with open(p, "rb") as fh:
                data = tomllib.load(fh)
        elif p.suffix.lower() == ".json":
            data = json.loads(p.read_text(encoding="utf-8"))
        else:
            raise OnnxcalError(f"preprocessing file '{p}' is neither .toml nor .json", "rename it or convert it")
    except (OSError, UnicodeDecodeError, ValueError) as exc:  # TOMLDecodeError is a ValueError
        raise OnnxcalError(f"preprocessing file '{p}' cannot be parsed ({exc})", "check its syntax") from exc
    if not isinstance(data, dict):
        raise OnnxcalError(f"preprocessing file '{p}' is not a table of options",
                           f"use the keys {', '.join(IMAGE_OPTIONS)}")
    return data


def image_options(values: Mapping[str, object], file: str | os.PathLike[str] | None = None) -> ImageOptions:
    """Validate preprocessing options: those of ``file``, overridden by ``values``.

    Values may be typed (``256``, ``[0.5, 0.5, 0.5]``) or strings as typed on
    the command line (``"256"``, ``"0.5,0.5,0.5"``, ``"224x224"``).

    Raises
    ------
    OnnxcalError
        An unknown key or a value that does not fit, naming the option or the
        file key.
    """
    merged: dict[str, tuple[object, str]] = {}
    if file is not None:
        for key, value in read_preprocess_file(file).items():
            merged[key] = (value, f"'{key}' in '{file}'")
    for key, value in values.items():
        if value is not None:
            merged[key] = (value, f"--{key.replace('_', '-')}")
    unknown = [where for key, (_, where) in merged.items() if key not in IMAGE_OPTIONS]
    if unknown:
        raise OnnxcalError(f"{unknown[0]} is not a preprocessing option",
                           f"the options are: {', '.join(IMAGE_OPTIONS)}")
    out = {key: _image_value(key, value, where) for key, (value, where) in merged.items()}
    return ImageOptions(**out)


def _image_value(key: str, value: object, where: str) -> Any:  # the type of ImageOptions' field ``key``
    def fail(what: str) -> Never:
        raise OnnxcalError(f"{where} = {value!r} is not {what}")

    if key == "resize":
        n = _as_int(value)
        return n if n is not None and 0 < n <= MAX_SIDE else fail(f"a number of pixels from 1 to {MAX_SIDE}")
    if key == "crop":
        if isinstance(value, str):
            parts = re.split(r"[x,]", value.lower())
        elif isinstance(value, (list, tuple)):
            parts = list(value)
        else:
            parts = [value]
        dims = [_as_int(v) for v in parts]
        if len(dims) not in (1, 2) or any(d is None or not 0 < d <= MAX_SIDE for d in dims):
            fail(f"a size N or HxW in pixels, each from 1 to {MAX_SIDE}")
        return (dims[0], dims[-1])
    if key == "scale":
        text = str(value).strip().lower()
        if value is True or text in ("true", "yes", "1"):
            return True
        if value is False or text in ("false", "no", "0"):
            return False
        fail("true or false")
    if key in ("mean", "std"):
        values: Sequence[Any] = (
            value.split(",") if isinstance(value, str) else value if isinstance(value, (list, tuple)) else [value]
        )
        try:
            nums = tuple(float(v) for v in values)
        except (TypeError, ValueError):
            fail("a list of numbers, one per channel")
        if not nums or not all(np.isfinite(nums)) or (key == "std" and min(nums) <= 0):
            fail("a list of finite numbers (std > 0), one per channel")
        return nums
    if key == "channel_order":
        text = str(value).upper()
        return text if text in ("RGB", "BGR") else fail("RGB or BGR")
    if key == "layout":
        text = str(value).upper()
        return text if text in ("NCHW", "NHWC") else fail("NCHW or NHWC")
    if key == "dtype":
        try:
            return np.dtype(str(value)).name
        except TypeError:
            fail("a numpy dtype name such as float32 or uint8")
    text = str(value).lower()  # interpolation
    return text if text in _INTERPOLATION else fail(f"one of {', '.join(_INTERPOLATION)}")


def _as_int(value: object) -> int | None:
    if isinstance(value, bool):
        return None
    if isinstance(value, int):
        return value
    if isinstance(value, str) and value.strip().isdigit():
        return int(value)
    return None


@dataclass(frozen=True)
class ImagePlan:
    """Preprocessing resolved against the model input."""

    options: ImageOptions
    channels: int
    layout: str
    dtype: np.dtype
    scale: bool

    def to_dict(self) -> dict[str, Any]:
        o = self.options
        return {
            "resize": o.resize, "crop": list(o.crop) if o.crop else None, "scale": self.scale,
            "mean": list(o.mean) if o.mean else None, "std": list(o.std) if o.std else None,
            "channel_order": o.channel_order, "layout": self.layout, "dtype": self.dtype.name,
            "interpolation": o.interpolation, "channels": self.channels,
        }


def plan_images(options: ImageOptions, spec: TensorSpec) -> ImagePlan:
    """Resolve ``options`` against model input ``spec``: layout, channels, dtype, scaling.

    Raises
    ------
    OnnxcalError
        An input that is no image batch, or options that do not fit it.
    """
    shape = spec.shape
    if shape is not None and len(shape) != 4:
        raise OnnxcalError(
            f"model input '{spec.name}' has rank {len(shape)}, but an image batch has rank 4 "
            "(N, C, H, W or N, H, W, C)",
            "save the inputs as .npy or .npz instead",
        )
    dims = [d if isinstance(d, int) and d > 0 else None for d in (shape or (None,) * 4)]
    layout = options.layout
    if layout is None:
        first, last = dims[1] in (1, 3), dims[3] in (1, 3)
        layout = "NHWC" if last and not first else "NCHW"
    channels = dims[1] if layout == "NCHW" else dims[3]
    if channels is None:
        channels = len(options.mean or options.std or ()) or 3
    if channels not in (1, 3):
        other = "NHWC" if layout == "NCHW" else "NCHW"
        raise OnnxcalError(
            f"model input '{spec.name}' (shape {show_shape(shape)}) has {channels} channels in layout {layout}",
            f"set --layout {other} if that is the model's layout; onnxcal reads 1- or 3-channel images",
        )
    model_dtype = np.dtype(spec.dtype) if spec.dtype != "unknown" else np.dtype(np.float32)
    dtype = np.dtype(options.dtype) if options.dtype else model_dtype
    if dtype != model_dtype:
        raise OnnxcalError(
            f"--dtype {dtype.name} does not match model input '{spec.name}', which takes {model_dtype.name}",
            f"set --dtype {model_dtype.name} (or drop it)",
        )
    scale = options.scale if options.scale is not None else dtype.kind == "f"
    if dtype.kind != "f" and (scale or options.mean or options.std):
        raise OnnxcalError(
            f"model input '{spec.name}' takes {dtype.name} pixels, which cannot hold scaled or normalised values",
            "drop --scale, --mean and --std for this model",
        )
    for key in ("mean", "std"):
        values = getattr(options, key)
        if values is not None and len(values) not in (1, channels):
            raise OnnxcalError(
                f"--{key} has {len(values)} values but the model takes {channels}-channel images",
                f"give {channels} values (or one for all channels)",
            )
    return ImagePlan(options, channels, layout, dtype, bool(scale))
