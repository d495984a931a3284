"""graph.identity_rider: the patched graph at the identity riding in the written graph's session.

The outputs are checked against separate onnxruntime sessions of the written graph and of
``graph.at_identity`` (the identity check's own model), and against the original model's outputs.
"""

import numpy as np
import onnx
import onnxruntime as ort
from conftest import mlp_model
from onnx import helper

from onnxcal import graph
from onnxcal.graph.rider import SUFFIX

RNG = np.random.default_rng(3)
LAYERS = [(RNG.normal(size=(6, 8)), RNG.normal(size=8)), (RNG.normal(size=(8, 4)), RNG.normal(size=4))]
X = RNG.normal(size=(50, 6)).astype(np.float32)


def _run(model: onnx.ModelProto, names: list[str]) -> list[np.ndarray]:
    sess = ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"])
    return sess.run(names, {"x": X})


def _patched(model: onnx.ModelProto, **kw) -> tuple[onnx.ModelProto, onnx.ModelProto]:
    patched = graph.patch(model, 2.5, source_sha256="0" * 64, source_name="m.onnx", **kw)
    at_one = graph.at_identity(patched, tuple(graph.read_records(patched)), model)
    assert at_one is not None
    return patched, at_one


def _two_outputs() -> onnx.ModelProto:
    """Softmax over logits that are an output too (the head reads a graph output)."""
    model = mlp_model(LAYERS, final="Softmax", output_name="probabilities")
    model.graph.output.append(helper.make_tensor_value_info("logits", onnx.TensorProto.FLOAT, ["N", 4]))
    onnx.checker.check_model(model, full_check=True)
    return model


def test_the_rider_gives_the_identity_and_leaves_the_written_graph_as_it_is():
    model = _two_outputs()
    patched, at_one = _patched(model, output="probabilities")
    rider = graph.identity_rider(patched, at_one, ["probabilities", "logits"])
    assert rider is not None
    onnx.checker.check_model(rider.model, full_check=True)
    # the written graph's nodes, initializers and outputs come first, unchanged
    n = len(patched.graph.node)
    assert list(rider.model.graph.node[:n]) == list(patched.graph.node)
    assert list(rider.model.graph.output[: len(patched.graph.output)]) == list(patched.graph.output)
    assert rider.outputs == {"probabilities": "probabilities" + SUFFIX, "logits": "logits"}
    # the copy reads nothing of the written graph but its outputs, inputs and initializers
    written = {t for node in patched.graph.node for t in node.output}
    outputs = {o.name for o in patched.graph.output}
    for node in rider.model.graph.node[n:]:
        assert all(not x or x.endswith(SUFFIX) or x in outputs or x not in written for x in node.input)
    # against separate sessions of the written graph and of at_identity: the same bits
    both = _run(rider.model, ["probabilities", "probabilities" + SUFFIX, "logits"])
    alone = _run(patched, ["probabilities", "logits"])
    at_identity = _run(at_one, ["probabilities", "logits"])
    np.testing.assert_array_equal(both[0], alone[0])
    np.testing.assert_array_equal(both[1], at_identity[0])
    np.testing.assert_array_equal(both[2], at_identity[1])
    # and the identity is the original model's own output (onnxruntime on the unpatched model)
    original = _run(model, ["probabilities"])[0]
    np.testing.assert_allclose(both[1], original, rtol=0, atol=1e-6)
    assert not np.allclose(both[0], original, atol=1e-3)  # the written graph is calibrated


def test_outputs_the_parameters_do_not_reach_need_no_copy():
    model = mlp_model(LAYERS)  # raw scores: the patch appends a probabilities output
    patched, at_one = _patched(model)
    rider = graph.identity_rider(patched, at_one, ["scores"])
    assert rider is not None and rider.model is patched and rider.outputs == {"scores": "scores"}


def test_no_rider_when_the_copy_would_read_an_inner_tensor():
    """A Softmax head whose logits are no output: another consumer of them could change how onnxruntime
    optimises the written nodes, so the identity runs in a session of its own."""
    model = mlp_model(LAYERS, final="Softmax", output_name="probabilities")
    patched, at_one = _patched(model, output="probabilities")
    assert graph.identity_rider(patched, at_one, ["probabilities"]) is None


def test_no_rider_for_a_folded_head_or_graphs_that_differ_in_nodes():
    model = mlp_model(LAYERS, final="Softmax", output_name="probabilities")
    patched, at_one = _patched(model, output="probabilities", fold=True)
    # the folded weights feed a Gemm that reads an inner tensor (the hidden layer)
    assert graph.identity_rider(patched, at_one, ["probabilities"]) is None
    other = onnx.ModelProto()
    other.CopyFrom(at_one)
    other.graph.node[-1].name = "renamed"
    assert graph.identity_rider(patched, other, ["probabilities"]) is None
    assert graph.identity_rider(patched, patched, ["probabilities"]) is None  # nothing differs: nothing to ride
