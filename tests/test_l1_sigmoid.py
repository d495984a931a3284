"""L1-normalised sigmoids, p = L1(sigmoid(z / T)): the NLL and its derivatives, the fit, its summary.

References it does not compute: scipy.special (expit, log_expit, logsumexp)
for the map and the NLL, scipy.optimize (approx_fprime for the derivatives,
minimize_scalar for the fit), scikit-learn's log_loss and the framework's own
logits of the real fixtures (fixtures/exporters/, torch).
"""

from __future__ import annotations

import json
from dataclasses import replace

import numpy as np
import onnxruntime as ort
import pytest
import scipy.optimize
import scipy.special
from conftest import FIXTURES
from sklearn.metrics import log_loss

import onnxcal
from onnxcal import graph
from onnxcal.errors import OnnxcalError
from onnxcal.fit import FitOptions, summarize, summary_from_dict
from onnxcal.fit.l1 import fit_temperature_l1
from onnxcal.l1_sigmoid import nll_terms
from onnxcal.metrics import evaluate
from onnxcal.resample import split_holdout
from onnxcal.scaling import Scaling

EXPORTERS = FIXTURES / "exporters"
L1_FIXTURES = ["torch_script_cnn_sigmoid_l1_op17", "torch_dynamo_cnn_sigmoid_l1_op18"]


def l1(z: np.ndarray, t: float = 1.0) -> np.ndarray:
    s = scipy.special.expit(z / t)  # scipy.special.expit: the logistic sigmoid
    return s / s.sum(axis=1, keepdims=True)


def scipy_nll(z: np.ndarray, y: np.ndarray, beta: float) -> float:
    """Mean NLL of L1(sigmoid(beta z)) in log space (scipy.special.log_expit, logsumexp)."""
    s = scipy.special.log_expit(beta * z)
    log_p = s - scipy.special.logsumexp(s, axis=1, keepdims=True)
    return float(-log_p[np.arange(len(y)), y].mean())


def scipy_fit(z: np.ndarray, y: np.ndarray) -> float:
    """T by scipy.optimize.minimize_scalar (bounded, on log T) of that NLL."""
    res = scipy.optimize.minimize_scalar(lambda u: scipy_nll(z, y, np.exp(-u)), bounds=(np.log(0.01), np.log(100)),
                                         method="bounded", options={"xatol": 1e-10})
    return float(np.exp(res.x))


@pytest.fixture(scope="module")
def data() -> tuple[np.ndarray, np.ndarray]:
    """Over-confident logits: labels drawn from L1(sigmoid(z / 2.5))."""
    rng = np.random.default_rng(11)
    z = rng.normal(scale=4.0, size=(3000, 6)) + rng.normal(size=(3000, 1))
    p = l1(z, 2.5)
    y = (rng.random(len(z))[:, None] > np.cumsum(p, axis=1)).sum(axis=1)
    return z, y


@pytest.mark.parametrize("beta", [0.05, 0.7, 3.0, 40.0])
def test_nll_and_its_derivatives_match_scipy(data, beta):
    z, y = data[0][:200], data[1][:200]
    f, g, h = nll_terms(z, y, beta, order=2)
    # The NLL against -log of the L1-normalised expit (scipy.special), per row.
    want = -np.log(l1(z * beta)[np.arange(len(y)), y])
    np.testing.assert_allclose(f, want, rtol=1e-9, atol=1e-12)
    assert np.mean(f) == pytest.approx(scipy_nll(z, y, beta), rel=1e-12)
    # First and second beta-derivatives against central differences (scipy.optimize.approx_fprime).
    eps = 1e-6 * beta
    grad = scipy.optimize.approx_fprime([beta], lambda b: np.mean(nll_terms(z, y, b[0], 0)[0]), eps)
    assert np.mean(g) == pytest.approx(grad[0], rel=1e-4, abs=1e-6)
    curv = scipy.optimize.approx_fprime([beta], lambda b: np.mean(nll_terms(z, y, b[0], 1)[1]), eps)
    assert np.mean(h) == pytest.approx(curv[0], rel=1e-4, abs=1e-6)


def test_nll_stays_finite_where_every_sigmoid_underflows():
    z = np.array([[-900.0, -1000.0, -950.0]])
    (f,) = nll_terms(z, np.array([0]), 1.0, order=0)
    # log-space: p = softmax(log sigmoid(z)) = softmax(z) here, exactly (scipy.special.log_softmax)
    assert f[0] == pytest.approx(-scipy.special.log_softmax(z, axis=1)[0, 0], rel=1e-12)


