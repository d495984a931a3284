"""Capturing logits with onnxruntime."""

import importlib
import warnings
from dataclasses import replace

import numpy as np
import onnx
import onnxruntime as ort
import pytest
from onnx import TensorProto, helper, numpy_helper
from onnx.reference import ReferenceEvaluator

from conftest import (
    BELT_CLASSES,
    BELT_MODEL,
    DEMO_MODEL,
    DEMO_VAL,
    TICKETS,
    TICKETS_CLASSES,
    TICKETS_LABELS,
    TICKETS_MODEL,
    files_in,
    random_mlp,
)
from onnxcal import graph
from onnxcal.capture import (
    RunOptions,
    capture,
    check_run_options,
    load_capture,
    load_captures,
    merge_captures,
    nonfinite_rows,
    run_model,
    save_capture,
)
from onnxcal.data import DataSpec, Dataset, Selection, load_dataset, load_npz
from onnxcal.errors import OnnxcalError, OnnxcalWarning


def capture_of(model, ds, **kw):
    return capture(model, ds, model_path="m.onnx", model_sha256="ab", **kw)


def test_capture_demo_equals_direct_run():
    model = graph.load_model(DEMO_MODEL)
    ds = load_npz(DEMO_VAL)
    cap = capture_of(model, ds)
    sess = ort.InferenceSession(str(DEMO_MODEL), providers=["CPUExecutionProvider"])
    (direct,) = sess.run(None, {"band_energies": ds.inputs["band_energies"]})
    np.testing.assert_array_equal(cap.logits, direct)
    np.testing.assert_array_equal(cap.labels, ds.labels)
    assert cap.meta.num_classes == 5 and cap.meta.n == len(ds.labels)
    assert cap.meta.activation is None and cap.meta.scores == "logits"


@pytest.mark.parametrize("batch_size", [1, 7, 64, 1000])
def test_batch_size_does_not_change_logits(rng, batch_size):
    model = random_mlp(rng)
    x = rng.normal(size=(50, 6)).astype(np.float32)
    ds = Dataset({"x": x}, rng.integers(0, 4, 50), "mem")
    whole = capture_of(model, ds, batch_size=100).logits
    np.testing.assert_allclose(capture_of(model, ds, batch_size=batch_size).logits, whole, rtol=1e-6)


def test_softmax_model_captures_the_logits_before_it(rng):
    model = random_mlp(rng, final="Softmax")
    x = rng.normal(size=(20, 6)).astype(np.float32)
    ds = Dataset({"x": x}, rng.integers(0, 4, 20), "mem")
    cap = capture_of(model, ds)
    (z,) = run_model(graph.expose(model, ["logits"]), ds, ["logits"])
    np.testing.assert_array_equal(cap.logits, z)
    assert cap.meta.activation == "softmax" and cap.meta.scores == "logits"
    assert cap.meta.output == "scores"


def test_fixed_batch_model_pads_the_last_batch(rng):
    model = random_mlp(rng, batch=4)
    x = rng.normal(size=(10, 6)).astype(np.float32)
    ds = Dataset({"x": x}, rng.integers(0, 4, 10), "mem")
    fixed = capture_of(model, ds).logits
    free = capture_of(random_mlp(np.random.default_rng(12345)), ds).logits
    assert fixed.shape == (10, 4)
    np.testing.assert_allclose(fixed, free, rtol=1e-6)


def test_labels_out_of_range_fail_before_running(rng):
    model = random_mlp(rng)
    ds = Dataset({"x": np.zeros((3, 6), np.float32)}, np.array([0, 1, 4]), "set.npz")
    with pytest.raises(OnnxcalError, match=r"label 4 at row 2 .* outside \[0, 4\)"):
        capture_of(model, ds)


def test_progress_is_reported(rng):
    model = random_mlp(rng)
    ds = Dataset({"x": np.zeros((10, 6), np.float32)}, np.zeros(10, np.int64), "mem")
    seen = []
    capture_of(model, ds, batch_size=4, progress=lambda d, done, total: seen.append((done, total)))
    # after the first batch, then per block of batches (here one block holds the rest)
    assert seen == [(4, 10), (10, 10)]


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


def test_load_capture_refuses_other_files(tmp_path):
    np.savez(tmp_path / "other.npz", a=np.zeros(3))
    with pytest.raises(OnnxcalError, match="not an onnxcal capture file"):
        load_capture(tmp_path / "other.npz")


def test_nonfinite_rows():
    z = np.zeros((5, 2))
    z[1, 0] = np.nan
    z[3, 1] = np.inf
    assert nonfinite_rows(z).tolist() == [1, 3]


