"""Graph reading and rewriting, checked with onnxruntime and onnx's reference evaluator."""

import json

import numpy as np
import onnx
import onnxruntime as ort
import pytest
import scipy.special
from onnx import helper, numpy_helper
from onnx.reference import ReferenceEvaluator

from conftest import identity_model, onehot_int_model, random_mlp, save_model
from onnxcal import graph
from onnxcal.errors import OnnxcalError
from onnxcal.scaling import Scaling

SHA = "0" * 64


def run_ort(model, x, names=None):
    sess = ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"])
    return sess.run(names, {"x": x})


def run_reference(model, x, names=None):
    # onnx.reference.ReferenceEvaluator: onnx's own Python implementation of the
    # operator specification, independent of onnxruntime's kernels.
    return ReferenceEvaluator(model).run(names, {"x": x})


def do_patch(model, t, **kw):
    return graph.patch(model, t, source_sha256=SHA, source_path="/src/model.onnx", **kw)


@pytest.fixture
def x(rng):
    return rng.normal(size=(32, 6)).astype(np.float32)


@pytest.mark.parametrize("runner", [run_ort, run_reference])
def test_append_softmax_matches_scipy(rng, x, runner):
    model = random_mlp(rng, scale=4.0)
    (logits,) = runner(model, x)
    patched = do_patch(model, 2.5)
    logits2, probs = runner(patched, x, ["scores", "probabilities"])
    np.testing.assert_array_equal(logits2, logits)  # logits output kept as it was
    # Reference library: scipy.special.softmax.
    ref = scipy.special.softmax(logits.astype(np.float64) / 2.5, axis=1)
    np.testing.assert_allclose(probs, ref, atol=1e-6)
    assert np.array_equal(probs.argmax(1), logits.argmax(1))


@pytest.mark.parametrize("runner", [run_ort, run_reference])
@pytest.mark.parametrize("final", ["Softmax", "LogSoftmax"])
# The reference evaluator computes LogSoftmax as log(softmax), which warns on underflow.
@pytest.mark.filterwarnings("ignore:divide by zero:RuntimeWarning")
def test_insert_before_activation_is_drop_in(rng, x, runner, final):
    model = random_mlp(rng, scale=2.0, final=final)
    (z,) = run_ort(graph.expose(model, ["logits"]), x, ["logits"])
    patched = do_patch(model, 0.6)
    # Same outputs: names, element types and shapes.
    assert [o.SerializeToString() for o in patched.graph.output] == [
        o.SerializeToString() for o in model.graph.output
    ]
    (got,) = runner(patched, x)
    ref = scipy.special.softmax(z.astype(np.float64) / 0.6, axis=1)
    if final == "LogSoftmax":  # stays log-probabilities
        np.testing.assert_allclose(np.exp(got), ref, atol=1e-6)
    else:
        np.testing.assert_allclose(got, ref, atol=1e-6)


def test_sigmoid_gets_div_before_it(rng, x):
    model = random_mlp(rng, k=3, final="Sigmoid")
    site = graph.find_scores(model)
    assert site.activation == "sigmoid" and site.scores == "logits"
    (z,) = run_ort(graph.expose(model, ["logits"]), x, ["logits"])
    (after,) = run_ort(do_patch(model, 2.0), x)
    # Reference library: scipy.special.expit is the logistic sigmoid.
    np.testing.assert_allclose(after, scipy.special.expit(z.astype(np.float64) / 2.0), atol=1e-6)


def test_input_model_is_not_mutated(rng):
    model = random_mlp(rng)
    before = model.SerializeToString()
    do_patch(model, 2.0)
    assert model.SerializeToString() == before


def test_record_round_trip(rng):
    patched = do_patch(random_mlp(rng), 1.75, fit={"method": "temperature"})
    record = graph.read_record(patched)
    assert record.temperature == 1.75 and record.output == "probabilities"
    assert record.source_sha256 == SHA and record.rewrite == "append-softmax"
    assert graph.temperature_value(patched, record) == pytest.approx(1.75)
    raw = next(p.value for p in patched.metadata_props if p.key == graph.RECORD_KEY)
    assert json.loads(raw)["temperature"] == 1.75


