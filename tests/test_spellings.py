"""Every spelling the score finder recognises, on small models built with onnx.helper.

Each model computes known logits z = x W + b (a Gemm), named as exporters
name them, then spells its activation and post-processing one way. The
tests judge onnxcal against references it does not compute: the logits are
computed here with NumPy from W and b, the activations with scipy.special
(softmax, log_softmax, expit), quantization by the ONNX operator spec's
formulas (QuantizeLinear: round half to even, saturate), and the patched
graphs run in onnxruntime and in onnx's ReferenceEvaluator (onnx's own
Python implementation of the operator spec).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import onnx
import onnxruntime as ort
import pytest
import scipy.special
from onnx import TensorProto, helper, numpy_helper
from onnx.reference import ReferenceEvaluator

from onnxcal import graph
from onnxcal.graph import post

SHA = "0" * 64
T = 2.5
K = 4
D = 6
RNG = np.random.default_rng(7)
W = RNG.normal(size=(D, K)).astype(np.float32) * 2
B = RNG.normal(size=K).astype(np.float32)


def logits_of(x: np.ndarray) -> np.ndarray:
    """The known logits, computed with NumPy (float64) from the Gemm's weights."""
    return x.astype(np.float64) @ W.astype(np.float64) + B


def _i64(name: str, values) -> onnx.TensorProto:
    return numpy_helper.from_array(np.array(values, dtype=np.int64), name)


def _f32(name: str, value) -> onnx.TensorProto:
    return numpy_helper.from_array(np.array(value, dtype=np.float32), name)


def build(nodes, out: str, out_shape, inits=(), opset: int = 17, z: str = "fc_out", extra_opsets=(), elem=1):
    """x (N x D) -> Gemm -> ``z`` -> ``nodes`` -> ``out``."""
    g = helper.make_graph(
        [helper.make_node("Gemm", ["x", "fc.weight", "fc.bias"], [z], name="/fc/Gemm"), *nodes],
        "spelling",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", D])],
        [helper.make_tensor_value_info(out, elem, out_shape)],
        initializer=[numpy_helper.from_array(W, "fc.weight"), numpy_helper.from_array(B, "fc.bias"), *inits],
    )
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", opset), *extra_opsets])
    m.ir_version = 8 if opset < 19 else 9
    onnx.checker.check_model(m, full_check=True)
    return m


def reduce(op: str, x: str, out: str, axis: int, opset: int, keepdims: int = 1, name: str = "") -> list:
    """A Reduce* node over one axis: axes as an attribute or (ReduceSum from 13, others from 18) an input."""
    as_input = opset >= (13 if op == "ReduceSum" else 18)
    if as_input:
        return [helper.make_node(op, [x, f"{out}_axes"], [out], keepdims=keepdims, name=name or out)], [
            _i64(f"{out}_axes", [axis])]
    return [helper.make_node(op, [x], [out], axes=[axis], keepdims=keepdims, name=name or out)], []


@dataclass
class Case:
    """A spelling: the model, where the logits are, and the reference of its output."""

    model: onnx.ModelProto
    output: str
    logits: str
    reference: Callable[[np.ndarray], np.ndarray]  # output from the logits / T, as the model computes it
    spelling: str
    post_kinds: tuple = ()
    holds: str = "probabilities"
    quantized_step: float = 0.0
    reference_evaluator: bool = True


def softmax(z):
    return scipy.special.softmax(z, axis=1)


def l1_sigmoid(z):
    """One sigmoid per class divided by their sum (scipy.special.expit)."""
    s = scipy.special.expit(z)
    return s / s.sum(axis=1, keepdims=True)


