"""onnxcal.metrics.calibration_error: the ECE family against hand-worked examples."""

import numpy as np
import pytest

from onnxcal.metrics import (
    adaptive_calibration_error,
    classwise_calibration_error,
    expected_calibration_error,
    maximum_calibration_error,
)


def test_ece_worked_example():
    # Worked by hand from the definition (Guo et al. 2017, eq. 3) with M = 10 bins
    # ((m-1)/M, m/M]:
    #   bin (0.8, 0.9]: confidences 0.85, 0.85, 0.9, 0.9  -> conf 0.875, acc 2/4
    #   bin (0.5, 0.6]: confidences 0.55, 0.6             -> conf 0.575, acc 2/2
    #   ECE = 4/6 * |0.5 - 0.875| + 2/6 * |1 - 0.575| = 0.25 + 0.141666... = 0.391666...
    conf = np.array([0.85, 0.85, 0.9, 0.9, 0.55, 0.6])
    correct = np.array([1, 0, 1, 0, 1, 1])
    assert expected_calibration_error(conf, correct, n_bins=10) == pytest.approx(0.25 + 0.425 / 3)


def test_ece_zero_when_confidence_equals_accuracy():
    conf = np.full(1000, 0.7)
    correct = np.array([1] * 700 + [0] * 300)
    assert expected_calibration_error(conf, correct) == pytest.approx(0.0, abs=1e-12)


def test_mce_worked_example():
    # By hand from the definition (Naeini et al. 2015; Guo et al. 2017, eq. 5), M = 10:
    #   bin (0.8, 0.9]: 0.85, 0.85, 0.9, 0.9 -> acc 2/4, conf 0.875 -> gap 0.375
    #   bin (0.5, 0.6]: 0.55, 0.6           -> acc 2/2, conf 0.575 -> gap 0.425 (the max)
    conf = np.array([0.85, 0.85, 0.9, 0.9, 0.55, 0.6])
    correct = np.array([1, 0, 1, 0, 1, 1])
    assert maximum_calibration_error(conf, correct, n_bins=10) == pytest.approx(0.425)


def test_adaptive_ece_worked_example():
    # By hand (Nixon et al. 2019, equal-mass ranges), M = 2 over 4 predictions:
    #   edges = quantiles 0, 1/2, 1 = 0.6, 0.75, 0.9
    #   range [0.6, 0.75]: 0.6, 0.7 -> acc 1/2, conf 0.65 -> 2/4 * 0.15
    #   range (0.75, 0.9]: 0.8, 0.9 -> acc 2/2, conf 0.85 -> 2/4 * 0.15
    conf = np.array([0.6, 0.7, 0.8, 0.9])
    correct = np.array([1, 0, 1, 1])
    assert adaptive_calibration_error(conf, correct, n_bins=2) == pytest.approx(0.15)


def test_classwise_ece_worked_example():
    # By hand (Kull et al. 2019, classwise-ECE), M = 10, two samples, two classes:
    #   class 0: both p = 0.8 in (0.7, 0.8], one labelled 0 -> |1/2 - 0.8| = 0.3
    #   class 1: both p = 0.2 in (0.1, 0.2], one labelled 1 -> |1/2 - 0.2| = 0.3
    #   mean over classes = 0.3
    p = np.array([[0.8, 0.2], [0.8, 0.2]])
    assert classwise_calibration_error(p, np.array([0, 1]), n_bins=10) == pytest.approx(0.3)