def test_patch_is_deterministic(rng):
    model = random_mlp(rng, final="Softmax")
    assert do_patch(model, 1.3).SerializeToString() == do_patch(model, 1.3).SerializeToString()


def test_names_never_collide(rng, x):
    model = random_mlp(rng)
    # Occupy the names onnxcal would pick first.
    model.graph.node.append(helper.make_node("Identity", ["scores"], ["onnxcal_temperature"]))
    model.graph.output.append(helper.make_tensor_value_info("onnxcal_temperature", 1, ["N", 4]))
    patched = do_patch(model, 2.0)
    record = graph.read_record(patched)
    assert record.temperature_initializer == "onnxcal_temperature_1"
    outs = run_ort(patched, x, ["probabilities"])
    assert np.allclose(outs[0].sum(1), 1.0, atol=1e-6)


def test_output_name_taken_is_refused(rng):
    model = random_mlp(rng, output_name="probabilities")
    with pytest.raises(OnnxcalError, match="already has a tensor named 'probabilities'"):
        do_patch(model, 2.0)


def test_repatch_replaces_temperature(rng, x):
    model = random_mlp(rng, scale=3.0, final="Softmax")
    (original,) = run_ort(model, x)
    once = do_patch(model, 2.0)
    twice = do_patch(once, 1.0)
    assert len(twice.graph.node) == len(once.graph.node)  # no second Div
    assert graph.read_record(twice).temperature == 1.0
    (back,) = run_ort(twice, x)
    np.testing.assert_allclose(back, original, atol=1e-7)


def test_drop_logits(rng, x):
    patched = do_patch(random_mlp(rng), 2.0, drop_logits=True)
    assert [o.name for o in patched.graph.output] == ["probabilities"]
    (p,) = run_ort(patched, x)
    assert p.shape == (32, 4)


def test_find_scores_walks_back_through_identity(rng):
    model = random_mlp(rng, final="Softmax")
    model.graph.node.append(helper.make_node("Identity", ["scores"], ["probs_out"]))
    model.graph.output[0].name = "probs_out"
    site = graph.find_scores(model)
    assert site.activation == "softmax" and site.scores == "logits" and site.output == "probs_out"


def test_find_scores_errors(rng):
    with pytest.raises(OnnxcalError, match="no floating-point output"):
        graph.find_scores(onehot_int_model())
    with pytest.raises(OnnxcalError, match="no output named 'nope'.*scores"):
        graph.find_scores(random_mlp(rng), "nope")
    with pytest.raises(OnnxcalError, match="not a float type"):
        graph.find_scores(onehot_int_model(), "label")


def test_class_axis_out_of_range(rng):
    model = random_mlp(rng, final="Softmax")
    for a in model.graph.node[-1].attribute:
        if a.name == "axis":
            a.i = 3
    with pytest.raises(OnnxcalError, match="class axis 3 is out of range"):
        graph.find_scores(model)


@pytest.mark.parametrize("t", [0.0, -1.0, float("nan"), float("inf")])
def test_bad_temperature_refused(rng, t):
    with pytest.raises(OnnxcalError, match="positive finite"):
        do_patch(random_mlp(rng), t)


def test_patched_model_passes_full_check(rng):
    for final in (None, "Softmax", "LogSoftmax", "Sigmoid"):
        patched = do_patch(random_mlp(rng, final=final), 1.5)
        onnx.checker.check_model(patched, full_check=True)
        onnx.shape_inference.infer_shapes(patched, strict_mode=True)


def test_load_model_errors(tmp_path, rng):
    text = tmp_path / "notes.onnx"
    text.write_text("this is a text file, not a model\n")
    empty = tmp_path / "empty.onnx"
    empty.write_bytes(b"")
    truncated = tmp_path / "truncated.onnx"
    truncated.write_bytes(random_mlp(rng).SerializeToString()[:-40])
    for path in (text, empty, truncated):
        with pytest.raises(OnnxcalError, match="not (a readable ONNX model|an ONNX model)"):
            graph.load_model(path)
    with pytest.raises(OnnxcalError, match="does not exist"):
        graph.load_model(tmp_path / "missing.onnx")


