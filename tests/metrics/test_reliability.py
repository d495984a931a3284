"""onnxcal.metrics.reliability: the figures of a reliability diagram against scikit-learn."""

import numpy as np
import pytest
import scipy.special
from sklearn.calibration import calibration_curve

from onnxcal import metrics
from onnxcal.metrics import classwise_calibration_error, evaluate


def test_reliability_top_label_matches_sklearn_calibration_curve(rng):
    # Reference library: sklearn.calibration.calibration_curve (strategy "uniform")
    # on the top-label confidence and correctness gives the non-empty bins.
    z = rng.normal(scale=3, size=(3000, 6))
    y = rng.integers(0, 6, 3000)
    r = metrics.reliability(z, y, 1.5, n_bins=12)
    p = scipy.special.softmax(z / 1.5, axis=1)
    correct = (p.argmax(1) == y).astype(int)
    prob_true, prob_pred = calibration_curve(correct, p.max(1), n_bins=12, strategy="uniform")
    full = r.counts > 0
    np.testing.assert_allclose(r.observed[full], prob_true, rtol=1e-12)
    np.testing.assert_allclose(r.confidence[full], prob_pred, rtol=1e-12)
    assert np.isnan(r.observed[~full]).all() and r.counts.sum() == 3000 and r.quantity == "top-label"
    m = evaluate(z, y, 1.5, 12)
    assert r.error == pytest.approx(m.ece, rel=1e-12)  # the diagram's error is the ECE
    assert r.class_error.mean() == pytest.approx(m.classwise_ece, rel=1e-12)
    assert r.class_error.mean() == pytest.approx(classwise_calibration_error(p, y, 12), rel=1e-12)


def test_reliability_binary_and_multilabel_use_the_positive_probability(rng):
    # Reference library: sklearn.calibration.calibration_curve on p = sigmoid(z / T).
    z = rng.normal(scale=3, size=(2000, 1))
    y = (rng.random(2000) < scipy.special.expit(z[:, 0] / 2)).astype(int)
    r = metrics.reliability(z, y, 1.0, n_bins=10)
    prob_true, prob_pred = calibration_curve(y, scipy.special.expit(z[:, 0]), n_bins=10)
    full = r.counts > 0
    np.testing.assert_allclose(r.observed[full], prob_true, rtol=1e-12)
    np.testing.assert_allclose(r.confidence[full], prob_pred, rtol=1e-12)
    assert r.quantity == "positive" and r.error == pytest.approx(evaluate(z, y, 1.0, 10).classwise_ece, rel=1e-12)
    zz = rng.normal(size=(500, 3))
    yy = (rng.random((500, 3)) < 0.4).astype(np.uint8)
    rm = metrics.reliability(zz, yy, 2.0, n_bins=8)
    assert rm.kind == "multilabel" and rm.counts.sum() == 1500 and rm.class_error.shape == (3,)
    prob_true, _ = calibration_curve(yy.ravel(), scipy.special.expit(zz / 2.0).ravel(), n_bins=8)
    np.testing.assert_allclose(rm.observed[rm.counts > 0], prob_true, rtol=1e-12)


def test_reliability_to_dict_is_strict_json(rng):
    import json

    r = metrics.reliability(np.array([[3.0, 0.0], [0.0, 3.0]]), np.array([0, 0]), n_bins=5)
    d = json.loads(json.dumps(r.to_dict(), allow_nan=False))
    assert d["counts"] == [0, 0, 0, 0, 2] and d["observed"][:4] == [None] * 4 and d["observed"][4] == 0.5
