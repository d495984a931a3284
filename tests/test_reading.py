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
from conftest import save_model
from onnx import TensorProto, helper, numpy_helper

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


def data(tmp_path: Path, n: int = 300, seed: int = 0, name: str = "val.npz", t_true: float = 2.0) -> tuple[Path,
                                                                                                           np.ndarray]:
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
    with pytest.raises(OnnxcalError, match="output_holds logits: .* they hold probabilities, not logits"):
        api.capture(probs, val, output_holds="logits")
    logits = save_model(_model([], [("fc_out", 1, ["N", K])]), tmp_path / "z.onnx")
    with pytest.raises(OnnxcalError, match="output_holds probabilities: .* only 0 of 256 rows"):
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
        [helper.make_node("Softmax", ["fc_out"], ["p1"], axis=1), helper.make_node("Softmax", ["p1"], ["probs"],
                                                                                   axis=1)],
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


# --------------------------------------------------------------------------
# ai.onnx.ml classifiers


def linear_classifier(post_transform: str, scale: float = 1.0, zipmap: bool = False, mul_one: bool = False,
                      ml_only: bool = False) -> tuple[onnx.ModelProto, np.ndarray, float]:
    """A binary LinearClassifier (one coefficient row, labels 0 and 1), as converters write it.

    ``mul_one``: a converter's Mul(p, 1.0) after the classifier with its ZipMap off.
    """
    coef = (RNG.normal(size=D) * scale).astype(np.float32)
    intercept = 0.3
    nodes = [helper.make_node(
        "LinearClassifier", ["x"], ["label", "probability_tensor"], domain="ai.onnx.ml", name="LinearClassifier",
        classlabels_ints=[0, 1], coefficients=coef.tolist(), intercepts=[intercept], post_transform=post_transform,
    )]
    outputs = [helper.make_tensor_value_info("label", TensorProto.INT64, ["N"])]
    inits = []
    if zipmap:
        nodes.append(helper.make_node("ZipMap", ["probability_tensor"], ["output_probability"], domain="ai.onnx.ml",
                                      classlabels_int64s=[0, 1]))
        maps = helper.make_map_type_proto(TensorProto.INT64, helper.make_tensor_type_proto(TensorProto.FLOAT, []))
        outputs.append(helper.make_value_info("output_probability", helper.make_sequence_type_proto(maps)))
    elif mul_one:
        nodes.append(helper.make_node("Mul", ["probability_tensor", "one"], ["probabilities"]))
        inits.append(numpy_helper.from_array(np.array(1.0, np.float32), "one"))
        outputs.append(helper.make_tensor_value_info("probabilities", TensorProto.FLOAT, ["N", 2]))
    else:
        outputs.append(helper.make_tensor_value_info("probability_tensor", TensorProto.FLOAT, ["N", 2]))
    g = helper.make_graph(nodes, "linear", [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", D])], outputs,
                          initializer=inits)
    opsets = [helper.make_opsetid("ai.onnx.ml", 1)] + ([] if ml_only else [helper.make_opsetid("", 17)])
    m = helper.make_model(g, opset_imports=opsets)
    m.ir_version = 8
    return m, coef, intercept


def binary_data(tmp_path: Path, coef, intercept, n=228, t_true=4.0, seed=1) -> tuple[Path, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, D)).astype(np.float32)
    s = x.astype(np.float64) @ coef.astype(np.float64) + intercept
    labels = (rng.random(n) < scipy.special.expit(s / t_true)).astype(np.int64)
    np.savez(tmp_path / "bin.npz", x=x, labels=labels)
    return tmp_path / "bin.npz", s, labels


def test_a_saturated_logistic_classifier_is_calibrated_on_its_raw_scores(tmp_path):
    model, coef, intercept = linear_classifier("LOGISTIC", scale=12.0)
    path = save_model(model, tmp_path / "lr.onnx")
    val, s, labels = binary_data(tmp_path, coef, intercept)
    (p,) = ort_run(model, np.load(val)["x"], ["probability_tensor"])
    assert (p == 1.0).any(axis=1).sum() > 50  # float32 probabilities rounded to 1: log p would lose the margins
    site = graph.find_scores(model)
    assert site.spelling == "ml-classifier" and site.logits_from == "raw-scores" and site.ml_transform == "LOGISTIC"
    result = api.calibrate(path, val, tmp_path / "out.onnx", options=NO_BOOT)
    # The true margins s (computed here from the coefficients, ONNX-ML LinearClassifier: x . coef + intercept)
    # give the logits [0, s]; scipy's fit on them is the reference T.
    z = np.stack([np.zeros_like(s), s], axis=1)
    assert result.summary.scaling.temperature == pytest.approx(scipy_temperature(z, labels), rel=1e-3)
    patched = onnx.load(str(tmp_path / "out.onnx"))
    label, got = ort_run(patched, np.load(val)["x"], ["label", "probability_tensor"])
    (label0,) = ort_run(model, np.load(val)["x"], ["label"])
    np.testing.assert_array_equal(label, label0)  # the classifier's own decision, untouched
    t = result.summary.scaling.temperature
    np.testing.assert_allclose(got[:, 1], scipy.special.expit(s / t), atol=1e-5)


