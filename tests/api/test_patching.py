"""patch: no NaN model is ever written (issue 11)."""


import numpy as np
import onnxruntime as ort
import pytest
from conftest import (
    DEMO_MODEL,
    DEMO_VAL,
)

from onnxcal import api
from onnxcal.errors import OnnxcalError


def test_a_temperature_the_graph_cannot_compute_with_is_refused_and_float64_is_the_way_out(tmp_path):
    # IEEE 754 binary32: the smallest normal number is 2^-126 = 1.18e-38 (numpy.finfo agrees)
    assert np.finfo(np.float32).tiny == 2.0**-126
    with pytest.raises(OnnxcalError, match=r"temperature 1e-45 is below 1.18e-38, the smallest normal float32"):
        api.patch(DEMO_MODEL, tmp_path / "p.onnx", temperature=1e-45)
    assert list(tmp_path.iterdir()) == []
    api.patch(DEMO_MODEL, tmp_path / "p.onnx", temperature=1e-45, compute_dtype="float64")
    sess = ort.InferenceSession(str(tmp_path / "p.onnx"), providers=["CPUExecutionProvider"])
    x = np.load(DEMO_VAL)["band_energies"][:200]
    outputs = zip(sess.run(None, {"band_energies": x}), sess.get_outputs(), strict=True)
    (probs,) = [o for o, meta in outputs if meta.name == "probabilities"]
    assert np.isfinite(probs).all()  # onnxruntime's own outputs: finite (one-hot, at such a T)


def test_logits_seen_bound_the_temperature_in_the_graphs_dtype():
    from onnxcal._numeric import check_in_dtype
    from onnxcal.scaling import Scaling

    # float16 holds at most 65504 (IEEE 754 binary16): logits up to 100 need T >= 100 / 65504
    with pytest.raises(OnnxcalError, match=r"largest \|logit\| seen is 100.*T must be at least 0.00153"):
        check_in_dtype(Scaling.of_temperature(0.001), "float16", largest_logit=100.0)
    check_in_dtype(Scaling.of_temperature(0.002), "float16", largest_logit=100.0)
    with pytest.raises(OnnxcalError, match="vector scaling .* makes the calibrated logits overflow float32"):
        check_in_dtype(Scaling.of_affine([1e30, 1.0], [0.0, 0.0], "vector", "multiclass"), "float32",
                       largest_logit=1e9)
