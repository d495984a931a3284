"""onnxcal.capture.writer: the logits streamed into the capture file, capture files written."""

import numpy as np
import pytest
from conftest import BELT_CLASSES, BELT_MODEL, capture_of, files_in, load_set, random_mlp

from onnxcal import graph
from onnxcal.capture import load_capture, save_capture
from onnxcal.data import Dataset, DataSpec, load_dataset, load_npz
from onnxcal.errors import OnnxcalError


def test_save_load_round_trip(tmp_path, rng):
    model = random_mlp(rng)
    ds = Dataset({"x": rng.normal(size=(9, 6)).astype(np.float32)}, rng.integers(0, 4, 9), "mem")
    cap = capture_of(model, ds)
    save_capture(tmp_path / "c.npz", cap)
    again = load_capture(tmp_path / "c.npz")
    np.testing.assert_array_equal(again.logits, cap.logits)
    np.testing.assert_array_equal(again.labels, cap.labels)
    assert again.meta == cap.meta
    assert again.logits.dtype == np.float32 and again.labels.dtype == np.int64


def test_streamed_file_equals_the_in_memory_capture(tmp_path, npz_set):
    model, path = npz_set
    ds = load_set(model, path)
    mem = capture_of(model, ds, batch_size=16)
    out = tmp_path / "c.npz"
    streamed = capture_of(model, ds, batch_size=16, out=out)
    assert isinstance(streamed.logits, np.memmap)  # read back in place
    with np.load(out, allow_pickle=False) as npz:  # numpy's own reader reads the file
        np.testing.assert_array_equal(npz["logits"], mem.logits)
        np.testing.assert_array_equal(npz["labels"], mem.labels)
        assert "indices" not in npz.files  # every row, in order
    assert streamed.meta == mem.meta and streamed.meta.batching == "batched"
    assert streamed.indices is None and streamed.sample_indices().tolist() == list(range(120))
    shard = capture_of(model, load_set(model, path, shard=(2, 3)), out=tmp_path / "s.npz")
    assert load_capture(tmp_path / "s.npz").indices.tolist() == list(range(40, 80)) == shard.indices.tolist()


def test_interrupted_capture_leaves_no_file(tmp_path, npz_set):
    model, path = npz_set
    before = files_in(tmp_path)

    def interrupt(description, done, total):
        if done >= 32:
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        capture_of(model, load_set(model, path), batch_size=16, progress=interrupt, out=tmp_path / "c.npz")
    assert files_in(tmp_path) == before  # no output, no temporary file


def test_failure_mid_run_leaves_no_file(tmp_path):
    from PIL import Image

    model = graph.load_model(BELT_MODEL)
    for i in range(3):
        (tmp_path / "imgs" / "clean").mkdir(parents=True, exist_ok=True)
        Image.new("RGB", (32, 32), (100, 100, 100)).save(tmp_path / "imgs" / "clean" / f"{i}.png")
    (tmp_path / "imgs" / "clean" / "2.png").write_bytes(b"\x89PNG truncated")
    spec = DataSpec(path=tmp_path / "imgs", classes=BELT_CLASSES)
    ds = load_dataset(spec, [graph.tensor_spec(model.graph.input[0])])
    before = files_in(tmp_path)
    seen = []
    with pytest.raises(OnnxcalError, match="image .*2.png' cannot be read"):
        capture_of(model, ds, batch_size=1, out=tmp_path / "c.npz",
                   progress=lambda d, done, total: seen.append(done))
    assert seen == [1]  # the first block (one batch) was written before the failure
    assert files_in(tmp_path) == before


def test_multilabel_capture_round_trip(tmp_path):
    from conftest import FIXTURES

    path = FIXTURES / "exporters" / "belt_faults_multilabel_op17.onnx"
    cap = capture_of(graph.load_model(path), load_npz(path.with_name("belt_faults_multilabel_op17_val.npz")))
    assert cap.meta.fit_as == "sigmoid" and cap.labels.shape == cap.logits.shape == (400, 4)
    save_capture(tmp_path / "c.npz", cap)
    back = load_capture(tmp_path / "c.npz")
    np.testing.assert_array_equal(back.labels, cap.labels)
