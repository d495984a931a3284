"""_limits: sizes, the memory available, and the refusals built on them."""

from __future__ import annotations

import os

import numpy as np
import onnx
import pytest
from conftest import DEMO_MODEL, DEMO_VAL, random_mlp, save_model
from onnx import TensorProto, helper

from onnxcal import _limits, api, graph
from onnxcal.errors import OnnxcalError


@pytest.mark.parametrize(
    "text, value",
    [("8GiB", 8 << 30), ("512MiB", 512 << 20), ("2GB", 2 * 10**9), ("1.5 kB", 1500), ("100", 100), (7, 7)],
)
def test_parse_size(text, value):
    assert _limits.parse_size(text) == value


@pytest.mark.parametrize("text", ["lots", "-1", "0", "8 XB", "", "1e9"])
def test_parse_size_refuses_what_is_not_a_size(text):
    with pytest.raises(OnnxcalError, match="--max-model-bytes"):
        _limits.parse_size(text)


def test_available_memory_is_a_plausible_figure():
    # The OS's own account (sysconf, POSIX) bounds it: above zero, at most the physical memory.
    available = _limits.available_memory()
    physical = os.sysconf("SC_PHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    assert available is not None and 0 < available <= physical


def test_a_cgroup_limit_lowers_the_available_memory(monkeypatch):
    files = {"/sys/fs/cgroup/memory.max": 3 << 30, "/sys/fs/cgroup/memory.current": 1 << 30}
    monkeypatch.setattr(_limits, "_read_int", files.get)
    monkeypatch.setattr(_limits, "_meminfo_available", lambda: 16 << 30)
    assert _limits.available_memory() == 2 << 30
    files["/sys/fs/cgroup/memory.max"] = None  # "max": no limit in v2; v1 files absent
    assert _limits.available_memory() == 16 << 30


def test_model_size_counts_its_external_data(tmp_path, rng):
    model = random_mlp(rng, d=16, k=5, hidden=40)
    onnx.save(model, tmp_path / "m.onnx", save_as_external_data=True, location="m.onnx.data", size_threshold=1024)
    proto, data = (tmp_path / "m.onnx").stat().st_size, (tmp_path / "m.onnx.data").stat().st_size
    assert data > proto
    graph.load_model(tmp_path / "m.onnx", max_bytes=proto + data)
    with pytest.raises(OnnxcalError, match=rf"is {proto + data} bytes with its external data .*--max-model-bytes"):
        graph.load_model(tmp_path / "m.onnx", max_bytes=proto + data - 1)
    with pytest.raises(OnnxcalError, match=rf"is {proto} bytes \("):
        api.inspect(tmp_path / "m.onnx", max_model_bytes=proto - 1)


def _tight(monkeypatch, available: int) -> None:
    monkeypatch.setattr(_limits, "available_memory", lambda: available)


def test_a_batch_that_does_not_fit_in_memory_is_refused_before_running(tmp_path, monkeypatch):
    # the demo: 16 float32 features, so a batch of 64 is 4096 bytes, of 16 is 1024
    _tight(monkeypatch, 2000)
    with pytest.raises(OnnxcalError, match=r"a batch of 64 samples of input 'band_energies' \(shape \[batch, 16\] "
                                           r"declared, float32, 64 B per sample\) needs 4 KiB, more than the 1.95 KiB"):
        api.capture(DEMO_MODEL, DEMO_VAL, out=tmp_path / "c.npz")
    assert not (tmp_path / "c.npz").exists()
    api.capture(DEMO_MODEL, DEMO_VAL, out=tmp_path / "c.npz", batch_size=16)


def test_symbolic_dims_are_checked_with_the_data(tmp_path, monkeypatch):
    # a declared shape [N, F] says nothing of F; the data's 600 features decide
    g = helper.make_graph(
        [helper.make_node("ReduceMean", ["x"], ["m"], axes=[1], keepdims=1), helper.make_node("Concat", ["m", "m"],
                                                                                              ["scores"], axis=1)],
        "sym", [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", "F"])],
        [helper.make_tensor_value_info("scores", TensorProto.FLOAT, ["N", 2])],
    )
    model = helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    save_model(model, tmp_path / "m.onnx")
    np.savez(tmp_path / "v.npz", x=np.zeros((10, 600), np.float32), labels=np.zeros(10, np.int64))
    _tight(monkeypatch, 100_000)  # 64 x 600 x 4 = 153600 bytes
    with pytest.raises(OnnxcalError, match=r"input 'x' \(shape \[N, F\] in the data, float32, 2.34 KiB per sample\)"):
        api.capture(tmp_path / "m.onnx", tmp_path / "v.npz", out=tmp_path / "c.npz")
    api.capture(tmp_path / "m.onnx", tmp_path / "v.npz", out=tmp_path / "c.npz", batch_size=32)
