"""Small reading errors (issue 12, item 6): the class count a model declares, a dim of -1,
weights in Constant nodes for --fold, IR version 3 and ai.onnx.ml-only graphs after patching,
the "holds probabilities?" advice, and bootstrap intervals that reach the search bound.

References outside onnxcal: logits and probabilities computed here with
NumPy and scipy.special from the weights written into each model; the ONNX
checker and onnxruntime on the patched models; scipy.optimize for fitted
temperatures.
"""

from __future__ import annotations

import numpy as np
import onnx
import onnxruntime as ort
import pytest
import scipy.special as sp
from conftest import save_model
from onnx import TensorProto, helper, numpy_helper

from onnxcal import api, graph
from onnxcal.errors import OnnxcalError
from onnxcal.fit import FitOptions

SHA = "0" * 64
RNG = np.random.default_rng(1206)
W = (RNG.normal(size=(4, 3)) * 0.8).astype(np.float32)
B = RNG.normal(size=3).astype(np.float32)


def logits_of(x: np.ndarray) -> np.ndarray:
    return x.astype(np.float64) @ W + B


def run(model, x, names=None):
    return ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"]).run(names, {"x": x})


def do_patch(model, t=2.0, **kw):
    return graph.patch(model, t, source_sha256=SHA, source_name="model.onnx", **kw)


