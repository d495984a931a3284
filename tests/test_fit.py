"""Fitting: recovery of known parameters, agreement with reference solvers,
holdout, bootstrap, warnings and FIT.json."""

import json

import numpy as np
import pytest
import scipy.optimize
import scipy.special
from sklearn.datasets import load_digits
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import train_test_split

from onnxcal import metrics, resample, sweep, tempfit
from onnxcal.errors import OnnxcalError
from onnxcal.fit import (
    T_MAX,
    T_MIN,
    FitOptions,
    _affine_pass,
    fit_scaling,
    fit_sigmoid_temperature,
    fit_temperature,
    load_fit,
    nll_derivatives,
    save_fit,
    summarize,
)
from onnxcal.metrics import evaluate


def gumbel_labels(rng, z, temperature):
    """Labels drawn exactly from softmax(z / T) by the Gumbel-max trick.

    Gumbel (1954); Maddison, Tarlow, Minka, "A* Sampling", NeurIPS 2014:
    argmax_k(z_k / T + G_k), G_k i.i.d. standard Gumbel, is distributed as
    softmax(z / T); multiplying through by T gives argmax(z + T G).
    """
    return np.argmax(z + temperature * rng.gumbel(size=z.shape), axis=1)


def bernoulli_labels(rng, s):
    """0/1 labels with P(1) = sigmoid(s) (the definition of the logistic model)."""
    return (rng.random(s.shape) < scipy.special.expit(s)).astype(np.uint8)


NO_EVAL = FitOptions(holdout=0, bootstrap=0)


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


# --------------------------------------------------------------------------
# Warnings on the data


def test_few_samples_and_absent_classes_warn(rng):
    z = rng.normal(scale=2.0, size=(60, 5))
    y = rng.integers(0, 3, size=60)  # classes 3 and 4 never occur
    s = summarize(z, y, {}, NO_EVAL)
    assert any("2 of 5 classes never occur" in w and "3, 4" in w for w in s.warnings)
    assert any("12 samples per class on average" in w for w in s.warnings)


def test_single_class_present(rng):
    z = rng.normal(scale=2.0, size=(500, 4))
    z[:, 0] += 2.0
    y = np.zeros(500, dtype=int)
    s = summarize(z, y, {}, FitOptions(bootstrap=0))
    assert any("3 of 4 classes never occur" in w for w in s.warnings)
    assert np.isfinite(s.after.nll) and s.after.nll <= s.before.nll + 1e-12


# --------------------------------------------------------------------------
# Holdout and summary


def test_holdout_is_stratified_disjoint_and_seeded(rng):
    y = np.repeat(np.arange(4), [400, 200, 100, 40])
    fit_rows, held = resample.split_holdout(y, 0.25, seed=3)
    assert np.intersect1d(fit_rows, held).size == 0 and len(fit_rows) + len(held) == len(y)
    np.testing.assert_array_equal(np.bincount(y[held]), [100, 50, 25, 10])
    again = resample.split_holdout(y, 0.25, seed=3)[1]
    other = resample.split_holdout(y, 0.25, seed=4)[1]
    np.testing.assert_array_equal(held, again)
    assert not np.array_equal(held, other)


def test_multilabel_holdout_keeps_rare_labels_in_both_parts(rng):
    y = (rng.random((1000, 3)) < [0.5, 0.2, 0.04]).astype(np.uint8)
    fit_rows, held = resample.split_holdout(y, 0.25, seed=0)
    assert y[held, 2].sum() > 0 and y[fit_rows, 2].sum() > 0
    assert abs(y[held, 2].mean() - y[:, 2].mean()) < 0.015


def test_holdout_too_small_is_refused():
    with pytest.raises(OnnxcalError, match="leaves no"):
        resample.split_holdout(np.array([0, 1, 2]), 0.1, seed=0)


def test_summary_headline_is_held_out_and_refit_on_all(rng):
    z = rng.normal(scale=3.0, size=(4000, 6))
    y = gumbel_labels(rng, z, 1.6)
    s = summarize(z, y, {}, FitOptions(bootstrap=0))
    fit_rows, held = resample.split_holdout(y, 0.25, seed=0)
    assert s.basis == "held-out" and s.before.n == len(held) and abs(len(held) - 1000) <= 3
    part_t = fit_temperature(z, y, rows=fit_rows).temperature
    assert s.holdout_result.temperature == pytest.approx(part_t, rel=1e-9)
    for got, rows in ((s.after, held), (s.fit_part["after"], fit_rows)):
        want = evaluate(z, y, part_t, rows=rows)
        for key in metrics.METRIC_FIELDS:
            assert getattr(got, key) == pytest.approx(getattr(want, key), rel=1e-9)
    assert s.temperature == pytest.approx(fit_temperature(z, y).temperature, rel=1e-9)
    assert any("refitted on all 4000 samples" in n for n in s.notes)
    ins = summarize(z, y, {}, NO_EVAL)
    assert ins.basis == "in-sample" and ins.fit_part is None and ins.before.n == 4000
    assert any("in-sample" in n for n in ins.notes)


