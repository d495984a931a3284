"""End to end through the Python API, on open data and on the bundled demo."""

import re
import warnings

import numpy as np
import onnx
import onnxruntime as ort
import pytest
from sklearn.datasets import load_digits
from sklearn.exceptions import ConvergenceWarning
from sklearn.model_selection import train_test_split
from sklearn.neural_network import MLPClassifier

from conftest import (
    BELT_CLASSES,
    BELT_IMAGES,
    BELT_MODEL,
    BELT_PREPROCESS,
    DEMO_CLASSES,
    DEMO_CSV,
    DEMO_MODEL,
    DEMO_TEST,
    DEMO_VAL,
    TICKETS,
    TICKETS_CLASSES,
    TICKETS_LABELS,
    TICKETS_MODEL,
    mlp_model,
    random_mlp,
)
from onnxcal import api, graph
from onnxcal.data import DataSpec, Selection
from onnxcal.errors import OnnxcalError
from onnxcal.fit import FitOptions
from onnxcal.metrics import evaluate


@pytest.fixture(scope="module")
def digits_setup(tmp_path_factory):
    """An MLP that overfits scikit-learn's bundled handwritten digits (UCI optical
    digits, 1797 8x8 images), exported to ONNX ending in Softmax, as exporters do."""
    x, y = load_digits(return_X_y=True)
    x = x.astype(np.float32)
    x_train, x_rest, y_train, y_rest = train_test_split(x, y, train_size=200, random_state=0, stratify=y)
    x_val, x_test, y_val, y_test = train_test_split(
        x_rest, y_rest, test_size=0.5, random_state=0, stratify=y_rest
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        clf = MLPClassifier(
            hidden_layer_sizes=(128,), alpha=0.0, max_iter=2000, tol=1e-12,
            n_iter_no_change=2000, random_state=0,
        ).fit(x_train, y_train)
    layers = list(zip(clf.coefs_, clf.intercepts_))
    model = mlp_model(layers, final="Softmax", input_name="pixels", output_name="probabilities")
    d = tmp_path_factory.mktemp("digits")
    onnx.save(model, d / "digits.onnx")
    np.savez(d / "val.npz", pixels=x_val, labels=y_val)
    np.savez(d / "test.npz", pixels=x_test, labels=y_test)
    return d, clf, x_test, y_test


def _scores(path, name, x_name, x):
    sess = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])
    return sess.run([name], {x_name: x})[0]


def test_digits_calibration_improves_held_out_test_split(digits_setup):
    d, clf, x_test, y_test = digits_setup
    result = api.calibrate(d / "digits.onnx", d / "val.npz", d / "calibrated.onnx")
    assert result.verification.passed and result.patch is not None
    # Drop-in: the Softmax output keeps its name, so the same call reads both models.
    before = _scores(d / "digits.onnx", "probabilities", "pixels", x_test).astype(np.float64)
    after = _scores(d / "calibrated.onnx", "probabilities", "pixels", x_test).astype(np.float64)
    m_before = evaluate(np.log(before), y_test)
    m_after = evaluate(np.log(after), y_test)
    assert m_after.ece <= 0.6 * m_before.ece  # ECE falls by at least 40 %
    assert m_after.nll < m_before.nll
    assert m_after.accuracy == m_before.accuracy
    # Temperature is monotone, so every argmax is unchanged (common practice).
    np.testing.assert_array_equal(after.argmax(1), before.argmax(1))
    # The ONNX model computes what scikit-learn's own predict_proba gives.
    np.testing.assert_allclose(before, clf.predict_proba(x_test), atol=1e-5)


def test_demo_calibration(tmp_path):
    out = tmp_path / "demo.onnx"
    result = api.calibrate(DEMO_MODEL, DEMO_VAL, out)
    s = result.summary
    assert s.after.ece < 0.5 * s.before.ece
    assert s.after.accuracy == s.before.accuracy
    assert result.patch.record.output == "probabilities"
    check = api.verify(out, DEMO_TEST)
    assert check.passed
    # On the separate test split the calibrated probabilities are better too.
    test = np.load(DEMO_TEST)
    z = _scores(DEMO_MODEL, "logits", "band_energies", test["band_energies"])
    assert evaluate(z, test["labels"], s.temperature).ece < evaluate(z, test["labels"]).ece


def test_capture_fit_patch_verify_files(tmp_path):
    cap = api.capture(DEMO_MODEL, DEMO_VAL, out=tmp_path / "c.npz")
    summary = api.fit(tmp_path / "c.npz", out=tmp_path / "fit.json")
    assert summary.temperature == pytest.approx(api.fit(cap).temperature, rel=1e-12)
    res = api.patch(DEMO_MODEL, tmp_path / "p.onnx", fit=tmp_path / "fit.json")
    assert res.record.temperature == summary.temperature
    assert res.record.fit["metrics"]["after"]["ece"] == summary.after.ece
    assert api.verify(tmp_path / "p.onnx", DEMO_VAL, original=DEMO_MODEL).passed


