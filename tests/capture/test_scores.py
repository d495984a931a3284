"""onnxcal.capture.scores: capturing logits with onnxruntime."""

import numpy as np
import onnxruntime as ort
import pytest
from conftest import (
    DEMO_MODEL,
    DEMO_VAL,
    TICKETS,
    TICKETS_CLASSES,
    TICKETS_LABELS,
    TICKETS_MODEL,
    capture_of,
    random_mlp,
)
from onnx.reference import ReferenceEvaluator

from onnxcal import graph
from onnxcal.capture import run_model
from onnxcal.data import Dataset, DataSpec, load_dataset, load_npz
from onnxcal.errors import OnnxcalError


def test_capture_demo_equals_direct_run():
    model = graph.load_model(DEMO_MODEL)
    ds = load_npz(DEMO_VAL)
    cap = capture_of(model, ds)
    sess = ort.InferenceSession(str(DEMO_MODEL), providers=["CPUExecutionProvider"])
    (direct,) = sess.run(None, {"band_energies": ds.inputs["band_energies"]})
    np.testing.assert_array_equal(cap.logits, direct)
    np.testing.assert_array_equal(cap.labels, ds.labels)
    assert cap.meta.num_classes == 5 and cap.meta.n == len(ds.labels)
    assert cap.meta.activation is None and cap.meta.scores == "logits"


@pytest.mark.parametrize("batch_size", [1, 7, 64, 1000])
def test_batch_size_does_not_change_logits(rng, batch_size):
    model = random_mlp(rng)
    x = rng.normal(size=(50, 6)).astype(np.float32)
    ds = Dataset({"x": x}, rng.integers(0, 4, 50), "mem")
    whole = capture_of(model, ds, batch_size=100).logits
    np.testing.assert_allclose(capture_of(model, ds, batch_size=batch_size).logits, whole, rtol=1e-6)


def test_softmax_model_captures_the_logits_before_it(rng):
    model = random_mlp(rng, final="Softmax")
    x = rng.normal(size=(20, 6)).astype(np.float32)
    ds = Dataset({"x": x}, rng.integers(0, 4, 20), "mem")
    cap = capture_of(model, ds)
    (z,) = run_model(graph.expose(model, ["logits"]), ds, ["logits"])
    np.testing.assert_array_equal(cap.logits, z)
    assert cap.meta.activation == "softmax" and cap.meta.scores == "logits"
    assert cap.meta.output == "scores"


def test_labels_out_of_range_fail_before_running(rng):
    model = random_mlp(rng)
    ds = Dataset({"x": np.zeros((3, 6), np.float32)}, np.array([0, 1, 4]), "set.npz")
    with pytest.raises(OnnxcalError, match=r"label 4 at row 2 .* outside \[0, 4\)"):
        capture_of(model, ds)


def test_multi_input_model_against_the_onnx_reference_evaluator():
    model = graph.load_model(TICKETS_MODEL)
    ds = load_dataset(
        DataSpec(inputs=TICKETS, labels=TICKETS_LABELS, classes=TICKETS_CLASSES),
        [graph.tensor_spec(vi) for vi in model.graph.input],
    )
    cap = capture_of(model, ds, batch_size=50)
    # onnx's ReferenceEvaluator follows the ONNX operator spec, independently of onnxruntime
    feeds = {k: np.load(v) for k, v in TICKETS.items()}
    (ref,) = ReferenceEvaluator(model).run(None, feeds)
    np.testing.assert_allclose(cap.logits, ref, rtol=1e-5, atol=1e-6)
    assert cap.meta.class_names == ("mechanical", "electrical", "sensor")


def test_class_list_must_match_the_model(rng, tmp_path):
    model = random_mlp(rng)  # 4 classes
    ds = Dataset({"x": np.zeros((3, 6), np.float32)}, np.zeros(3, np.int64), "mem", class_names=("a", "b"))
    with pytest.raises(OnnxcalError, match="class list of 'mem' has 2 classes but the model has 4"):
        capture_of(model, ds)
