"""Check a patched model against a NumPy reference computed from the original.

The reference is the activation of the calibrated logits in float64, e.g.
``softmax(logits / T)`` or ``softmax(w * logits + b)``, where the logits are
the original model's class scores on the same inputs and the parameters are
those in the patched model's calibration record (``Scaling.apply``).

Besides the reference checks, a CI gate may hold the patched model's own
outputs to thresholds on labelled data (:func:`threshold_checks`) and its
speed to a bound relative to the original (:func:`time_alternately`,
:func:`latency_check`); :func:`onnxcal.junit.junit_xml` reports every check as a JUnit
test case.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from . import l1_sigmoid as _l1
from .graph import FoldedValues, np_dtype
from .graph import post as _post
from .latency import (  # noqa: F401 - re-exported: the latency gate's names, for api and tests
    LATENCY_BUDGET,
    LATENCY_CHUNKS,
    LATENCY_CONFIDENCE,
    LATENCY_PRECISION,
    LatencyRatio,
    latency_ratio,
    median_interval,
)
from .metrics import METRIC_LABELS, Metrics, chunk_rows, log_softmax, sigmoid
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
    """One verification check and its measured figure.

    Attributes
    ----------
    name : str
        Short id (``reference``, ``argmax``, ``record``, ``max-ece``, ...).
    passed : bool
        False when the check failed; True when it passed or was skipped.
    value, limit : float or None
        The measured figure and the bound it is held to (None when there
        is no figure, or no bound: a figure reported for information).
    detail : str
        What was measured, in words.
    skipped : bool
        The check could not be run (``detail`` says why); it does not fail.
    undecided : bool
        A statistical gate whose interval straddles its target (a decision
        gate, or the latency ratio): more data would tell; it does not fail.
    """

    name: str
    passed: bool
    value: float | None
    limit: float | None
    detail: str
    skipped: bool = False
    undecided: bool = False

    @property
    def status(self) -> str:
        """``"pass"``, ``"fail"``, ``"skip"`` or ``"undecided"``."""
        if self.skipped:
            return "skip"
        return "undecided" if self.undecided and self.passed else ("pass" if self.passed else "fail")

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready: a NaN or infinite figure becomes None."""
        d = asdict(self)
        for key in ("value", "limit"):
            if d[key] is not None and not np.isfinite(d[key]):
                d[key] = None
        return {**d, "status": self.status}


def skipped(name: str, why: str) -> Check:
    """A check that could not be run, and why."""
    return Check(name, True, None, None, why, skipped=True)


@dataclass(frozen=True)
class VerifyResult:
    """All checks; ``passed`` when none failed (skipped checks do not fail).

    Attributes
    ----------
    checks : tuple of Check
    n : int
        Samples run.
    original : str
        Where the reference logits came from: the original model's path,
        the capture file(s), or the patched model itself.
    reference_from : str
        ``"original"`` (the uncalibrated model was run), ``"scores"``
        (a capture of it was read), ``"patched-graph"`` (the patch was
        undone in memory and the patched graph's own logits recomputed)
        or ``"none"`` (no calibration record to build a reference from).
    notes : tuple of str
        What the reader should know about how the checks were made.
    """

    checks: tuple[Check, ...]
    n: int
    original: str
    reference_from: str = "original"
    notes: tuple[str, ...] = ()

    @property
    def passed(self) -> bool:
        return all(c.passed for c in self.checks)

    @property
    def failed(self) -> tuple[Check, ...]:
        return tuple(c for c in self.checks if not c.passed)

    def to_dict(self) -> dict[str, Any]:
        return {
            "passed": self.passed,
            "n": self.n,
            "original": self.original,
            "reference_from": self.reference_from,
            "notes": list(self.notes),
            "checks": [c.to_dict() for c in self.checks],
        }


def _as_scaling(scaling: Scaling | float) -> Scaling:
    return scaling if isinstance(scaling, Scaling) else Scaling.of_temperature(float(scaling))


def _describe(scaling: Scaling) -> str:
    if scaling.temperature is not None:
        return f"logits / {scaling.temperature:.6g}"
    if not scaling.is_affine:
        return f"{scaling.method} map of logits"
    return "logits / T_k" if scaling.method == "temperature" else "w * logits + b"


