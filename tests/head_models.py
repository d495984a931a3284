"""Small models of the heads of issue 12, built with onnx.helper, and their cut twins.

Each builder writes a model the way exporters of such heads do (a head
inside the branches of an ``If``, a per-frame ``Scan``, a detector's
``Concat`` of boxes and scores, an LSTM with state outputs, per-pixel and
per-position heads) from weights drawn here, so the tests know the true
logits without asking onnxcal. ``cut`` returns the same model with every
activation (Sigmoid, Softmax) replaced by ``Identity`` and the pooling
left out: run in onnxruntime, it gives the logits outside onnxcal (the
model cut before its activation).

Operator semantics: the ONNX operator specification (If, Loop, Scan, LSTM,
Concat, ReduceMean, Softmax, Sigmoid).
"""

from __future__ import annotations

import numpy as np
import onnx
import onnxruntime as ort
from onnx import TensorProto, helper, numpy_helper

OPSET = 17
F = 5  # features per frame / anchor / pixel
RNG = np.random.default_rng(1212)


def _f32(name: str, value) -> onnx.TensorProto:
    return numpy_helper.from_array(np.asarray(value, dtype=np.float32), name)


def _i64(name: str, value) -> onnx.TensorProto:
    return numpy_helper.from_array(np.asarray(value, dtype=np.int64), name)


def _model(nodes, inputs, outputs, inits=(), opset: int = OPSET, ir: int = 8) -> onnx.ModelProto:
    g = helper.make_graph(nodes, "heads", inputs, outputs, initializer=list(inits))
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", opset)])
    m.ir_version = ir
    onnx.checker.check_model(m, full_check=True)
    return m


def _vi(name: str, shape, elem=TensorProto.FLOAT) -> onnx.ValueInfoProto:
    return helper.make_tensor_value_info(name, elem, shape)


def run(model: onnx.ModelProto, feeds: dict, names=None) -> list[np.ndarray]:
    sess = ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"])
    return sess.run(names, feeds)


# --------------------------------------------------------------------------
# Cutting a model before its activations (the reference logits)


def _cut_graph(g: onnx.GraphProto, drop: set[str]) -> None:
    for node in g.node:
        if node.op_type in ("Sigmoid", "Softmax"):
            node.op_type = "Identity"
            del node.attribute[:]
        for a in node.attribute:
            if a.type == onnx.AttributeProto.GRAPH:
                _cut_graph(a.g, drop)
    kept = [n for n in g.node if n.name not in drop]
    del g.node[:]
    g.node.extend(kept)


def cut(model: onnx.ModelProto, output: str, before: str | None = None) -> onnx.ModelProto:
    """``model`` with every Sigmoid/Softmax made an Identity (in subgraphs too).

    With ``before`` (a tensor), the output ``output`` becomes that tensor:
    the pooling after it is left out.
    """
    m = onnx.ModelProto()
    m.CopyFrom(model)
    _cut_graph(m.graph, set())
    if before is not None:
        out = next(o for o in m.graph.output if o.name == output)
        out.name = before
        out.type.tensor_type.ClearField("shape")
    return m


# --------------------------------------------------------------------------
# 1. Heads inside subgraphs


def _frames_branch(tag: str, w: np.ndarray, b: float) -> onnx.GraphProto:
    """A branch of the speech-activity model: per-frame logits, Sigmoid (N x T)."""
    nodes = [
        helper.make_node("MatMul", ["x", f"{tag}_w"], [f"{tag}_proj"], name=f"{tag}_matmul"),
        helper.make_node("Add", [f"{tag}_proj", f"{tag}_b"], [f"{tag}_logit3"], name=f"{tag}_add"),
        helper.make_node("Squeeze", [f"{tag}_logit3", "squeeze_axes"], [f"{tag}_logits"], name=f"{tag}_squeeze"),
        helper.make_node("Sigmoid", [f"{tag}_logits"], [f"{tag}_frame_probs"], name=f"{tag}_sigmoid"),
    ]
    inits = [_f32(f"{tag}_w", w), _f32(f"{tag}_b", [b])]
    return helper.make_graph(nodes, f"{tag}_branch", [], [_vi(f"{tag}_frame_probs", ["N", "T"])], initializer=inits)


