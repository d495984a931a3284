"""Issue 12, item 4: inputs that are not samples (a scalar sample rate, a recurrent state
1 x N x H), fed with ``--constant`` and ``--batch-axis``.

Judged against references onnxcal does not compute: the model run by hand
in onnxruntime with feeds built here in NumPy; the logits of the model cut
before its activation (``head_models.cut``: every Sigmoid made an Identity,
run in onnxruntime); the temperature fitted by ``scipy.optimize.minimize_scalar``
on those logits; the sigmoid by ``scipy.special.expit``.
"""

from __future__ import annotations

from pathlib import Path

import head_models as hm
import numpy as np
import onnx
import pytest
import scipy.optimize
import scipy.special as sp

from onnxcal import api
from onnxcal.data import DataSpec
from onnxcal.errors import OnnxcalError

N = 203  # not a multiple of the batch sizes used


def _feeds(x: np.ndarray, sr: int, h0: np.ndarray) -> dict[str, np.ndarray]:
    return {"x": x, "sr": np.array(sr, dtype=np.int64), "h0": h0}


@pytest.fixture(scope="module")
def case(tmp_path_factory: pytest.TempPathFactory) -> dict[str, object]:
    d = tmp_path_factory.mktemp("state")
    model = hm.speech_with_state()
    onnx.save(model, d / "model.onnx")
    rng = np.random.default_rng(4)
    x = rng.normal(size=(N, hm.F)).astype(np.float32)
    h0 = rng.normal(size=(1, N, hm.STATE_H)).astype(np.float32)  # samples on axis 1, as the model takes them
    cut = hm.cut(model, "speech_prob")
    z = {sr: hm.run(cut, _feeds(x, sr, h0), ["speech_prob"])[0][:, 0].astype(np.float64) for sr in (8000, 16000)}
    labels = (rng.random(N) < sp.expit(0.45 * z[16000])).astype(np.int64)  # over-confident by about 2x
    np.savez(d / "val.npz", x=x, h0=h0, labels=labels)
    np.savez(d / "val_x.npz", x=x, labels=labels)
    np.savez(d / "val_sr.npz", x=x, h0=h0, sr=np.int64(8000), labels=labels)
    np.save(d / "x.npy", x)
    np.save(d / "h0.npy", h0)
    np.save(d / "labels.npy", labels)
    return {"dir": d, "model": model, "x": x, "h0": h0, "z": z, "labels": labels}


def _dir(case: dict[str, object]) -> Path:
    d = case["dir"]
    assert isinstance(d, Path)
    return d


def _arr(case: dict[str, object], key: str) -> np.ndarray:
    a = case[key]
    assert isinstance(a, np.ndarray)
    return a


def _z(case: dict[str, object], sr: int) -> np.ndarray:
    z = case["z"]
    assert isinstance(z, dict)
    return np.asarray(z[sr])


def sigmoid_temperature(z: np.ndarray, y: np.ndarray) -> float:
    """T minimising the mean binary cross-entropy of sigmoid(z / T) (scipy.optimize.minimize_scalar)."""

    def nll(log_t: float) -> float:
        s = z / np.exp(log_t)
        return float(np.mean(np.logaddexp(0.0, s) - y * s))

    res = scipy.optimize.minimize_scalar(nll, bounds=(np.log(0.01), np.log(100.0)), method="bounded",
                                         options={"xatol": 1e-10})
    return float(np.exp(res.x))


@pytest.mark.parametrize("sr", [8000, 16000])
@pytest.mark.parametrize("batch_size", [None, 7])
def test_capture_with_a_constant_and_a_batch_axis_equals_the_model_run_by_hand(
    case: dict[str, object], sr: int, batch_size: int | None
) -> None:
    spec = DataSpec(path=_dir(case) / "val.npz", constants={"sr": str(sr)}, batch_axes={"h0": 1})
    cap = api.capture(_dir(case) / "model.onnx", spec, batch_size=batch_size)
    # the reference: the cut model run by hand in onnxruntime, the whole set in one call
    np.testing.assert_allclose(cap.logits[:, 0], _z(case, sr), rtol=0, atol=1e-5)
    assert cap.meta.constants == {"sr": str(sr)} and cap.meta.batch_axes == {"h0": 1}
    assert not np.allclose(_z(case, 8000), _z(case, 16000))  # the constant chose the branch


def test_per_input_npy_files_with_a_batch_axis(case: dict[str, object]) -> None:
    d = _dir(case)
    spec = DataSpec(inputs={"x": d / "x.npy", "h0": d / "h0.npy"}, labels=d / "labels.npy",
                    constants={"sr": 16000}, batch_axes={"h0": 1})
    cap = api.capture(d / "model.onnx", spec, batch_size=16)
    np.testing.assert_allclose(cap.logits[:, 0], _z(case, 16000), rtol=0, atol=1e-5)


