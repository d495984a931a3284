"""Smoothed targets (onnxcal.fit.smoothed): Platt's targets, finite fits on separable rows, the warning."""

import warnings

import numpy as np
import pytest
import scipy.optimize
import scipy.special
from fit_cases import gumbel_labels
from sklearn.calibration import _sigmoid_calibration

from onnxcal.errors import OnnxcalError
from onnxcal.fit import T_MIN, FitOptions, fit_scaling, summarize
from onnxcal.fit.smoothed import all_correct, expanded, smoothed_targets

NO_ESTIMATE = "the maximum-likelihood fit does not exist"


def test_two_class_targets_are_platts():
    # Platt 1999, "Probabilistic Outputs for Support Vector Machines ...", sec. 2.2: a positive row's
    # target is (N+ + 1)/(N+ + 2), a negative row's 1/(N- + 2) (probability of the positive class).
    y = np.array([1] * 7 + [0] * 3)
    t = smoothed_targets(y, 2)
    assert np.allclose(t[y == 1, 1], (7 + 1) / (7 + 2)) and np.allclose(t[y == 0, 1], 1 / (3 + 2))
    assert np.allclose(t.sum(axis=1), 1.0)


def test_k_class_targets_and_weights():
    y = np.array([0, 0, 0, 1, 2, 2])
    t = smoothed_targets(y, 3)
    assert np.allclose(t[0], [4 / 5, 1 / 10, 1 / 10]) and np.allclose(t[3], [1 / 6, 2 / 3, 1 / 6])
    # bootstrap counts weigh the class counts: class 0 counted 5 times
    tw = smoothed_targets(y, 3, rows=np.array([0, 1, 3]), weights=np.array([2.0, 3.0, 1.0]))
    assert np.allclose(tw[0], [6 / 7, 1 / 14, 1 / 14]) and np.allclose(tw[2], [1 / 6, 2 / 3, 1 / 6])


def test_binary_smoothed_platt_equals_scikit_learns_sigmoid_calibration(rng):
    # Reference library: scikit-learn's _sigmoid_calibration fits Platt's sigmoid to Platt's targets
    # (its P = 1 / (1 + exp(a f + b)), so a = -w, b = -b of onnxcal's sigmoid(w z + b)).
    z = rng.normal(scale=2.0, size=(400, 1))
    y = (rng.random(400) < scipy.special.expit(1.5 * z[:, 0] - 0.5)).astype(np.int64)
    ours = fit_scaling(z, y, FitOptions(method="platt", smoothed_targets=True)).scaling.parameters
    a, b = _sigmoid_calibration(z[:, 0], y)
    assert ours["w"] == pytest.approx(-a, abs=1e-4) and ours["b"] == pytest.approx(-b, abs=1e-4)
    plain = fit_scaling(z, y, FitOptions(method="platt")).scaling.parameters
    assert abs(plain["w"] + a) > 1e-3  # the labels' own fit differs: the check above can tell them apart


def test_smoothed_temperature_minimises_the_soft_cross_entropy(rng):
    # Reference library: scipy.optimize.minimize_scalar on -mean_i sum_k t_ik log softmax(z_i / T).
    z = rng.normal(scale=3.0, size=(60, 4))
    y = gumbel_labels(rng, z, 1.5)
    t = smoothed_targets(y, 4)

    def soft(temp):
        return -np.mean(np.sum(t * scipy.special.log_softmax(z / temp, axis=1), axis=1))

    ref = scipy.optimize.minimize_scalar(soft, bounds=(0.01, 100), method="bounded", options={"xatol": 1e-10})
    ours = fit_scaling(z, y, FitOptions(smoothed_targets=True)).temperature
    assert ours == pytest.approx(ref.x, rel=1e-5)


def _separable_draw(rng, n):
    """n rows drawn from softmax(z) (Gumbel-max) whose labels all have the top score, and the model."""
    while True:
        z = rng.normal(scale=4.0, size=(n, 3))
        y = gumbel_labels(rng, z, 1.0)
        if all_correct(z, y):
            return z, y


def test_all_correct_over_many_chunks_with_rows_and_weights(rng):
    # 300 rows of 1 000 classes span several of iter_chunks' chunks (65 rows each); the definition, row by row
    z = rng.normal(size=(300, 1000)).astype(np.float32)
    y = z.argmax(axis=1)
    assert all_correct(z, y)
    wrong = 291  # in the last chunk, an odd row
    y_bad = y.copy()
    y_bad[wrong] = (y[wrong] + 1) % 1000
    assert not all_correct(z, y_bad)
    rows = np.arange(0, 300, 2)
    assert all_correct(z, y_bad, rows=rows)  # even rows only: the wrong row is not fitted on
    weights = np.ones(300)
    weights[wrong] = 0.0
    assert all_correct(z, y_bad, rows=np.arange(300), weights=weights)  # weight 0: not fitted on
    weights[wrong] = 2.0
    assert not all_correct(z, y_bad, rows=np.arange(300), weights=weights)
    tied = z.copy()
    tied[5, (y[5] + 3) % 1000] = tied[5, y[5]]  # a tie with the top is not a strict top
    assert not all_correct(tied, y)


