"""The whole job through the Python API: the stage functions one after another, binary and multi-label
models, the package's top-level functions and the notebook-style example."""

import re

import numpy as np
import onnx
import onnxruntime as ort
import pytest
from conftest import (
    DEMO_MODEL,
    DEMO_TEST,
    DEMO_VAL,
    random_mlp,
)

from onnxcal import api, graph
from onnxcal.fit import FitOptions


def test_capture_fit_patch_verify_files(tmp_path):
    cap = api.capture(DEMO_MODEL, DEMO_VAL, out=tmp_path / "c.npz")
    summary = api.fit(tmp_path / "c.npz", out=tmp_path / "fit.json")
    assert summary.temperature == pytest.approx(api.fit(cap).temperature, rel=1e-12)
    res = api.patch(DEMO_MODEL, tmp_path / "p.onnx", fit=tmp_path / "fit.json")
    assert res.record.temperature == summary.temperature
    assert res.record.fit["metrics"]["after"]["ece"] == summary.after.ece
    assert api.verify(tmp_path / "p.onnx", DEMO_VAL, original=DEMO_MODEL).passed


def _labelled(tmp_path, rng, model, name, make_labels):
    """Save ``model`` and a set whose labels are drawn from its own logits."""
    x = rng.normal(size=(1500, 6)).astype(np.float32)
    site = graph.find_scores(model)
    (z,) = ort.InferenceSession(
        graph.expose(model, [site.scores]).SerializeToString(), providers=["CPUExecutionProvider"]
    ).run([site.scores], {"x": x})
    onnx.save(model, tmp_path / f"{name}.onnx")
    np.savez(tmp_path / f"{name}.npz", x=x, labels=make_labels(z))
    return tmp_path / f"{name}.onnx", tmp_path / f"{name}.npz"


@pytest.mark.parametrize("final, method", [(None, "platt"), ("Sigmoid", "platt"), (None, "temperature"),
                                           ("Sigmoid", "temperature")])
def test_binary_single_logit_end_to_end(tmp_path, rng, final, method):
    model = random_mlp(rng, k=1, scale=3.0, final=final)
    # Labels from sigmoid(z / 2 - 0.5): the model is overconfident and biased.
    path, data = _labelled(
        tmp_path, rng, model, "binary", lambda z: (rng.random(len(z)) < 1 / (1 + np.exp(-(z[:,
                                                                                            0] / 2 - 0.5)))).astype(int)
    )
    cap = api.capture(path, data, out=tmp_path / "cap.npz")
    summary = api.fit(tmp_path / "cap.npz", out=tmp_path / "fit.json", options=FitOptions(method=method, bootstrap=20))
    assert summary.scaling.kind == "binary" and summary.after.nll < summary.before.nll
    res = api.patch(path, tmp_path / "p.onnx", fit=tmp_path / "fit.json")
    assert res.record.activation == "sigmoid" and res.record.method == method
    check = api.verify(tmp_path / "p.onnx", data, original=path)
    assert check.passed, check.to_dict()
    assert {c.name for c in check.checks} >= {"reference", "decisions", "record"}
    assert cap.labels.ndim == 1


@pytest.mark.parametrize("mode", ["shared", "per-label"])
def test_multilabel_sigmoid_end_to_end(tmp_path, rng, mode):
    model = random_mlp(rng, k=3, scale=3.0, final="Sigmoid")
    t = np.array([0.7, 1.5, 3.0])
    path, data = _labelled(
        tmp_path, rng, model, "tags", lambda z: (rng.random(z.shape) < 1 / (1 + np.exp(-z / t))).astype(np.uint8)
    )
    result = api.calibrate(path, data, tmp_path / "p.onnx", options=FitOptions(multilabel=mode, bootstrap=10))
    assert result.verification.passed and result.patch is not None
    params = result.patch.record.parameters["temperature"]
    if mode == "per-label":
        np.testing.assert_allclose(params, t, rtol=0.35)
    else:
        assert isinstance(params, float)
    assert result.summary.after.kind == "multilabel"
    assert api.verify(tmp_path / "p.onnx", data).passed


def test_top_level_functions_are_the_api():
    import importlib

    import onnxcal

    for name in ("capture", "fit", "patch", "verify", "report", "calibrate", "inspect"):
        assert getattr(onnxcal, name) is getattr(api, name), name
        assert getattr(onnxcal, name).__doc__, name
    # The stage modules stay importable by their dotted names.
    from onnxcal.capture import Capture
    from onnxcal.fit import FitOptions as Options
    from onnxcal.verify import Check

    assert importlib.import_module("onnxcal.fit").summarize and Options is FitOptions
    assert importlib.import_module("onnxcal.capture").Capture is Capture and Check


def test_top_level_functions_run_the_job(tmp_path):
    import onnxcal

    cap = onnxcal.capture(DEMO_MODEL, DEMO_VAL)
    summary = onnxcal.fit(cap, options=FitOptions(bootstrap=0))
    patched = onnxcal.patch(DEMO_MODEL, tmp_path / "p.onnx", fit=summary)
    checked = onnxcal.verify(patched.path, DEMO_TEST, max_ece=0.1, original=DEMO_MODEL)  # not beside it
    assert checked.passed and checked.reference_from == "original"
    written = onnxcal.report(cap, tmp_path / "r", fit=summary, formats="json")
    assert written.content["metrics"]["after"]["ece"] == pytest.approx(summary.after.ece, rel=1e-12)


def test_notebook_style_example_runs(tmp_path):
    # docs/calibrate_in_python.py, run as its header says: from a directory holding fixtures/.
    import subprocess
    import sys

    from conftest import FIXTURES, ROOT

    (tmp_path / "fixtures").symlink_to(FIXTURES)
    r = subprocess.run([sys.executable, str(ROOT / "docs" / "calibrate_in_python.py")], cwd=tmp_path,
                       capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    assert re.search(r"T = 3\.4\d+ \(fit-part 95% interval", r.stdout)
    assert "verify: all checks passed" in r.stdout and "checks passed: True" in r.stdout
    assert "ECE fell" in r.stdout
    # the model and the arrays in memory give the fit of the files
    assert re.search(r"T = 3\.4136; the patched model was checked on 256 of the 2000 rows", r.stdout), r.stdout
    out = tmp_path / "calibration-demo"
    for name in ("scores.npz", "fit.json", "calibrated.onnx", "verify.xml", "report/report.html",
                 "report/summary.md", "report_again/report.json", "calibrated_again.onnx", "calibrated_in_memory.onnx"):
        assert (out / name).is_file(), name
