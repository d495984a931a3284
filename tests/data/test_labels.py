"""Class lists, string labels mapped through them, label checks (onnxcal/data/labels.py)."""

import numpy as np
import pytest
from data_helpers import load, write

from onnxcal.data import check_label_array, check_labels, read_classes
from onnxcal.errors import OnnxcalError

# --------------------------------------------------------------------------
# Class lists


def test_npz_string_labels_are_mapped_through_the_class_list(tmp_path):
    classes = tmp_path / "classes.txt"
    classes.write_text("cold\nwarm\nhot\n")
    path = write(tmp_path, x=np.zeros((4, 3)), labels=np.array(["hot", "cold", " warm", "hot"]))
    assert load(path=path, classes=classes).labels.tolist() == [2, 0, 1, 2]
    assert load(path=path, classes=classes).class_names == ("cold", "warm", "hot")
    with pytest.raises(OnnxcalError, match="labels in .* are names .*pass --classes"):
        load(path=path)
    bad = write(tmp_path, x=np.zeros((2, 3)), labels=np.array(["hot", "tepid"]))
    with pytest.raises(OnnxcalError, match="label 'tepid' at row 1 .* not in the class list"):
        load(path=bad, classes=classes)


@pytest.mark.parametrize(
    "text, message",
    [("a\n\nb\n", "line 2 .* is blank"), ("a\nb\na\n", "class 'a' is listed twice in .* .lines 1 and 3"),
     ("\n\n", "no class names")],
)
def test_class_file_errors(tmp_path, text, message):
    path = tmp_path / "c.txt"
    path.write_text(text)
    with pytest.raises(OnnxcalError, match=message):
        read_classes(path)


def test_class_file_trailing_blank_lines_and_spaces(tmp_path):
    path = tmp_path / "c.txt"
    path.write_text(" a \nb\n\n")
    assert read_classes(path) == ("a", "b")


# --------------------------------------------------------------------------
# Labels


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
