"""onnxcal.metrics.binning: the bins against scikit-learn's, weighted quantiles against numpy's on repeated values."""

import numpy as np
import pytest
import scipy.special
from sklearn.calibration import calibration_curve

from onnxcal import metrics
from onnxcal.metrics.binning import equal_mass_bins, reliability_bins, weighted_quantiles


@pytest.mark.parametrize("seed", range(5))
def test_weighted_quantiles_equal_numpy_on_the_repeated_pool(seed):
    # Reference: numpy.quantile (method "linear") of numpy.repeat(values, counts),
    # the pool a bootstrap replicate stands for; equal to the last bit, with
    # ties, zero counts, and a hint order that only nearly sorts the values.
    rng = np.random.default_rng(seed)
    for _ in range(300):
        n = int(rng.integers(1, 80))
        values = [rng.random(n), np.round(rng.random(n), 1), 0.5 + 1e-3 * rng.normal(size=n)][_ % 3]
        counts = rng.integers(0, 4, n)
        if counts.sum() == 0:
            assert weighted_quantiles(values, counts, np.array([0.5])) is None
            continue
        qs = np.linspace(0, 1, int(rng.integers(2, 20)))
        want = np.quantile(np.repeat(values, counts), qs)
        np.testing.assert_array_equal(weighted_quantiles(values, counts, qs), want)
        hint = np.argsort(values + 0.05 * rng.normal(size=n))
        np.testing.assert_array_equal(weighted_quantiles(values, counts, qs, order=hint), want)


def test_weighted_equal_mass_bins_count_a_row_as_often_as_drawn(rng):
    conf = rng.random(500)
    correct = rng.random(500) < conf
    counts = rng.integers(0, 3, 500)
    weighted = equal_mass_bins(conf, correct, 10, counts)
    repeated = equal_mass_bins(np.repeat(conf, counts), np.repeat(correct, counts), 10)
    for a, b in zip(weighted, repeated, strict=True):
        np.testing.assert_allclose(a, b, rtol=1e-12)


def test_bins_are_right_closed():
    # An edge value belongs to the bin it closes: 0.5 is in (0.4, 0.5], not (0.5, 0.6]
    # (Guo et al. 2017, sec. 2: I_m = ((m-1)/M, m/M]).
    counts, _, _ = reliability_bins(np.array([0.5, 0.50001, 1.0, 0.0]), np.ones(4), n_bins=10)
    assert counts[4] == 1 and counts[5] == 1 and counts[9] == 1 and counts[0] == 1


def _binary_case(rng, n=3000):
    z = rng.normal(scale=2.0, size=n)
    p = scipy.special.expit(z)
    y = (rng.random(n) < scipy.special.expit(z / 1.7)).astype(int)
    return p, y


@pytest.mark.parametrize("n_bins", [5, 10, 15])
@pytest.mark.parametrize("strategy, binning", [("uniform", reliability_bins), ("quantile", equal_mass_bins)])
def test_bins_match_sklearn_calibration_curve(rng, n_bins, strategy, binning):
    # Reference library: sklearn.calibration.calibration_curve gives, per non-empty
    # bin, the observed frequency and the mean predicted probability; strategy
    # "uniform" = our equal-width bins (ECE, MCE), "quantile" = our equal-mass
    # bins (adaptive ECE). Binned here: the positive-class probability.
    p, y = _binary_case(rng)
    prob_true, prob_pred = calibration_curve(y, p, n_bins=n_bins, strategy=strategy)
    counts, p_sum, y_sum = binning(p, y, n_bins)
    full = counts > 0
    np.testing.assert_allclose(y_sum[full] / counts[full], prob_true, rtol=1e-12)
    np.testing.assert_allclose(p_sum[full] / counts[full], prob_pred, rtol=1e-12)
    if strategy == "quantile":
        assert counts.max() - counts.min() <= 1  # equal mass: n/M each, give or take one


def test_bin_ids_follow_the_searchsorted_rule(rng):
    # The rule of sklearn.calibration.calibration_curve: np.searchsorted over the
    # inner edges of np.linspace(0, 1, M + 1), right-closed bins; exact edges,
    # their float neighbours, 0 and 1 included.
    for m in (2, 10, 15, 100):
        edges = np.linspace(0, 1, m + 1)
        p = np.concatenate([rng.random(5000), edges, np.nextafter(edges, 2), np.nextafter(edges, -1)])
        p = np.clip(p, 0, 1)
        np.testing.assert_array_equal(metrics.bin_ids(p, m), np.searchsorted(edges[1:-1], p))


def test_small_arrays_are_binned_as_large_ones(rng):
    # Arrays up to SEARCH_BELOW values go to numpy.searchsorted directly, larger ones
    # through ceil(p M) - 1; both are the rule of sklearn's calibration_curve (searchsorted
    # on the inner edges), including the values on and next to an edge.
    from onnxcal.metrics import binning

    for m in (7, 10, 15):
        edges = np.linspace(0.0, 1.0, m + 1)
        small = np.concatenate([rng.random(500), edges, np.nextafter(edges, 2.0), np.nextafter(edges, -1.0)])
        large = np.tile(small, binning.SEARCH_BELOW // len(small) + 1)
        assert len(small) <= binning.SEARCH_BELOW < len(large)
        np.testing.assert_array_equal(binning.bin_ids(small, m), binning.bin_ids(large, m)[: len(small)])
        np.testing.assert_array_equal(binning.bin_ids(small, m), np.searchsorted(edges[1:-1], small))
