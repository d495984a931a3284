"""Matrix scaling folded into the final linear layer (``graph.fold_matrix``).

softmax(W (A h + c) + b) = softmax((W A) h + (W c + b)): the folded model has
no extra node, gives the map's probabilities, and ``unpatch`` restores the
original bytes from the copy the record keeps. The references are computed
here from logits the *original* model gives when onnxruntime runs it (or the
exporting framework's own logits), never from onnxcal's reading of a graph.
"""

from __future__ import annotations

import base64
import json
from dataclasses import replace

import numpy as np
import onnx
import onnxruntime as ort
import pytest
import scipy.special
from conftest import FIXTURES
from onnx import helper, numpy_helper
from onnx.reference import ReferenceEvaluator

from onnxcal import graph
from onnxcal.api.checks import folded_matrix_check
from onnxcal.errors import OnnxcalError
from onnxcal.graph import fold_matrix
from onnxcal.scaling import Scaling

SHA = "0" * 64
K = 4
EXPORTERS = FIXTURES / "exporters"


def run_ort(model: onnx.ModelProto, x: np.ndarray, names: list[str] | None = None) -> list[np.ndarray]:
    sess = ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"])
    return sess.run(names, {"x": x})


def run_reference(model: onnx.ModelProto, x: np.ndarray, names: list[str] | None = None) -> list[np.ndarray]:
    # onnx's ReferenceEvaluator: onnx's own Python implementation of the operator specification.
    return ReferenceEvaluator(model).run(names, {"x": x})


def do_patch(model: onnx.ModelProto, scaling: Scaling | float, **kw: object) -> onnx.ModelProto:
    return graph.patch(model, scaling, source_sha256=SHA, source_name="model.onnx", **kw)


def matrix(rng: np.random.Generator, k: int = K, spread: float = 0.4) -> tuple[Scaling, np.ndarray, np.ndarray]:
    w = np.eye(k) + spread * rng.normal(size=(k, k))
    b = rng.normal(size=k)
    return Scaling("matrix", {"W": w.tolist(), "b": b.tolist()}, "multiclass"), w, b


def linear_model(
    rng: np.random.Generator, op: str = "Gemm", trans_b: int = 0, alpha: float = 1.0, beta: float = 1.0,
    bias_shape: tuple[int, ...] | None = (K,), final: str = "Softmax", hidden: bool = True, float_data: bool = False,
    k: int = K,
) -> onnx.ModelProto:
    """x (N x 6) -> [MatMul + Relu] -> Gemm or MatMul + Add (the head) -> final."""
    nodes, inits = [], []
    h = "x"
    if hidden:
        inits.append(numpy_helper.from_array(rng.normal(size=(6, 6)).astype(np.float32), "hidden_w"))
        nodes += [helper.make_node("MatMul", ["x", "hidden_w"], ["hm"]), helper.make_node("Relu", ["hm"], ["h"])]
        h = "h"
    w = rng.normal(size=(6, k))
    weight = (w.T if trans_b else w).astype(np.float32)
    if float_data:  # values in float_data, not raw_data: from_array would not give these bytes back
        inits.append(helper.make_tensor("weight", onnx.TensorProto.FLOAT, weight.shape, weight.ravel().tolist()))
    else:
        inits.append(numpy_helper.from_array(weight, "weight"))
    bias = []
    if bias_shape is not None:
        inits.append(numpy_helper.from_array(rng.normal(size=bias_shape).astype(np.float32), "bias"))
        bias = ["bias"]
    if op == "Gemm":
        nodes.append(helper.make_node("Gemm", [h, "weight", *bias], ["logits"], name="head", transB=trans_b,
                                      alpha=alpha, beta=beta))
    else:
        nodes.append(helper.make_node("MatMul", [h, "weight"], ["mm"], name="head"))
        nodes.append(helper.make_node("Add", ["mm", *bias], ["logits"], name="head_bias") if bias else
                     helper.make_node("Identity", ["mm"], ["logits"]))
    axis = {} if final == "Sigmoid" else {"axis": 1}
    nodes.append(helper.make_node(final, ["logits"], ["scores"], **axis))
    g = helper.make_graph(nodes, "fold", [helper.make_tensor_value_info("x", 1, ["N", 6])],
                          [helper.make_tensor_value_info("scores", 1, ["N", k])], initializer=inits)
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)])
    m.ir_version = 8
    onnx.checker.check_model(m, full_check=True)
    return m


