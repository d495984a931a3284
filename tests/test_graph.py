"""Graph reading and rewriting, checked with onnxruntime and onnx's reference evaluator."""

import json
from dataclasses import replace

import numpy as np
import onnx
import onnxruntime as ort
import pytest
import scipy.special
from conftest import identity_model, onehot_int_model, random_mlp, save_model
from onnx import helper, numpy_helper
from onnx.reference import ReferenceEvaluator

from onnxcal import graph
from onnxcal.errors import OnnxcalError
from onnxcal.scaling import Scaling
from onnxcal.verify import folded_record_check, tolerance

SHA = "0" * 64


def run_ort(model, x, names=None):
    sess = ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"])
    return sess.run(names, {"x": x})


def run_reference(model, x, names=None):
    # onnx.reference.ReferenceEvaluator: onnx's own Python implementation of the
    # operator specification, independent of onnxruntime's kernels.
    return ReferenceEvaluator(model).run(names, {"x": x})


def do_patch(model, t, **kw):
    return graph.patch(model, t, source_sha256=SHA, source_name="model.onnx", **kw)


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
    assert json.loads(raw)[0]["temperature"] == 1.75  # format 3: one record per calibrated output


def test_patch_is_deterministic(rng):
    model = random_mlp(rng, final="Softmax")
    assert do_patch(model, 1.3).SerializeToString() == do_patch(model, 1.3).SerializeToString()


def test_names_never_collide(rng, x):
    model = random_mlp(rng)
    # Occupy the names onnxcal would pick first.
    model.graph.node.append(helper.make_node("Identity", ["scores"], ["onnxcal_temperature"]))
    model.graph.output.append(helper.make_tensor_value_info("onnxcal_temperature", 1, ["N", 4]))
    patched = do_patch(model, 2.0, output="scores")  # two raw outputs: the choice must be said
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
        with pytest.raises(OnnxcalError, match=r"not (a readable ONNX model|an ONNX model)|is empty \(0 bytes\)"):
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


# -- class axis tracking, activations, options (issue: exported graphs) ----


def _chain_model(tail_nodes, out_shape, opset=17, inits=()):
    """x (N x 6) -> Gemm -> Softmax(axis 1) -> tail nodes -> 'out'."""
    rng = np.random.default_rng(0)
    nodes = [
        helper.make_node("Gemm", ["x", "w", "b"], ["logits"], name="gemm"),
        helper.make_node("Softmax", ["logits"], ["probs"], name="softmax", axis=1),
        *tail_nodes,
    ]
    g = helper.make_graph(
        nodes,
        "chain",
        [helper.make_tensor_value_info("x", 1, ["N", 6])],
        [helper.make_tensor_value_info("out", 1, out_shape)],
        initializer=[
            numpy_helper.from_array(rng.normal(size=(6, 4)).astype(np.float32), "w"),
            numpy_helper.from_array(rng.normal(size=4).astype(np.float32), "b"),
            *inits,
        ],
    )
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", opset)])
    m.ir_version = 8
    onnx.checker.check_model(m, full_check=True)
    return m


def _axes(name, values):
    return numpy_helper.from_array(np.array(values, dtype=np.int64), name)


@pytest.mark.parametrize(
    "tail, shape, inits, axis",
    [
        ([helper.make_node("Unsqueeze", ["probs", "ax"], ["out"])], ["N", 4, 1, 1], [_axes("ax", [2, 3])], 1),
        ([helper.make_node("Transpose", ["probs"], ["out"], perm=[1, 0])], [4, "N"], [], 0),
        (
            [
                helper.make_node("Unsqueeze", ["probs", "ax"], ["u"]),
                helper.make_node("Flatten", ["u"], ["out"], axis=1),
            ],
            ["N", 4],
            [_axes("ax", [2])],
            1,
        ),
        ([helper.make_node("Reshape", ["probs", "shp"], ["out"])], ["N", 1, 4], [_axes("shp", [-1, 1, 4])], 2),
    ],
)
def test_class_axis_is_tracked_through_layout_ops(x, tail, shape, inits, axis):
    model = _chain_model(tail, shape, inits=inits)
    site = graph.find_scores(model)
    assert site.activation == "softmax" and site.scores == "logits" and site.class_axis == axis
    patched = do_patch(model, 2.0)
    (z,) = run_ort(graph.expose(model, ["logits"]), x, ["logits"])
    (got,) = run_ort(patched, x, ["out"])
    ref = scipy.special.softmax(z.astype(np.float64) / 2.0, axis=1)
    np.testing.assert_allclose(np.moveaxis(got, axis, -1).reshape(-1, 4), ref, atol=1e-6)
    # The captured rows follow the output's layout (the layout nodes are replayed).
    exposed, name = graph.expose_scores(model, site)
    (rows,) = run_ort(exposed, x, [name])
    np.testing.assert_allclose(np.moveaxis(rows, axis, -1).reshape(-1, 4), z, atol=0)


