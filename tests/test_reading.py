"""Reading real models right, and never writing a wrong one (the data guard, the identity check,
the output choice, ai.onnx.ml classifiers, provenance, several heads, reproducible bytes).

References outside onnxcal: logits computed here with NumPy from the weights
the test wrote into the model, scipy.special (softmax, expit, log_expit),
scipy.optimize.minimize_scalar for a temperature fit, the ONNX-ML operator
spec for LinearClassifier and TreeEnsembleClassifier, and the models' own
outputs (onnxruntime) before patching.
"""

from __future__ import annotations

import json
import os
import warnings
from pathlib import Path

import numpy as np
import onnx
import onnxruntime as ort
import pytest
import scipy.optimize
import scipy.special
from onnx import TensorProto, helper, numpy_helper

from conftest import save_model
from onnxcal import api, graph
from onnxcal.errors import OnnxcalError, OnnxcalWarning
from onnxcal.fit import FitOptions

D, K = 6, 4
RNG = np.random.default_rng(11)
W = (RNG.normal(size=(D, K)) * 1.5).astype(np.float32)
B = RNG.normal(size=K).astype(np.float32)
NO_BOOT = FitOptions(holdout=0.0, bootstrap=0)


def logits_of(x: np.ndarray) -> np.ndarray:
    return x.astype(np.float64) @ W.astype(np.float64) + B


def _model(nodes, outputs, inits=(), opsets=(("", 17),), ir=8) -> onnx.ModelProto:
    g = helper.make_graph(
        [helper.make_node("Gemm", ["x", "fc.weight", "fc.bias"], ["fc_out"], name="/fc/Gemm"), *nodes],
        "reading",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", D])],
        [helper.make_tensor_value_info(name, elem, shape) for name, elem, shape in outputs],
        initializer=[numpy_helper.from_array(W, "fc.weight"), numpy_helper.from_array(B, "fc.bias"), *inits],
    )
    m = helper.make_model(g, opset_imports=[helper.make_opsetid(d, v) for d, v in opsets])
    m.ir_version = ir
    return m


def unknown_softmax() -> onnx.ModelProto:
    """A softmax no pattern knows, Exp(LogSoftmax(z)): the data guard must see probabilities."""
    return _model(
        [helper.make_node("LogSoftmax", ["fc_out"], ["lsm"], axis=1), helper.make_node("Exp", ["lsm"], ["probs"])],
        [("probs", 1, ["N", K])],
    )


def softmax_model(extra_outputs=(), extra_nodes=()) -> onnx.ModelProto:
    return _model([helper.make_node("Softmax", ["fc_out"], ["probs"], axis=1), *extra_nodes],
                  [("probs", 1, ["N", K]), *extra_outputs])


def data(tmp_path: Path, n: int = 300, seed: int = 0, name: str = "val.npz", t_true: float = 2.0) -> tuple[Path, np.ndarray]:
    """Inputs and labels drawn from softmax(z / t_true): an over-confident model, as in practice."""
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, D)).astype(np.float32)
    p = scipy.special.softmax(logits_of(x) / t_true, axis=1)
    labels = np.array([rng.choice(K, p=row) for row in p], dtype=np.int64)
    path = tmp_path / name
    np.savez(path, x=x, labels=labels)
    return path, x


def ort_run(model, x, names=None):
    return ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"]).run(names, {"x": x})


def scipy_temperature(z: np.ndarray, labels: np.ndarray) -> float:
    """T minimising the mean NLL of softmax(z / T), by scipy.optimize.minimize_scalar (bounded)."""
    def nll(log_t):
        lp = scipy.special.log_softmax(z / np.exp(log_t), axis=1)
        return -np.mean(lp[np.arange(len(labels)), labels])

    res = scipy.optimize.minimize_scalar(nll, bounds=(np.log(0.01), np.log(100.0)), method="bounded",
                                         options={"xatol": 1e-10})
    return float(np.exp(res.x))


# --------------------------------------------------------------------------
# The data guard


