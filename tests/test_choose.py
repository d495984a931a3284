"""The rule of ``--method auto`` (onnxcal.choose), on hand-made candidates."""

from __future__ import annotations

import json

import numpy as np
import pytest

from onnxcal.choose import Candidate, candidate, candidate_methods, choice_from_dict, choose, n_parameters
from onnxcal.errors import OnnxcalError
from onnxcal.scaling import Scaling


def cand(method: str, k: int, nll: float, span: list[float] | None) -> Candidate:
    return Candidate(method, k, {"nll": nll, "ece": 0.01, "brier": 0.1, "accuracy": 0.9}, {"nll": span})


def test_simplest_within_the_best_interval_is_chosen():
    table = [cand("temperature", 1, 0.300, [0.2, 0.4]), cand("vector", 8, 0.310, [0.2, 0.4]),
             cand("matrix", 20, 0.280, [0.26, 0.305])]
    c = choose(table)
    assert (c.best, c.chosen) == ("matrix", "temperature")
    assert "matrix has the lowest held-out NLL" in c.reason and "simpler temperature is chosen" in c.reason


def test_best_is_kept_when_nothing_simpler_lies_within():
    table = [cand("temperature", 1, 0.40, [0.3, 0.5]), cand("dirichlet", 20, 0.28, [0.27, 0.29])]
    c = choose(table)
    assert c.chosen == c.best == "dirichlet"
    assert "no method with fewer parameters" in c.reason


def test_the_upper_end_of_the_interval_is_inside():
    c = choose([cand("temperature", 1, 0.29, None), cand("matrix", 20, 0.28, [0.27, 0.29])])
    assert c.chosen == "temperature"


def test_no_interval_means_the_best():
    c = choose([cand("temperature", 1, 0.30, None), cand("matrix", 20, 0.2999, None)])
    assert c.chosen == "matrix" and "--bootstrap 0" in c.reason


def test_equal_parameters_follow_the_method_order():
    # beta (3) and histogram (3 here) tie on parameters: beta comes first in METHODS.
    c = choose([cand("histogram", 3, 0.30, [0.2, 0.4]), cand("beta", 3, 0.31, [0.2, 0.4])])
    assert c.chosen == "beta"


def test_no_candidate_is_refused():
    with pytest.raises(OnnxcalError, match="no calibration method"):
        choose([])


def test_round_trip_through_json():
    c = choose([cand("temperature", 1, 0.3, [0.2, 0.4]), cand("matrix", 20, 0.28, [0.25, 0.31])])
    assert choice_from_dict(json.loads(json.dumps(c.to_dict()))) == c


def test_unknown_method_in_a_file_is_named():
    data = choose([cand("temperature", 1, 0.3, None)]).to_dict()
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


def test_candidate_reads_the_after_intervals():
    after = {"nll": 0.3, "ece": 0.02, "brier": 0.1, "accuracy": 0.9, "mce": 0.5}
    intervals = {"after": {"nll": [0.25, 0.35], "ece": None, "brier": [0.09, 0.11], "accuracy": [0.85, 0.95]}}
    c = candidate(Scaling.of_temperature(2.0), 3, after, intervals)
    assert c.metrics == {"nll": 0.3, "ece": 0.02, "brier": 0.1, "accuracy": 0.9}
    assert c.intervals["nll"] == [0.25, 0.35] and c.intervals["ece"] is None
