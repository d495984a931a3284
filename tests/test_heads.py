"""Heads beyond the plain classifier (issue 12): inside the subgraphs of If, Loop and Scan, a mean
of probabilities, a detector's Concat of boxes and scores, recurrent models with state outputs,
per-pixel and per-position outputs.

Each case either calibrates correctly or is refused with one line naming the
reason. "Correctly" is judged against references onnxcal does not compute:
the logits of the model cut before its activation (``head_models.cut``, run
in onnxruntime) or computed with NumPy from the weights written into the
model; temperatures fitted by ``scipy.optimize.minimize_scalar`` on those
logits; activations by ``scipy.special``; and the patched graphs run in
onnxruntime and in onnx's ReferenceEvaluator (onnx's own Python
implementation of the operator spec, If/Loop/Scan included).
"""

from __future__ import annotations

from pathlib import Path

import head_models as hm
import numpy as np
import onnx
import pytest
import scipy.optimize
import scipy.special as sp
from conftest import save_model
from onnx import TensorProto, helper, numpy_helper
from onnx.reference import ReferenceEvaluator

from onnxcal import api, graph
from onnxcal.errors import OnnxcalError
from onnxcal.fit import FitOptions

NO_BOOT = FitOptions(holdout=0.0, bootstrap=0)
SHA = "0" * 64


def softmax_temperature(z: np.ndarray, labels: np.ndarray) -> float:
    """T minimising the mean NLL of softmax(z / T) (class axis last), by scipy.optimize.minimize_scalar."""
    z, labels = z.reshape(-1, z.shape[-1]), labels.reshape(-1)

    def nll(log_t):
        lp = sp.log_softmax(z / np.exp(log_t), axis=1)
        return -np.mean(lp[np.arange(len(labels)), labels])

    return _minimise(nll)


def sigmoid_temperature(z: np.ndarray, labels: np.ndarray) -> float:
    """T minimising the mean binary cross-entropy of sigmoid(z / T) over every logit (scipy)."""
    z, y = z.reshape(-1), labels.reshape(-1).astype(np.float64)

    def nll(log_t):
        s = z / np.exp(log_t)
        return -np.mean(y * sp.log_expit(s) + (1 - y) * sp.log_expit(-s))

    return _minimise(nll)


def _minimise(nll) -> float:
    res = scipy.optimize.minimize_scalar(nll, bounds=(np.log(0.01), np.log(100.0)), method="bounded",
                                         options={"xatol": 1e-10})
    return float(np.exp(res.x))


def bernoulli(p: np.ndarray, seed: int) -> np.ndarray:
    return (np.random.default_rng(seed).random(p.shape) < p).astype(np.int64)


def categorical(p: np.ndarray, seed: int) -> np.ndarray:
    """One class per row of ``p`` (class axis last), drawn with its probabilities."""
    flat = p.reshape(-1, p.shape[-1])
    u = np.random.default_rng(seed).random((len(flat), 1))
    return (flat.cumsum(axis=1) < u).sum(axis=1).clip(max=p.shape[-1] - 1).reshape(p.shape[:-1])


def do_patch(model, t, **kw):
    return graph.patch(model, t, source_sha256=SHA, source_name="model.onnx", **kw)


def calibrate(tmp_path: Path, model, x, labels, **kw):
    """``api.calibrate`` on ``model`` with the data (x, labels): the result and the patched model."""
    path = save_model(model, tmp_path / "model.onnx")
    np.savez(tmp_path / "val.npz", x=x, labels=labels)
    result = api.calibrate(path, tmp_path / "val.npz", tmp_path / "out.onnx", options=NO_BOOT, **kw)
    assert result.verification.passed, result.verification.checks
    return result, onnx.load(str(tmp_path / "out.onnx"))


def runners(model, x) -> list[np.ndarray]:
    """The first output of ``model`` by onnxruntime and by onnx's ReferenceEvaluator."""
    (a,) = hm.run(model, {"x": x}, [model.graph.output[0].name])
    (b,) = ReferenceEvaluator(model).run([model.graph.output[0].name], {"x": x})
    return [np.asarray(a, np.float64), np.asarray(b, np.float64)]


