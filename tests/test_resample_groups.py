"""Issue 12, item 5: the holdout and the bootstrap resample whole samples when a sample
gives several score rows (per-position and per-pixel heads).

The reference is arithmetic, not onnxcal: a set whose every sample is m identical
rows holds the information of the set of its samples (the NLL and every metric
are means, so m identical rows weigh as one row of weight m), so the grouped split,
fit and intervals must be those of the un-duplicated set; without groups the
intervals shrink by about sqrt(m) (the bootstrap's standard error of a mean of n
independent draws goes as 1/sqrt(n): Efron & Tibshirani 1993, ch. 5).
"""

from __future__ import annotations

import numpy as np
import pytest

from onnxcal import holdout, resample
from onnxcal.fit import FitOptions, fit_scaling

M = 4  # rows per sample


def _set(n: int, k: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    z = (rng.normal(size=(n, k)) * 2.5).astype(np.float32)
    p = np.exp(0.5 * z - (0.5 * z).max(axis=1, keepdims=True))
    p /= p.sum(axis=1, keepdims=True)
    y = (p.cumsum(axis=1) > rng.random((n, 1))).argmax(axis=1)
    if k == 1:  # one logit: 0/1 labels drawn from sigmoid(z / 2)
        y = (rng.random(n) < 1 / (1 + np.exp(-0.5 * z[:, 0]))).astype(np.int64)
    return z, y.astype(np.int64)


def _duplicated(z: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    return np.repeat(z, M, axis=0), np.repeat(y, M, axis=0), np.repeat(np.arange(len(z)), M)


def test_the_grouped_split_of_duplicated_rows_is_the_split_of_the_samples() -> None:
    z, y = _set(300, 5, 1)
    _, yd, groups = _duplicated(z, y)
    fit_s, held_s = resample.split_holdout(y, 0.3, 5)
    fit_r, held_r = resample.split_holdout(yd, 0.3, 5, groups=groups)
    np.testing.assert_array_equal(held_r, (held_s[:, None] * M + np.arange(M)).ravel())
    np.testing.assert_array_equal(fit_r, (fit_s[:, None] * M + np.arange(M)).ravel())
    assert not set(groups[fit_r]) & set(groups[held_r])  # no sample in both parts


def test_a_sample_is_stratified_by_its_most_frequent_class() -> None:
    labels = np.array([0, 0, 1, 1, 1, 2, 2, 2, 2, 0, 2, 2])  # samples of 3 rows
    groups = np.repeat(np.arange(4), 3)
    strata = holdout._sample_strata(labels, resample.samples_of(groups))
    assert strata.tolist() == [0, 1, 2, 2]


@pytest.mark.parametrize(
    ("method", "k", "replicates"), [("temperature", 5, 60), ("platt", 1, 25), ("temperature", 1, 60)]
)
def test_grouped_intervals_of_duplicated_rows_are_those_of_the_samples(method: str, k: int, replicates: int) -> None:
    z, y = _set(240, k, 2)
    zd, yd, groups = _duplicated(z, y)
    options = FitOptions(method=method, holdout=0.3, seed=7, bootstrap=replicates)
    fit_s, held_s = resample.split_holdout(y, options.holdout, options.seed)
    fit_r, held_r = resample.split_holdout(yd, options.holdout, options.seed, groups=groups)
    start = fit_scaling(z, y, options, rows=fit_s).scaling
    start_d = fit_scaling(zd, yd, options, rows=fit_r).scaling
    for name, value in start.arrays().items():
        np.testing.assert_allclose(start_d.arrays()[name], value, rtol=1e-6)
    by_sample = resample.bootstrap(z, y, options, fit_s, held_s, start, refit=fit_scaling, threads=1)
    grouped = resample.bootstrap(zd, yd, options, fit_r, held_r, start_d, refit=fit_scaling, threads=1,
                                 groups=groups)
    by_row = resample.bootstrap(zd, yd, options, fit_r, held_r, start_d, refit=fit_scaling, threads=1)
    assert grouped["resampled"] == "samples" and by_row["resampled"] == "rows"
    assert (grouped["samples_fit"], grouped["samples_holdout"]) == (len(fit_s), len(held_s))
    for name in start.parameters:
        np.testing.assert_allclose(np.ravel(grouped["parameters"][name]), np.ravel(by_sample["parameters"][name]),
                                   rtol=1e-5)
    for metric in ("nll", "ece", "brier", "accuracy"):
        np.testing.assert_allclose(grouped["after"][metric], by_sample["after"][metric], rtol=1e-5, atol=1e-7)
    name = next(iter(start.parameters))
    ratio = np.ptp(np.ravel(grouped["parameters"][name])) / np.ptp(np.ravel(by_row["parameters"][name]))
    assert 1.4 < ratio < 3.0  # about sqrt(M) = 2: the by-row intervals are far too narrow


def test_every_replicate_draws_whole_samples() -> None:
    groups = np.repeat(np.arange(30), [1, 2, 3] * 10)  # samples of different sizes
    samples = resample.samples_of(groups)
    draws = resample._draws(np.random.default_rng(0), 20, len(groups), None, samples, samples)
    for draw in draws:
        counts = draw.fit_counts
        for start, size in zip(samples.starts, samples.sizes, strict=True):
            assert len(set(counts[start : start + size])) == 1  # every row of a sample drawn alike
        assert counts[samples.starts].sum() == samples.count  # as many samples drawn as there are


# --------------------------------------------------------------------------
# Dense heads: captured per pixel and per position, resampled by sample


def _numpy_sample_bootstrap(z: np.ndarray, y: np.ndarray, groups: np.ndarray, fit_rows: np.ndarray,
                            replicates: int, seed: int) -> np.ndarray:
    """2.5 and 97.5 percentiles of T over replicates that draw the fit part's samples with
    replacement, each T fitted by scipy.optimize.minimize_scalar on the drawn samples' rows."""
    import scipy.optimize
    import scipy.special

    rng = np.random.default_rng(seed)
    owners = groups[fit_rows]
    samples = np.unique(owners)
    z, y = z[fit_rows].astype(np.float64), y[fit_rows]
    where = np.searchsorted(samples, owners)
    ts = []
    for _ in range(replicates):
        w = np.bincount(rng.integers(0, len(samples), len(samples)), minlength=len(samples))[where]

        def nll(log_t: float, w: np.ndarray = w) -> float:
            s = z / np.exp(log_t)
            if s.shape[1] == 1:  # binary cross-entropy of sigmoid(z / T)
                return float(w @ (np.logaddexp(0.0, s[:, 0]) - y * s[:, 0]))
            return float(-w @ scipy.special.log_softmax(s, axis=1)[np.arange(len(y)), y])

        res = scipy.optimize.minimize_scalar(nll, bounds=(np.log(0.01), np.log(100.0)), method="bounded")
        ts.append(np.exp(res.x))
    return np.percentile(ts, [2.5, 97.5])


def _dense_capture(head: str, tmp_path) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """A capture of ``head_models.per_pixel`` or ``per_position`` on correlated data: each sample's
    inputs share a large common part, and one uniform draw per sample decides all its labels."""
    import head_models as hm
    import onnx

    from onnxcal import api

    rng = np.random.default_rng(12)
    n = 120
    if head == "per_pixel":
        model = hm.per_pixel()
        x = rng.normal(size=(n, hm.F, 1, 1)) + 0.15 * rng.normal(size=(n, hm.F, 4, 4))
        z = hm.per_pixel_logits(x)[:, 0]  # N x H x W, by NumPy from the weights
        u = rng.random((n, 1, 1))
        labels = (u < 1 / (1 + np.exp(-0.5 * z))).astype(np.int64)
    else:
        model = hm.per_position()
        x = rng.normal(size=(n, 1, hm.F)) + 0.15 * rng.normal(size=(n, 6, hm.F))
        z = hm.per_position_logits(x)  # N x T x K
        p = np.exp(0.5 * z - (0.5 * z).max(axis=-1, keepdims=True))
        p /= p.sum(axis=-1, keepdims=True)
        labels = (p.cumsum(axis=-1) > rng.random((n, 1, 1))).argmax(axis=-1)
    onnx.save(model, tmp_path / "model.onnx")
    np.savez(tmp_path / "val.npz", x=x.astype(np.float32), labels=labels)
    cap = api.capture(tmp_path / "model.onnx", tmp_path / "val.npz")
    groups = cap.groups()
    assert groups is not None and cap.rows_per_sample == len(cap.logits) // n
    return np.asarray(cap.logits), cap.labels, groups


@pytest.mark.parametrize("head", ["per_pixel", "per_position"])
def test_dense_heads_split_and_bootstrap_by_sample(head: str, tmp_path) -> None:
    z, y, groups = _dense_capture(head, tmp_path)
    options = FitOptions(holdout=0.25, seed=3, bootstrap=200)
    fit_rows, held = resample.split_holdout(y, options.holdout, options.seed, groups=groups)
    assert not set(groups[fit_rows]) & set(groups[held])  # no sample in both parts
    assert abs(len(np.unique(groups[held])) - 30) <= 2  # a quarter of the 120 samples, rounded per stratum
    start = fit_scaling(z, y, options, rows=fit_rows).scaling
    grouped = resample.bootstrap(z, y, options, fit_rows, held, start, refit=fit_scaling, groups=groups)
    by_row = resample.bootstrap(z, y, options, fit_rows, held, start, refit=fit_scaling)
    reference = _numpy_sample_bootstrap(z, y, groups, fit_rows, 200, seed=99)
    width = np.ptp(grouped["temperature"])
    assert abs(width / np.ptp(reference) - 1) < 0.3  # the same width as a by-sample bootstrap done apart
    assert width > 1.8 * np.ptp(by_row["temperature"])  # rows of one sample are far from independent


def test_fit_and_report_of_a_dense_capture_say_how_many_samples_stand_behind_the_figures(tmp_path) -> None:
    import json

    from onnxcal import api

    z, y, groups = _dense_capture("per_position", tmp_path)
    options = FitOptions(holdout=0.25, seed=1, bootstrap=40)
    api.capture(tmp_path / "model.onnx", tmp_path / "val.npz", out=tmp_path / "cap.npz")
    summary = api.fit(tmp_path / "cap.npz", out=tmp_path / "fit.json", options=options)
    fit_rows, held = resample.split_holdout(y, 0.25, 1, groups=groups)
    s_held = len(np.unique(groups[held]))
    split = json.loads((tmp_path / "fit.json").read_text())["split"]
    assert split["grouped_by"] == "sample" and split["rows_per_sample"] == 6
    assert (split["samples_fit"], split["samples_holdout"]) == (len(np.unique(groups[fit_rows])), s_held)
    assert summary.intervals is not None and summary.intervals["resampled"] == "samples"
    assert summary.before.n == len(held)  # the figures are on the rows of the held-out samples
    assert any(f"on {len(held)} held-out rows of {s_held} samples" in note for note in summary.notes)
    api.report(tmp_path / "cap.npz", fit=tmp_path / "fit.json", out=tmp_path / "rep")
    content = json.loads((tmp_path / "rep" / "report.json").read_text())
    assert content["data"]["samples_evaluated"] == s_held and content["data"]["rows_per_sample"] == 6
    assert f"{len(held)} rows of {s_held} held-out samples" in content["verdict"][0]
    assert content["metrics"]["after_interval"] is not None  # the report re-made the fit's grouped split


def test_l1_normalised_sigmoids_are_split_and_resampled_by_sample_too() -> None:
    from onnxcal.fit import summarize

    rng = np.random.default_rng(11)
    z = rng.normal(scale=4.0, size=(200, 4))
    s = 1 / (1 + np.exp(-z / 2.5))
    y = (rng.random(200)[:, None] > np.cumsum(s / s.sum(axis=1, keepdims=True), axis=1)).sum(axis=1)
    zd, yd, groups = _duplicated(z, y)
    options = FitOptions(holdout=0.25, bootstrap=20, seed=3)
    plain = summarize(z, y, {"fit_as": "sigmoid-l1"}, options)
    grouped = summarize(zd, yd, {"fit_as": "sigmoid-l1"}, options, groups=groups)
    assert grouped.split["samples_holdout"] == plain.split["n_holdout"] and grouped.split["rows_per_sample"] == M
    assert grouped.temperature == pytest.approx(plain.temperature, rel=1e-6)
    assert plain.intervals is not None and grouped.intervals is not None
    np.testing.assert_allclose(grouped.intervals["temperature"], plain.intervals["temperature"], rtol=1e-5)