# Maps that can change a row's argmax or a 0.5 decision through ties or flat steps
# (piecewise-constant or piecewise-linear lookups): their decisions are checked
# against the reference's, not the original model's.
LOOKUP_METHODS = ("isotonic", "histogram")


def decisions_detail(scaling: Scaling, multiclass: bool) -> str:
    """What the argmax / decision check compares, in words."""
    if multiclass:
        what = "unchanged" if scaling.method == "temperature" else "as in the reference"
        text = f"fraction of rows whose argmax is {what} (up to rounding ties)"
    else:
        text = "fraction of 0.5-threshold decisions as in the reference"
    if scaling.method in LOOKUP_METHODS:
        text += (f"; {scaling.method} can change the ranking and the decision (ties, flat steps), so it is "
                 "checked against the reference, not against the original model")
    return text


def reference_probabilities(
    logits: np.ndarray, scaling: Scaling | float, activation: str, post: tuple[Any, ...] = ()
) -> np.ndarray:
    """The NumPy reference: post(activation(scale(logits))), float64.

    ``logits`` has the class axis last; ``scaling`` is a Scaling or a
    temperature. For ``"logsoftmax"`` the reference is in log space, like
    the model's output. ``post`` is the post-processing the model applies
    between the activation and the output (``graph.post``: x100, a clip,
    one class taken, a quantization round trip), in order.
    """
    z = _as_scaling(scaling).apply(logits)
    post = tuple(post)
    if activation == "sigmoid" and post and isinstance(post[0], _post.Normalize):  # L1(sigmoid): no 0 / 0
        return _post.apply(_l1.probabilities(z), post[1:])
    if activation == "logsoftmax":
        p = log_softmax(z, axis=-1)
    elif activation == "sigmoid":
        p = sigmoid(z)
    else:
        p = np.exp(log_softmax(z, axis=-1))
    return _post.apply(p, post)


def output_tolerance(dtypes: str | tuple[str, ...], post: tuple[Any, ...] = ()) -> float:
    """The tolerance for an output: the dtype's (:func:`tolerance`), times what a constant
    factor multiplies the values by, plus one quantization step when the output is quantized
    (a float softmax quantized by onnxcal and a quantized kernel may round one step apart)."""
    return tolerance(dtypes) * max(1.0, _post.gain(tuple(post))) + _post.step_size(tuple(post))


