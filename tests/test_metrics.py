"""Metrics against reference libraries and hand-worked examples."""

import numpy as np
import pytest
import scipy.special
from sklearn.metrics import brier_score_loss, log_loss

from onnxcal import metrics
from onnxcal.metrics import (
    evaluate,
    expected_calibration_error,
    log_softmax,
    reliability_bins,
    softmax,
)


def test_softmax_matches_scipy(rng):
    # Reference library: scipy.special.softmax / scipy.special.log_softmax.
    z = rng.normal(scale=30.0, size=(200, 7))
    np.testing.assert_allclose(softmax(z), scipy.special.softmax(z, axis=1), rtol=1e-12, atol=1e-300)
    np.testing.assert_allclose(log_softmax(z), scipy.special.log_softmax(z, axis=1), rtol=1e-12)
    np.testing.assert_allclose(softmax(z, axis=0), scipy.special.softmax(z, axis=0), rtol=1e-12)


def test_softmax_is_stable_for_huge_logits():
    z = np.array([[1e4, 0.0, -1e4]], dtype=np.float32)
    p = softmax(z)
    assert np.all(np.isfinite(p))
    np.testing.assert_allclose(p, [[1.0, 0.0, 0.0]])


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


def test_ece_worked_example():
    # Worked by hand from the definition (Guo et al. 2017, eq. 3) with M = 10 bins
    # ((m-1)/M, m/M]:
    #   bin (0.8, 0.9]: confidences 0.85, 0.85, 0.9, 0.9  -> conf 0.875, acc 2/4
    #   bin (0.5, 0.6]: confidences 0.55, 0.6             -> conf 0.575, acc 2/2
    #   ECE = 4/6 * |0.5 - 0.875| + 2/6 * |1 - 0.575| = 0.25 + 0.141666... = 0.391666...
    conf = np.array([0.85, 0.85, 0.9, 0.9, 0.55, 0.6])
    correct = np.array([1, 0, 1, 0, 1, 1])
    assert expected_calibration_error(conf, correct, n_bins=10) == pytest.approx(0.25 + 0.425 / 3)


def test_bins_are_right_closed():
    # An edge value belongs to the bin it closes: 0.5 is in (0.4, 0.5], not (0.5, 0.6]
    # (Guo et al. 2017, sec. 2: I_m = ((m-1)/M, m/M]).
    counts, _, _ = reliability_bins(np.array([0.5, 0.50001, 1.0, 0.0]), np.ones(4), n_bins=10)
    assert counts[4] == 1 and counts[5] == 1 and counts[9] == 1 and counts[0] == 1


def test_ece_zero_when_confidence_equals_accuracy():
    conf = np.full(1000, 0.7)
    correct = np.array([1] * 700 + [0] * 300)
    assert expected_calibration_error(conf, correct) == pytest.approx(0.0, abs=1e-12)


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
    monkeypatch.setattr(metrics, "_CHUNK_ELEMENTS", 7 * 10)  # ten rows per chunk
    chunked = evaluate(z, y, 1.7)
    for field in ("nll", "ece", "brier", "accuracy", "mean_confidence"):
        assert getattr(chunked, field) == pytest.approx(getattr(whole, field), rel=1e-10)


def test_evaluate_reads_a_memmap(tmp_path, rng):
    z = rng.normal(size=(64, 3)).astype(np.float32)
    y = rng.integers(0, 3, size=64)
    np.save(tmp_path / "z.npy", z)
    mm = np.load(tmp_path / "z.npy", mmap_mode="r")
    assert evaluate(mm, y) == evaluate(z, y)
