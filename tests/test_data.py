"""Loading validation sets and checking them against model inputs."""

import numpy as np
import pytest

from onnxcal.data import check_label_array, check_labels, load_npz, match_inputs
from onnxcal.errors import OnnxcalError
from onnxcal.graph import TensorSpec

SPEC = [TensorSpec("x", "float32", ("N", 3), True)]


def write(tmp_path, **arrays):
    path = tmp_path / "set.npz"
    np.savez(path, **arrays)
    return path


def test_load_npz(tmp_path):
    x = np.arange(12, dtype=np.float32).reshape(4, 3)
    ds = load_npz(write(tmp_path, x=x, labels=np.array([0, 1, 2, 0])))
    assert ds.n == 4 and list(ds.inputs) == ["x"]
    np.testing.assert_array_equal(ds.inputs["x"], x)
    match_inputs(ds, SPEC)


def test_missing_labels(tmp_path):
    with pytest.raises(OnnxcalError, match="no array named 'labels'"):
        load_npz(write(tmp_path, x=np.zeros((2, 3))))
    assert load_npz(write(tmp_path, x=np.zeros((2, 3))), require_labels=False).labels is None


def test_object_arrays_are_refused(tmp_path):
    path = tmp_path / "evil.npz"
    np.savez(path, x=np.array([{"a": 1}, None], dtype=object), labels=np.array([0, 1]))
    with pytest.raises(OnnxcalError, match="Python objects.*will not unpickle"):
        load_npz(path)


def test_not_an_npz(tmp_path):
    path = tmp_path / "x.npz"
    path.write_text("a,b\n1,2\n")
    with pytest.raises(OnnxcalError, match="not an .npz archive"):
        load_npz(path)


def test_length_mismatch(tmp_path):
    with pytest.raises(OnnxcalError, match="different numbers of samples.*x: 3.*labels: 2"):
        load_npz(write(tmp_path, x=np.zeros((3, 3)), labels=np.array([0, 1])))


def test_empty_set(tmp_path):
    with pytest.raises(OnnxcalError, match="no samples"):
        load_npz(write(tmp_path, x=np.zeros((0, 3)), labels=np.zeros(0, np.int64)))


@pytest.mark.parametrize(
    "arrays, message",
    [
        ({"y": np.zeros((2, 3))}, "no array for model input 'x'"),
        ({"x": np.zeros((2, 3)), "extra": np.zeros((2, 1))}, "'extra' that is not a model input"),
        ({"x": np.zeros((2, 3), dtype=np.complex64)}, "complex64 in the data but float32"),
        ({"x": np.zeros((2, 3, 1))}, "rank 3"),
        ({"x": np.zeros((2, 4))}, "size 4 on axis 1 in the data but 3"),
    ],
)
def test_match_inputs_errors(tmp_path, arrays, message):
    ds = load_npz(write(tmp_path, labels=np.array([0, 1]), **arrays))
    with pytest.raises(OnnxcalError, match=message):
        match_inputs(ds, SPEC)


def test_integer_data_may_feed_a_float_input(tmp_path):
    ds = load_npz(write(tmp_path, x=np.ones((2, 3), dtype=np.int16), labels=np.array([0, 1])))
    match_inputs(ds, SPEC)
    with pytest.raises(OnnxcalError, match="float64 in the data but int64"):
        match_inputs(
            load_npz(write(tmp_path, x=np.ones((2, 3)), labels=np.array([0, 1]))),
            [TensorSpec("x", "int64", ("N", 3))],
        )


@pytest.mark.parametrize(
    "labels, message",
    [
        (np.array([0.0, 1.5, 2.0]), "label 1.5 at row 1 .* not a whole class index"),
        (np.array([0, -1, 2]), r"label -1 at row 1 .* outside \[0, 3\)"),
        (np.array([0, 1, 3]), r"label 3 at row 2 .* outside \[0, 3\)"),
        (np.array([0, 1]), "2 labels for 3 samples"),
        (np.array(["a", "b", "c"]), "not integers"),
        (np.zeros((3, 2), np.int64), "one label per sample"),
    ],
)
def test_check_labels_errors(labels, message):
    with pytest.raises(OnnxcalError, match=message):
        check_labels(labels, 3, 3, "set.npz")


def test_whole_float_labels_are_accepted():
    out = check_labels(np.array([0.0, 2.0, 1.0]), 3, 3, "set.npz")
    assert out.dtype == np.int64 and out.tolist() == [0, 2, 1]


def test_multilabel_and_single_logit_labels():
    y = np.array([[0, 1, 1], [1, 0, 0]])
    out = check_label_array(y, 2, 3, "set.npz")
    assert out.dtype == np.uint8 and out.tolist() == y.tolist()
    # A single-logit binary model takes 0/1 class labels.
    assert check_label_array(np.array([0, 1, 1]), 3, 1, "set.npz").tolist() == [0, 1, 1]
    with pytest.raises(OnnxcalError, match=r"label 2 at row 0, column 1 .* is not 0 or 1"):
        check_label_array(np.array([[0, 2, 1], [1, 0, 0]]), 2, 3, "set.npz")
    with pytest.raises(OnnxcalError, match=r"shape \(2, 2\), expected \(2, 3\)"):
        check_label_array(np.array([[0, 1], [1, 0]]), 2, 3, "set.npz")
    with pytest.raises(OnnxcalError, match=r"label 2 at row 0 .* outside \[0, 2\)"):
        check_label_array(np.array([2, 0]), 2, 1, "set.npz")
