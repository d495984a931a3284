"""Binning helpers: weighted quantiles against numpy's own on the repeated values."""

import numpy as np
import pytest

from onnxcal.metrics.binning import equal_mass_bins, weighted_quantiles


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
