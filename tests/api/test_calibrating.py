"""calibrate end to end: scikit-learn's bundled digits, the bundled demo, every input form."""

import warnings

import numpy as np
import onnx
import onnxruntime as ort
import pytest
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
)
from sklearn.datasets import load_digits
from sklearn.exceptions import ConvergenceWarning
from sklearn.model_selection import train_test_split
from sklearn.neural_network import MLPClassifier

from onnxcal import api
from onnxcal.data import DataSpec, Selection
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
    layers = list(zip(clf.coefs_, clf.intercepts_, strict=True))
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


def test_calibrate_opens_three_sessions_and_runs_the_checked_rows_once(digits_setup, monkeypatch, tmp_path):
    """One session of the original's copy serves the reading's probe, the capture (which goes on from the
    probe's rows) and the original's side of the identity check; one runs the patched model, one the
    patched model at T = 1. The checks are those of verify on the same rows."""
    from onnxcal.capture import plan

    d, *_ = digits_setup
    opened = []
    make_session = plan.make_session
    monkeypatch.setattr(plan, "make_session", lambda *a, **kw: opened.append(1) or make_session(*a, **kw))
    result = api.calibrate(d / "digits.onnx", d / "val.npz", tmp_path / "c.onnx")
    assert len(opened) == 3
    checks = {c.name: c for c in result.verification.checks}
    assert checks["identity"].passed and not checks["identity"].skipped and checks["reference"].passed
    # the written model checked on every row by verify (its own sessions): the same verdicts
    full = {c.name: c for c in api.verify(tmp_path / "c.onnx", d / "val.npz", original=d / "digits.onnx").checks}
    assert full["identity"].passed and full["reference"].passed
    assert checks["identity"].value == pytest.approx(full["identity"].value, abs=1e-6)


@pytest.mark.parametrize("head", ["raw logits", "softmax of an output"])
def test_the_identity_rides_in_the_patched_models_session(digits_setup, monkeypatch, tmp_path, head):
    """When the nodes the identity computes differently read only the written graph's outputs (raw logits,
    to which the patch appends the probabilities; a Softmax over logits that are an output too), the
    identity check runs in the patched model's session (graph.identity_rider): two sessions in all, and
    the verdicts of verify on every row, with its own sessions."""
    from onnxcal import reading
    from onnxcal.capture import plan

    d, clf, *_ = digits_setup
    layers = list(zip(clf.coefs_, clf.intercepts_, strict=True))
    if head == "raw logits":
        model, output = mlp_model(layers, input_name="pixels", output_name="logits"), None
    else:
        model, output = mlp_model(layers, final="Softmax", input_name="pixels", output_name="probabilities"), None
        model.graph.output.append(onnx.helper.make_tensor_value_info("logits", onnx.TensorProto.FLOAT, ["N", 10]))
        output = "probabilities"
    onnx.save(model, tmp_path / "m.onnx")
    opened, ran = [], []
    make_session = plan.make_session
    monkeypatch.setattr(plan, "make_session", lambda *a, **kw: opened.append(1) or make_session(*a, **kw))
    run_plan = reading.run_plan
    monkeypatch.setattr(reading, "run_plan", lambda p, data, **kw: ran.append(data.n) or run_plan(p, data, **kw))
    result = api.calibrate(tmp_path / "m.onnx", d / "val.npz", tmp_path / "c.onnx", output=output)
    assert len(opened) == 2
    # raw logits: the one output compared is the tensor captured, so the original's side is the capture's
    # rows (its session ran them already); else those rows run again in the capture's session
    assert ran == ([] if head == "raw logits" else [64])
    checks = {c.name: c for c in result.verification.checks}
    assert checks["identity"].passed and not checks["identity"].skipped and checks["reference"].passed
    assert all(f"'{name}'" in checks["identity"].detail for name in ("logits", output or "logits"))
    full = {c.name: c for c in api.verify(tmp_path / "c.onnx", d / "val.npz", original=tmp_path / "m.onnx").checks}
    assert full["identity"].passed and full["reference"].passed
    assert checks["identity"].value <= full["identity"].value + 1e-7


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


NOT_ON_CALIBRATES_PATH = ("matplotlib", "PIL", "onnx.reference", "scipy.optimize", "scipy.stats", "sklearn",
                          "jinja2")


def test_calibrate_imports_nothing_it_does_not_use(tmp_path):
    """``onnxcal calibrate`` with its defaults on arrays (no report, no images) in a fresh interpreter: the
    plotting, image, reference-evaluator and optimiser modules are never imported (each costs start-up
    time, which the time-to-a-calibrated-model benchmark counts; docs/benchmarks.md)."""
    import subprocess
    import sys

    code = (
        "import sys\n"
        "from onnxcal.cli.app import main\n"
        f"sys.argv = ['onnxcal', 'calibrate', {str(DEMO_MODEL)!r}, '--data', {str(DEMO_VAL)!r}, '--out', "
        f"{str(tmp_path / 'c.onnx')!r}, '--quiet']\n"
        "try:\n    main()\nexcept SystemExit:\n    pass\n"
        f"tops = {[n.split('.')[0] for n in NOT_ON_CALIBRATES_PATH]!r}\n"
        "print(sorted(m for m in sys.modules if m.split('.')[0] in tops))\n"
    )
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True, cwd=tmp_path)
    assert (tmp_path / "c.onnx").exists(), done.stderr
    loaded = eval(done.stdout.strip().splitlines()[-1])  # a list of module names printed by the child
    for name in NOT_ON_CALIBRATES_PATH:
        assert not any(m == name or m.startswith(name + ".") for m in loaded), (name, loaded)
