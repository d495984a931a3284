"""The rule of ``--method auto`` (onnxcal.choose, onnxcal.fit.auto): on hand-made candidates, and on data
drawn from a known model (Gumbel-max sampling, as the temperature tests do), where the right answer is known."""

from __future__ import annotations

import json
import warnings

import numpy as np
import onnxruntime as ort
import pytest
import scipy.special
from conftest import random_mlp
from onnx.reference import ReferenceEvaluator

from onnxcal import graph, resample
from onnxcal.choose import (
    IDENTITY,
    METHODS,
    REPEAT_VALUES,
    REPEATS,
    Candidate,
    candidate_methods,
    choice_from_dict,
    choose,
    n_parameters,
)
from onnxcal.errors import OnnxcalError
from onnxcal.fit import FitOptions, fit_scaling, load_fit, save_fit, summarize
from onnxcal.fit.auto import _as_it_is, compare, fold_ids, out_of_fold, repeats_for, row_nll
from onnxcal.metrics import evaluate
from onnxcal.scaling import Scaling


def cand(method: str, k: int, nll: float, diff: list[float] | None = None) -> Candidate:
    metrics = {"nll": nll, "ece": 0.01, "brier": 0.1, "accuracy": 0.9}
    return Candidate(method, k, metrics, {"nll": [nll - 0.05, nll + 0.05]}, True, diff)


def test_simplest_whose_paired_difference_reaches_zero_is_chosen():
    table = [cand("temperature", 1, 0.300, [-0.001, 0.04]), cand("vector", 8, 0.310, [-0.01, 0.06]),
             cand("matrix", 20, 0.280)]
    c = choose(table)
    assert (c.best, c.chosen) == ("matrix", "temperature")
    assert "matrix has the lowest cross-fitted NLL" in c.reason and "simpler temperature is chosen" in c.reason
    assert "-0.0010 to +0.0400" in c.reason


def test_best_is_kept_when_every_simpler_method_is_told_apart():
    # temperature's NLL interval alone would overlap the best one's; the paired difference does not reach 0
    table = [cand("temperature", 1, 0.31, [0.002, 0.02]), cand("dirichlet", 20, 0.30)]
    c = choose(table)
    assert c.chosen == c.best == "dirichlet"
    assert "every method with fewer parameters is worse" in c.reason


def test_best_with_the_fewest_parameters_says_so():
    c = choose([cand("temperature", 1, 0.2), cand("matrix", 20, 0.3, [0.01, 0.2])])
    assert c.chosen == "temperature" and "no method has fewer parameters" in c.reason


def test_without_a_difference_a_candidate_counts_as_told_apart():
    c = choose([cand("temperature", 1, 0.30), cand("matrix", 20, 0.2999)])
    assert c.chosen == "matrix"


def test_equal_parameters_follow_the_method_order():
    # beta (3) and histogram (3 here) tie on parameters: beta comes first in METHODS.
    c = choose([cand("histogram", 3, 0.30), cand("beta", 3, 0.31, [-0.01, 0.03])])
    assert c.chosen == "beta"


def test_no_candidate_is_refused():
    with pytest.raises(OnnxcalError, match="no calibration method"):
        choose([])


def test_round_trip_through_json():
    c = choose([cand("temperature", 1, 0.3, [-0.02, 0.05]), cand("matrix", 20, 0.28)], folds=4, replicates=200)
    data = json.loads(json.dumps(c.to_dict()))
    assert data["folds"] == 4 and data["replicates"] == 200 and "cross-fitted" in data["rule"]
    assert choice_from_dict(data) == c


def test_unknown_method_in_a_file_is_named():
    data = choose([cand("temperature", 1, 0.3)]).to_dict()
    data["candidates"][0]["method"] = "magic"
    with pytest.raises(OnnxcalError, match="'magic'"):
        choice_from_dict(data)


def test_candidate_methods():
    assert candidate_methods("multiclass") == (
        "temperature", "vector", "matrix", "dirichlet", "isotonic", "histogram", "ensemble-temperature", "ovr-platt")
    assert "ovr-platt" not in candidate_methods("binary")  # on one logit it is Platt scaling again
    assert candidate_methods("multilabel") == ("temperature",)