def test_lost_class_axis_is_refused():
    tail = [helper.make_node("Reshape", ["probs", "shp"], ["out"])]
    model = _chain_model(tail, [None], inits=[_axes("shp", [-1])])
    with pytest.raises(OnnxcalError, match="does not keep the class axis whole"):
        graph.find_scores(model)
    info = graph.describe(model, "m.onnx", SHA)
    assert info.site is None and "class axis" in info.site_problem


def test_fit_kind_rules(rng):
    raw = graph.find_scores(random_mlp(rng, k=4))
    one = graph.find_scores(random_mlp(rng, k=1))
    soft = graph.find_scores(random_mlp(rng, final="Softmax"))
    assert graph.fit_kind(raw) == "softmax" and graph.fit_kind(raw, "sigmoid") == "sigmoid"
    assert graph.fit_kind(one) == "sigmoid"
    assert graph.fit_kind(soft) == "softmax" and graph.fit_kind(soft, "softmax") == "softmax"
    with pytest.raises(OnnxcalError, match="already comes from softmax"):
        graph.fit_kind(soft, "sigmoid")
    with pytest.raises(OnnxcalError, match="softmax over one value is always 1"):
        graph.fit_kind(one, "softmax")
    with pytest.raises(OnnxcalError, match="not one of: softmax, sigmoid"):
        graph.fit_kind(raw, "tanh")


@pytest.mark.parametrize("k, activation", [(1, None), (3, "sigmoid")])
def test_append_sigmoid(rng, x, k, activation):
    model = random_mlp(rng, k=k)
    patched = do_patch(model, 1.5, activation=activation)
    record = graph.read_record(patched)
    assert record.rewrite == "append-sigmoid" and record.activation == "sigmoid"
    (z,) = run_ort(model, x)
    for runner in (run_ort, run_reference):
        (p,) = runner(patched, x, ["probabilities"])
        # Reference library: scipy.special.expit is the logistic sigmoid.
        np.testing.assert_allclose(p, scipy.special.expit(z.astype(np.float64) / 1.5), atol=1e-6)


def test_append_with_float16_compute_dtype(rng, x):
    model = random_mlp(rng, dtype=np.float16, scale=3.0)
    patched = do_patch(model, 2.0, compute_dtype="float32")
    assert patched.graph.output[-1].type.tensor_type.elem_type == onnx.TensorProto.FLOAT16
    ops = [n.op_type for n in patched.graph.node[len(model.graph.node) :]]
    assert ops == ["Cast", "Div", "Softmax", "Cast"]
    (z, p) = run_ort(patched, x.astype(np.float16), ["scores", "probabilities"])
    assert p.dtype == np.float16
    ref = scipy.special.softmax(z.astype(np.float64) / 2.0, axis=1)
    np.testing.assert_allclose(p, ref, atol=tolerance("float16"))
    # Same dtype as the scores: no Casts, nothing recorded.
    assert graph.read_record(do_patch(random_mlp(rng), 2.0, compute_dtype="float32")).compute_dtype is None
    with pytest.raises(OnnxcalError, match="--compute-dtype 'int8' is not one of"):
        do_patch(model, 2.0, compute_dtype="int8")


