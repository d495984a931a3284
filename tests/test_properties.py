"""Properties of the whole job, checked by hypothesis over random models, data and T.

Each property names its outside reference (scipy, the ONNX operator spec, a
paper's definition) or says where its tolerance comes from. The example
counts are modest so the file runs in seconds; conftest.py derandomizes the
examples in CI (profile "ci") and draws new ones elsewhere.
"""

from __future__ import annotations

import math
import tempfile
from pathlib import Path

import numpy as np
import onnx
import onnxruntime as ort
import scipy.special
from conftest import random_mlp, save_model
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from onnx import helper

from onnxcal import api, graph, metrics
from onnxcal.errors import OnnxcalError
from onnxcal.fit import fit_sigmoid_temperature, fit_temperature
from onnxcal.scaling import Scaling
from onnxcal.verify import compare

SHA = "0" * 64
DTYPES = {"float16": np.float16, "float32": np.float32, "float64": np.float64}
# |z| and T drawn per dtype. float16 keeps |z / T| <= 8, where its tolerance
# (below) still says something; float32 and float64 go to |z / T| = 200.
LOGIT_RANGE = {"float16": 4.0, "float32": 10.0, "float64": 10.0}
T_RANGE = {"float16": (0.5, 4.0), "float32": (0.05, 20.0), "float64": (0.05, 20.0)}


def activation_model(shape: tuple[int, ...], axis: int, dtype: str, end: str, opset: int) -> onnx.ModelProto:
    """x -> Identity -> logits [-> Softmax | LogSoftmax on ``axis``], batch dim symbolic."""
    elem = helper.np_dtype_to_tensor_dtype(np.dtype(dtype))
    nodes = [helper.make_node("Identity", ["x"], ["logits"], name="identity")]
    out = "logits"
    if end != "raw":
        nodes.append(helper.make_node(end, ["logits"], ["probs"], name="act", axis=axis))
        out = "probs"
    dims = ["N", *shape[1:]]
    g = helper.make_graph(
        nodes,
        "property",
        [helper.make_tensor_value_info("x", elem, dims)],
        [helper.make_tensor_value_info(out, elem, dims)],
    )
    model = helper.make_model(g, opset_imports=[helper.make_opsetid("", opset)])
    model.ir_version = 8
    onnx.checker.check_model(model, full_check=True)
    return model


def run(model: onnx.ModelProto, x: np.ndarray, output: str) -> np.ndarray:
    sess = ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"])
    (y,) = sess.run([output], {"x": x})
    return y


@st.composite
def patch_cases(draw):
    """A model ending in Softmax, LogSoftmax or raw logits, its input and a temperature."""
    dtype = draw(st.sampled_from(sorted(DTYPES)))
    end = draw(st.sampled_from(["Softmax", "LogSoftmax", "raw"]))
    rank = draw(st.integers(2, 4))
    shape = [draw(st.integers(1, 4)) for _ in range(rank)]
    if end == "raw":  # raw logits: the class axis is 1 (NCHW; find_scores); one logit is binary
        axis = 1
        shape[1] = draw(st.sampled_from([1, 2, 3, 5]))
    else:
        axis = draw(st.integers(1, rank - 1))
        shape[axis] = draw(st.integers(2, 6))
    attr = axis - rank if draw(st.booleans()) and end != "raw" else axis  # negative axes too
    opset = draw(st.sampled_from([13, 17, 21]))
    zmax = LOGIT_RANGE[dtype]
    width = {"float16": 16, "float32": 32, "float64": 64}[dtype]
    x = draw(arrays(DTYPES[dtype], tuple(shape), elements=st.floats(-zmax, zmax, width=width)))
    lo, hi = T_RANGE[dtype]
    t = math.exp(draw(st.floats(math.log(lo), math.log(hi))))
    return activation_model(tuple(shape), attr, dtype, end, opset), x, axis, end, t


def reference(x: np.ndarray, axis: int, end: str, t: float) -> np.ndarray:
    """softmax / log-softmax / sigmoid of z / T in float64 (scipy.special)."""
    z = x.astype(np.float64) / t
    if end == "LogSoftmax":
        return scipy.special.log_softmax(z, axis=axis)
    if end == "raw" and x.shape[1] == 1:
        return scipy.special.expit(z)
    return scipy.special.softmax(z, axis=axis)


