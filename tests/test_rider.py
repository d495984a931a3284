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


def _optimized(model: onnx.ModelProto, tmp_path, name: str) -> list[onnx.NodeProto]:
    """The nodes of ``model`` as onnxruntime's optimiser leaves them (level all, its saved optimised graph)."""
    options = ort.SessionOptions()
    options.optimized_model_filepath = str(tmp_path / f"{name}.onnx")
    options.log_severity_level = 3
    ort.InferenceSession(model.SerializeToString(), options, providers=["CPUExecutionProvider"])
    return list(onnx.load(str(tmp_path / f"{name}.onnx")).graph.node)


def _optimized_ops(model: onnx.ModelProto, tmp_path, name: str) -> list[str]:
    return [n.op_type for n in _optimized(model, tmp_path, name)]


def test_why_the_rider_reads_only_graph_outputs(tmp_path):
    """What the rider relies on, asked of onnxruntime's own optimiser: it fuses a MatMul and a Div by a
    constant scalar into one FusedMatMul when the MatMul's output has that one reader and is no graph
    output; a second reader (a copy of the Div) blocks the fusion, so a copy reading an inner tensor would
    change how the written nodes run; when the output is a graph output it is never fused, with or
    without the second reader, so a copy reading it changes nothing."""
    from onnx import numpy_helper

    def model(y_is_output: bool, second_reader: bool) -> onnx.ModelProto:
        inits = [numpy_helper.from_array(RNG.normal(size=(6, 4)).astype(np.float32), "W"),
                 numpy_helper.from_array(np.array(2.5, np.float32), "T"),
                 numpy_helper.from_array(np.array(1.0, np.float32), "T" + SUFFIX)]
        nodes = [helper.make_node("MatMul", ["x", "W"], ["y"]), helper.make_node("Div", ["y", "T"], ["z"])]
        outs = [helper.make_tensor_value_info("z", onnx.TensorProto.FLOAT, ["N", 4])]
        if second_reader:
            nodes.append(helper.make_node("Div", ["y", "T" + SUFFIX], ["z" + SUFFIX]))
            outs.append(helper.make_tensor_value_info("z" + SUFFIX, onnx.TensorProto.FLOAT, ["N", 4]))
        if y_is_output:
            outs.append(helper.make_tensor_value_info("y", onnx.TensorProto.FLOAT, ["N", 4]))
        graph_ = helper.make_graph(nodes, "g", [helper.make_tensor_value_info("x", onnx.TensorProto.FLOAT, ["N", 6])],
                                   outs, inits)
        return helper.make_model(graph_, opset_imports=[helper.make_opsetid("", 17)])

    assert _optimized_ops(model(False, False), tmp_path, "a") == ["FusedMatMul"]
    assert "FusedMatMul" not in _optimized_ops(model(False, True), tmp_path, "b")
    assert _optimized_ops(model(True, False), tmp_path, "c") == ["MatMul", "Div"]
    assert _optimized_ops(model(True, True), tmp_path, "d")[:2] == ["MatMul", "Div"]


def test_the_written_nodes_are_optimised_as_they_are_alone(tmp_path):
    """The rider of the two-output model, optimised by onnxruntime: leaving out the copy's nodes (their
    outputs are renamed), the nodes are those of the written graph optimised alone."""
    model = _two_outputs()
    patched, at_one = _patched(model, output="probabilities")
    rider = graph.identity_rider(patched, at_one, ["probabilities", "logits"])

    def described(nodes: list[onnx.NodeProto]) -> list[tuple[str, tuple[str, ...], tuple[str, ...]]]:
        return sorted((n.op_type, tuple(n.input), tuple(n.output)) for n in nodes)

    alone = _optimized(patched, tmp_path, "alone")
    both = _optimized(rider.model, tmp_path, "both")
    copies = [n for n in both if any(o.endswith(SUFFIX) for o in n.output)]
    assert copies and "FusedGemm" in [n.op_type for n in alone]
    assert described([n for n in both if n not in copies]) == described(alone)