def written_softmax(opset=17, max_trick=True, keepdims=1, reciprocal=False, expand=False) -> Case:
    """torch/tf2onnx style: Exp(z - ReduceMax(z)) / ReduceSum(Exp(...))."""
    nodes, inits = [], []
    z = "fc_out"
    if max_trick:
        n, i = reduce("ReduceMax", z, "/ReduceMax_output_0", 1, opset, keepdims)
        nodes += n
        inits += i
        m = "/ReduceMax_output_0"
        if not keepdims:
            nodes.append(helper.make_node("Unsqueeze", [m, "unsq_axes"], ["/Unsqueeze_output_0"]))
            inits.append(_i64("unsq_axes", [1]))
            m = "/Unsqueeze_output_0"
        nodes.append(helper.make_node("Sub", [z, m], ["/Sub_output_0"], name="/Sub"))
        shifted = "/Sub_output_0"
    else:
        shifted = z
    nodes.append(helper.make_node("Exp", [shifted], ["/Exp_output_0"], name="/Exp"))
    n, i = reduce("ReduceSum", "/Exp_output_0", "/ReduceSum_output_0", 1, opset, keepdims)
    nodes += n
    inits += i
    total = "/ReduceSum_output_0"
    if not keepdims:
        nodes.append(helper.make_node("Reshape", [total, "shape_n1"], ["/Reshape_output_0"]))
        inits.append(_i64("shape_n1", [-1, 1]))
        total = "/Reshape_output_0"
    if expand:
        nodes.append(helper.make_node("Shape", ["/Exp_output_0"], ["/Shape_output_0"]))
        nodes.append(helper.make_node("Expand", [total, "/Shape_output_0"], ["/Expand_output_0"]))
        total = "/Expand_output_0"
    if reciprocal:
        nodes.append(helper.make_node("Reciprocal", [total], ["/Reciprocal_output_0"]))
        nodes.append(helper.make_node("Mul", ["/Exp_output_0", "/Reciprocal_output_0"], ["probs"]))
    else:
        nodes.append(helper.make_node("Div", ["/Exp_output_0", total], ["probs"], name="/Div"))
    return Case(build(nodes, "probs", ["N", K], inits, opset), "probs", "fc_out", softmax, "softmax-written-out")


def written_log_softmax(form: str, opset=17) -> Case:
    nodes, inits = [], []
    z = "fc_out"
    if form == "reduce-log-sum-exp":
        n, i = reduce("ReduceLogSumExp", z, "lse", 1, opset)
        nodes += n + [helper.make_node("Sub", [z, "lse"], ["log_probs"])]
        inits += i
    else:
        shifted = z
        if form == "max":
            n, i = reduce("ReduceMax", z, "m", 1, opset)
            nodes += n + [helper.make_node("Sub", [z, "m"], ["zm"])]
            inits += i
            shifted = "zm"
        nodes.append(helper.make_node("Exp", [shifted], ["e"]))
        n, i = reduce("ReduceSum", "e", "s", 1, opset)
        nodes += n + [helper.make_node("Log", ["s"], ["ls"]), helper.make_node("Sub", [shifted, "ls"], ["log_probs"])]
        inits += i
    return Case(build(nodes, "log_probs", ["N", K], inits, opset), "log_probs", "fc_out",
                lambda z: scipy.special.log_softmax(z, axis=1), "log-softmax-written-out", holds="log-probabilities")


def quantize_ref(p: np.ndarray, scale: float, zero: int, lo=0, hi=255) -> np.ndarray:
    # ONNX operator spec, QuantizeLinear: saturate(round_half_to_even(x / scale) + zero point); DequantizeLinear back.
    return (np.clip(np.rint(p / scale) + zero, lo, hi) - zero) * scale


