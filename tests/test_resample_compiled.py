"""The bootstrap's compiled replicates (onnxcal.kernels.resample_kernels, onnxcal.expansion_blocks) against the
numpy path they replace, which stays the reference (ONNXCAL_COMPILED=0), and against numpy itself."""

import numpy as np
import pytest

from onnxcal import expansion, expansion_blocks, kernels, resample
from onnxcal.expansion_blocks import CompiledReplicates
from onnxcal.fit import FitOptions, fit_scaling, fit_temperature
from onnxcal.holdout import samples_of
from onnxcal.kernels import resample_kernels
from onnxcal.metrics.binning import _binned


def gumbel_set(seed, n, k, t_true=1.4):
    # Labels drawn from softmax(z / T) by the Gumbel-max trick (Gumbel 1954), as in test_expansion.
    rng = np.random.default_rng(seed)
    z = rng.normal(scale=3.0, size=(n, k))
    return z, np.argmax(z + t_true * rng.gumbel(size=z.shape), axis=1)


def test_int32_draws_are_numpys_int64_draws():
    # resample._draw asks numpy for int32 positions: numpy's bounded generator gives the same values as for int64
    # (and leaves the generator in the same state), so the replicates and everything drawn after are unchanged.
    for n in (1, 7, 250_001, 750_000):
        a, b = np.random.default_rng([5, 1]), np.random.default_rng([5, 1])
        for _ in range(3):
            got = resample._draw(a, n, None)
            assert got.dtype == np.int32
            np.testing.assert_array_equal(got, b.integers(0, n, n))
        assert a.bit_generator.state == b.bit_generator.state
    groups = np.repeat(np.arange(40), np.arange(1, 41))
    samples = samples_of(groups)
    a, b = np.random.default_rng(9), np.random.default_rng(9)
    np.testing.assert_array_equal(resample._draw(a, 0, samples), samples.rows(b.integers(0, 40, 40)))


def test_the_compiled_exponential_is_numpys():
    # numpy.exp as the reference library; the polynomial is meant for |x| <= 700 (log-probabilities here).
    x = np.concatenate([np.linspace(-700, 700, 200_001), np.random.default_rng(0).uniform(-60, 0, 100_000), [0.0]])
    out = np.empty_like(x)
    resample_kernels.exp_array(x, out)
    np.testing.assert_allclose(out, np.exp(x), rtol=5e-15, atol=0)


def _setup(monkeypatch, n=40000, seed=11):
    monkeypatch.setattr(expansion, "TAYLOR_TOL", 1e-6)  # a set small enough for a test takes the expansion
    monkeypatch.setattr(resample, "EXACT_EVAL_BUDGET", 0)  # the metrics from the expansion
    z, y = gumbel_set(seed, n, 10)
    fit_rows, held = resample.split_holdout(y, 0.25, seed=0)
    start = fit_temperature(z, y, rows=fit_rows).scaling
    exp = expansion.expand(z, y, fit_rows, held, 1.0 / start.temperature, threads=1)
    assert exp.accurate
    return z, y, fit_rows, held, start, exp


def test_compiled_replicates_equal_the_numpy_path(monkeypatch):
    # The same draws through both paths: every replicate's temperature and metric equal to rounding (the kernels
    # sum in another order; gap and MCE are differences, so they are compared to the metric's scale).
    z, y, fit_rows, held, start, exp = _setup(monkeypatch)
    opts = FitOptions(bootstrap=21)  # three blocks, the last one short
    run = resample.Replicates(z, y, opts, fit_rows, held, start, fit_scaling, 1)
    monkeypatch.setenv(kernels.ENV, "0")
    ref_p, ref_m, ref_fb = run.taylor(exp, resample._draws(np.random.default_rng(3), 21, len(fit_rows), len(held)))
    monkeypatch.setenv(kernels.ENV, "1")
    monkeypatch.setattr(kernels, "MIN_REPLICATE_ROWS", 0)
    for threads in (1, 2):
        run.threads = threads
        draws = resample._draws(np.random.default_rng(3), 21, len(fit_rows), len(held))
        got_p, got_m, got_fb = run.taylor(exp, draws)
        assert got_fb == ref_fb == 0
        np.testing.assert_allclose([float(p["temperature"]) for p in got_p],
                                   [float(p["temperature"]) for p in ref_p], rtol=1e-13)
        for key in ("nll", "brier", "accuracy", "mean_confidence", "ece", "adaptive_ece", "mce", "gap"):
            got = np.array([m[key] for m in got_m])
            want = np.array([m[key] for m in ref_m])
            np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-14, err_msg=key)
        assert all(np.isnan(m["classwise_ece"]) for m in got_m)