def _long_frames(dim: int, limit: int, name: str = "cond") -> tuple[list, list]:
    """cond = x.shape[dim] > limit: the If's condition, from the input's shape (as exporters write it)."""
    nodes = [
        helper.make_node("Shape", ["x"], ["x_shape"], name="shape"),
        helper.make_node("Gather", ["x_shape", "dim_index"], ["x_dim"], name="gather_dim", axis=0),
        helper.make_node("Greater", ["x_dim", "dim_limit"], [name], name="greater"),
    ]
    return nodes, [_i64("dim_index", dim), _i64("dim_limit", limit)]


SPEECH_W = {"then": (RNG.normal(size=(F, 1)) * 1.5, 0.4), "else": (RNG.normal(size=(F, 1)) * 1.2, -0.3)}


def speech_activity() -> onnx.ModelProto:
    """x (N x T x F) -> If(T > 8) with MatMul + Add -> Sigmoid per frame in each branch -> ReduceMean over frames.

    The output ``speech_prob`` (N) is the mean of the frames' sigmoids.
    """
    cond_nodes, cond_inits = _long_frames(1, 8)
    branches = {tag: _frames_branch(tag, *SPEECH_W[tag]) for tag in ("then", "else")}
    nodes = [
        *cond_nodes,
        helper.make_node("If", ["cond"], ["frame_probs"], name="rate_if",
                         then_branch=branches["then"], else_branch=branches["else"]),
        helper.make_node("ReduceMean", ["frame_probs"], ["speech_prob"], name="frames_mean", axes=[1], keepdims=0),
    ]
    return _model(nodes, [_vi("x", ["N", "T", F])], [_vi("speech_prob", ["N"])],
                  [*cond_inits, _i64("squeeze_axes", [2])])


def speech_logits(model: onnx.ModelProto, x: np.ndarray) -> np.ndarray:
    """Per-frame logits (N x T) of ``speech_activity``: the model cut before its Sigmoids and its mean."""
    (z,) = run(cut(model, "speech_prob", before="frame_probs"), {"x": x})
    return z.astype(np.float64)


WAKE_W = {"then": (RNG.normal(size=(16, 1)) * 0.8, 0.2), "else": (RNG.normal(size=(8, 1)) * 1.1, -0.1)}


def _wake_branch(tag: str, w: np.ndarray, b: float, softmax_k: int = 0) -> onnx.GraphProto:
    act = (helper.make_node("Softmax", [f"{tag}_logits"], [f"{tag}_probs"], name=f"{tag}_softmax", axis=1)
           if softmax_k else helper.make_node("Sigmoid", [f"{tag}_logits"], [f"{tag}_probs"], name=f"{tag}_sigmoid"))
    nodes = [helper.make_node("Gemm", ["x", f"{tag}_w", f"{tag}_b"], [f"{tag}_logits"], name=f"{tag}_gemm"), act]
    k = softmax_k or 1
    inits = [_f32(f"{tag}_w", w), _f32(f"{tag}_b", np.full(k, b) + np.arange(k) * 0.1)]
    return helper.make_graph(nodes, f"{tag}_branch", [], [_vi(f"{tag}_probs", ["N", k])], initializer=inits)


def wake_word(softmax_k: int = 0) -> onnx.ModelProto:
    """x (N x L, L = 16 or 8 samples) -> If(L > 12) -> Gemm -> Sigmoid (or Softmax) in each branch.

    Sigmoid: the If's N x 1 output is flattened to ``wake_prob`` (N): one
    probability per row. Softmax (``softmax_k`` keywords): ``keyword_probs``
    (N x K), straight from the If.
    """
    cond_nodes, cond_inits = _long_frames(1, 12)
    ws = WAKE_W if not softmax_k else {
        "then": (RNG.normal(size=(16, softmax_k)), 0.2), "else": (RNG.normal(size=(8, softmax_k)), -0.1)}
    branches = {tag: _wake_branch(tag, *ws[tag], softmax_k=softmax_k) for tag in ("then", "else")}
    nodes = [*cond_nodes, helper.make_node("If", ["cond"], ["if_out"], name="length_if",
                                           then_branch=branches["then"], else_branch=branches["else"])]
    if softmax_k:
        nodes.append(helper.make_node("Identity", ["if_out"], ["keyword_probs"], name="out_identity"))
        out = _vi("keyword_probs", ["N", softmax_k])
    else:
        nodes.append(helper.make_node("Reshape", ["if_out", "flat_shape"], ["wake_prob"], name="flatten"))
        cond_inits.append(_i64("flat_shape", [-1]))
        out = _vi("wake_prob", ["N"])
    return _model(nodes, [_vi("x", ["N", "L"])], [out], cond_inits)


