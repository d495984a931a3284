"""The fit command's passes against a straightforward float64 computation written here.

Every metric of :func:`onnxcal.fit.summarize` (before and after, held-out
and fit part) is recomputed from the definitions, unchunked, in float64
with scipy's softmax, and compared. The references follow the published
definitions: NLL and Brier score (Brier 1950, the multiclass sum), ECE and
MCE over equal-width bins ((m-1)/M, m/M] (Guo et al. 2017, sec. 2; the
bin rule of sklearn.calibration.calibration_curve, as numpy.searchsorted
over the inner edges), adaptive ECE over the quantile edges of the
confidences (Nixon et al. 2019; numpy.quantile), classwise ECE (Kull et
al. 2019, sec. 2).
"""

import numpy as np
import pytest
import scipy.special
from sklearn.datasets import load_digits
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import train_test_split

from onnxcal import resample
from onnxcal.fit import FitOptions, summarize
from onnxcal.metrics import METRIC_FIELDS, evaluate

SMOOTH = ("nll", "brier", "accuracy", "mean_confidence")


def reference_metrics(z, y, temperature, n_bins=15, weights=None) -> dict:
    """Every metric from its definition, in float64, on the whole array at once."""
    s = np.asarray(z, dtype=np.float64) / temperature
    p = scipy.special.softmax(s, axis=1)
    n, k = p.shape
    w = np.ones(n) if weights is None else np.asarray(weights, dtype=np.float64)
    total = w.sum()
    r = np.arange(n)
    nll = np.sum(w * -scipy.special.log_softmax(s, axis=1)[r, y]) / total
    brier = np.sum(w * ((p - np.eye(k)[y]) ** 2).sum(axis=1)) / total
    pred = p.argmax(axis=1)
    conf, correct = p[r, pred], (pred == y).astype(np.float64)
    inner = np.linspace(0.0, 1.0, n_bins + 1)[1:-1]

    def binned(values, hits, edges):
        ids = np.searchsorted(edges, values)
        return (np.bincount(ids, w, n_bins), np.bincount(ids, w * values, n_bins),
                np.bincount(ids, w * hits, n_bins))

    counts, conf_sum, corr_sum = binned(conf, correct, inner)
    full = counts > 0
    quantile_edges = np.quantile(np.repeat(conf, w.astype(int)), np.linspace(0.0, 1.0, n_bins + 1))[1:-1]
    _, q_conf, q_corr = binned(conf, correct, quantile_edges)
    classwise = np.mean([
        np.abs(np.subtract(*binned(p[:, c], (y == c).astype(np.float64), inner)[1:])).sum() / total
        for c in range(k)
    ])
    accuracy, mean_conf = (w * correct).sum() / total, (w * conf).sum() / total
    return {
        "nll": nll, "brier": brier, "accuracy": accuracy, "mean_confidence": mean_conf,
        "gap": mean_conf - accuracy,
        "ece": np.abs(conf_sum - corr_sum).sum() / total,
        "mce": np.max(np.abs(conf_sum - corr_sum)[full] / counts[full]),
        "adaptive_ece": np.abs(q_conf - q_corr).sum() / total,
        "classwise_ece": classwise,
    }


def gumbel_set(seed, n, k, scale=3.0, t_true=1.5, dtype=np.float64):
    # Labels drawn from softmax(z / T) by the Gumbel-max trick (Gumbel 1954).
    rng = np.random.default_rng(seed)
    z = rng.normal(scale=scale, size=(n, k))
    y = np.argmax(z + t_true * rng.gumbel(size=z.shape), axis=1)
    return z.astype(dtype), y


def digits_set():
    # Open data: scikit-learn's bundled handwritten digits (UCI optical digits),
    # a barely regularised logistic regression trained on 300 of them.
    x, y = load_digits(return_X_y=True)
    x_train, x_val, y_train, y_val = train_test_split(x / 16.0, y, train_size=300, random_state=0, stratify=y)
    return LogisticRegression(C=1e4, max_iter=5000).fit(x_train, y_train).decision_function(x_val), y_val


SETS = {
    "digits": digits_set,
    "gumbel-3000x6": lambda: gumbel_set(1, 3000, 6),
    "gumbel-8000x100": lambda: gumbel_set(2, 8000, 100),
    "huge-logits": lambda: gumbel_set(3, 2000, 5, scale=3e3, t_true=2e3),  # rows shifted by their maximum
    "two-classes": lambda: gumbel_set(4, 2000, 2),
}


def _compare(got, want, fields, rel):
    for key in fields:
        assert got[key] == pytest.approx(want[key], rel=rel, abs=1e-300), key


@pytest.mark.parametrize("name", sorted(SETS))
@pytest.mark.parametrize("holdout", [0.25, 0.0])
def test_every_metric_equals_the_float64_definition(name, holdout):
    z, y = SETS[name]()
    s = summarize(z, y, {}, FitOptions(holdout=holdout, bootstrap=0))
    if holdout:
        fit_rows, held = resample.split_holdout(y, holdout, 0)
        t_part = s.holdout_result.temperature
        cases = [(s.before, held, 1.0), (s.after, held, t_part),
                 (s.fit_part["before"], fit_rows, 1.0), (s.fit_part["after"], fit_rows, t_part)]
    else:
        every = np.arange(len(y))
        cases = [(s.before, every, 1.0), (s.after, every, s.temperature)]
    for metrics, rows, t in cases:
        _compare(metrics.to_dict(), reference_metrics(z[rows], y[rows], t), METRIC_FIELDS, 1e-9)


def test_weighted_evaluate_equals_the_float64_definition(rng):
    # Bootstrap counts as weights (a row counted c times), on a subset of rows.
    z, y = gumbel_set(5, 3000, 8)
    rows = np.flatnonzero(rng.random(3000) < 0.6)
    counts = rng.integers(0, 4, len(rows))
    got = evaluate(z, y, 1.3, rows=rows, weights=counts).to_dict()
    _compare(got, reference_metrics(z[rows], y[rows], 1.3, weights=counts), METRIC_FIELDS, 1e-9)


@pytest.mark.parametrize("name", ["gumbel-3000x6", "gumbel-8000x100", "huge-logits"])
def test_float32_logits_agree_with_float64_to_float32_precision(name):
    # float32 logits are exponentiated in float32 (float64 sums): a single
    # exponential is within 2e-7 (relative) of the exact value, and the
    # averages over the rows are closer. The binned errors are sums of
    # |differences| over bins and are compared absolutely.
    z, y = SETS[name]()
    z32 = z.astype(np.float32)
    s = summarize(z32, y, {}, FitOptions(bootstrap=0))
    held = resample.split_holdout(y, 0.25, 0)[1]
    want = reference_metrics(z32[held], y[held], s.holdout_result.temperature)
    got = s.after.to_dict()
    _compare(got, want, SMOOTH, 2e-7)
    for key in ("ece", "mce", "adaptive_ece", "classwise_ece", "gap"):
        assert got[key] == pytest.approx(want[key], abs=2e-6), key