def test_saturated_probabilities_without_raw_scores_are_warned_about(tmp_path):
    # probabilities from a softmax no pattern knows, with margins so large that float32 rounds p to 1
    model = unknown_softmax()
    weight = next(i for i in model.graph.initializer if i.name == "fc.weight")
    weight.CopyFrom(numpy_helper.from_array(W * 60, "fc.weight"))
    path = save_model(model, tmp_path / "m.onnx")
    val, _ = data(tmp_path)
    with pytest.warns(OnnxcalWarning, match=r"\d+ of 300 rows of output 'probs' hold probabilities rounded to 0 or 1 "
                                            r"in float32: log p loses their margins"):
        cap = api.capture(path, val)
    assert cap.meta.logits_from == "log" and cap.stats.saturated > 100


@pytest.mark.parametrize("form", ["zipmap", "mul-one", "tensor"])
def test_ml_classifier_outputs_keep_their_label_and_their_names(tmp_path, form):
    model, coef, intercept = linear_classifier("LOGISTIC", zipmap=form == "zipmap", mul_one=form == "mul-one")
    site = graph.find_scores(model)
    assert site.spelling == "ml-classifier"
    if form == "mul-one":
        assert site.post == (graph.post.Scale(1.0),)
    patched = graph.patch(model, 2.0, source_sha256="0" * 64, source_name="lr.onnx")
    assert [o.SerializeToString() for o in patched.graph.output] == [o.SerializeToString() for o in model.graph.output]
    x = np.random.default_rng(2).normal(size=(30, D)).astype(np.float32)
    s = x.astype(np.float64) @ coef.astype(np.float64) + intercept
    got = ort_run(patched, x)
    want = ort_run(model, x)
    np.testing.assert_array_equal(got[0], want[0])  # label output untouched
    probs = got[1] if form != "zipmap" else np.array([[row[0], row[1]] for row in got[1]])
    np.testing.assert_allclose(probs[:, 1], scipy.special.expit(s / 2.0), atol=1e-5)


def test_a_graph_with_only_an_ai_onnx_ml_import_is_inspected_and_patched(tmp_path):
    model, coef, intercept = linear_classifier("LOGISTIC", ml_only=True)
    path = save_model(model, tmp_path / "lr.onnx")
    info = api.inspect(path)
    assert info.opset == 0 and info.site is not None and "ai.onnx.ml" in info.opsets
    assert graph.default_opset(model) >= 13
    val, s, labels = binary_data(tmp_path, coef, intercept)
    result = api.calibrate(path, val, tmp_path / "out.onnx", options=NO_BOOT)
    patched = onnx.load(str(tmp_path / "out.onnx"))
    assert graph.opset_version(patched) == graph.default_opset(model)
    assert result.verification.passed
    assert graph.unpatch(patched).SerializeToString() == model.SerializeToString()  # the import goes again


def test_an_ir_version_that_allows_no_default_opset_is_refused_before_the_capture(tmp_path):
    model, coef, intercept = linear_classifier("LOGISTIC", ml_only=True)
    model.ir_version = 2  # from memory: IR 2 predates opset 1's ir 3 requirement
    with pytest.raises(OnnxcalError, match="allows none for the operators onnxcal adds"):
        graph.default_opset(model)


# --------------------------------------------------------------------------
# float16 with float32 inputs and outputs (keep_io_types), and its provenance as a twin