def test_probabilities_read_as_logits_are_caught_by_the_data(tmp_path):
    model = unknown_softmax()
    assert graph.find_scores(model).activation is None  # the graph alone says: raw logits
    path = save_model(model, tmp_path / "m.onnx")
    val, x = data(tmp_path)
    result = api.calibrate(path, val, tmp_path / "out.onnx", options=NO_BOOT)
    assert any("holds probabilities, not logits" in n for n in result.summary.notes)
    patched = onnx.load(str(tmp_path / "out.onnx"))
    assert [o.name for o in patched.graph.output] == ["probs"]  # drop-in: same output, no second one
    record = graph.read_record(patched)
    assert (record.rewrite, record.logits_from, record.spelling) == ("replace-values", "log", "data")
    t = record.temperature
    # softmax is shift-invariant, so softmax(log p / T) = softmax(z / T) (scipy reference on the known logits)
    (got,) = ort_run(patched, x)
    np.testing.assert_allclose(got, scipy.special.softmax(logits_of(x) / t, axis=1), atol=1e-5)
    # and the fitted T is the one the true logits give (scipy fit)
    labels = np.load(val)["labels"]
    assert t == pytest.approx(scipy_temperature(logits_of(x), labels), rel=1e-3)
    assert api.verify(tmp_path / "out.onnx", val).passed


def test_output_holds_is_checked_against_the_data(tmp_path):
    val, _ = data(tmp_path)
    probs = save_model(unknown_softmax(), tmp_path / "p.onnx")
    with pytest.raises(OnnxcalError, match="--output-holds logits: .* they hold probabilities, not logits"):
        api.capture(probs, val, output_holds="logits")
    logits = save_model(_model([], [("fc_out", 1, ["N", K])]), tmp_path / "z.onnx")
    with pytest.raises(OnnxcalError, match="--output-holds probabilities: .* only 0 of 256 rows"):
        api.capture(logits, val, output_holds="probabilities")
    softmax = save_model(softmax_model(), tmp_path / "s.onnx")
    with pytest.raises(OnnxcalError, match="comes from Softmax, so it holds probabilities, not logits"):
        api.capture(softmax, val, output_holds="logits")
    cap = api.capture(probs, val, output_holds="probabilities")  # agrees with the data
    assert cap.meta.holds == "probabilities" and cap.meta.spelling == "stated"


def test_log_probabilities_are_kept_log_probabilities(tmp_path):
    model = _model(
        [helper.make_node("Softmax", ["fc_out"], ["p"], axis=1), helper.make_node("Log", ["p"], ["log_probs"])],
        [("log_probs", 1, ["N", K])],
    )
    path = save_model(model, tmp_path / "m.onnx")
    val, x = data(tmp_path)
    result = api.calibrate(path, val, tmp_path / "out.onnx", options=NO_BOOT)
    record = result.patch.record
    assert record.holds == "log-probabilities" and record.activation == "logsoftmax"
    (got,) = ort_run(onnx.load(str(tmp_path / "out.onnx")), x)
    want = scipy.special.log_softmax(logits_of(x) / record.temperature, axis=1)
    np.testing.assert_allclose(got, want, atol=1e-4)


def test_a_softmax_of_probabilities_is_refused(tmp_path):
    model = _model(
        [helper.make_node("Softmax", ["fc_out"], ["p1"], axis=1), helper.make_node("Softmax", ["p1"], ["probs"], axis=1)],
        [("probs", 1, ["N", K])],
    )
    path = save_model(model, tmp_path / "m.onnx")
    val, _ = data(tmp_path)
    with pytest.raises(OnnxcalError, match="applies a softmax to probabilities"):
        api.calibrate(path, val, tmp_path / "out.onnx", options=NO_BOOT)
    assert not (tmp_path / "out.onnx").exists()


# --------------------------------------------------------------------------
# verify catches a misreading


def _hidden_model() -> onnx.ModelProto:
    """x -> Gemm -> 'hidden' (N x K) -> Relu -> Gemm -> 'fc2_out' -> Softmax -> 'probs'."""
    w2 = RNG.normal(size=(K, K)).astype(np.float32)
    nodes = [
        helper.make_node("Relu", ["fc_out"], ["relu_out"]),
        helper.make_node("Gemm", ["relu_out", "fc2.weight", "fc2.bias"], ["fc2_out"], name="/fc2/Gemm"),
        helper.make_node("Softmax", ["fc2_out"], ["probs"], axis=1, name="/Softmax"),
    ]
    inits = [numpy_helper.from_array(w2, "fc2.weight"), numpy_helper.from_array(np.zeros(K, np.float32), "fc2.bias")]
    return _model(nodes, [("probs", 1, ["N", K])], inits)