def test_fit_equals_scipy_minimize_scalar(data):
    z, y = data
    res = fit_temperature_l1(z, y)
    assert res.scaling.kind == "sigmoid-l1" and res.converged and not res.on_bound
    assert res.temperature == pytest.approx(scipy_fit(z, y), rel=1e-6)
    assert 2.0 < res.temperature < 3.0  # the labels were drawn at T = 2.5
    # A warm start (bootstrap replicates) finds the same optimum; rows and integer weights act as repeated rows.
    assert fit_temperature_l1(z, y, start=1.1).temperature == pytest.approx(res.temperature, rel=1e-6)
    rows = np.arange(0, len(z), 3)
    w = np.random.default_rng(2).integers(0, 4, len(rows))
    weighted = fit_temperature_l1(z, y, rows=rows, weights=w).temperature
    assert weighted == pytest.approx(scipy_fit(np.repeat(z[rows], w, axis=0), np.repeat(y[rows], w)), rel=1e-6)


def test_evaluate_scores_the_normalised_sigmoids(data):
    z, y = data
    t = 2.2
    m = evaluate(z, y, Scaling.of_temperature(t, "sigmoid-l1"))
    p = l1(z, t)
    assert m.nll == pytest.approx(log_loss(y, p, labels=range(6)), rel=1e-9)  # sklearn.metrics.log_loss
    assert m.brier == pytest.approx(np.mean(((p - np.eye(6)[y]) ** 2).sum(axis=1)), rel=1e-9)
    assert m.accuracy == pytest.approx(np.mean(p.argmax(axis=1) == y))


def test_summary_holds_out_bootstraps_and_round_trips(data):
    z, y = data
    options = FitOptions(holdout=0.25, bootstrap=30, seed=3)
    s = summarize(z, y, {"fit_as": "sigmoid-l1"}, options)
    fit_rows, eval_rows = split_holdout(y, 0.25, 3)
    t_part = s.holdout_result.temperature
    assert t_part == pytest.approx(scipy_fit(z[fit_rows], y[fit_rows]), rel=1e-6)
    assert s.temperature == pytest.approx(scipy_fit(z, y), rel=1e-6)
    assert s.basis == "held-out" and s.scaling.kind == "sigmoid-l1"
    # held-out figures: the model's own map before, the fit part's T after (sklearn.metrics.log_loss)
    assert s.before.nll == pytest.approx(log_loss(y[eval_rows], l1(z[eval_rows]), labels=range(6)), rel=1e-9)
    assert s.after.nll == pytest.approx(log_loss(y[eval_rows], l1(z[eval_rows], t_part), labels=range(6)), rel=1e-9)
    assert s.after.nll < s.before.nll
    iv = s.intervals
    low, high = iv["parameters"]["temperature"][0], iv["parameters"]["temperature"][1]
    assert iv["replicates_by"] == "exact" and low < t_part < high
    back = summary_from_dict(json.loads(json.dumps(s.to_dict())))
    assert back.scaling == s.scaling and back.holdout_result.scaling.kind == "sigmoid-l1"


def test_other_methods_are_refused(data):
    with pytest.raises(OnnxcalError, match="--method vector does not apply to L1-normalised sigmoids"):
        summarize(data[0], data[1], {"fit_as": "sigmoid-l1"}, FitOptions(method="vector", bootstrap=0))


# -- the real fixtures: capture file, report, a misread head ------------------


def _run(path, name: str) -> np.ndarray:
    with np.load(EXPORTERS / "digits_images_val.npz") as npz:
        x = npz["image"].astype(np.float32)
    return ort.InferenceSession(str(path), providers=["CPUExecutionProvider"]).run([name], {"image": x})[0]


def _framework(name: str) -> tuple[np.ndarray, np.ndarray]:
    with np.load(EXPORTERS / f"{name}_reference.npz") as npz:
        z = npz["logits"].astype(np.float64)  # torch's own pre-sigmoid logits
    with np.load(EXPORTERS / "digits_images_val.npz") as npz:
        return z, npz["labels"]


