"""onnxcal.capture.plan: the batch plan, a fixed batch dim freed in a copy or kept."""

import warnings

import numpy as np
import onnx
import pytest
from conftest import capture_of, per_sample, random_mlp
from onnx import TensorProto, helper, numpy_helper

from onnxcal.data import Dataset
from onnxcal.errors import OnnxcalWarning


def test_fixed_batch_model_pads_the_last_batch(rng):
    model = random_mlp(rng, batch=4)
    x = rng.normal(size=(10, 6)).astype(np.float32)
    ds = Dataset({"x": x}, rng.integers(0, 4, 10), "mem")
    fixed = capture_of(model, ds).logits
    free = capture_of(random_mlp(np.random.default_rng(12345)), ds).logits
    assert fixed.shape == (10, 4)
    np.testing.assert_allclose(fixed, free, rtol=1e-6)


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


@pytest.mark.parametrize("kind, reason", [("reshape", "fails on a batch of 32"), ("coupled",
                                                                                  "differs from 1-sample runs")])
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
