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
from onnxcal.verify import tolerance
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
    patched = do_patch(model, 2.0, drop_logits=True)
    assert [o.name for o in patched.graph.output] == ["h0", "probabilities"]
    assert graph.unpatch(patched).SerializeToString() == model.SerializeToString()


def test_record_without_changes_cannot_be_undone(rng):
    patched = do_patch(random_mlp(rng), 2.0)
    record = graph.read_record(patched)
    old = {k: v for k, v in record.to_dict().items() if k not in ("changes", "folded", "compute_dtype", "source_output")}
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