# --------------------------------------------------------------------------
# Run options


def test_threads_and_optimisation_levels_give_the_same_logits(rng):
    model = random_mlp(rng)
    ds = Dataset({"x": rng.normal(size=(40, 6)).astype(np.float32)}, rng.integers(0, 4, 40), "mem")
    base = capture_of(model, ds).logits
    for options in (RunOptions(threads=1), RunOptions(optimization="disable"), RunOptions(batch_size=7)):
        np.testing.assert_allclose(capture_of(model, ds, options=options).logits, base, rtol=1e-6)


@pytest.mark.parametrize(
    "options, message",
    [
        (RunOptions(provider="NoSuchExecutionProvider"), "--provider NoSuchExecutionProvider is not available.*CPUExecutionProvider"),
        (RunOptions(optimization="max"), "--optimization 'max' .*disable, basic, extended, all"),
        (RunOptions(threads=-1), r"--threads -1 is out of range: give a number of threads \(0: onnxruntime.s default, one per core\) from 0 to \d+"),
        (RunOptions(batch_size=0), "--batch-size 0 is out of range: give a number of samples from 1 to 16777216"),
    ],
)
def test_run_option_errors(options, message):
    with pytest.raises(OnnxcalError, match=message):
        check_run_options(options)


# --------------------------------------------------------------------------
# Fixed batch dims


def per_sample(model, x):
    """onnxruntime on the model as exported, one sample per call (the reference)."""
    sess = ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"])
    name = sess.get_inputs()[0].name
    return np.concatenate([sess.run(None, {name: x[i : i + 1]})[0] for i in range(len(x))])