def unique_node_names(model: onnx.ModelProto) -> bool:
    names = [n.name for n in _all_nodes(model.graph)]
    return len(names) == len(set(names))


def _all_nodes(g: onnx.GraphProto):
    for n in g.node:
        yield n
        for a in n.attribute:
            if a.type == onnx.AttributeProto.GRAPH:
                yield from _all_nodes(a.g)


# --------------------------------------------------------------------------
# 1. A Sigmoid in both branches of an If, then a mean over frames (speech activity)


def test_a_mean_of_sigmoids_inside_if_branches_is_calibrated_as_the_probability_it_is(tmp_path):
    model = hm.speech_activity()
    site = graph.find_scores(model)
    assert (site.output, site.spelling, site.holds, site.logits_from) == (
        "speech_prob", "mean-of-probabilities", "probabilities", "logit")
    assert "both branches of If 'rate_if'" in graph.describe_site(site)
    rng = np.random.default_rng(1)
    x = rng.normal(size=(400, 10, hm.F)).astype(np.float32)  # 10 frames: the then-branch
    # Outside onnxcal: the frames' logits from the model cut before its Sigmoids and its mean,
    # the mean of their sigmoids (scipy), and its logit: the output is sigmoid of that.
    mean_logit = sp.logit(sp.expit(hm.speech_logits(model, x)).mean(axis=1))
    labels = bernoulli(sp.expit(mean_logit / 2.0), seed=2)
    result, patched = calibrate(tmp_path, model, x, labels)
    t = result.summary.temperature
    assert t == pytest.approx(sigmoid_temperature(mean_logit, labels), abs=1e-3)
    assert [o.SerializeToString() for o in patched.graph.output] == [o.SerializeToString() for o in model.graph.output]
    for frames in (10, 6):  # both branches of the If
        xs = rng.normal(size=(50, frames, hm.F)).astype(np.float32)
        want = sp.expit(sp.logit(sp.expit(hm.speech_logits(model, xs)).mean(axis=1)) / t)
        for got in runners(patched, xs):
            np.testing.assert_allclose(got, want, atol=1e-5, rtol=0)
    assert graph.unpatch(patched).SerializeToString() == model.SerializeToString()


def test_scaling_each_frame_would_not_be_a_temperature_of_the_mean():
    """Why the mean is calibrated as a probability (docs/graph.md): mean(sigmoid(z / T)) is not
    sigmoid(g(mean) / T) for any one g: two sets of frames with the same mean probability get
    different outputs once every frame is scaled."""
    a = np.array([[-3.0, 3.0]])  # mean of sigmoids 0.5
    b = np.array([[0.0, 0.0]])  # mean of sigmoids 0.5
    assert sp.expit(a).mean() == pytest.approx(sp.expit(b).mean())
    t = 2.0
    assert abs(sp.expit(a / t).mean() - sp.expit(b / t).mean()) < 1e-12  # symmetric pair: equal
    c = np.array([[-1.0, 4.0]])  # another mean...
    d = np.array([[sp.logit(sp.expit(c).mean())] * 2])  # ... matched by two equal frames
    assert sp.expit(c).mean() == pytest.approx(sp.expit(d).mean())
    assert abs(sp.expit(c / t).mean() - sp.expit(d / t).mean()) > 0.01


# --------------------------------------------------------------------------
# 1. A probability produced inside an If (wake word), and heads in Loop/Scan bodies