def original_logits(model: onnx.ModelProto, x: np.ndarray) -> np.ndarray:
    """The original model's logits as onnxruntime computes them (the tensor exposed as an output)."""
    (z,) = run_ort(graph.expose(model, ["logits"]), x, ["logits"])
    return z.astype(np.float64)


LAYERS = {
    "gemm": {},
    "gemm-transB-alpha-beta-1xK": dict(trans_b=1, alpha=0.5, beta=2.0, bias_shape=(1, K)),
    "gemm-scalar-bias": dict(trans_b=1, alpha=1.5, beta=0.7, bias_shape=()),
    "matmul-add": dict(op="MatMul"),
    "matmul-add-scalar-bias": dict(op="MatMul", bias_shape=()),
    "gemm-log-softmax": dict(final="LogSoftmax"),
    "gemm-float-data": dict(trans_b=1, float_data=True),
}


@pytest.mark.parametrize("runner", [run_ort, run_reference], ids=["onnxruntime", "reference-evaluator"])
@pytest.mark.parametrize("layer", list(LAYERS))
def test_folded_matrix_equals_the_reference(rng, layer, runner):
    model = linear_model(rng, **LAYERS[layer])
    scaling, w, b = matrix(rng)
    x = rng.normal(size=(64, 6)).astype(np.float32)
    folded = do_patch(model, scaling, fold=True)
    assert [n.op_type for n in folded.graph.node] == [n.op_type for n in model.graph.node]  # zero extra ops
    (got,) = runner(folded, x)
    # Reference library: scipy.special.softmax / log_softmax of z W^T + b (Guo et al., ICML 2017, sec. 4.2),
    # z the original model's logits as onnxruntime gives them.
    z = original_logits(model, x) @ w.T + b
    want = scipy.special.log_softmax(z, axis=1) if LAYERS[layer].get("final") else scipy.special.softmax(z, axis=1)
    np.testing.assert_allclose(got, want, atol=1e-5, rtol=0)
    (unfolded,) = runner(do_patch(model, scaling), x)  # the map inserted as MatMul + Add nodes
    np.testing.assert_allclose(got, unfolded, atol=1e-5, rtol=0)
    record = graph.read_record(folded)
    assert record.folded and record.method == "matrix" and set(record.changes["fold"]["kept"]) <= {"weight", "bias"}


@pytest.mark.parametrize("layer", list(LAYERS))
def test_unpatch_restores_the_original_bytes(rng, layer):
    model = linear_model(rng, **LAYERS[layer])
    folded = do_patch(model, matrix(rng)[0], fold=True)
    weight = lambda m: graph.tensor_array(graph._initializer(m.graph, "weight"))  # noqa: E731 - a one-line reader
    assert not np.array_equal(weight(folded), weight(model))  # the fold changed the weight...
    assert graph.unpatch(folded).SerializeToString() == model.SerializeToString()  # ...and unpatch undid it exactly


def test_repatching_unfolds_first(rng):
    model = linear_model(rng, trans_b=1)
    x = rng.normal(size=(32, 6)).astype(np.float32)
    first, second = matrix(rng)[0], matrix(rng)[0]
    twice = do_patch(do_patch(model, first, fold=True), second, fold=True)
    assert graph.unpatch(twice).SerializeToString() == model.SerializeToString()
    np.testing.assert_array_equal(run_ort(twice, x)[0], run_ort(do_patch(model, second, fold=True), x)[0])
    # another method on a matrix fold: the matrix is unfolded (exactly) before T is inserted
    plain = do_patch(do_patch(model, first, fold=True), 2.0)
    np.testing.assert_array_equal(run_ort(plain, x)[0], run_ort(do_patch(model, 2.0), x)[0])
    # a matrix fold over a vector fold: the vector fold's unfold rounds the weight once, verify allows it
    vector = Scaling.of_affine(rng.uniform(0.5, 1.5, K), rng.normal(size=K), "vector", "multiclass")
    over = do_patch(do_patch(model, vector, fold=True), first, fold=True)
    check = folded_matrix_check(graph.matrix_fold_error(over, graph.read_record(over), model))
    assert check.passed, check