def test_separable_rows_smoothed_fit_finite_and_better_on_fresh_data(rng):
    z, y = _separable_draw(rng, 20)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ml = fit_scaling(z, y, FitOptions())
    smooth = fit_scaling(z, y, FitOptions(smoothed_targets=True))
    assert ml.temperature == T_MIN and ml.on_bound
    assert T_MIN < smooth.temperature < 10 and not smooth.on_bound
    fresh = rng.normal(scale=4.0, size=(20000, 3))
    labels = gumbel_labels(rng, fresh, 1.0)  # the same known model: softmax(z), T = 1

    def nll(temp):
        return -np.mean(scipy.special.log_softmax(fresh / temp, axis=1)[np.arange(len(labels)), labels])

    assert nll(smooth.temperature) < nll(ml.temperature) - 0.1


def test_warning_fires_on_error_free_rows_only(rng):
    z, y = _separable_draw(rng, 20)
    for method in ("temperature", "vector"):
        res = fit_scaling(z, y, FitOptions(method=method))
        assert res.on_bound and any(NO_ESTIMATE in w and "--smoothed-targets" in w for w in res.warnings)
    zb = np.r_[np.full(5, -2.0), np.full(5, 2.0)][:, None]
    yb = np.r_[np.zeros(5), np.ones(5)].astype(np.int64)
    assert any(NO_ESTIMATE in w for w in fit_scaling(zb, yb, FitOptions(method="platt")).warnings)
    # one error among the rows: the likelihood has an optimum, no such warning
    y_err = y.copy()
    y_err[0] = (z[0].argmax() + 1) % 3
    for method in ("temperature", "vector"):
        assert not any(NO_ESTIMATE in w for w in fit_scaling(z, y_err, FitOptions(method=method)).warnings)
    assert not any(NO_ESTIMATE in w for w in fit_scaling(z, y, FitOptions(smoothed_targets=True)).warnings)


def test_the_fit_command_says_it_too(rng):
    # multiclass temperature goes through the three-pass fit, not fit_scaling: the warning must come out there too
    z, y = _separable_draw(rng, 40)
    s = summarize(z, y, {}, FitOptions(bootstrap=0))
    assert any(NO_ESTIMATE in w for w in s.warnings)
    smooth = summarize(z, y, {}, FitOptions(bootstrap=0, smoothed_targets=True))
    assert not any(NO_ESTIMATE in w for w in smooth.warnings) and smooth.scaling.temperature > T_MIN
    assert smooth.to_dict()["options"]["smoothed_targets"] is True


def test_every_method_fits_smoothed_targets(rng):
    z, y = _separable_draw(rng, 30)
    for method in ("vector", "matrix", "dirichlet", "ensemble-temperature", "ovr-platt", "isotonic", "histogram"):
        res = fit_scaling(z, y, FitOptions(method=method, smoothed_targets=True))
        p = res.scaling.probabilities(z)
        assert np.all(np.isfinite(p)) and np.all(p.max(axis=1) < 1.0 - 1e-6), method  # never certain


def test_expanded_refuses_multilabel_and_huge_sets():
    with pytest.raises(OnnxcalError, match="multi-label"):
        expanded(np.zeros((4, 2)), np.array([[0, 1], [1, 0], [1, 1], [0, 0]]))
    big = np.lib.stride_tricks.as_strided(np.zeros(1, dtype=np.float32), shape=(100_000, 1000), strides=(0, 0))
    with pytest.raises(OnnxcalError, match="too large"):
        expanded(big, np.zeros(100_000, dtype=np.int64))


@pytest.mark.parametrize("method", ["temperature", "auto"])
def test_multilabel_labels_refused_with_the_option_named(rng, method):
    z = rng.normal(size=(40, 3))
    y = (rng.random((40, 3)) < 0.5).astype(np.uint8)
    with pytest.raises(OnnxcalError, match="multi-label") as e:
        summarize(z, y, {}, FitOptions(method=method, smoothed_targets=True, bootstrap=0))
    assert "--smoothed-targets" in e.value.hint


def test_auto_fits_smoothed_on_error_free_rows(rng):
    z, y = _separable_draw(rng, 60)
    s = summarize(z, y, {}, FitOptions(method="auto", bootstrap=20))
    assert s.choice is not None and s.choice.smoothed_targets and s.options.smoothed_targets
    assert "smoothed targets" in s.choice.reason and "no maximum-likelihood fit exists" in s.choice.reason
    assert s.to_dict()["choice"]["smoothed_targets"] is True
    assert not any(NO_ESTIMATE in w for w in s.warnings)
    y_err = y.copy()
    y_err[:3] = (z[:3].argmax(axis=1) + 1) % 3
    s2 = summarize(z, y_err, {}, FitOptions(method="auto", bootstrap=20))
    assert s2.choice is not None and not s2.choice.smoothed_targets
