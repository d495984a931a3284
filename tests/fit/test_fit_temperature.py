"""onnxcal.fit.temperature: recovery of a known temperature, agreement with scipy's minimiser,
derivatives, weights, bounds and chunks."""

import numpy as np
import pytest
import scipy.optimize
import scipy.special
from fit_cases import NO_EVAL, gumbel_labels

from onnxcal import sweep, tempfit
from onnxcal.fit import T_MAX, T_MIN, fit_sigmoid_temperature, fit_temperature, nll_derivatives, summarize

# --------------------------------------------------------------------------
# Temperature


@pytest.mark.parametrize("t_true", [0.5, 1.5, 3.0])
def test_recovers_known_temperature(t_true):
    rng = np.random.default_rng(int(t_true * 100))
    z = (rng.normal(size=(20_000, 10)) * 3.0).astype(np.float32)
    y = gumbel_labels(rng, z, t_true)
    result = fit_temperature(z, y)
    assert result.converged and not result.on_bound
    assert result.temperature == pytest.approx(t_true, rel=0.03)


def _scipy_nll(z, y, t):
    return np.mean(scipy.special.logsumexp(z / t, axis=1) - z[np.arange(len(y)), y] / t)


def test_agrees_with_scipy_bounded_minimiser(rng):
    # Reference library: scipy.optimize.minimize_scalar(method="bounded") on the
    # NLL written with scipy.special.logsumexp.
    z = rng.normal(scale=2.5, size=(3000, 8))
    y = gumbel_labels(rng, z, 2.2)
    ref = scipy.optimize.minimize_scalar(
        lambda t: _scipy_nll(z, y, t), bounds=(0.01, 100), method="bounded",
        options={"xatol": 1e-10},
    )
    ours = fit_temperature(z, y)
    assert ours.temperature == pytest.approx(ref.x, rel=1e-5)
    assert _scipy_nll(z, y, ours.temperature) <= ref.fun + 1e-12


def test_warm_start_on_a_large_set_matches_scipy_in_few_passes(rng, monkeypatch):
    # A large set is first fitted on strided subsamples (here of 300 and then
    # 1500 rows); the answer must still be the full-data optimum, reached in
    # one pass over the full set. Reference: scipy.optimize.brentq on the
    # NLL's derivative in beta, mean(E_p[z] - z_y) with p = scipy's softmax
    # (a minimiser of the NLL itself is good to only ~1e-8, the NLL being flat there).
    monkeypatch.setattr(tempfit, "STAGE_ROWS", (300, 1500))
    z = rng.normal(scale=3.0, size=(8000, 6))
    y = gumbel_labels(rng, z, 1.7)

    def slope(beta):
        return np.mean((scipy.special.softmax(beta * z, axis=1) * z).sum(axis=1) - z[np.arange(len(y)), y])

    ref = 1.0 / scipy.optimize.brentq(slope, 0.1, 10.0, xtol=1e-15)
    ours = fit_temperature(z, y)
    assert ours.temperature == pytest.approx(ref, rel=1e-12)
    assert ours.passes <= 1.0 + 8 * 1800 / 8000


def test_derivatives_match_finite_differences(rng):
    z = rng.normal(scale=2.0, size=(500, 5))
    y = rng.integers(0, 5, size=500)
    beta, h = 0.8, 1e-5
    f, g, c = nll_derivatives(z, y, beta)
    f_plus, g_plus, _ = nll_derivatives(z, y, beta + h)
    f_minus, g_minus, _ = nll_derivatives(z, y, beta - h)
    assert f == pytest.approx(_scipy_nll(z, y, 1 / beta), rel=1e-12)
    assert g == pytest.approx((f_plus - f_minus) / (2 * h), rel=1e-6)
    assert c == pytest.approx((g_plus - g_minus) / (2 * h), rel=1e-6)


def test_weights_are_repeated_rows(rng):
    # A bootstrap count of c means the row appears c times.
    z = rng.normal(scale=2.0, size=(300, 4))
    y = gumbel_labels(rng, z, 1.4)
    counts = rng.integers(0, 4, size=300)
    weighted = fit_temperature(z, y, weights=counts.astype(float))
    repeated = fit_temperature(np.repeat(z, counts, axis=0), np.repeat(y, counts))
    assert weighted.temperature == pytest.approx(repeated.temperature, rel=1e-10)


def test_perfect_accuracy_hits_lower_bound_with_reason():
    z = (np.eye(4)[np.arange(400) % 4] * 6.0).astype(np.float32)
    y = np.arange(400) % 4
    result = fit_temperature(z, y)
    assert result.on_bound and result.temperature == T_MIN
    assert any("every sample" in w for w in result.warnings)


def test_uninformative_scores_hit_upper_bound(rng):
    z = rng.normal(size=(2000, 3))
    y = rng.integers(0, 3, size=2000)  # labels independent of the scores
    result = fit_temperature(z, y)
    assert result.on_bound and result.temperature == T_MAX
    assert any("no information" in w for w in result.warnings)


def test_far_from_one_warns(rng):
    z = rng.normal(scale=3.0, size=(5000, 4))
    y = gumbel_labels(rng, z, 8.0)
    result = fit_temperature(z, y)
    assert 6.0 < result.temperature < 10.0
    assert any("far from 1" in w for w in result.warnings)


def test_scale_covariance(rng):
    # Fitting on c * z gives c times the temperature fitted on z (T only rescales).
    z = rng.normal(scale=2.0, size=(4000, 6))
    y = gumbel_labels(rng, z, 1.7)
    t = fit_temperature(z, y).temperature
    assert fit_temperature(3.0 * z, y).temperature == pytest.approx(3.0 * t, rel=1e-7)


def test_huge_logits_stay_finite(rng):
    # |z| ~ 1e4 in float32: exp would overflow without the max shift.
    z = (rng.normal(size=(2000, 5)) * 1e4).astype(np.float32)
    y = gumbel_labels(rng, z.astype(np.float64), 5e3)
    result = fit_temperature(z, y)
    assert np.isfinite(result.temperature)
    summary = summarize(z, y, {}, NO_EVAL)
    assert np.isfinite(summary.before.nll) and np.isfinite(summary.after.nll)
    assert summary.after.nll < summary.before.nll


def test_chunking_does_not_change_the_fit(rng, monkeypatch):
    z = rng.normal(scale=2.0, size=(999, 5)).astype(np.float32)
    y = gumbel_labels(rng, z, 1.3)
    whole = fit_temperature(z, y).temperature
    monkeypatch.setattr(sweep, "CHUNK_ELEMENTS", 7 * 5)  # seven rows per chunk
    assert fit_temperature(z, y).temperature == pytest.approx(whole, rel=1e-12)


def test_two_class_softmax_equals_one_logit_sigmoid(rng):
    # K = 2 with softmax outputs: softmax([z0, z1] / T)_1 = sigmoid((z1 - z0) / T)
    # (common practice), so the multiclass and binary fits must give the same T.
    z = rng.normal(scale=3.0, size=(4000, 2))
    y = gumbel_labels(rng, z, 1.8)
    t2 = fit_temperature(z, y).temperature
    t1 = fit_sigmoid_temperature((z[:, 1] - z[:, 0])[:, None], y).temperature
    assert t2 == pytest.approx(t1, rel=1e-8)
    assert t2 == pytest.approx(1.8, rel=0.1)
