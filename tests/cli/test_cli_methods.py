"""Every calibration method end to end through the CLI, on models real exporters wrote from open data.

Multiclass: skl2onnx's MLP on scikit-learn's digits features (10 classes,
a Softmax head, 300 validation rows); binary: a torch.onnx CNN with one
logit and a Sigmoid on scikit-learn's digits images (odd or even, 300
rows). For each method: ``fit`` (held-out report, bootstrap intervals,
FIT.json), ``patch``, ``verify`` against the *original* model run by
onnxruntime (not onnxcal's reading of it), ``report``, then ``calibrate``
in one go; ``--method auto`` on both.
"""

from __future__ import annotations

import json

import numpy as np
import onnxruntime as ort
import pytest
import scipy.special
from conftest import FIXTURES

from onnxcal.choose import IDENTITY, candidate_methods
from onnxcal.scaling import Scaling

EXPORTERS = FIXTURES / "exporters"
MULTICLASS = (EXPORTERS / "skl2onnx_mlp_tensor.onnx", EXPORTERS / "digits_features_val.npz", "probabilities")
BINARY = (EXPORTERS / "torch_script_cnn_sigmoid_binary_op17.onnx", EXPORTERS / "digits_images_odd_val.npz",
          "probability")
# ovr-platt on one logit is Platt scaling; it is run here too (auto leaves it out).
CASES = [(m, MULTICLASS) for m in candidate_methods("multiclass")[1:]] + [
    (m, BINARY) for m in (*candidate_methods("binary")[1:], "ovr-platt")
]
IDS = [f"{m}-{'binary' if case is BINARY else 'multiclass'}" for m, case in CASES]


def _capture(run_cli, tmp_path, model, data):
    cap = tmp_path / "cap.npz"
    r = run_cli("capture", model, "--data", data, "--out", cap, "-q")
    assert r.code == 0, r.err
    return cap


def _run(path, output: str, data) -> np.ndarray:
    sess = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])
    x = np.load(data)
    feed = {sess.get_inputs()[0].name: x[next(k for k in x.files if k != "labels")]}
    return sess.run([output], feed)[0].astype(np.float64)


@pytest.mark.parametrize(("method", "case"), CASES, ids=IDS)
def test_fit_patch_verify_report(tmp_path, run_cli, method, case):
    model, data, output = case
    cap = _capture(run_cli, tmp_path, model, data)
    fit = tmp_path / "fit.json"
    r = run_cli("fit", cap, "--method", method, "--bootstrap", "5", "--out", fit)
    assert r.code == 0, r.err
    assert "held-out samples" in r.out and "95% interval" in r.out
    saved = json.loads(fit.read_text())
    assert saved["method"] == method and saved["intervals"]["after"]["nll"] is not None
    if method in ("isotonic", "histogram"):
        assert "can change the ranking of the classes and the argmax" in r.out
    patched = tmp_path / "patched.onnx"
    r = run_cli("patch", model, "--fit", fit, "--out", patched)
    assert r.code == 0, r.err
    # The patched model's own output against the NumPy reference of the map on the logits the
    # exporter's original model gives (the capture holds them; the map's probabilities are computed here).
    logits = np.load(cap)["logits"].astype(np.float64)
    scaling = Scaling(saved["method"], saved["parameters"], saved["kind"])
    got = _run(patched, output, data)
    want = scaling.probabilities(logits)
    want = want[:, 0] if got.ndim == 1 else (np.c_[1 - want,
                                                   want] if got.shape[1] == 2 and want.shape[1] == 1 else want)
    np.testing.assert_allclose(got.reshape(want.shape), want, atol=1e-5)
    r = run_cli("verify", patched, "--data", data, "--original", model, "--json")
    assert r.code == 0, r.out
    checks = {c["name"]: c for c in json.loads(r.out)["checks"]}
    assert checks["reference"]["status"] == "pass" and checks["record"]["status"] == "pass"
    assert checks["source"]["status"] == "pass"
    decision = checks.get("argmax") or checks["decisions"]
    assert decision["status"] == "pass"
    if method in ("isotonic", "histogram"):
        assert "not against the original model" in decision["detail"]
    report = tmp_path / "report"
    r = run_cli("report", cap, "--fit", fit, "--out", report)
    assert r.code == 0, r.err
    assert method in (report / "summary.md").read_text().lower()