def float16_io32_model() -> onnx.ModelProto:
    """What a float16 conversion with keep_io_types writes: Cast in, float16 layers, Cast out."""
    g = helper.make_graph(
        [
            helper.make_node("Cast", ["x"], ["x_fp16"], to=TensorProto.FLOAT16),
            helper.make_node("Gemm", ["x_fp16", "fc.weight", "fc.bias"], ["fc_out"], name="/fc/Gemm"),
            helper.make_node("Softmax", ["fc_out"], ["probs_fp16"], axis=1),
            helper.make_node("Cast", ["probs_fp16"], ["probs"], to=TensorProto.FLOAT),
        ],
        "fp16",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", D])],
        [helper.make_tensor_value_info("probs", TensorProto.FLOAT, ["N", K])],
        initializer=[numpy_helper.from_array(W.astype(np.float16), "fc.weight"),
                     numpy_helper.from_array(B.astype(np.float16), "fc.bias")],
    )
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)])
    m.ir_version = 8
    return m


def test_float16_with_float32_io_and_compute_dtype_passes_its_own_verify(tmp_path):
    path = save_model(float16_io32_model(), tmp_path / "fp16.onnx")
    val, x = data(tmp_path)
    result = api.calibrate(path, val, tmp_path / "out.onnx", compute_dtype="float32", options=NO_BOOT)
    assert result.verification.passed, result.verification.failed
    reference = next(c for c in result.verification.checks if c.name == "reference")
    assert reference.limit == pytest.approx(5e-3)  # the values pass through float16: its tolerance applies
    (got,) = ort_run(onnx.load(str(tmp_path / "out.onnx")), x)
    t = result.summary.scaling.temperature
    np.testing.assert_allclose(got, scipy.special.softmax(logits_of(x) / t, axis=1), atol=5e-3)


def test_a_fit_of_another_model_is_refused_unless_it_is_a_twin(tmp_path, run_cli):
    full = save_model(softmax_model(), tmp_path / "full.onnx")
    half = save_model(float16_io32_model(), tmp_path / "half.onnx")
    val, _ = data(tmp_path)
    api.fit(api.capture(full, val), out=tmp_path / "fit.json", options=NO_BOOT)
    r = run_cli("patch", half, "--fit", tmp_path / "fit.json", "--out", tmp_path / "p.onnx")
    assert r.code == 2 and "was fitted on the model with sha256" in r.err and "--fitted-on-twin" in r.err
    assert not (tmp_path / "p.onnx").exists()
    r = run_cli("patch", half, "--fit", tmp_path / "fit.json", "--out", tmp_path / "p.onnx", "--fitted-on-twin")
    assert r.code == 0, r.err
    record = graph.read_record(onnx.load(str(tmp_path / "p.onnx")))
    from onnxcal._files import sha256_file

    assert record.fitted_on_sha256 == sha256_file(full) and record.source_sha256 == sha256_file(half)
    result = api.verify(tmp_path / "p.onnx", val)  # half.onnx beside it is the recorded original
    assert result.passed and result.reference_from == "original"
    assert any("fitted on a twin" in n for n in result.notes)


# --------------------------------------------------------------------------
# Several heads


def two_heads() -> onnx.ModelProto:
    """One trunk, two softmax heads ('probs_a', 'probs_b') over the same classes."""
    w2 = (RNG.normal(size=(D, K)) * 1.5).astype(np.float32)
    nodes = [
        helper.make_node("Softmax", ["fc_out"], ["probs_a"], axis=1),
        helper.make_node("Gemm", ["x", "head_b.weight", "head_b.bias"], ["head_b_out"], name="/head_b/Gemm"),
        helper.make_node("Softmax", ["head_b_out"], ["probs_b"], axis=1),
    ]
    inits = [numpy_helper.from_array(w2, "head_b.weight"), numpy_helper.from_array(np.zeros(K, np.float32),
                                                                                   "head_b.bias")]
    return _model(nodes, [("probs_a", 1, ["N", K]), ("probs_b", 1, ["N", K])], inits)


