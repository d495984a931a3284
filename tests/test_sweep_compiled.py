"""The compiled float32 pass (onnxcal/kernels/sweep_kernels.py) against the numpy pass it replaces.

The numpy code is the reference: both run on the same float32 logits and must agree within float32
rounding. The bounds, and why:

- per-row sums (totals, power sums, sums at 2 beta) and everything made of them (NLL, Brier score,
  log-partition): 1e-6 relative. Each exponential differs by the two exponentials' errors (the
  kernel's below 2 ulp, numpy's float32 exp up to about 2.5 ulp: 2^-23 is 1.2e-7) and the float32
  sums are added in a different order (vectorised lanes against BLAS).
- the argmax, the top-label confidences' bins and the labels' bins: identical. A bin could only
  differ for a probability within a few ulp of a bin edge (about 1e-7 apart), which these random
  logits do not produce; the tests would say so by failing, not by chance (fixed seeds).
- the classwise sums per (class, bin): 1e-6 of the total mass, for the same reasons as the sums.
- a single probability p: 5e-7 + |log p| 2^-23 relative; x = b z - s is rounded to float32 with
  another shift (numpy leaves rows with |b max z| <= 20 unshifted, the kernel shifts every row),
  an error of up to |x| 2^-24 in x, hence relative in p, on top of the exponentials' errors.
- cumulants: they come from raw moments by differences, so they are compared with a tolerance
  scaled by the logits' spread (1e-5 spread^j), and against their float64 definitions too.
"""

import numpy as np
import pytest
import scipy.special

from onnxcal import kernels, sweep
from onnxcal.fit import FitOptions, summarize
from onnxcal.metrics import METRIC_FIELDS, evaluate
from onnxcal.metrics.score_sums import temperature_pass
from onnxcal.sweep import MomentSums, Selection

sk = pytest.importorskip("onnxcal.kernels.sweep_kernels")


@pytest.fixture
def either(monkeypatch):
    """A function switching the passes between the compiled kernel (True) and numpy (False) at any size."""
    monkeypatch.setattr(kernels, "MIN_VALUES", 0)

    def use(compiled: bool) -> None:
        monkeypatch.setenv(kernels.ENV, "1" if compiled else "0")

    return use


def _ulp_error(got, x):
    want = np.exp(x.astype(np.float64))  # numpy's float64 exponential: the reference
    return np.abs(got.astype(np.float64) - want) / np.spacing(want.astype(np.float32)).astype(np.float64)


def _exp(x):
    k = 1000
    out = np.empty_like(x)
    sk.exp_values(x, out, np.empty(k, np.float32), np.empty(k, np.float32), np.empty(k, np.int32))
    return out


def test_the_exponential_is_within_two_ulp_of_float64(rng):
    # Every x the kernel meets is b z - b max z <= 0. A dense grid over [-87.3, 0], random float32 bit
    # patterns of that range (every binade, down to the smallest magnitudes) and the edges.
    grid = -np.linspace(0.0, 87.3, 2_000_001, dtype=np.float64).astype(np.float32)
    bits = rng.integers(0, np.float32(87.3).view(np.int32), 1_000_000, dtype=np.int32).view(np.float32)
    edges = np.array([0.0, -0.0, -1e-45, -1e-30, -0.34657359, -0.34657360, -0.6931472, -87.3], np.float32)
    x = np.concatenate([grid, -np.abs(bits), edges])
    err = _ulp_error(_exp(x), x)
    assert err.max() < 2.0, (err.max(), x[err.argmax()])
    assert _exp(np.zeros(3, np.float32))[0] == 1.0  # the row maximum's weight is exactly 1
    # below -87.3 the float32 result would be subnormal (< 2^-126): the kernel gives 0
    low = np.array([-87.31, -88.0, -103.0, -200.0, -3e38], np.float32)
    assert np.all(_exp(low) == 0.0)


def _both(either, fn):
    either(False)
    want = fn()
    either(True)
    got = fn()
    return want, got


def _close_sums(got, want, names, rel=1e-6):
    for name in names:
        a, b = getattr(got, name), getattr(want, name)
        scale = max(float(np.abs(b).max()), 1e-300)
        assert np.abs(a - b).max() <= rel * scale, (name, np.abs(a - b).max() / scale)


CASES = [
    # rows, classes: below a tile, above a tile with a ragged last chunk, two classes, a thousand
    (5, 1000),
    (700, 1000),
    (3001, 2),
    (2500, 13),
]


