"""onnxcal.metrics.evaluation: evaluate against reference libraries and hand-worked examples."""

import numpy as np
import pytest
import scipy.special
from sklearn.calibration import calibration_curve
from sklearn.metrics import brier_score_loss, log_loss

from onnxcal.metrics import METRIC_FIELDS, classwise_calibration_error, evaluate, expected_calibration_error, sigmoid
from onnxcal.metrics import core as metrics_core
from onnxcal.scaling import Scaling


@pytest.mark.parametrize("temperature", [1.0, 0.7, 2.5])
def test_nll_matches_sklearn_log_loss(rng, temperature):
    # Reference library: sklearn.metrics.log_loss (mean cross-entropy, natural log).
    z = rng.normal(scale=3.0, size=(500, 6))
    y = rng.integers(0, 6, size=500)
    p = scipy.special.softmax(z / temperature, axis=1)
    expected = log_loss(y, p, labels=np.arange(6))
    assert evaluate(z, y, temperature).nll == pytest.approx(expected, rel=1e-9)


def test_brier_binary_matches_sklearn(rng):
    # Reference library: sklearn.metrics.brier_score_loss is the binary score
    # mean (p1 - y)^2; the multiclass score (Brier 1950) sums over both classes,
    # which for K = 2 is exactly twice the binary one.
    z = rng.normal(scale=2.0, size=(400, 2))
    y = rng.integers(0, 2, size=400)
    p1 = scipy.special.softmax(z, axis=1)[:, 1]
    assert evaluate(z, y).brier == pytest.approx(2 * brier_score_loss(y, p1), rel=1e-9)


def test_brier_multiclass_direct_formula(rng):
    # Brier (1950), Monthly Weather Review 78(1): mean over samples of sum_k (p_k - o_k)^2.
    z = rng.normal(size=(300, 5))
    y = rng.integers(0, 5, size=300)
    p = scipy.special.softmax(z, axis=1)
    direct = np.mean(np.sum((p - np.eye(5)[y]) ** 2, axis=1))
    assert evaluate(z, y).brier == pytest.approx(direct, rel=1e-12)


def test_evaluate_accuracy_and_confidence(rng):
    z = rng.normal(size=(250, 4))
    y = rng.integers(0, 4, size=250)
    p = scipy.special.softmax(z, axis=1)
    m = evaluate(z, y)
    assert m.accuracy == pytest.approx(np.mean(p.argmax(1) == y))
    assert m.mean_confidence == pytest.approx(p.max(1).mean())
    expected_ece = expected_calibration_error(p.max(1), p.argmax(1) == y)
    assert m.ece == pytest.approx(expected_ece, rel=1e-12)


def test_evaluate_chunked_equals_whole(rng, monkeypatch):
    z = rng.normal(scale=4.0, size=(1001, 7)).astype(np.float32)
    y = rng.integers(0, 7, size=1001)
    whole = evaluate(z, y, 1.7)
    monkeypatch.setattr(metrics_core, "_CHUNK_ELEMENTS", 7 * 10)  # ten rows per chunk
    chunked = evaluate(z, y, 1.7)
    for field in METRIC_FIELDS:
        assert getattr(chunked, field) == pytest.approx(getattr(whole, field), rel=1e-10)


def test_evaluate_reads_a_memmap(tmp_path, rng):
    z = rng.normal(size=(64, 3)).astype(np.float32)
    y = rng.integers(0, 3, size=64)
    np.save(tmp_path / "z.npy", z)
    mm = np.load(tmp_path / "z.npy", mmap_mode="r")
    assert evaluate(mm, y) == evaluate(z, y)


def _binary_case(rng, n=3000):
    z = rng.normal(scale=2.0, size=n)
    p = scipy.special.expit(z)
    y = (rng.random(n) < scipy.special.expit(z / 1.7)).astype(int)
    return p, y


def test_binary_classwise_ece_from_sklearn_curve(rng):
    # The classwise ECE of a single-logit binary model is the ECE of its
    # probability (Kull et al. 2019, sec. 2): sum_m n_m/n |freq_m - conf_m|, here
    # from sklearn's calibration_curve with bin sizes counted by numpy.histogram
    # over the same right-closed uniform edges.
    p, y = _binary_case(rng)
    prob_true, prob_pred = calibration_curve(y, p, n_bins=15, strategy="uniform")
    sizes = np.bincount(np.searchsorted(np.linspace(0, 1, 16)[1:-1], p), minlength=15)
    expected = np.sum(sizes[sizes > 0] / len(p) * np.abs(prob_true - prob_pred))
    m = evaluate(scipy.special.logit(p)[:, None], y)
    assert m.kind == "binary"
    assert m.classwise_ece == pytest.approx(expected, rel=1e-9)


def test_evaluate_classwise_matches_the_function(rng):
    z = rng.normal(scale=3.0, size=(700, 6))
    y = rng.integers(0, 6, 700)
    p = scipy.special.softmax(z / 1.3, axis=1)
    assert evaluate(z, y, 1.3).classwise_ece == pytest.approx(classwise_calibration_error(p, y), rel=1e-10)


