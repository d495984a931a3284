"""The paired interval of ``--method auto`` (onnxcal.fit.paired): against numpy and scipy."""

import numpy as np
import pytest
import scipy.stats

from onnxcal.fit.paired import normal, percentile


def test_percentile_interval_is_numpys_2_5_and_97_5_percentiles():
    # Reference: numpy.percentile (linear interpolation); the percentile interval of Efron & Tibshirani
    # (1993, ch. 13; from memory)
    reps = np.random.default_rng(2).normal(0.1, 0.3, 400)
    assert percentile(reps) == pytest.approx(list(np.percentile(reps, [2.5, 97.5])), rel=1e-15)
    assert percentile(np.r_[reps, np.nan]) is None and percentile(np.array([])) is None


def test_normal_interval_is_mean_plus_minus_196_standard_errors():
    # Reference: scipy.stats.sem (ddof=1) and norm.ppf(0.975)
    d = np.random.default_rng(7).normal(0.1, 1.0, 200)
    half = scipy.stats.norm.ppf(0.975) * scipy.stats.sem(d)
    assert normal(d, None) == pytest.approx([d.mean() - half, d.mean() + half], rel=1e-12)


def test_grouped_normal_interval_takes_whole_samples():
    # Equal-sized samples: the mean over rows is the mean of the sample means, and its standard error is
    # scipy.stats.sem of the sample means; a sample's rows are not independent draws.
    rng = np.random.default_rng(4)
    per_sample = rng.normal(0.0, 0.1, 40)
    d = np.repeat(per_sample, 3) + np.tile([-0.01, 0.0, 0.01], 40)
    groups = np.repeat(np.arange(40), 3)
    half = scipy.stats.norm.ppf(0.975) * scipy.stats.sem(d.reshape(-1, 3).mean(axis=1))
    assert normal(d, groups) == pytest.approx([d.mean() - half, d.mean() + half], rel=1e-12)
    assert normal(d[:3], groups[:3]) == [float("-inf"), float("inf")]  # one sample: nothing to tell