def test_the_record_check_reads_the_matrix_back(rng):
    model = linear_model(rng, trans_b=1, alpha=0.5, beta=2.0)
    scaling, w, b = matrix(rng)
    folded = do_patch(model, scaling, fold=True)
    record = graph.read_record(folded)
    good = folded_matrix_check(graph.matrix_fold_error(folded, record, model))
    assert good.passed and good.value <= good.limit, good
    assert graph.parameter_values(folded, record, model) is None  # W is checked, not read back per class
    # a record whose W is not the one folded in
    other = replace(record, parameters={"W": (w + 1e-3 * np.eye(K)).tolist(), "b": b.tolist()})
    assert not folded_matrix_check(graph.matrix_fold_error(folded, other, model)).passed
    # an original whose weight is not the one the record kept a copy of
    changed = onnx.ModelProto()
    changed.CopyFrom(model)
    t = graph._initializer(changed.graph, "weight")
    t.CopyFrom(numpy_helper.from_array(numpy_helper.to_array(t) * np.float32(1.001), "weight"))
    bad = folded_matrix_check(graph.matrix_fold_error(folded, record, changed))
    assert not bad.passed, bad


def test_a_damaged_copy_is_refused_by_unpatch(rng):
    folded = do_patch(linear_model(rng), matrix(rng)[0], fold=True)
    record = graph.read_record(folded)
    fold = json.loads(json.dumps(record.changes["fold"]))
    data = bytearray(base64.b64decode(fold["kept"]["weight"]["tensor"]))
    data[-1] ^= 1
    fold["kept"]["weight"]["tensor"] = base64.b64encode(bytes(data)).decode()
    graph._write_record(folded, replace(record, changes={**record.changes, "fold": fold}))
    with pytest.raises(OnnxcalError, match="record .* is damaged: the kept copy of .weight. does not match"):
        graph.unpatch(folded)


def test_the_identity_check_gets_the_original_weights(rng):
    # verify's identity check: the folded tensors set back to the original's give the original's outputs.
    model = linear_model(rng)
    x = rng.normal(size=(16, 6)).astype(np.float32)
    folded = do_patch(model, matrix(rng)[0], fold=True)
    at_one = graph.at_identity(folded, graph.read_records(folded), model)
    np.testing.assert_array_equal(run_ort(at_one, x)[0], run_ort(model, x)[0])
    assert graph.identity_unavailable(graph.read_records(folded)) is None


def test_dirichlet_folds_when_its_row_sums_are_equal(rng):
    model = linear_model(rng, trans_b=1)
    x = rng.normal(size=(32, 6)).astype(np.float32)
    w = 0.3 * rng.normal(size=(K, K))
    w += (1.0 - w.sum(axis=1))[:, None] * np.eye(K)  # every row sums to 1
    b = rng.normal(size=K)
    scaling = Scaling("dirichlet", {"W": w.tolist(), "b": b.tolist()}, "multiclass")
    folded = do_patch(model, scaling, fold=True)
    assert len(folded.graph.node) == len(model.graph.node)
    # Reference: softmax(W log_softmax(z) + b) (Kull et al., NeurIPS 2019, eq. for Dirichlet calibration),
    # with scipy.special, on the original's logits.
    z = original_logits(model, x)
    want = scipy.special.softmax(scipy.special.log_softmax(z, axis=1) @ w.T + b, axis=1)
    np.testing.assert_allclose(run_ort(folded, x)[0], want, atol=1e-5, rtol=0)
    assert graph.unpatch(folded).SerializeToString() == model.SerializeToString()
    w[0, 0] += 0.1  # row sums no longer equal: log p = z - logsumexp(z) no longer cancels
    with pytest.raises(OnnxcalError, match="row sums of its W are equal, and this W's are not"):
        do_patch(model, Scaling("dirichlet", {"W": w.tolist(), "b": b.tolist()}, "multiclass"), fold=True)


