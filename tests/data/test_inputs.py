"""A set against the model's inputs: names, dtypes, shapes (onnxcal/data/inputs.py)."""

import numpy as np
import pytest
from data_helpers import SPEC, write

from onnxcal.data import load_npz, match_inputs
from onnxcal.errors import OnnxcalError
from onnxcal.graph import TensorSpec


@pytest.mark.parametrize(
    "arrays, message",
    [
        ({"y": np.zeros((2, 3))}, "no array for model input 'x'.*--input x=FILE.npy"),
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
