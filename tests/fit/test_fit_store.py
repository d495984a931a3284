"""onnxcal.fit.store: FIT.json written and read back, bad files refused."""

import json

import pytest
from fit_cases import NO_EVAL, gumbel_labels

from onnxcal.errors import OnnxcalError
from onnxcal.fit import FitOptions, load_fit, save_fit, summarize

# --------------------------------------------------------------------------
# FIT.json


def test_fit_json_round_trip(tmp_path, rng):
    z = rng.normal(scale=3.0, size=(800, 4))
    y = gumbel_labels(rng, z, 2.0)
    for options in (FitOptions(bootstrap=10), FitOptions(method="vector", holdout=0, bootstrap=0)):
        summary = summarize(z, y, {"model_sha256": "ab"}, options)
        path = tmp_path / "fit.json"
        save_fit(path, summary)
        again = load_fit(path)
        assert again == summary
        data = json.loads(path.read_text())
        assert data["method"] == options.method and data["metrics"]["basis"] == summary.basis
        assert data["parameters"] == summary.scaling.parameters


@pytest.mark.parametrize("bad", [-2.0, 0.0, "warm", None, True])
def test_load_fit_refuses_bad_temperature(tmp_path, rng, bad):
    z = rng.normal(size=(100, 3))
    summary = summarize(z, rng.integers(0, 3, 100), {}, NO_EVAL)
    data = summary.to_dict()
    data["temperature"] = bad
    data["parameters"]["temperature"] = bad
    path = tmp_path / "fit.json"
    path.write_text(json.dumps(data))
    with pytest.raises(OnnxcalError, match="temperature"):
        load_fit(path)


def test_load_fit_refuses_bad_vector(tmp_path, rng):
    z = rng.normal(size=(100, 3))
    data = summarize(z, rng.integers(0, 3, 100), {}, FitOptions(method="vector", holdout=0, bootstrap=0)).to_dict()
    data["parameters"]["w"] = [1.0, float("nan"), 1.0]
    path = tmp_path / "fit.json"
    path.write_text(json.dumps(data))
    with pytest.raises(OnnxcalError, match="invalid calibration parameters"):
        load_fit(path)


def test_load_fit_refuses_non_json(tmp_path):
    path = tmp_path / "fit.json"
    path.write_text("T = 2")
    with pytest.raises(OnnxcalError, match="not an onnxcal fit file"):
        load_fit(path)
