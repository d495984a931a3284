"""onnxcal.capture.blocks: blocks of batches, progress and the automatic batch size."""

import importlib
from dataclasses import replace

import numpy as np
import onnx
import onnxruntime as ort
from conftest import capture_of, per_sample, random_mlp
from onnx import TensorProto, helper, numpy_helper

from onnxcal.capture import RunOptions
from onnxcal.data import Dataset


def test_progress_is_reported(rng):
    model = random_mlp(rng)
    ds = Dataset({"x": np.zeros((10, 6), np.float32)}, np.zeros(10, np.int64), "mem")
    seen = []
    capture_of(model, ds, batch_size=4, progress=lambda d, done, total: seen.append((done, total)))
    # after the first batch, then per block of batches (here one block holds the rest)
    assert seen == [(4, 10), (10, 10)]


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
    blocks_module = importlib.import_module("onnxcal.capture.blocks")  # where run_batches reads its clock
    from onnxcal.capture import plan_run, run_batches

    clock = _Clock(fixed=10.0, per_sample=0.01, own=1.0)
    monkeypatch.setattr(blocks_module, "time", clock)
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


def _with_state_output(batch: int | str) -> onnx.ModelProto:
    """x (B x 3) -> y = 2x (B x 3) and s = Unsqueeze(x, 0) (1 x B x 3: samples on axis 1)."""
    g = helper.make_graph(
        [helper.make_node("Mul", ["x", "two"], ["y"]), helper.make_node("Unsqueeze", ["x", "zero"], ["s"])],
        "state_out", [helper.make_tensor_value_info("x", TensorProto.FLOAT, [batch, 3])],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, [batch, 3]),
         helper.make_tensor_value_info("s", TensorProto.FLOAT, [1, batch, 3])],
        [numpy_helper.from_array(np.float32(2.0), "two"), numpy_helper.from_array(np.array([0], np.int64), "zero")],
    )
    return helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)])


def test_outputs_with_samples_on_axis_1_are_joined_along_it():
    from onnxcal.capture import run_model

    x = np.arange(13 * 3, dtype=np.float32).reshape(13, 3)
    ds = Dataset({"x": x}, None, "mem")
    for batch, size in (("N", 4), (2, None), (2, 2)):  # batched; a fixed batch of 2 freed; run 2 at a time, padded
        y, s = run_model(_with_state_output(batch), ds, ["y", "s"], batch_size=size, out_axes=[0, 1])
        np.testing.assert_array_equal(y, 2 * x)
        np.testing.assert_array_equal(s, x[None])  # NumPy's expand_dims, the Unsqueeze of the ONNX spec


class _Decoded:
    """A lazy input like the image folder's ImageArray: its rows are made when indexed, slowly; records
    which thread asked for which rows, and fails on the rows of ``fail_at``."""

    def __init__(self, x: np.ndarray, fail_at: int | None = None) -> None:
        self.x, self.fail_at, self.calls = x, fail_at, []
        self.shape, self.dtype, self.ndim = x.shape, x.dtype, x.ndim

    def __len__(self) -> int:
        return len(self.x)

    def __getitem__(self, key):
        import threading
        import time

        from onnxcal.errors import OnnxcalError

        rows = range(len(self.x))[key] if isinstance(key, slice) else np.atleast_1d(key)
        self.calls.append((threading.current_thread().name, rows[0], rows[-1] + 1))
        if self.fail_at is not None and self.fail_at in rows:
            raise OnnxcalError(f"image {self.fail_at} cannot be decoded")
        time.sleep(0.01)
        return self.x[key]


def test_a_decoded_set_is_read_one_block_ahead_in_a_worker(rng, monkeypatch):
    """Image folders: the next block is decoded in a worker thread while the runtime runs the current
    one; every block is decoded once, in order, and the logits are those of the arrays themselves."""
    import threading

    import pytest

    from onnxcal.capture import blocks
    from onnxcal.errors import OnnxcalError

    monkeypatch.setattr(blocks, "BLOCK_BYTES", 32 * 6 * 4)  # blocks of two batches of 16 rows
    model = random_mlp(rng)
    x = rng.normal(size=(300, 6)).astype(np.float32)
    lazy = _Decoded(x)
    got = capture_of(model, Dataset({"x": lazy}, np.zeros(300, np.int64), "images"), batch_size=16)
    want = capture_of(model, Dataset({"x": x}, np.zeros(300, np.int64), "arrays"), batch_size=16)
    np.testing.assert_array_equal(got.logits, want.logits)
    spans = [(start, stop) for _, start, stop in lazy.calls]
    assert spans[0][0] == 0 and spans[-1][1] == 300
    assert all(a[1] == b[0] for a, b in zip(spans, spans[1:], strict=False)), spans  # each row decoded once, in order
    threads = [name for name, _, _ in lazy.calls]
    assert threads[0] == threading.current_thread().name  # the first block: nothing to overlap with yet
    assert len(threads) > 2 and all(t.startswith("onnxcal-decode") for t in threads[1:])
    # an error in the worker reaches the caller as it is; no worker thread is left behind
    failing = _Decoded(x, fail_at=200)
    with pytest.raises(OnnxcalError, match="image 200 cannot be decoded"):
        capture_of(model, Dataset({"x": failing}, np.zeros(300, np.int64), "images"), batch_size=16)
    assert not [t for t in threading.enumerate() if t.name.startswith("onnxcal-decode")]
    # arrays and memory maps are read in place: no worker
    plain = Dataset({"x": x}, np.zeros(300, np.int64), "arrays")
    assert blocks._Reader(plain, {"x": "float32"}).pool is None


