"""No solver changes the caller's logits: float64 arrays are read through views (metrics.iter_chunks)."""

from __future__ import annotations

import numpy as np
import pytest

from onnxcal.fit import FitOptions, fit_scaling, fit_sigmoid_temperature, fit_temperature, nll_derivatives, summarize
from onnxcal.scaling import METHODS_FOR


def _multiclass(rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    z = rng.normal(scale=3.0, size=(300, 4))
    return z, np.argmax(z / 2.0 + rng.gumbel(size=z.shape), axis=1)


def test_fit_temperature_and_its_derivatives_leave_float64_logits_alone(rng):
    # The bug: nll_derivatives (and so any caller of the softmax pass) shifted the rows of a float64
    # array by their maximum in place.
    z, y = _multiclass(rng)
    kept = z.copy()
    nll_derivatives(z, y, 0.7)
    fit_temperature(z, y)
    fit_temperature(z, y, weights=np.ones(len(y)))
    np.testing.assert_array_equal(z, kept)


def test_sigmoid_temperature_leaves_float64_logits_alone(rng):
    z = rng.normal(scale=3.0, size=(300, 1))
    y = (rng.random(300) < 1 / (1 + np.exp(-z[:, 0] / 2))).astype(np.int64)
    kept = z.copy()
    fit_sigmoid_temperature(z, y)
    np.testing.assert_array_equal(z, kept)


@pytest.mark.parametrize("method", METHODS_FOR["multiclass"])
def test_every_multiclass_method_leaves_float64_logits_alone(rng, method):
    z, y = _multiclass(rng)
    kept = z.copy()
    fit_scaling(z, y, FitOptions(method=method))
    summarize(z, y, {}, FitOptions(method=method, bootstrap=3))
    np.testing.assert_array_equal(z, kept)
