"""Decision outputs end to end: calibrate / patch choose the thresholds, the model carries them, verify gates.

The claim under test (issue 16): thresholds chosen on the held-out rows of
the validation set hold on a test split the pipeline never saw. Checked on
the demo and on scikit-learn's bundled handwritten digits (a logistic
regression fitted with scikit-learn, written as ONNX with onnx.helper), by
counting on the test split with the written model run in onnxruntime and
scipy's exact binomial interval (scipy.stats.binomtest, Clopper-Pearson), not
with onnxcal's own gate.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import onnx
import onnxruntime as ort
import pytest
from conftest import DEMO_MODEL, DEMO_TEST, DEMO_VAL, random_mlp, save_model
from digits_model import make_digits
from scipy import stats

from onnxcal import api, graph
from onnxcal.decisions import conditional_coverage_floor
from onnxcal.decisions.plan import DecisionOptions
from onnxcal.fit import FitOptions

FAST = FitOptions(holdout=0.5, bootstrap=0)
DECIDE = DecisionOptions(accept_error=0.05, set_coverage=0.9)


def _run(path: Path, data: Path) -> tuple[dict[str, np.ndarray], np.ndarray]:
    sess = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])
    arrays = np.load(data)
    feeds = {i.name: arrays[i.name] for i in sess.get_inputs()}
    names = [o.name for o in sess.get_outputs()]
    return dict(zip(names, sess.run(None, feeds), strict=True)), arrays["labels"]


def _holds(out: dict[str, np.ndarray], labels: np.ndarray, record: graph.Record) -> dict[str, Any]:
    """Error among accepted and set coverage on the test split, with scipy's exact 95 % intervals."""
    p = out[record.output]
    accepted = out["accept"]
    wrong = int(np.sum(p.argmax(axis=1)[accepted] != labels[accepted]))
    error_ci = stats.binomtest(wrong, int(accepted.sum())).proportion_ci(0.95, method="exact")
    covered = int(out["class_set"][np.arange(len(labels)), labels].sum())
    coverage_ci = stats.binomtest(covered, len(labels)).proportion_ci(0.95, method="exact")
    return {"accepted": int(accepted.sum()), "error_ci": error_ci, "coverage_ci": coverage_ci}


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, api.CalibrateResult]:
    out = tmp_path_factory.mktemp("decisions") / "demo_decisions.onnx"
    result = api.calibrate(DEMO_MODEL, DEMO_VAL, out, options=FAST, decisions=DECIDE)
    return out, result


def test_demo_thresholds_hold_on_the_test_split(demo: tuple[Path, api.CalibrateResult]) -> None:
    path, result = demo
    assert result.verification.passed and result.patch is not None
    names = {c.name for c in result.verification.checks}
    assert {"decision-record", "decision-outputs", "decision-reference"} <= names
    record = graph.read_record(onnx.load(str(path)))
    out, labels = _run(path, DEMO_TEST)
    held = _holds(out, labels, record)
    assert held["accepted"] > 0.2 * len(labels)
    assert held["error_ci"].low <= DECIDE.accept_error  # not wholly above epsilon
    floor = conditional_coverage_floor(record.decisions["class_set"]["n"][0], 0.1)
    assert held["coverage_ci"].high >= floor  # not wholly below the floor
    np.testing.assert_array_equal(out["class_set_size"], out["class_set"].sum(axis=1))


def test_the_fit_part_map_is_baked_in_and_the_record_says_where_the_rows_came_from(
    demo: tuple[Path, api.CalibrateResult],
) -> None:
    path, result = demo
    record = graph.read_record(onnx.load(str(path)))
    fit_part = record.fit["split"]["fit_part"]["parameters"]
    assert record.parameters == fit_part  # not the refit on all rows
    assert any("map baked in is the one fitted on the other" in n for n in result.summary.notes)
    assert not any(n.startswith("the parameters baked in are refitted") for n in result.summary.notes)
    rows = record.decisions["rows"]
    assert rows["source"] == "holdout" and rows["n"] == result.summary.split["n_holdout"]
    assert record.decisions["accept"]["threshold"] == result.decisions.accept_threshold
    assert record.decisions["initializers"]["accept"] == "onnxcal_accept_threshold"


GATES = [("0.5", "pass", 0), ("0.001", "fail", 1), (None, "undecided", 0)]


@pytest.mark.parametrize(("target", "status", "code"), GATES)
def test_verify_gates(demo: tuple[Path, api.CalibrateResult], run_cli: Any, target: str | None, status: str,
                      code: int) -> None:
    path, _ = demo
    if target is None:  # the measured rate itself: its interval straddles it
        probe = api.verify(path, DEMO_TEST)
        target = repr(next(c for c in probe.checks if c.name == "accept-error").value)
    r = run_cli("verify", str(path), "--data", str(DEMO_TEST), "--accept-error", target, "--json")
    assert r.code == code, r.err
    checks = {c["name"]: c for c in json.loads(r.out)["checks"]}
    assert checks["accept-error"]["status"] == status
    assert checks["decision-outputs"]["status"] == "pass"


