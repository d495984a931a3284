"""onnxcal.capture.rows: labels lined up with score rows."""

import numpy as np
import pytest

from onnxcal.errors import OnnxcalError


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
