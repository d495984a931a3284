"""The data_id of a set: its files' contents, not their paths (onnxcal/data/fingerprint.py)."""

import numpy as np
from data_helpers import load, write


def test_fingerprint_follows_content_not_path(tmp_path):
    x = np.arange(9, dtype=np.float32).reshape(3, 3)
    a = load(path=write(tmp_path, x=x, labels=np.array([0, 1, 2])))
    (tmp_path / "other").mkdir()
    b = load(path=write(tmp_path / "other", x=x, labels=np.array([0, 1, 2])))
    c = load(path=write(tmp_path / "other", x=x + 1, labels=np.array([0, 1, 2])))
    assert a.data_id == b.data_id != c.data_id
