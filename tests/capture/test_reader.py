"""onnxcal.capture.reader: capture files read, and merged (shards)."""

from dataclasses import replace

import numpy as np
import pytest
from conftest import capture_of, load_set, random_mlp

from onnxcal.capture import capture, load_capture, load_captures, merge_captures, save_capture
from onnxcal.data import Dataset
from onnxcal.errors import OnnxcalError, OnnxcalWarning


def test_load_capture_refuses_other_files(tmp_path):
    np.savez(tmp_path / "other.npz", a=np.zeros(3))
    with pytest.raises(OnnxcalError, match="not an onnxcal capture file"):
        load_capture(tmp_path / "other.npz")


def test_old_capture_files_without_indices_still_load(tmp_path, rng):
    model = random_mlp(rng)
    ds = Dataset({"x": rng.normal(size=(9, 6)).astype(np.float32)}, rng.integers(0, 4, 9), "mem")
    cap = capture_of(model, ds)
    kept = ("model_sha256", "model_path", "output", "scores", "activation", "class_axis", "num_classes", "n",
            "data_source", "onnxcal_version")
    meta = {k: v for k, v in cap.meta.to_dict().items() if k in kept}
    import json
    np.savez(tmp_path / "old.npz", logits=cap.logits, labels=cap.labels, meta=np.array(json.dumps(meta)))
    old = load_capture(tmp_path / "old.npz")
    assert old.indices is None and old.sample_indices().tolist() == list(range(9))
    np.testing.assert_array_equal(old.logits, cap.logits)


def test_a_capture_whose_metadata_is_not_unicode_is_refused(tmp_path, rng):
    # Found by the fuzzer (tests/fuzz): json.loads(str(meta)) raised SystemError.
    model = random_mlp(rng)
    ds = Dataset({"x": rng.normal(size=(5, 6)).astype(np.float32)}, rng.integers(0, 4, 5), "mem")
    path = tmp_path / "c.npz"
    save_capture(path, capture_of(model, ds))
    data = path.read_bytes()
    brace = "{".encode("utf-32-le")
    assert brace in data
    path.write_bytes(data.replace(brace, (0x110000).to_bytes(4, "little"), 1))
    with pytest.raises(OnnxcalError, match="not an onnxcal capture file .*not valid Unicode"):
        load_capture(path)


@pytest.mark.parametrize("seed", [None, 11])
def test_shards_merged_equal_the_unsharded_capture(tmp_path, npz_set, seed):
    model, path = npz_set
    whole = capture_of(model, load_set(model, path), batch_size=10)
    files = []
    for i in (3, 1, 2):  # any order
        files.append(tmp_path / f"shard{i}.npz")
        capture_of(model, load_set(model, path, shard=(i, 3), shuffle_seed=seed), batch_size=10, out=files[-1])
    merged = load_captures(files)
    np.testing.assert_array_equal(merged.logits, whole.logits)
    np.testing.assert_array_equal(merged.labels, whole.labels)
    np.testing.assert_array_equal(merged.indices, whole.sample_indices())
    assert merged.meta.n == 120 and merged.meta.merged_from == tuple(map(str, files))
    assert merged.meta.shard is None


def test_merge_refuses_overlap_and_other_models(tmp_path, npz_set, rng):
    model, path = npz_set
    a, b = tmp_path / "a.npz", tmp_path / "b.npz"
    capture_of(model, load_set(model, path, shard=(1, 2)), out=a)
    capture_of(model, load_set(model, path, limit=70), out=b)
    with pytest.raises(OnnxcalError, match="'.*a.npz' and '.*b.npz' both hold row 0 of .*val.npz' .60 shared rows"):
        load_captures([a, b])
    with pytest.raises(OnnxcalError, match="both hold row 0"):
        load_captures([a, a])
    other = tmp_path / "other.npz"
    cap = capture(model, load_set(model, path, shard=(2, 2)), model_path="m2.onnx", model_sha256="cd", out=other)
    with pytest.raises(OnnxcalError, match="captured from different models .sha256.*ab vs cd"):
        load_captures([a, other])
    named = replace(cap, meta=replace(cap.meta, model_sha256="ab", class_names=("p", "q", "r", "s")))
    with pytest.raises(OnnxcalError, match="different class lists"):
        merge_captures([load_capture(a), named], ["a.npz", "named"])


def test_merge_warns_about_missing_shards_and_checks_coverage(tmp_path, npz_set):
    model, path = npz_set
    parts = [capture_of(model, load_set(model, path, shard=(i, 3))) for i in (1, 2, 3)]
    with pytest.warns(OnnxcalWarning, match="merging 2 of 3 shards .*shard.s. 2 missing"):
        merge_captures([parts[0], parts[2]], ["1", "3"])
    wrong = [replace(p, meta=replace(p.meta, data_total=121)) for p in parts]
    with pytest.raises(OnnxcalError, match="the 3 shards .* hold 120 rows of .* which has 121"):
        merge_captures(wrong, ["1", "2", "3"])


def test_captures_of_different_sets_merge_side_by_side(tmp_path, rng):
    model = random_mlp(rng)
    for name in ("p", "q"):
        np.savez(tmp_path / f"{name}.npz", x=rng.normal(size=(8, 6)).astype(np.float32), labels=rng.integers(0, 4, 8))
    caps = [capture_of(model, load_set(model, tmp_path / f"{n}.npz")) for n in ("p", "q")]
    merged = merge_captures(caps, ["p", "q"])
    np.testing.assert_array_equal(merged.logits, np.concatenate([c.logits for c in caps]))
    assert merged.meta.data_total == 16
