"""Models whose weights are in external data: over 2 GiB, hashed with their weights, streamed out.

The model over 2 GiB is generated in a folder of its own under the system's
temporary directory and removed after the test, also when it fails. Its
2 GiB are one initializer of zeros, written as a hole (a sparse file), that
the logits read one element of: protobuf could not hold the model as one
message, onnxruntime must load the tensor to run it, and the disk is hardly
used (the output's copy stays sparse). See docs/graph.md, "Models larger
than 2 GB".
"""

from __future__ import annotations

import errno
import os
import shutil
import subprocess
import tempfile
import threading
import time
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import onnx
import onnxruntime as ort
import pytest
from conftest import random_mlp
from onnx import TensorProto, helper, numpy_helper
from scipy.special import softmax

from onnxcal import api, graph
from onnxcal._files import sha256_file
from onnxcal.errors import OnnxcalError
from onnxcal.fit import FitOptions

PROTOBUF_LIMIT = 1 << 31  # protobuf's 2 GiB limit on one message (its documentation)
PAD_BYTES = PROTOBUF_LIMIT + (1 << 20)
D, K, T = 6, 5, 1.7


def _external(tensor: onnx.TensorProto, location: str, offset: int, length: int) -> onnx.TensorProto:
    tensor.ClearField("raw_data")
    tensor.data_location = TensorProto.EXTERNAL
    for key, value in (("location", location), ("offset", str(offset)), ("length", str(length))):
        entry = tensor.external_data.add()
        entry.key, entry.value = key, value
    return tensor


def _declared(name: str, elem: int, dims: list[int]) -> onnx.TensorProto:
    t = onnx.TensorProto()
    t.name, t.data_type = name, elem
    t.dims.extend(dims)
    return t


