"""Decision thresholds against their published guarantees, reference libraries and hand-worked examples.

The guarantee tests draw 1,000 calibration sets from a "population": a fixed
pool of rows with known class probabilities, labels drawn from them, so the
probabilities are calibrated exactly and any quantity of new data (the
coverage of a set rule, the error among accepted rows) is a finite sum over
the pool, computed exactly rather than estimated on a test sample.
"""

from __future__ import annotations

import math

import numpy as np
import onnx
import onnxruntime as ort
import pytest
from onnx import TensorProto, helper, numpy_helper
from onnx.reference import ReferenceEvaluator
from scipy import stats
from scipy.special import softmax

from onnxcal.decisions import (
    SetThreshold,
    accept,
    choose_accept_threshold,
    choose_accept_thresholds_per_label,
    choose_set_threshold,
    class_set,
    class_set_size,
    clopper_pearson,
    conditional_coverage_floor,
    conformal_quantile,
    conformal_rank,
    proportion,
    risk_coverage,
    rows_needed,
    tail_pvalue,
    threshold_grid,
    upper_bound,
    verdict,
)
from onnxcal.decisions.conformal import _mass_before  # the running sums class_set compares, to check bitwise
from onnxcal.decisions.selective import fixed_sequences
from onnxcal.errors import OnnxcalError

SPLITS = 1000
K = 5


def _labels(rng: np.random.Generator, p: np.ndarray) -> np.ndarray:
    """One label per row drawn from its class probabilities (inverse CDF)."""
    u = rng.random(p.shape[:-1] + (1,))
    return np.minimum((np.cumsum(p, axis=-1) < u).sum(axis=-1), p.shape[-1] - 1)


def _dyadic_pool(rng: np.random.Generator, m: int, k: int, scale: float) -> np.ndarray:
    """Softmax rows rounded to multiples of 2**-20 that sum to exactly 1.

    Every sum of such numbers is exact in float64, whatever the order of
    the additions, so the package's running sums and the definitions
    written out below agree to the bit, ties included.
    """
    p = np.floor(softmax(rng.normal(0.0, scale, (m, k)), axis=1) * 2**20) / 2**20
    p[:, -1] = 1.0 - p[:, :-1].sum(axis=1)
    return p


def _mass_before_by_definition(p: np.ndarray) -> np.ndarray:
    """For each class, the summed probability of the classes ranked before it, written out pairwise.

    Ranked before k: p_j > p_k, or p_j == p_k and j < k (the lower index
    first, as the ONNX TopK spec breaks ties). The score of the adaptive
    sets of Romano, Sesia & Candes (NeurIPS 2020) with the random number u
    set to 0.
    """
    pj, pk = p[:, None, :], p[:, :, None]
    idx = np.arange(p.shape[1])
    before = (pj > pk) | ((pj == pk) & (idx[None, None, :] < idx[None, :, None]))
    return (before * pj).sum(axis=-1)


def _covered_mass(keys: np.ndarray, weights: np.ndarray, cuts: np.ndarray, keep: str) -> np.ndarray:
    """For each cut, the summed weight of the entries with key >= cut (keep="ge") or key <= cut ("le")."""
    order = np.argsort(keys, kind="stable")
    k, cum = keys[order], np.r_[0.0, np.cumsum(weights[order])]
    if keep == "le":
        return cum[np.searchsorted(k, cuts, side="right")]
    return cum[-1] - cum[np.searchsorted(k, cuts, side="left")]


# --------------------------------------------------------------------------
# Binomial helpers


