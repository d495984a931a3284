"""load_dataset: choosing the form, options that do not apply to it (onnxcal/data/load.py)."""

import numpy as np
import pytest
from conftest import DEMO_CSV, DEMO_VAL, TICKETS, TICKETS_LABELS
from data_helpers import DEMO_SPEC, TICKET_SPECS, load

from onnxcal.errors import OnnxcalError


def test_single_npy_as_data_for_a_one_input_model(tmp_path):
    x = np.arange(6, dtype=np.float32).reshape(2, 3)
    np.save(tmp_path / "x.npy", x)
    np.save(tmp_path / "y.npy", np.array([1, 0]))
    ds = load(path=tmp_path / "x.npy", labels=tmp_path / "y.npy")
    np.testing.assert_array_equal(ds.inputs["x"], x)
    with pytest.raises(OnnxcalError, match="can feed a model with one input.*--input NAME=FILE.npy"):
        load(TICKET_SPECS, path=tmp_path / "x.npy", labels=tmp_path / "y.npy")


@pytest.mark.parametrize(
    "kw, message",
    [
        ({"path": DEMO_VAL, "image": {"resize": 3}}, "--resize applies to image folders only"),
        ({"path": DEMO_VAL, "feature_columns": ["a"]}, "--feature-columns applies to CSV data only"),
        ({"path": DEMO_CSV, "labels": TICKETS_LABELS}, "--labels does not apply to CSV"),
        ({"path": DEMO_VAL, "label_column": "y"}, "--label-column applies to CSV"),
        ({"path": DEMO_VAL, "inputs": TICKETS}, "either --data or --input"),
        ({}, "no validation data given"),
        ({"path": DEMO_VAL, "labels": TICKETS_LABELS}, "holds a 'labels' array and --labels was given"),
    ],
)
def test_options_that_do_not_apply(kw, message):
    with pytest.raises(OnnxcalError, match=message):
        load(DEMO_SPEC, **kw)