def test_inspect_demo():
    info = api.inspect(DEMO_MODEL)
    assert info.site.output == "logits" and info.site.activation is None
    assert info.site.num_classes == 5 and not info.batch_fixed and info.opset == 17


# --------------------------------------------------------------------------
# Every input form through calibrate

QUICK = FitOptions(holdout=0, bootstrap=0)  # in-sample, no intervals: these tests are about the data

FORMS = {
    "npz": (DEMO_MODEL, DEMO_VAL),
    "csv": (DEMO_MODEL, DataSpec(path=DEMO_CSV, label_column="condition", classes=DEMO_CLASSES)),
    "npy": (TICKETS_MODEL, DataSpec(inputs=TICKETS, labels=TICKETS_LABELS, classes=TICKETS_CLASSES)),
    "images": (BELT_MODEL, DataSpec(path=BELT_IMAGES, classes=BELT_CLASSES, preprocess=BELT_PREPROCESS)),
}


@pytest.mark.parametrize("form", FORMS)
def test_every_input_form_calibrates(tmp_path, form):
    model, data = FORMS[form]
    result = api.calibrate(model, data, tmp_path / "out.onnx", options=QUICK)
    assert result.verification.passed and result.patch is not None
    s = result.summary
    assert s.after.nll < s.before.nll and s.after.accuracy == s.before.accuracy
    assert api.verify(tmp_path / "out.onnx", data, batch_size=7).passed


def test_csv_and_npz_of_the_same_rows_fit_the_same_temperature(tmp_path):
    csv_fit = api.calibrate(DEMO_MODEL, FORMS["csv"][1], tmp_path / "a.onnx", options=QUICK).summary
    npz_fit = api.calibrate(
        DEMO_MODEL, DataSpec(path=DEMO_VAL, selection=Selection(limit=400)), tmp_path / "b.onnx", options=QUICK
    ).summary
    assert csv_fit.temperature == npz_fit.temperature


def test_image_class_order_matters(tmp_path):
    # Without the class list the sorted folder names misname two of the three classes.
    good = api.capture(BELT_MODEL, FORMS["images"][1])
    wrong = api.capture(BELT_MODEL, DataSpec(path=BELT_IMAGES, preprocess=BELT_PREPROCESS))
    acc = lambda c: float(np.mean(np.asarray(c.logits).argmax(1) == c.labels))  # noqa: E731
    assert acc(good) >= 0.8 > acc(wrong)


def test_fit_accepts_shard_files(tmp_path):
    files = [tmp_path / f"s{i}.npz" for i in (1, 2, 3)]
    for i, f in enumerate(files, start=1):
        api.capture(DEMO_MODEL, DataSpec(path=DEMO_VAL, selection=Selection(shard=(i, 3))), out=f)
    whole = api.fit(api.capture(DEMO_MODEL, DEMO_VAL), options=QUICK)
    merged = api.fit(files, out=tmp_path / "fit.json", options=QUICK)
    assert merged.temperature == whole.temperature
    assert list(merged.capture["merged_from"]) == [str(f) for f in files]


def test_digits_vector_scaling_end_to_end(digits_setup):
    d, clf, x_test, y_test = digits_setup
    out = d / "vector.onnx"
    result = api.calibrate(d / "digits.onnx", d / "val.npz", out, options=FitOptions(method="vector", bootstrap=20))
    assert result.verification.passed and result.patch.record.method == "vector"
    assert [n.op_type for n in onnx.load(str(out)).graph.node[-3:]] == ["Mul", "Add", "Softmax"]
    assert api.verify(out, d / "test.npz").passed
    before = _scores(d / "digits.onnx", "probabilities", "pixels", x_test).astype(np.float64)
    after = _scores(out, "probabilities", "pixels", x_test).astype(np.float64)
    assert evaluate(np.log(after), y_test).nll < evaluate(np.log(before), y_test).nll
    fit = result.patch.record.fit
    assert fit["metrics"]["basis"] == "held-out" and len(fit["intervals"]["parameters"]["w"]) == 10


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


