"""The paired interval of ``--method auto`` (onnxcal.fit.paired): BCa against scipy, and why BCa."""

import numpy as np
import pytest
import scipy.stats

from onnxcal.fit.paired import bca, normal, percentile


class _Distribution:
    """A previous bootstrap result for scipy.stats.bootstrap(bootstrap_result=...): our replicates."""

    def __init__(self, replicates: np.ndarray) -> None:
        self.bootstrap_distribution = replicates


def _replicates(d: np.ndarray, n: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return np.array([d[rng.integers(0, len(d), len(d))].mean() for _ in range(n)])


def _scipy_bca(d: np.ndarray, replicates: np.ndarray) -> list[float]:
    # Reference library: scipy.stats.bootstrap's BCa (Efron 1987), given the same bootstrap distribution
    # (n_resamples=0 adds no replicate of its own), its own jackknife of the mean over the rows.
    r = scipy.stats.bootstrap((d,), np.mean, n_resamples=0, bootstrap_result=_Distribution(replicates),
                              method="BCa", confidence_level=0.95)
    return [float(r.confidence_interval.low), float(r.confidence_interval.high)]


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_bca_equals_scipys_on_the_same_replicates(seed):
    rng = np.random.default_rng(seed)
    d = np.r_[rng.normal(-0.02, 0.05, 90), rng.exponential(2.0, 3)]  # skewed, as per-row NLL differences are
    reps = _replicates(d, 400, seed)
    assert bca(d, reps) == pytest.approx(_scipy_bca(d, reps), rel=1e-12, abs=1e-15)


def test_grouped_bca_leaves_whole_samples_out():
    # Equal-sized samples: the mean over rows is the mean of the sample means, and leaving a sample out of it
    # is leaving its mean out, so the grouped interval equals scipy's BCa on the sample means.
    rng = np.random.default_rng(4)
    per_sample = np.r_[rng.normal(0.0, 0.1, 40), 2.5]
    d = np.repeat(per_sample, 3) + np.tile([-0.01, 0.0, 0.01], len(per_sample))
    groups = np.repeat(np.arange(len(per_sample)), 3)
    reps = _replicates(per_sample, 300, 4)
    assert bca(d, reps, groups) == pytest.approx(_scipy_bca(d.reshape(-1, 3).mean(axis=1), reps), rel=1e-12)
    # one row per sample is the ungrouped interval
    flat = np.r_[rng.normal(0.0, 0.1, 50), 1.0]
    reps = _replicates(flat, 300, 5)
    assert bca(flat, reps, np.arange(len(flat))) == pytest.approx(bca(flat, reps), rel=1e-12)


def test_a_few_confidently_wrong_rows_lift_the_lower_end():
    # The case behind the choice of BCa: a map better on 117 rows by 0.01 nats and worse on 3 by 2 nats (mean
    # +0.040). A resample misses all three with probability ~ 0.37^3 = 0.05, more than the 2.5 % the percentile
    # interval's lower end needs, so that end sits at -0.01; BCa's acceleration sees the skew and lifts it above 0.
    d = np.r_[np.full(117, -0.01), np.full(3, 2.0)]
    reps = _replicates(d, 2000, 0)
    assert percentile(reps)[0] < 0 < bca(d, reps)[0]
    assert bca(d, reps) == pytest.approx(_scipy_bca(d, reps), rel=1e-12)
    # one such row alone cannot lift it (a resample misses it with probability 0.37): said in the module docstring
    one = np.r_[np.full(119, -0.01), 4.0]
    assert bca(one, _replicates(one, 2000, 0))[0] < 0


def test_degenerate_cases_fall_back_or_say_none():
    d = np.zeros(30)
    assert bca(d, np.zeros(100)) == [0.0, 0.0]  # equal fits: 0 on both ends
    above = np.linspace(0.1, 0.2, 50)  # every replicate above the estimate: z0 infinite, the percentile interval
    assert bca(np.full(10, 0.05), above) == percentile(above)
    assert bca(d, np.r_[np.zeros(5), np.inf]) is None and bca(d, np.array([])) is None


def test_normal_interval_is_mean_plus_minus_196_standard_errors():
    # Reference: scipy.stats.sem (ddof=1) and norm.ppf(0.975)
    d = np.random.default_rng(7).normal(0.1, 1.0, 200)
    half = scipy.stats.norm.ppf(0.975) * scipy.stats.sem(d)
    assert normal(d, None) == pytest.approx([d.mean() - half, d.mean() + half], rel=1e-12)