def test_a_sigmoid_inside_both_branches_of_an_if_is_scaled_in_each(tmp_path):
    model = hm.wake_word()
    site = graph.find_scores(model)
    assert site.spelling == "sigmoid" and site.inserts and len(site.branches) == 2
    assert site.num_classes == 1 and site.rank == 1  # a rank-1 Sigmoid output: one binary score per row
    rng = np.random.default_rng(3)
    x = rng.normal(size=(400, 16)).astype(np.float32)
    z = hm.wake_logits(model, x).reshape(-1)  # the model cut before the Sigmoids in its branches
    labels = bernoulli(sp.expit(z / 2.5), seed=4)
    result, patched = calibrate(tmp_path, model, x, labels)
    t = result.summary.temperature
    assert t == pytest.approx(sigmoid_temperature(z, labels), abs=1e-3)
    record = graph.read_record(patched)
    assert record.rewrite == "insert-before-activation"
    divs = {n.name for n in _all_nodes(patched.graph) if n.op_type == "Div"}
    then_g, else_g = (a.g for a in next(n for n in patched.graph.node if n.op_type == "If").attribute)
    assert {n.name for n in then_g.node} & divs and {n.name for n in else_g.node} & divs  # one Div in each branch
    assert unique_node_names(patched)
    assert len([i for i in patched.graph.initializer if i.name == record.temperature_initializer]) == 1
    for length in (16, 8):  # both branches
        xs = rng.normal(size=(30, length)).astype(np.float32)
        want = sp.expit(hm.wake_logits(model, xs).reshape(-1) / t)
        for got in runners(patched, xs):
            np.testing.assert_allclose(got, want, atol=1e-5, rtol=0)
    assert graph.unpatch(patched).SerializeToString() == model.SerializeToString()
    assert api.verify(tmp_path / "out.onnx", tmp_path / "val.npz").passed


def test_a_softmax_inside_if_branches_is_captured_and_patched_per_branch():
    model = hm.wake_word(softmax_k=3)
    site = graph.find_scores(model)
    assert (site.spelling, site.num_classes, site.class_axis) == ("softmax", 3, 1)
    rng = np.random.default_rng(5)
    for length in (16, 8):
        x = rng.normal(size=(20, length)).astype(np.float32)
        z = hm.wake_logits(model, x)
        exposed, name = graph.expose_scores(model, site)  # what capture reads: the logits of the branch that ran
        (got_z,) = hm.run(exposed, {"x": x}, [name])
        np.testing.assert_allclose(got_z, z, atol=1e-6)
        for got in runners(do_patch(model, 1.7), x):
            np.testing.assert_allclose(got, sp.softmax(z / 1.7, axis=1), atol=1e-5, rtol=0)


def test_a_softmax_in_a_scan_body_is_a_per_position_head(tmp_path):
    model = hm.per_step_scan()
    site = graph.find_scores(model)
    assert site.spelling == "softmax" and site.branches[0].attribute == "body"
    assert (site.class_axis, site.rank, site.num_classes) == (2, 3, 3)
    rng = np.random.default_rng(6)
    x = rng.normal(size=(60, 7, hm.F)).astype(np.float32)
    z = hm.per_step_logits(x)  # NumPy, from the weights
    labels = categorical(sp.softmax(z / 2.0, axis=-1), seed=7)  # one class per position: N x T
    result, patched = calibrate(tmp_path, model, x, labels)
    t = result.summary.temperature
    assert t == pytest.approx(softmax_temperature(z, labels), abs=1e-3)
    for got in runners(patched, x):
        np.testing.assert_allclose(got, sp.softmax(z / t, axis=-1), atol=1e-5, rtol=0)
    assert graph.unpatch(patched).SerializeToString() == model.SerializeToString()


