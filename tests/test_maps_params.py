"""Parameters of onnxcal.maps read from a file: bad values are refused with the field named.

The constraints come from each method's definition: a temperature and the
simplex weights of ensemble temperature scaling (Zhang et al., ICML 2020,
sec. 3.1), a, b >= 0 of beta calibration (Kull et al., AISTATS 2017, sec.
3.2), non-decreasing isotonic values (Zadrozny & Elkan, KDD 2002), one more
bin value than edges (histogram binning), K x K matrices (Guo et al. 2017;
Kull et al. 2019).
"""

from __future__ import annotations

import math

import pytest

from onnxcal.errors import OnnxcalError
from onnxcal.maps import MODULES, module

GOOD = {
    "matrix": {"W": [[1.0, 0.0], [0.0, 1.0]], "b": [0.0, 0.0]},
    "dirichlet": {"W": [[1.0, 0.0], [0.0, 1.0]], "b": [0.0, 0.0]},
    "beta": {"a": 1.0, "b": 1.0, "c": 0.0},
    "isotonic": {"x": [[0.1, 0.9], [0.5]], "y": [[0.0, 1.0], [0.5]]},
    "histogram": {"edges": [[0.5], []], "values": [[0.2, 0.8], [0.5]]},
    "ensemble-temperature": {"temperature": 1.5, "weights": [0.7, 0.2, 0.1]},
    "ovr-platt": {"a": [1.0, 2.0], "b": [0.0, -1.0]},
}
CLASSES = {"beta": 1}

BAD = [
    ("matrix", {"W": [[1.0, 0.0], [0.0, 1.0]]}, r"needs parameters W, b, got W"),
    ("matrix", {"W": [[1.0, 0.0], [0.0, 1.0]], "b": [0.0, 0.0], "c": 1.0}, r"got W, b, c"),
    ("matrix", {"W": [1.0, 0.0], "b": [0.0, 0.0]}, r"parameter 'W' must be a list of lists"),
    ("matrix", {"W": [[1.0, 0.0, 0.0], [0.0, 1.0, 0.0]], "b": [0.0, 0.0]},
     r"parameter 'W' has shape 2 x 3, expected 2 x 2"),
    ("dirichlet", {"W": [[1.0, math.nan], [0.0, 1.0]], "b": [0.0, 0.0]},
     r"parameter 'W' holds values that are not finite"),
    ("dirichlet", {"W": [[1.0, 0.0], [0.0, 1.0]], "b": [0.0]}, r"parameter 'b' has shape 1, expected 2"),
    ("dirichlet", {"W": [[1.0, 0.0], [0.0, 1.0]], "b": "zero"}, r"parameter 'b' must be numbers, got str"),
    ("beta", {"a": -0.5, "b": 1.0, "c": 0.0}, r"beta parameter 'a' is -0.5, but it must be >= 0"),
    ("beta", {"a": 1.0, "b": math.inf, "c": 0.0}, r"beta parameter 'b' holds values that are not finite"),
    ("beta", {"a": 1.0, "b": 1.0, "c": [0.0]}, r"beta parameter 'c' must be a number"),
    ("beta", {"a": 1.0, "b": 1.0, "c": True}, r"beta parameter 'c' must be numbers, got bool"),
    ("isotonic", {"x": [[0.9, 0.1], [0.5]], "y": [[0.0, 1.0], [0.5]]},
     r"isotonic parameter 'x\[0\]' must be strictly increasing"),
    ("isotonic", {"x": [[0.1, 0.9], [0.5]], "y": [[1.0, 0.0], [0.5]]}, r"isotonic parameter 'y\[0\]' decreases"),
    ("isotonic", {"x": [[0.1, 0.9], [0.5]], "y": [[0.0, 1.5], [0.5]]},
     r"isotonic parameter 'y\[0\]' holds values outside \[0, 1\]"),
    ("isotonic", {"x": [[0.1, 0.9], [0.5]], "y": [[0.0], [0.5]]}, r"'x\[0\]' and 'y\[0\]' have 2 and 1 values"),
    ("isotonic", {"x": [[0.1, 0.9]], "y": [[0.0, 1.0]]}, r"isotonic parameter 'x' has 1 per-class lists for 2 classes"),
    ("isotonic", {"x": "0.1", "y": [[0.0, 1.0], [0.5]]},
     r"isotonic parameter 'x' must be a list with one list of numbers per class"),
    ("histogram", {"edges": [[0.5], []], "values": [[0.2], [0.5]]},
     r"histogram parameter 'values\[0\]' has 1 values for 1 edges"),
    ("histogram", {"edges": [[0.5, 0.5], []], "values": [[0.2, 0.3, 0.8], [0.5]]},
     r"histogram parameter 'edges\[0\]' must be strictly increasing"),
    ("histogram", {"edges": [[0.5], []], "values": [[0.2, -0.1], [0.5]]},
     r"histogram parameter 'values\[0\]' holds values outside"),
    ("ensemble-temperature", {"temperature": 0.0, "weights": [1.0, 0.0, 0.0]},
     r"parameter 'temperature' is 0.0, but it must be > 0"),
    ("ensemble-temperature", {"temperature": 1.0, "weights": [0.5, 0.2, 0.2]},
     r"parameter 'weights' is \[0.5, 0.2, 0.2\], but it must be three numbers >= 0 adding up to 1"),
    ("ensemble-temperature", {"temperature": 1.0, "weights": [1.2, -0.2, 0.0]}, r"parameter 'weights'"),
    ("ensemble-temperature", {"temperature": 1.0, "weights": [0.5, 0.5]},
     r"parameter 'weights' has shape 2, expected 3"),
    ("ovr-platt", {"a": [1.0, 0.0], "b": [0.0, 0.0]}, r"ovr-platt parameter 'a' holds scales outside \[0.01, 100\]"),
    ("ovr-platt", {"a": [1.0, 1.0], "b": [0.0, 500.0]}, r"ovr-platt parameter 'b' holds biases outside"),
    ("ovr-platt", {"a": [1.0, 1.0, 1.0], "b": [0.0, 0.0, 0.0]}, r"ovr-platt parameter 'a' has shape 3, expected 2"),
]