def batch1_model(kind: str, rng) -> onnx.ModelProto:
    """Batch fixed at 1: 'gemm' frees cleanly; 'reshape' hard-codes the batch in a
    Reshape (fails when freed); 'coupled' normalises over the batch axis (runs
    when freed but gives other numbers)."""
    w = numpy_helper.from_array(rng.normal(size=(6, 3)).astype(np.float32), "w")
    b = numpy_helper.from_array(rng.normal(size=3).astype(np.float32), "b")
    inits = [w, b]
    if kind == "gemm":
        nodes = [helper.make_node("Gemm", ["x", "w", "b"], ["scores"])]
    elif kind == "reshape":
        inits.append(numpy_helper.from_array(np.array([1, 6], np.int64), "shape"))
        nodes = [
            helper.make_node("Reshape", ["x", "shape"], ["flat"]),
            helper.make_node("Gemm", ["flat", "w", "b"], ["scores"]),
        ]
    else:
        nodes = [
            helper.make_node("ReduceMean", ["x"], ["mu"], axes=[0, 1], keepdims=1),
            helper.make_node("Sub", ["x", "mu"], ["centred"]),
            helper.make_node("Gemm", ["centred", "w", "b"], ["scores"]),
        ]
    graph_ = helper.make_graph(
        nodes, kind,
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, 6])],
        [helper.make_tensor_value_info("scores", TensorProto.FLOAT, [1, 3])],
        initializer=inits,
    )
    model = helper.make_model(graph_, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    onnx.checker.check_model(model, full_check=True)
    return model


def test_batch1_model_is_freed_and_batched(rng):
    model = batch1_model("gemm", rng)
    x = rng.normal(size=(70, 6)).astype(np.float32)
    ds = Dataset({"x": x}, rng.integers(0, 3, 70), "mem")
    with warnings.catch_warnings():
        warnings.simplefilter("error", OnnxcalWarning)  # no fallback warning
        cap = capture_of(model, ds, batch_size=32)
    assert cap.meta.batching == "freed"
    np.testing.assert_allclose(cap.logits, per_sample(model, x), rtol=1e-6, atol=1e-6)
    # the model itself keeps its fixed batch dim
    assert model.graph.input[0].type.tensor_type.shape.dim[0].dim_value == 1


@pytest.mark.parametrize("kind, reason", [("reshape", "fails on a batch of 32"), ("coupled", "differs from 1-sample runs")])
def test_batch1_model_that_cannot_be_freed_falls_back(rng, kind, reason):
    model = batch1_model(kind, rng)
    x = rng.normal(size=(40, 6)).astype(np.float32)
    ds = Dataset({"x": x}, rng.integers(0, 3, 40), "mem")
    seen = []
    with pytest.warns(OnnxcalWarning, match=f"fixed at 1 .*{reason}.*1 sample.s. per call"):
        cap = capture_of(model, ds, batch_size=32, progress=lambda d, done, total: seen.append(done))
    assert cap.meta.batching == "fixed"
    assert seen[0] == 1 and seen[-1] == 40  # the first block is one call, of the fixed batch of 1
    np.testing.assert_allclose(cap.logits, per_sample(model, x), rtol=1e-6, atol=1e-6)


def test_batch_size_one_does_not_try_freeing(rng):
    model = batch1_model("reshape", rng)
    ds = Dataset({"x": rng.normal(size=(5, 6)).astype(np.float32)}, rng.integers(0, 3, 5), "mem")
    with warnings.catch_warnings():
        warnings.simplefilter("error", OnnxcalWarning)
        assert capture_of(model, ds, batch_size=1).meta.batching == "fixed"


# --------------------------------------------------------------------------
# Multi-input models


def test_multi_input_model_against_the_onnx_reference_evaluator():
    model = graph.load_model(TICKETS_MODEL)
    ds = load_dataset(
        DataSpec(inputs=TICKETS, labels=TICKETS_LABELS, classes=TICKETS_CLASSES),
        [graph.tensor_spec(vi) for vi in model.graph.input],
    )
    cap = capture_of(model, ds, batch_size=50)
    # onnx's ReferenceEvaluator follows the ONNX operator spec, independently of onnxruntime
    feeds = {k: np.load(v) for k, v in TICKETS.items()}
    (ref,) = ReferenceEvaluator(model).run(None, feeds)
    np.testing.assert_allclose(cap.logits, ref, rtol=1e-5, atol=1e-6)
    assert cap.meta.class_names == ("mechanical", "electrical", "sensor")


def test_class_list_must_match_the_model(rng, tmp_path):
    model = random_mlp(rng)  # 4 classes
    ds = Dataset({"x": np.zeros((3, 6), np.float32)}, np.zeros(3, np.int64), "mem", class_names=("a", "b"))
    with pytest.raises(OnnxcalError, match="class list of 'mem' has 2 classes but the model has 4"):
        capture_of(model, ds)


# --------------------------------------------------------------------------
# Streaming to the file, interruption


@pytest.fixture
def npz_set(tmp_path, rng):
    model = random_mlp(rng)
    x = rng.normal(size=(120, 6)).astype(np.float32)
    np.savez(tmp_path / "val.npz", x=x, labels=rng.integers(0, 4, 120))
    return model, tmp_path / "val.npz"


def load_set(model, path, **selection):
    return load_dataset(DataSpec(path=path, selection=Selection(**selection)), [graph.tensor_spec(model.graph.input[0])])


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


# --------------------------------------------------------------------------
# Shards and merging


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


def test_old_capture_files_without_indices_still_load(tmp_path, rng):
    model = random_mlp(rng)
    ds = Dataset({"x": rng.normal(size=(9, 6)).astype(np.float32)}, rng.integers(0, 4, 9), "mem")
    cap = capture_of(model, ds)
    meta = {k: v for k, v in cap.meta.to_dict().items() if k in ("model_sha256", "model_path", "output", "scores", "activation", "class_axis", "num_classes", "n", "data_source", "onnxcal_version")}
    import json
    np.savez(tmp_path / "old.npz", logits=cap.logits, labels=cap.labels, meta=np.array(json.dumps(meta)))
    old = load_capture(tmp_path / "old.npz")
    assert old.indices is None and old.sample_indices().tolist() == list(range(9))
    np.testing.assert_array_equal(old.logits, cap.logits)


# -- labels for segmentation and sigmoid heads, fitting rows ----------------


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


def test_multilabel_capture_round_trip(tmp_path):
    from conftest import FIXTURES

    path = FIXTURES / "exporters" / "belt_faults_multilabel_op17.onnx"
    cap = capture_of(graph.load_model(path), load_npz(path.with_name("belt_faults_multilabel_op17_val.npz")))
    assert cap.meta.fit_as == "sigmoid" and cap.labels.shape == cap.logits.shape == (400, 4)
    save_capture(tmp_path / "c.npz", cap)
    back = load_capture(tmp_path / "c.npz")
    np.testing.assert_array_equal(back.labels, cap.labels)


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


# --------------------------------------------------------------------------
# Blocks of batches and the automatic batch size


class _Recorder:
    """Wraps a session: records the batch size of every call, optionally sleeping in it."""

    def __init__(self, session, sleep: float = 0.0):
        self.session, self.sleep, self.sizes = session, sleep, []

    def run(self, names, feed):
        self.sizes.append(len(next(iter(feed.values()))))
        if self.sleep:
            import time

            time.sleep(self.sleep)
        return self.session.run(names, feed)


def _batches(model, x, options, sleep=0.0):
    from onnxcal.capture import plan_run, run_batches

    ds = Dataset({"x": x}, np.zeros(len(x), np.int64), "mem")
    plan = plan_run(model, ds, [model.graph.output[0].name], options)
    rec = _Recorder(plan.session, sleep)
    plan = replace(plan, session=rec)
    blocks = list(run_batches(plan, ds))
    return rec.sizes, blocks


def test_blocks_are_whole_batches_and_give_the_same_logits(rng):
    model = random_mlp(rng)
    x = rng.normal(size=(30_000, 6)).astype(np.float32)
    sizes, blocks = _batches(model, x, RunOptions(batch_size=100))
    assert set(sizes[:-1]) == {100} and sizes[-1] == 100  # 30 000 = 300 batches of 100
    assert [b[0] for b in blocks] == sorted(b[0] for b in blocks) and blocks[-1][1] == 30_000
    assert all((stop - start) % 100 == 0 for start, stop, _ in blocks)
    got = np.concatenate([outs[0] for _, _, outs in blocks])
    np.testing.assert_allclose(got, per_sample(model, x), rtol=1e-5, atol=1e-6)


class _Clock:
    """A clock the test moves: a runtime call costs ``fixed + per_sample * size``, and the
    consumer of a block ``own`` per call (onnxcal's own work, as the wall time counts it)."""

    def __init__(self, fixed: float, per_sample: float, own: float):
        self.t, self.fixed, self.per_sample, self.own = 0.0, fixed, per_sample, own

    def perf_counter(self) -> float:
        return self.t


class _TimedRecorder(_Recorder):
    def __init__(self, session, clock: _Clock):
        super().__init__(session)
        self.clock = clock

    def run(self, names, feed):
        out = super().run(names, feed)
        self.clock.t += self.clock.fixed + self.clock.per_sample * self.sizes[-1]
        return out


def test_automatic_batch_size_grows_while_onnxcal_costs_more_than_5_percent(rng, monkeypatch):
    # Deterministic: a clock the test moves, not the machine's. A call costs 10 units plus
    # 0.01 per sample and onnxcal's own work 1 unit per call: its share is 1 / 10.64 at 64
    # samples (9.4 %), 1 / 11.28 at 128, 1 / 12.56 at 256, 1 / 15.12 at 512 (6.6 %), and first
    # falls under 5 % at 1024 (1 / 20.24 = 4.9 %), where the batch size stays.
    capture_module = importlib.import_module("onnxcal.capture")  # `onnxcal.capture` is the function
    from onnxcal.capture import plan_run, run_batches

    clock = _Clock(fixed=10.0, per_sample=0.01, own=1.0)
    monkeypatch.setattr(capture_module, "time", clock)
    model = random_mlp(rng)
    x = rng.normal(size=(400_000, 6)).astype(np.float32)
    ds = Dataset({"x": x}, np.zeros(len(x), np.int64), "mem")
    plan = plan_run(model, ds, [model.graph.output[0].name], RunOptions(threads=1))
    rec = _TimedRecorder(plan.session, clock)
    blocks = []
    for start, stop, outs in run_batches(replace(plan, session=rec), ds):
        clock.t += clock.own * -(-(stop - start) // rec.sizes[-1])  # onnxcal's work: per call of the block
        blocks.append((start, stop, outs))
    steps = rec.sizes[:-1]
    assert steps[0] == 64 and steps == sorted(steps)
    assert set(steps) == {64, 128, 256, 512, 1024}
    sess = ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"])
    want = sess.run(None, {"x": x})[0]  # onnxruntime on the whole set in one call
    np.testing.assert_allclose(np.concatenate([o[0] for _, _, o in blocks]), want, rtol=1e-5, atol=1e-6)


def test_an_explicit_batch_size_is_kept(rng):
    model = random_mlp(rng)
    x = rng.normal(size=(20_000, 6)).astype(np.float32)
    sizes, _ = _batches(model, x, RunOptions(batch_size=64, threads=1))
    assert set(sizes[:-1]) == {64}


def test_automatic_batch_size_stays_for_a_slow_model(rng):
    model = random_mlp(rng)
    x = rng.normal(size=(3000, 6)).astype(np.float32)
    sizes, _ = _batches(model, x, RunOptions(), sleep=0.002)  # 2 ms per call: onnxcal's share is tiny
    assert set(sizes[:-1]) == {64}