def test_describe(rng, tmp_path):
    model = random_mlp(rng, final="Softmax", batch=1)
    info = graph.describe(model, "m.onnx", SHA)
    assert info.opset == 17 and info.batch_fixed
    assert info.site.activation == "softmax" and info.site.num_classes == 4
    assert [s.name for s in info.inputs] == ["x"]
    assert graph.describe(identity_model(), "i.onnx", SHA).batch_fixed is False


def test_expose_adds_typed_output(rng, x):
    model = random_mlp(rng, final="Softmax")
    exposed = graph.expose(model, ["logits"])
    probs, logits = run_ort(exposed, x, ["scores", "logits"])
    np.testing.assert_allclose(probs, scipy.special.softmax(logits.astype(np.float64), axis=1), atol=1e-6)
    assert len(model.graph.output) == 1  # the input model is untouched


def test_temperature_initializer_dtype_follows_scores(rng):
    model = random_mlp(rng, dtype=np.float64)
    patched = do_patch(model, 2.0)
    init = next(i for i in patched.graph.initializer if i.name == "onnxcal_temperature")
    assert numpy_helper.to_array(init).dtype == np.float64


def test_save_model_atomic(tmp_path, rng):
    path = tmp_path / "out.onnx"
    graph.save_model(random_mlp(rng), path)
    assert onnx.load(str(path)).graph.output[0].name == "scores"
    assert [p.name for p in tmp_path.iterdir()] == ["out.onnx"]  # no temporary left
    save_model(random_mlp(rng), tmp_path / "other.onnx")


# --------------------------------------------------------------------------
# Vector, Platt and per-label scalings


def _vector(k, rng):
    w = rng.uniform(0.4, 1.6, size=k)
    b = rng.normal(scale=0.5, size=k)
    return Scaling.of_affine(w, b - b.mean(), "vector", "multiclass"), w, b - b.mean()


@pytest.mark.parametrize("runner", [run_ort, run_reference])
def test_vector_scaling_appended_matches_scipy(rng, x, runner):
    model = random_mlp(rng, scale=3.0)
    (z,) = run_ort(model, x)
    scaling, w, b = _vector(4, rng)
    patched = do_patch(model, scaling)
    assert [n.op_type for n in patched.graph.node[-3:]] == ["Mul", "Add", "Softmax"]
    (probs,) = runner(patched, x, ["probabilities"])
    # Reference library: scipy.special.softmax of w * z + b (Guo et al. 2017, sec. 4.2).
    np.testing.assert_allclose(probs, scipy.special.softmax(z.astype(np.float64) * w + b, axis=1), atol=1e-6)
    record = graph.read_record(patched)
    assert record.method == "vector" and record.temperature is None and record.rewrite == "append-softmax"
    np.testing.assert_allclose(graph.parameter_values(patched, record)["w"], w, rtol=1e-7)


@pytest.mark.parametrize("runner", [run_ort, run_reference])
@pytest.mark.parametrize("final", ["Softmax", "LogSoftmax"])
@pytest.mark.filterwarnings("ignore:divide by zero:RuntimeWarning")
def test_vector_scaling_before_softmax_is_drop_in(rng, x, runner, final):
    model = random_mlp(rng, scale=2.0, final=final)
    (z,) = run_ort(graph.expose(model, ["logits"]), x, ["logits"])
    scaling, w, b = _vector(4, rng)
    patched = do_patch(model, scaling)
    assert [o.SerializeToString() for o in patched.graph.output] == [o.SerializeToString() for o in model.graph.output]
    (got,) = runner(patched, x)
    ref = scipy.special.softmax(z.astype(np.float64) * w + b, axis=1)
    np.testing.assert_allclose(np.exp(got) if final == "LogSoftmax" else got, ref, atol=1e-6)


def _single_logit_model(rng, final=None):
    return random_mlp(rng, k=1, scale=2.0, final=final)