def test_parameter_counts():
    k = 4
    assert n_parameters(Scaling.of_temperature(1.5), k) == 1
    assert n_parameters(Scaling.of_affine(np.ones(k), np.zeros(k), "vector", "multiclass"), k) == 2 * k
    assert n_parameters(Scaling.of_affine(1.0, 0.0, "platt", "binary"), 1) == 2
    w = {"W": np.eye(k).tolist(), "b": [0.0] * k}
    assert n_parameters(Scaling("matrix", w), k) == k * k + k
    assert n_parameters(Scaling("ensemble-temperature", {"temperature": 1.0, "weights": [1, 0, 0]}), k) == 3


# --------------------------------------------------------------------------
# The cross-fitting


def test_folds_are_stratified_and_cover_every_row():
    y = np.repeat([0, 1, 2], [10, 20, 7])
    fold = fold_ids(y, 5, seed=3)
    assert sorted(set(fold.tolist())) == [0, 1, 2, 3, 4]
    for c, size in ((0, 10), (1, 20), (2, 7)):
        counts = np.bincount(fold[y == c], minlength=5)
        assert counts.max() - counts.min() <= 1 and counts.sum() == size  # every class dealt evenly


def test_folds_take_whole_samples():
    groups = np.repeat(np.arange(12), 3)  # 12 samples of 3 rows
    y = np.repeat(np.arange(12) % 2, 3)
    fold = fold_ids(y, 4, seed=0, groups=groups)
    assert all(len(set(fold[groups == g].tolist())) == 1 for g in range(12))


def test_fewer_folds_than_samples_and_too_few_samples():
    assert len(set(fold_ids(np.array([0, 1, 0]), 5, 0).tolist())) == 3
    with pytest.raises(OnnxcalError, match="at least 2 samples"):
        fold_ids(np.array([0]), 5, 0)


def test_out_of_fold_rows_are_scored_by_a_fit_that_did_not_see_them():
    rng = np.random.default_rng(0)
    z = rng.normal(size=(60, 3)).astype(np.float32) * 3
    y = rng.integers(0, 3, 60)
    fold = fold_ids(y, 3, seed=1)
    oof, size, converged, _ = out_of_fold(z, y, FitOptions(method="temperature"), fold, fit_scaling)
    assert size == 1 and converged
    for f in range(3):  # refit by hand on the other folds: the same calibrated logits
        t = fit_scaling(z, y, FitOptions(method="temperature"), rows=np.flatnonzero(fold != f)).temperature
        np.testing.assert_allclose(oof[fold == f], z[fold == f] / t, rtol=1e-6)


def test_small_sets_are_cross_fitted_several_times_and_each_rows_nll_averaged():
    # The table's NLL of temperature scaling: each row's NLL (scipy.special.log_softmax of the out-of-fold
    # logits) averaged over the repeats, whose folds come from --seed, --seed + 1, ...; then over the rows.
    rng = np.random.default_rng(3)
    z = (rng.normal(size=(90, 3)) * 3).astype(np.float32)
    y = (z / 2 + rng.gumbel(size=(90, 3))).argmax(axis=1)
    options = FitOptions(method="auto", bootstrap=0, seed=7)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        choice, _ = compare(z, y, options, "multiclass", fit_scaling)
        per_repeat = []
        for r in range(REPEATS):
            oof, *_ = out_of_fold(z, y, FitOptions(method="temperature"), fold_ids(y, 5, 7 + r), fit_scaling)
            per_repeat.append(-scipy.special.log_softmax(oof, axis=1)[np.arange(90), y])
    assert choice.repeats == REPEATS and choice.to_dict()["repeats"] == REPEATS
    row = {c.method: c for c in choice.candidates}["temperature"]
    assert row.nll == pytest.approx(np.mean(per_repeat), rel=1e-9)
    # the repeats differ (else averaging would be pointless), and one alone is not the table's figure
    assert abs(per_repeat[0].mean() - np.mean(per_repeat)) > 1e-6
    assert choice_from_dict(json.loads(json.dumps(choice.to_dict()))).repeats == REPEATS