def wake_logits(model: onnx.ModelProto, x: np.ndarray) -> np.ndarray:
    """The logits of ``wake_word``: the model cut before the activation inside its branches."""
    name = model.graph.output[0].name
    (z,) = run(cut(model, name), {"x": x})
    return z.astype(np.float64)


PER_STEP_W = RNG.normal(size=(F, 3)) * 1.3
PER_STEP_B = RNG.normal(size=3)


def per_step_scan() -> onnx.ModelProto:
    """x (N x T x F) -> Transpose (T x N x F) -> Scan: Gemm -> Softmax per step -> Transpose: N x T x K."""
    body = helper.make_graph(
        [helper.make_node("Gemm", ["x_t", "step_w", "step_b"], ["step_logits"], name="step_gemm"),
         helper.make_node("Softmax", ["step_logits"], ["step_probs"], name="step_softmax", axis=1)],
        "step_body",
        [_vi("x_t", ["N", F])],
        [_vi("step_probs", ["N", 3])],
        initializer=[_f32("step_w", PER_STEP_W), _f32("step_b", PER_STEP_B)],
    )
    nodes = [
        helper.make_node("Transpose", ["x"], ["x_steps"], name="to_steps", perm=[1, 0, 2]),
        helper.make_node("Scan", ["x_steps"], ["probs_steps"], name="steps_scan", body=body, num_scan_inputs=1),
        helper.make_node("Transpose", ["probs_steps"], ["step_probs_out"], name="to_batch", perm=[1, 0, 2]),
    ]
    return _model(nodes, [_vi("x", ["N", "T", F])], [_vi("step_probs_out", ["N", "T", 3])])


def per_step_logits(x: np.ndarray) -> np.ndarray:
    """The logits of ``per_step_scan``, by NumPy from its weights (N x T x K)."""
    return x.astype(np.float64) @ PER_STEP_W + PER_STEP_B


# --------------------------------------------------------------------------
# 2. A detector head: Concat(boxes, Sigmoid(scores))

DET_K = 18
DET_BOX_W = RNG.normal(size=(F, 4))
DET_CLS_W = RNG.normal(size=(F, DET_K)) * 1.4
DET_CLS_B = RNG.normal(size=DET_K) - 1.0


def detector(concat_axis: int = 2) -> onnx.ModelProto:
    """x (N x A x F) -> boxes (N x A x 4), Sigmoid(class logits) (N x A x 18) -> Concat on the last axis (22)."""
    nodes = [
        helper.make_node("MatMul", ["x", "box_w"], ["boxes"], name="box_head"),
        helper.make_node("MatMul", ["x", "cls_w"], ["cls_proj"], name="cls_matmul"),
        helper.make_node("Add", ["cls_proj", "cls_b"], ["cls_logits"], name="cls_add"),
        helper.make_node("Sigmoid", ["cls_logits"], ["cls_scores"], name="cls_sigmoid"),
        helper.make_node("Concat", ["boxes", "cls_scores"], ["detections"], name="det_concat", axis=concat_axis),
    ]
    inits = [_f32("box_w", DET_BOX_W), _f32("cls_w", DET_CLS_W), _f32("cls_b", DET_CLS_B)]
    return _model(nodes, [_vi("x", ["N", "A", F])], [_vi("detections", ["N", "A", 4 + DET_K])], inits)


def detector_logits(x: np.ndarray) -> np.ndarray:
    """The class logits of ``detector`` by NumPy (N x A x 18)."""
    return x.astype(np.float64) @ DET_CLS_W + DET_CLS_B


# --------------------------------------------------------------------------
# 3. A recurrent model with state outputs