def test_bfloat16_temperature_in_the_scores_dtype():
    g = helper.make_graph(
        [helper.make_node("Softmax", ["x"], ["p"], axis=1)],
        "bf16",
        [helper.make_tensor_value_info("x", onnx.TensorProto.BFLOAT16, ["N", 3])],
        [helper.make_tensor_value_info("p", onnx.TensorProto.BFLOAT16, ["N", 3])],
    )
    model = helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    patched = do_patch(model, 1.7)
    record = graph.read_record(patched)
    t = next(i for i in patched.graph.initializer if i.name == record.temperature_initializer)
    assert t.data_type == onnx.TensorProto.BFLOAT16
    assert graph.temperature_value(patched, record) == pytest.approx(1.7, rel=2.0**-8)
    with_casts = do_patch(model, 1.7, compute_dtype="float32")
    assert [n.op_type for n in with_casts.graph.node] == ["Cast", "Div", "Softmax", "Cast"]
    assert with_casts.graph.output[0].type.tensor_type.elem_type == onnx.TensorProto.BFLOAT16


def _matmul_add_model(rng, weight_as_input=False, quantized=False):
    w = rng.normal(size=(6, 4)).astype(np.float32)
    inits = [numpy_helper.from_array(rng.normal(size=4).astype(np.float32), "bias")]
    nodes = []
    if quantized:
        inits += [
            numpy_helper.from_array(np.round(w * 20).astype(np.int8), "wq"),
            numpy_helper.from_array(np.array(0.05, np.float32), "scale"),
        ]
        nodes.append(helper.make_node("DequantizeLinear", ["wq", "scale"], ["weight"]))
    elif not weight_as_input:
        inits.append(numpy_helper.from_array(w, "weight"))
    nodes += [
        helper.make_node("MatMul", ["x", "weight"], ["mm"]),
        helper.make_node("Add", ["mm", "bias"], ["logits"]),
        helper.make_node("Softmax", ["logits"], ["p"], axis=1),
    ]
    ins = [helper.make_tensor_value_info("x", 1, ["N", 6])]
    if weight_as_input:
        ins.append(helper.make_tensor_value_info("weight", 1, [6, 4]))
    g = helper.make_graph(nodes, "mm", ins, [helper.make_tensor_value_info("p", 1, ["N", 4])], initializer=inits)
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)])
    m.ir_version = 8
    return m


def test_fold_into_matmul_add(rng, x):
    model = _matmul_add_model(rng)
    folded = do_patch(model, 3.0, fold=True)
    unfolded = do_patch(model, 3.0)
    assert len(folded.graph.node) == len(model.graph.node)
    assert graph.read_record(folded).changes["scaled"] == ["weight", "bias"]
    np.testing.assert_allclose(run_ort(folded, x)[0], run_ort(unfolded, x)[0], atol=1e-6)
    np.testing.assert_allclose(run_reference(folded, x)[0], run_ort(unfolded, x)[0], atol=1e-6)


def test_fold_refuses_non_constant_and_quantized_weights(rng):
    with pytest.raises(OnnxcalError, match="'weight' .* is not a constant initializer"):
        do_patch(_matmul_add_model(rng, weight_as_input=True), 2.0, fold=True)
    with pytest.raises(OnnxcalError, match="quantized"):
        do_patch(_matmul_add_model(rng, quantized=True), 2.0, fold=True)
    with pytest.raises(OnnxcalError, match="give one of --fold and --compute-dtype"):
        do_patch(_matmul_add_model(rng), 2.0, fold=True, compute_dtype="float64")


def test_unpatch_restores_a_dropped_output_in_place(rng):
    model = random_mlp(rng)
    model.graph.output.append(helper.make_tensor_value_info("h0", 1, ["N", 8]))
    patched = do_patch(model, 2.0, drop_logits=True, output="scores")  # two raw outputs: the choice must be said
    assert [o.name for o in patched.graph.output] == ["h0", "probabilities"]
    assert graph.unpatch(patched).SerializeToString() == model.SerializeToString()


def test_record_without_changes_cannot_be_undone(rng):
    patched = do_patch(random_mlp(rng), 2.0)
    record = graph.read_record(patched)
    old = {k: v for k, v in record.to_dict().items() if k not in ("changes", "folded", "compute_dtype",
                                                                  "source_output")}
    old["format"] = 1
    for p in patched.metadata_props:
        if p.key == graph.RECORD_KEY:
            p.value = json.dumps(old)
    with pytest.raises(OnnxcalError, match="does not say what the patch changed"):
        do_patch(patched, 1.0)


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