@settings(max_examples=100)
@given(patch_cases())
def test_patched_model_matches_the_numpy_reference(case):
    """onnxruntime on the patched graph = scipy on z / T, within the dtype's rounding.

    Tolerance, derived: with u the unit roundoff of the dtype (2**-53, 2**-24,
    2**-11; IEEE 754), the Div rounds z / T (and T itself is stored rounded),
    an error of at most about u * max|z / T| in every scaled logit; softmax's
    Jacobian (dp_i = p_i (dz_i - sum_j p_j dz_j)) turns that into at most
    2 u max|z / T| in a probability (and in a log-probability); exp, the sum of
    at most 6 terms and the output add a few u relative to the output's size.
    So |patched - reference| <= 8 u (1 + max|z / T| + |reference|); measured
    over 900 random cases the largest ratio of error to u (1 + max|z / T| +
    |reference|) was 1.4.
    """
    model, x, axis, end, t = case
    patched = graph.patch(model, t, source_sha256=SHA, source_name="m.onnx")
    out = graph.read_record(patched).output
    got = run(patched, x, out).astype(np.float64)
    ref = reference(x, axis, end, t)
    u = float(np.finfo(x.dtype).eps) / 2
    bound = 8 * u * (1 + np.max(np.abs(x.astype(np.float64) / t)) + np.abs(ref))
    assert got.shape == ref.shape
    if _dropped_division(x.dtype, t):
        ref = np.where(np.abs(got - ref) <= bound, ref, reference(x, axis, end, 1.0))
    assert np.all(np.abs(got - ref) <= bound), float(np.max(np.abs(got - ref) / bound))


def _dropped_division(dtype, t: float) -> bool:
    """Whether onnxruntime may leave out the Div of a float64 graph.

    Found by this file: onnxruntime 1.32's basic graph optimisations drop a
    float64 Div by a constant that rounds to 1.0 in float32 (|T - 1| < 6e-8),
    in the graphs where the logits are also an output (raw logits, the Div
    and the activation appended); the outputs are then those of T = 1, off by
    about |z| |1 - 1/T| < 6e-8 |z|. onnxcal leaves this alone (such a T is no
    calibration); verify's float64 tolerance (1e-9) would flag it.
    """
    return np.dtype(dtype) == np.float64 and np.float32(t) == np.float32(1.0)


@settings(max_examples=40)
@given(patch_cases())
def test_temperature_scaling_keeps_the_top_class(case):
    """argmax softmax(z / T) = argmax z for T > 0 (softmax and z / T are increasing; common practice).

    After rounding two classes may tie, so the property is: the original's top
    class is still a top class of the patched output (onnxruntime on the
    original and on the patched graph).
    """
    model, x, axis, end, t = case
    assume(end != "raw" or x.shape[1] > 1)  # one logit: no argmax
    patched = graph.patch(model, t, source_sha256=SHA, source_name="m.onnx")
    out = graph.read_record(patched).output
    before = run(model, x, "probs" if end != "raw" else "logits")
    after = run(patched, x, out)
    top = np.expand_dims(np.argmax(before, axis=axis), axis)
    assert np.array_equal(np.take_along_axis(after, top, axis), np.max(after, axis=axis, keepdims=True))


@settings(max_examples=80)
@given(patch_cases())
def test_verify_accepts_every_correct_patch(case):
    """verify's reference, row-sum and argmax checks pass on a correctly patched model.

    No false alarm on any shape, axis, dtype or T in range: the CI gate fails
    only when the patched model is wrong.
    """
    model, x, axis, end, t = case
    assume(end != "raw" or x.shape[1] > 1)
    assume(not _dropped_division(x.dtype, t))
    patched = graph.patch(model, t, source_sha256=SHA, source_name="m.onnx")
    record = graph.read_record(patched)
    site = graph.find_scores(patched, record.output)
    got = run(patched, x, record.output)
    rows = np.moveaxis(got, axis, -1).reshape(-1, x.shape[axis])
    logits = np.moveaxis(x, axis, -1).reshape(-1, x.shape[axis])
    checks = compare(rows, logits, record.scaling, record.activation, (site.dtype, site.output_dtype))
    assert all(c.passed for c in checks), [(c.name, c.value, c.limit) for c in checks]


@st.composite
def labelled_logits(draw, *, binary: bool = False):
    """Logits (float64) with labels drawn from softmax(z / T0) (sigmoid for one logit)."""
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    n = draw(st.integers(300, 2000))
    k = 1 if binary else draw(st.integers(2, 8))
    spread = draw(st.floats(0.5, 5.0))
    z = spread * rng.standard_normal((n, k))
    t0 = draw(st.floats(0.5, 3.0))
    if binary:
        y = (rng.random(n) < scipy.special.expit(z[:, 0] / t0)).astype(np.int64)
    else:
        p = scipy.special.softmax(z / t0, axis=1)
        y = (p.cumsum(axis=1) < rng.random((n, 1))).sum(axis=1)
    return z, y


