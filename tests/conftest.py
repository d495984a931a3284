"""Shared test helpers: small ONNX models built with onnx.helper, a CLI runner."""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import onnx
import pytest
from hypothesis import settings
from onnx import TensorProto, helper, numpy_helper

from onnxcal.cli import main

# Property tests (hypothesis): no example database on disk and no deadline (the
# machine is shared); in CI (CI=true) the examples are derandomized, so a run is
# reproducible and cannot fail by chance. Elsewhere each run draws new examples.
settings.register_profile("ci", database=None, deadline=None, derandomize=True, print_blob=True)
settings.register_profile("dev", database=None, deadline=None, print_blob=True)
settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE") or ("ci" if os.environ.get("CI") else "dev"))

ROOT = Path(__file__).resolve().parents[1]
FIXTURES = ROOT / "fixtures"
DEMO_MODEL = FIXTURES / "conveyor_faults.onnx"
DEMO_VAL = FIXTURES / "conveyor_faults_val.npz"
DEMO_TEST = FIXTURES / "conveyor_faults_test.npz"


def mlp_model(
    layers: list[tuple[np.ndarray, np.ndarray]],
    *,
    final: str | None = None,
    opset: int = 17,
    input_name: str = "x",
    output_name: str = "scores",
    batch: int | str = "N",
    dtype=np.float32,
) -> onnx.ModelProto:
    """Gemm/Relu layers, optionally ending in Softmax/LogSoftmax/Sigmoid on axis 1.

    ``layers`` holds (W, b) with W of shape (in, out).
    """
    elem = helper.np_dtype_to_tensor_dtype(np.dtype(dtype))
    nodes, inits = [], []
    x = input_name
    for i, (w, b) in enumerate(layers):
        inits += [
            numpy_helper.from_array(w.astype(dtype), f"w{i}"),
            numpy_helper.from_array(b.astype(dtype), f"b{i}"),
        ]
        last = i == len(layers) - 1
        y = (output_name if final is None else "logits") if last else f"h{i}"
        nodes.append(helper.make_node("Gemm", [x, f"w{i}", f"b{i}"], [y], name=f"gemm{i}"))
        if not last:
            nodes.append(helper.make_node("Relu", [y], [f"r{i}"], name=f"relu{i}"))
            y = f"r{i}"
        x = y
    if final is not None:
        kwargs = {} if final == "Sigmoid" else {"axis": 1}
        nodes.append(helper.make_node(final, [x], [output_name], name="act", **kwargs))
    k = layers[-1][0].shape[1]
    graph = helper.make_graph(
        nodes,
        "test_mlp",
        [helper.make_tensor_value_info(input_name, elem, [batch, layers[0][0].shape[0]])],
        [helper.make_tensor_value_info(output_name, elem, [batch, k])],
        initializer=inits,
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", opset)])
    model.ir_version = 8
    onnx.checker.check_model(model, full_check=True)
    return model


def random_mlp(
    rng: np.random.Generator, d: int = 6, k: int = 4, hidden: int = 8, scale: float = 1.0, **kw
) -> onnx.ModelProto:
    layers = [
        (rng.normal(size=(d, hidden)), rng.normal(size=hidden)),
        (scale * rng.normal(size=(hidden, k)), rng.normal(size=k)),
    ]
    return mlp_model(layers, **kw)


def save_model(model: onnx.ModelProto, path: Path) -> Path:
    path.write_bytes(model.SerializeToString())
    return path


@dataclass
class CliResult:
    code: int
    out: str
    err: str


@pytest.fixture
def run_cli(capsys):
    """Call the CLI in-process: ``run_cli("fit", path, ...) -> CliResult``."""

    def run(*args) -> CliResult:
        code = main([str(a) for a in args])
        captured = capsys.readouterr()
        return CliResult(code, captured.out, captured.err)

    return run


@pytest.fixture
def rng() -> np.random.Generator:
    return np.random.default_rng(12345)


def files_in(directory: Path) -> dict[str, bytes]:
    """Every file under ``directory`` with its bytes (to assert nothing changed)."""
    return {str(p.relative_to(directory)): p.read_bytes() for p in directory.rglob("*") if p.is_file()}


# -- shared by tests/capture/ -------------------------------------------------


def capture_of(model, ds, **kw):
    """``capture.capture`` with a made-up model path and hash."""
    from onnxcal.capture import capture

    return capture(model, ds, model_path="m.onnx", model_sha256="ab", **kw)


def per_sample(model, x):
    """onnxruntime on the model as exported, one sample per call (the reference)."""
    import onnxruntime as ort

    sess = ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"])
    name = sess.get_inputs()[0].name
    return np.concatenate([sess.run(None, {name: x[i : i + 1]})[0] for i in range(len(x))])


@pytest.fixture
def npz_set(tmp_path, rng):
    """A random 4-class MLP and a 120-row .npz set for it."""
    model = random_mlp(rng)
    x = rng.normal(size=(120, 6)).astype(np.float32)
    np.savez(tmp_path / "val.npz", x=x, labels=rng.integers(0, 4, 120))
    return model, tmp_path / "val.npz"


def load_set(model, path, **selection):
    """The .npz set at ``path`` for ``model``'s first input, with a row selection."""
    from onnxcal import graph
    from onnxcal.data import DataSpec, Selection, load_dataset

    return load_dataset(DataSpec(path=path, selection=Selection(**selection)),
                        [graph.tensor_spec(model.graph.input[0])])


def onehot_int_model() -> onnx.ModelProto:
    """A model whose only output is int64 (ArgMax): nothing to calibrate."""
    graph = helper.make_graph(
        [helper.make_node("ArgMax", ["x"], ["label"], axis=1, keepdims=0)],
        "int_only",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", 3])],
        [helper.make_tensor_value_info("label", TensorProto.INT64, ["N"])],
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    return model


def identity_model(k: int = 3) -> onnx.ModelProto:
    """scores = x: the data are the logits (to feed chosen logits, NaN included)."""
    graph = helper.make_graph(
        [helper.make_node("Identity", ["x"], ["scores"])],
        "identity",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", k])],
        [helper.make_tensor_value_info("scores", TensorProto.FLOAT, ["N", k])],
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    return model


BELT_MODEL = FIXTURES / "belt_camera.onnx"
BELT_IMAGES = FIXTURES / "belt_images"
BELT_CLASSES = FIXTURES / "belt_camera_classes.txt"
BELT_PREPROCESS = FIXTURES / "belt_camera_preprocess.toml"
BELT_LABELS = FIXTURES / "belt_images_labels.csv"
DEMO_CSV = FIXTURES / "conveyor_faults_val.csv"
DEMO_CLASSES = FIXTURES / "conveyor_faults_classes.txt"
TICKETS_MODEL = FIXTURES / "tickets.onnx"
TICKETS = {
    "input_ids": FIXTURES / "tickets_input_ids.npy",
    "attention_mask": FIXTURES / "tickets_attention_mask.npy",
}
TICKETS_LABELS = FIXTURES / "tickets_labels.npy"
TICKETS_CLASSES = FIXTURES / "tickets_classes.txt"