def test_repatch_vector_replaces_and_may_switch_method(rng, x):
    model = random_mlp(rng, final="Softmax")
    first, _, _ = _vector(4, rng)
    second, w2, b2 = _vector(4, rng)
    once = do_patch(model, first)
    twice = do_patch(once, second)
    assert len(twice.graph.node) == len(once.graph.node)
    record = graph.read_record(twice)
    np.testing.assert_allclose(graph.parameter_values(twice, record)["b"], b2, rtol=1e-6, atol=1e-7)
    # The previous patch is undone first, so another method replaces it exactly.
    assert do_patch(once, 2.0).SerializeToString() == do_patch(model, 2.0).SerializeToString()


def test_mismatched_scalings_are_refused(rng):
    with pytest.raises(OnnxcalError, match="multiclass calibration .* calibrated through a sigmoid"):
        do_patch(random_mlp(rng, final="Sigmoid"), _vector(4, rng)[0])
    with pytest.raises(OnnxcalError, match="multilabel calibration .* calibrated through a softmax"):
        do_patch(random_mlp(rng, final="Softmax"), Scaling.of_temperature([1.0] * 4, "multilabel"))
    with pytest.raises(OnnxcalError, match="has 3 values for 4 classes"):
        do_patch(random_mlp(rng), Scaling.of_affine([1.0] * 3, [0.0] * 3, "vector", "multiclass"))


# --------------------------------------------------------------------------
# Folding every per-class affine scaling into the logits layer


def _model_of(nodes, x_shape, out_shape, inits, opset=17):
    g = helper.make_graph(
        nodes,
        "fold",
        [helper.make_tensor_value_info("x", 1, x_shape)],
        [helper.make_tensor_value_info("scores", 1, out_shape)],
        initializer=inits,
    )
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", opset)])
    m.ir_version = 8
    onnx.checker.check_model(m, full_check=True)
    return m


def _linear_model(rng, op="Gemm", trans_b=0, alpha=1.0, beta=1.0, bias_shape=(4,), k=4, final="Softmax"):
    """x (N x 6) -> Gemm (or MatMul + Add) -> final: the layer a fold goes into."""
    w = 2.0 * rng.normal(size=(6, k))
    inits = [numpy_helper.from_array((w.T if trans_b else w).astype(np.float32), "weight")]
    if bias_shape is not None:
        inits.append(numpy_helper.from_array(np.asarray(rng.normal(size=bias_shape), np.float32), "bias"))
    bias = ["bias"] if bias_shape is not None else []
    if op == "Gemm":
        attrs = dict(transB=trans_b, alpha=alpha, beta=beta)
        nodes = [helper.make_node("Gemm", ["x", "weight", *bias], ["logits"], name="head", **attrs)]
    else:
        nodes = [
            helper.make_node("MatMul", ["x", "weight"], ["mm"], name="head"),
            helper.make_node("Add", ["mm", *bias], ["logits"], name="head_bias"),
        ]
    nodes.append(helper.make_node(final, ["logits"], ["scores"], axis=1))
    return _model_of(nodes, ["N", 6], ["N", k], inits)


FOLD_LAYERS = {
    "gemm": {},
    "gemm-transB-alpha-beta-1xK": dict(trans_b=1, alpha=0.5, beta=2.0, bias_shape=(1, 4)),
    "gemm-scalar-bias": dict(trans_b=1, alpha=1.5, beta=0.7, bias_shape=()),
    "gemm-beta-3-bias-(1,)": dict(beta=3.0, bias_shape=(1,)),
    "matmul-add": dict(op="MatMul"),
    "matmul-add-scalar-bias": dict(op="MatMul", bias_shape=()),
}