class Comparison:
    """Checks (1)-(3) of :func:`compare`, accumulated over row chunks.

    ``add`` takes the patched outputs and the original logits of some rows
    (class axis last); only chunk-sized float64 temporaries are made, so a
    large set is compared in the memory of its inputs, or batch by batch
    as a model runs (``calibrate``). ``checks`` gives the figures over all
    rows added. The reference is post(activation(scale(logits)))
    (:func:`reference_probabilities`), ``post`` the model's own
    post-processing after the activation.
    """

    def __init__(
        self, scaling: Scaling | float, activation: str, dtype: str | tuple[str, ...], post: tuple[Any, ...] = ()
    ) -> None:
        self.scaling, self.activation, self.post = _as_scaling(scaling), activation, tuple(post)
        self.tol = output_tolerance(dtype, self.post)
        self.one = _post.takes_one(self.post)
        # Row sums are checked when the post-processing keeps them known (a factor, an L1 norm).
        self.summable = all(isinstance(op, (_post.Scale, _post.Normalize)) for op in self.post)
        self.half = 0.5 * max(_post.gain(self.post), 1e-300) if self.one or self.post else 0.5
        self.values = self.rows = 0
        self.err = self.sums = 0.0
        self.agree = 0.0  # rows (softmax) or values (sigmoid, one class) that decide as the reference does

    @property
    def multiclass(self) -> bool:
        normalised = self.activation == "sigmoid" and _post.normalises(self.post)  # L1(sigmoid): probability rows
        return (self.activation in ("softmax", "logsoftmax") or normalised) and not self.one

    def add(self, patched: np.ndarray, logits: np.ndarray) -> None:
        """Compare the patched outputs of some rows with the reference from their logits."""
        patched, logits = np.asarray(patched), np.asarray(logits)
        if patched.ndim < 2:
            self._add(patched, logits)
            return
        step = chunk_rows(max(patched.shape[-1], np.shape(logits)[-1] if np.ndim(logits) else 1))
        for start in range(0, len(patched), step):
            self._add(patched[start : start + step], logits[start : start + step])

    def _add(self, patched: np.ndarray, logits: np.ndarray) -> None:
        ref = reference_probabilities(logits, self.scaling, self.activation, self.post)
        got = np.asarray(patched, dtype=np.float64)
        if not got.size:
            return
        diff = np.abs(got - ref)
        if self.activation == "logsoftmax":  # a log-probability of -400 rounds by 400 times more than one near 0
            diff /= np.maximum(1.0, np.abs(ref))
        worst = float(np.max(diff))
        self.err = max(self.err, np.inf if np.isnan(worst) else worst)  # a NaN output never passes
        self.values += got.size
        self.rows += got.size // got.shape[-1] if got.ndim else 1
        if self.multiclass:
            if self.summable:
                gain = max(_post.gain(self.post), 1e-300)
                probs = np.exp(got) if self.activation == "logsoftmax" else got / gain
                self.sums = max(self.sums, float(np.max(np.abs(probs.sum(axis=-1) - 1.0))))
            self.agree += _top_class_agreeing(got, ref, self.tol)
        else:
            # A decision may differ only where the reference lies within rounding of the threshold.
            half, tol = self.half, self.tol
            self.agree += float(np.sum(((got > half) == (ref > half)) | (np.abs(ref - half) <= tol)))

    def checks(self) -> tuple[Check, ...]:
        tol, activation = self.tol, self.activation
        relative = ", relative beyond |reference| = 1" if activation == "logsoftmax" else ""
        then = _post.describe(self.post)
        checks = [
            Check(
                "reference",
                self.err <= tol,
                self.err,
                tol,
                f"max |patched - {activation}({_describe(self.scaling)}){then}|{relative} over {self.values} values",
            )
        ]
        if self.multiclass:
            if self.summable:
                checks.append(Check("row-sums", self.sums <= tol, self.sums, tol, "max |sum_k p_k - 1| over rows"))
            else:
                checks.append(skipped("row-sums",
                                      f"the output is post-processed ({then[7:]}), its rows need not sum to 1"))
            agree = self.agree / self.rows if self.rows else 1.0
            checks.append(Check("argmax", agree == 1.0, agree, 1.0, decisions_detail(self.scaling, True)))
        else:
            decide = self.agree / self.values if self.values else 1.0
            checks.append(Check("decisions", decide == 1.0, decide, 1.0, decisions_detail(self.scaling, False)))
        return tuple(checks)


def compare(
    patched: np.ndarray,
    logits: np.ndarray,
    scaling: Scaling | float,
    activation: str,
    dtype: str | tuple[str, ...],
    post: tuple[Any, ...] = (),
) -> tuple[Check, ...]:
    """Checks (1) max abs error vs reference, (2) row sums, (3) argmax agreement
    (for a sigmoid, or one class's probability: the 0.5-threshold decisions).

    ``patched`` holds the model's real output as rows (class axis last);
    ``logits`` the original logits as rows; the reference is
    post(activation(scale(logits))) (:func:`reference_probabilities`). The
    argmax (or 0.5-threshold decisions) must match the reference's; for
    temperature scaling that is the original's. ``dtype`` is the dtype (or
    dtypes) the values pass through; see :func:`output_tolerance`. Computed
    in row chunks (:class:`Comparison`): the float64 reference is never made whole.
    """
    comparison = Comparison(scaling, activation, dtype, post)
    comparison.add(patched, logits)
    return comparison.checks()


def identity_check(outputs: list[tuple[str, np.ndarray, np.ndarray, float]], params: str) -> Check:
    """The patched model with its parameters set to the identity reproduces the original's outputs.

    ``outputs`` holds, for every output the patched model keeps (same
    name), the original's values, the identity-patched model's and the
    tolerance. A rewrite that read the model right changes nothing at the
    identity (T = 1, w = 1, b = 0); one that scaled the wrong tensor, or
    treated probabilities as logits, does. This compares the model's own
    outputs, not onnxcal's reading of them. ``params`` names the identity
    ("T = 1", "w = 1, b = 0").
    """
    worst: tuple[float, str, float, float] | None = None
    for name, original, identity, tol in outputs:
        err = _difference(original, identity)
        if err > tol:
            detail = (f"with {params} the patched output '{name}' differs from the original's by {err:.3g} "
                      f"(more than {tol:.3g}): onnxcal did not find the real logits, or misread what follows them")
            return Check("identity", False, err, tol, detail)
        ratio = err / tol if tol > 0 else 0.0
        if worst is None or ratio > worst[0]:
            worst = (ratio, name, err, tol)
    if worst is None:
        return skipped("identity", "the patched model keeps none of the original's outputs")
    names = ", ".join(f"'{n}'" for n, *_ in outputs)
    return Check("identity", True, worst[2], worst[3],
                 f"with {params} the patched model reproduces the original's outputs {names} (max difference)")


