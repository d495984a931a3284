"""The multiclass temperature solver: Taylor steps from the cumulants, passes."""

from math import factorial

import numpy as np
import pytest
import scipy.optimize
import scipy.special

from onnxcal import tempfit
from onnxcal.fit import FitOptions, fit_temperature, summarize


def gumbel_set(seed, n, k, t_true=1.5):
    # Labels drawn from softmax(z / T) by the Gumbel-max trick (Gumbel 1954).
    rng = np.random.default_rng(seed)
    z = rng.normal(scale=3.0, size=(n, k))
    return z, np.argmax(z + t_true * rng.gumbel(size=z.shape), axis=1)


def optimum(z, y):
    """beta where the NLL's derivative mean(E_p[z] - z_y) vanishes: scipy.optimize.brentq on
    the derivative written with scipy's softmax (a reference outside onnxcal)."""
    r = np.arange(len(y))

    def slope(beta):
        return np.mean((scipy.special.softmax(beta * z, axis=1) * z).sum(axis=1) - z[r, y])

    return scipy.optimize.brentq(slope, 0.05, 20.0, xtol=1e-15)


def test_taylor_root_of_a_known_polynomial():
    # sum_j c_j d^j / j! with roots at d = 0.01 (and far away): the root near
    # -c_0/c_1 is found to machine precision; the bound is the last term's size.
    c = np.polynomial.Polynomial.fromroots([0.01, 3.0, -2.0, 5.0]).coef
    if np.polynomial.Polynomial(c).deriv()(0.01) < 0:
        c = -c
    derivs = c * np.array([factorial(j) for j in range(len(c))])
    d, bound = tempfit.taylor_root(derivs)
    assert d == pytest.approx(0.01, rel=1e-14)
    assert bound == pytest.approx(abs(c[-1] * d**4) / c[1], rel=1e-12)
    assert tempfit.taylor_root(np.array([1.0, -1.0, 0.0])) is None  # decreasing: no Newton root


def test_one_pass_from_a_warm_start():
    # From a start half a standard error off (0.3 %), one pass and one Taylor step
    # reach the optimum to 1e-12; Newton's method alone would need two more passes.
    z, y = gumbel_set(7, 30000, 10)
    beta = optimum(z, y)
    fit = fit_temperature(z, y, start=1.0 / (beta * 1.003))
    assert fit.passes == 1 and fit.converged
    assert 1.0 / fit.temperature == pytest.approx(beta, rel=1e-12)


def test_far_start_falls_back_to_safeguarded_newton():
    z, y = gumbel_set(8, 3000, 5, t_true=0.3)
    fit = fit_temperature(z, y, start=80.0)
    assert fit.converged and 1.0 / fit.temperature == pytest.approx(optimum(z, y), rel=1e-10)


def test_summary_passes(monkeypatch):
    # The fit part: subsamples, one pass over the fit part, and pass 3 as its
    # check; the refit on all rows: pass 3's sums only.
    monkeypatch.setattr(tempfit, "STAGE_ROWS", (1000, 4000))
    z, y = gumbel_set(9, 40000, 8)
    s = summarize(z, y, {}, FitOptions(bootstrap=0))
    assert s.holdout_result.passes <= 2.0 + 8 * 5000 / 30000
    assert s.result.passes == 1 and s.result.converged
    assert 1.0 / s.temperature == pytest.approx(optimum(z, y), rel=1e-10)
