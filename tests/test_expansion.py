"""Bootstrap replicates from the expansion at the fit, against exact refits."""

import numpy as np

from onnxcal import expansion, resample
from onnxcal.fit import FitOptions, fit_scaling, fit_temperature, summarize
from onnxcal.metrics.binning import _binned


def gumbel_set(seed, n, k, t_true=1.4):
    # Labels drawn from softmax(z / T) by the Gumbel-max trick (Gumbel 1954).
    rng = np.random.default_rng(seed)
    z = rng.normal(scale=3.0, size=(n, k))
    return z, np.argmax(z + t_true * rng.gumbel(size=z.shape), axis=1)


def test_replicates_match_exact_refits(monkeypatch):
    # The same draws, refitted and rescored exactly (evaluate) against the
    # expansion. Its tolerance is loosened so that a set small enough for a
    # test takes it; the error bound it then guarantees is 1e-6 (relative, beta).
    monkeypatch.setattr(expansion, "TAYLOR_TOL", 1e-6)
    monkeypatch.setattr(resample, "EXACT_EVAL_BUDGET", 0)  # the metrics from the expansion too
    z, y = gumbel_set(11, 40000, 10)
    fit_rows, held = resample.split_holdout(y, 0.25, seed=0)
    opts = FitOptions(bootstrap=20)
    start = fit_temperature(z, y, rows=fit_rows).scaling
    exp = expansion.expand(z, y, fit_rows, held, 1.0 / start.temperature, threads=1)
    assert exp.accurate
    draws = list(resample._draws(np.random.default_rng(3), 20, len(fit_rows), len(held)))
    run = resample.Replicates(z, y, opts, fit_rows, held, start, fit_scaling, 1)
    exact_p, exact_m = run.exact(draws)
    taylor_p, taylor_m, fallbacks = run.taylor(exp, draws)
    assert fallbacks == 0
    t_exact = np.array([float(p["temperature"]) for p in exact_p])
    t_taylor = np.array([float(p["temperature"]) for p in taylor_p])
    np.testing.assert_allclose(t_taylor, t_exact, rtol=1e-6)
    for key, tol in (("nll", 1e-7), ("brier", 1e-7), ("mean_confidence", 1e-7), ("accuracy", 0),
                     ("ece", 1e-5), ("mce", 1e-4), ("adaptive_ece", 1e-5)):
        got = np.array([m[key] for m in taylor_m])
        want = np.array([m[key] for m in exact_m])
        np.testing.assert_allclose(got, want, atol=tol, rtol=0, err_msg=key)
    assert all(np.isnan(m["classwise_ece"]) for m in taylor_m)


def test_taylor_and_grid_give_the_same_intervals(monkeypatch):
    # Both approximate the same replicates (same draws); their percentile
    # intervals agree far inside the intervals' own width.
    monkeypatch.setattr(expansion, "TAYLOR_TOL", 1e-6)
    z, y = gumbel_set(12, 40000, 10)
    taylor = summarize(z, y, {}, FitOptions(bootstrap=50)).intervals
    assert taylor["replicates_by"] == "taylor"
    monkeypatch.setattr(expansion, "TAYLOR_TOL", 0.0)  # the expansion is never accurate: the grid
    grid = summarize(z, y, {}, FitOptions(bootstrap=50)).intervals
    assert grid["replicates_by"] == "grid"
    np.testing.assert_allclose(taylor["temperature"], grid["temperature"], rtol=1e-6)
    for key in ("nll", "brier", "accuracy", "mean_confidence"):
        np.testing.assert_allclose(taylor["after"][key], grid["after"][key], rtol=1e-5, err_msg=key)


def test_prefix_bins_and_quantiles_are_exact(rng):
    # Rows sorted by u, each v within delta of its u: the prefix sums give the
    # same bins as binning v directly (numpy.searchsorted, right-closed), and
    # the same equal-mass edges as numpy.quantile of the repeated values.
    n = 5000
    u = np.sort(rng.random(n))
    delta = 3e-3
    v = np.clip(u + rng.uniform(-delta, delta, n), 0, 1)
    v[::97] = u[::97]  # some exactly at their u
    edge_rows = np.searchsorted(u, np.linspace(0, 1, 16)[1:-1])
    v[edge_rows] = np.linspace(0, 1, 16)[1:-1]  # some exactly on an edge (bins are right-closed)
    c = rng.integers(0, 4, n).astype(np.float64)
    correct = (rng.random(n) < v).astype(np.float64)
    sums = expansion._Prefix(u, v, c, correct, delta * (1 + 1e-9))
    inner = np.linspace(0, 1, 16)[1:-1]
    for got, want in zip(sums.bins(inner), _binned(np.searchsorted(inner, v), v, correct, 15, c), strict=True):
        np.testing.assert_allclose(got, want, rtol=1e-11, atol=1e-9)
    qs = np.linspace(0, 1, 16)
    edges = sums.quantiles(qs)
    np.testing.assert_array_equal(edges, np.quantile(np.repeat(v, c.astype(int)), qs))
    mass = sums.bins(edges[1:-1])
    want = _binned(np.searchsorted(edges[1:-1], v), v, correct, 15, c)
    for got, w in zip(mass, want, strict=True):
        np.testing.assert_allclose(got, w, rtol=1e-11, atol=1e-9)