def test_compiled_intervals_equal_the_numpy_intervals(monkeypatch):
    # The whole bootstrap (same seed): the same path, the same intervals to 1e-12 relative.
    z, y, fit_rows, held, start, exp = _setup(monkeypatch, seed=12)
    opts = FitOptions(bootstrap=40, seed=4)
    monkeypatch.setenv(kernels.ENV, "0")
    want = resample.bootstrap(z, y, opts, fit_rows, held, start, refit=fit_scaling, expansion=exp, threads=2)
    monkeypatch.setenv(kernels.ENV, "1")
    monkeypatch.setattr(kernels, "MIN_REPLICATE_ROWS", 0)
    got = resample.bootstrap(z, y, opts, fit_rows, held, start, refit=fit_scaling, expansion=exp, threads=2)
    assert got["replicates_by"] == want["replicates_by"] == "taylor"
    np.testing.assert_allclose(got["temperature"], want["temperature"], rtol=1e-12)
    for key, interval in want["after"].items():
        if interval is None:
            assert got["after"][key] is None, key
        else:
            np.testing.assert_allclose(got["after"][key], interval, rtol=1e-12, err_msg=key)
    assert got["notes"] == want["notes"]


def test_a_count_that_would_wrap_takes_the_numpy_path(monkeypatch):
    # uint8 counts: a row drawn 255 times or more sends its replicate to Expansion.root / metrics.
    z, y, fit_rows, held, start, exp = _setup(monkeypatch)
    draws = list(resample._draws(np.random.default_rng(3), 3, len(fit_rows), len(held)))
    draws[1].fit[:300] = 5  # row 5 of the fit part drawn 300 times
    draws[2].held[:256] = 7
    fast = CompiledReplicates(exp)
    (block,) = fast.blocks(draws)
    assert [w is not None for w in block.wrapped] == [False, True, True]
    opts = FitOptions(bootstrap=3)
    run = resample.Replicates(z, y, opts, fit_rows, held, start, fit_scaling, 1)
    monkeypatch.setenv(kernels.ENV, "0")
    want = run.taylor(exp, draws)
    monkeypatch.setattr(kernels, "MIN_REPLICATE_ROWS", 0)
    monkeypatch.setenv(kernels.ENV, "1")
    got = run.taylor(exp, draws)
    for g, w in zip(got[1], want[1], strict=True):
        np.testing.assert_allclose(g["nll"], w["nll"], rtol=1e-12)
    np.testing.assert_array_equal(fast.fit_counts(block, 0), draws[0].fit_counts)
    np.testing.assert_array_equal(fast.held_counts(block, 0), draws[0].held_counts)