def _loop_model(feed_back: bool) -> onnx.ModelProto:
    """A Loop over the rows of a K-wide input whose body applies a Sigmoid; with ``feed_back`` the
    Sigmoid's value is also the carried state the next iteration adds to its logits."""
    body_nodes = [
        helper.make_node("Gather", ["x", "i"], ["row"], axis=0, name="row"),
        helper.make_node("Add", ["row", "carried"], ["z"], name="add_state"),
        helper.make_node("Sigmoid", ["z"], ["p"], name="body_sigmoid"),
        helper.make_node("Identity", ["cond_in"], ["cond_out"], name="cond"),
        helper.make_node("Identity", ["p" if feed_back else "carried"], ["carried_out"], name="carry"),
        helper.make_node("Identity", ["p"], ["p_out"], name="scan"),
    ]
    body = helper.make_graph(
        body_nodes, "loop_body",
        [helper.make_tensor_value_info("i", TensorProto.INT64, []),
         helper.make_tensor_value_info("cond_in", TensorProto.BOOL, []),
         helper.make_tensor_value_info("carried", TensorProto.FLOAT, [3])],
        [helper.make_tensor_value_info("cond_out", TensorProto.BOOL, []),
         helper.make_tensor_value_info("carried_out", TensorProto.FLOAT, [3]),
         helper.make_tensor_value_info("p_out", TensorProto.FLOAT, [3])],
    )
    g = helper.make_graph(
        [helper.make_node("Shape", ["x"], ["shape"]), helper.make_node("Gather", ["shape", "zero"], ["n"], axis=0),
         helper.make_node("Loop", ["n", "true", "start"], ["carried_final", "probs"], body=body, name="rows_loop")],
        "loop", [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", 3])],
        [helper.make_tensor_value_info("probs", TensorProto.FLOAT, ["N", 3])],
        initializer=[numpy_helper.from_array(np.array(0, np.int64), "zero"),
                     numpy_helper.from_array(np.array(True), "true"),
                     numpy_helper.from_array(np.zeros(3, np.float32), "start")],
    )
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)])
    m.ir_version = 8
    onnx.checker.check_model(m, full_check=True)
    return m


def test_a_loop_body_is_scaled_unless_its_activation_feeds_the_next_iteration():
    x = np.random.default_rng(8).normal(size=(9, 3)).astype(np.float32)
    plain = _loop_model(feed_back=False)  # carried stays 0: probs = sigmoid(x), multi-label
    site = graph.find_scores(plain)
    assert site.activation == "sigmoid" and site.branches[0].attribute == "body" and site.class_axis == 1
    for got in runners(do_patch(plain, 2.0), x):
        np.testing.assert_allclose(got, sp.expit(x.astype(np.float64) / 2.0), atol=1e-6, rtol=0)
    # Scaling before a Sigmoid whose value is carried into the next iteration would change what
    # every later iteration computes: onnxcal does not look into such a body (raw values for the
    # finder; the data guard then reads them as probabilities, in place, after the Loop).
    assert graph.find_scores(_loop_model(feed_back=True)).activation is None


def test_branches_that_compute_the_output_differently_are_refused():
    model = hm.wake_word()
    if_node = next(n for n in model.graph.node if n.op_type == "If")
    else_g = next(a.g for a in if_node.attribute if a.name == "else_branch")
    sig = next(n for n in else_g.node if n.op_type == "Sigmoid")
    sig.op_type = "Identity"  # the else branch now outputs raw logits
    refusal = (r"subgraphs of If 'length_if' compute 'if_out' in different ways "
               r"\(then_branch: probabilities .*; else_branch: raw values\)")
    with pytest.raises(OnnxcalError, match=refusal):
        graph.find_scores(model)


def _written_sigmoid_branch(tag: str, w: np.ndarray) -> onnx.GraphProto:
    """1 / (1 + Exp(-z)): a sigmoid spelled out, which no pattern knows."""
    nodes = [
        helper.make_node("Gemm", ["x", f"{tag}_w", f"{tag}_b"], [f"{tag}_z"]),
        helper.make_node("Neg", [f"{tag}_z"], [f"{tag}_nz"]),
        helper.make_node("Exp", [f"{tag}_nz"], [f"{tag}_e"]),
        helper.make_node("Add", [f"{tag}_e", "one"], [f"{tag}_d"]),
        helper.make_node("Reciprocal", [f"{tag}_d"], [f"{tag}_p"]),
    ]
    inits = [numpy_helper.from_array(w.astype(np.float32), f"{tag}_w"),
             numpy_helper.from_array(np.array([0.1], np.float32), f"{tag}_b")]
    return helper.make_graph(nodes, tag, [], [helper.make_tensor_value_info(f"{tag}_p", TensorProto.FLOAT, ["N", 1])],
                             initializer=inits)