@pytest.mark.parametrize("runner", [run_ort, run_reference])
@pytest.mark.parametrize("layer", list(FOLD_LAYERS))
def test_vector_fold_equals_unfolded(rng, x, layer, runner):
    model = _linear_model(rng, **FOLD_LAYERS[layer])
    scaling, w, b = _vector(4, rng)
    folded = do_patch(model, scaling, fold=True)
    assert [n.op_type for n in folded.graph.node] == [n.op_type for n in model.graph.node]  # zero extra ops
    (z,) = run_ort(graph.expose(model, ["logits"]), x, ["logits"])
    (got,) = runner(folded, x)
    (unfolded,) = runner(do_patch(model, scaling), x)
    np.testing.assert_allclose(got, unfolded, atol=1e-6, rtol=0)
    # Reference library: scipy.special.softmax of w * z + b (Guo et al. 2017, sec. 4.2).
    np.testing.assert_allclose(got, scipy.special.softmax(z.astype(np.float64) * w + b, axis=1), atol=1e-6)
    record = graph.read_record(folded)
    assert record.folded and record.initializers == {} and record.changes["scaled"] == ["weight", "bias"]
    found = graph.folded_values(folded, record, model)  # what verify's record check reads
    np.testing.assert_allclose(found.w, w, rtol=1e-6)
    np.testing.assert_allclose(found.b, np.broadcast_to(b, found.b.shape), atol=1e-6)


@pytest.mark.parametrize("layer", list(FOLD_LAYERS))
def test_unpatch_of_a_vector_fold_restores_the_weights(rng, layer):
    model = _linear_model(rng, **FOLD_LAYERS[layer])
    scaling, w, _ = _vector(4, rng)
    folded = do_patch(model, scaling, fold=True)
    back = graph.unpatch(folded)
    arrays = {
        name: [numpy_helper.to_array(graph._initializer(m.graph, name)) for m in (model, folded, back)]
        for name in ("weight", "bias")
    }
    before, _, after = arrays["weight"]
    eps = float(np.finfo(np.float32).eps)
    np.testing.assert_allclose(after, before, rtol=eps, atol=0)  # one rounding of float32
    before, patched, after = arrays["bias"]
    assert patched.shape[-1] == 4  # a single-valued bias is expanded to one per class
    assert after.shape == before.shape and after.tobytes() == before.tobytes()  # exactly, from the record
    # Nothing but the weight's rounding differs from the original.
    expected = onnx.ModelProto()
    expected.CopyFrom(model)
    graph._initializer(expected.graph, "weight").CopyFrom(graph._initializer(back.graph, "weight"))
    assert back.SerializeToString() == expected.SerializeToString()


def test_repeated_refolding_still_matches_the_original(rng):
    # A tiny bias and large offsets: taking b back out of the bias would lose
    # |b| / |c| roundings; the bias comes back exactly from the record, and
    # verify's limit follows the weight's roundings (one per fold and unfold).
    model = _linear_model(rng, trans_b=1)
    bias = graph._initializer(model.graph, "bias")
    bias.CopyFrom(numpy_helper.from_array(numpy_helper.to_array(bias) * 1e-3, "bias"))
    patched = model
    for i in range(3):
        w = rng.uniform(0.5, 1.5, size=4)
        scaling = Scaling.of_affine(w, 3.0 * rng.choice([-1.0, 1.0], size=4), "vector", "multiclass")
        patched = do_patch(patched, scaling, fold=True)
        found = graph.folded_values(patched, graph.read_record(patched), model)
        assert found.roundings == 1 + 2 * i
        check = folded_record_check(scaling, found)
        assert check.passed, check
    back = graph.unpatch(patched)
    assert graph._initializer(back.graph, "bias").SerializeToString() == bias.SerializeToString()


def test_repatching_a_vector_fold_replaces_it(rng, x):
    model = _linear_model(rng, trans_b=1, bias_shape=())
    first, second = _vector(4, rng)[0], _vector(4, rng)[0]
    once = do_patch(model, first, fold=True)
    twice = do_patch(once, second, fold=True)
    assert len(twice.graph.node) == len(model.graph.node)
    assert graph.read_record(twice).parameters == second.parameters
    np.testing.assert_allclose(run_ort(twice, x)[0], run_ort(do_patch(model, second, fold=True), x)[0], atol=1e-6)
    # Unfolded first, so another method (inserted as a Div) applies to the original weights.
    plain = do_patch(once, 2.0)
    assert not graph.read_record(plain).folded
    np.testing.assert_allclose(run_ort(plain, x)[0], run_ort(do_patch(model, 2.0), x)[0], atol=1e-6)