H = 6
LSTM_W = RNG.normal(size=(1, 4 * H, F)) * 0.5
LSTM_R = RNG.normal(size=(1, 4 * H, H)) * 0.5
HEAD_W = RNG.normal(size=(H, 1)) * 2.0


def recurrent(head: str = "sigmoid", state_inputs: bool = False) -> onnx.ModelProto:
    """x (N x S x F) -> LSTM -> hidden state -> Gemm -> one logit per row -> Sigmoid (rank 1) or raw.

    Outputs: ``speech`` (N: the Sigmoid's probability, or the raw logit),
    then ``hn`` and ``cn`` (1 x N x H: the LSTM's state outputs, which a
    streaming caller feeds back as ``h0``/``c0``).
    """
    nodes = [
        helper.make_node("Transpose", ["x"], ["x_seq"], name="to_seq", perm=[1, 0, 2]),
        helper.make_node("LSTM", ["x_seq", "lstm_w", "lstm_r", "", "", *(["h0", "c0"] if state_inputs else [])],
                         ["y_all", "hn", "cn"], name="lstm", hidden_size=H),
        helper.make_node("Squeeze", ["hn", "zero_axis"], ["h_last"], name="squeeze_dir"),
        helper.make_node("Gemm", ["h_last", "head_w", "head_b"], ["head_logit"], name="head"),
        helper.make_node("Reshape", ["head_logit", "flat_shape"], ["speech_logit" if head == "sigmoid" else "speech"],
                         name="flatten"),
    ]
    if head == "sigmoid":
        nodes.append(helper.make_node("Sigmoid", ["speech_logit"], ["speech"], name="head_sigmoid"))
    inits = [_f32("lstm_w", LSTM_W), _f32("lstm_r", LSTM_R), _f32("head_w", HEAD_W), _f32("head_b", [0.3]),
             _i64("zero_axis", [0]), _i64("flat_shape", [-1])]
    inputs = [_vi("x", ["N", "S", F])]
    if state_inputs:
        inputs += [_vi("h0", [1, "N", H]), _vi("c0", [1, "N", H])]
    outputs = [_vi("speech", ["N"]), _vi("hn", [1, "N", H]), _vi("cn", [1, "N", H])]
    return _model(nodes, inputs, outputs, inits)


def fed_back_state() -> onnx.ModelProto:
    """A written-out recurrent cell: state (N x H) in, state_out = Tanh(x W + state U) out,
    beside raw logits (N x 3)."""
    nodes = [
        helper.make_node("MatMul", ["x2", "cell_w"], ["xw"], name="cell_x"),
        helper.make_node("MatMul", ["state", "cell_u"], ["su"], name="cell_s"),
        helper.make_node("Add", ["xw", "su"], ["pre"], name="cell_add"),
        helper.make_node("Tanh", ["pre"], ["state_out"], name="cell_tanh"),
        helper.make_node("MatMul", ["state_out", "cls_w"], ["class_logits"], name="cls"),
    ]
    inits = [_f32("cell_w", RNG.normal(size=(F, H))), _f32("cell_u", RNG.normal(size=(H, H))),
             _f32("cls_w", RNG.normal(size=(H, 3)))]
    return _model(nodes, [_vi("x2", ["N", F]), _vi("state", ["N", H])],
                  [_vi("state_out", ["N", H]), _vi("class_logits", ["N", 3])], inits)


# --------------------------------------------------------------------------
# Dense heads: per pixel (N x 1 x H x W) and per position (N x T x K)

PIX_W = RNG.normal(size=(1, F, 1, 1)) * 1.5


def per_pixel() -> onnx.ModelProto:
    """x (N x F x H x W) -> 1x1 Conv -> N x 1 x H x W logits -> Sigmoid (a binary mask)."""
    nodes = [helper.make_node("Conv", ["x", "pix_w", "pix_b"], ["mask_logits"], name="pix_conv"),
             helper.make_node("Sigmoid", ["mask_logits"], ["mask"], name="pix_sigmoid")]
    return _model(nodes, [_vi("x", ["N", F, 4, 4])], [_vi("mask", ["N", 1, 4, 4])],
                  [_f32("pix_w", PIX_W), _f32("pix_b", [-0.2])])