@pytest.mark.parametrize("case", [MULTICLASS, BINARY], ids=["multiclass", "binary"])
def test_auto_chooses_and_says_why(tmp_path, run_cli, case):
    model, data, output = case
    cap = _capture(run_cli, tmp_path, model, data)
    fit = tmp_path / "fit.json"
    r = run_cli("fit", cap, "--method", "auto", "--bootstrap", "8", "--out", fit)
    assert r.code == 0, r.err
    saved = json.loads(fit.read_text())
    choice = saved["choice"]
    kind = "binary" if case is BINARY else "multiclass"
    assert [c["method"] for c in choice["candidates"]] == [IDENTITY, *candidate_methods(kind)]
    assert saved["method"] == _baked(choice) and saved["options"]["method"] == "auto"
    assert "--method auto: every applicable method" in r.out and "chosen: " in r.out
    # The rule, checked on the table FIT.json holds.
    _check_rule(choice)
    assert choice["basis"] == "cross-fitted" and choice["replicates"] == 8
    # calibrate --method auto without a bootstrap: the paired intervals are normal approximations, said so;
    # the record keeps the choice; the report shows the table.
    out = tmp_path / "calibrated.onnx"
    r = run_cli("calibrate", model, "--data", data, "--out", out, "--method", "auto", "--bootstrap", "0",
                "--report", tmp_path / "rep", "--quiet")
    assert r.code == 0, r.err
    r = run_cli("inspect", out, "--json")
    record = json.loads(r.out)["record"]
    kept = record["fit"]["choice"]
    assert _baked(kept) == record["method"] and kept["replicates"] == 0
    _check_rule(kept)
    assert "How the method was chosen" in (tmp_path / "rep" / "report.html").read_text()


def _baked(choice: dict) -> str:
    """The method baked in: the chosen one, or temperature (T = 1) for the model as it is."""
    return "temperature" if choice["chosen"] == IDENTITY else choice["chosen"]


def _check_rule(choice: dict) -> None:
    """The map with the lowest cross-fitted NLL is the best; the chosen one has the fewest parameters among the
    best and the maps whose paired NLL difference interval reaches 0 (or is the model as it is, with every map's
    NLL above its own)."""
    cands = {c["method"]: c for c in choice["candidates"]}
    model = cands.pop(IDENTITY)
    assert model["n_parameters"] == 0
    best = min(cands.values(), key=lambda c: c["metrics"]["nll"])
    assert choice["best"] == best["method"] and best["difference"] is None
    if choice["chosen"] == IDENTITY:
        assert all(c["metrics"]["nll"] > model["metrics"]["nll"] for c in cands.values())
        return
    within = [best, *(c for c in cands.values() if c["difference"] is not None and c["difference"][0] <= 1e-12)]
    assert cands[choice["chosen"]]["n_parameters"] == min(c["n_parameters"] for c in within)


def test_smoothed_targets_through_the_cli(tmp_path, run_cli):
    model, data, output = MULTICLASS
    cap = _capture(run_cli, tmp_path, model, data)
    fits = {}
    for flag in ((), ("--smoothed-targets",)):
        fit = tmp_path / f"fit{len(flag)}.json"
        r = run_cli("fit", cap, "--bootstrap", "0", "--out", fit, *flag)
        assert r.code == 0, r.err
        fits[bool(flag)] = json.loads(fit.read_text())
    assert fits[True]["options"]["smoothed_targets"] and not fits[False]["options"]["smoothed_targets"]
    # Platt's targets ask for less than certainty: the smoothed fit is the softer one (a higher T)
    assert fits[True]["temperature"] > fits[False]["temperature"]
    out = tmp_path / "patched.onnx"
    r = run_cli("patch", model, "--fit", tmp_path / "fit1.json", "--out", out)
    assert r.code == 0, r.err
    # reference: the original model run by onnxruntime, its probabilities tempered with scipy
    with np.errstate(divide="ignore"):
        log_p = np.log(_run(model, output, data))
    want = scipy.special.softmax(log_p / fits[True]["temperature"], axis=1)
    assert np.allclose(_run(out, output, data), want, atol=1e-5)