def test_two_heads_each_have_their_record_and_are_undone_independently(tmp_path):
    model = two_heads()
    kw = dict(source_sha256="0" * 64, source_name="m.onnx")
    a = graph.patch(model, 2.0, output="probs_a", **kw)
    ab = graph.patch(a, 3.0, output="probs_b", **kw)
    records = graph.read_records(ab)
    assert [(r.output, r.temperature) for r in records] == [("probs_a", 2.0), ("probs_b", 3.0)]
    with pytest.raises(OnnxcalError, match="calibrated outputs 'probs_a', 'probs_b'.*--output"):
        graph.patch(ab, 1.5, **kw)  # which head is not said
    again = graph.patch(ab, 5.0, output="probs_b", **kw)  # re-patching B leaves A's calibration alone
    assert {r.output: r.temperature for r in graph.read_records(again)} == {"probs_a": 2.0, "probs_b": 5.0}
    x = np.random.default_rng(4).normal(size=(20, D)).astype(np.float32)
    pa, pb = ort_run(again, x, ["probs_a", "probs_b"])
    (zb,) = ort_run(graph.expose(model, ["head_b_out"]), x, ["head_b_out"])
    np.testing.assert_allclose(pa, scipy.special.softmax(logits_of(x) / 2.0, axis=1), atol=1e-6)
    np.testing.assert_allclose(pb, scipy.special.softmax(zb.astype(np.float64) / 5.0, axis=1), atol=1e-6)
    only_a = graph.unpatch(again, "probs_b")
    assert [r.output for r in graph.read_records(only_a)] == ["probs_a"]
    assert graph.unpatch(again).SerializeToString() == model.SerializeToString()


def test_calibrating_two_heads_one_after_the_other_and_verifying_both(tmp_path):
    model = save_model(two_heads(), tmp_path / "m.onnx")
    val, _ = data(tmp_path)
    api.calibrate(model, val, tmp_path / "a.onnx", output="probs_a", options=NO_BOOT)
    with pytest.raises(OnnxcalError, match="already calibrated.*another output with output$"):
        api.calibrate(tmp_path / "a.onnx", val, tmp_path / "x.onnx", output="probs_a", options=NO_BOOT)
    second = api.calibrate(tmp_path / "a.onnx", val, tmp_path / "ab.onnx", output="probs_b", options=NO_BOOT)
    assert second.verification.passed, second.verification.failed
    result = api.verify(tmp_path / "ab.onnx", val)  # m.onnx beside it: the recorded original of both heads
    names = {c.name for c in result.checks}
    assert result.passed and {"reference (probs_a)", "reference (probs_b)", "identity"} <= names


def test_a_head_sharing_its_softmax_with_a_calibrated_head_is_refused():
    model = softmax_model([("probs_pct", 1, ["N", K])], [helper.make_node("Mul", ["probs", "hundred"], ["probs_pct"])])
    model.graph.initializer.append(numpy_helper.from_array(np.array(100.0, np.float32), "hundred"))
    kw = dict(source_sha256="0" * 64, source_name="m.onnx")
    once = graph.patch(model, 2.0, output="probs", **kw)
    with pytest.raises(OnnxcalError, match="shares its softmax with output 'probs', which is already calibrated"):
        graph.patch(once, 2.0, output="probs_pct", **kw)


# --------------------------------------------------------------------------
# Reproducible bytes


def test_the_same_patch_gives_the_same_bytes_from_any_folder(tmp_path, run_cli, monkeypatch):
    val, _ = data(tmp_path)
    outs = []
    for folder, how in [("one", "relative"), ("two", "absolute"), ("three/deeper", "relative")]:
        d = tmp_path / folder
        d.mkdir(parents=True)
        save_model(softmax_model(), d / "model.onnx")
        (d / "val.npz").write_bytes(val.read_bytes())
        monkeypatch.chdir(d if how == "relative" else tmp_path)
        model = "model.onnx" if how == "relative" else str(d / "model.onnx")
        data_path = "val.npz" if how == "relative" else str(d / "val.npz")
        r = run_cli("calibrate", model, "--data", data_path, "--out", d / "cal.onnx", "--bootstrap", "0", "-q")
        assert r.code == 0, r.err
        r = run_cli("patch", model, "--temperature", "1.7", "--out", d / "t.onnx")
        assert r.code == 0, r.err
        outs.append(((d / "cal.onnx").read_bytes(), (d / "t.onnx").read_bytes()))
    assert outs[0] == outs[1] == outs[2]
    (record,) = json.loads(next(p.value for p in onnx.load(str(tmp_path / "one" / "cal.onnx")).metadata_props))
    text = json.dumps(record)
    assert record["source_name"] == "model.onnx" and str(tmp_path) not in text and os.sep + "one" not in text


# --------------------------------------------------------------------------
# Post-processed and quantized outputs, end to end


def _percent_model() -> onnx.ModelProto:
    model = softmax_model()
    model.graph.node.append(helper.make_node("Mul", ["probs", "hundred"], ["probs_pct"]))
    model.graph.initializer.append(numpy_helper.from_array(np.array(100.0, np.float32), "hundred"))
    model.graph.output[0].name = "probs_pct"
    return model