def test_a_zeros_state_equals_zeros_fed_by_hand(case: dict[str, object]) -> None:
    spec = DataSpec(path=_dir(case) / "val_x.npz", constants={"sr": 16000, "h0": "zeros"})
    cap = api.capture(_dir(case) / "model.onnx", spec, batch_size=10)
    zeros = np.zeros((1, N, hm.STATE_H), dtype=np.float32)
    want = hm.run(hm.cut(case["model"], "speech_prob"), _feeds(_arr(case, "x"), 16000, zeros),  # type: ignore[arg-type]
                  ["speech_prob"])[0][:, 0]
    np.testing.assert_allclose(cap.logits[:, 0], want, rtol=0, atol=1e-5)
    assert cap.meta.constants == {"h0": "zeros", "sr": "16000"}


def test_a_state_array_given_once_is_repeated_to_every_batch(case: dict[str, object], tmp_path: Path) -> None:
    one = np.random.default_rng(5).normal(size=(1, 1, hm.STATE_H)).astype(np.float32)
    np.save(tmp_path / "state.npy", one)
    spec = DataSpec(path=_dir(case) / "val_x.npz", constants={"sr": 8000, "h0": tmp_path / "state.npy"})
    cap = api.capture(_dir(case) / "model.onnx", spec, batch_size=9)
    by_hand = np.repeat(one, N, axis=1)  # NumPy's repeat along the batch axis
    want = hm.run(hm.cut(case["model"], "speech_prob"), _feeds(_arr(case, "x"), 8000, by_hand),  # type: ignore[arg-type]
                  ["speech_prob"])[0][:, 0]
    np.testing.assert_allclose(cap.logits[:, 0], want, rtol=0, atol=1e-5)
    assert cap.meta.constants["h0"].startswith("state.npy sha256:")


def test_a_single_number_in_the_npz_is_a_constant(case: dict[str, object]) -> None:
    spec = DataSpec(path=_dir(case) / "val_sr.npz", batch_axes={"h0": 1})
    cap = api.capture(_dir(case) / "model.onnx", spec)
    np.testing.assert_allclose(cap.logits[:, 0], _z(case, 8000), rtol=0, atol=1e-5)
    assert cap.meta.constants == {"sr": "8000 (in the data)"}


def test_calibrate_fits_the_temperature_of_the_true_logits(case: dict[str, object], tmp_path: Path) -> None:
    spec = DataSpec(path=_dir(case) / "val.npz", constants={"sr": 16000}, batch_axes={"h0": 1})
    out = tmp_path / "patched.onnx"
    result = api.calibrate(_dir(case) / "model.onnx", spec, out, batch_size=32)
    z, y = _z(case, 16000), _arr(case, "labels")
    t_ref = sigmoid_temperature(z, y)
    t = result.summary.scaling.parameters["temperature"]
    assert abs(t - t_ref) < 1e-3 and t > 1.5  # the labels were drawn over-confident by about 2x
    patched = onnx.load(out)
    p = hm.run(patched, _feeds(_arr(case, "x"), 16000, _arr(case, "h0")), ["speech_prob"])[0][:, 0]
    np.testing.assert_allclose(p, sp.expit(z / t), rtol=0, atol=1e-5)  # scipy's logistic sigmoid
    feeds = _feeds(_arr(case, "x"), 16000, _arr(case, "h0"))
    state = hm.run(patched, feeds, ["hn"])[0]
    np.testing.assert_array_equal(state, hm.run(case["model"], feeds, ["hn"])[0])  # type: ignore[arg-type]
    identity = next(c for c in result.verification.checks if c.name == "identity")
    assert identity.passed and "'hn'" in identity.detail and "not compared" not in identity.detail


def test_verify_reuses_the_recorded_constant_and_batch_axis(case: dict[str, object], tmp_path: Path) -> None:
    spec = DataSpec(path=_dir(case) / "val.npz", constants={"sr": 16000}, batch_axes={"h0": 1})
    out = tmp_path / "patched.onnx"
    api.calibrate(_dir(case) / "model.onnx", spec, out)
    result = api.verify(out, _dir(case) / "val.npz", original=_dir(case) / "model.onnx", latency_runs=5, latency=True)
    assert result.passed and result.n == N
    assert {c.name for c in result.checks} >= {"reference", "identity", "latency"}
    with pytest.raises(OnnxcalError, match="model input 'sr' is a single number"):
        api.verify(out, DataSpec(path=_dir(case) / "val.npz", batch_axes={"h0": 1}))  # given: no re-use


def test_the_refusals_name_the_input_and_why(case: dict[str, object]) -> None:
    model = _dir(case) / "model.onnx"
    with pytest.raises(OnnxcalError, match=r"input 'h0' has shape \[1, N, 3\] in the model, samples on axis 1") as e:
        api.capture(model, DataSpec(path=_dir(case) / "val.npz", constants={"sr": 16000}))
    assert "batch_axes h0=1" in e.value.hint and "constants h0=zeros" in e.value.hint  # the api's keywords
    with pytest.raises(OnnxcalError, match=r"input 'sr' is a single number \(shape \[\]\)"):
        api.capture(model, DataSpec(path=_dir(case) / "val.npz", batch_axes={"h0": 1}))
    with pytest.raises(OnnxcalError, match=r"constant 'h0' has size 2 on axis 1, the batch axis"):
        api.capture(model, DataSpec(path=_dir(case) / "val_x.npz",
                                    constants={"sr": 1, "h0": np.zeros((1, 2, hm.STATE_H), np.float32)}))