def test_per_class_fold_through_a_weight_on_the_left(rng):
    # MatMul(W, x): row k of W is class k, and the class axis of the output is
    # the second-last; the (K, 1) bias broadcasts along it (ONNX operator spec,
    # MatMul follows numpy.matmul; Broadcasting.md).
    inits = [
        numpy_helper.from_array(rng.normal(size=(4, 6)).astype(np.float32), "weight"),
        numpy_helper.from_array(rng.normal(size=(4, 1)).astype(np.float32), "bias"),
    ]
    nodes = [
        helper.make_node("MatMul", ["weight", "x"], ["mm"]),
        helper.make_node("Add", ["mm", "bias"], ["logits"]),
        helper.make_node("Softmax", ["logits"], ["scores"], axis=1),
    ]
    model = _model_of(nodes, ["N", 6, 5], ["N", 4, 5], inits)
    scaling, w, b = _vector(4, rng)
    folded = do_patch(model, scaling, fold=True)
    assert graph.read_record(folded).changes["fold"]["weight_axis"] == 0
    z = rng.normal(size=(3, 6, 5)).astype(np.float32)
    (logits,) = run_reference(graph.expose(model, ["logits"]), z, ["logits"])
    for runner in (run_ort, run_reference):
        (got,) = runner(folded, z)
        ref = scipy.special.softmax(logits.astype(np.float64) * w[:, None] + b[:, None], axis=1)
        np.testing.assert_allclose(got, ref, atol=1e-6)


def _class_axis_lost_model(rng):
    """Gemm (N x 8) reshaped to N x 4 x 2 before the Softmax: class k is in columns 2k, 2k+1."""
    inits = [
        numpy_helper.from_array(rng.normal(size=(6, 8)).astype(np.float32), "weight"),
        numpy_helper.from_array(rng.normal(size=8).astype(np.float32), "bias"),
        _axes("shape", [-1, 4, 2]),
    ]
    nodes = [
        helper.make_node("Gemm", ["x", "weight", "bias"], ["logits"], name="head"),
        helper.make_node("Reshape", ["logits", "shape"], ["grouped"], name="group"),
        helper.make_node("Softmax", ["grouped"], ["scores"], axis=1),
    ]
    return _model_of(nodes, ["N", 6], ["N", 4, 2], inits)


def _class_axis_not_features_model(rng):
    """x (N x 3 x 6) @ W (6 x 3), softmax over axis 1: a class is not a weight column."""
    inits = [
        numpy_helper.from_array(rng.normal(size=(6, 3)).astype(np.float32), "weight"),
        numpy_helper.from_array(rng.normal(size=3).astype(np.float32), "bias"),
    ]
    nodes = [
        helper.make_node("MatMul", ["x", "weight"], ["mm"], name="head"),
        helper.make_node("Add", ["mm", "bias"], ["logits"]),
        helper.make_node("Softmax", ["logits"], ["scores"], axis=1),
    ]
    return _model_of(nodes, ["N", 3, 6], ["N", 3, 3], inits)


def _shared_weight(model):
    model.graph.node.append(helper.make_node("Identity", ["weight"], ["weight_copy"]))
    model.graph.output.append(helper.make_empty_tensor_value_info("weight_copy"))
    return model