@pytest.mark.parametrize("n", [1, 2, 7, 30, 200])
def test_clopper_pearson_equals_scipy_binomtest(n):
    # Reference library: scipy.stats.binomtest(k, n).proportion_ci(method="exact") (Clopper & Pearson 1934).
    for k in sorted({0, 1, n - 1, n, *range(0, n + 1, max(1, n // 20))}):
        for level in (0.9, 0.95, 0.99):
            ci = stats.binomtest(k, n).proportion_ci(confidence_level=level, method="exact")
            low, high = clopper_pearson(k, n, level)
            assert float(low) == pytest.approx(ci.low, abs=1e-12)
            assert float(high) == pytest.approx(ci.high, abs=1e-12)


def test_clopper_pearson_is_vectorised_and_empty_is_uninformative():
    low, high = clopper_pearson(np.array([0, 3, 10]), np.array([10, 10, 10]))
    assert low.shape == (3,) and low[0] == 0.0 and high[2] == 1.0
    p = proportion(0, 0)
    assert (p.low, p.high) == (0.0, 1.0) and math.isnan(p.rate)


def test_upper_bound_and_pvalue_against_scipy():
    # Reference library: a one-sided bound at delta is the upper end of the two-sided exact interval at
    # 1 - 2 delta (scipy.stats.binomtest); the p-value of "rate >= eps" given k of n is binomtest's
    # alternative="less" p-value, P(Bin(n, eps) <= k).
    for n in (1, 5, 40, 300):
        for k in range(0, n + 1, max(1, n // 7)):
            for delta in (0.01, 0.05, 0.1):
                ci = stats.binomtest(k, n).proportion_ci(confidence_level=1 - 2 * delta, method="exact")
                assert float(upper_bound(k, n, delta)) == pytest.approx(ci.high, abs=1e-12)
            for eps in (0.01, 0.1, 0.3):
                ref = stats.binomtest(k, n, eps, alternative="less").pvalue
                assert float(tail_pvalue(k, n, eps)) == pytest.approx(ref, rel=1e-10, abs=1e-300)


def test_pvalue_test_and_upper_bound_make_the_same_decision():
    # p <= delta exactly when the one-sided exact bound is <= eps: both are the same binomial tail.
    k, n = np.meshgrid(np.arange(0, 60), np.arange(1, 400, 7))
    k = np.minimum(k, n)
    for eps, delta in [(0.02, 0.05), (0.1, 0.1), (0.25, 0.01)]:
        by_p = tail_pvalue(k, n, eps) <= delta
        by_bound = upper_bound(k, n, delta) <= eps
        assert np.array_equal(by_p, by_bound)


def test_rows_needed_is_the_zero_error_tail():
    # By hand: (1 - 0.1)^29 = 0.0471 <= 0.05 < 0.9^28 = 0.0523; the general case from the definition.
    assert rows_needed(0.1, 0.95) == 29
    for eps, conf in [(0.02, 0.95), (0.01, 0.99), (0.3, 0.9), (0.001, 0.95)]:
        n = rows_needed(eps, conf)
        assert (1 - eps) ** n <= 1 - conf < (1 - eps) ** (n - 1)


@pytest.mark.parametrize(
    ("k", "n", "target", "side", "expected"),
    [
        (990, 1000, 0.95, "at least", "pass"),      # interval [0.982, 0.995]
        (95, 100, 0.9, "at least", "undecided"),    # [0.887, 0.984] straddles 0.9
        (50, 100, 0.9, "at least", "fail"),         # [0.398, 0.602]
        (1, 1000, 0.01, "at most", "pass"),         # [0.00003, 0.0056]
        (3, 100, 0.02, "at most", "undecided"),     # [0.006, 0.085]
        (30, 100, 0.1, "at most", "fail"),          # [0.212, 0.400]
        (0, 0, 0.5, "at least", "undecided"),       # no trials: [0, 1]
    ],
)
def test_verdict(k, n, target, side, expected):
    v = verdict(k, n, target, side)
    assert v.outcome == expected
    assert v.to_dict()["outcome"] == expected and v.measured.trials == n


# --------------------------------------------------------------------------
# Selective prediction: worked examples


def _sigmoid_rows(n_high: int) -> tuple[np.ndarray, np.ndarray]:
    """``n_high`` rows at p = 0.97, all right; then 11 rows at p = 0.7, 10 of them wrong."""
    p = np.r_[np.full(n_high, 0.97), np.full(11, 0.7)]
    y = np.r_[np.ones(n_high, int), np.zeros(10, int), 1]
    return p, y


def test_fixed_sequence_worked_example_by_hand():
    # eps = 0.1, delta = 0.05, grid [0.95, 0.6]. At 0.95: 29 rows, 0 wrong, p = 0.9^29 = 0.0471 <= 0.05,
    # rejected; at 0.6: 40 rows, 10 wrong, p = P(Bin(40, 0.1) <= 10) ~ 1: the sequence stops. tau = 0.95.
    p, y = _sigmoid_rows(29)
    r = choose_accept_threshold(p, y, np.arange(len(p)), error=0.1, confidence=0.95, thresholds=[0.95, 0.6],
                                starts=1)
    assert r.found and r.threshold == pytest.approx(0.95)
    assert (r.accepted.successes, r.accepted.trials, r.errors.successes, r.errors.trials) == (29, 40, 0, 29)
    assert r.error_bound == pytest.approx(1 - 0.05 ** (1 / 29))  # the zero-error exact bound, by hand
    assert r.error_bound <= 0.1


def test_no_threshold_meets_the_target_is_a_result_not_an_error():
    # By hand: 28 rows without an error give p = 0.9^28 = 0.0523 > 0.05, so the first test fails and
    # fixed-sequence testing stops: no threshold, although 28/28 are right.
    p, y = _sigmoid_rows(28)
    r = choose_accept_threshold(p, y, np.arange(len(p)), error=0.1, confidence=0.95, thresholds=[0.95, 0.6],
                                starts=1)
    assert not r.found and r.threshold is None
    assert r.accepted.successes == 0 and r.errors.trials == 0 and math.isnan(r.error_bound)
    assert "no threshold" in r.detail and "29 accepted rows" in r.detail
    assert r.to_dict()["error_bound"] is None
    # A target no amount of these rows can meet (eps = 0.01 needs 299 right rows at 95 %).
    tiny = choose_accept_threshold(p, y, np.arange(len(p)), error=0.01, method="sgr")
    assert not tiny.found and "299 accepted rows" in tiny.detail


def test_several_fixed_sequences_skip_a_start_with_too_few_rows():
    # Grid [0.99, 0.95, 0.6]: 2 rows above 0.99 (p = 0.9^2 = 0.81) end a single sequence at once. With 3
    # sequences, one starts at 0.95 at level 0.05 / 3 = 0.0167: 42 right rows give 0.9^42 = 0.0120.
    p = np.r_[np.full(2, 0.995), np.full(40, 0.96), np.full(11, 0.7)]
    y = np.r_[np.ones(42, int), np.zeros(10, int), 1]
    rows = np.arange(len(p))
    one = choose_accept_threshold(p, y, rows, error=0.1, thresholds=[0.99, 0.95, 0.6], starts=1)
    three = choose_accept_threshold(p, y, rows, error=0.1, thresholds=[0.99, 0.95, 0.6], starts=3)
    assert not one.found
    assert three.found and three.threshold == pytest.approx(0.95) and three.accepted.successes == 42
    assert fixed_sequences(np.array([0.81, 0.012, 0.9]), 0.05, 3) == 1


def test_sgr_worked_example_by_hand():
    # Geifman & El-Yaniv 2017, Algorithm 1 on m = 4 right rows, confidences 0.6, 0.7, 0.8, 0.9 (sigmoid
    # p = confidence), delta = 0.05: ceil(log2 4) = 2 steps at level 0.025.
    # z = ceil((1 + 4) / 2) = 3: theta = 0.8, 2 rows, bound 1 - 0.025^(1/2) = 0.842.
    # eps = 0.9: 0.842 < 0.9, z_max = 3; z = ceil((1 + 3) / 2) = 2: theta = 0.7, 3 rows, 1 - 0.025^(1/3) = 0.708.
    p, y, rows = np.array([0.6, 0.7, 0.8, 0.9]), np.ones(4, int), np.arange(4)
    r = choose_accept_threshold(p, y, rows, error=0.9, method="sgr")
    assert r.threshold == pytest.approx(0.7) and r.accepted.successes == 3
    assert r.error_bound == pytest.approx(1 - 0.025 ** (1 / 3))
    # eps = 0.8: 0.842 >= 0.8, z_min = 3; z = 4: theta = 0.9, 1 row, bound 0.975 >= 0.8: no threshold.
    assert not choose_accept_threshold(p, y, rows, error=0.8, method="sgr").found


def test_accept_counts_the_rows_the_choice_counted():
    # The threshold is rounded to the dtype the graph compares in, so accept() on the same rows gives
    # exactly the count the choice reports.
    rng = np.random.default_rng(3)
    p = softmax(rng.normal(0, 3, (2000, 4)), axis=1).astype(np.float32)
    y = _labels(rng, p.astype(np.float64))
    rows = np.arange(1000, 2000)
    r = choose_accept_threshold(p, y, rows, error=0.1, confidence=0.9)
    assert r.found and np.float32(r.threshold) == r.threshold
    acc = accept(p[rows], r.threshold)
    assert int(acc.sum()) == r.accepted.successes
    assert int((p[rows].argmax(1) != y[rows])[acc].sum()) == r.errors.successes
    # The same result from a boolean mask of the rows (the rows are what counts, not their form).
    mask = np.zeros(len(p), bool)
    mask[rows] = True
    assert choose_accept_threshold(p, y, mask, error=0.1, confidence=0.9) == r


def test_accept_binary_and_per_label():
    p = np.array([[0.05, 0.6], [0.97, 0.5], [0.5, 0.02]])
    assert accept(p, np.array([0.9, 0.9]), kind="multilabel").tolist() == [[True, False], [True, False],
                                                                           [False, True]]
    assert accept(p[:, :1], 0.9, kind="binary").tolist() == [True, True, False]
    assert accept(p, np.inf).tolist() == [False, False, False]


def test_per_label_thresholds_are_binary_choices_at_a_bonferroni_level():
    rng = np.random.default_rng(5)
    p = 1 / (1 + np.exp(-rng.normal(0, 4, (3000, 3))))
    y = (rng.random(p.shape) < p).astype(np.uint8)
    rows = np.arange(3000)
    joint = choose_accept_thresholds_per_label(p, y, rows, error=0.05, confidence=0.9)
    assert len(joint) == 3
    for j, r in enumerate(joint):
        assert r.confidence == pytest.approx(1 - 0.1 / 3)
        alone = choose_accept_threshold(p[:, j], y[:, j].astype(int), rows, error=0.05, confidence=1 - 0.1 / 3)
        assert r == alone
    with pytest.raises(OnnxcalError, match="per label"):
        choose_accept_threshold(p, y, rows, error=0.05)


def test_risk_coverage_curve_matches_the_chosen_threshold():
    rng = np.random.default_rng(8)
    p = softmax(rng.normal(0, 3, (800, 3)), axis=1)
    y = _labels(rng, p)
    rows = np.arange(800)
    rc = risk_coverage(p, y, rows)
    assert np.all(np.diff(rc.thresholds) < 0) and rc.accepted[-1] == 800
    assert rc.risk[-1] == pytest.approx(np.mean(p.argmax(1) != y))  # accept everything: the error rate
    r = choose_accept_threshold(p, y, rows, error=0.1, confidence=0.9)
    at = np.searchsorted(-rc.thresholds, -r.threshold, side="right") - 1  # last curve point with conf >= tau
    assert (rc.accepted[at], rc.errors[at]) == (r.accepted.successes, r.errors.successes)


# --------------------------------------------------------------------------
# Selective prediction: the guarantee over 1,000 draws


@pytest.fixture(scope="module")
def selective_draws():
    rng = np.random.default_rng(20260)
    pool = softmax(rng.normal(0, 2.5, (4000, K)), axis=1)
    n = 1000
    idx = rng.integers(0, len(pool), (SPLITS, n))
    return pool, idx, _labels(rng, pool[idx])


def _selective_risk(conf: np.ndarray, taus: np.ndarray) -> np.ndarray:
    """The population's error among rows with confidence >= each tau: P(wrong | x) = 1 - max p, p the truth."""
    c = np.sort(conf)
    wrong_mass = np.r_[np.cumsum((1.0 - c)[::-1])[::-1], 0.0]
    first = np.searchsorted(c, taus, side="left")
    return wrong_mass[first] / (len(c) - first)


EPS, CONFIDENCE = 0.1, 0.9
# The count of draws whose threshold misses the target is at most Binomial(1000, delta); the allowance is
# its 0.999 quantile (scipy.stats.binom), so a correct method fails these tests with probability < 0.001.
ALLOWANCE = stats.binom.ppf(0.999, SPLITS, 1 - CONFIDENCE)


@pytest.mark.parametrize("variant", ["ltt", "ltt-one-sequence-grid-from-other-rows", "sgr"])
def test_selective_risk_guarantee_over_1000_splits(selective_draws, variant):
    # Learn then Test (Angelopoulos et al. 2021, Theorem 1) and SGR (Geifman & El-Yaniv 2017): the error
    # among accepted rows of the population exceeds eps in at most a fraction delta of calibration sets.
    pool, idx, labels = selective_draws
    conf = pool.max(axis=1)
    n = idx.shape[1]
    rows = np.arange(n)
    options: dict = {"method": "sgr"} if variant == "sgr" else {}
    if variant.startswith("ltt-one"):  # plain fixed-sequence testing over the population's quantiles
        options = {"thresholds": threshold_grid(conf, n, EPS, CONFIDENCE), "starts": 1}
    results = [
        choose_accept_threshold(pool[idx[s]], labels[s], rows, error=EPS, confidence=CONFIDENCE, **options)
        for s in range(SPLITS)
    ]
    taus = np.array([r.threshold for r in results if r.found])
    violations = int((_selective_risk(conf, taus) > EPS).sum())
    assert violations <= ALLOWANCE
    # Not met by refusing to choose: a threshold in at least 40 % of draws, accepting 10 %+ of rows on average.
    assert len(taus) >= 0.4 * SPLITS
    assert np.mean([r.accepted.rate for r in results if r.found]) > 0.1
    assert all(r.error_bound <= EPS for r in results if r.found)


def test_the_selective_guarantee_test_can_fail(selective_draws):
    # Choosing the lowest threshold whose plain error rate on the rows is <= eps, without a bound, misses
    # the target in far more draws than the allowance: the test above tells the two apart.
    pool, idx, labels = selective_draws
    conf, p = pool.max(axis=1), pool[idx]
    order = np.argsort(-p.max(axis=2), axis=1, kind="stable")
    c = np.take_along_axis(p.max(axis=2), order, axis=1)
    wrong = np.take_along_axis(p.argmax(axis=2) != labels, order, axis=1)
    rate = np.cumsum(wrong, axis=1) / np.arange(1, idx.shape[1] + 1)
    last = idx.shape[1] - 1 - np.argmax((rate <= EPS)[:, ::-1], axis=1)  # most rows with rate <= eps
    naive = _selective_risk(conf, c[np.arange(SPLITS), last])
    assert (naive > EPS).sum() > 3 * ALLOWANCE


# --------------------------------------------------------------------------
# Conformal sets: worked examples


def test_conformal_quantile_by_hand_with_ties():
    # n = 5 scores 0.1, 0.2, 0.2, 0.2, 0.5. alpha = 0.4: k = ceil(6 * 0.6) = ceil(3.6) = 4, the 4th smallest
    # counting ties, 0.2. alpha = 0.2: k = ceil(4.8) = 5, 0.5. alpha = 0.1: k = ceil(5.4) = 6 > 5: infinite.
    s = np.array([0.5, 0.2, 0.1, 0.2, 0.2])
    assert [conformal_rank(5, a) for a in (0.4, 0.2, 0.1)] == [4, 5, 6]
    assert [float(conformal_quantile(s, a)) for a in (0.4, 0.2, 0.1)] == [0.2, 0.5, math.inf]
    # One quantile per row of a 2-D array (the splits of the tests below).
    assert conformal_quantile(np.stack([s, s[::-1] + 1]), 0.4).tolist() == [0.2, 1.2]


def test_conformal_rank_reads_alpha_as_written():
    # (n + 1)(1 - alpha) an integer in decimal: n = 9, alpha = 0.7 gives 10 * 0.3 = 3, though in binary
    # floating point 10 * (1 - 0.7) is 3.0000000000000004, whose ceiling is 4.
    assert math.ceil(10 * (1 - 0.7)) == 4 and conformal_rank(9, 0.7) == 3
    assert conformal_rank(19, 0.05) == 19 and conformal_rank(99, 0.1) == 90


def test_too_few_rows_give_an_infinite_quantile_and_full_sets():
    # alpha = 0.1 needs n >= 1/alpha - 1 = 9 rows: with 8, k = ceil(9 * 0.9) = 9 > 8.
    p = softmax(np.random.default_rng(0).normal(size=(9, 3)), axis=1)
    y = np.array([0, 1, 2, 0, 1, 2, 0, 1, 2])
    for score in ("las", "aps"):
        few = choose_set_threshold(p, y, np.arange(8), coverage=0.9, score=score)
        assert few.infinite == (True,) and few.rank == (9,) and few.n == (8,)
        assert few.to_dict()["thresholds"] == [None]
        assert class_set(p, few).all() and class_set_size(class_set(p, few)).tolist() == [3] * 9
        enough = choose_set_threshold(p, y, np.arange(9), coverage=0.9, score=score)
        assert enough.infinite == (False,)
    assert conditional_coverage_floor(8, 0.1) == 1.0


def test_las_threshold_is_a_true_class_probability():
    # By hand: true-class probabilities 0.7 x5, 0.3 x5, 0.4 x5, 0.1 x5; n = 20, coverage 0.7:
    # k = ceil(21 * 0.7) = 15, so t = the 15th largest = 0.3 and q = 1 - t = 0.7 (Sadinle et al. 2019).
    p = np.array([[0.7, 0.2, 0.1], [0.5, 0.3, 0.2], [0.4, 0.4, 0.2], [0.6, 0.3, 0.1]] * 5)
    y = np.array([0, 1, 1, 2] * 5)
    t = choose_set_threshold(p, y, np.arange(20), coverage=0.7)
    assert t.thresholds == (0.3,) and t.quantiles[0] == pytest.approx(0.7)
    assert class_set(p[:4], t).tolist() == [[True, False, False], [True, True, False], [True, True, False],
                                            [True, True, False]]


def test_aps_by_hand():
    # Rows (0.6, 0.3, 0.1) and (0.4, 0.4, 0.2). Mass ranked before each class: (0, 0.6, 0.9) and, with the
    # tie broken by the lower index, (0, 0.4, 0.8). Labels 1 and 2 score 0.6 and 0.8; with n = 2 rows and
    # coverage 0.5, k = ceil(3 * 0.5) = 2: q = 0.8. Sets {mass before <= 0.8}: {0, 1} and {0, 1, 2}.
    p = np.array([[0.6, 0.3, 0.1], [0.4, 0.4, 0.2]])
    t = choose_set_threshold(p, np.array([1, 2]), np.arange(2), coverage=0.5, score="aps")
    assert t.rank == (2,) and t.thresholds == (pytest.approx(0.8),)
    assert class_set(p, t).tolist() == [[True, True, False], [True, True, True]]
    # Every row's set holds its top class, even when q = 0 (the top class right on >= k of the rows):
    top = choose_set_threshold(p, np.array([0, 0]), np.arange(2), coverage=0.5, score="aps")
    assert top.thresholds == (0.0,) and class_set(p, top).tolist() == [[True, False, False],
                                                                       [True, False, False]]


def test_binary_head_sets_are_two_class_sets():
    rng = np.random.default_rng(2)
    p1 = rng.random(300)
    y = (rng.random(300) < p1).astype(int)
    two = np.stack([1 - p1, p1], axis=1)
    for score in ("las", "aps"):
        a = choose_set_threshold(p1, y, np.arange(300), coverage=0.8, score=score)
        b = choose_set_threshold(two, y, np.arange(300), coverage=0.8, score=score)
        assert a.thresholds == pytest.approx(b.thresholds)
        assert np.array_equal(class_set(p1[:, None], a), class_set(two, b))


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("score", ["las", "aps"])
def test_class_set_as_the_graph_computes_equals_the_definition(dtype, score):
    # Sadinle et al. 2019: k in C(x) iff 1 - p_k <= q, i.e. p_k >= t. Romano et al. 2020 (u = 0): k in C(x)
    # iff the mass ranked before k is <= q. Probabilities on a grid of 1/16, so ties are common and every
    # sum is exact in both dtypes; thresholds marginal and per class.
    rng = np.random.default_rng(11)
    counts = rng.multinomial(16, np.ones(6) / 6, size=4000)
    p = (counts / 16).astype(dtype)
    assert (p[:, :, None] == p[:, None, :]).sum() - p.size > p.shape[0]  # ties: > 1 tied pair a row
    defining = 1.0 - p.astype(np.float64) if score == "las" else _mass_before_by_definition(p.astype(np.float64))
    for cuts in ([0.5], [0.25], [0.0], [1.0], list(rng.integers(0, 17, 6) / 16)):
        quantile = np.array(cuts)
        thresholds = tuple(1.0 - quantile) if score == "las" else tuple(quantile)
        t = SetThreshold(score, 0.9, len(cuts) > 1, thresholds, (100,) * len(cuts), (91,) * len(cuts),
                         np.dtype(dtype).name)
        expected = defining <= quantile
        got = class_set(p, t)
        assert got.dtype == bool and np.array_equal(got, expected)
        assert np.array_equal(class_set_size(got), expected.sum(axis=1))


def test_class_set_equals_the_definition_on_continuous_probabilities():
    rng = np.random.default_rng(12)
    p = softmax(rng.normal(0, 2, (3000, 8)), axis=1)
    b = _mass_before_by_definition(p)
    for q in (0.3, 0.8, 0.95):
        t = SetThreshold("aps", 0.9, False, (q,), (100,), (91,), "float64")
        far = np.abs(b - q) > 1e-12  # sums in another order may differ by rounding at the boundary only
        assert np.array_equal(class_set(p, t)[far], (b <= q)[far])


# --------------------------------------------------------------------------
# Conformal sets: the coverage guarantee over 1,000 draws


@pytest.fixture(scope="module")
def conformal_draws():
    # n = 244 with alpha = 0.1: (n + 1)(1 - alpha) = 220.5, so the exact expected coverage of continuous
    # scores, k / (n + 1) = 221/245 = 0.90204, sits mid-way between the bounds 0.9 and 0.9 + 1/245 = 0.90408;
    # the standard error of a mean over 1,000 sets is about 0.0006.
    rng = np.random.default_rng(2026)
    pool = _dyadic_pool(rng, 2000, K, 2.0)
    n = 244
    idx = rng.integers(0, len(pool), (SPLITS, n))
    return pool, idx, _labels(rng, pool[idx])


def _coverages(pool, idx, labels, score, class_conditional):
    """Exact coverage on the population of each draw's sets: overall and for each class."""
    keys = 1.0 - pool if score == "las" else _mass_before_by_definition(pool)
    quantiles, ranks, sizes = [], [], []
    rows = np.arange(idx.shape[1])
    for s in range(SPLITS):
        t = choose_set_threshold(pool[idx[s]], labels[s], rows, coverage=0.9, score=score,
                                 class_conditional=class_conditional)
        quantiles.append(t.quantiles)
        ranks.append(t.rank)
        sizes.append(t.n)
    q = np.array(quantiles)
    per_class = np.stack([
        _covered_mass(keys[:, k], pool[:, k], q[:, k if class_conditional else 0], "le") / pool[:, k].sum()
        for k in range(K)
    ], axis=1)
    overall = per_class @ pool.sum(axis=0) / len(pool)
    return overall, per_class, q, np.array(ranks), np.array(sizes)


@pytest.mark.parametrize("score", ["las", "aps"])
def test_split_conformal_coverage_over_1000_splits(conformal_draws, score):
    # Vovk et al. 2005; Angelopoulos & Bates 2021, Theorem 1: 1 - alpha <= P(Y in C(X)) <= 1 - alpha + 1/(n+1),
    # the upper bound when the scores have no ties. The probability averages over calibration sets, so the
    # mean over 1,000 sets of each set's exact population coverage must lie between the bounds.
    pool, idx, labels = conformal_draws
    n = idx.shape[1]
    overall, _, q, ranks, _ = _coverages(pool, idx, labels, score, False)
    se = overall.std() / math.sqrt(SPLITS)
    assert se < 1 / (n + 1) / 4  # the check resolves the interval
    assert 0.9 <= overall.mean() <= 0.9 + 1 / (n + 1)
    # The expected coverage of continuous scores is exactly k / (n + 1) (uniform order statistics).
    assert abs(overall.mean() - ranks[0, 0] / (n + 1)) < 4 * se
    if score == "aps":
        # The upper bound needs q > 0: the mass before the true class is 0 whenever it is the top class,
        # an atom. Here the top class is right on about 64 % of rows (61 to 66 % per class), less than
        # 1 - alpha, so q > 0.
        assert np.all(q > 0)


@pytest.mark.parametrize("score", ["las", "aps"])
def test_class_conditional_coverage_over_1000_splits(conformal_draws, score):
    # Mondrian conformal prediction (Vovk et al. 2005; Sadinle et al. 2019, class-specific coverage): for
    # each class y, 1 - alpha <= P(Y in C(X) | Y = y) <= 1 - alpha + 1/(n_y + 1) given n_y, so over draws
    # the mean coverage of class y lies in [1 - alpha, 1 - alpha + mean of 1/(n_y + 1)].
    pool, idx, labels = conformal_draws
    _, per_class, q, _, sizes = _coverages(pool, idx, labels, score, True)
    assert sizes.sum(axis=1).tolist() == [idx.shape[1]] * SPLITS
    assert np.isfinite(q).all() and (q > 0).all()  # no class with under 9 rows; no atom at q
    for k in range(K):
        upper = 0.9 + np.mean(1 / (sizes[:, k] + 1))
        se = per_class[:, k].std() / math.sqrt(SPLITS)
        assert 0.9 <= per_class[:, k].mean() <= upper, (k, per_class[:, k].mean(), upper, se)
        assert se < (upper - 0.9) / 4


def test_aps_sets_always_hold_the_top_class(conformal_draws):
    pool, idx, labels = conformal_draws
    t = choose_set_threshold(pool[idx[0]], labels[0], np.arange(idx.shape[1]), coverage=0.9, score="aps")
    member = class_set(pool, t)
    assert member[np.arange(len(pool)), pool.argmax(1)].all()
    assert class_set_size(member).min() >= 1


def test_conditional_coverage_floor_over_1000_splits(conformal_draws):
    # Vovk 2012 (training-conditional validity): for one calibration set the coverage is Beta(k, n + 1 - k),
    # so it falls below the floor at confidence 0.9 in at most 10 % of sets (allowance: the 0.999 quantile
    # of Binomial(1000, 0.1), scipy.stats.binom) - while it falls below 1 - alpha itself in far more.
    pool, idx, labels = conformal_draws
    overall, *_ = _coverages(pool, idx, labels, "las", False)
    floor = conditional_coverage_floor(idx.shape[1], 0.1, confidence=0.9)
    assert 0.85 < floor < 0.9
    assert (overall < floor).sum() <= stats.binom.ppf(0.999, SPLITS, 0.1)
    assert (overall < 0.9).sum() > 300


# --------------------------------------------------------------------------
# The ONNX operators named in the docstrings compute what the NumPy references compute


def _decision_graph(n_classes: int, t: np.ndarray, q: np.ndarray, tau: float) -> onnx.ModelProto:
    f32 = TensorProto.FLOAT
    nodes = [
        helper.make_node("GreaterOrEqual", ["p", "t"], ["las_set"]),
        helper.make_node("TopK", ["p", "k"], ["values", "indices"], axis=-1, largest=1, sorted=1),
        helper.make_node("CumSum", ["values", "axis"], ["before_sorted"], exclusive=1),
        helper.make_node("ScatterElements", ["p", "indices", "before_sorted"], ["before"], axis=-1),
        helper.make_node("LessOrEqual", ["before", "q"], ["aps_set"]),
        helper.make_node("Cast", ["aps_set"], ["aps_int"], to=TensorProto.INT64),
        helper.make_node("ReduceSum", ["aps_int", "axes"], ["aps_size"], keepdims=0),
        helper.make_node("ReduceMax", ["p"], ["top"], axes=[-1], keepdims=0),
        helper.make_node("GreaterOrEqual", ["top", "tau"], ["accept"]),
    ]
    inits = [
        numpy_helper.from_array(t.astype(np.float32), "t"), numpy_helper.from_array(q.astype(np.float32), "q"),
        numpy_helper.from_array(np.array([n_classes], np.int64), "k"),
        numpy_helper.from_array(np.array(-1, np.int64), "axis"),
        numpy_helper.from_array(np.array([-1], np.int64), "axes"),
        numpy_helper.from_array(np.array(tau, np.float32), "tau"),
    ]
    outputs = [
        helper.make_tensor_value_info("las_set", TensorProto.BOOL, ["N", n_classes]),
        helper.make_tensor_value_info("aps_set", TensorProto.BOOL, ["N", n_classes]),
        helper.make_tensor_value_info("accept", TensorProto.BOOL, ["N"]),
        helper.make_tensor_value_info("aps_size", TensorProto.INT64, ["N"]),
        helper.make_tensor_value_info("before", f32, ["N", n_classes]),
    ]
    graph = helper.make_graph(nodes, "decisions", [helper.make_tensor_value_info("p", f32, ["N", n_classes])],
                              outputs, inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    onnx.checker.check_model(model, full_check=True)
    return model


@pytest.mark.parametrize("data", ["ties", "continuous"])
def test_onnx_operators_compute_the_reference_sets(data):
    # Outside references: onnxruntime and onnx's ReferenceEvaluator (the ONNX spec's own implementation).
    # On float32 probabilities with many ties (TopK breaks them by the lower index, per the spec), and on
    # continuous ones, where the running sums must round as NumPy's left-to-right float32 sums do: equal
    # to the bit, so the reference decides rows at the boundary as the graph does.
    rng = np.random.default_rng(21)
    k = 5 if data == "ties" else 40
    if data == "ties":
        p = (rng.multinomial(16, np.ones(k) / k, size=500) / 16).astype(np.float32)
    else:
        p = softmax(rng.normal(0, 2, (2000, k)), axis=1).astype(np.float32)
    t_las = rng.choice([0.125, 0.25, 0.3, 0.5], k)
    q_aps = rng.choice([0.25, 0.5, 0.75, 0.875, 0.95], k)
    las = SetThreshold("las", 0.9, True, tuple(t_las), (50,) * k, (46,) * k, "float32")
    aps = SetThreshold("aps", 0.9, True, tuple(q_aps), (50,) * k, (46,) * k, "float32")
    model = _decision_graph(k, t_las, q_aps, 0.5)
    expected = [class_set(p, las), class_set(p, aps), accept(p, 0.5), class_set_size(class_set(p, aps)),
                _mass_before(p)]
    session = ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"])
    for got in (session.run(None, {"p": p}), ReferenceEvaluator(model).run(None, {"p": p})):
        for g, e in zip(got, expected, strict=True):
            assert g.dtype == e.dtype and np.array_equal(g, e)


# --------------------------------------------------------------------------
# Bad input: one OnnxcalError naming the problem


@pytest.mark.parametrize(
    ("call", "match"),
    [
        (lambda p, y, r: choose_accept_threshold(p * 5, y, r, error=0.1), "not its logits"),
        (lambda p, y, r: choose_accept_threshold(p, y + 3, r, error=0.1), r"class indices in \[0, 3\)"),
        (lambda p, y, r: choose_accept_threshold(p, y, r[:0], error=0.1), "no rows"),
        (lambda p, y, r: choose_accept_threshold(p, y, r + 100, error=0.1), "row indices"),
        (lambda p, y, r: choose_accept_threshold(p, y, r, error=1.5), "error target"),
        (lambda p, y, r: choose_accept_threshold(p, y, r, error=0.1, confidence=1.0), "confidence"),
        (lambda p, y, r: choose_accept_threshold(p, y, r, error=0.1, method="best"), "unknown threshold method"),
        (lambda p, y, r: choose_accept_threshold(p, y, r, error=0.1, thresholds=[np.nan]), "finite"),
        (lambda p, y, r: choose_set_threshold(p, y, r, coverage=0), "set coverage"),
        (lambda p, y, r: choose_set_threshold(p, y, r, score="raps"), "unknown conformity score"),
        (lambda p, y, r: choose_set_threshold(p, np.eye(3, dtype=int)[y], r), "one true class per row"),
        (lambda p, y, r: choose_set_threshold(p, y[:5], r), "labels have shape"),
    ],
)
def test_bad_input_is_one_clear_error(call, match):
    p = softmax(np.random.default_rng(0).normal(size=(10, 3)), axis=1)
    y = np.arange(10) % 3
    with pytest.raises(OnnxcalError, match=match):
        call(p, y, np.arange(10))