def _difference(a: ArrayLike, b: ArrayLike) -> float:
    """Largest difference between two outputs: numbers (float or not), or ZipMap lists of maps."""
    a, b = np.asarray(a), np.asarray(b)
    if a.dtype == object:  # a ZipMap's sequence of maps: compare the values, key by key
        if len(a) != len(b):
            return float("inf")
        keys = sorted(a[0]) if len(a) else []
        a = np.array([[row[k] for k in keys] for row in a], dtype=np.float64)
        b = np.array([[row.get(k, np.nan) for k in keys] for row in b], dtype=np.float64)
    if a.shape != b.shape:
        return float("inf")
    if a.dtype.kind not in "fc" or b.dtype.kind not in "fc":
        return 0.0 if np.array_equal(a, b) else float("inf")
    a, b = a.astype(np.float64), b.astype(np.float64)
    both_nan = np.isnan(a) & np.isnan(b)
    with np.errstate(invalid="ignore"):
        d = np.where(both_nan, 0.0, np.abs(a - b))
    return float(np.max(d)) if d.size else 0.0


def reading_check(described: str | None) -> Check:
    """Fails when the original output, read as raw logits, holds probability rows (``guard``)."""
    if described is None:
        return Check("reading", True, None, None, "the original output's rows do not look like probabilities")
    return Check(
        "reading", False, None, None,
        f"the original output holds probabilities, not raw logits ({described}), yet the patch "
        "treats them as logits: onnxcal misread the model",
    )


def _top_class_agreeing(got: np.ndarray, ref: np.ndarray, tol: float) -> int:
    """Rows whose patched top class is, within ``tol``, a top class of the reference.

    Rounding the output can tie two classes that the reference tells apart,
    or swap two whose reference values differ by less than the rounding (a
    float16 output rounds 0.50001 and 0.49999 alike); such rows agree. A
    patch that changes a decision by more than the rounding does not.
    """
    chosen = np.take_along_axis(ref, got.argmax(axis=-1)[..., None], axis=-1)[..., 0]
    return int(np.count_nonzero(chosen >= ref.max(axis=-1) - 2 * tol))


def _flat(values: ArrayLike | dict[str, ArrayLike]) -> np.ndarray:
    if isinstance(values, dict):
        return np.concatenate([np.asarray(values[k], dtype=np.float64).reshape(-1) for k in sorted(values)])
    return np.asarray(values, dtype=np.float64).reshape(-1)


def record_check(
    recorded: float | dict[str, ArrayLike], in_graph: float | dict[str, ArrayLike] | None,
    dtype: str | None = "float32",
) -> Check:
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
        return Check("record", False, None, limit, "parameter in the graph not found")
    r, g = _flat(recorded), _flat(in_graph)
    if r.shape != g.shape:
        return Check("record", False, None, limit, f"record has {r.size} parameters, graph {g.size}")
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


def folded_record_check(recorded: Scaling, found: FoldedValues | None) -> Check:
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


def source_check(recorded_sha: str, original_sha: str, file_only_sha: str | None = None) -> Check:
    """Check that the original model is the one the record was made from.

    ``original_sha`` covers the model file and its external data files
    (``graph.model_sha256``); ``file_only_sha``, for a model with external
    data, the .onnx file alone, which is what records written before
    onnxcal hashed external data hold: such a record passes on it, and the
    detail says the weights were not compared.
    """
    if recorded_sha != original_sha and file_only_sha is not None and recorded_sha == file_only_sha:
        return Check(
            "source", True, 1.0, 1.0,
            "original's .onnx file matches the record's sha256, which (written by an older onnxcal) covers "
            "only that file, not its external data files: the weights were not compared",
        )
    same = recorded_sha == original_sha
    return Check(
        "source",
        same,
        1.0 if same else 0.0,
        1.0,
        "original's sha256 matches the record" if same else
        f"original's sha256 {original_sha[:12]}... differs from the record's {recorded_sha[:12]}...",
    )


