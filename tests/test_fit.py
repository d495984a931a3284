"""Temperature fitting: recovery of a known T, agreement with scipy, edge cases."""

import json

import numpy as np
import pytest
import scipy.optimize
import scipy.special

from onnxcal import fit as fitmod
from onnxcal.errors import OnnxcalError
from onnxcal.fit import fit_temperature, load_fit, nll_derivatives, save_fit, summarize


def gumbel_labels(rng, z, temperature):
    """Labels drawn exactly from softmax(z / T) by the Gumbel-max trick.

    Gumbel (1954); Maddison, Tarlow, Minka, "A* Sampling", NeurIPS 2014:
    argmax_k(z_k / T + G_k), G_k i.i.d. standard Gumbel, is distributed as
    softmax(z / T); multiplying through by T gives argmax(z + T G).
    """
    return np.argmax(z + temperature * rng.gumbel(size=z.shape), axis=1)


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


def test_perfect_accuracy_hits_lower_bound_with_reason():
    z = (np.eye(4)[np.arange(400) % 4] * 6.0).astype(np.float32)
    y = np.arange(400) % 4
    result = fit_temperature(z, y)
    assert result.on_bound and result.temperature == fitmod.T_MIN
    assert any("every sample" in w for w in result.warnings)


def test_uninformative_scores_hit_upper_bound(rng):
    z = rng.normal(size=(2000, 3))
    y = rng.integers(0, 3, size=2000)  # labels independent of the scores
    result = fit_temperature(z, y)
    assert result.on_bound and result.temperature == fitmod.T_MAX
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
    z = (rng.normal(size=(2000, 5)) * 1e4).astype(np.float32)
    y = gumbel_labels(rng, z.astype(np.float64), 5e3)
    result = fit_temperature(z, y)
    assert np.isfinite(result.temperature)
    summary = summarize(z, y, {})
    assert np.isfinite(summary.before.nll) and np.isfinite(summary.after.nll)
    assert summary.after.nll < summary.before.nll


def test_chunking_does_not_change_the_fit(rng, monkeypatch):
    z = rng.normal(scale=2.0, size=(999, 5)).astype(np.float32)
    y = gumbel_labels(rng, z, 1.3)
    whole = fit_temperature(z, y).temperature
    monkeypatch.setattr(fitmod, "chunk_rows", lambda k: 7)
    assert fit_temperature(z, y).temperature == pytest.approx(whole, rel=1e-12)


def test_fit_json_round_trip(tmp_path, rng):
    z = rng.normal(scale=3.0, size=(800, 4))
    y = gumbel_labels(rng, z, 2.0)
    summary = summarize(z, y, {"model_sha256": "ab"})
    path = tmp_path / "fit.json"
    save_fit(path, summary)
    again = load_fit(path)
    assert again == summary
    assert json.loads(path.read_text())["temperature"] == summary.temperature


@pytest.mark.parametrize("bad", [-2.0, 0.0, "warm", None, True])
def test_load_fit_refuses_bad_temperature(tmp_path, rng, bad):
    z = rng.normal(size=(100, 3))
    summary = summarize(z, rng.integers(0, 3, 100), {})
    data = summary.to_dict()
    data["temperature"] = bad
    path = tmp_path / "fit.json"
    path.write_text(json.dumps(data))
    with pytest.raises(OnnxcalError, match="temperature"):
        load_fit(path)


def test_load_fit_refuses_non_json(tmp_path):
    path = tmp_path / "fit.json"
    path.write_text("T = 2")
    with pytest.raises(OnnxcalError, match="not an onnxcal fit file"):
        load_fit(path)