def test_gap_is_positive_when_overconfident(rng):
    z = rng.normal(scale=4.0, size=(4000, 5))
    y = np.argmax(z + 3.0 * rng.gumbel(size=z.shape), axis=1)  # truth: T = 3, model says T = 1
    m = evaluate(z, y)
    assert m.gap == pytest.approx(m.mean_confidence - m.accuracy)
    assert m.gap > 0.1


def test_binary_metrics_match_references(rng):
    # References: sklearn.metrics.log_loss and brier_score_loss on the positive
    # probability sigmoid(z / T).
    z = rng.normal(scale=2.5, size=(800, 1))
    y = (rng.random(800) < 0.5).astype(int)
    p = scipy.special.expit(z[:, 0] / 1.6)
    m = evaluate(z, y, 1.6)
    assert m.nll == pytest.approx(log_loss(y, p), rel=1e-9)
    assert m.brier == pytest.approx(brier_score_loss(y, p), rel=1e-9)
    assert m.accuracy == pytest.approx(np.mean((p > 0.5) == y))
    assert m.mean_confidence == pytest.approx(np.mean(np.maximum(p, 1 - p)))


def test_binary_equals_two_class_softmax(rng):
    # softmax([0, z])_1 = sigmoid(z) (common practice): every metric agrees,
    # except the multiclass Brier, which sums over both classes (twice the binary).
    z = rng.normal(scale=2.0, size=600)
    y = rng.integers(0, 2, 600)
    one = evaluate(z[:, None], y, 1.4)
    two = evaluate(np.c_[np.zeros(600), z], y, 1.4)
    for key in ("nll", "ece", "mce", "adaptive_ece", "classwise_ece", "accuracy", "mean_confidence", "gap"):
        assert getattr(one, key) == pytest.approx(getattr(two, key), rel=1e-9, abs=1e-12)
    assert two.brier == pytest.approx(2 * one.brier, rel=1e-12)


def test_multilabel_metrics_are_entrywise(rng):
    # Reference library: sklearn.metrics.log_loss / brier_score_loss over all
    # (sample, label) entries pooled; classwise ECE is the mean of each label's ECE.
    z = rng.normal(scale=2.0, size=(500, 3))
    y = (rng.random((500, 3)) < 0.4).astype(np.uint8)
    t = np.array([0.8, 1.0, 2.0])
    m = evaluate(z, y, Scaling.of_temperature(t, "multilabel"))
    p = scipy.special.expit(z / t)
    assert m.kind == "multilabel" and m.n == 500
    assert m.nll == pytest.approx(log_loss(y.ravel(), p.ravel()), rel=1e-9)
    assert m.brier == pytest.approx(brier_score_loss(y.ravel(), p.ravel()), rel=1e-9)
    per_label = [evaluate(scipy.special.logit(p[:, [k]]), y[:, k]).classwise_ece for k in range(3)]
    assert m.classwise_ece == pytest.approx(np.mean(per_label), rel=1e-9)
    assert m.accuracy == pytest.approx(np.mean((p > 0.5) == y))


def test_vector_scaling_metrics(rng):
    z = rng.normal(scale=2.0, size=(300, 3))
    y = rng.integers(0, 3, 300)
    w, b = np.array([0.5, 1.0, 2.0]), np.array([0.1, 0.0, -0.1])
    m = evaluate(z, y, Scaling.of_affine(w, b, "vector", "multiclass"))
    assert m.nll == pytest.approx(log_loss(y, scipy.special.softmax(z * w + b, axis=1)), rel=1e-9)


def test_weights_equal_repeated_rows(rng):
    # A bootstrap count c means the row appears c times, for every metric.
    z = rng.normal(scale=3.0, size=(400, 4))
    y = rng.integers(0, 4, 400)
    counts = rng.integers(0, 3, 400)
    rows = np.flatnonzero(np.arange(400) % 3 != 0)
    weighted = evaluate(z, y, 1.5, rows=rows, weights=counts[rows])
    repeated = evaluate(np.repeat(z[rows], counts[rows], axis=0), np.repeat(y[rows], counts[rows]), 1.5)
    for key in METRIC_FIELDS:
        assert getattr(weighted, key) == pytest.approx(getattr(repeated, key), rel=1e-9, abs=1e-12)
    assert weighted.n == repeated.n


def test_huge_float32_logits_give_finite_metrics():
    rng = np.random.default_rng(3)
    z = (rng.normal(size=(500, 4)) * 1e4).astype(np.float32)
    y = rng.integers(0, 4, 500)
    m = evaluate(z, y)
    assert all(np.isfinite(getattr(m, key)) for key in METRIC_FIELDS)
    zb = (rng.normal(size=(500, 1)) * 1e4).astype(np.float32)
    mb = evaluate(zb, y % 2)
    assert np.isfinite(mb.nll) and mb.nll > 100  # confidently wrong half the time
    assert np.all(np.isfinite(sigmoid(zb)))