def test_digits_vector_and_temperature_reduce_held_out_nll():
    # Open data: scikit-learn's bundled handwritten digits (UCI optical digits).
    # A barely regularised logistic regression trained on 300 images is
    # overconfident on the other 1497; both scalings, fitted on 3/4 of those
    # and scored on the held-out 1/4, must lower the held-out NLL.
    x, y = load_digits(return_X_y=True)
    x_train, x_val, y_train, y_val = train_test_split(x / 16.0, y, train_size=300, random_state=0, stratify=y)
    clf = LogisticRegression(C=1e4, max_iter=5000).fit(x_train, y_train)
    z = clf.decision_function(x_val).astype(np.float32)
    temp = summarize(z, y_val, {}, FitOptions(bootstrap=0))
    vec = summarize(z, y_val, {}, FitOptions(method="vector", bootstrap=0))
    assert temp.basis == vec.basis == "held-out"
    assert temp.after.nll < 0.9 * temp.before.nll
    assert vec.after.nll < 0.9 * vec.before.nll
    assert temp.after.accuracy == temp.before.accuracy  # T > 0 keeps every argmax
    assert temp.temperature > 1.0  # overconfident: softened


# --------------------------------------------------------------------------
# Bootstrap


def test_bootstrap_interval_covers_known_temperature(monkeypatch):
    # Coverage of the percentile interval over 40 independent data sets with a
    # known T (labels by Gumbel-max sampling). If the interval really holds 95 %,
    # the number of covering sets is Binomial(40, 0.95): P(at most 33) = 0.0034
    # (scipy.stats.binom.cdf(33, 40, 0.95)), so requiring >= 34 almost never
    # fails a correct interval, while an interval holding only 80 % fails it with
    # probability 0.71. (Over 300 further seeded sets of this size the interval
    # covered 93 %, within Monte-Carlo error of 95 % for a percentile interval at
    # n = 1200; this test's 40 sets give 35.) Each set uses the full 200 replicates (fewer would make
    # the 2.5 % tails too coarse to claim 95 %); it stays fast because the
    # multiclass-temperature bootstrap interpolates on a grid of 9 betas (a few
    # passes over the data) instead of refitting each replicate; the metrics'
    # intervals come from the same grid (EXACT_EVAL_BUDGET = 0), as on a large set.
    monkeypatch.setattr(resample, "EXACT_EVAL_BUDGET", 0)
    t_true, covered = 1.5, 0
    for rep in range(40):
        rng = np.random.default_rng(1000 + rep)
        z = rng.normal(scale=3.0, size=(1200, 5))
        y = gumbel_labels(rng, z, t_true)
        lo, hi = summarize(z, y, {}, FitOptions(seed=rep, holdout=0)).intervals["temperature"]
        covered += lo <= t_true <= hi
    print(f"{covered} of 40 intervals cover T = {t_true}")
    assert covered >= 34


def _draws(seed, replicates, n_fit, n_eval):
    return list(resample._draws(np.random.default_rng(seed), replicates, n_fit, n_eval))


def test_grid_bootstrap_matches_exact_refits(rng, monkeypatch):
    # The fast path (Hermite interpolation on a beta grid) against refitting and
    # rescoring every replicate exactly, with the same draws.
    z = rng.normal(scale=3.0, size=(3000, 6)).astype(np.float32)
    y = gumbel_labels(rng, z, 1.4)
    fit_rows, held = resample.split_holdout(y, 0.25, seed=0)
    opts = FitOptions(bootstrap=25)
    start = fit_temperature(z, y, rows=fit_rows).scaling
    draws = _draws(5, 25, len(fit_rows), len(held))
    run = resample.Replicates(z, y, opts, fit_rows, held, start, fit_scaling, 1)
    exact_p, exact_m = run.exact(draws)
    monkeypatch.setattr(resample, "EXACT_EVAL_BUDGET", 0)  # interpolate the metrics too
    grid_p, grid_m, fallbacks = run.grid(draws)
    assert fallbacks == 0
    t_exact = np.array([float(p["temperature"]) for p in exact_p])
    t_grid = np.array([float(p["temperature"]) for p in grid_p])
    np.testing.assert_allclose(t_grid, t_exact, rtol=1e-6)
    for key, tol in (("nll", 1e-6), ("brier", 1e-6), ("accuracy", 0), ("mean_confidence", 1e-6), ("ece", 2e-3)):
        got = np.array([m[key] for m in grid_m])
        want = np.array([m[key] for m in exact_m])
        np.testing.assert_allclose(got, want, atol=tol, rtol=0)
    assert all(np.isnan(m["classwise_ece"]) for m in grid_m)