def _qdq_model() -> onnx.ModelProto:
    """Softmax -> QuantizeLinear -> DequantizeLinear (uint8, scale 1/256), as onnxruntime.quantization's QDQ format."""
    return _model(
        [helper.make_node("Softmax", ["fc_out"], ["p"], axis=1),
         helper.make_node("QuantizeLinear", ["p", "s", "zp"], ["p_q"]),
         helper.make_node("DequantizeLinear", ["p_q", "s", "zp"], ["probs"])],
        [("probs", 1, ["N", K])],
        [numpy_helper.from_array(np.array(1 / 256, np.float32), "s"), numpy_helper.from_array(np.array(0, np.uint8),
                                                                                              "zp")],
    )


@pytest.mark.parametrize("make, reference", [
    (_percent_model, lambda p: 100 * p),
    # ONNX operator spec, QuantizeLinear: round half to even, saturate to uint8; DequantizeLinear back
    (_qdq_model, lambda p: np.clip(np.rint(p * 256), 0, 255) / 256),
], ids=["percent", "qdq"])
def test_post_processed_outputs_are_calibrated_in_place_and_verified(tmp_path, make, reference):
    model = make()
    path = save_model(model, tmp_path / "m.onnx")
    val, x = data(tmp_path)
    result = api.calibrate(path, val, tmp_path / "out.onnx", options=NO_BOOT)
    assert result.verification.passed, result.verification.failed
    patched = onnx.load(str(tmp_path / "out.onnx"))
    assert [o.SerializeToString() for o in patched.graph.output] == [o.SerializeToString() for o in model.graph.output]
    t = result.summary.scaling.temperature
    labels = np.load(val)["labels"]
    assert t == pytest.approx(scipy_temperature(logits_of(x), labels), rel=1e-3)
    (got,) = ort_run(patched, x)
    want = reference(scipy.special.softmax(logits_of(x) / t, axis=1))
    np.testing.assert_allclose(got, want, atol=100 * 1e-5 if make is _percent_model else 1 / 256 + 1e-6)
    gate = api.verify(tmp_path / "out.onnx", val, max_ece=0.5, min_accuracy=0.1)  # m.onnx beside it
    assert gate.passed and gate.reference_from == "original"


def test_a_reading_that_drops_the_post_processing_fails_verify(tmp_path):
    from dataclasses import replace

    model = _percent_model()
    wrong = replace(graph.find_scores(model), post=())  # x100 not seen
    patched = graph.patch(model, 1.5, source_sha256="0" * 64, source_name="m.onnx", site=wrong)
    path = save_model(patched, tmp_path / "wrong.onnx")
    val, _ = data(tmp_path)
    result = api.verify(path, val)
    reference = next(c for c in result.checks if c.name == "reference")
    assert not result.passed and not reference.passed and reference.value > 1


def test_format_2_records_are_still_read_and_undone():
    model = softmax_model()
    patched = graph.patch(model, 2.0, source_sha256="0" * 64, source_name="m.onnx")
    (record,) = json.loads(next(p.value for p in patched.metadata_props if p.key == graph.RECORD_KEY))
    old = {k: v for k, v in record.items() if k not in ("source_name", "holds", "spelling", "logits_from", "post",
                                                         "fitted_on_sha256")}
    old.update(format=2, source_path="C:\\Users\\someone\\models\\m.onnx")  # one object, with a path
    for p in patched.metadata_props:
        if p.key == graph.RECORD_KEY:
            p.value = json.dumps(old)
    read = graph.read_record(patched)
    assert read.source_name == "m.onnx" and read.format == 2 and read.temperature == 2.0
    assert graph.unpatch(patched).SerializeToString() == model.SerializeToString()
    again = graph.patch(patched, 3.0, source_sha256="1" * 64, source_name="other.onnx")
    assert graph.read_record(again).source_name == "m.onnx"  # kept from the record when re-patching


def test_row_counts_take_non_finite_rows_without_a_numpy_warning():
    # A model fed an inf input can answer inf and -inf in one row; summing that row warned ("invalid value
    # encountered in reduce") on every capture holding one. Such rows count as neither probabilities nor log p.
    from onnxcal.guard import RowStats

    stats = RowStats()
    rows = np.array([[0.25, 0.75], [np.inf, -np.inf], [np.nan, 0.5], [-0.1, -2.4]])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        stats.add(rows)
    assert (stats.rows, stats.probabilities, stats.unit) == (4, 1, 1)
