"""Fits whose maximum-likelihood estimate does not exist, inside ``--method auto`` (onnxcal.fit.auto).

A fold without an error, or a map that classifies every row it was fitted on
correctly, has no maximum-likelihood fit: auto fits it to Platt's smoothed
targets, as it would bake it in. Whether a set is separable by a map is
decided here independently of onnxcal, by a linear program (scipy.optimize.linprog:
is there a map whose calibrated logit of each row's class exceeds every other by 1?).
"""

import warnings

import numpy as np
import pytest
import scipy.optimize

from onnxcal.choose import FOLDS, REPEATS
from onnxcal.fit import T_MIN, FitOptions, auto, fit_scaling, summarize
from onnxcal.fit.auto import fit_with_estimate, fold_ids, out_of_fold, row_nll
from onnxcal.fit.smoothed import SEPARATING
from onnxcal.report.pages import choice_rows


def _separable_by_matrix(z: np.ndarray, y: np.ndarray, diagonal: bool) -> bool:
    """Feasibility of W z_i + b with margin 1 (W diagonal: vector scaling), by scipy's linear program."""
    n, k = z.shape
    width = k * k + k
    rows = []
    for zi, yi in zip(z, y, strict=True):
        for j in range(k):
            if j == yi:
                continue
            a = np.zeros(width)  # -(c_y - c_j) <= -1, c = W z + b with W row-major then b
            a[yi * k:(yi + 1) * k] -= zi
            a[j * k:(j + 1) * k] += zi
            a[k * k + yi] -= 1.0
            a[k * k + j] += 1.0
            rows.append(a)
    bounds = [(None, None)] * width
    if diagonal:
        bounds = [(None, None) if r % k == r // k or r >= k * k else (0, 0) for r in range(width)]
    res = scipy.optimize.linprog(np.zeros(width), A_ub=np.array(rows), b_ub=-np.ones(len(rows)), bounds=bounds)
    return bool(res.status == 0)


def _biased(rng: np.random.Generator, n: int, gap: float) -> tuple[np.ndarray, np.ndarray]:
    """Two classes whose second logit u is larger for class 1, all above the first logit (0): the model calls
    every row class 1; a threshold on u (a bias) separates them when ``gap`` > 0, not when it is negative."""
    y = np.arange(n) % 2
    u = np.where(y == 1, rng.uniform(0.4 + gap / 2, 0.8, n), rng.uniform(0.1, 0.4 - gap / 2, n))
    return np.c_[np.zeros(n), u].astype(np.float32), y


def test_a_map_that_separates_its_rows_is_fitted_to_smoothed_targets(rng):
    z, y = _biased(rng, 60, 0.1)
    assert _separable_by_matrix(z.astype(np.float64), y, diagonal=True)  # the premise, decided by linprog
    plain = fit_scaling(z, y, FitOptions(method="vector"))
    assert plain.on_bound and plain.separable  # the maximum-likelihood fit runs to its bound
    assert "classifies every calibration row correctly" in plain.warnings[0]  # an explicit --method vector says so
    result, smoothed = fit_with_estimate(fit_scaling, z, y, FitOptions(method="vector"))
    expected = fit_scaling(z, y, FitOptions(method="vector", smoothed_targets=True))
    assert smoothed and not result.on_bound
    assert result.scaling.parameters == expected.scaling.parameters


def test_a_map_that_cannot_separate_keeps_its_maximum_likelihood_fit(rng):
    z, y = _biased(rng, 60, -0.1)  # the classes overlap on u
    assert not _separable_by_matrix(z.astype(np.float64), y, diagonal=False)
    for method in ("vector", "matrix", "dirichlet"):
        result, smoothed = fit_with_estimate(fit_scaling, z, y, FitOptions(method=method))
        assert not smoothed and not result.separable
        assert not any("classifies every calibration row correctly" in w for w in result.warnings)
        assert result.scaling.parameters == fit_scaling(z, y, FitOptions(method=method)).scaling.parameters


@pytest.mark.parametrize("method", ["histogram", "isotonic"])
def test_a_lookup_keeps_its_fit_though_its_steps_reach_zero_or_one(rng, method):
    # On separable rows every bin (or step) holds one class: probability 0 or 1. auto leaves lookups as they are:
    # smoothed, they scored better cross-fitted than on the test halves (docs/maths.md, "Choosing automatically").
    z, y = _biased(rng, 60, 0.1)
    result, smoothed = fit_with_estimate(fit_scaling, z, y, FitOptions(method=method))
    assert not smoothed
    assert result.scaling.parameters == fit_scaling(z, y, FitOptions(method=method)).scaling.parameters


def test_a_fold_without_an_error_is_fitted_to_smoothed_targets():
    # 40 rows classified correctly but one: the fold that holds that row out is fitted on rows without an
    # error, where temperature's maximum-likelihood fit falls to its bound; auto fits that fold to smoothed targets.
    r = np.random.default_rng(1)
    y = np.arange(40) % 2
    z = np.c_[np.zeros(40), np.where(y == 1, 1.0, -1.0) * r.uniform(1, 3, 40)].astype(np.float32)
    z[0, 1] = 0.5  # row 0, class 0, called class 1
    fold = fold_ids(y, FOLDS, 0)
    train = np.flatnonzero(fold != fold[0])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert fit_scaling(z, y, FitOptions(method="temperature"), rows=train).temperature == pytest.approx(T_MIN)
        oof, _, _, smoothed_folds = out_of_fold(z, y, FitOptions(method="temperature"), fold, fit_scaling)
    assert smoothed_folds == 1
    held = np.flatnonzero(fold == fold[0])
    expected = fit_scaling(z, y, FitOptions(method="temperature", smoothed_targets=True), rows=train).scaling
    assert np.allclose(oof[held], expected.apply(z[held].astype(np.float64)), rtol=1e-12, atol=0)
    assert row_nll(oof[:1], y[:1])[0] < 2.0  # at T_MIN it would be 0.5 / 0.01 = 50 nats


def test_auto_bakes_in_the_smoothed_fit_of_a_map_that_separates_every_row(rng, monkeypatch):
    # Two candidates only (a lookup, perfectly sharp on rows this clean, would win): the model and vector scaling.
    monkeypatch.setattr(auto, "candidate_methods", lambda kind: ("temperature", "vector"))
    z, y = _biased(rng, 80, 0.1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        s = summarize(z, y, {}, FitOptions(method="auto", bootstrap=100))
    assert s.choice.chosen in SEPARATING
    assert s.options.smoothed_targets and not s.choice.smoothed_targets  # that map alone, not every candidate
    assert "maximum-likelihood fit does not exist" in s.choice.reason
    expected = fit_scaling(z, y, FitOptions(method=s.choice.chosen, smoothed_targets=True)).scaling
    for name, value in expected.parameters.items():  # the summary's solver starts elsewhere: the same optimum
        assert np.allclose(s.scaling.parameters[name], value, rtol=1e-5, atol=1e-6)
    chosen = next(c for c in s.choice.candidates if c.method == s.choice.chosen)
    fits = FOLDS * REPEATS  # 80 rows x 2 classes: a small set, cross-fitted REPEATS times
    assert s.choice.repeats == REPEATS and chosen.smoothed_folds == fits
    _, rows = choice_rows(s.choice.to_dict())
    assert f"smoothed targets on {fits} of {fits} fold fits" in next(r for r in rows if r[0] == s.choice.chosen)[-1]