@settings(max_examples=30)
@given(labelled_logits(), st.floats(math.log(0.1), math.log(10.0)))
def test_fitted_temperature_scales_with_the_logits(data, log_c):
    """T fitted on c z = c x T fitted on z, for c > 0.

    softmax((c z) / (c T)) = softmax(z / T), so the NLL of c z at c T equals
    that of z at T and the minimiser scales by c (Guo et al. 2017, sec. 4.2,
    define T as the minimiser of the NLL). Both fits stop within the solver's
    step tolerance, 1e-7 in log T; 1e-6 relative is a margin.
    """
    z, y = data
    c = math.exp(log_c)
    base = fit_temperature(z, y)
    assume(not base.on_bound and not fit_temperature(c * z, y).on_bound)
    scaled = fit_temperature(c * z, y)
    assert scaled.converged and base.converged
    assert math.isclose(scaled.temperature, c * base.temperature, rel_tol=1e-6)


@settings(max_examples=20)
@given(labelled_logits(binary=True), st.floats(math.log(0.1), math.log(10.0)))
def test_fitted_sigmoid_temperature_scales_with_the_logit(data, log_c):
    """The same covariance for a binary (one-logit, sigmoid) model."""
    z, y = data
    c = math.exp(log_c)
    base, scaled = fit_sigmoid_temperature(z, y), fit_sigmoid_temperature(c * z, y)
    assume(not base.on_bound and not scaled.on_bound)
    assert math.isclose(scaled.temperature, c * base.temperature, rel_tol=1e-6)


@st.composite
def mlp_models(draw):
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    final = draw(st.sampled_from([None, "Softmax", "LogSoftmax", "Sigmoid"]))
    k = draw(st.integers(1 if final in (None, "Sigmoid") else 2, 5))
    dtype = draw(st.sampled_from([np.float32, np.float64]))
    return random_mlp(rng, d=4, k=k, hidden=5, final=final, dtype=dtype)


temperatures = st.floats(math.log(0.05), math.log(20.0)).map(math.exp)


@settings(max_examples=30)
@given(mlp_models(), temperatures, temperatures, st.booleans())
def test_patching_twice_equals_patching_once_with_the_second_temperature(model, t1, t2, fold):
    """patch(patch(m, T1), T2) is byte for byte patch(m, T2): patches never stack.

    With --fold the weights are divided and multiplied back, so the folded
    re-patch is checked for equal outputs instead (its rounding is documented
    in docs/graph.md).
    """
    if fold:
        assume(graph.read_record(model) is None)
        try:
            once = graph.patch(model, t2, source_sha256=SHA, source_name="m.onnx", fold=True)
        except OnnxcalError:  # not every model has a foldable logits layer
            assume(False)
        first = graph.patch(model, t1, source_sha256=SHA, source_name="m.onnx", fold=True)
        twice = graph.patch(first, t2, source_sha256="1" * 64, source_name="other.onnx", fold=True)
        x = np.random.default_rng(0).standard_normal((7, 4)).astype(np.dtype(_input_dtype(model)))
        out = graph.read_record(once).output
        np.testing.assert_allclose(run(twice, x, out), run(once, x, out), rtol=1e-5, atol=1e-6)
        assert graph.read_record(twice).source_sha256 == SHA  # the original stays named
        return
    once = graph.patch(model, t2, source_sha256=SHA, source_name="m.onnx")
    first = graph.patch(model, t1, source_sha256=SHA, source_name="m.onnx")
    twice = graph.patch(first, t2, source_sha256="1" * 64, source_name="other.onnx")
    assert twice.SerializeToString() == once.SerializeToString()


def _input_dtype(model: onnx.ModelProto) -> str:
    return graph.tensor_spec(model.graph.input[0]).dtype


@settings(max_examples=6)
@given(st.integers(0, 2**32 - 1), temperatures)
def test_same_inputs_give_identical_bytes(seed, t):
    """capture, fit, patch and calibrate twice on the same files: the same bytes."""
    rng = np.random.default_rng(seed)
    with tempfile.TemporaryDirectory() as d:
        d = Path(d)
        model = save_model(random_mlp(rng, d=6, k=3, final="Softmax"), d / "m.onnx")
        n = int(rng.integers(80, 200))
        np.savez(d / "val.npz", x=rng.standard_normal((n, 6)).astype(np.float32), labels=rng.integers(0, 3, n))
        outputs = []
        for run_id in ("a", "b"):
            out = d / run_id
            out.mkdir()
            api.capture(model, d / "val.npz", out=out / "c.npz")
            api.fit(out.parent / "a" / "c.npz", out=out / "fit.json")
            api.patch(model, out / "p.onnx", temperature=t)
            api.patch(model, out / "f.onnx", fit=out.parent / "a" / "fit.json")
            api.calibrate(model, d / "val.npz", out / "cal.onnx")
            outputs.append({p.name: p.read_bytes() for p in sorted(out.iterdir())})
        assert outputs[0] == outputs[1]