def format_figure(value: float | None) -> str:
    """A check's value or limit for tables: 3 significant digits, "-" when absent."""
    return "-" if value is None or not np.isfinite(value) else f"{value:.3g}"


def threshold_checks(
    metrics: Metrics,
    *,
    max_ece: float | None = None,
    max_nll: float | None = None,
    min_accuracy: float | None = None,
) -> tuple[Check, ...]:
    """Hold metrics of the patched model's outputs against the labels to bounds.

    ``metrics`` is :func:`onnxcal.metrics.evaluate` of the patched model's
    own outputs (see :func:`onnxcal.metrics.scores_from_probabilities`);
    each bound given becomes one check (``max-ece``, ``max-nll``,
    ``min-accuracy``). A NaN figure fails.
    """
    wanted = (("max-ece", "ece", max_ece, True), ("max-nll", "nll", max_nll, True),
              ("min-accuracy", "accuracy", min_accuracy, False))
    checks = []
    for name, field, limit, upper in wanted:
        if limit is None:
            continue
        value = float(getattr(metrics, field))
        ok = bool(value <= limit) if upper else bool(value >= limit)
        label = METRIC_LABELS[field].format(bins=metrics.n_bins)
        bound = "at most" if upper else "at least"
        checks.append(
            Check(
                name,
                ok,
                value,
                float(limit),
                f"{label} of the patched model's outputs against the labels of {metrics.n} samples "
                f"({bound} {limit:g})",
            )
        )
    return tuple(checks)


def time_alternately(
    runs: Sequence[Callable[[], object]], repeats: int, warmup: int = 3, start: int = 0
) -> np.ndarray:
    """Wall time of each callable, ``repeats`` times, interleaved in one process.

    Round r calls them in order rotated by r (A B C, B C A, C A B, ...; for
    two: A B, B A, A B, ...), so every callable takes every position
    equally often and a change in the machine's load, or a cache warmed by
    the previous call, hits every callable alike (common practice for
    side-by-side timing on a shared machine). ``warmup`` rounds are run
    first and not timed. ``start``: the number of rounds timed before (a
    continuation goes on with the order where the last call left it).

    Returns
    -------
    ndarray of shape (len(runs), repeats)
        Seconds per call.
    """
    for _ in range(warmup):
        for run in runs:
            run()
    times = np.empty((len(runs), repeats))
    k = len(runs)
    for r in range(repeats):
        for i in [(start + r + j) % k for j in range(k)]:
            began = time.perf_counter()
            runs[i]()
            times[i, r] = time.perf_counter() - began
    return times


def latency_check(
    original: np.ndarray, patched: np.ndarray, max_ratio: float | None = None, *, batch: int, against: str = "original"
) -> Check:
    """Latency of the patched model over the original's: the median of the per-round ratios.

    ``original`` and ``patched`` are seconds per call from
    :func:`time_alternately`. Without ``max_ratio`` the figure is reported
    and the check passes. With it, the check passes when the ratio's 95 %
    interval (:func:`median_interval`) lies at or below ``max_ratio``, fails
    only when it lies wholly above, and is undecided (not failed) when it
    holds ``max_ratio``: noise never fails the gate.
    """
    r = latency_ratio(original, patched)
    interval = "unbounded" if not np.isfinite(r.high - r.low) else f"{r.low:.3f} to {r.high:.3f}"
    detail = (
        f"median ratio over {r.rounds // 2} pairs of alternating runs (A B, B A) each on a batch of {batch} "
        f"(95% interval {interval}); "
        f"median latency, patched {r.patched * 1e3:.3g} ms / {against} {r.original * 1e3:.3g} ms"
    )
    if max_ratio is None or r.high <= max_ratio:
        return Check("latency", True, r.ratio, max_ratio, detail)
    if r.low > max_ratio:
        return Check("latency", False, r.ratio, max_ratio, f"{detail}; the whole interval lies above the limit")
    return Check("latency", True, r.ratio, max_ratio,
                 f"undecided: the interval holds the limit {max_ratio:g}, so the runs cannot tell the ratio from it; "
                 f"{detail}", undecided=True)
