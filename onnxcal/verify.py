"""Check a patched model against a NumPy reference computed from the original.

The reference is the activation of the calibrated logits in float64, e.g.
``softmax(logits / T)`` or ``softmax(w * logits + b)``, where the logits are
the original model's class scores on the same inputs and the parameters are
those in the patched model's calibration record (``Scaling.apply``).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np

from .graph import np_dtype
from .metrics import log_softmax, sigmoid
from .scaling import Scaling

# Largest allowed |patched - reference| and |row sum - 1|, by the dtype the
# patched graph computes in (the coarser of the scores' and the output's);
# docs/commands.md (verify) gives the reasoning and the measured errors.
# float32 softmax outputs carry ~1e-7 relative rounding; 1e-5 leaves room for
# the different summation orders of onnxruntime's kernels (common practice).
# float16 has a unit roundoff of 2**-11 (4.9e-4, IEEE 754 binary16): the
# output alone is rounded by up to that much near 1, the Div rounds z / T
# relative to |z / T|, and onnxruntime's CPU provider runs float16 Gemm in
# float32 and may skip a float16 rounding of the logits that the captured
# reference has (measured: 2.6e-3 on the float16 fixture, even at T = 1).
# 5e-3 still catches a T off by 2 % there. bfloat16 (unit roundoff 2**-8, 8x
# coarser) scales that; no fixture measures it (no onnxruntime CPU kernels).
TOLERANCE = {"float64": 1e-9, "float32": 1e-5, "float16": 5e-3, "bfloat16": 4e-2}


def tolerance(dtypes: str | tuple[str, ...]) -> float:
    """The verify tolerance for a graph computing in ``dtypes`` (the loosest applies)."""
    names = (dtypes,) if isinstance(dtypes, str) else dtypes
    return max(TOLERANCE.get(d, TOLERANCE["float32"]) for d in names)


@dataclass(frozen=True)
class Check:
    """One verification check and its measured figure."""

    name: str
    passed: bool
    value: float
    limit: float
    detail: str

    def to_dict(self) -> dict:
        return asdict(self)


@dataclass(frozen=True)
class VerifyResult:
    """All checks; ``passed`` when every one passed."""

    checks: tuple[Check, ...]
    n: int
    original: str

    @property
    def passed(self) -> bool:
        return all(c.passed for c in self.checks)

    def to_dict(self) -> dict:
        return {
            "passed": self.passed,
            "n": self.n,
            "original": self.original,
            "checks": [c.to_dict() for c in self.checks],
        }


def _as_scaling(scaling: Scaling | float) -> Scaling:
    return scaling if isinstance(scaling, Scaling) else Scaling.of_temperature(float(scaling))


def _describe(scaling: Scaling) -> str:
    if scaling.temperature is not None:
        return f"logits / {scaling.temperature:.6g}"
    return "logits / T_k" if scaling.method == "temperature" else "w * logits + b"


def reference_probabilities(logits: np.ndarray, scaling: Scaling | float, activation: str) -> np.ndarray:
    """The NumPy reference: the activation of the calibrated logits, float64.

    ``logits`` has the class axis last; ``scaling`` is a Scaling or a
    temperature. For ``"logsoftmax"`` the reference is in log space, like
    the model's output.
    """
    z = _as_scaling(scaling).apply(logits)
    if activation == "logsoftmax":
        return log_softmax(z, axis=-1)
    if activation == "sigmoid":
        return sigmoid(z)
    return np.exp(log_softmax(z, axis=-1))


def compare(
    patched: np.ndarray,
    logits: np.ndarray,
    scaling: Scaling | float,
    activation: str,
    dtype: str | tuple[str, ...],
) -> tuple[Check, ...]:
    """Checks (1) max abs error vs reference, (2) row sums, (3) argmax agreement
    (for a sigmoid: the 0.5-threshold decision of every logit).

    Both arrays have the class axis last and the same shape. The argmax (or
    0.5-threshold decisions) must match the reference's; for temperature
    scaling that is the original's. ``dtype`` is the dtype (or dtypes) the
    patched graph computes in; see :func:`tolerance`.
    """
    tol = tolerance(dtype)
    scaling = _as_scaling(scaling)
    ref = reference_probabilities(logits, scaling, activation)
    got = np.asarray(patched, dtype=np.float64)
    err = float(np.max(np.abs(got - ref))) if got.size else 0.0
    checks = [
        Check(
            "reference",
            err <= tol,
            err,
            tol,
            f"max |patched - {activation}({_describe(scaling)})| over {got.size} values",
        )
    ]
    if activation in ("softmax", "logsoftmax"):
        probs = np.exp(got) if activation == "logsoftmax" else got
        sums = float(np.max(np.abs(probs.sum(axis=-1) - 1.0))) if got.size else 0.0
        checks.append(Check("row-sums", sums <= tol, sums, tol, "max |sum_k p_k - 1| over rows"))
        agree = float(np.mean(got.argmax(axis=-1) == ref.argmax(axis=-1)))
        what = "unchanged" if scaling.method == "temperature" else "as in the reference"
        checks.append(Check("argmax", agree == 1.0, agree, 1.0, f"fraction of rows whose argmax is {what}"))
    else:
        decide = float(np.mean((got > 0.5) == (ref > 0.5)))
        checks.append(
            Check("decisions", decide == 1.0, decide, 1.0, "fraction of 0.5-threshold decisions as in the reference")
        )
    return tuple(checks)


def _flat(values) -> np.ndarray:
    if isinstance(values, dict):
        return np.concatenate([np.asarray(values[k], dtype=np.float64).reshape(-1) for k in sorted(values)])
    return np.asarray(values, dtype=np.float64).reshape(-1)


def record_check(recorded, in_graph, dtype: str | None = "float32") -> Check:
    """Check that the record's parameters are the ones the graph uses.

    ``recorded`` and ``in_graph`` are a temperature, or dicts of parameter
    arrays (``in_graph`` None when an initializer is missing). The graph
    holds them in ``dtype``, so they are compared with the recorded values
    rounded to that dtype. Folded models: :func:`folded_record_check`.
    """
    dtype = dtype or "float32"
    # An initializer holds a value exactly as rounded; 1e-6 (and one float16
    # or two bfloat16 unit roundoffs) is a margin.
    limit = {"float16": float(np.finfo(np.float16).eps), "bfloat16": 2.0**-7}.get(dtype, 1e-6)
    if in_graph is None:
        return Check("record", False, float("nan"), limit, "parameter in the graph not found")
    r, g = _flat(recorded), _flat(in_graph)
    if r.shape != g.shape:
        return Check("record", False, float("nan"), limit, f"record has {r.size} parameters, graph {g.size}")
    rounded = r.astype(np_dtype(dtype)).astype(np.float64)
    diff = float(np.max(np.abs(rounded - g) / np.maximum(np.abs(rounded), 1e-12))) if r.size else 0.0
    shown = f"record T = {r[0]:.6g}, graph T = {g[0]:.6g}" if r.size == 1 else f"{r.size} parameters"
    return Check("record", diff <= limit, diff, limit, f"{shown} ({dtype}; max relative difference)")


# A folded parameter is estimated from weights each rounded once to their
# dtype: w_k as a least-squares ratio (relative error <= one unit roundoff u),
# b_k = beta (c'_k - w_k c_k) (error <= u beta (|c'_k| + |w_k c_k|)), and the
# patched weights are w_k times the original's within 2u (IEEE 754 rounding,
# u = 2**-24 float32, 2**-11 float16, 2**-8 bfloat16). The limit allows 4u;
# for float64 weights the float64 sums themselves dominate, hence 1e-12.
# Re-patching a folded model rounds the weights twice more (unfold, fold):
# after r roundings the bounds are r u and 2 r u, and the limit is (r + 1)/2
# times these values.
FOLD_LIMIT = {"float64": 1e-12, "float32": 4 * 2.0**-24, "float16": 4 * 2.0**-11, "bfloat16": 4 * 2.0**-8}


def folded_record_check(recorded: Scaling, found) -> Check:
    """Check that a folded model's weights carry the record's parameters.

    ``found`` (``graph.folded_values``) holds the per-class w and b
    estimated from the original's and the patched weights, or None when a
    folded initializer is missing. Each is compared with the record's
    (``Scaling.affine``: 1/T and 0 for temperature scaling): w relative to
    |w|, b relative to the size of the bias terms it is computed from, and
    every patched weight slice must be its w_k times the original's; all
    within :data:`FOLD_LIMIT` of the weights' dtype, times (r + 1) / 2 for
    weights rounded r times (re-patching a folded model).
    """
    if found is None:
        return Check("record", False, float("nan"), float("nan"), "folded weights not found in both models")
    limit = FOLD_LIMIT.get(found.dtype, FOLD_LIMIT["float32"]) * (found.roundings + 1) / 2
    w, b = recorded.affine()
    try:
        np.broadcast_shapes(found.w.shape, w.shape)
        np.broadcast_shapes(found.b.shape, b.shape)
    except ValueError:
        detail = f"record has {w.size} classes, the folded weights {found.w.size}"
        return Check("record", False, float("nan"), limit, detail)
    with np.errstate(divide="ignore", invalid="ignore"):
        dw = np.abs(found.w - w) / np.abs(w)
        db = np.abs(found.b - b) / np.maximum(found.b_scale, np.finfo(np.float64).tiny)
    diff = float(np.max(np.concatenate([dw.ravel(), db.ravel(), [found.residual]])))
    if recorded.temperature is not None:
        shown = f"record T = {recorded.temperature:.6g}, folded weights T = {1.0 / np.mean(found.w):.6g}"
    else:
        shown = f"{recorded.method} w, b of {max(w.size, found.w.size)} classes estimated from the folded weights"
    return Check("record", diff <= limit, diff, limit, f"{shown} ({found.dtype}; max relative difference)")


def source_check(recorded_sha: str, original_sha: str) -> Check:
    """Check that the original model is the one the record was made from."""
    same = recorded_sha == original_sha
    return Check(
        "source",
        same,
        1.0 if same else 0.0,
        1.0,
        "original's sha256 matches the record" if same else
        f"original's sha256 {original_sha[:12]}... differs from the record's {recorded_sha[:12]}...",
    )
