"""CSV tables (onnxcal/data/csv.py)."""

import numpy as np
import pytest
from conftest import DEMO_CLASSES, DEMO_CSV, DEMO_VAL
from data_helpers import DEMO_SPEC, load

from onnxcal.data import check_labels
from onnxcal.errors import OnnxcalError
from onnxcal.graph import TensorSpec


def test_csv_matches_the_npz_it_was_made_from():
    ds = load(DEMO_SPEC, path=DEMO_CSV, label_column="condition", classes=DEMO_CLASSES)
    val = np.load(DEMO_VAL)
    np.testing.assert_array_equal(ds.inputs["band_energies"], val["band_energies"][:400])
    np.testing.assert_array_equal(ds.labels, val["labels"][:400])
    # numpy's own parser (numpy.loadtxt) reads the same numbers
    ref = np.loadtxt(DEMO_CSV, delimiter=",", skiprows=1, usecols=range(16), dtype=np.float32)
    np.testing.assert_array_equal(ds.inputs["band_energies"], ref)
    assert ds.class_names[0] == "healthy"


def csv_file(tmp_path, text, name="t.csv"):
    path = tmp_path / name
    path.write_text(text)
    return path


def test_csv_feature_columns_choose_and_order(tmp_path):
    path = csv_file(tmp_path, "b,label,a,c,note\n1,0,2,3,9\n4,1,5,6,9\n")
    ds = load(path=path, feature_columns=["a", "b", "c"])
    np.testing.assert_array_equal(ds.inputs["x"], [[2, 1, 3], [5, 4, 6]])
    assert ds.labels.tolist() == [0, 1]
    with pytest.raises(OnnxcalError, match="gives 4 feature columns but model input 'x' takes 3.*--feature-columns"):
        load(path=path)
    with pytest.raises(OnnxcalError, match="--feature-columns names 'd', which is not a column"):
        load(path=path, feature_columns=["a", "b", "d"])


def test_tsv_and_integer_model_inputs(tmp_path):
    path = csv_file(tmp_path, "a\tb\tc\tlabel\n1\t2\t3\t0\n", "t.tsv")
    ds = load([TensorSpec("x", "int64", ("N", 3))], path=path)
    assert ds.inputs["x"].dtype == np.int64 and ds.inputs["x"].tolist() == [[1, 2, 3]]
    frac = csv_file(tmp_path, "a,b,c,label\n1,2.5,3,0\n")
    with pytest.raises(OnnxcalError, match="line 2, column 'b' .* takes int64 values"):
        load([TensorSpec("x", "int64", ("N", 3))], path=frac)


@pytest.mark.parametrize(
    "text, message",
    [
        ("a,b,c,label\n1,2,3,0\n4,x5,6,1\n", "line 3, column 'b' .column 2. of .* holds 'x5', not a number"),
        ("a,b,c,label\n1,2,3,0\n4,,6,1\n", "line 3, column 'b' .* holds an empty cell"),
        ("a,b,c,label\n1,2,3,0\n\n4,5,1\n", "line 4 of .* has 3 cells but the header has 4 columns"),
        ("a,b,c,y\n1,2,3,0\n", "no column 'label' .columns: a, b, c, y.*--label-column"),
        ("a,b,a,label\n1,2,3,0\n", "column 'a' appears twice"),
        ("", "no header row"),
        ("a,b,c,label\n", "header but no rows"),
        ("a,b,c,label\n1,2,3,cat\n", "holds class names .e.g. 'cat'.*pass --classes"),
        ("a,b,c,label\n1,2,3,2.5\n", "label 2.5 at row 0 .* not a whole class index"),
    ],
)
def test_csv_errors_name_the_line_and_column(tmp_path, text, message):
    with pytest.raises(OnnxcalError, match=message):
        ds = load(path=csv_file(tmp_path, text))
        check_labels(ds.labels, ds.n, 3, ds.source)


def test_csv_string_labels_and_unknown_names(tmp_path):
    classes = csv_file(tmp_path, "cat\ndog\n", "classes.txt")
    path = csv_file(tmp_path, "a,b,c,label\n1,2,3,dog\n1,2,3,cat\n1,2,3,emu\n")
    with pytest.raises(OnnxcalError, match="label 'emu' at line 4 of .* not in the class list"):
        load(path=path, classes=classes)
    ds = load(path=csv_file(tmp_path, "a,b,c,label\n1,2,3,dog\n1,2,3,cat\n"), classes=classes)
    assert ds.labels.tolist() == [1, 0]


def test_csv_without_labels_for_verify(tmp_path):
    ds = load(path=csv_file(tmp_path, "a,b,c\n1,2,3\n"), require_labels=False)
    assert ds.labels is None and ds.inputs["x"].shape == (1, 3)


def test_csv_values_beyond_the_input_dtype_are_refused(tmp_path):
    table = tmp_path / "t.csv"
    table.write_text("f0,f1,f2,label\n1,2,3,0\n4,-70000,6,1\n")
    spec = [TensorSpec("x", "float16", ("N", 3), True)]
    message = r"line 3, column 'f1' .* holds -70000, outside .* \(float16\) can hold \(-65504 to 65504\)"
    with pytest.raises(OnnxcalError, match=message):
        load(spec, path=table)
    spec = [TensorSpec("x", "int8", ("N", 3), True)]
    table.write_text("f0,f1,f2,label\n1,2,300,0\n")
    with pytest.raises(OnnxcalError, match=r"holds 300, outside .* \(int8\) can hold \(-128 to 127\)"):
        load(spec, path=table)
