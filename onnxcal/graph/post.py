"""What a model does to its probabilities between the activation and the output.

Each kind is a small frozen dataclass with the NumPy reference of what the
ONNX operators compute (``reference``, float64, class axis last), a
description in words (``describe``) and a JSON form for the calibration
record. ``verify`` compares the patched model's real output with
post(activation(scale(z))), applying these in order.

======================  ==========================================  ===============================
class                   ONNX operators (ONNX operator spec)          what it keeps
======================  ==========================================  ===============================
``Scale(factor)``       ``Mul`` (or ``Div``) by a positive constant  probabilities times a constant
``Clip(low, high)``     ``Clip`` with constant bounds                clamped probabilities
``Take(index)``         ``Gather`` / ``Slice`` of one class          one class's probability
``Quantize(...)``       ``QuantizeLinear`` then ``DequantizeLinear``  probabilities on a grid
``Normalize()``         ``Div`` by ``ReduceSum``, ai.onnx.ml         an L1-normalised vector
                        ``Normalizer(norm="L1")``
======================  ==========================================  ===============================
"""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Any, cast

import numpy as np


@dataclass(frozen=True)
class Scale:
    """The probabilities times ``factor`` (e.g. 100 for percent; a converter's 1.0)."""

    factor: float

    def reference(self, p: np.ndarray) -> np.ndarray:
        return p * self.factor

    def describe(self) -> str:
        return f"x{self.factor:g}" + (" (percent)" if self.factor == 100 else "")


@dataclass(frozen=True)
class Clip:
    """The probabilities clamped to [low, high] (ONNX ``Clip``; None: no bound)."""

    low: float | None
    high: float | None

    def reference(self, p: np.ndarray) -> np.ndarray:
        return cast(np.ndarray, np.clip(p, self.low, self.high))

    def describe(self) -> str:
        low = "-inf" if self.low is None else f"{self.low:g}"
        high = "inf" if self.high is None else f"{self.high:g}"
        return f"clipped to [{low}, {high}]"


@dataclass(frozen=True)
class Take:
    """One class's probability: column ``index`` of the rows (``Gather`` or ``Slice``)."""

    index: int

    def reference(self, p: np.ndarray) -> np.ndarray:
        return p[..., self.index : self.index + 1]

    def describe(self) -> str:
        return f"class {self.index} taken"


@dataclass(frozen=True)
class Quantize:
    """``DequantizeLinear(QuantizeLinear(p, scale, zero_point), scale, zero_point)``.

    QuantizeLinear rounds p / scale half to even, adds the zero point and
    saturates to the integer type; DequantizeLinear maps back (ONNX
    operator spec, QuantizeLinear and DequantizeLinear). The output is p
    within half a step ``scale``.
    """

    scale: float
    zero_point: int
    dtype: str

    def reference(self, p: np.ndarray) -> np.ndarray:
        info = np.iinfo(np.dtype(self.dtype))
        q = np.clip(np.rint(p / self.scale) + self.zero_point, info.min, info.max)
        return cast(np.ndarray, (q - self.zero_point) * self.scale)

    def describe(self) -> str:
        return f"quantized to {self.dtype} (scale {self.scale:.4g}, zero point {self.zero_point}) and back"


@dataclass(frozen=True)
class Normalize:
    """The vector divided by its sum (L1 normalisation; a probability vector stays as it is)."""

    def reference(self, p: np.ndarray) -> np.ndarray:
        return cast(np.ndarray, p / np.sum(np.abs(p), axis=-1, keepdims=True))

    def describe(self) -> str:
        return "L1-normalised"


PostOp = Scale | Clip | Take | Quantize | Normalize
_KINDS: dict[str, type] = {c.__name__.lower(): c for c in (Scale, Clip, Take, Quantize, Normalize)}


def apply(p: np.ndarray, post: tuple[PostOp, ...]) -> np.ndarray:
    """``p`` (class axis last) through every post-processing step, in order."""
    for step in post:
        p = step.reference(p)
    return p


def step_size(post: tuple[PostOp, ...]) -> float:
    """The coarsest quantization step the output values pass through (0 when none)."""
    gain, step = 1.0, 0.0
    for op in post:
        if isinstance(op, Scale):
            gain *= abs(op.factor)
            step *= abs(op.factor)
        elif isinstance(op, Quantize):
            step = max(step, op.scale)
    return step


def gain(post: tuple[PostOp, ...]) -> float:
    """How much the post-processing multiplies the probabilities by (rounding scales with it)."""
    return float(np.prod([abs(op.factor) for op in post if isinstance(op, Scale)]))


def takes_one(post: tuple[PostOp, ...]) -> bool:
    """True when the output holds one class's value only."""
    return any(isinstance(op, Take) for op in post)


def normalises(post: tuple[PostOp, ...]) -> bool:
    """True when the values are L1-normalised (after a Sigmoid: the ``sigmoid-l1`` kind of fit)."""
    return any(isinstance(op, Normalize) for op in post)


def describe(post: tuple[PostOp, ...]) -> str:
    """``"then x100 (percent), then class 1 taken"``, or "" when there is none."""
    return "".join(f", then {op.describe()}" for op in post)


def to_json(post: tuple[PostOp, ...]) -> list[dict[str, Any]]:
    return [{"kind": type(op).__name__.lower(), **asdict(op)} for op in post]


def from_json(items: list[dict[str, Any]]) -> tuple[PostOp, ...]:
    """The post-processing a record lists (raises KeyError or TypeError on a damaged list)."""
    out = []
    for item in items:
        fields = dict(item)
        out.append(_KINDS[fields.pop("kind")](**fields))
    return tuple(out)


def invert(rows: np.ndarray, post: tuple[PostOp, ...], k: int) -> np.ndarray | None:
    """Probability rows (K per row) back from post-processed output rows, or None.

    Scaling is divided out; clipping and quantization are left as they are
    (they move a probability by at most a bound or half a step); one class
    of two gives the other as 1 - p. None when the rows cannot be recovered
    (one class of more than two).
    """
    p = np.asarray(rows, dtype=np.float64)
    for op in reversed(post):
        if isinstance(op, Scale):
            p = p / op.factor
        elif isinstance(op, Take):
            if k != 2:
                return None
            p = np.concatenate([1 - p, p], axis=-1) if op.index == 1 else np.concatenate([p, 1 - p], axis=-1)
    return p
