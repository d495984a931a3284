"""Helpers of the tests of onnxcal.data (tests/data/): model input specs and a loader."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from onnxcal.data import Dataset, DataSpec, load_dataset
from onnxcal.graph import TensorSpec

SPEC = [TensorSpec("x", "float32", ("N", 3), True)]
DEMO_SPEC = [TensorSpec("band_energies", "float32", ("batch", 16), True)]
IMAGE_SPEC = [TensorSpec("image", "float32", ("batch", 3, 32, 32), True)]
TICKET_SPECS = [
    TensorSpec("input_ids", "int64", ("batch", 12)),
    TensorSpec("attention_mask", "int64", ("batch", 12)),
]


def write(tmp_path: Path, **arrays: np.ndarray) -> Path:
    """``arrays`` saved as ``set.npz`` in ``tmp_path``."""
    path = tmp_path / "set.npz"
    np.savez(path, **arrays)
    return path


def load(specs: list[TensorSpec] = SPEC, require_labels: bool = True, **kw: object) -> Dataset:
    """``load_dataset`` of ``DataSpec(**kw)`` for a model with inputs ``specs``."""
    return load_dataset(DataSpec(**kw), specs, require_labels=require_labels)