def test_fold_refusals_say_what_to_do(rng):
    vector, _, _ = _vector(4, rng)
    no_offset = Scaling.of_affine(vector.parameters["w"], [0.0] * 4, "vector", "multiclass")
    cases = [
        (_linear_model(rng, bias_shape=None), vector,
         "'head' has no bias to take the offset b of vector scaling; leave out --fold to insert Mul "
         r"\+ Add instead, or fit temperature scaling \(no offset\)"),
        (_linear_model(rng, beta=0.0), vector, "'head' multiplies its bias by beta = 0"),
        (_class_axis_lost_model(rng), vector,
         "cannot tell which part of weight 'weight' belongs to which class: the class axis is lost "
         "through the Reshape node 'group'.*; leave out --fold to insert the scaling as nodes instead"),
        (_class_axis_not_features_model(rng), Scaling.of_affine([1.0, 2.0, 3.0], [0.0] * 3, "vector", "multiclass"),
         "the class axis of the scores is not the output-feature axis of 'head'"),
        (_linear_model(rng), Scaling.of_affine([1.0, 0.0, 1.0, 1.0], [0.0] * 4, "vector", "multiclass"),
         "multiplies some class's logit by 0"),
        (random_mlp(rng, dtype=np.float16, final="Softmax"), 1e-5, "the scaled 'w1' does not fit in float16"),
        (_matmul_add_model(rng, weight_as_input=True), vector, "'weight' .* is not a constant initializer"),
        (_matmul_add_model(rng, quantized=True), vector, "quantized"),
        (random_mlp(rng), vector, "would change the logits output 'scores' itself.*add --drop-logits"),
        (_shared_weight(_linear_model(rng)), vector, "the weight 'weight' is shared with other nodes"),
    ]
    for model, scaling, match in cases:
        with pytest.raises(OnnxcalError, match=match):
            do_patch(model, scaling, fold=True)
    # Without an offset a layer with no bias (or beta = 0) folds fine; so does one
    # temperature through the Reshape (every class scaled alike needs no tracking).
    x = rng.normal(size=(8, 6)).astype(np.float32)
    for model, scaling in [
        (_linear_model(rng, bias_shape=None), no_offset),
        (_linear_model(rng, beta=0.0), no_offset),
        (_class_axis_lost_model(rng), 2.0),
    ]:
        folded = do_patch(model, scaling, fold=True)
        assert len(folded.graph.node) == len(model.graph.node)
        np.testing.assert_allclose(run_ort(folded, x)[0], run_ort(do_patch(model, scaling), x)[0], atol=1e-6)


def test_unpatch_of_a_fold_recorded_before_per_class_folding(rng, x):
    # Records of single-T folds made before per-class folding have no "fold"
    # entry: every scaled initializer was divided by T.
    model = _linear_model(rng, trans_b=1)
    folded = do_patch(model, 2.0, fold=True)
    record = graph.read_record(folded)
    old = dict(record.changes)
    del old["fold"]
    graph._write_record(folded, replace(record, changes=old))
    record = graph.read_record(folded)
    assert graph.temperature_value(folded, record, model) == pytest.approx(2.0, rel=1e-6)
    back = graph.unpatch(folded)
    w0, w1 = (numpy_helper.to_array(graph._initializer(m.graph, "weight")) for m in (model, back))
    np.testing.assert_allclose(w1, w0, rtol=float(np.finfo(np.float32).eps), atol=0)


# -- hostile files: what the fuzzer (tests/fuzz) found, each now a clean OnnxcalError --


def _record_of(model) -> dict:
    (record,) = json.loads(next(p.value for p in model.metadata_props if p.key == graph.RECORD_KEY))
    return record


def _with_record(model, record: dict):
    out = onnx.ModelProto()
    out.CopyFrom(model)
    for p in out.metadata_props:
        if p.key == graph.RECORD_KEY:
            p.value = json.dumps([record])
    return out


@pytest.mark.parametrize(
    "field, value, words",
    [
        ("changes", 3, "changes"),  # was: TypeError in unpatch
        ("changes", {"nodes": ["x"]}, "node 'x' that the patch added is missing"),  # was: KeyError in unpatch
        ("output", 5, "field 'output' is int"),
        ("folded", "yes", "field 'folded'"),
        ("temperature", "2", "field 'temperature' is str"),
        ("parameters", {"temperature": -2.0}, "not a positive finite number"),
        ("method", "magic", "unknown calibration method"),
    ],
)
def test_a_damaged_record_is_refused_cleanly(rng, field, value, words):
    patched = do_patch(random_mlp(rng, final="Softmax"), 2.0)
    bad = _with_record(patched, {**_record_of(patched), field: value})
    refused = f"calibration record .*(is damaged|does not match its graph): .*{words}"
    with pytest.raises(OnnxcalError, match=refused):
        graph.unpatch(bad)
    with pytest.raises(OnnxcalError, match=refused):
        do_patch(bad, 1.5)