def qdq_softmax() -> Case:
    """onnxruntime.quantization's QDQ format: DQ(Q(z)) -> Softmax -> Q -> DQ (output scale 1/256, uint8)."""
    s_in, s_out = 0.05, 1.0 / 256
    nodes = [
        helper.make_node("QuantizeLinear", ["fc_out", "in_scale", "in_zero"], ["fc_out_quantized"]),
        helper.make_node("DequantizeLinear", ["fc_out_quantized", "in_scale", "in_zero"], ["fc_out_dequantized"]),
        helper.make_node("Softmax", ["fc_out_dequantized"], ["softmax_out"], axis=1),
        helper.make_node("QuantizeLinear", ["softmax_out", "out_scale", "out_zero"], ["softmax_out_quantized"]),
        helper.make_node("DequantizeLinear", ["softmax_out_quantized", "out_scale", "out_zero"], ["probs"]),
    ]
    inits = [_f32("in_scale", s_in), numpy_helper.from_array(np.array(128, np.uint8), "in_zero"),
             _f32("out_scale", s_out), numpy_helper.from_array(np.array(0, np.uint8), "out_zero")]

    def ref(z):
        zq = quantize_ref(z * T, s_in, 128) / T  # the logits pass the input grid before the scaling
        return quantize_ref(softmax(zq), s_out, 0)

    # opset 19: onnx's ReferenceEvaluator implements DequantizeLinear from version 19 on
    return Case(build(nodes, "probs", ["N", K], inits, opset=19), "probs", "fc_out_dequantized", ref, "softmax",
                post_kinds=(post.Quantize,), quantized_step=s_out)


def post_case(kind: str) -> Case:
    """Softmax followed by post-processing that keeps probabilities meaningful."""
    nodes = [helper.make_node("Softmax", ["fc_out"], ["softmax_out"], axis=1)]
    inits = []
    shape: list = ["N", K]
    if kind == "percent":
        nodes.append(helper.make_node("Mul", ["softmax_out", "hundred"], ["probs"]))
        inits.append(_f32("hundred", 100.0))
        return Case(build(nodes, "probs", shape, inits), "probs", "fc_out", lambda z: 100 * softmax(z), "softmax",
                    (post.Scale,))
    if kind == "clip":
        nodes.append(helper.make_node("Clip", ["softmax_out", "lo", "hi"], ["probs"]))
        inits += [_f32("lo", 1e-3), _f32("hi", 0.999)]
        return Case(build(nodes, "probs", shape, inits), "probs", "fc_out",
                    lambda z: np.clip(softmax(z), 1e-3, 0.999), "softmax", (post.Clip,))
    if kind == "gather":  # positive-class probability, rank 1
        nodes.append(helper.make_node("Gather", ["softmax_out", "one"], ["p_positive"], axis=1))
        inits.append(_i64("one", 1))
        return Case(build(nodes, "p_positive", ["N"], inits), "p_positive", "fc_out",
                    lambda z: softmax(z)[:, 1], "softmax", (post.Take,))
    if kind == "slice":  # N x 1
        nodes.append(helper.make_node("Slice", ["softmax_out", "st", "en", "ax"], ["p_positive"]))
        inits += [_i64("st", [2]), _i64("en", [3]), _i64("ax", [1])]
        return Case(build(nodes, "p_positive", ["N", 1], inits), "p_positive", "fc_out",
                    lambda z: softmax(z)[:, 2:3], "softmax", (post.Take,))
    if kind.startswith("sigmoid-l1"):  # one sigmoid per class, L1-normalised: the Div by T goes before the Sigmoid
        nodes = [helper.make_node("Sigmoid", ["fc_out"], ["sig"], name="/Sigmoid")]
        extra, i = [], []
        if kind == "sigmoid-l1-normalizer":  # ai.onnx.ml Normalizer(norm="L1")
            nodes.append(helper.make_node("Normalizer", ["sig"], ["probs"], domain="ai.onnx.ml", norm="L1"))
            extra = [helper.make_opsetid("ai.onnx.ml", 1)]
        else:
            op, opset = ("ReduceL1", 18) if kind == "sigmoid-l1-reduce-l1" else ("ReduceSum", 17)
            n, i = reduce(op, "sig", "sig_sum", 1, opset)
            nodes += n + [helper.make_node("Div", ["sig", "sig_sum"], ["probs"])]
        opset = 18 if kind == "sigmoid-l1-reduce-l1" else 17
        return Case(build(nodes, "probs", shape, i, opset=opset, extra_opsets=extra), "probs", "fc_out",
                    l1_sigmoid, "sigmoid", (post.Normalize,))
    raise AssertionError(kind)