def test_bootstrap_intervals_for_every_method(rng):
    z = rng.normal(scale=2.0, size=(1500, 3))
    y = gumbel_labels(rng, z, 1.5)
    s = summarize(z, y, {}, FitOptions(method="vector", bootstrap=20))
    iv = s.intervals
    assert iv["replicates"] == 20 and len(iv["parameters"]["w"]) == 3
    for key in metrics.METRIC_FIELDS:
        lo, hi = iv["after"][key]
        assert lo <= hi
    lo, hi = iv["after"]["accuracy"]
    assert lo < s.after.accuracy < hi
    zb = rng.normal(scale=3.0, size=(1500, 1))
    sb = summarize(zb, bernoulli_labels(rng, zb[:, 0] / 2), {}, FitOptions(bootstrap=30))
    lo, hi = sb.intervals["temperature"]
    assert lo < sb.holdout_result.temperature < hi


# --------------------------------------------------------------------------
# FIT.json


def test_fit_json_round_trip(tmp_path, rng):
    z = rng.normal(scale=3.0, size=(800, 4))
    y = gumbel_labels(rng, z, 2.0)
    for options in (FitOptions(bootstrap=10), FitOptions(method="vector", holdout=0, bootstrap=0)):
        summary = summarize(z, y, {"model_sha256": "ab"}, options)
        path = tmp_path / "fit.json"
        save_fit(path, summary)
        again = load_fit(path)
        assert again == summary
        data = json.loads(path.read_text())
        assert data["method"] == options.method and data["metrics"]["basis"] == summary.basis
        assert data["parameters"] == summary.scaling.parameters


@pytest.mark.parametrize("bad", [-2.0, 0.0, "warm", None, True])
def test_load_fit_refuses_bad_temperature(tmp_path, rng, bad):
    z = rng.normal(size=(100, 3))
    summary = summarize(z, rng.integers(0, 3, 100), {}, NO_EVAL)
    data = summary.to_dict()
    data["temperature"] = bad
    data["parameters"]["temperature"] = bad
    path = tmp_path / "fit.json"
    path.write_text(json.dumps(data))
    with pytest.raises(OnnxcalError, match="temperature"):
        load_fit(path)


def test_load_fit_refuses_bad_vector(tmp_path, rng):
    z = rng.normal(size=(100, 3))
    data = summarize(z, rng.integers(0, 3, 100), {}, FitOptions(method="vector", holdout=0, bootstrap=0)).to_dict()
    data["parameters"]["w"] = [1.0, float("nan"), 1.0]
    path = tmp_path / "fit.json"
    path.write_text(json.dumps(data))
    with pytest.raises(OnnxcalError, match="invalid calibration parameters"):
        load_fit(path)


def test_load_fit_refuses_non_json(tmp_path):
    path = tmp_path / "fit.json"
    path.write_text("T = 2")
    with pytest.raises(OnnxcalError, match="not an onnxcal fit file"):
        load_fit(path)


def test_memory_stays_bounded_beyond_the_logits(rng):
    # The solvers and the metrics work in row chunks: their temporaries must not
    # grow with the logits (here 40 MB of float32; a float64 copy would be 80 MB).
    # A pass holds five 1 MiB scratch arrays per thread (two threads here) and a
    # few per-row figures (9 bytes per row) and small sums: about 15 MB in all.
    import tracemalloc

    z = rng.normal(scale=3.0, size=(5000, 2000)).astype(np.float32)
    y = gumbel_labels(rng, z, 1.5)
    no_bootstrap = FitOptions(bootstrap=0)
    for fn in (
        lambda: fit_temperature(z, y, threads=2),
        lambda: evaluate(z, y, 1.5, threads=2),
        lambda: summarize(z, y, {}, no_bootstrap, threads=2),
    ):
        tracemalloc.start()
        base = tracemalloc.get_traced_memory()[0]
        fn()
        peak = tracemalloc.get_traced_memory()[1] - base
        tracemalloc.stop()
        assert peak < 20 * 2**20, peak