@pytest.mark.parametrize("final", [None, "Sigmoid"])
def test_platt_scaling_on_a_single_logit(rng, x, final):
    model = _single_logit_model(rng, final)
    (z,) = run_ort(graph.expose(model, ["logits"]) if final else model, x, ["logits" if final else "scores"])
    scaling = Scaling.of_affine(0.6, -0.3, "platt", "binary")
    patched = do_patch(model, scaling)
    out = "scores" if final else "probabilities"
    record = graph.read_record(patched)
    assert record.activation == "sigmoid"
    assert record.rewrite == ("insert-before-activation" if final else "append-sigmoid")
    for runner in (run_ort, run_reference):
        (p,) = runner(patched, x, [out])
        # Reference library: scipy.special.expit (Platt 1999: sigmoid(a z + b)).
        np.testing.assert_allclose(p, scipy.special.expit(0.6 * z.astype(np.float64) - 0.3), atol=1e-6)


def test_binary_temperature_appends_a_sigmoid(rng, x):
    # One logit: a softmax over one value is always 1, so the calibrated output is sigmoid(z / T).
    model = _single_logit_model(rng)
    (z,) = run_ort(model, x)
    patched = do_patch(model, 2.0)
    (p,) = run_ort(patched, x, ["probabilities"])
    np.testing.assert_allclose(p, scipy.special.expit(z.astype(np.float64) / 2.0), atol=1e-6)
    assert graph.read_record(patched).rewrite == "append-sigmoid"


@pytest.mark.parametrize("runner", [run_ort, run_reference])
def test_per_label_temperatures_before_sigmoid(rng, x, runner):
    model = random_mlp(rng, k=3, final="Sigmoid", scale=2.0)
    (z,) = run_ort(graph.expose(model, ["logits"]), x, ["logits"])
    t = np.array([0.5, 1.0, 3.0])
    patched = do_patch(model, Scaling.of_temperature(t, "multilabel"))
    div = next(n for n in patched.graph.node if n.op_type == "Div")
    init = next(i for i in patched.graph.initializer if i.name == div.input[1])
    assert list(init.dims) == [3]  # a K-vector broadcast over the class axis
    (p,) = runner(patched, x)
    np.testing.assert_allclose(p, scipy.special.expit(z.astype(np.float64) / t), atol=1e-6)


def test_per_class_parameters_follow_the_class_axis(rng):
    # Class axis 1 of a rank-3 output (e.g. per-position scores): w must broadcast
    # as (K, 1) under ONNX multidirectional broadcasting (ONNX operator spec, Broadcasting.md).
    k, length = 3, 5
    graph_ = helper.make_graph(
        [helper.make_node("Softmax", ["x"], ["probs"], axis=1)],
        "seq",
        [helper.make_tensor_value_info("x", onnx.TensorProto.FLOAT, ["N", k, length])],
        [helper.make_tensor_value_info("probs", onnx.TensorProto.FLOAT, ["N", k, length])],
    )
    model = helper.make_model(graph_, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    scaling, w, b = _vector(k, rng)
    patched = do_patch(model, scaling)
    z = rng.normal(size=(2, k, length)).astype(np.float32)
    (p,) = run_reference(patched, z)
    ref = scipy.special.softmax(z * w[:, None] + b[:, None], axis=1)
    np.testing.assert_allclose(p, ref, atol=1e-6)


def test_repatch_vector_in_place_and_refuse_other_method(rng, x):
    model = random_mlp(rng, final="Softmax")
    first, _, _ = _vector(4, rng)
    second, w2, b2 = _vector(4, rng)
    once = do_patch(model, first)
    twice = do_patch(once, second)
    assert len(twice.graph.node) == len(once.graph.node)
    record = graph.read_record(twice)
    np.testing.assert_allclose(graph.parameter_values(twice, record)["b"], b2, rtol=1e-6, atol=1e-7)
    with pytest.raises(OnnxcalError, match="already calibrated with vector scaling"):
        do_patch(once, 2.0)


def test_mismatched_scalings_are_refused(rng):
    with pytest.raises(OnnxcalError, match="ends in a Sigmoid"):
        do_patch(random_mlp(rng, final="Sigmoid"), _vector(4, rng)[0])
    with pytest.raises(OnnxcalError, match="cannot go before the Softmax"):
        do_patch(random_mlp(rng, final="Softmax"), Scaling.of_temperature([1.0] * 4, "multilabel"))
    with pytest.raises(OnnxcalError, match="has 3 values for 4 classes"):
        do_patch(random_mlp(rng), Scaling.of_affine([1.0] * 3, [0.0] * 3, "vector", "multiclass"))
