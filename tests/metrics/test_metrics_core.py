"""onnxcal.metrics.core: softmax, log-softmax, sigmoid and the scores of a probability output, against scipy."""

import numpy as np
import scipy.special

from onnxcal import metrics
from onnxcal.metrics import log_softmax, softmax


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


def test_scores_from_probabilities_give_the_probabilities_back(rng):
    # Reference library: scipy.special.softmax / expit undo the conversion.
    z = rng.normal(scale=4, size=(50, 5))
    p = scipy.special.softmax(z, axis=1).astype(np.float32)
    np.testing.assert_allclose(softmax(metrics.scores_from_probabilities(p, "softmax")), p, rtol=1e-5)
    np.testing.assert_allclose(metrics.scores_from_probabilities(np.log(p), "logsoftmax"), np.log(p))
    q = scipy.special.expit(z).astype(np.float32)
    np.testing.assert_allclose(scipy.special.expit(metrics.scores_from_probabilities(q, "sigmoid")), q, rtol=1e-5)
    # Probabilities rounded to 0 or 1 give large but finite logits.
    edge = metrics.scores_from_probabilities(np.array([[0.0, 1.0]], np.float32), "sigmoid")
    assert np.all(np.isfinite(edge)) and edge[0, 0] < -80 and edge[0, 1] > 80