@pytest.mark.parametrize(("scaling", "match"), [
    (Scaling("beta", {"a": 1.2, "b": 0.8, "c": 0.1}, "binary"), "beta calibration is not linear in the logit"),
    (Scaling("ensemble-temperature", {"temperature": 2.0, "weights": [0.6, 0.3, 0.1]}, "multiclass"),
     "a weighted mixture of softmaxes"),
    (Scaling("isotonic", {"x": [[0.0, 1.0]] * K, "y": [[0.0, 1.0]] * K}, "multiclass"), "a lookup table"),
    (Scaling("histogram", {"edges": [[0.5]] * K, "values": [[0.1, 0.9]] * K}, "multiclass"), "a lookup table"),
    (Scaling("ovr-platt", {"a": [1.0] * K, "b": [0.0] * K}, "multiclass"), "renormalises K sigmoids"),
    (Scaling("ovr-platt", {"a": [1.2], "b": [0.1]}, "binary"), "is Platt scaling: fit --method platt"),
], ids=["beta", "ets", "isotonic", "histogram", "ovr-platt", "ovr-platt-one-logit"])
def test_maps_that_do_not_fold_say_why(rng, scaling, match):
    binary = scaling.kind == "binary"
    model = linear_model(rng, k=1, bias_shape=(1,), final="Sigmoid") if binary else linear_model(rng)
    with pytest.raises(OnnxcalError, match=f"--fold: .*{match}.*leave out --fold"):
        do_patch(model, scaling, fold=True)


def _shared_weight(rng):
    m = linear_model(rng, op="MatMul")
    m.graph.node.append(helper.make_node("ReduceSum", ["weight"], ["weight_sum"], keepdims=0))
    m.graph.output.append(helper.make_tensor_value_info("weight_sum", 1, []))
    return m


def _relu_head(rng):
    m = linear_model(rng, op="MatMul")
    head = next(n for n in m.graph.node if n.op_type == "Softmax")
    head.input[0] = "relu_logits"
    m.graph.node.insert(len(m.graph.node) - 1, helper.make_node("Relu", ["logits"], ["relu_logits"]))
    return m


@pytest.mark.parametrize(("make", "match"), [
    (_shared_weight, "the weight 'weight' is shared with other nodes"),
    (_relu_head, "the logits come from a Relu, not a Gemm or MatMul"),
    (lambda rng: linear_model(rng, bias_shape=None), "'head' has no bias to take the offset b of matrix scaling; "
     "leave out --fold to insert MatMul \\+ Add instead"),
    (lambda rng: linear_model(rng, beta=0.0), "multiplies its bias by beta = 0"),
], ids=["shared-weight", "not-linear", "no-bias", "beta-0"])
def test_fold_refused_where_the_layer_cannot_take_the_matrix(rng, make, match):
    model = make(rng)
    before = model.SerializeToString()
    with pytest.raises(OnnxcalError, match=match):
        do_patch(model, matrix(rng)[0], fold=True)
    assert model.SerializeToString() == before


def test_a_weight_on_the_left_and_the_class_axis_not_last(rng):
    # MatMul(W, x): row k of W is class k, the class axis of the output is the second-last and the (K, 1) bias
    # broadcasts along it (ONNX operator spec: MatMul follows numpy.matmul; Broadcasting.md).
    inits = [numpy_helper.from_array(rng.normal(size=(K, 6)).astype(np.float32), "weight"),
             numpy_helper.from_array(rng.normal(size=(K, 1)).astype(np.float32), "bias")]
    nodes = [helper.make_node("MatMul", ["weight", "x"], ["mm"]), helper.make_node("Add", ["mm", "bias"], ["logits"]),
             helper.make_node("Softmax", ["logits"], ["scores"], axis=1)]
    g = helper.make_graph(nodes, "left", [helper.make_tensor_value_info("x", 1, ["N", 6, 5])],
                          [helper.make_tensor_value_info("scores", 1, ["N", K, 5])], initializer=inits)
    model = helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    scaling, w, b = matrix(rng)
    folded = do_patch(model, scaling, fold=True)
    assert graph.read_record(folded).changes["fold"]["weight_axis"] == 0
    x = rng.normal(size=(3, 6, 5)).astype(np.float32)
    z = original_logits(model, x)  # N x K x 5
    # Reference library: scipy.special.softmax over the class axis of W z + b (numpy.einsum mixes the classes).
    want = scipy.special.softmax(np.einsum("ik,nkl->nil", w, z) + b[None, :, None], axis=1)
    for runner in (run_ort, run_reference):
        np.testing.assert_allclose(runner(folded, x)[0], want, atol=1e-5, rtol=0)
    assert graph.unpatch(folded).SerializeToString() == model.SerializeToString()


