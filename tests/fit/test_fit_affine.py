"""Binary and multi-label sigmoid temperatures, Platt and vector scaling (onnxcal.fit.temperature,
onnxcal.fit.affine), and the methods checked against the kind of classifier."""

import numpy as np
import pytest
import scipy.optimize
import scipy.special
from fit_cases import bernoulli_labels, gumbel_labels
from sklearn.linear_model import LogisticRegression

from onnxcal.errors import OnnxcalError
from onnxcal.fit import T_MIN, FitOptions, _affine_pass, fit_scaling, fit_sigmoid_temperature

# --------------------------------------------------------------------------
# Binary and multi-label sigmoid temperatures, Platt, vector scaling


def test_binary_temperature_agrees_with_scipy(rng):
    # Reference library: scipy.optimize.minimize_scalar on the binary
    # cross-entropy written with numpy.logaddexp.
    z = rng.normal(scale=3.0, size=(5000, 1))
    y = bernoulli_labels(rng, z[:, 0] / 2.5)
    ours = fit_sigmoid_temperature(z, y)

    def bce(t):
        s = z[:, 0] / t
        return np.mean(np.logaddexp(0, s) - y * s)

    ref = scipy.optimize.minimize_scalar(bce, bounds=(0.01, 100), method="bounded", options={"xatol": 1e-10})
    assert ours.temperature == pytest.approx(ref.x, rel=1e-6)
    assert ours.temperature == pytest.approx(2.5, rel=0.1)


def test_multilabel_shared_and_per_label(rng):
    z = rng.normal(scale=3.0, size=(20_000, 4))
    t_true = np.array([0.5, 1.0, 2.0, 4.0])
    y = bernoulli_labels(rng, z / t_true)
    per = fit_scaling(z, y, FitOptions(multilabel="per-label"))
    np.testing.assert_allclose(per.scaling.parameters["temperature"], t_true, rtol=0.06)
    # Each per-label T is the binary fit of that column alone.
    for k in range(4):
        alone = fit_sigmoid_temperature(z[:, [k]], y[:, k]).temperature
        assert per.scaling.parameters["temperature"][k] == pytest.approx(alone, rel=1e-7)
    # One shared T: the binary fit on all entries pooled.
    shared = fit_scaling(z, y, FitOptions(multilabel="shared")).temperature
    pooled = fit_sigmoid_temperature(z.reshape(-1, 1), y.reshape(-1)).temperature
    assert shared == pytest.approx(pooled, rel=1e-7)


def test_platt_agrees_with_sklearn_logistic_regression(rng):
    # Reference library: an unpenalised scikit-learn LogisticRegression on the
    # single feature z is exactly Platt's sigmoid(a z + b) fitted by maximum likelihood.
    z = rng.normal(scale=3.0, size=(20_000, 1))
    y = bernoulli_labels(rng, 0.4 * z[:, 0] - 0.7)
    ours = fit_scaling(z, y, FitOptions(method="platt")).scaling.parameters
    lr = LogisticRegression(C=1e12, tol=1e-12, max_iter=1000).fit(z, y)
    assert ours["w"] == pytest.approx(lr.coef_[0, 0], rel=1e-5)
    assert ours["b"] == pytest.approx(lr.intercept_[0], rel=1e-5)
    assert ours["w"] == pytest.approx(0.4, abs=0.03) and ours["b"] == pytest.approx(-0.7, abs=0.05)


def test_vector_recovers_known_w_and_b():
    # Known per-class w, b; labels drawn exactly from softmax(w * z + b) by
    # Gumbel-max sampling (Gumbel 1954; Maddison et al. 2014). b is identified
    # only up to a common shift (softmax(s + c) = softmax(s)), so compare centred.
    rng = np.random.default_rng(7)
    w = np.array([0.5, 0.8, 1.2, 0.7, 1.5])
    b = np.array([0.3, -0.2, 0.0, 0.5, -0.6])
    z = rng.normal(scale=2.0, size=(50_000, 5))
    y = np.argmax(z * w + b + rng.gumbel(size=z.shape), axis=1)
    result = fit_scaling(z.astype(np.float32), y, FitOptions(method="vector"))
    assert result.converged and not result.on_bound
    got = result.scaling.arrays()
    np.testing.assert_allclose(got["w"], w, atol=0.04)
    np.testing.assert_allclose(got["b"], b - b.mean(), atol=0.04)
    assert abs(got["b"].mean()) < 1e-9


def test_vector_gradient_matches_finite_differences(rng):
    # Reference library: scipy.optimize.check_grad (central differences vs our analytic gradient).
    z = rng.normal(scale=2.0, size=(400, 4))
    y = rng.integers(0, 4, size=400)

    def f(x):
        return _affine_pass(z, y, x[:4], x[4:], None, None, True)[0]

    def g(x):
        _, gw, gb = _affine_pass(z, y, x[:4], x[4:], None, None, True)
        return np.concatenate([gw, gb])

    x = np.array([0.7, 1.1, 0.9, 1.3, 0.2, -0.1, 0.0, 0.4])
    assert scipy.optimize.check_grad(f, g, x) < 1e-6


def test_l2_pulls_toward_identity(rng):
    z = rng.normal(scale=2.0, size=(3000, 3))
    y = gumbel_labels(rng, z, 2.0)
    free = fit_scaling(z, y, FitOptions(method="vector")).scaling.arrays()
    tied = fit_scaling(z, y, FitOptions(method="vector", l2=1e3)).scaling.arrays()
    assert np.all(np.abs(free["w"] - 0.5) < 0.1)  # T = 2 means w near 1/2
    assert np.all(np.abs(tied["w"] - 1.0) < 0.01) and np.all(np.abs(tied["b"]) < 0.01)


def test_vector_and_platt_bounds_on_separable_data():
    z = np.eye(3)[np.arange(300) % 3] * 5.0
    y = np.arange(300) % 3
    vec = fit_scaling(z, y, FitOptions(method="vector"))
    assert vec.on_bound and any("every sample" in w for w in vec.warnings)
    zb = np.r_[np.full(50, -2.0), np.full(50, 2.0)][:, None]
    yb = np.r_[np.zeros(50), np.ones(50)].astype(int)
    platt = fit_scaling(zb, yb, FitOptions(method="platt"))
    assert platt.on_bound and any("every sample" in w for w in platt.warnings)
    binary_t = fit_scaling(zb, yb, FitOptions())
    assert binary_t.on_bound and binary_t.temperature == T_MIN


def test_methods_checked_against_the_kind(rng):
    z = rng.normal(size=(100, 3))
    y = rng.integers(0, 3, 100)
    with pytest.raises(OnnxcalError, match="--method platt does not apply to a multiclass"):
        fit_scaling(z, y, FitOptions(method="platt"))
    with pytest.raises(OnnxcalError, match="--multilabel needs an N x K"):
        fit_scaling(z, y, FitOptions(multilabel="shared"))
    with pytest.raises(OnnxcalError, match="--method vector does not apply to a single-logit"):
        fit_scaling(z[:, :1], y % 2, FitOptions(method="vector"))