@st.composite
def predictions(draw):
    """Logits (extremes included) and labels of a multiclass, binary or multi-label model."""
    kind = draw(st.sampled_from(["multiclass", "binary", "multilabel"]))
    n = draw(st.integers(1, 60))
    k = 1 if kind == "binary" else draw(st.integers(2, 6))
    z = draw(arrays(np.float64, (n, k), elements=st.floats(-1e3, 1e3) | st.sampled_from([0.0, 50.0, -50.0, 700.0])))
    if kind == "multiclass":
        y = draw(arrays(np.int64, (n,), elements=st.integers(0, k - 1)))
    elif kind == "binary":
        y = draw(arrays(np.int64, (n,), elements=st.integers(0, 1)))
    else:
        y = draw(arrays(np.uint8, (n, k), elements=st.integers(0, 1)))
    t = math.exp(draw(st.floats(math.log(0.05), math.log(20.0))))
    bins = draw(st.integers(2, 30))
    return z, y, Scaling.of_temperature(t, kind), bins


@settings(max_examples=80)
@given(predictions())
def test_metrics_stay_within_their_bounds(case):
    """0 <= ECE, MCE, adaptive and classwise ECE <= 1; Brier in [0, 2]; NLL >= 0; accuracy in [0, 1].

    The bounds follow from the definitions: ECE is a weighted mean of |acc -
    conf| in [0, 1] (Guo et al. 2017, eq. 3); the multiclass Brier score sums
    (p_k - y_k)^2 over classes, at most 2 for a distribution and a one-hot
    label (Brier 1950); NLL is -log of a probability.
    """
    z, y, scaling, bins = case
    m = metrics.evaluate(z, y, scaling, n_bins=bins)
    for name in ("ece", "mce", "adaptive_ece", "classwise_ece", "accuracy", "mean_confidence"):
        value = getattr(m, name)
        assert 0.0 <= value <= 1.0 + 1e-12, (name, value)
    assert 0.0 <= m.brier <= 2.0 + 1e-12
    assert m.nll >= 0.0 and np.isfinite(m.nll)
    assert m.ece <= m.mce + 1e-12  # a weighted mean is at most the largest term


def _calibrated_set(rng: np.random.Generator, n: int, k: int, spread: float):
    """Logits and labels drawn from softmax(logits): calibrated by construction."""
    z = spread * rng.standard_normal((n, k))
    p = scipy.special.softmax(z, axis=1)
    y = (p.cumsum(axis=1) < rng.random((n, 1))).sum(axis=1)
    return z, y


@settings(max_examples=8)
@given(st.integers(0, 2**32 - 1), st.integers(2, 10), st.floats(0.3, 4.0), st.sampled_from([10, 15, 20]))
def test_ece_of_a_perfectly_calibrated_set_vanishes_with_n(seed, k, spread, bins):
    """ECE of a set whose labels are drawn from the model's own probabilities is O(sqrt(M / N)).

    Derivation (ours, from the central limit theorem): in a bin with n_b
    samples the gap acc - conf of a calibrated set has mean 0 and standard
    deviation sqrt(mean p(1-p) / n_b) <= 1 / (2 sqrt(n_b)), and E|gap| =
    sqrt(2/pi) times that for a normal gap; so E[ECE] = sum_b (n_b / N) E|gap_b|
    <= sqrt(2/pi) / 2 * sum_b sqrt(n_b) / N <= 0.4 sqrt(M / N) (Cauchy-Schwarz).
    The binned estimator's upward bias is discussed by Kumar, Liang & Ma,
    "Verified Uncertainty Calibration", NeurIPS 2019 (from memory). We allow 2
    sqrt(M / N), five times the mean bound; the same check on a set made
    overconfident (labels from softmax(z / 2)) must fail it, so it has teeth.
    """
    rng = np.random.default_rng(seed)
    n = 200_000
    z, y = _calibrated_set(rng, n, k, spread)
    tolerance = 2 * math.sqrt(bins / n)
    ece = metrics.evaluate(z, y, 1.0, n_bins=bins).ece
    assert ece <= tolerance, (ece, tolerance)
    if spread >= 1.0:  # with small logits, doubling them moves the confidence too little to matter
        sharp = metrics.evaluate(2 * z, y, 1.0, n_bins=bins).ece  # the model claims softmax(2 z)
        assert sharp > tolerance, (sharp, tolerance)
