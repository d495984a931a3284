"""Capturing logits with onnxruntime."""

import numpy as np
import onnxruntime as ort
import pytest

from conftest import DEMO_MODEL, DEMO_VAL, random_mlp
from onnxcal import graph
from onnxcal.capture import capture, load_capture, nonfinite_rows, run_model, save_capture
from onnxcal.data import Dataset, load_npz
from onnxcal.errors import OnnxcalError


def capture_of(model, ds, **kw):
    return capture(model, ds, model_path="m.onnx", model_sha256="ab", **kw)


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


def test_fixed_batch_model_pads_the_last_batch(rng):
    model = random_mlp(rng, batch=4)
    x = rng.normal(size=(10, 6)).astype(np.float32)
    ds = Dataset({"x": x}, rng.integers(0, 4, 10), "mem")
    fixed = capture_of(model, ds).logits
    free = capture_of(random_mlp(np.random.default_rng(12345)), ds).logits
    assert fixed.shape == (10, 4)
    np.testing.assert_allclose(fixed, free, rtol=1e-6)


def test_labels_out_of_range_fail_before_running(rng):
    model = random_mlp(rng)
    ds = Dataset({"x": np.zeros((3, 6), np.float32)}, np.array([0, 1, 4]), "set.npz")
    with pytest.raises(OnnxcalError, match=r"label 4 at row 2 .* outside \[0, 4\)"):
        capture_of(model, ds)


def test_progress_is_reported(rng):
    model = random_mlp(rng)
    ds = Dataset({"x": np.zeros((10, 6), np.float32)}, np.zeros(10, np.int64), "mem")
    seen = []
    capture_of(model, ds, batch_size=4, progress=lambda d, done, total: seen.append((done, total)))
    assert seen == [(4, 10), (8, 10), (10, 10)]


def test_save_load_round_trip(tmp_path, rng):
    model = random_mlp(rng)
    ds = Dataset({"x": rng.normal(size=(9, 6)).astype(np.float32)}, rng.integers(0, 4, 9), "mem")
    cap = capture_of(model, ds)
    save_capture(tmp_path / "c.npz", cap)
    again = load_capture(tmp_path / "c.npz")
    np.testing.assert_array_equal(again.logits, cap.logits)
    np.testing.assert_array_equal(again.labels, cap.labels)
    assert again.meta == cap.meta
    assert again.logits.dtype == np.float32 and again.labels.dtype == np.int64


def test_load_capture_refuses_other_files(tmp_path):
    np.savez(tmp_path / "other.npz", a=np.zeros(3))
    with pytest.raises(OnnxcalError, match="not an onnxcal capture file"):
        load_capture(tmp_path / "other.npz")


def test_nonfinite_rows():
    z = np.zeros((5, 2))
    z[1, 0] = np.nan
    z[3, 1] = np.inf
    assert nonfinite_rows(z).tolist() == [1, 3]


# -- labels for segmentation and sigmoid heads, fitting rows ----------------


def test_label_rows_segmentation_and_sigmoid():
    from onnxcal.capture import label_rows

    pixels = np.arange(2 * 3 * 3).reshape(2, 3, 3) % 4
    np.testing.assert_array_equal(label_rows(pixels, (18, 4), "softmax", "s"), pixels.reshape(-1))
    with pytest.raises(OnnxcalError, match=r"shape \(2, 3\), which does not give one class index per score row"):
        label_rows(np.zeros((2, 3), int), (18, 4), "softmax", "s")
    flags = np.array([[0, 1], [1, 1], [0, 0]], np.uint8)
    assert label_rows(flags, (3, 2), "sigmoid", "s").dtype == np.uint8  # multi-label: rows x k
    # One logit (binary): one 0/1 class index per row.
    np.testing.assert_array_equal(label_rows(np.array([[0], [1], [1]]), (3, 1), "sigmoid", "s"), [0, 1, 1])
    with pytest.raises(OnnxcalError, match="is not 0 or 1"):
        label_rows(np.array([[0, 2], [1, 1], [0, 0]]), (3, 2), "sigmoid", "s")
    with pytest.raises(OnnxcalError, match="one 0/1 label per logit"):
        label_rows(np.array([0, 1, 1]), (3, 2), "sigmoid", "s")


def test_multilabel_capture_round_trip(tmp_path):
    from conftest import FIXTURES

    path = FIXTURES / "exporters" / "belt_faults_multilabel_op17.onnx"
    cap = capture_of(graph.load_model(path), load_npz(path.with_name("belt_faults_multilabel_op17_val.npz")))
    assert cap.meta.fit_as == "sigmoid" and cap.labels.shape == cap.logits.shape == (400, 4)
    save_capture(tmp_path / "c.npz", cap)
    back = load_capture(tmp_path / "c.npz")
    np.testing.assert_array_equal(back.labels, cap.labels)