def test_the_rows_the_reading_is_checked_on_are_the_captures_first_rows_run_once(rng, monkeypatch):
    """The probe (the first rows, run to check the reading against the model's own output) and the
    capture are one pass of one session: every row is read and run once, in order, the decoding worker
    going on across the two; the logits, the labels and the inputs' NaN rows are those of a capture
    run alone, on the arrays themselves."""
    from onnxcal.api.common import read_and_capture
    from onnxcal.capture import blocks, plan
    from onnxcal.guard import PROBE_ROWS

    monkeypatch.setattr(blocks, "BLOCK_BYTES", 32 * 6 * 4)  # blocks of two batches of 16 rows
    sessions = []
    make_session = plan.make_session
    monkeypatch.setattr(plan, "make_session", lambda *a, **kw: sessions.append(1) or make_session(*a, **kw))
    model = random_mlp(rng, final="Softmax")
    x = rng.normal(size=(600, 6)).astype(np.float32)
    x[3, 1] = np.nan  # a row the probe runs
    x[400, 0] = np.inf  # one the capture runs after it
    labels = rng.integers(0, 4, 600)
    lazy = _Decoded(x)
    seen = []
    cap = read_and_capture(model, Dataset({"x": lazy}, labels, "images"), "m.onnx", "ab", None, None, None,
                           RunOptions(batch_size=16), lambda d, done, total: seen.append(done))
    assert len(sessions) == 1
    spans = [(start, stop) for _, start, stop in lazy.calls]
    assert spans[0][0] == 0 and spans[-1][1] == 600 and PROBE_ROWS in {a for a, _ in spans}
    assert all(a[1] == b[0] for a, b in zip(spans, spans[1:], strict=False)), spans  # each row once, in order
    assert [name for name, _, _ in lazy.calls][-1].startswith("onnxcal-decode")
    assert seen[0] == PROBE_ROWS and seen[-1] == 600
    sessions.clear()
    want = capture_of(model, Dataset({"x": x}, labels, "arrays"), batch_size=16)
    assert len(sessions) == 1
    np.testing.assert_array_equal(cap.logits, want.logits)
    np.testing.assert_array_equal(cap.labels, want.labels)
    assert cap.nonfinite_inputs["x"].count == 2 == want.nonfinite_inputs["x"].count
    assert cap.meta.activation == "softmax"
    assert cap.stats.rows == 600  # the whole set's rows are checked against the reading, the probe's too
    # a set no longer than the probe: the capture is the probe's rows alone
    small = read_and_capture(model, Dataset({"x": _Decoded(x[:40])}, labels[:40], "images"), "m.onnx", "ab", None,
                             None, None, RunOptions(batch_size=16), None)
    np.testing.assert_array_equal(small.logits, want.logits[:40])
    assert small.stats.rows == 40 and small.nonfinite_inputs["x"].count == 1


def test_waiting_for_the_decoder_does_not_grow_the_batch(rng, monkeypatch):
    """Decoding costs the same per image at any batch size: a decoder slower than the runtime must not
    make the automatic batch size grow (an image folder runs the batch size of its pre-decoded arrays)."""
    from onnxcal.capture import blocks, plan_run, run_batches

    monkeypatch.setattr(blocks, "BLOCK_BYTES", 128 * 6 * 4)  # blocks of two batches of 64 rows
    model = random_mlp(rng)
    x = rng.normal(size=(1500, 6)).astype(np.float32)
    ds = Dataset({"x": _Decoded(x)}, np.zeros(len(x), np.int64), "images")  # 10 ms per block decoded
    plan = plan_run(model, ds, [model.graph.output[0].name], RunOptions())
    rec = _Recorder(plan.session, sleep=0.002)  # 4 ms per block in the runtime
    list(run_batches(replace(plan, session=rec), ds))
    assert set(rec.sizes[:-1]) == {64}


def test_a_decoded_set_runs_in_a_session_without_spinning(rng):
    """onnxruntime's idle intra-op threads sleep instead of spinning on the cores the decoder needs."""
    from onnxcal.capture import plan_run

    model = random_mlp(rng)
    x = rng.normal(size=(10, 6)).astype(np.float32)

    def spinning(run_plan):
        try:  # onnxruntime raises for an entry never set (its default: spinning)
            return run_plan.session.get_session_options().get_session_config_entry("session.intra_op.allow_spinning")
        except RuntimeError:
            return None

    assert spinning(plan_run(model, Dataset({"x": _Decoded(x)}, np.zeros(10, np.int64), "images"), ["logits"])) == "0"
    assert spinning(plan_run(model, Dataset({"x": x}, np.zeros(10, np.int64), "arrays"), ["logits"])) is None