def test_large_sets_are_cross_fitted_once():
    assert repeats_for(np.broadcast_to(np.float32(0), (REPEAT_VALUES // 4, 4))) == REPEATS
    assert repeats_for(np.broadcast_to(np.float32(0), (REPEAT_VALUES // 4 + 1, 4))) == 1


@pytest.mark.parametrize("kind", ["multiclass", "binary", "multilabel"])
def test_row_nll_averages_to_evaluate(kind):
    # the per-row terms the paired comparison resamples are the NLL the table shows
    rng = np.random.default_rng(1)
    k = {"multiclass": 4, "binary": 1, "multilabel": 3}[kind]
    z = rng.normal(size=(50, k)) * 2
    y = rng.integers(0, 4, 50) if kind == "multiclass" else rng.integers(0, 2, (50, k) if k > 1 else 50)
    assert row_nll(z, y).mean() == pytest.approx(evaluate(z, y, 1.0).nll, rel=1e-9)


# --------------------------------------------------------------------------
# On data drawn from a known model


def _gumbel_max(rng: np.random.Generator, n: int, transform) -> tuple[np.ndarray, np.ndarray]:
    """Logits and labels drawn from softmax(transform(z)): argmax of transform(z) + Gumbel noise."""
    z = rng.normal(size=(n, 3)) * 4.0
    y = (transform(z) + rng.gumbel(size=(n, 3))).argmax(axis=1)
    return z.astype(np.float32), y


def _one_split_rule(z: np.ndarray, y: np.ndarray) -> str:
    """The rule before cross-fitting: fit on 75 %, the simplest whose held-out NLL lies within the best
    one's 95 % bootstrap interval (resampled held-out rows)."""
    fit_rows, held = resample.split_holdout(y, 0.25, 0)
    nll, size = {}, {}
    for m in candidate_methods("multiclass"):
        s = fit_scaling(z, y, FitOptions(method=m), rows=fit_rows).scaling
        nll[m], size[m] = row_nll(s.apply(z[held]), y[held]), n_parameters(s, 3)
    best = min(nll, key=lambda m: nll[m].mean())
    rng = np.random.default_rng(0)
    hi = np.percentile([nll[best][rng.integers(0, len(held), len(held))].mean() for _ in range(200)], 97.5)
    return min((m for m in nll if nll[m].mean() <= hi), key=lambda m: (size[m], METHODS.index(m)))


def _fresh_nll(z, y, method, z_new, y_new) -> float:
    return float(row_nll(fit_scaling(z, y, FitOptions(method=method)).scaling.apply(z_new), y_new).mean())


def test_small_set_from_a_temperature_model_the_one_split_rule_overfits_cross_fitting_does_not():
    # 48 rows (a small calibration set, as wine's) drawn from softmax(z / 2): temperature is the true map.
    # Seed 2 is one where the one-split rule, on its 12 held-out rows, picks vector scaling (6 parameters).
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        z, y = _gumbel_max(np.random.default_rng(2), 48, lambda s: s / 2.0)
        z_new, y_new = _gumbel_max(np.random.default_rng(999), 20000, lambda s: s / 2.0)
        old = _one_split_rule(z, y)
        choice, _ = compare(z, y, FitOptions(method="auto", bootstrap=200), "multiclass", fit_scaling)
        assert old == "vector" and choice.chosen == "temperature"
        # and on fresh rows of the same model the one-split pick is the worse map
        assert _fresh_nll(z, y, old, z_new, y_new) > _fresh_nll(z, y, choice.chosen, z_new, y_new) + 0.02


def test_a_richer_map_that_is_truly_better_is_chosen():
    # 300 rows from softmax(w * z + b) with per-class w and b: no temperature can fit the biases.
    w, b = np.array([1.0, 0.4, 2.0]), np.array([1.0, -1.0, 0.0])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        z, y = _gumbel_max(np.random.default_rng(0), 300, lambda s: s / 2.0 * w + b)
        z_new, y_new = _gumbel_max(np.random.default_rng(999), 20000, lambda s: s / 2.0 * w + b)
        choice, _ = compare(z, y, FitOptions(method="auto", bootstrap=200), "multiclass", fit_scaling)
    cands = {c.method: c for c in choice.candidates}
    assert choice.chosen not in ("temperature", "ensemble-temperature")
    assert cands["temperature"].difference is not None and cands["temperature"].difference[0] > 0
    assert _fresh_nll(z, y, choice.chosen, z_new, y_new) < _fresh_nll(z, y, "temperature", z_new, y_new) - 0.05


def test_without_a_bootstrap_the_paired_interval_is_a_normal_approximation():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        z, y = _gumbel_max(np.random.default_rng(5), 120, lambda s: s / 2.0)
        choice, _ = compare(z, y, FitOptions(method="auto", bootstrap=0), "multiclass", fit_scaling)
    assert choice.replicates == 0
    if choice.chosen != choice.best or choice.best != "temperature":
        assert "normal-approximation" in choice.reason
    for c in choice.candidates:
        assert all(v is None for v in c.intervals.values())
        assert (c.difference is None) == (c.method == choice.best)


# --------------------------------------------------------------------------
# The model as it is (IDENTITY)


def test_the_model_as_it_is_is_kept_only_when_every_map_is_worse_by_an_interval_above_zero():
    table = [cand(IDENTITY, 0, 0.200, [-0.02, -0.001]), cand("temperature", 1, 0.210),
             cand("vector", 6, 0.230, [0.01, 0.05])]
    c = choose(table, keep_model=True)
    assert c.chosen == IDENTITY and c.method == "temperature" and c.best == "temperature"
    assert "no map improved" in c.reason and "left as it is" in c.reason
    # without that evidence the maps are compared among themselves: the identity row is not a map
    c = choose(table)
    assert c.chosen == c.best == c.method == "temperature"
    back = choice_from_dict(json.loads(json.dumps(choose(table, smoothed_targets=True, keep_model=True).to_dict())))
    assert back.chosen == IDENTITY and back.smoothed_targets


def test_calibrated_model_gets_the_identity_or_a_temperature_near_one_and_a_miscalibrated_one_a_map():
    # Gumbel-max draws from softmax(z): the model is calibrated; from softmax(z / 2): it is not (T = 2).
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        z, y = _gumbel_max(np.random.default_rng(3), 400, lambda s: s)
        s = summarize(z, y, {}, FitOptions(method="auto", bootstrap=100))
        z2, y2 = _gumbel_max(np.random.default_rng(3), 400, lambda s: s / 2.0)
        s2 = summarize(z2, y2, {}, FitOptions(method="auto", bootstrap=100))
    rows = {c.method: c for c in s.choice.candidates}
    assert rows[IDENTITY].n_parameters == 0
    # its own probabilities' NLL; reference: scipy.special.log_softmax
    own = -scipy.special.log_softmax(z.astype(np.float64), axis=1)[np.arange(len(y)), y].mean()
    assert rows[IDENTITY].nll == pytest.approx(own, rel=1e-6)
    assert s.choice.chosen == IDENTITY or abs(s.scaling.temperature - 1.0) < 0.15
    assert s2.choice.chosen != IDENTITY and s2.choice.candidates[0].method == IDENTITY
    assert {c.method: c for c in s2.choice.candidates}[IDENTITY].difference[0] > 0  # the maps beat it
    assert s2.scaling.temperature is None or s2.scaling.temperature > 1.5


def test_the_model_as_it_is_summary_bakes_t_one(tmp_path):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        z, y = _gumbel_max(np.random.default_rng(4), 200, lambda s: s)
        t = summarize(z, y, {}, FitOptions(bootstrap=0))
    kept = _as_it_is(t)
    assert kept.scaling.method == "temperature" and kept.scaling.temperature == 1.0
    assert kept.after == kept.before and kept.fit_part["after"] == kept.fit_part["before"]
    assert kept.holdout_result.scaling.temperature == 1.0 and kept.intervals is None
    save_fit(tmp_path / "fit.json", kept)
    assert load_fit(tmp_path / "fit.json").scaling.temperature == 1.0


def test_the_model_as_it_is_patched_gives_the_original_probabilities(rng, tmp_path):
    # Baked in, the identity (T = 1) must give the original model's own output, run by onnxruntime and by
    # onnx's ReferenceEvaluator (onnx's own Python implementation of the operators).
    model = random_mlp(rng, d=6, k=3, final="Softmax")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        z, y = _gumbel_max(np.random.default_rng(4), 120, lambda s: s)
        kept = _as_it_is(summarize(z, y, {}, FitOptions(bootstrap=0)))
    patched = graph.patch(model, kept.scaling, source_sha256="0" * 64, source_name="model.onnx")
    x = rng.normal(size=(32, 6)).astype(np.float32)
    want = ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"]).run(None, {"x": x})[0]
    got = ort.InferenceSession(patched.SerializeToString(), providers=["CPUExecutionProvider"]).run(None, {"x": x})[0]
    ref = ReferenceEvaluator(patched).run(None, {"x": x})[0]
    assert np.allclose(got, want, atol=1e-6) and np.allclose(ref, want, atol=1e-6)
    assert graph.read_record(patched).temperature == 1.0