def test_digits_thresholds_hold_on_the_test_split(tmp_path: Path) -> None:
    digits = make_digits(tmp_path)
    original, _ = _run(digits.model, digits.test)
    # the ONNX model gives scikit-learn's own predict_proba (the exporting framework's outputs)
    np.testing.assert_allclose(original["probabilities"], digits.test_probabilities, atol=1e-5)
    out_path = tmp_path / "digits_decisions.onnx"
    decide = DecisionOptions(accept_error=0.05, set_coverage=0.9, set_score="aps")
    result = api.calibrate(digits.model, digits.val, out_path, options=FAST, decisions=decide)
    assert result.verification.passed and result.decisions.accept[0].found
    record = graph.read_record(onnx.load(str(out_path)))
    out, labels = _run(out_path, digits.test)
    held = _holds(out, labels, record)
    assert held["error_ci"].low <= 0.05
    floor = conditional_coverage_floor(record.decisions["class_set"]["n"][0], 0.1)
    assert held["coverage_ci"].high >= floor
    assert out["class_set"][np.arange(len(labels)), out[record.output].argmax(axis=1)].all()  # APS: top class in
    gated = {c.name: c.status for c in api.verify(out_path, digits.test).checks}
    assert gated["accept-error"] != "fail" and gated["set-coverage"] != "fail"
    # the calibrated probabilities and their argmax are those of the same map without decision outputs
    plain = api.patch(digits.model, tmp_path / "plain.onnx", fit=result.summary)
    plain_out, _ = _run(Path(plain.path), digits.test)
    np.testing.assert_array_equal(plain_out[record.output], out[record.output])


def test_separate_set_keeps_the_refit_and_patch_chooses_on_it(tmp_path: Path) -> None:
    result = api.calibrate(DEMO_MODEL, DEMO_VAL, tmp_path / "a.onnx", options=FitOptions(holdout=0, bootstrap=0),
                           decisions=DecisionOptions(set_coverage=0.8, set_per_class=True), decision_data=DEMO_TEST)
    record = graph.read_record(onnx.load(str(tmp_path / "a.onnx")))
    assert record.decisions["rows"]["source"] == "separate" and record.decisions["rows"]["n"] == 2000
    assert record.parameters == dict(result.summary.scaling.parameters)
    patched = api.patch(DEMO_MODEL, tmp_path / "b.onnx", temperature=2.0,
                        decisions=DecisionOptions(accept_error=0.1), decision_data=DEMO_VAL)
    assert patched.decisions is not None and patched.record.decisions["rows"]["source"] == "separate"
    # re-patching without the options removes the decision outputs with the old patch
    again = api.patch(tmp_path / "b.onnx", tmp_path / "c.onnx", temperature=1.5)
    outputs = [o.name for o in onnx.load(str(again.path)).graph.output]
    assert "accept" not in outputs and not again.record.decisions


def test_report_shows_the_risk_coverage_curve_and_the_set_sizes(tmp_path: Path) -> None:
    result = api.calibrate(DEMO_MODEL, DEMO_VAL, tmp_path / "m.onnx", options=FAST, decisions=DECIDE,
                           report=tmp_path / "rep")
    content = json.loads((tmp_path / "rep" / "report.json").read_text())
    d = content["decisions"]
    chosen = result.decisions.accept[0]
    n = result.summary.split["n_holdout"]
    assert d["n"] == n and sum(d["class_set"]["sizes"]) == n
    # the curve's point at tau: the rows the threshold accepted when it was chosen (the float64 reference
    # may put a row lying on tau on the other side, hence the one-row slack)
    assert abs(d["accept"]["at_threshold"]["coverage"] - chosen.accepted.rate) <= 1 / n
    curve = d["accept"]["curve"]
    assert curve["coverage"] == sorted(curve["coverage"]) and curve["coverage"][-1] == 1.0
    assert "decisions.png" in {p.name for p in (tmp_path / "rep").iterdir()}
    html = (tmp_path / "rep" / "report.html").read_text()
    assert 'id="decisions"' in html and "licensed professionals" in html and "risk-coverage" in html
    assert "not refitted" in content["metrics"]["description"]


@pytest.mark.parametrize("labels_per_row", [1, 3], ids=["one-sigmoid", "multi-label"])
def test_sigmoid_heads(tmp_path: Path, labels_per_row: int) -> None:
    """Labels drawn from the model's own probabilities (so it is calibrated): the gates must not fail."""
    rng = np.random.default_rng(16 + labels_per_row)
    model = random_mlp(rng, k=labels_per_row, final="Sigmoid")
    save_model(model, tmp_path / "m.onnx")
    x = rng.normal(size=(3000, 6)).astype(np.float32)
    sess = ort.InferenceSession(str(tmp_path / "m.onnx"), providers=["CPUExecutionProvider"])
    p = sess.run(None, {"x": x})[0]
    y = (rng.random(p.shape) < p).astype(np.int64)
    y = y[:, 0] if labels_per_row == 1 else y
    np.savez(tmp_path / "val.npz", x=x[:2000], labels=y[:2000])
    np.savez(tmp_path / "test.npz", x=x[2000:], labels=y[2000:])
    decide = DecisionOptions(accept_error=0.1, set_coverage=0.9 if labels_per_row == 1 else None)
    result = api.calibrate(tmp_path / "m.onnx", tmp_path / "val.npz", tmp_path / "out.onnx", options=FAST,
                           decisions=decide)
    assert result.verification.passed and len(result.decisions.accept) == labels_per_row
    out, labels = _run(tmp_path / "out.onnx", tmp_path / "test.npz")
    assert out["accept"].shape == ((1000,) if labels_per_row == 1 else (1000, 3))
    if labels_per_row == 1:
        assert out["class_set"].shape == (1000, 2)
    checks = {c.name: c for c in api.verify(tmp_path / "out.onnx", tmp_path / "test.npz").checks}
    assert checks["decision-outputs"].status == "pass" and checks["accept-error"].status != "fail"