def _softmax_over(elem: int) -> onnx.ModelProto:
    """x -> Softmax -> Cast(float): the scores behind the float output are of type ``elem``."""
    g = helper.make_graph(
        [helper.make_node("Softmax", ["x"], ["p"], axis=1), helper.make_node("Cast", ["p"], ["y"], to=1)],
        "typed",
        [helper.make_tensor_value_info("x", elem, ["N", 3])],
        [helper.make_tensor_value_info("y", onnx.TensorProto.FLOAT, ["N", 3])],
        value_info=[helper.make_tensor_value_info("p", elem, ["N", 3])],
    )
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)])
    m.ir_version = 8
    return m


@pytest.mark.parametrize("elem", [onnx.TensorProto.COMPLEX64, onnx.TensorProto.UINT32])
def test_scores_of_a_non_float_type_are_refused(elem):
    with pytest.raises(OnnxcalError, match=r"class scores 'x' .* not a floating-point type"):
        graph.find_scores(_softmax_over(elem))  # was: KeyError when patching


def test_an_undefined_element_type_is_named():
    vi = helper.make_tensor_value_info("y", onnx.TensorProto.FLOAT, ["N", 3])
    vi.type.tensor_type.elem_type = 44  # no ONNX version defines it
    assert graph.tensor_spec(vi).dtype == "unknown type 44"  # was: KeyError


def test_rank_zero_scores_are_refused():
    g = helper.make_graph(
        [helper.make_node("Sigmoid", ["x"], ["y"])],
        "scalar",
        [helper.make_tensor_value_info("x", onnx.TensorProto.FLOAT, [])],
        [helper.make_tensor_value_info("y", onnx.TensorProto.FLOAT, ["N", 1])],  # a shape that lies
    )
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)])
    with pytest.raises(OnnxcalError, match="rank 0"):
        graph.find_scores(m)  # was: IndexError
    m.graph.ClearField("node")
    m.graph.output[0].type.tensor_type.shape.ClearField("dim")  # raw logits of rank 0
    with pytest.raises(OnnxcalError, match="rank 0"):
        graph.find_scores(m)


def test_a_reshape_whose_shapes_disagree_loses_the_class_axis():
    g = helper.make_graph(
        [helper.make_node("Softmax", ["x"], ["p"], axis=2), helper.make_node("Flatten", ["p"], ["y"], axis=1)],
        "lying",
        [helper.make_tensor_value_info("x", onnx.TensorProto.FLOAT, ["N", 2, 3])],
        [helper.make_tensor_value_info("y", onnx.TensorProto.FLOAT, ["N", 6])],
        value_info=[helper.make_tensor_value_info("p", onnx.TensorProto.FLOAT, ["N", 6])],  # rank 2, not 3
    )
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)])
    with pytest.raises(OnnxcalError, match="does not keep the class axis whole"):
        graph.find_scores(m)  # was: IndexError


def test_names_that_are_not_utf8_are_refused_at_load(tmp_path, rng):
    data = random_mlp(rng).SerializeToString()
    assert data.count(b"scores") >= 1
    path = tmp_path / "bad.onnx"
    path.write_bytes(data.replace(b"scores", b"sco\xffes"))  # protobuf then hands over bytes
    with pytest.raises(OnnxcalError, match="holds bytes that are not UTF-8 text"):
        graph.load_model(path)  # was: TypeError or UnicodeDecodeError further on


@pytest.mark.parametrize("location", [b"w\xff.bin", b"w\x00.bin"])
def test_external_locations_that_are_no_file_name_are_refused(tmp_path, rng, location):
    model = random_mlp(rng)
    init = model.graph.initializer[0]
    init.ClearField("raw_data")
    init.ClearField("float_data")
    init.data_location = onnx.TensorProto.EXTERNAL
    e = init.external_data.add()
    e.key, e.value = "location", "PLACEHOLDER"
    path = tmp_path / "m.onnx"
    path.write_bytes(model.SerializeToString().replace(b"PLACEHOLDER", location.ljust(11, b"_")))
    with pytest.raises(OnnxcalError, match="is not a file name|not UTF-8 text"):
        graph.load_model(path)  # was: TypeError in sorted(), ValueError in realpath
