"""Check a patched model against a NumPy reference computed from the original.

The reference is ``softmax(logits / T)`` in float64, where the logits are the
original model's class scores on the same inputs and T is the temperature in
the patched model's calibration record.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np

from .metrics import log_softmax

# Largest allowed |patched - reference| and |row sum - 1|, by output dtype.
# float32 softmax outputs carry ~1e-7 relative rounding; 1e-5 leaves room for
# the different summation orders of onnxruntime's kernels (common practice).
TOLERANCE = {"float32": 1e-5, "float64": 1e-9}


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


def reference_probabilities(logits: np.ndarray, temperature: float, activation: str) -> np.ndarray:
    """The NumPy reference: the activation of ``logits / temperature``, float64.

    ``logits`` has the class axis last. For ``"logsoftmax"`` the reference is
    in log space, like the model's output.
    """
    z = np.asarray(logits, dtype=np.float64) / temperature
    if activation == "logsoftmax":
        return log_softmax(z, axis=-1)
    if activation == "sigmoid":
        return 1.0 / (1.0 + np.exp(-z))
    return np.exp(log_softmax(z, axis=-1))


def compare(
    patched: np.ndarray,
    logits: np.ndarray,
    temperature: float,
    activation: str,
    dtype: str,
) -> tuple[Check, ...]:
    """Checks (1) max abs error vs reference, (2) row sums, (3) argmax agreement.

    Both arrays have the class axis last and the same shape.
    """
    tol = TOLERANCE.get(dtype, 1e-5)
    ref = reference_probabilities(logits, temperature, activation)
    got = np.asarray(patched, dtype=np.float64)
    err = float(np.max(np.abs(got - ref))) if got.size else 0.0
    checks = [
        Check(
            "reference",
            err <= tol,
            err,
            tol,
            f"max |patched - softmax(logits / {temperature:.6g})| over {got.size} values",
        )
    ]
    if activation in ("softmax", "logsoftmax"):
        probs = np.exp(got) if activation == "logsoftmax" else got
        sums = float(np.max(np.abs(probs.sum(axis=-1) - 1.0))) if got.size else 0.0
        checks.append(Check("row-sums", sums <= tol, sums, tol, "max |sum_k p_k - 1| over rows"))
        agree = float(np.mean(got.argmax(axis=-1) == np.asarray(logits).argmax(axis=-1)))
        checks.append(
            Check("argmax", agree == 1.0, agree, 1.0, "fraction of rows whose argmax is unchanged")
        )
    else:
        decide = float(np.mean((got > 0.5) == (np.asarray(logits) > 0)))
        checks.append(
            Check("decisions", decide == 1.0, decide, 1.0, "fraction of 0.5-threshold decisions kept")
        )
    return tuple(checks)


def record_check(recorded: float, in_graph: float | None) -> Check:
    """Check that the record's temperature is the one the graph uses."""
    if in_graph is None:
        return Check("record", False, float("nan"), recorded, "temperature initializer missing")
    diff = abs(recorded - in_graph) / recorded
    # float32 initializer holds T to ~6e-8 relative.
    return Check(
        "record",
        diff <= 1e-6,
        diff,
        1e-6,
        f"record T = {recorded:.6g}, graph T = {in_graph:.6g} (relative difference)",
    )


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