@pytest.mark.parametrize("method", list(MODULES))
def test_good_parameters_pass_and_come_back_as_plain_numbers(method):
    checked = module(method).check_parameters(GOOD[method], CLASSES.get(method, 2))
    assert checked == GOOD[method]


@pytest.mark.parametrize(("method", "params", "message"), BAD, ids=[f"{m}-{i}" for i, (m, _, _) in enumerate(BAD)])
def test_bad_parameters_are_refused_naming_the_field(method, params, message):
    with pytest.raises(OnnxcalError, match=message):
        module(method).check_parameters(params, CLASSES.get(method, 2))


def test_wrong_kind_and_unknown_method_are_refused():
    with pytest.raises(OnnxcalError, match="beta calibration does not apply to a multiclass classifier"):
        module("beta").check_parameters(GOOD["beta"], 1, kind="multiclass")
    with pytest.raises(OnnxcalError, match="matrix calibration does not apply to a binary classifier"):
        module("matrix").check_parameters(GOOD["matrix"], 2, kind="binary")
    with pytest.raises(OnnxcalError, match="beta calibration needs one logit per row, the scores have 3"):
        module("beta").check_parameters(GOOD["beta"], 3)
    with pytest.raises(OnnxcalError, match="unknown calibration method 'cubic'; use one of: matrix, dirichlet"):
        module("cubic")


@pytest.mark.parametrize("method", list(MODULES))
def test_builders_check_their_parameters(method):
    # A builder given bad parameters refuses them before writing any node.
    bad = next(p for m, p, _ in BAD if m == method)
    with pytest.raises(OnnxcalError):
        module(method).build("z", "float32", CLASSES.get(method, 2), bad)