def _model(nodes, out, out_shape, inits, inputs=None, opset=17, ir=8, opsets=None) -> onnx.ModelProto:
    g = helper.make_graph(nodes, "details", inputs or [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", 4])],
                          [helper.make_tensor_value_info(out, TensorProto.FLOAT, out_shape)], initializer=inits)
    m = helper.make_model(g, opset_imports=opsets or [helper.make_opsetid("", opset)])
    m.ir_version = ir
    onnx.checker.check_model(m, full_check=True)
    return m


def _wb():
    return [numpy_helper.from_array(W, "w"), numpy_helper.from_array(B, "b")]


def test_the_class_count_comes_from_the_declared_output_when_the_logits_have_no_shape(tmp_path, run_cli):
    # z = Reshape(x W + b, Concat(Shape(x)[:1], [-1])): the target shape is computed, so onnx's shape
    # inference knows z's rank but not its sizes; the output declares 3 classes.
    nodes = [
        helper.make_node("Gemm", ["x", "w", "b"], ["h"]),
        helper.make_node("Shape", ["x"], ["xs"]),
        helper.make_node("Slice", ["xs", "zero", "one"], ["n"]),
        helper.make_node("Concat", ["n", "minus_one"], ["target"], axis=0),
        helper.make_node("Reshape", ["h", "target"], ["z"]),
        helper.make_node("Softmax", ["z"], ["probs"], axis=1),
    ]
    inits = [*_wb(), *(numpy_helper.from_array(np.array([v], np.int64), n)
                       for n, v in (("zero", 0), ("one", 1), ("minus_one", -1)))]
    model = _model(nodes, "probs", ["N", 3], inits)
    assert graph.find_scores(model).num_classes == 3
    result = run_cli("inspect", save_model(model, tmp_path / "m.onnx"))
    assert result.code == 0 and "3 classes" in result.out and "? classes" not in result.out


def test_a_dim_of_minus_one_is_dynamic_not_a_fixed_batch(tmp_path, run_cli):
    nodes = [helper.make_node("Gemm", ["x", "w", "b"], ["z"]), helper.make_node("Softmax", ["z"], ["p"], axis=1)]
    model = _model(nodes, "p", [-1, 3], _wb(), inputs=[helper.make_tensor_value_info("x", TensorProto.FLOAT, [-1, 4])])
    path = save_model(model, tmp_path / "m.onnx")
    info = api.inspect(path)
    assert not info.batch_fixed and info.inputs[0].shape == (None, 4)
    # onnxruntime reads -1 as a dynamic dim too (its own reading of the declared shape)
    sess = ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"])
    assert sess.get_inputs()[0].shape[0] is None
    assert "batch dim: dynamic" in run_cli("inspect", path).out


def _constant(name: str, value: np.ndarray) -> onnx.NodeProto:
    return helper.make_node("Constant", [], [name], value=numpy_helper.from_array(value, name), name=f"{name}_const")


def test_fold_reads_weights_from_constant_nodes():
    # MatMul + Add whose weight and bias are Constant nodes (not initializers), the Add's operands in
    # the exporter's order: Add(bias, MatMul(...)).
    nodes = [_constant("weight", W), _constant("bias", B),
             helper.make_node("MatMul", ["x", "weight"], ["mm"], name="matmul"),
             helper.make_node("Add", ["bias", "mm"], ["z"], name="add"),
             helper.make_node("Softmax", ["z"], ["p"], axis=1, name="softmax")]
    model = _model(nodes, "p", ["N", 3], [])
    x = RNG.normal(size=(20, 4)).astype(np.float32)
    w_v, b_v = np.array([0.5, 1.5, 0.8]), np.array([0.1, -0.2, 0.0])
    vector = api.Scaling("vector", {"w": list(w_v), "b": list(b_v)}, "multiclass")
    for scaling, w, b in ((2.0, np.full(3, 0.5), np.zeros(3)), (vector, w_v, b_v)):
        folded = do_patch(model, scaling, fold=True)
        assert not [n for n in folded.graph.node if n.op_type in ("Div", "Mul")]  # no extra op: folded
        (got,) = run(folded, x)
        np.testing.assert_allclose(got, sp.softmax(logits_of(x) * w + b, axis=1), atol=1e-5)
        back = graph.unpatch(folded)
        (orig_w,) = [numpy_helper.to_array(n.attribute[0].t) for n in back.graph.node if n.output[0] == "weight"]
        (orig_b,) = [numpy_helper.to_array(n.attribute[0].t) for n in back.graph.node if n.output[0] == "bias"]
        np.testing.assert_allclose(orig_w, W, rtol=2 ** -23)  # within one rounding of float32
        assert orig_b.tobytes() == B.tobytes()  # the bias back bit for bit
        record = graph.read_record(folded)
        found = graph.folded_values(folded, record, model)
        np.testing.assert_allclose(np.broadcast_to(found.w, w.shape), w, rtol=1e-6)  # one ratio for one T


def _ir3(final: str | None, post: bool = False) -> onnx.ModelProto:
    """An IR-3, opset-8 model: every initializer also listed as a graph input, as IR 3 requires."""
    nodes = [helper.make_node("Gemm", ["x", "w", "b"], ["z"])]
    inits, out = _wb(), "z"
    if final:
        nodes.append(helper.make_node(final, ["z"], ["p"], axis=1))
        out = "p"
    if post:
        nodes.append(helper.make_node("Mul", ["p", "hundred"], ["pct"]))
        inits.append(numpy_helper.from_array(np.array(100, np.float32), "hundred"))
        out = "pct"
    inputs = [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", 4])]
    inputs += [helper.make_tensor_value_info(i.name, TensorProto.FLOAT, list(i.dims)) for i in inits]
    return _model(nodes, out, ["N", 3], inits, inputs=inputs, opset=8, ir=3)


@pytest.mark.parametrize("final,post", [("Softmax", False), (None, False), ("Softmax", True)])
def test_ir3_models_pass_the_checker_after_patching(final, post):
    model = _ir3(final, post)
    site = graph.find_scores(model)
    # below IR 4 an initializer listed as an input is a constant: the x100 is read as post-processing
    assert (site.activation, len(site.post)) == (("softmax", 1) if post else ("softmax", 0) if final else (None, 0))
    patched = do_patch(model)
    onnx.checker.check_model(patched, full_check=True)  # the ONNX checker: T is listed as an input too
    assert "onnxcal_temperature" in {i.name for i in patched.graph.input}
    x = RNG.normal(size=(10, 4)).astype(np.float32)
    gain = 100 if post else 1
    np.testing.assert_allclose(run(patched, x)[-1], sp.softmax(logits_of(x) / 2.0, axis=1) * gain, atol=1e-5 * gain)
    assert graph.unpatch(patched).SerializeToString() == model.SerializeToString()


def test_an_ir3_graph_with_only_an_ai_onnx_ml_import_passes_the_checker_after_patching():
    lc = helper.make_node("LinearClassifier", ["x"], ["label", "probs"], domain="ai.onnx.ml",
                          coefficients=W.T.reshape(-1).tolist(), intercepts=B.tolist(), classlabels_ints=[0, 1, 2],
                          post_transform="SOFTMAX")
    g = helper.make_graph([lc], "ml", [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", 4])],
                          [helper.make_tensor_value_info("label", TensorProto.INT64, ["N"]),
                           helper.make_tensor_value_info("probs", TensorProto.FLOAT, ["N", 3])])
    model = helper.make_model(g, opset_imports=[helper.make_opsetid("ai.onnx.ml", 1)])
    model.ir_version = 3
    onnx.checker.check_model(model, full_check=True)
    patched = do_patch(model)
    onnx.checker.check_model(patched, full_check=True)
    # the default domain is imported at the highest opset IR 3 allows (onnx's table: opset 8)
    assert {i.domain or "ai.onnx": i.version for i in patched.opset_import} == {"ai.onnx.ml": 1, "ai.onnx": 8}
    x = RNG.normal(size=(10, 4)).astype(np.float32)
    # LinearClassifier, post_transform SOFTMAX: p = softmax(x W + b) (ONNX-ML operator spec)
    np.testing.assert_allclose(run(patched, x)[1], sp.softmax(logits_of(x) / 2.0, axis=1), atol=1e-5)
    assert graph.unpatch(patched).SerializeToString() == model.SerializeToString()


def _under_confident(tmp_path, softmax: bool):
    """Logits x W with labels drawn from softmax(x W / 0.2): the fitted T is about 0.2."""
    nodes = [helper.make_node("Gemm", ["x", "w", "b"], ["z"])]
    if softmax:
        nodes.append(helper.make_node("Softmax", ["z"], ["p"], axis=1))
    model = _model(nodes, "p" if softmax else "z", ["N", 3], _wb())
    x = np.random.default_rng(4).normal(size=(400, 4)).astype(np.float32)
    p = sp.softmax(logits_of(x) / 0.2, axis=1)
    u = np.random.default_rng(5).random((400, 1))
    labels = (p.cumsum(axis=1) < u).sum(axis=1).clip(max=2)
    np.savez(tmp_path / "val.npz", x=x, labels=labels)
    return api.capture(save_model(model, tmp_path / "m.onnx"), tmp_path / "val.npz")


def test_no_probabilities_advice_when_onnxcal_read_the_logits_before_the_softmax(tmp_path):
    summary = api.fit(_under_confident(tmp_path, softmax=True), options=FitOptions(bootstrap=0))
    assert summary.temperature < 0.5
    assert not [w for w in (*summary.warnings, *summary.result.warnings) if "probabilities" in w]
    assert any("much under-confident" in n for n in summary.notes)
    raw = api.fit(_under_confident(tmp_path, softmax=False), options=FitOptions(bootstrap=0))
    assert any("really holds logits and not probabilities" in w for w in raw.warnings)  # raw logits: the advice stays


def test_a_bootstrap_interval_at_the_search_bound_is_flagged(tmp_path, run_cli):
    # 24 samples nearly separated by their logits (one label flipped): many resampled fit parts
    # leave the flipped one out, are separated perfectly, and their T goes to the bound 0.01.
    w2 = (np.eye(4, 3) * 8).astype(np.float32)
    model = _model([helper.make_node("MatMul", ["x", "w2"], ["z"]), helper.make_node("Softmax", ["z"], ["p"], axis=1)],
                   "p", ["N", 3], [numpy_helper.from_array(w2, "w2")])
    x = np.random.default_rng(0).normal(size=(24, 4)).astype(np.float32)
    labels = (x @ w2).argmax(axis=1)
    labels[0] = (labels[0] + 1) % 3
    np.savez(tmp_path / "v.npz", x=x, labels=labels)
    cap = api.capture(save_model(model, tmp_path / "m.onnx"), tmp_path / "v.npz", out=tmp_path / "c.npz")
    summary = api.fit(cap, options=FitOptions(holdout=0, bootstrap=200))
    assert summary.intervals["parameters"]["temperature"][0] == pytest.approx(0.01)
    assert any("reaches the search bound T = 0.01" in w for w in summary.warnings)
    cli = run_cli("fit", tmp_path / "c.npz", "--holdout", "0", "--bootstrap", "200")
    assert "reaches the search bound T = 0.01" in cli.out + cli.err
    # an interval inside the bounds says nothing of the kind
    wide = api.fit(_under_confident(tmp_path, softmax=True), options=FitOptions(bootstrap=50))
    assert not any("search bound" in w for w in wide.warnings)


def test_score_columns_must_be_start_stop():
    with pytest.raises(OnnxcalError, match="is not START:STOP"):
        graph.parse_columns("4-22")
    with pytest.raises(OnnxcalError, match="does not give 0 <= START < STOP"):
        graph.parse_columns("5:5")
    assert graph.parse_columns("4:22") == (4, 22)