@pytest.mark.parametrize("name", L1_FIXTURES)
def test_calibrate_with_report_on_the_framework_logits(name, tmp_path):
    model, val = EXPORTERS / f"{name}.onnx", EXPORTERS / "digits_images_val.npz"
    cap_path = tmp_path / "cap.npz"
    cap = onnxcal.capture(model, val, out=cap_path)
    assert cap.meta.fit_as == "sigmoid-l1"
    options = FitOptions(holdout=0.25, bootstrap=20, seed=0)
    fitted = onnxcal.fit(cap_path, options=options)  # read back from the file: class labels kept
    z, y = _framework(name)
    fit_rows, eval_rows = split_holdout(y, 0.25, 0)
    assert fitted.temperature == pytest.approx(scipy_fit(z, y), rel=1e-3)
    out = tmp_path / "calibrated.onnx"
    result = onnxcal.calibrate(model, val, out, options=options, report=tmp_path / "report")
    assert result.patch is not None and result.summary.temperature == pytest.approx(fitted.temperature, rel=1e-9)
    report = json.loads((tmp_path / "report" / "report.json").read_text())
    assert report["calibration"]["kind"] == "sigmoid-l1"
    assert "L1(sigmoid(z / T))" in report["calibration"]["description"]
    # Held-out figures: before = the original model's own output (onnxruntime), after = the framework's
    # logits through the fit part's T (sklearn.metrics.log_loss).
    own = _run(model, "probabilities").astype(np.float64)
    own /= own.sum(axis=1, keepdims=True)  # float32 rows sum to 1 within rounding
    assert report["metrics"]["before"]["nll"] == pytest.approx(log_loss(y[eval_rows], own[eval_rows], labels=range(10)),
                                                               rel=1e-4)
    t_part = result.summary.holdout_result.temperature
    want = log_loss(y[eval_rows], l1(z[eval_rows], t_part), labels=range(10))
    assert report["metrics"]["after"]["nll"] == pytest.approx(want, rel=1e-4)
    np.testing.assert_allclose(_run(out, "probabilities"), l1(z, result.summary.temperature), atol=1e-5, rtol=0)


@pytest.mark.parametrize("name", L1_FIXTURES)
@pytest.mark.parametrize("misreading", ["normalisation-missed", "layer-input-scaled"])
def test_a_misread_normalised_sigmoid_fails_verify(name, misreading, tmp_path):
    """The head forced through the API read wrongly: verify's reference (from a fresh reading of the
    original) or its identity check fails, and the sentence says what was found."""
    model_path, val = EXPORTERS / f"{name}.onnx", EXPORTERS / "digits_images_val.npz"
    model = graph.load_model(model_path)
    site = graph.find_scores(model)
    if misreading == "normalisation-missed":  # read as K independent sigmoids
        wrong = replace(site, post=())
    else:  # the scaling fed into the last layer's input instead of its logits
        gemm = next(i for i, n in enumerate(model.graph.node) if site.scores in n.output)
        wrong = replace(site, scores=model.graph.node[gemm].input[0], rewire=((gemm, 0),))
    patched = graph.patch(model, 0.3, source_sha256=graph.model_sha256(model_path), source_name=model_path.name,
                          site=wrong)
    path = tmp_path / "wrong.onnx"
    graph.save_model(patched, path)
    result = onnxcal.verify(path, val, original=model_path)
    reference = next(c for c in result.checks if c.name == "reference")
    assert not result.passed and not reference.passed and reference.value > 1e-3


def test_verify_reference_has_no_zero_over_zero_and_a_nan_output_fails():
    """Rows whose sigmoids all underflow in float64 still have a reference (scipy.special.softmax of
    log_expit); a patched output of NaN there (0 / 0 in the graph) fails the reference check."""
    from onnxcal.graph.post import Normalize
    from onnxcal.verify import compare, reference_probabilities

    z = np.array([[-2000.0, -1000.0, -1500.0], [1.0, 2.0, 3.0]])
    ref = reference_probabilities(z, 1.0, "sigmoid", (Normalize(),))
    np.testing.assert_allclose(ref, scipy.special.softmax(scipy.special.log_expit(z), axis=1), rtol=1e-12, atol=0)
    nan_rows = np.array([[np.nan] * 3, l1(z[1:])[0]])
    checks = {c.name: c for c in compare(nan_rows, z, 1.0, "sigmoid", "float32", (Normalize(),))}
    assert not checks["reference"].passed and checks["reference"].value == np.inf
    checks = {c.name: c for c in compare(ref, z, 1.0, "sigmoid", "float32", (Normalize(),))}
    assert checks["reference"].passed and checks["row-sums"].passed and checks["argmax"].passed


def test_progress_hears_the_fit_and_every_replicate(data):
    calls: list[tuple[str, int, int]] = []
    summarize(data[0], data[1], {"fit_as": "sigmoid-l1"}, FitOptions(bootstrap=4),
              progress=lambda stage, done, total: calls.append((stage, done, total)))
    assert calls[0] == ("fitting", 0, 1) and calls[1] == ("fitting", 1, 1)
    assert calls[2:] == [("bootstrap", i, 4) for i in range(5)]