@pytest.mark.parametrize("n,k", CASES)
@pytest.mark.parametrize("threads", [1, 2])
def test_a_metric_pass_equals_the_numpy_pass(rng, either, monkeypatch, n, k, threads):
    monkeypatch.setattr(sweep, "PARALLEL_ELEMENTS", 0)
    monkeypatch.setattr(sweep, "COMPILED_CHUNK_ELEMENTS", k * 97)  # chunks of 97 rows: several, the last short
    monkeypatch.setattr(sweep, "CHUNK_ELEMENTS", k * 97)
    z = (rng.normal(scale=3.0, size=(n, k))).astype(np.float32)
    z[::7, 1] = z[::7, 0] = z[::7].max(axis=1)  # ties at the maximum: the first index is the top
    y = np.argmax(z + 1.5 * rng.gumbel(size=z.shape), axis=1)
    y[::5] = np.argmax(z[::5], axis=1)  # labels at the maximum
    part = (rng.random(n) < 0.3).astype(np.int8)
    sel = Selection(part=part)

    def run(beta, moments, sq):
        def extra():
            return (MomentSums(2, moments),)

        sums, lanes = temperature_pass(
            z, y, beta, 15, selection=sel, parts=2, moments=moments, sq_moments=sq, sq_part=1, extra=extra,
            threads=threads,
        )
        return sums, MomentSums.merge([lane[0] for lane in lanes])

    for beta, moments, sq in [(1.0, 1, 0), (1 / 1.7, 3, 3), (0.55, 5, 0)]:  # 1/1.7: not a float32 number
        (want, want_m), (got, got_m) = _both(either, lambda b=beta, m=moments, s=sq: run(b, m, s))
        assert np.any(got.column != want.column)  # two different computations did run
        assert np.array_equal(got.rows.correct, want.rows.correct)  # the argmax
        np.testing.assert_array_equal(got.bins[:, 0], want.bins[:, 0])  # the counts per confidence bin
        np.testing.assert_array_equal(got.y_sum, want.y_sum)  # the labels' classwise bins
        np.testing.assert_allclose(got.rows.conf, want.rows.conf, rtol=1e-6)
        _close_sums(got, want, ["weight", "nll", "brier", "bins", "column", "upper"])
        total = float(want.column.sum())
        for p in range(2):
            gp, wp = got.classwise(p)[0], want.classwise(p)[0]
            assert np.abs(gp - wp).max() <= 1e-6 * total
        spread = float(z.max() - z.min())
        orders = spread ** np.arange(1, got_m.sums.shape[1] + 1)
        assert np.all(np.abs(got_m.sums - want_m.sums) <= 1e-5 * orders * n)
        assert np.array_equal(got_m.wrong, want_m.wrong)


def test_compiled_cumulants_match_their_definitions(rng, either):
    # against scipy (float64 definitions), as tests/test_sweep.py checks the numpy pass
    either(True)
    z = (rng.normal(scale=3.0, size=(300, 40))).astype(np.float32)
    y = rng.integers(0, 40, 300)
    buf = sweep._Buffers(300, 40, np.dtype(np.float32), compiled=True)  # noqa: SLF001
    t = sweep.exp_terms(z, y, 0.8, 3, 3, buf)
    z64 = z.astype(np.float64)
    np.testing.assert_allclose(t.log_total, scipy.special.logsumexp(0.8 * z64, axis=1), rtol=1e-6)
    np.testing.assert_allclose(t.sq_log_total, scipy.special.logsumexp(1.6 * z64, axis=1), rtol=1e-6)
    p = scipy.special.softmax(0.8 * z64, axis=1)
    mean = (p * z64).sum(axis=1)
    var = (p * (z64 - mean[:, None]) ** 2).sum(axis=1)
    np.testing.assert_allclose(t.cumulants[:, 0], mean, rtol=1e-5, atol=1e-5)
    np.testing.assert_allclose(t.cumulants[:, 1], var, rtol=1e-4, atol=1e-4)
    np.testing.assert_array_equal(t.top, np.argmax(z, axis=1))


@pytest.mark.parametrize("k", [2, 1000])
def test_exp_terms_equal_the_numpy_terms(rng, k):
    # every per-row result a consumer reads, with the sums at 2 beta for some rows only (the bootstrap's)
    n = 400
    z = (rng.normal(scale=3.0, size=(n, k))).astype(np.float32)
    y = rng.integers(0, k, n)
    rows = rng.random(n) < 0.4
    out = []
    for compiled in (False, True):
        buf = sweep._Buffers(n, k, np.dtype(np.float32), compiled=compiled)  # noqa: SLF001
        out.append(sweep.exp_terms(z, y, 1 / 1.3, 3, 3, buf, rows))
    want, got = out
    np.testing.assert_array_equal(got.top, want.top)
    np.testing.assert_array_equal(got.zmax, want.zmax)
    for name in ("log_total", "sq_log_total", "nll"):  # (total is relative to the shift, which differs)
        # logs of sums: a relative error of the sum is an absolute one of its log
        np.testing.assert_allclose(getattr(got, name), getattr(want, name), rtol=1e-6, atol=1e-6, err_msg=name)
    spread = float(z.max() - z.min())
    for name in ("cumulants", "sq_cumulants"):
        a, b = getattr(got, name), getattr(want, name)
        np.testing.assert_array_equal(np.isnan(a), np.isnan(b))
        ok = ~np.isnan(b)
        tol = 1e-5 * spread ** np.arange(1, a.shape[1] + 1)
        assert np.all((np.abs(a - b) <= tol)[ok]), name
    # single probabilities: x = b z - s is rounded to float32 with another shift (numpy leaves small rows
    # unshifted), an error of up to |x| 2^-24 in x, so in p, relative; and the two exponentials' errors
    r, c = np.nonzero(rng.random((n, k)) < 0.05)
    p_got, p_want = got.probabilities(r, c), want.probabilities(r, c)
    bound = 5e-7 + np.abs(np.log(p_want)) * 2.0**-23
    assert np.all(np.abs(p_got / p_want - 1) <= bound)