def test_a_csv_table_feeds_the_other_input_beside_a_constant(tmp_path: Path) -> None:
    from onnx import TensorProto, helper, numpy_helper

    w = np.random.default_rng(6).normal(size=(3, 2)).astype(np.float32)
    graph = helper.make_graph(
        [helper.make_node("MatMul", ["x", "w"], ["proj"]), helper.make_node("Mul", ["proj", "gain"], ["z"]),
         helper.make_node("Softmax", ["z"], ["p"], axis=1)],
        "gain", [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", 3]),
                 helper.make_tensor_value_info("gain", TensorProto.FLOAT, [])],
        [helper.make_tensor_value_info("p", TensorProto.FLOAT, ["N", 2])], [numpy_helper.from_array(w, "w")])
    onnx.save(helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)]), tmp_path / "m.onnx")
    x = np.random.default_rng(7).normal(size=(40, 3)).astype(np.float32)
    rows = "".join(f"{a:.6f},{b:.6f},{c:.6f},{i % 2}\n" for i, (a, b, c) in enumerate(x))
    (tmp_path / "val.csv").write_text("a,b,c,label\n" + rows)
    cap = api.capture(tmp_path / "m.onnx", DataSpec(path=tmp_path / "val.csv", constants={"gain": 2.5}))
    x_csv = np.loadtxt(tmp_path / "val.csv", delimiter=",", skiprows=1, usecols=(0, 1, 2), dtype=np.float32)
    want = (x_csv @ w) * np.float32(2.5)  # ONNX MatMul and Mul, by NumPy
    np.testing.assert_allclose(cap.logits, want, rtol=1e-5, atol=1e-6)


# Arrays in memory (the Python API) take the same constants and batch axes as a file, with the same checks.


def _in_memory(case: dict[str, object], *names: str) -> dict[str, np.ndarray]:
    return {k: _arr(case, k) for k in names}


@pytest.mark.parametrize("form", ["mapping", "pair"])
def test_arrays_in_memory_take_a_constant_and_a_batch_axis(case: dict[str, object], form: str) -> None:
    inputs = _in_memory(case, "x", "h0")
    arrays = {**inputs, "labels": _arr(case, "labels")} if form == "mapping" else (inputs, _arr(case, "labels"))
    spec = DataSpec(arrays=arrays, constants={"sr": 8000}, batch_axes={"h0": 1})
    cap = api.capture(_dir(case) / "model.onnx", spec, batch_size=7)
    # the reference: the cut model run by hand in onnxruntime (the case fixture)
    np.testing.assert_allclose(cap.logits[:, 0], _z(case, 8000), rtol=0, atol=1e-5)
    assert cap.meta.constants == {"sr": "8000"} and cap.meta.batch_axes == {"h0": 1}
    from_file = api.capture(_dir(case) / "model.onnx",
                            DataSpec(path=_dir(case) / "val.npz", constants={"sr": 8000}, batch_axes={"h0": 1}))
    np.testing.assert_array_equal(cap.logits, from_file.logits)


def test_a_single_number_among_arrays_in_memory_is_a_constant(case: dict[str, object]) -> None:
    arrays = {**_in_memory(case, "x", "h0"), "sr": np.int64(16000), "labels": _arr(case, "labels")}
    cap = api.capture(_dir(case) / "model.onnx", DataSpec(arrays=arrays, batch_axes={"h0": 1}))
    np.testing.assert_allclose(cap.logits[:, 0], _z(case, 16000), rtol=0, atol=1e-5)


def test_arrays_in_memory_get_the_refusals_of_a_file(case: dict[str, object]) -> None:
    model = _dir(case) / "model.onnx"
    x, h0, y = _arr(case, "x"), _arr(case, "h0"), _arr(case, "labels")
    # each refusal is the path form's, checked on the same arrays saved in val.npz
    for arrays, extra, message in [
        ({"x": x, "h0": h0, "labels": y}, {"constants": {"sr": 16000}},
         r"input 'h0' has shape \[1, N, 3\] in the model, samples on axis 1"),
        ({"x": x, "h0": h0, "labels": y}, {"constants": {"sr": 1, "nope": 2}, "batch_axes": {"h0": 1}},
         r"names 'nope', which is not a model input"),
        ({"x": x, "h0": h0, "labels": y}, {"constants": {"sr": 1}, "batch_axes": {"h0": 5}},
         r"h0=5 is out of range: input 'h0' has rank 3"),
        ({"x": x, "h0": h0, "labels": y}, {"constants": {"sr": 1, "h0": "zeros"}, "batch_axes": {"h0": 1}},
         r"input 'h0' is given both in"),
    ]:
        with pytest.raises(OnnxcalError, match=message):
            api.capture(model, DataSpec(arrays=arrays, **extra))
        with pytest.raises(OnnxcalError, match=message):
            api.capture(model, DataSpec(path=_dir(case) / "val.npz", **extra))
