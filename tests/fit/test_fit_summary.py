"""onnxcal.fit.summary: warnings on the data, holdout, the summary, bootstrap intervals and memory."""

import numpy as np
import pytest
from fit_cases import NO_EVAL, bernoulli_labels, gumbel_labels
from sklearn.datasets import load_digits
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import train_test_split

from onnxcal import metrics, resample
from onnxcal.errors import OnnxcalError
from onnxcal.fit import FitOptions, fit_scaling, fit_temperature, summarize
from onnxcal.metrics import evaluate

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


# --------------------------------------------------------------------------
# Progress: the fit's stages and every bootstrap replicate, in order


def _heard() -> tuple[list[tuple[str, int, int]], object]:
    calls: list[tuple[str, int, int]] = []
    return calls, lambda stage, done, total: calls.append((stage, done, total))


def _stages(calls: list[tuple[str, int, int]]) -> list[str]:
    return [s for i, (s, _, _) in enumerate(calls) if i == 0 or calls[i - 1][0] != s]


@pytest.mark.parametrize(
    ("options", "labels"),
    [
        (FitOptions(bootstrap=17), "multiclass"),  # temperature: the three passes, the expansion's replicates
        (FitOptions(bootstrap=17, holdout=0.0), "multiclass"),  # in-sample
        (FitOptions(method="vector", bootstrap=5), "multiclass"),  # exact refits
        (FitOptions(bootstrap=9), "binary"),  # a sigmoid temperature
    ],
)
def test_progress_hears_the_stages_and_every_replicate_in_order(rng, options, labels):
    k = 4 if labels == "multiclass" else 1
    z = rng.normal(scale=2.0, size=(3000, k))
    y = gumbel_labels(rng, z, 2.0) if k > 1 else bernoulli_labels(rng, z[:, 0] / 2.0)
    calls, progress = _heard()
    s = summarize(z, y, {}, options, progress=progress)
    assert _stages(calls) == ["fitting", "bootstrap"]
    fitting = [(d, t) for st, d, t in calls if st == "fitting"]
    assert fitting[0] == (0, 3) and fitting[-1] == (3, 3) and [d for d, _ in fitting] == sorted(d for d, _ in fitting)
    boot = [(d, t) for st, d, t in calls if st == "bootstrap"]
    assert boot == [(i, options.bootstrap) for i in range(options.bootstrap + 1)]  # each replicate once, in order
    assert s.intervals["replicates"] == options.bootstrap
    quiet = summarize(z, y, {}, options)  # the callback changes nothing
    assert quiet.to_dict() == s.to_dict()


def test_progress_of_auto_counts_the_methods_then_names_the_chosen_one(rng):
    z = rng.normal(scale=2.0, size=(600, 3))
    y = gumbel_labels(rng, z, 2.0)
    calls, progress = _heard()
    s = summarize(z, y, {}, FitOptions(method="auto", bootstrap=2), progress=progress)
    chosen = s.choice.chosen
    assert _stages(calls) == ["cross-fitting", f"{chosen}: fitting", f"{chosen}: bootstrap"]
    crossed = [(d, t) for st, d, t in calls if st == "cross-fitting"]
    n = len(s.choice.candidates)
    assert crossed == [(i, n) for i in range(n + 1)]  # every method compared, counted in order
    assert [d for st, d, _ in calls if st == f"{chosen}: bootstrap"] == [0, 1, 2]