CASES = {
    "written-max-keepdims-op17": lambda: written_softmax(17),
    "written-no-max-op18": lambda: written_softmax(18, max_trick=False),
    "written-keepdims0-unsqueeze-reshape-expand-op13": lambda: written_softmax(13, keepdims=0, expand=True),
    "written-reciprocal-op11": lambda: written_softmax(11, reciprocal=True),
    "log-softmax-reduce-log-sum-exp-op18": lambda: written_log_softmax("reduce-log-sum-exp", 18),
    "log-softmax-log-sum-exp": lambda: written_log_softmax("plain"),
    "log-softmax-max-trick": lambda: written_log_softmax("max"),
    "qdq-softmax": qdq_softmax,
    "softmax-percent": lambda: post_case("percent"),
    "softmax-clip": lambda: post_case("clip"),
    "softmax-gather-rank1": lambda: post_case("gather"),
    "softmax-slice-nx1": lambda: post_case("slice"),
    "sigmoid-l1-reduce-sum": lambda: post_case("sigmoid-l1"),
    "sigmoid-l1-reduce-l1-op18": lambda: post_case("sigmoid-l1-reduce-l1"),
    "sigmoid-l1-normalizer": lambda: post_case("sigmoid-l1-normalizer"),
}


def run_ort(model, x, names=None):
    return ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"]).run(names, {"x": x})


def run_reference(model, x, names=None):
    # onnx.reference.ReferenceEvaluator: onnx's own implementation of the operator spec.
    return ReferenceEvaluator(model).run(names, {"x": x})


@pytest.fixture(scope="module")
def x() -> np.ndarray:
    return np.random.default_rng(3).normal(size=(40, D)).astype(np.float32)


def do_patch(model, t=T, **kw):
    return graph.patch(model, t, source_sha256=SHA, source_name="model.onnx", **kw)


@pytest.mark.parametrize("name", list(CASES))
def test_the_finder_reads_each_spelling(name):
    case = CASES[name]()
    site = graph.find_scores(case.model)
    assert (site.output, site.scores, site.spelling, site.holds) == (case.output, case.logits, case.spelling, case.holds)
    assert site.scores_axis == 1 and site.num_classes == K
    assert [type(p) for p in site.post] == list(case.post_kinds)
    assert site.output in graph.describe_site(site)


@pytest.mark.parametrize("runner", [run_ort, run_reference])
@pytest.mark.parametrize("name", list(CASES))
def test_each_spelling_is_patched_drop_in_and_matches_scipy(name, runner, x):
    case = CASES[name]()
    patched = do_patch(case.model)
    # Drop-in: the same outputs (names, element types, shapes).
    assert [o.SerializeToString() for o in patched.graph.output] == [o.SerializeToString() for o in case.model.graph.output]
    (got,) = runner(patched, x, [case.output])
    want = case.reference(logits_of(x) / T)
    gain = 100.0 if post.Scale in case.post_kinds else 1.0
    tol = 1e-5 * gain + case.quantized_step  # float32 (times a percent factor); one step for a quantized output
    np.testing.assert_allclose(np.asarray(got, np.float64), want, atol=tol, rtol=0)
    # At T = 1 the patched model is the original.
    (back,) = runner(do_patch(case.model, 1.0), x, [case.output])
    (orig,) = runner(case.model, x, [case.output])
    np.testing.assert_allclose(back, orig, atol=1e-6 * gain + case.quantized_step, rtol=0)
    onnx.checker.check_model(patched, full_check=True)
    # undone exactly
    assert graph.unpatch(patched).SerializeToString() == case.model.SerializeToString()


def test_a_written_out_softmax_is_rewired_where_it_reads_the_logits_twice():
    case = written_softmax(17)
    site = graph.find_scores(case.model)
    readers = {case.model.graph.node[i].op_type for i, _ in site.rewire}
    assert readers == {"ReduceMax", "Sub"} and len(site.rewire) == 2


