"""Label draws from known models and the options of a fit without evaluation, shared by tests/fit/."""

import numpy as np
import scipy.special

from onnxcal.fit import FitOptions


def gumbel_labels(rng, z, temperature):
    """Labels drawn exactly from softmax(z / T) by the Gumbel-max trick.

    Gumbel (1954); Maddison, Tarlow, Minka, "A* Sampling", NeurIPS 2014:
    argmax_k(z_k / T + G_k), G_k i.i.d. standard Gumbel, is distributed as
    softmax(z / T); multiplying through by T gives argmax(z + T G).
    """
    return np.argmax(z + temperature * rng.gumbel(size=z.shape), axis=1)


def bernoulli_labels(rng, s):
    """0/1 labels with P(1) = sigmoid(s) (the definition of the logistic model)."""
    return (rng.random(s.shape) < scipy.special.expit(s)).astype(np.uint8)


NO_EVAL = FitOptions(holdout=0, bootstrap=0)
