"""The Python API with a notebook's objects: arrays in memory wherever a validation set is taken, an
onnx.ModelProto wherever a model path is; the same checks and errors as for files, which name the
keywords (``force=True``), not the command line's options. And calibrate's bounded verification sample.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import onnx
import pytest
from conftest import DEMO_MODEL, DEMO_TEST, DEMO_VAL

from onnxcal import api
from onnxcal.api.sampling import EXTREME_SHARE, verification_sample
from onnxcal.errors import OnnxcalError
from onnxcal.fit import FitOptions

QUICK = FitOptions(bootstrap=0)


@pytest.fixture(scope="module")
def demo() -> tuple[onnx.ModelProto, np.ndarray, np.ndarray]:
    d = np.load(DEMO_VAL)
    return onnx.load(DEMO_MODEL), d["band_energies"], d["labels"]


def test_arrays_and_modelproto_give_the_files_result(tmp_path: Path, demo) -> None:
    model, x, y = demo
    from_files = api.calibrate(DEMO_MODEL, DEMO_VAL, tmp_path / "a.onnx", options=QUICK)
    forms = [
        (model, {"band_energies": x, "labels": y}),  # a mapping, as np.load gives it
        (DEMO_MODEL, ({"band_energies": x}, y)),  # an (inputs, labels) pair
        (model, (x, y)),  # one array for a one-input model
    ]
    for i, (m, data) in enumerate(forms):
        got = api.calibrate(m, data, tmp_path / f"b{i}.onnx", options=QUICK)
        assert got.summary.temperature == from_files.summary.temperature
        assert got.patch is not None and got.verification.passed
    # a ModelProto is hashed as its file: the record names the same source sha256 as for the path
    assert got.patch.record.source_sha256 == from_files.patch.record.source_sha256
    assert api.verify(tmp_path / "b2.onnx", DEMO_TEST).passed
    assert api.verify(onnx.load(tmp_path / "b2.onnx"), dict(np.load(DEMO_TEST)), original=model).passed


def test_every_api_function_takes_a_modelproto_and_arrays(tmp_path: Path, demo) -> None:
    model, x, y = demo
    assert api.inspect(model).inputs == api.inspect(DEMO_MODEL).inputs
    cap = api.capture(model, {"band_energies": x[:300], "labels": y[:300]}, out=tmp_path / "cap.npz")
    np.testing.assert_array_equal(cap.logits, api.capture(DEMO_MODEL, DEMO_VAL).logits[:300])
    fit = api.fit(tmp_path / "cap.npz", options=QUICK)
    api.patch(model, tmp_path / "p.onnx", fit=fit)
    rep = api.report(tmp_path / "cap.npz", tmp_path / "rep", model=onnx.load(tmp_path / "p.onnx"))
    assert rep.files


@pytest.mark.parametrize(
    ("data", "message"),
    [
        ({"band_energies": np.zeros((3, 16), np.float32)}, r"hold no 'labels'"),
        ({"band_energies": np.zeros((3, 16), np.float32), "labels": np.zeros(4, np.int64)},
         r"different numbers of samples \(band_energies: 3, labels: 4\)"),
        ({"band_energies": np.array([[object()]] * 3), "labels": np.zeros(3, np.int64)}, r"holds object values"),
        ({"wrong_name": np.zeros((3, 16), np.float32), "labels": np.zeros(3, np.int64)}, r"band_energies"),
        (({"band_energies": np.zeros((3, 16), np.float32), "labels": 1}, np.zeros(3)), r"hold 'labels' too"),
        ([np.zeros((3, 16), np.float32), np.zeros(3)], r"cannot be a list"),
        ({1: np.zeros((3, 16), np.float32), "labels": np.zeros(3, np.int64)}, r"keyed by int 1"),
    ],
)
def test_arrays_get_the_checks_of_an_npz(tmp_path: Path, demo, data, message: str) -> None:
    with pytest.raises(OnnxcalError, match=message):
        api.calibrate(demo[0], data, tmp_path / "out.onnx", options=QUICK)
    assert not (tmp_path / "out.onnx").exists()


def test_api_errors_name_the_keyword_not_the_option(tmp_path: Path, demo) -> None:
    out = tmp_path / "out.onnx"
    out.write_bytes(b"old")
    with pytest.raises(OnnxcalError, match=r"already exists; pass force=True to replace it$") as info:
        api.calibrate(demo[0], DEMO_VAL, out, options=QUICK)
    assert "--force" not in str(info.value)
    assert out.read_bytes() == b"old"


def test_cli_errors_still_name_the_option(tmp_path: Path, run_cli) -> None:
    out = tmp_path / "out.onnx"
    out.write_bytes(b"old")
    r = run_cli("calibrate", str(DEMO_MODEL), "--data", str(DEMO_VAL), "--out", str(out))
    assert r.code == 2 and "pass --force to replace it" in r.err and "force=True" not in r.err


def test_a_modelproto_with_external_data_is_refused(tmp_path: Path, demo) -> None:
    model = onnx.load(DEMO_MODEL)
    onnx.save(model, tmp_path / "ext.onnx", save_as_external_data=True, size_threshold=0, location="ext.data")
    lazy = onnx.load(tmp_path / "ext.onnx", load_external_data=False)
    with pytest.raises(OnnxcalError, match=r"keeps tensor '.*' in an external data file"):
        api.calibrate(lazy, DEMO_VAL, tmp_path / "out.onnx", options=QUICK)
    with pytest.raises(OnnxcalError, match=r"more than max_model_bytes"):
        api.inspect(demo[0], max_model_bytes=1000)


# --------------------------------------------------------------------------
# calibrate's verification sample


def test_calibrate_checks_a_sample_by_default_and_every_row_on_request(tmp_path: Path) -> None:
    sampled = api.calibrate(DEMO_MODEL, DEMO_VAL, tmp_path / "a.onnx", options=QUICK)
    assert sampled.verification.n == api.VERIFY_ROWS < 2000
    (note,) = sampled.verification.notes
    assert f"checked on {api.VERIFY_ROWS} of the 2000 rows" in note and "verify checks every row" in note
    full = api.calibrate(DEMO_MODEL, DEMO_VAL, tmp_path / "b.onnx", options=QUICK, verify_rows=None)
    assert full.verification.n == 2000 and not full.verification.notes
    more = api.calibrate(DEMO_MODEL, DEMO_VAL, tmp_path / "c.onnx", options=QUICK, verify_rows=5000)
    assert more.verification.n == 2000  # a bound above the set: every row
    assert (tmp_path / "a.onnx").read_bytes() == (tmp_path / "b.onnx").read_bytes()
    assert api.verify(tmp_path / "a.onnx", DEMO_VAL).n == 2000  # verify keeps checking everything
    for bad in (0, -3, 2.5, True, "100"):
        with pytest.raises(OnnxcalError, match="verify_rows must be a whole number"):
            api.calibrate(DEMO_MODEL, DEMO_VAL, tmp_path / "d.onnx", verify_rows=bad)


def test_the_sample_is_stratified_seeded_and_holds_the_extreme_rows() -> None:
    rng = np.random.default_rng(1)
    labels = np.repeat(np.arange(6), [5000, 2000, 1000, 500, 20, 1])
    logits = rng.normal(size=(len(labels), 6)).astype(np.float32)
    logits[[7, 4321, 8500]] *= 100.0  # the rows where an overflow or rounding would show first
    keep = np.ones(len(labels), bool)
    keep[4321] = False  # a row with non-finite logits is never checked
    s = verification_sample(labels, logits, keep, 512, seed=0)
    assert s is not None and len(s.positions) == 512 == len(np.unique(s.positions))
    assert {7, 8500} <= set(s.order[: 512 // EXTREME_SHARE].tolist()) and 4321 not in s.positions
    counts = np.bincount(labels[s.positions], minlength=6)
    assert counts.min() >= 1  # every label, the single-row one too
    share = counts[:4] / counts[:4].sum()
    np.testing.assert_allclose(share, np.array([5000, 2000, 1000, 500]) / 8500, atol=0.03)  # proportional
    again = verification_sample(labels, logits, keep, 512, seed=0)
    np.testing.assert_array_equal(again.order, s.order)
    assert not np.array_equal(verification_sample(labels, logits, keep, 512, seed=1).order, s.order)
    # the identity check's quarter: the extreme rows first, then one of each label
    first = s.identity_positions
    assert len(first) == 128 and {7, 8500} <= set(first.tolist())
    assert set(labels[first].tolist()) == set(range(6))
    assert verification_sample(labels, logits, keep, None) is None
    assert verification_sample(labels, logits, keep, len(labels)) is None
    multilabel = (rng.random((3000, 4)) < 0.2).astype(np.uint8)
    m = verification_sample(multilabel, logits[:3000, :4], keep[:3000], 100)
    assert m is not None and len(m.positions) == 100


def test_cli_verify_rows_and_verify_all(tmp_path: Path, run_cli) -> None:
    base = ("calibrate", str(DEMO_MODEL), "--data", str(DEMO_VAL), "--bootstrap", "0", "--json")
    import json

    sampled = json.loads(run_cli(*base, "--out", str(tmp_path / "a.onnx"), "--verify-rows", "100").out)
    assert sampled["verify"]["n"] == 100 and "checked on 100 of the 2000 rows" in sampled["verify"]["notes"][0]
    full = json.loads(run_cli(*base, "--out", str(tmp_path / "b.onnx"), "--verify-all").out)
    assert full["verify"]["n"] == 2000 and full["verify"]["notes"] == []


def test_a_model_with_many_score_rows_per_sample_is_checked_on_every_row(tmp_path: Path) -> None:
    """A segmentation head (one score row per pixel): the sample is of rows of logits, which are not
    samples of the data, so calibrate checks every row."""
    from onnx import TensorProto, helper, numpy_helper

    rng = np.random.default_rng(0)
    w = numpy_helper.from_array(rng.normal(size=(4, 2, 1, 1)).astype(np.float32), "w")
    graph = helper.make_graph(
        [helper.make_node("Conv", ["x", "w"], ["logits"])], "seg",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", 2, 3, 3])],
        [helper.make_tensor_value_info("logits", TensorProto.FLOAT, ["N", 4, 3, 3])], [w],
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    x = rng.normal(size=(60, 2, 3, 3)).astype(np.float32)
    labels = rng.integers(0, 4, size=(60, 3, 3))
    got = api.calibrate(model, {"x": x, "labels": labels}, tmp_path / "seg.onnx", options=QUICK, verify_rows=50)
    assert got.patch is not None and got.verification.passed
    assert got.verification.n == 60 and not got.verification.notes