def test_a_weight_held_in_a_constant_node(rng):
    # exporters write weights as initializers or as Constant nodes (ONNX operator spec, Constant)
    model = linear_model(rng, op="MatMul")
    weight = next(i for i in model.graph.initializer if i.name == "weight")
    model.graph.node.insert(0, helper.make_node("Constant", [], ["weight"], value=numpy_helper.from_array(
        numpy_helper.to_array(weight), "")))
    model.graph.initializer.remove(weight)
    x = rng.normal(size=(16, 6)).astype(np.float32)
    scaling, w, b = matrix(rng)
    folded = do_patch(model, scaling, fold=True)
    want = scipy.special.softmax(original_logits(model, x) @ w.T + b, axis=1)  # scipy.special, as above
    np.testing.assert_allclose(run_ort(folded, x)[0], want, atol=1e-5, rtol=0)
    assert graph.unpatch(folded).SerializeToString() == model.SerializeToString()


def test_a_weight_too_large_to_keep_is_refused(rng, monkeypatch):
    monkeypatch.setattr(fold_matrix, "KEEP_LIMIT", 64)  # the test layer: 6 x 4 float32 + 4 = 112 bytes
    with pytest.raises(OnnxcalError, match="needs a copy of weight 'weight' .* in the calibration record, and "
                                           "onnxcal keeps at most"):
        do_patch(linear_model(rng, hidden=False), matrix(rng)[0], fold=True)


def test_a_weight_in_external_data(rng, tmp_path, monkeypatch):
    monkeypatch.setattr(graph.external, "RESIDENT_BYTES", 0)  # keep even these small tensors in their file
    model = linear_model(rng, trans_b=1)
    x = rng.normal(size=(16, 6)).astype(np.float32)
    stored = onnx.ModelProto()
    stored.CopyFrom(model)
    onnx.save(stored, tmp_path / "m.onnx", save_as_external_data=True, location="m.onnx.data", size_threshold=0)
    loaded = graph.load_model(tmp_path / "m.onnx")
    assert any(graph.external.is_external(t) for t in loaded.graph.initializer)
    scaling, w, b = matrix(rng)
    graph.save_model(do_patch(loaded, scaling, fold=True), tmp_path / "folded.onnx", external=True)
    folded = graph.load_model(tmp_path / "folded.onnx")
    sess = ort.InferenceSession(str(tmp_path / "folded.onnx"), providers=["CPUExecutionProvider"])
    # Reference library: scipy.special.softmax of the original's logits mixed by W (Guo et al. 2017, sec. 4.2).
    want = scipy.special.softmax(original_logits(model, x) @ w.T + b, axis=1)
    np.testing.assert_allclose(sess.run(None, {"x": x})[0], want, atol=1e-5, rtol=0)
    back = graph.unpatch(folded)  # needs neither m.onnx.data nor the original: the record keeps the values
    (tmp_path / "m.onnx.data").unlink()
    for name in ("weight", "bias"):
        restored = graph._initializer(back.graph, name)
        assert not graph.external.is_external(restored)
        assert restored.SerializeToString() == graph._initializer(model.graph, name).SerializeToString()


# -- exported models: the framework's own logits -------------------------------------------------------

REAL = {  # model: output, what the head computes from the logits (the validation set: the manifest's)
    "torch_script_cnn_softmax_op17": ("probabilities", "softmax"),  # torch nn.Linear: Gemm, transB = 1
    "torch_dynamo_cnn_log_softmax_op18": ("log_probabilities", "log_softmax"),
    "skl2onnx_mlp_tensor": ("probabilities", "softmax"),  # MatMul + Add
    "tf2onnx_keras_softmax_layer_op17": ("probabilities", "softmax"),  # Keras Dense: MatMul + Add
}