def test_a_probability_inside_an_if_that_no_pattern_knows_is_caught_by_the_data_guard(tmp_path):
    rng = np.random.default_rng(9)
    w_then, w_else = rng.normal(size=(4, 1)) * 1.5, rng.normal(size=(4, 1))
    cond_nodes, cond_inits = hm._long_frames(1, 3)  # x.shape[1] > 3
    g = helper.make_graph(
        [*cond_nodes,
         helper.make_node("If", ["cond"], ["p"], then_branch=_written_sigmoid_branch("then", w_then),
                          else_branch=_written_sigmoid_branch("else", w_else), name="which_if")],
        "written", [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", 4])],
        [helper.make_tensor_value_info("p", TensorProto.FLOAT, ["N", 1])],
        initializer=[numpy_helper.from_array(np.array(1.0, np.float32), "one"), *cond_inits],
    )
    model = helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    assert graph.find_scores(model).activation is None  # the graph alone: raw values
    x = rng.normal(size=(300, 4)).astype(np.float32)
    (p,) = hm.run(model, {"x": x})
    z = sp.logit(p.astype(np.float64)).reshape(-1)  # the model's own output, as logits (scipy)
    labels = bernoulli(sp.expit(z / 1.8), seed=10)
    result, patched = calibrate(tmp_path, model, x, labels)
    assert any("holds probabilities, not logits" in n for n in result.summary.notes)
    t = result.summary.temperature
    assert t == pytest.approx(sigmoid_temperature(z, labels), abs=1e-3)
    (got,) = hm.run(patched, {"x": x})
    np.testing.assert_allclose(got.reshape(-1), sp.expit(z / t), atol=1e-5, rtol=0)
    assert [o.name for o in patched.graph.output] == ["p"]  # drop-in


# --------------------------------------------------------------------------
# 2. A detector: Concat(boxes, Sigmoid(scores))


def test_a_concat_of_boxes_and_scores_is_refused_naming_the_score_positions():
    with pytest.raises(OnnxcalError) as info:
        graph.find_scores(hm.detector())
    text = str(info.value)
    assert "positions 0..3 from tensor 'boxes'" in text and "positions 4..21 from sigmoid" in text
    assert "--score-columns 4:22" in text and "\n" not in text


def test_only_the_score_positions_of_a_detector_are_calibrated(tmp_path, run_cli):
    model = hm.detector()
    rng = np.random.default_rng(11)
    x = rng.normal(size=(60, 8, hm.F)).astype(np.float32)
    z = hm.detector_logits(x)  # N x A x 18 class logits, by NumPy
    labels = bernoulli(sp.expit(z / 1.7), seed=12).astype(np.uint8)  # multi-label, shaped like the scores
    result, patched = calibrate(tmp_path, model, x, labels, score_columns="4:22")
    t = result.summary.temperature
    assert t == pytest.approx(sigmoid_temperature(z, labels), abs=1e-3)
    (orig,) = hm.run(model, {"x": x})
    for got in runners(patched, x):
        np.testing.assert_allclose(got[..., 4:], sp.expit(z / t), atol=1e-5, rtol=0)
    (got,) = hm.run(patched, {"x": x})
    assert got[..., :4].tobytes() == orig[..., :4].tobytes()  # the boxes, byte for byte
    record = graph.read_record(patched)
    assert record.score_columns == "4:22" and record.rewrite == "insert-before-activation"
    assert graph.unpatch(patched).SerializeToString() == model.SerializeToString()
    assert api.verify(tmp_path / "out.onnx", tmp_path / "val.npz").passed
    # the same through the command line, and a fit made on the score columns patched as captured
    cli = run_cli("capture", tmp_path / "model.onnx", "--data", tmp_path / "val.npz", "--out", tmp_path / "c.npz",
                  "--score-columns", "4:22")
    assert cli.code == 0, cli.err
    fit = tmp_path / "fit.json"
    assert run_cli("fit", tmp_path / "c.npz", "--out", fit, "--holdout", "0", "--bootstrap", "0").code == 0
    assert run_cli("patch", tmp_path / "model.onnx", "--fit", fit, "--out", tmp_path / "p2.onnx").code == 0
    (got2,) = hm.run(onnx.load(str(tmp_path / "p2.onnx")), {"x": x})
    np.testing.assert_allclose(got2[..., 4:], sp.expit(z / t), atol=1e-5, rtol=0)


# --------------------------------------------------------------------------
# 3. Recurrent models: state outputs are never the class scores


def test_lstm_state_outputs_are_never_chosen(tmp_path):
    site = graph.find_scores(hm.recurrent())
    assert (site.output, site.activation, site.num_classes, site.rank) == ("speech", "sigmoid", 1, 1)
    raw = graph.find_scores(hm.recurrent("raw"))  # raw logits beside hn and cn: no longer three candidates
    assert (raw.output, raw.activation, raw.num_classes) == ("speech", None, 1)
    assert graph.find_scores(hm.recurrent(state_inputs=True)).output == "speech"
    with pytest.raises(OnnxcalError, match=r"output 'hn' is the state output Y_h of LSTM 'lstm': .* not class scores"):
        graph.find_scores(hm.recurrent(), "hn")
    with pytest.raises(OnnxcalError, match=r"output 'cn' is the state output Y_c of LSTM 'lstm'"):
        do_patch(hm.recurrent(), 2.0, output="cn")
    # an output computed from an input of its own type and shape is a state fed back
    assert graph.find_scores(hm.fed_back_state()).output == "class_logits"


def test_a_recurrent_model_calibrates_its_rank_1_sigmoid(tmp_path):
    model = hm.recurrent()
    rng = np.random.default_rng(13)
    x = rng.normal(size=(300, 5, hm.F)).astype(np.float32)
    (z,) = hm.run(hm.cut(model, "speech"), {"x": x}, ["speech"])  # cut before the Sigmoid
    z = z.astype(np.float64)
    labels = bernoulli(sp.expit(z / 0.6), seed=14)
    result, patched = calibrate(tmp_path, model, x, labels)
    t = result.summary.temperature
    assert t == pytest.approx(sigmoid_temperature(z, labels), abs=1e-3)
    got, hn = hm.run(patched, {"x": x}, ["speech", "hn"])
    np.testing.assert_allclose(got, sp.expit(z / t), atol=1e-5, rtol=0)
    (hn0,) = hm.run(model, {"x": x}, ["hn"])
    assert hn.tobytes() == hn0.tobytes()
    assert graph.read_record(patched).output == "speech"


def test_a_model_whose_only_float_outputs_are_states_is_refused():
    model = hm.recurrent()
    keep = [o for o in model.graph.output if o.name != "speech"]
    del model.graph.output[:]
    model.graph.output.extend(keep)
    with pytest.raises(OnnxcalError, match=r"every float output of the model is a recurrent state"):
        graph.find_scores(model)


# --------------------------------------------------------------------------
# Dense heads: per pixel (N x 1 x H x W) and per position (N x T x K)


def test_a_per_pixel_sigmoid_mask_is_calibrated_on_every_pixel(tmp_path):
    rng = np.random.default_rng(15)
    x = rng.normal(size=(40, hm.F, 4, 4)).astype(np.float32)
    z = hm.per_pixel_logits(x)  # N x 1 x H x W, by NumPy
    labels = bernoulli(sp.expit(z[:, 0] / 2.2), seed=16)  # one 0/1 label per pixel: N x H x W
    result, patched = calibrate(tmp_path, hm.per_pixel(), x, labels)
    t = result.summary.temperature
    assert t == pytest.approx(sigmoid_temperature(z[:, 0], labels), abs=1e-3)
    for got in runners(patched, x):
        np.testing.assert_allclose(got, sp.expit(z / t), atol=1e-5, rtol=0)


def test_a_per_position_softmax_is_calibrated_on_every_position(tmp_path):
    rng = np.random.default_rng(17)
    x = rng.normal(size=(50, 6, hm.F)).astype(np.float32)
    z = hm.per_position_logits(x)
    labels = categorical(sp.softmax(z / 1.6, axis=-1), seed=18)  # N x T
    result, patched = calibrate(tmp_path, hm.per_position(), x, labels)
    t = result.summary.temperature
    assert t == pytest.approx(softmax_temperature(z, labels), abs=1e-3)
    for got in runners(patched, x):
        np.testing.assert_allclose(got, sp.softmax(z / t, axis=-1), atol=1e-5, rtol=0)