@pytest.mark.parametrize("delta", [3e-3, 0.2])  # windows apart, and overlapping (every row one by one)
def test_bin_sums_and_order_statistics_are_numpys(rng, delta):
    # Rows sorted by u, each v within delta of its u: the bins are those of numpy.searchsorted (right-closed), and
    # the equal-mass edges numpy.quantile of the repeated values, to the bit.
    n = 5000
    u = np.sort(rng.random(n))
    v = np.clip(u + rng.uniform(-delta, delta, n), 0, 1)
    inner = np.linspace(0, 1, 16)[1:-1]
    v[np.searchsorted(u, inner)] = inner  # some exactly on an edge
    c = rng.integers(0, 4, n).astype(np.uint8)
    correct = (rng.random(n) < v).astype(np.float64)
    cum = np.empty(n + 1, np.int64)
    resample_kernels.running_counts(c, cum)
    np.testing.assert_array_equal(cum, np.concatenate([[0], np.cumsum(c)]))
    bound = float(np.abs(v - u).max()) * (1 + 1e-9) + 1e-15
    sums = np.empty((3, 15))
    resample_kernels.bin_sums(u, v, c, correct, inner, bound, sums)
    for got, want in zip(sums, _binned(np.searchsorted(inner, v), v, correct, 15, c.astype(np.float64)), strict=True):
        np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-12)
    pool = np.sort(np.repeat(v, c))
    for j in (0, 1, 777, len(pool) // 2, len(pool) - 2, len(pool) - 1):
        got_pair = resample_kernels.order_pair(u, v, c, cum, bound, j, len(pool))
        assert got_pair == (pool[j], pool[min(j + 1, len(pool) - 1)])


def test_counts_drawn_in_the_kernel_are_numpys_draws():
    # expansion_blocks.draw_counts reads the generator's raw 64-bit outputs: the same positions as numpy's
    # Generator.integers (the reference), and the generator left in the same state (so what is drawn after is too).
    for n in (1, 2, 3, 7, 1000, 99_999, 250_001):
        a, b = np.random.default_rng([n, 1]), np.random.default_rng([n, 1])
        for _ in range(3):
            want = np.bincount(a.integers(0, n, n), minlength=n)
            counts = np.zeros(n, np.uint8)
            assert not expansion_blocks.draw_counts(resample_kernels, b, n, counts, None)
            np.testing.assert_array_equal(counts, want)
            assert a.bit_generator.state == b.bit_generator.state
    rank = np.random.default_rng(0).permutation(1000)
    a, b = np.random.default_rng(2), np.random.default_rng(2)
    counts = np.zeros(1000, np.uint8)
    expansion_blocks.draw_counts(resample_kernels, b, 1000, counts, rank)
    np.testing.assert_array_equal(counts[rank], np.bincount(a.integers(0, 1000, 1000), minlength=1000))
    # ranges where about half the 32-bit values are rejected and drawn again
    for n in (2**31 - 1, 3 * 2**29 + 1):
        a, b = np.random.default_rng(n), np.random.default_rng(n)
        got = np.empty(20_001, np.int64)
        expansion_blocks.draw_counts(resample_kernels, b, n, np.empty(0, np.uint8), None, got)
        np.testing.assert_array_equal(got, a.integers(0, n, len(got)))
        assert a.bit_generator.state == b.bit_generator.state
    assert expansion_blocks.draws_like_numpy(np.random.default_rng(0), 10)
    assert not expansion_blocks.draws_like_numpy(np.random.Generator(np.random.MT19937(0)), 10)


@pytest.mark.parametrize("holdout", [0.25, 0.0])
def test_drawn_blocks_give_the_numpy_intervals(monkeypatch, holdout):
    # The replicates drawn and counted in the kernel (held-out and in-sample), one of them with a count made to
    # look wrapped (it is drawn again from the same state by numpy and takes the numpy path): the intervals of
    # the numpy path, and the generator in the same state after.
    monkeypatch.setattr(expansion, "TAYLOR_TOL", 1e-6)
    monkeypatch.setattr(resample, "EXACT_EVAL_BUDGET", 0)
    z, y = gumbel_set(13, 40000, 10)
    fit_rows, held = resample.split_holdout(y, holdout, seed=0) if holdout else (np.arange(len(y)),) * 2
    start = fit_temperature(z, y, rows=fit_rows).scaling
    exp = expansion.expand(z, y, fit_rows, held, 1.0 / start.temperature, threads=1)
    assert exp.accurate
    opts = FitOptions(bootstrap=19, seed=6)
    told = []
    monkeypatch.setenv(kernels.ENV, "0")
    want = resample.bootstrap(z, y, opts, fit_rows, held, start, refit=fit_scaling, expansion=exp, threads=2)
    monkeypatch.setenv(kernels.ENV, "1")
    monkeypatch.setattr(kernels, "MIN_REPLICATE_ROWS", 0)
    calls = []
    real = expansion_blocks.draw_counts

    def draw_counts(*args):
        calls.append(1)
        return real(*args) or len(calls) == 3

    monkeypatch.setattr(expansion_blocks, "draw_counts", draw_counts)
    got = resample.bootstrap(z, y, opts, fit_rows, held, start, refit=fit_scaling, expansion=exp, threads=2,
                             progress=lambda *a: told.append(a))
    assert told == [("bootstrap", k, 19) for k in range(20)]
    np.testing.assert_allclose(got["temperature"], want["temperature"], rtol=1e-12)
    for key, interval in want["after"].items():
        if interval is not None:
            np.testing.assert_allclose(got["after"][key], interval, rtol=1e-12, err_msg=key)