def test_a_head_forced_onto_the_wrong_tensor_fails_verify(tmp_path, run_cli):
    from dataclasses import replace

    model = _hidden_model()
    site = graph.find_scores(model)
    softmax = next(i for i, n in enumerate(model.graph.node) if n.op_type == "Softmax")
    wrong = replace(site, scores="fc_out", rewire=((softmax, 0),))  # the scaling fed from the wrong layer
    patched = graph.patch(model, 1.7, source_sha256="0" * 64, source_name="m.onnx", site=wrong)
    path = save_model(patched, tmp_path / "wrong.onnx")
    save_model(model, tmp_path / "m.onnx")
    val, _ = data(tmp_path)
    result = api.verify(path, val, original=tmp_path / "m.onnx")
    identity = next(c for c in result.checks if c.name == "identity")
    # The reference comes from a fresh reading of the original, the identity check from its own outputs.
    assert not next(c for c in result.checks if c.name == "reference").passed
    assert not identity.passed and "did not find the real logits" in identity.detail
    r = run_cli("verify", path, "--data", val, "--original", tmp_path / "m.onnx")
    assert r.code == 1 and "with T = 1 the patched output 'probs' differs from the original's by" in r.out


def test_probabilities_patched_as_logits_fail_verify(tmp_path):
    model = unknown_softmax()
    patched = graph.patch(model, 0.2, source_sha256="0" * 64, source_name="m.onnx", holds="logits")
    assert graph.read_record(patched).rewrite == "append-softmax"  # the misreading of the issue
    path = save_model(patched, tmp_path / "wrong.onnx")
    val, _ = data(tmp_path)
    result = api.verify(path, val)
    reading = next(c for c in result.checks if c.name == "reading")
    assert not result.passed and not reading.passed and "onnxcal misread the model" in reading.detail


def test_probabilities_read_as_log_probabilities_fail_the_identity_check(tmp_path):
    model = unknown_softmax()
    patched = graph.patch(model, 1.5, source_sha256="0" * 64, source_name="m.onnx", holds="log-probabilities")
    path = save_model(patched, tmp_path / "wrong.onnx")
    val, _ = data(tmp_path)
    result = api.verify(path, val)
    assert next(c for c in result.checks if c.name == "reference").passed  # self-consistent, hence useless
    identity = next(c for c in result.checks if c.name == "identity")
    assert not identity.passed and identity.value > 0.1


# --------------------------------------------------------------------------
# Choosing the output


def test_several_probability_outputs_are_refused_with_their_names():
    model = softmax_model(
        [("probs_pct", 1, ["N", K])], [helper.make_node("Mul", ["probs", "hundred"], ["probs_pct"])]
    )
    model.graph.initializer.append(numpy_helper.from_array(np.array(100.0, np.float32), "hundred"))
    with pytest.raises(OnnxcalError, match="2 outputs of class probabilities: 'probs'.*'probs_pct'.*--output"):
        graph.find_scores(model)
    assert graph.find_scores(model, "probs_pct").post == (graph.post.Scale(100.0),)


def test_a_hidden_feature_output_first_is_not_taken_for_the_class_scores():
    features = ("features", 1, ["N", 64])
    hidden = _model([helper.make_node("Identity", ["x"], ["features"]),
                     helper.make_node("Softmax", ["fc_out"], ["probs"], axis=1)],
                    [features, ("probs", 1, ["N", K])])
    assert graph.find_scores(hidden).output == "probs"  # the recognised activation wins
    raw = _model([helper.make_node("Identity", ["x"], ["features"])], [features, ("fc_out", 1, ["N", K])])
    with pytest.raises(OnnxcalError, match="2 float outputs that could hold raw logits.*'features'.*'fc_out'"):
        graph.find_scores(raw)


def test_labels_covering_few_of_the_values_per_row_are_refused(tmp_path):
    model = _model([helper.make_node("Concat", ["fc_out"] * 16, ["wide"], axis=1)], [("wide", 1, ["N", 64])])
    path = save_model(model, tmp_path / "m.onnx")
    val, _ = data(tmp_path, n=300)  # 4 classes, 64 values per row
    with pytest.raises(OnnxcalError, match="labels cover 4 distinct classes, but the output has 64 values"):
        api.capture(path, val)


def test_a_thousand_class_model_on_500_samples_is_not_refused():
    from onnxcal.guard import label_coverage

    labels = np.random.default_rng(0).integers(0, 1000, size=500)
    assert label_coverage(labels, 1000) == (None, None)  # ~393 distinct of 1000: no refusal, no warning
    assert label_coverage(np.arange(300) % 4, 64)[0] is not None