@pytest.mark.parametrize("name", list(REAL))
def test_fold_on_exported_models_against_the_framework_logits(rng, name):
    output, head = REAL[name]
    manifest = json.loads((EXPORTERS / "manifest.json").read_text())
    val = next(e["val"] for e in manifest if e["name"] == name)  # fixtures/exporters/README.md: the fields
    model = graph.load_model(EXPORTERS / f"{name}.onnx")
    reference = next(e["reference"] for e in manifest if e["name"] == name)
    with np.load(EXPORTERS / reference) as npz:
        assert str(npz["kind"]) == "logits"
        z = npz["logits"].astype(np.float64)  # the exporting framework's own logits
    scaling, w, b = matrix(rng, k=z.shape[1], spread=0.1)
    folded = do_patch(model, scaling, fold=True, output=output)
    assert len(folded.graph.node) == len(model.graph.node)
    sess = ort.InferenceSession(folded.SerializeToString(), providers=["CPUExecutionProvider"])
    with np.load(EXPORTERS / val) as npz:
        (inp,) = sess.get_inputs()
        feed = {inp.name: npz[next(k for k in npz.files if k != "labels")].astype(np.float32)}
    got = sess.run([output], feed)[0].astype(np.float64)
    # Reference library: scipy.special on the framework's logits mixed by W (Guo et al. 2017, sec. 4.2).
    mixed = z @ w.T + b
    want = scipy.special.log_softmax(mixed, axis=1) if head == "log_softmax" else scipy.special.softmax(mixed, axis=1)
    # the framework's float32 logits vs onnxruntime's differ by about 1e-4 of their size (test_real_models)
    tol = 1e-4 * (1.0 + np.abs(mixed).max())
    np.testing.assert_allclose(got, want, atol=tol, rtol=0)
    assert graph.unpatch(folded).SerializeToString() == model.SerializeToString()


# -- end to end through the CLI ---------------------------------------------------------------------------


def test_fit_patch_fold_verify_through_the_cli(tmp_path, run_cli):
    # skl2onnx's MLP on scikit-learn's digits features (MatMul + Add, Softmax), as tests/cli/test_cli_methods.py
    model, data = EXPORTERS / "skl2onnx_mlp_tensor.onnx", EXPORTERS / "digits_features_val.npz"
    cap, fit, folded = tmp_path / "cap.npz", tmp_path / "fit.json", tmp_path / "folded.onnx"
    assert run_cli("capture", model, "--data", data, "--out", cap, "-q").code == 0
    r = run_cli("fit", cap, "--method", "matrix", "--bootstrap", "5", "--out", fit)
    assert r.code == 0, r.err
    r = run_cli("patch", model, "--fit", fit, "--fold", "--out", folded)
    assert r.code == 0, r.err
    assert "matrix scaling folded into the weight and bias" in r.out
    saved = json.loads(fit.read_text())
    w, b = np.asarray(saved["parameters"]["W"]), np.asarray(saved["parameters"]["b"])
    sess = ort.InferenceSession(str(folded), providers=["CPUExecutionProvider"])
    with np.load(data) as npz:
        x = npz[next(k for k in npz.files if k != "labels")].astype(np.float32)
    got = sess.run(["probabilities"], {sess.get_inputs()[0].name: x})[0]
    # Reference: scipy.special.softmax of the captured original logits mixed by the fitted W (the capture
    # holds the logits onnxruntime gave for the original model).
    want = scipy.special.softmax(np.load(cap)["logits"].astype(np.float64) @ w.T + b, axis=1)
    np.testing.assert_allclose(got, want, atol=1e-5, rtol=0)
    assert len(onnx.load(str(folded)).graph.node) == len(onnx.load(str(model)).graph.node)
    r = run_cli("verify", folded, "--data", data, "--original", model, "--json")
    assert r.code == 0, r.out
    checks = {c["name"]: c for c in json.loads(r.out)["checks"]}
    for name in ("reference", "record", "source", "identity"):
        assert checks[name]["status"] == "pass", checks[name]
    assert "folded into the original's weights" in checks["record"]["detail"]
    # Without the original: the reference comes from the patch undone with the record's copy of the weights.
    r = run_cli("verify", folded, "--data", data, "--json")
    assert r.code == 0, r.out
    result = json.loads(r.out)
    checks = {c["name"]: c for c in result["checks"]}
    assert checks["reference"]["status"] == "pass" and checks["record"]["status"] == "skip"
    assert any("record's copy of the original weight and bias" in n for n in result["notes"])
    # unpatch through the library gives the original file's bytes
    assert graph.unpatch(graph.load_model(folded)).SerializeToString() == graph.load_model(model).SerializeToString()
