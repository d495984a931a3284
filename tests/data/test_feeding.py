"""Constants and batch axes (``data.feeding``, ``Dataset.feed``): what reaches onnxruntime,
checked against arrays built here with NumPy."""

from __future__ import annotations

import numpy as np
import pytest

from onnxcal.data import Constant, Dataset, DataSpec, make_constant, recorded_feeding
from onnxcal.errors import OnnxcalError
from onnxcal.graph import TensorSpec

STATE = TensorSpec("h0", "float32", (1, "N", 4), True)
RATE = TensorSpec("sr", "int64", (), False)


def test_a_number_fills_the_declared_shape_and_a_state_is_repeated_per_batch() -> None:
    c = make_constant("h0", 0.25, STATE, {}, {"N"})
    assert c.axis == 1 and c.value.shape == (1, 1, 4) and c.value.dtype == np.float32
    np.testing.assert_array_equal(c.fed(3), np.full((1, 3, 4), 0.25, np.float32))
    zeros = make_constant("h0", "zeros", STATE, {}, ())  # the only open dim is the batch
    np.testing.assert_array_equal(zeros.fed(5), np.zeros((1, 5, 4), np.float32))
    rate = make_constant("sr", "16000", RATE, {})
    assert rate.axis is None and rate.fed(7).shape == () and int(rate.fed(7)) == 16000 and rate.given == "16000"


def test_a_fraction_for_an_integer_input_and_a_wrong_shape_are_refused() -> None:
    with pytest.raises(OnnxcalError, match=r"constant 'sr' is float64 \(0.5\) but the model's input is int64"):
        make_constant("sr", 0.5, RATE, {})
    with pytest.raises(OnnxcalError, match=r"constant 'h0' has size 3 on axis 2 but the model's input has 4"):
        make_constant("h0", np.zeros((1, 1, 3), np.float32), STATE, {})
    with pytest.raises(OnnxcalError, match="several open dims"):
        make_constant("m", "zeros", TensorSpec("m", "float32", ("N", "T"), True), {})


def test_feed_moves_the_batch_axis_back_and_adds_the_constants() -> None:
    state = np.arange(2 * 6 * 4, dtype=np.float32).reshape(2, 6, 4)  # samples on axis 1
    ds = Dataset(inputs={"x": np.ones((6, 3), np.float32), "h0": np.moveaxis(state, 1, 0)}, labels=None,
                 source="test", constants={"sr": Constant(np.array(8000, np.int64))}, batch_axes={"h0": 1})
    batch = ds.batch(2, 5, {"x": "float32", "h0": "float32", "sr": "int64"})
    assert set(batch) == {"x", "h0"} and batch["h0"].shape == (3, 2, 4)
    fed = ds.feed(batch)
    np.testing.assert_array_equal(fed["h0"], state[:, 2:5])  # NumPy slicing along axis 1
    assert fed["h0"].flags.c_contiguous and int(fed["sr"]) == 8000


def test_verify_reuses_numbers_and_zeros_but_not_arrays() -> None:
    spec = DataSpec(path="val.npz")
    meta = {"constants": {"sr": "16000", "h0": "zeros"}, "batch_axes": {"x": 0}}
    got = recorded_feeding(spec, meta, "'p.onnx'")
    assert dict(got.constants) == {"sr": "16000", "h0": "zeros"} and dict(got.batch_axes) == {"x": 0}
    assert recorded_feeding(DataSpec(path="v.npz", constants={"sr": 1}), meta, "x").constants == {"sr": 1}
    with pytest.raises(OnnxcalError, match=r"input 'h0' was given .* as an array .*--constant h0=FILE.npy"):
        recorded_feeding(spec, {"constants": {"h0": "s.npy sha256:ab"}}, "'p.onnx'")
    in_data = recorded_feeding(spec, {"constants": {"sr": "8000 (in the data)"}}, "x")
    assert in_data is spec  # the data give it again
