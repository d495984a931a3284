"""onnxcal.capture.nonfinite: rows holding NaN or Inf in the inputs and the logits."""

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper

from onnxcal.capture import nonfinite_rows
from onnxcal.data import Dataset, DataSpec, Selection
from onnxcal.errors import OnnxcalWarning


def test_nonfinite_rows():
    z = np.zeros((5, 2))
    z[1, 0] = np.nan
    z[3, 1] = np.inf
    assert nonfinite_rows(z).tolist() == [1, 3]


def _nan_tolerant_model() -> onnx.ModelProto:
    """scores = Where(IsNaN(x), 0, x): finite logits from inputs with missing values (as trees give)."""
    g = helper.make_graph(
        [helper.make_node("IsNaN", ["x"], ["missing"]),
         helper.make_node("Where", ["missing", "zero", "x"], ["scores"])],
        "nan_tolerant",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", 3])],
        [helper.make_tensor_value_info("scores", TensorProto.FLOAT, ["N", 3])],
        initializer=[numpy_helper.from_array(np.array(0, np.float32), "zero")],
    )
    model = helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    return model


def test_nonfinite_inputs_are_counted_with_their_rows(tmp_path, rng):
    from onnxcal import api

    x = rng.normal(size=(30, 3)).astype(np.float32)
    x[[4, 9, 22], 2] = np.nan
    x[9, 0] = np.nan  # row 9 twice: one row counted once
    np.savez(tmp_path / "v.npz", x=x, labels=np.arange(30) % 3)
    (tmp_path / "m.onnx").write_bytes(_nan_tolerant_model().SerializeToString())
    spec = DataSpec(path=tmp_path / "v.npz", selection=Selection(shard=(2, 2)))  # rows 15..29
    with pytest.warns(OnnxcalWarning) as seen:
        cap = api.capture(tmp_path / "m.onnx", spec, out=tmp_path / "c.npz", batch_size=4)
    (message,) = [str(w.message) for w in seen]  # the inputs, not the logits: those are finite
    assert message.endswith("holds NaN or Inf in 1 of 15 rows (first rows: 22)")
    with pytest.warns(OnnxcalWarning, match=r"in 3 of 30 rows \(first rows: 4, 9, 22\)"):
        cap = api.capture(tmp_path / "m.onnx", tmp_path / "v.npz", batch_size=7)
    assert np.isfinite(cap.logits).all() and cap.nonfinite_inputs["x"].count == 3


def test_dropping_nonfinite_drops_whole_samples(tmp_path):
    # a per-pixel capture (4 rows per sample): one NaN pixel drops its sample's every row
    from onnxcal.capture import Capture, CaptureMeta, finite_mask, nonfinite_logits, without_nonfinite

    logits = np.arange(24, dtype=np.float32).reshape(12, 2)
    logits[9, 1] = np.nan  # sample 2 (rows 8..11)
    meta = CaptureMeta("s" * 64, "m.onnx", "out", "z", None, 1, 2, 12, "v.npz", data_total=10)
    cap = Capture(logits, np.zeros(12, np.int64), meta, indices=np.array([3, 5, 7]))
    assert finite_mask(cap).tolist() == [True] * 8 + [False] * 4
    found = nonfinite_logits(cap)
    assert (found.count, found.first) == (1, [7])  # the set's row number of that sample
    kept = without_nonfinite(cap)
    assert kept.logits.shape == (8, 2) and kept.indices.tolist() == [3, 5] and kept.meta.n == 8


@pytest.mark.parametrize("flush_bytes", [1, 200, 1 << 20])
def test_input_watch_finds_the_same_rows_however_it_groups_batches(rng, monkeypatch, flush_bytes):
    from onnxcal.capture import InputWatch

    x = rng.normal(size=(100, 5)).astype(np.float32)
    bad = [3, 4, 17, 58, 99]
    x[bad, rng.integers(0, 5, len(bad))] = [np.nan, np.inf, -np.inf, np.nan, np.nan]
    x[60, 0] = 3e38  # finite, but its square overflows the dot product: the exact test decides
    ds = Dataset(inputs={"x": x, "ids": np.arange(100)}, labels=None, source="s", rows=np.arange(0, 100, 1))
    monkeypatch.setattr(InputWatch, "FLUSH_BYTES", flush_bytes)
    watch = InputWatch(ds)
    for start in range(0, 100, 7):
        stop = min(start + 7, 100)
        watch.add(ds.batch(start, stop, {"x": "float32", "ids": "int64"}), start, stop)
    watch.flush()
    assert list(watch.found) == ["x"]  # integer inputs are not searched
    assert watch.found["x"].count == 5 and watch.found["x"].first == bad
