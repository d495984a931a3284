"""The decision outputs in the graph (graph.decide): accept, class_set, class_set_size.

Each patched model is run with onnxruntime AND onnx's ReferenceEvaluator (an
implementation of the ONNX operator spec outside onnxruntime); the decision
outputs must equal the NumPy references of onnxcal.decisions applied to the
same run's own calibrated probabilities, exactly, and adding them must leave
the probabilities (and so the argmax) bit for bit as they were.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import onnx
import onnxruntime as ort
import pytest
from conftest import random_mlp
from onnx.reference import ReferenceEvaluator

from onnxcal import decisions, graph
from onnxcal.decisions import SetThreshold
from onnxcal.errors import OnnxcalError
from onnxcal.graph.decide import add_decisions


def _run_ort(model: onnx.ModelProto, x: np.ndarray) -> dict[str, np.ndarray]:
    sess = ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"])
    names = [o.name for o in sess.get_outputs()]
    return dict(zip(names, sess.run(None, {"x": x}), strict=True))


def _run_ref(model: onnx.ModelProto, x: np.ndarray) -> dict[str, np.ndarray]:
    ref = ReferenceEvaluator(model)
    names = [o.name for o in model.graph.output]
    return dict(zip(names, ref.run(None, {"x": x}), strict=True))


def _patched(rng: np.random.Generator, k: int = 5, final: str | None = "Softmax", opset: int = 17,
             dtype: Any = np.float32) -> onnx.ModelProto:
    model = random_mlp(rng, k=k, final=final, opset=opset, dtype=dtype, scale=2.0)
    return graph.patch(model, 1.7, source_sha256="0" * 64, source_name="m.onnx")


def _sets(score: str, values: tuple[float, ...], dtype: str = "float32") -> SetThreshold:
    return SetThreshold(score, 0.9, len(values) > 1, values, (50,) * len(values), (46,) * len(values), dtype)


RUNNERS = [pytest.param(_run_ort, id="onnxruntime"), pytest.param(_run_ref, id="reference-evaluator")]


@pytest.mark.parametrize("run", RUNNERS)
@pytest.mark.parametrize("opset", [11, 13, 17, 18])
@pytest.mark.parametrize("score", ["las", "aps"])
def test_softmax_outputs_equal_the_numpy_reference(run: Any, opset: int, score: str) -> None:
    rng = np.random.default_rng(160 + opset)
    patched = _patched(rng, opset=opset)
    x = rng.normal(size=(300, 6)).astype(np.float32)
    plain = run(patched, x)["scores"]
    # thresholds at values the probabilities take, so rows sit exactly on them (ties)
    tau = float(np.sort(plain.max(axis=1))[150])
    sets = _sets(score, (float(np.sort(plain, axis=None)[-400]),) if score == "las" else (0.8,))
    model = add_decisions(patched, accept_threshold=tau, sets=sets, section={"note": "test"})
    got = run(model, x)
    p = got["scores"]
    np.testing.assert_array_equal(p, plain)  # probabilities (and argmax) unchanged, bit for bit
    np.testing.assert_array_equal(got["accept"], decisions.accept(p, tau))
    np.testing.assert_array_equal(got["class_set"], decisions.class_set(p, sets))
    np.testing.assert_array_equal(got["class_set_size"], decisions.class_set_size(got["class_set"]))
    assert got["accept"].dtype == bool and got["class_set"].shape == p.shape
    assert got["class_set_size"].dtype == np.int64
    assert 0 < got["accept"].sum() < len(x)  # the threshold splits the rows: the check could fail


def test_class_conditional_thresholds_per_class() -> None:
    rng = np.random.default_rng(7)
    patched = _patched(rng, k=4)
    x = rng.normal(size=(200, 6)).astype(np.float32)
    sets = _sets("las", (0.1, 0.3, 0.05, 0.5))
    got = _run_ort(add_decisions(patched, sets=sets), x)
    np.testing.assert_array_equal(got["class_set"], decisions.class_set(got["scores"], sets))
    # by definition (Sadinle et al. 2019, class-specific sets): class j in the set when p_j >= t_j
    np.testing.assert_array_equal(got["class_set"], got["scores"] >= np.float32([0.1, 0.3, 0.05, 0.5]))


@pytest.mark.parametrize("run", RUNNERS)
def test_one_sigmoid_head(run: Any) -> None:
    rng = np.random.default_rng(3)
    patched = _patched(rng, k=1, final="Sigmoid")
    x = rng.normal(size=(200, 6)).astype(np.float32)
    sets = _sets("aps", (0.3,))
    got = run(add_decisions(patched, accept_threshold=0.8, sets=sets), x)
    p = got["scores"]
    np.testing.assert_array_equal(got["accept"], decisions.accept(p, 0.8, kind="binary"))
    np.testing.assert_array_equal(got["class_set"], decisions.class_set(p, sets))
    assert got["class_set"].shape == (200, 2) and got["accept"].shape == (200,)


def test_multilabel_accept_per_label() -> None:
    rng = np.random.default_rng(4)
    patched = _patched(rng, k=3, final="Sigmoid")
    x = rng.normal(size=(200, 6)).astype(np.float32)
    tau = np.array([0.7, 0.9, np.inf])
    got = _run_ort(add_decisions(patched, accept_threshold=tau), x)
    np.testing.assert_array_equal(got["accept"], decisions.accept(got["scores"], tau, kind="multilabel"))
    assert not got["accept"][:, 2].any()  # inf accepts nothing
    with pytest.raises(OnnxcalError, match="one true class per row"):
        add_decisions(patched, sets=_sets("las", (0.2,)))


def test_float16_probabilities_are_compared_in_float32() -> None:
    rng = np.random.default_rng(5)
    patched = _patched(rng, dtype=np.float16)
    x = rng.normal(size=(200, 6)).astype(np.float16)
    sets = _sets("aps", (0.7,))
    model = add_decisions(patched, accept_threshold=0.6, sets=sets)
    for run in (_run_ort, _run_ref):
        got = run(model, x)
        np.testing.assert_array_equal(got["accept"], decisions.accept(got["scores"], 0.6))
        np.testing.assert_array_equal(got["class_set"], decisions.class_set(got["scores"], sets))
    assert graph.read_record(model).decisions["compute_dtype"] == "float32"


def test_record_section_and_unpatch_remove_everything() -> None:
    rng = np.random.default_rng(6)
    model = random_mlp(rng, k=4, final="Softmax")
    patched = graph.patch(model, 1.5, source_sha256="0" * 64, source_name="m.onnx")
    decided = add_decisions(patched, accept_threshold=0.7, sets=_sets("las", (0.2,)), section={"rows": "holdout"})
    record = graph.read_record(decided)
    assert record.decisions["rows"] == "holdout"
    names = {"accept": "onnxcal_accept_threshold", "class_set": "onnxcal_set_threshold"}
    assert record.decisions["initializers"] == names
    inits = {i.name: onnx.numpy_helper.to_array(i) for i in decided.graph.initializer}
    assert float(inits["onnxcal_accept_threshold"]) == np.float32(0.7)
    assert [o.name for o in decided.graph.output] == ["scores", "accept", "class_set", "class_set_size"]
    # unpatch gives the original bytes back; re-patching drops the decisions with the old patch
    assert graph.unpatch(decided).SerializeToString() == model.SerializeToString()
    repatched = graph.patch(decided, 2.0, source_sha256="0" * 64, source_name="m.onnx")
    assert [o.name for o in repatched.graph.output] == ["scores"]
    assert not graph.read_record(repatched).decisions
    with pytest.raises(OnnxcalError, match="already has decision outputs"):
        add_decisions(decided, accept_threshold=0.5)


def test_refusals() -> None:
    rng = np.random.default_rng(8)
    with pytest.raises(OnnxcalError, match="no calibration record"):
        add_decisions(random_mlp(rng, final="Softmax"), accept_threshold=0.5)
    logsoftmax = _patched(rng, final="LogSoftmax")
    with pytest.raises(OnnxcalError, match="not probabilities"):
        add_decisions(logsoftmax, accept_threshold=0.5)
    with pytest.raises(OnnxcalError, match="opset 11"):
        add_decisions(_patched(rng, opset=10), sets=_sets("aps", (0.5,)))
    # LAS and accept work at opset 10 (Not(Less) before GreaterOrEqual existed)
    model = add_decisions(_patched(rng, opset=10), accept_threshold=0.5, sets=_sets("las", (0.2,)))
    x = rng.normal(size=(50, 6)).astype(np.float32)
    got = _run_ort(model, x)
    np.testing.assert_array_equal(got["accept"], got["scores"].max(axis=1) >= np.float32(0.5))