def test_the_fit_and_its_metrics_equal_the_numpy_fit(rng, either, monkeypatch):
    monkeypatch.setattr(sweep, "PARALLEL_ELEMENTS", 0)
    monkeypatch.setattr(sweep, "COMPILED_CHUNK_ELEMENTS", 50 * 200)
    z = (rng.normal(scale=3.0, size=(4000, 50))).astype(np.float32)
    y = np.argmax(z / 1.5 + rng.gumbel(size=z.shape), axis=1)
    want, got = _both(either, lambda: summarize(z, y, {}, FitOptions(bootstrap=0), threads=2))
    assert got.result.temperature == pytest.approx(want.result.temperature, rel=1e-6)
    for g, w in ((got.before, want.before), (got.after, want.after)):
        for key in METRIC_FIELDS:
            assert getattr(g, key) == pytest.approx(getattr(w, key), rel=1e-5, abs=1e-7), key
    at_want, at_got = _both(either, lambda: evaluate(z, y, 1.7, threads=1))
    for key in METRIC_FIELDS:
        assert getattr(at_got, key) == pytest.approx(getattr(at_want, key), rel=1e-5, abs=1e-7), key


def test_the_switch_and_the_size_rule(rng, monkeypatch):
    # ONNXCAL_COMPILED=0 and small passes never reach the kernel; float64 logits never do
    calls = []
    real = sk.chunk_pass

    def counting(*args):
        calls.append(1)
        return real(*args)

    monkeypatch.setattr(sk, "chunk_pass", counting)
    z = rng.normal(size=(64, 8)).astype(np.float32)
    y = rng.integers(0, 8, 64)
    evaluate(z, y, 1.0)
    assert not calls  # 512 values: below kernels.MIN_VALUES
    monkeypatch.setattr(kernels, "MIN_VALUES", 0)
    evaluate(z.astype(np.float64), y, 1.0)
    assert not calls
    monkeypatch.setenv(kernels.ENV, "0")
    evaluate(z, y, 1.0)
    assert not calls
    monkeypatch.setenv(kernels.ENV, "1")
    evaluate(z, y, 1.0)
    assert calls


def test_read_only_logits_and_a_memory_map(rng, either, tmp_path):
    # captures are opened with mmap_mode="r": the kernel takes read-only arrays
    z = (rng.normal(scale=3.0, size=(500, 30))).astype(np.float32)
    y = rng.integers(0, 30, 500)
    np.save(tmp_path / "z.npy", z)
    mapped = np.load(tmp_path / "z.npy", mmap_mode="r")
    want, got = _both(either, lambda: evaluate(mapped, y, 1.3))
    for key in METRIC_FIELDS:
        assert getattr(got, key) == pytest.approx(getattr(want, key), rel=1e-5, abs=1e-7), key
    rows = np.sort(rng.choice(500, 300, replace=False))  # a selection of rows: read in place by index
    for sel in (Selection(rows=rows), Selection(rows=np.arange(500)[::3])):  # (strided, as the fit's subsamples)
        want, got = _both(either, lambda sel=sel: temperature_pass(mapped, y, 0.9, 15, selection=sel)[0])
        assert got.nll == pytest.approx(want.nll, rel=1e-6)
        np.testing.assert_array_equal(got.bins[:, 0], want.bins[:, 0])
    # the fit itself, whose subsample stages select every n-th row (a strided index array)
    z = (rng.normal(scale=3.0, size=(60_000, 10))).astype(np.float32)
    y = np.argmax(z / 1.5 + rng.gumbel(size=z.shape), axis=1)
    want, got = _both(either, lambda: summarize(z, y, {}, FitOptions(bootstrap=0), threads=1))
    assert got.result.temperature == pytest.approx(want.result.temperature, rel=1e-6)