@pytest.mark.parametrize("kind", ["sigmoid-l1", "sigmoid-l1-normalizer"])
def test_l1_normalised_sigmoids_are_scaled_where_the_logits_enter(kind, x):
    """p = L1(sigmoid(z / T)): the logits are the Sigmoid's input, fitted as the sigmoid-l1 kind, and a
    small T gives no 0 / 0 (onnxruntime's float32 Sigmoid is 0 below about -17: measured)."""
    case = post_case(kind)
    site = graph.find_scores(case.model)
    assert (site.spelling, site.logits_from, site.scores, site.post) == ("sigmoid", "tensor", "fc_out", (post.Normalize(),))
    assert graph.fit_kind(site) == "sigmoid-l1" and "then L1-normalised" in graph.describe_site(site)
    z = logits_of(x)
    t = 0.05  # z / T reaches below -100 on these rows
    assert (z / t).min() < -100
    patched = do_patch(case.model, t)
    assert graph.read_record(patched).kind == "sigmoid-l1"
    for runner in (run_ort, run_reference):
        (got,) = runner(patched, x)
        assert np.isfinite(got).all()
        np.testing.assert_allclose(got, l1_sigmoid(z / t), atol=1e-5, rtol=0)  # scipy.special.expit


def qlinear_softmax_model() -> tuple[onnx.ModelProto, float, float]:
    """onnxruntime.quantization's QOperator format: Q(z) -> QLinearSoftmax (com.microsoft) -> DequantizeLinear."""
    s_in, s_out = 0.05, 1.0 / 256
    nodes = [
        helper.make_node("QuantizeLinear", ["fc_out", "x_scale", "x_zero"], ["fc_out_quantized"]),
        helper.make_node("QLinearSoftmax", ["fc_out_quantized", "x_scale", "x_zero", "y_scale", "y_zero"],
                         ["probs_quantized"], domain="com.microsoft", axis=1, opset=13, name="softmax_quant"),
        helper.make_node("DequantizeLinear", ["probs_quantized", "y_scale", "y_zero"], ["probs"]),
    ]
    inits = [_f32("x_scale", s_in), numpy_helper.from_array(np.array(128, np.uint8), "x_zero"),
             _f32("y_scale", s_out), numpy_helper.from_array(np.array(0, np.uint8), "y_zero")]
    model = build(nodes, "probs", ["N", K], inits, extra_opsets=[helper.make_opsetid("com.microsoft", 1)])
    return model, s_in, s_out


def test_qoperator_softmax_is_dequantized_scaled_and_quantized_back(x):
    model, s_in, s_out = qlinear_softmax_model()
    site = graph.find_scores(model)
    assert (site.spelling, site.logits_from, site.scores) == ("qlinear-softmax", "dequantized", "fc_out_quantized")
    assert site.post == (post.Quantize(s_out, 0, "uint8"),)
    patched = do_patch(model)
    assert [o.SerializeToString() for o in patched.graph.output] == [o.SerializeToString() for o in model.graph.output]
    (got,) = run_ort(patched, x)  # onnx's ReferenceEvaluator has no com.microsoft operators
    z = quantize_ref(logits_of(x), s_in, 128)  # the dequantized input (ONNX spec formulas)
    want = quantize_ref(softmax(z / T), s_out, 0)
    np.testing.assert_allclose(got, want, atol=s_out + 1e-6, rtol=0)  # within one step of the grid
    (orig,) = run_ort(model, x)
    (back,) = run_ort(do_patch(model, 1.0), x)
    np.testing.assert_allclose(back, orig, atol=s_out + 1e-6, rtol=0)
    # the graph's logits as capture reads them: the dequantized input
    exposed, name = graph.expose_scores(model, site)
    (zq,) = run_ort(exposed, x, [name])
    np.testing.assert_allclose(zq, z, atol=1e-6)


def test_the_logits_capture_reads_are_the_known_ones(x):
    for name, make in CASES.items():
        case = make()
        site = graph.find_scores(case.model)
        exposed, tensor = graph.expose_scores(case.model, site)
        (z,) = run_ort(exposed, x, [tensor])
        want = logits_of(x)
        if name == "qdq-softmax":
            want = quantize_ref(want, 0.05, 128)
        np.testing.assert_allclose(z, want, atol=1e-5, err_msg=name)
