"""The shared pass over multiclass logits: cumulants, precision, threads, chunks."""

import numpy as np
import pytest
import scipy.special

from onnxcal import sweep
from onnxcal.fit import FitOptions, summarize
from onnxcal.metrics import METRIC_FIELDS, evaluate


def definitions(z, beta):
    """L(beta) = logsumexp(beta z) and the cumulants 1..5 of z under softmax(beta z), from
    their definitions: mean, variance, third central moment, mu_4 - 3 mu_2^2,
    mu_5 - 10 mu_3 mu_2 (common practice; scipy.special for the softmax)."""
    z = np.asarray(z, dtype=np.float64)
    p = scipy.special.softmax(beta * z, axis=1)
    mean = (p * z).sum(axis=1)
    c = z - mean[:, None]
    mu = [(p * c**j).sum(axis=1) for j in range(6)]
    kappa = np.stack([mean, mu[2], mu[3], mu[4] - 3 * mu[2] ** 2, mu[5] - 10 * mu[3] * mu[2]], axis=1)
    return scipy.special.logsumexp(beta * z, axis=1), kappa


def terms(z, y, beta, moments=5, sq=4):
    buf = sweep._Buffers(len(z), z.shape[1], sweep.compute_dtype(z))  # noqa: SLF001
    return sweep.exp_terms(z, y, beta, moments, sq, buf)


@pytest.mark.parametrize("beta", [1.0, 0.6, 2.3])
def test_cumulants_are_the_derivatives_of_the_log_partition(rng, beta):
    z = rng.normal(scale=3.0, size=(400, 7))
    y = rng.integers(0, 7, 400)
    t = terms(z, y, beta)
    log_total, kappa = definitions(z, beta)
    np.testing.assert_allclose(t.log_total, log_total, rtol=1e-13)
    np.testing.assert_allclose(t.cumulants, kappa, rtol=1e-9, atol=1e-9)
    sq_total, sq_kappa = definitions(z, 2 * beta)
    np.testing.assert_allclose(t.sq_log_total, sq_total, rtol=1e-13)
    np.testing.assert_allclose(t.sq_cumulants, sq_kappa[:, :4], rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(t.nll, log_total - beta * z[np.arange(400), y], rtol=1e-13, atol=1e-12)


def test_float32_exponentials_at_the_exact_beta(rng):
    # beta = 1/1.7 is not a float32 number: the exponentials are taken at the
    # nearest float32 and the sums carried to the exact beta. Without that the
    # log-partition would be off by about 1e-8 relative in beta for every row alike.
    z = (rng.normal(scale=3.0, size=(3000, 50))).astype(np.float32)
    y = rng.integers(0, 50, 3000)
    beta = 1 / 1.7
    assert float(np.float32(beta)) != beta
    t = terms(z, y, beta)
    log_total, kappa = definitions(z, beta)
    err = t.log_total - log_total
    assert np.abs(err).max() < 1e-6 and abs(err.mean()) < 2e-8  # a float32 exp: 2e-7 at most, unbiased
    np.testing.assert_allclose(t.cumulants[:, :2], kappa[:, :2], rtol=1e-5, atol=1e-5)


def test_rows_beyond_float32_range_are_shifted(rng):
    z = (rng.normal(size=(300, 4)) * 1e3).astype(np.float32)  # exp(z) overflows float32
    y = rng.integers(0, 4, 300)
    t = terms(z, y, 0.5)
    log_total, kappa = definitions(z, 0.5)
    np.testing.assert_allclose(t.log_total, log_total, rtol=1e-7)
    assert np.all(np.isfinite(t.cumulants))


def _pass_everywhere(monkeypatch, chunk=None):
    monkeypatch.setattr(sweep, "PARALLEL_ELEMENTS", 0)
    if chunk is not None:
        monkeypatch.setattr(sweep, "CHUNK_ELEMENTS", chunk)


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_threads_do_not_change_a_bit(rng, monkeypatch, dtype):
    _pass_everywhere(monkeypatch, chunk=7 * 30)  # many chunks, so every lane has some
    z = rng.normal(scale=3.0, size=(2000, 30)).astype(dtype)
    y = np.argmax(z + 1.5 * rng.gumbel(size=z.shape), axis=1)
    one = summarize(z, y, {}, FitOptions(bootstrap=20), threads=1)
    for threads in (2, 4):
        assert summarize(z, y, {}, FitOptions(bootstrap=20), threads=threads) == one


def test_chunk_size_changes_only_the_order_of_float64_sums(rng, monkeypatch):
    z = rng.normal(scale=3.0, size=(1001, 13))
    y = rng.integers(0, 13, 1001)
    whole = evaluate(z, y, 1.4)
    _pass_everywhere(monkeypatch, chunk=13 * 10)
    chunked = evaluate(z, y, 1.4, threads=2)
    for key in METRIC_FIELDS:
        assert getattr(chunked, key) == pytest.approx(getattr(whole, key), rel=1e-12)


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_tile_size_changes_only_the_order_of_sums(rng, monkeypatch, dtype):
    # The exponentials and the sums over a row's classes are made tile by tile; tiles of
    # three rows (so many tiles per chunk, the last one short) must give what one tile
    # per chunk gives: every metric of both parts, before and after, and the fit.
    z = rng.normal(scale=3.0, size=(1500, 13)).astype(dtype)
    y = np.argmax(z + 1.5 * rng.gumbel(size=z.shape), axis=1)
    _pass_everywhere(monkeypatch, chunk=13 * 100)
    monkeypatch.setattr(sweep, "TILE_ELEMENTS", 13 * 100)
    whole = summarize(z, y, {}, FitOptions(bootstrap=0), threads=1)
    at = evaluate(z, y, 1.7, threads=1)  # 1/1.7 is not a float32 number: the correction terms too
    monkeypatch.setattr(sweep, "TILE_ELEMENTS", 13 * 3)
    tiled = summarize(z, y, {}, FitOptions(bootstrap=0), threads=1)
    tiled_at = evaluate(z, y, 1.7, threads=1)
    # float32 column sums (the classwise ECE) are rounded per tile
    rel = 1e-12 if dtype == np.float64 else 1e-6
    assert tiled.result.temperature == pytest.approx(whole.result.temperature, rel=rel)
    for got, want in ((tiled.before, whole.before), (tiled.after, whole.after), (tiled_at, at),
                      (tiled.fit_part["after"], whole.fit_part["after"])):
        for key in METRIC_FIELDS:
            assert getattr(got, key) == pytest.approx(getattr(want, key), rel=rel, abs=1e-12), key


def test_word_search_finds_what_flatnonzero_finds(rng):
    from onnxcal.metrics.score_sums import _flat_true

    for shape in [(0, 5), (1, 7), (3, 8), (17, 13), (262, 1000)]:
        for density in (0.0, 0.003, 0.5, 1.0):
            mask = rng.random(shape) < density
            np.testing.assert_array_equal(_flat_true(mask), np.flatnonzero(mask))