def per_pixel_logits(x: np.ndarray) -> np.ndarray:
    """A 1x1 convolution is a weighted sum over channels (ONNX Conv): N x 1 x H x W, by NumPy."""
    return np.einsum("nchw,c->nhw", x.astype(np.float64), PIX_W.reshape(-1))[:, None] - 0.2


POS_W = RNG.normal(size=(F, 4)) * 1.2
POS_B = RNG.normal(size=4)


def per_position() -> onnx.ModelProto:
    """x (N x T x F) -> MatMul + Add -> N x T x K logits -> Softmax over the last axis (a tagger)."""
    nodes = [helper.make_node("MatMul", ["x", "pos_w"], ["pos_proj"], name="pos_matmul"),
             helper.make_node("Add", ["pos_proj", "pos_b"], ["tag_logits"], name="pos_add"),
             helper.make_node("Softmax", ["tag_logits"], ["tags"], name="pos_softmax", axis=-1)]
    return _model(nodes, [_vi("x", ["N", "T", F])], [_vi("tags", ["N", "T", 4])],
                  [_f32("pos_w", POS_W), _f32("pos_b", POS_B)])


def per_position_logits(x: np.ndarray) -> np.ndarray:
    return x.astype(np.float64) @ POS_W + POS_B


# --------------------------------------------------------------------------
# 4. Inputs that are not samples

STATE_H = 3  # state size of the model with a state input
STATE_W = {"then": (RNG.normal(size=(F + STATE_H, 1)) * 1.4, 0.3),
           "else": (RNG.normal(size=(F + STATE_H, 1)) * 0.9, -0.2)}
SR_LIMIT = 12000


def _state_branch(tag: str) -> onnx.GraphProto:
    """A branch of the model with a state input: logits of [x, h] (N x 1), Sigmoid (outer-scope ``feat``)."""
    w, b = STATE_W[tag]
    nodes = [
        helper.make_node("MatMul", ["feat", f"{tag}_w"], [f"{tag}_proj"], name=f"{tag}_matmul"),
        helper.make_node("Add", [f"{tag}_proj", f"{tag}_b"], [f"{tag}_logits"], name=f"{tag}_add"),
        helper.make_node("Sigmoid", [f"{tag}_logits"], [f"{tag}_prob"], name=f"{tag}_sigmoid"),
    ]
    inits = [_f32(f"{tag}_w", w), _f32(f"{tag}_b", [b])]
    return helper.make_graph(nodes, f"{tag}_branch", [], [_vi(f"{tag}_prob", ["N", 1])], initializer=inits)


def speech_with_state() -> onnx.ModelProto:
    """x (N x F), a scalar sample rate ``sr`` (int64, shape []) and a state ``h0`` (1 x N x H):
    ``If(sr > 12000)`` chooses the branch, each a MatMul + Add on Concat(x, h0[0]) and a Sigmoid;
    outputs ``speech_prob`` (N x 1) and the next state ``hn`` (1 x N x H, tanh(h0 + 0.5))."""
    nodes = [
        helper.make_node("Squeeze", ["h0", "zero_axis"], ["h"], name="squeeze_state"),
        helper.make_node("Concat", ["x", "h"], ["feat"], name="concat_feat", axis=1),
        helper.make_node("Greater", ["sr", "sr_limit"], ["wide"], name="greater_sr"),
        helper.make_node("If", ["wide"], ["speech_prob"], name="by_rate",
                         then_branch=_state_branch("then"), else_branch=_state_branch("else")),
        helper.make_node("Add", ["h0", "half"], ["h_shift"], name="shift_state"),
        helper.make_node("Tanh", ["h_shift"], ["hn"], name="next_state"),
    ]
    inits = [_i64("zero_axis", [0]), _i64("sr_limit", SR_LIMIT), _f32("half", 0.5)]
    inputs = [_vi("x", ["N", F]), _vi("sr", [], TensorProto.INT64), _vi("h0", [1, "N", STATE_H])]
    return _model(nodes, inputs, [_vi("speech_prob", ["N", 1]), _vi("hn", [1, "N", STATE_H])], inits)