@pytest.mark.parametrize("final, method", [(None, "platt"), ("Sigmoid", "platt"), (None, "temperature"), ("Sigmoid", "temperature")])
def test_binary_single_logit_end_to_end(tmp_path, rng, final, method):
    model = random_mlp(rng, k=1, scale=3.0, final=final)
    # Labels from sigmoid(z / 2 - 0.5): the model is overconfident and biased.
    path, data = _labelled(
        tmp_path, rng, model, "binary", lambda z: (rng.random(len(z)) < 1 / (1 + np.exp(-(z[:, 0] / 2 - 0.5)))).astype(int)
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


# --------------------------------------------------------------------------
# The package's top-level functions


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
    out = tmp_path / "calibration-demo"
    for name in ("scores.npz", "fit.json", "calibrated.onnx", "verify.xml", "report/report.html",
                 "report/summary.md", "report_again/report.json", "calibrated_again.onnx"):
        assert (out / name).is_file(), name


def test_dropping_nonfinite_rows_fits_as_the_finite_rows_alone(tmp_path):
    # The demo with NaN in 30 rows' inputs (the model then gives NaN logits there): with
    # --drop-nonfinite, fit and calibrate give the fit of the capture of the other rows.
    val = np.load(DEMO_VAL)
    x, y = val["band_energies"].copy(), val["labels"]
    bad = np.arange(7, 2000, 67)
    x[bad, 3] = np.nan
    np.savez(tmp_path / "nan.npz", band_energies=x, labels=y)
    keep = np.setdiff1d(np.arange(len(y)), bad)
    np.savez(tmp_path / "clean.npz", band_energies=x[keep], labels=y[keep])
    options = FitOptions(bootstrap=0)
    with pytest.warns(Warning):  # the inputs and the logits of those rows are reported
        api.capture(DEMO_MODEL, tmp_path / "nan.npz", out=tmp_path / "nan_cap.npz")
    with pytest.raises(OnnxcalError, match=r"NaN or Inf in 30 of 2000 rows \(first rows: 7, 74, 141, 208, 275\)"):
        api.fit(tmp_path / "nan_cap.npz", options=options)
    dropped = api.fit(tmp_path / "nan_cap.npz", options=options, drop_nonfinite=True)
    clean = api.fit(api.capture(DEMO_MODEL, tmp_path / "clean.npz"), options=options)
    assert dropped.temperature == pytest.approx(clean.temperature, rel=1e-12)
    assert dropped.after == clean.after
    assert any(n.startswith("dropped 30 rows: ") for n in dropped.notes)
    with pytest.warns(Warning, match="input 'band_energies'"):
        result = api.calibrate(DEMO_MODEL, tmp_path / "nan.npz", tmp_path / "c.onnx", options=options,
                               drop_nonfinite=True)
    assert result.patch is not None and result.verification.passed
    assert result.summary.temperature == pytest.approx(clean.temperature, rel=1e-12)


# --------------------------------------------------------------------------
# Issue 11: no NaN model is ever written


def test_a_temperature_the_graph_cannot_compute_with_is_refused_and_float64_is_the_way_out(tmp_path):
    # IEEE 754 binary32: the smallest normal number is 2^-126 = 1.18e-38 (numpy.finfo agrees)
    assert np.finfo(np.float32).tiny == 2.0**-126
    with pytest.raises(OnnxcalError, match=r"temperature 1e-45 is below 1.18e-38, the smallest normal float32"):
        api.patch(DEMO_MODEL, tmp_path / "p.onnx", temperature=1e-45)
    assert list(tmp_path.iterdir()) == []
    api.patch(DEMO_MODEL, tmp_path / "p.onnx", temperature=1e-45, compute_dtype="float64")
    sess = ort.InferenceSession(str(tmp_path / "p.onnx"), providers=["CPUExecutionProvider"])
    x = np.load(DEMO_VAL)["band_energies"][:200]
    outputs = zip(sess.run(None, {"band_energies": x}), sess.get_outputs(), strict=True)
    (probs,) = [o for o, meta in outputs if meta.name == "probabilities"]
    assert np.isfinite(probs).all()  # onnxruntime's own outputs: finite (one-hot, at such a T)


def test_logits_seen_bound_the_temperature_in_the_graphs_dtype():
    from onnxcal._numeric import check_in_dtype
    from onnxcal.scaling import Scaling

    # float16 holds at most 65504 (IEEE 754 binary16): logits up to 100 need T >= 100 / 65504
    with pytest.raises(OnnxcalError, match=r"largest \|logit\| seen is 100.*T must be at least 0.00153"):
        check_in_dtype(Scaling.of_temperature(0.001), "float16", largest_logit=100.0)
    check_in_dtype(Scaling.of_temperature(0.002), "float16", largest_logit=100.0)
    with pytest.raises(OnnxcalError, match="vector scaling .* makes the calibrated logits overflow float32"):
        check_in_dtype(Scaling.of_affine([1e30, 1.0], [0.0, 0.0], "vector", "multiclass"), "float32",
                       largest_logit=1e9)