def write_large_model(folder: Path, rng: np.random.Generator) -> tuple[Path, np.ndarray, np.ndarray]:
    """model.onnx + model.onnx.data over 2 GiB: logits = x W + b + pad[0], pad all zeros; Softmax.

    W (D x K) and b are real bytes at the start of the data file; ``pad`` is
    PAD_BYTES of float32 zeros after them, left as a hole. Returns the path, W, b.
    """
    w = rng.normal(size=(D, K)).astype(np.float32)
    b = rng.normal(size=K).astype(np.float32)
    data = folder / "model.onnx.data"
    head = w.tobytes() + b.tobytes()
    pad_at = 1 << 16
    with open(data, "wb") as fh:
        fh.write(head)
        fh.truncate(pad_at + PAD_BYTES)  # the rest is a hole: reads as zeros, takes no disk
    inits = [
        _external(numpy_helper.from_array(w, "W"), data.name, 0, w.nbytes),
        _external(numpy_helper.from_array(b, "b"), data.name, w.nbytes, b.nbytes),
        _external(_declared("pad", TensorProto.FLOAT, [PAD_BYTES // 4]), data.name, pad_at, PAD_BYTES),
    ]
    # the index of pad's element is 0 computed from x's batch dim (n - n), not a constant: else
    # onnxruntime folds Gather(pad, 0) when it loads the model, copying all 2 GiB (6.8 s, 4.2 GB);
    # unfolded, it maps the data file and the test takes seconds
    nodes = [
        helper.make_node("Gemm", ["x", "W", "b"], ["z0"], name="classifier"),
        helper.make_node("Shape", ["x"], ["n"], name="batch", start=0, end=1),
        helper.make_node("Sub", ["n", "n"], ["first"], name="zero"),
        helper.make_node("Gather", ["pad", "first"], ["pad0"], name="pad_read"),
        helper.make_node("Add", ["z0", "pad0"], ["logits"], name="add_pad"),
        helper.make_node("Softmax", ["logits"], ["probabilities"], name="softmax", axis=1),
    ]
    g = helper.make_graph(
        nodes, "large", [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", D])],
        [helper.make_tensor_value_info("probabilities", TensorProto.FLOAT, ["N", K])], initializer=inits,
    )
    model = helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    path = folder / "model.onnx"
    path.write_bytes(model.SerializeToString())
    return path, w, b


@pytest.fixture
def large_folder() -> Iterator[Path]:
    """A folder of its own for the > 2 GiB model, removed after the test whatever happens."""
    free = shutil.disk_usage(tempfile.gettempdir()).free
    if free < 6 << 30:
        pytest.skip(f"the model over 2 GiB needs 6 GiB free in {tempfile.gettempdir()}, which has {free >> 20} MiB")
    folder = Path(tempfile.mkdtemp(prefix="onnxcal-large-"))
    try:
        yield folder
    finally:
        shutil.rmtree(folder, ignore_errors=True)


def test_a_model_over_2_gib_is_patched_and_runs(large_folder, rng):
    path, w, b = write_large_model(large_folder, rng)
    sizes = sum(f.stat().st_size for f in large_folder.iterdir())
    assert sizes > PROTOBUF_LIMIT  # over what one protobuf message can hold
    out = large_folder / "calibrated.onnx"
    started = time.perf_counter()
    result = api.patch(path, out, temperature=T)
    patch_seconds = time.perf_counter() - started
    data = large_folder / "calibrated.onnx.data"
    assert graph.external_data_files(out) == (data.resolve(),)
    assert data.stat().st_size >= PAD_BYTES
    assert data.stat().st_blocks * 512 < 64 << 20  # the hole was not written out
    assert not os.path.samefile(data, large_folder / "model.onnx.data")  # a copy, not a link
    assert result.record.source_sha256 == graph.model_sha256(path)
    # onnxruntime loads the output from its path, reading the data file beside it
    x = rng.normal(size=(32, D)).astype(np.float32)
    sess = ort.InferenceSession(str(out), providers=["CPUExecutionProvider"])
    (p,) = sess.run(["probabilities"], {"x": x})
    # reference outside onnxcal: the logits from W and b in NumPy (the pad adds 0), scipy's softmax
    z = x.astype(np.float64) @ w.astype(np.float64) + b
    np.testing.assert_allclose(p, softmax(z / T, axis=1), atol=2e-6)
    print(f"patch of a {sizes / 2**30:.2f} GiB model: {patch_seconds:.1f} s")
    # inspect, calibrate and verify too: the model runs from its files, never as one message
    assert api.inspect(path).external_data == (str((large_folder / "model.onnx.data").resolve()),)
    labels = (z + rng.gumbel(size=z.shape) * 2).argmax(axis=1)  # noisier than the model: T > 1
    np.savez(large_folder / "val.npz", x=x, labels=labels)
    calibrated = api.calibrate(
        path, large_folder / "val.npz", large_folder / "cal.onnx", options=FitOptions(bootstrap=0)
    )
    assert calibrated.verification.passed and calibrated.patch is not None
    checked = api.verify(large_folder / "cal.onnx", large_folder / "val.npz")  # the original is found beside it
    assert checked.passed and checked.reference_from == "original", checked.checks
    assert next(c for c in checked.checks if c.name == "source").detail == "original's sha256 matches the record"


# --------------------------------------------------------------------------
# Small models with external data: what is hashed, what is streamed


def _save_external(model: onnx.ModelProto, path: Path, location: str) -> None:
    copy = onnx.ModelProto()
    copy.CopyFrom(model)
    onnx.save(copy, path, save_as_external_data=True, location=location, size_threshold=0)


def test_source_hash_is_the_listing_sha256sum_prints(tmp_path, rng):
    # docs/graph.md: cd FOLDER && { sha256sum < model.onnx; sha256sum LOCATION...; } | sha256sum
    if shutil.which("sha256sum") is None:
        pytest.skip("GNU sha256sum is not installed")
    model = random_mlp(rng, d=6, k=4, hidden=300, final="Softmax")
    path = tmp_path / "model.onnx"
    _save_external(model, path, "weights.bin")
    script = "{ sha256sum < model.onnx; sha256sum weights.bin; } | sha256sum"
    listed = subprocess.run(["sh", "-c", script], cwd=tmp_path, capture_output=True, text=True, check=True)
    assert graph.model_sha256(path) == listed.stdout.split()[0]
    assert graph.model_sha256(path) != sha256_file(path)
    # the record of a patch holds it; changing one weight byte changes it
    result = api.patch(path, tmp_path / "out.onnx", temperature=T)
    assert result.record.source_sha256 == listed.stdout.split()[0]
    weights = bytearray((tmp_path / "weights.bin").read_bytes())
    weights[-1] ^= 1
    (tmp_path / "weights.bin").write_bytes(bytes(weights))
    assert graph.model_sha256(path) != result.record.source_sha256
    # without external data the hash is the file's, as before
    plain = tmp_path / "plain.onnx"
    plain.write_bytes(model.SerializeToString())
    assert graph.model_sha256(plain) == sha256_file(plain)


def test_weights_stay_in_their_files_and_only_the_folded_one_is_read(tmp_path, rng, monkeypatch):
    # w0 (600 x 600) and w1 (600 x 500) are over 1 MiB: they stay in the file; the biases are read in
    model = random_mlp(rng, d=600, k=500, hidden=600, final="Softmax")
    path = tmp_path / "model.onnx"
    _save_external(model, path, "model.onnx.data")
    loaded = graph.load_model(path)
    still = {t.name for t in loaded.graph.initializer if t.data_location == TensorProto.EXTERNAL}
    assert still == {"w0", "w1"}
    spans = {t.name: graph.external.span(t) for t in loaded.graph.initializer if t.name in still}
    read: list = []
    real = graph.external.read_span
    monkeypatch.setattr(graph.external, "read_span", lambda span: read.append(span) or real(span))

    def weights_read() -> list[tuple[int, int]]:  # the biases are read in at every load
        return [(s.offset, s.length) for s in read if s.length >= graph.external.RESIDENT_BYTES]

    api.patch(path, tmp_path / "divided.onnx", temperature=T)
    assert weights_read() == []  # inserting a Div reads no weight (the output's copy is made in the kernel)
    api.patch(path, tmp_path / "folded.onnx", temperature=T, fold=True)
    assert weights_read() == [(spans["w1"].offset, spans["w1"].length)]
    # both outputs run from their paths and equal scipy's softmax of the NumPy logits / T
    x = rng.normal(size=(16, 600)).astype(np.float32)
    z = _logits(model, x)
    for name in ("divided.onnx", "folded.onnx"):
        (p,) = ort.InferenceSession(str(tmp_path / name), providers=["CPUExecutionProvider"]).run(None, {"x": x})
        np.testing.assert_allclose(p, softmax(z / T, axis=1), atol=1e-5)


def _logits(model: onnx.ModelProto, x: np.ndarray) -> np.ndarray:
    """The logits of ``random_mlp``'s layers in NumPy float64 (Gemm: x W + b; Relu between)."""
    inits = {i.name: numpy_helper.to_array(i).astype(np.float64) for i in model.graph.initializer}
    h = x.astype(np.float64)
    layer = 0
    while f"w{layer}" in inits:
        h = h @ inits[f"w{layer}"] + inits[f"b{layer}"]
        if f"w{layer + 1}" in inits:
            h = np.maximum(h, 0)
        layer += 1
    return h


def test_a_data_file_changed_after_loading_is_refused_not_read(tmp_path, rng):
    model = random_mlp(rng, d=600, k=4, hidden=600, final="Softmax")
    path = tmp_path / "model.onnx"
    _save_external(model, path, "model.onnx.data")
    loaded = graph.load_model(path)
    data = tmp_path / "model.onnx.data"
    secret = tmp_path / "secret.bin"
    secret.write_bytes(data.read_bytes())
    data.unlink()
    os.symlink(secret, data)  # swapped for a link after the checks
    with pytest.raises(OnnxcalError, match="was it replaced"):
        graph.save_model(loaded, tmp_path / "out.onnx")
    assert not (tmp_path / "out.onnx").exists() and not (tmp_path / "out.onnx.data").exists()


def test_the_output_keeps_small_tensors_in_its_graph_and_the_rest_in_its_data_file(tmp_path, rng):
    # initializers of 1024 bytes or more go to OUT.data (onnx's default threshold), whether they were
    # still in the input's file (w0, w1) or read in at load (the biases, the folded weight)
    model = random_mlp(rng, d=600, k=500, hidden=600, final="Softmax")
    path = tmp_path / "model.onnx"
    _save_external(model, path, "model.onnx.data")
    api.patch(path, tmp_path / "out.onnx", temperature=T, fold=True)
    saved = onnx.load(str(tmp_path / "out.onnx"), load_external_data=False)
    outside = {t.name for t in saved.graph.initializer if t.data_location == TensorProto.EXTERNAL}
    assert outside == {"w0", "b0", "w1", "b1"}
    for t in saved.graph.initializer:
        if t.name in outside:
            entries = {e.key: e.value for e in t.external_data}
            assert entries["location"] == "out.onnx.data"
            if int(entries["length"]) >= graph.external.RESIDENT_BYTES:  # aligned as onnx's save aligns
                assert int(entries["offset"]) % (1 << 16) == 0
    # reproducible: the same patch gives the same bytes
    first = [(tmp_path / n).read_bytes() for n in ("out.onnx", "out.onnx.data")]
    api.patch(path, tmp_path / "out.onnx", temperature=T, fold=True, force=True)
    assert [(tmp_path / n).read_bytes() for n in ("out.onnx", "out.onnx.data")] == first


# --------------------------------------------------------------------------
# The source hash computed on a second thread while the weights are copied


def _two_data_files(tmp_path: Path, rng: np.random.Generator) -> tuple[Path, onnx.ModelProto]:
    """model.onnx with w0 and b0 in weights.bin and w1 and b1 in a.bin (listed first: sorted by name).

    w0 (600 x 600) and w1 (600 x 500) are over 1 MiB: they stay in their files and are copied."""
    model = random_mlp(rng, d=600, k=500, hidden=600, final="Softmax")
    path = tmp_path / "model.onnx"
    _save_external(model, path, "weights.bin")
    saved = onnx.load(str(path), load_external_data=False)
    blob = (tmp_path / "weights.bin").read_bytes()
    moved, offset = bytearray(), 0
    for t in saved.graph.initializer:
        if t.name in ("w1", "b1"):
            entries = {e.key: e.value for e in t.external_data}
            part = blob[int(entries.get("offset", 0)):int(entries.get("offset", 0)) + int(entries["length"])]
            del t.external_data[:]
            _external(t, "a.bin", offset, len(part))
            moved += part
            offset += len(part)
    (tmp_path / "a.bin").write_bytes(bytes(moved))
    path.write_bytes(saved.SerializeToString())
    return path, model


def _listing_hash(folder: Path) -> str:
    # GNU coreutils' sha256sum, as docs/graph.md defines the source hash ("What the source hash covers")
    script = "{ sha256sum < model.onnx; sha256sum a.bin weights.bin; } | sha256sum"
    done = subprocess.run(["sh", "-c", script], cwd=folder, capture_output=True, text=True, check=True)
    return done.stdout.split()[0]


def test_the_hash_made_beside_the_copy_is_the_listing_and_the_bytes_are_the_sequential_ones(tmp_path, rng,
                                                                                             monkeypatch):
    if shutil.which("sha256sum") is None:
        pytest.skip("GNU sha256sum is not installed")
    path, model = _two_data_files(tmp_path, rng)
    listed = _listing_hash(tmp_path)
    # the hash of the data files waits until the copy into out.onnx.data has begun: a patch that
    # waited for the hash before copying would stop here (and fail below), not run them side by side
    copying = threading.Event()
    real_copy, real_hash = graph.io.copy_range, graph.io._sha256_contained

    def copy(*args, **kwargs):
        copying.set()
        return real_copy(*args, **kwargs)

    def hash_when_copying(*args, **kwargs):
        started = copying.wait(timeout=30)
        return real_hash(*args, **kwargs) + ("" if started else "-not-concurrent")

    monkeypatch.setattr(graph.io, "copy_range", copy)
    monkeypatch.setattr(graph.io, "_sha256_contained", hash_when_copying)
    result = api.patch(path, tmp_path / "out.onnx", temperature=T)
    assert result.record.source_sha256 == listed
    written = graph.read_record(onnx.load(str(tmp_path / "out.onnx"), load_external_data=False))
    assert written is not None and written.source_sha256 == listed
    # the same bytes as a patch that knew the hash first (graph.patch, then save_model)
    monkeypatch.undo()
    loaded = graph.load_model(path)
    before = graph.patch(loaded, T, source_sha256=graph.model_sha256(path), source_name="model.onnx", fit={
        "method": "temperature", "given": True})
    graph.save_model(before, tmp_path / "before.onnx", external=True)
    assert (tmp_path / "out.onnx.data").read_bytes() == (tmp_path / "before.onnx.data").read_bytes()
    after = onnx.load(str(tmp_path / "out.onnx"), load_external_data=False)
    for t in _tensors_in(after):  # the only difference: the name of the data file
        for e in t.external_data:
            if e.key == "location":
                e.value = "before.onnx.data"
    assert after.SerializeToString() == (tmp_path / "before.onnx").read_bytes()
    # and the output runs: scipy's softmax of the NumPy logits / T
    x = rng.normal(size=(8, 600)).astype(np.float32)
    (p,) = ort.InferenceSession(str(tmp_path / "out.onnx"), providers=["CPUExecutionProvider"]).run(None, {"x": x})
    np.testing.assert_allclose(p, softmax(_logits(model, x) / T, axis=1), atol=1e-5)


def _tensors_in(model: onnx.ModelProto) -> list[onnx.TensorProto]:
    return [t for t in model.graph.initializer if t.data_location == TensorProto.EXTERNAL]


def _hash_threads() -> list[threading.Thread]:
    return [t for t in threading.enumerate() if t.name == "onnxcal-source-hash"]


def test_a_failed_copy_or_hash_leaves_no_output_and_no_temporary(tmp_path, rng, monkeypatch):
    path, _ = _two_data_files(tmp_path, rng)
    inputs = sorted(os.listdir(tmp_path))
    calls, real_copy = [], graph.io.copy_range

    def copy_then_fail(*args, **kwargs):  # the disk fills up after the first tensor
        calls.append(args)
        if len(calls) > 1:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        return real_copy(*args, **kwargs)

    monkeypatch.setattr(graph.io, "copy_range", copy_then_fail)
    with pytest.raises(OnnxcalError, match="No space left on device") as failed:
        api.patch(path, tmp_path / "out.onnx", temperature=T)
    assert "out.onnx" in str(failed.value)
    assert len(calls) == 2 and sorted(os.listdir(tmp_path)) == inputs and not _hash_threads()
    monkeypatch.undo()

    def unreadable(*args, **kwargs):  # a data file that cannot be read while it is hashed
        raise OSError(errno.EIO, os.strerror(errno.EIO))

    monkeypatch.setattr(graph.io, "_sha256_contained", unreadable)
    with pytest.raises(OnnxcalError, match=r"cannot read the external data of .*Input/output error"):
        api.patch(path, tmp_path / "out.onnx", temperature=T)
    assert sorted(os.listdir(tmp_path)) == inputs and not _hash_threads()


def test_a_refusal_stops_the_hash_and_writes_nothing(tmp_path, rng, monkeypatch):
    path, _ = _two_data_files(tmp_path, rng)
    inputs = sorted(os.listdir(tmp_path))
    stopped, hashing, real_read = [], threading.Event(), graph.read_records

    def hash_until_stopped(folder, location, stop):  # a hash that would take 30 s unless stopped
        hashing.set()
        stopped.append(stop.wait(timeout=30))
        raise graph.io._Stopped

    def read_once_hashing(model):  # patch reads the records first: the hash is then under way
        assert hashing.wait(timeout=30)
        return real_read(model)

    monkeypatch.setattr(graph.io, "_sha256_contained", hash_until_stopped)
    monkeypatch.setattr(graph, "read_records", read_once_hashing)
    with pytest.raises(OnnxcalError, match="no output named 'nope'|'nope'"):
        api.patch(path, tmp_path / "out.onnx", temperature=T, output="nope")
    assert stopped == [True] and not _hash_threads()
    assert sorted(os.listdir(tmp_path)) == inputs


def test_a_fit_is_compared_with_the_whole_hash_before_anything_is_written(tmp_path, rng):
    # the fit's capture names the model by its whole hash (weights included): patch waits for the
    # hash to accept it, and refuses the fit for a model whose weights differ before writing anything
    path, model = _two_data_files(tmp_path, rng)
    x = rng.normal(size=(200, 600)).astype(np.float32)
    labels = (_logits(model, x) + rng.gumbel(size=(200, 500)) * 2).argmax(axis=1)
    np.savez(tmp_path / "val.npz", x=x, labels=labels)
    api.fit(api.capture(path, tmp_path / "val.npz"), out=tmp_path / "fit.json", options=FitOptions(bootstrap=0))
    result = api.patch(path, tmp_path / "out.onnx", fit=tmp_path / "fit.json")
    assert result.record.source_sha256 == graph.model_sha256(path) and result.record.fitted_on_sha256 == ""
    other = tmp_path / "other"
    other.mkdir()
    for name in ("model.onnx", "a.bin", "weights.bin"):
        shutil.copyfile(tmp_path / name, other / name)
    changed = bytearray((other / "a.bin").read_bytes())
    changed[0] ^= 1  # one weight differs; the .onnx file is the same
    (other / "a.bin").write_bytes(bytes(changed))
    with pytest.raises(OnnxcalError, match="was fitted on the model with sha256"):
        api.patch(other / "model.onnx", other / "out.onnx", fit=tmp_path / "fit.json")
    assert sorted(os.listdir(other)) == ["a.bin", "model.onnx", "weights.bin"] and not _hash_threads()
