"""The ONNX subgraphs of onnxcal.maps against their NumPy references.

Each builder's subgraph, alone in a model, is run by onnxruntime and by
onnx's ReferenceEvaluator (onnx.reference, a Python implementation of the
ONNX operator specification that shares no code with onnxruntime) and
compared with the float64 NumPy reference ``apply`` of the same map, at
opsets 13 and 21, in float32 (1e-5) and float16 (the output's own
rounding, 2e-3). The references are written from the published
definitions (each module's docstring names its paper); they share no code
with the graphs.
"""

from __future__ import annotations

import zlib

import numpy as np
import onnx
import onnxruntime as ort
import pytest
from onnx.reference import ReferenceEvaluator

from onnxcal.maps import MODULES, beta, dirichlet, ensemble, histogram, isotonic, matrix, ovr_platt, standalone_model

# onnx's ReferenceEvaluator computes Sigmoid as 1 / (1 + exp(-x)) and warns
# when exp overflows for |x| ~ 1e4 (its result is still right: 0 or 1).
pytestmark = pytest.mark.filterwarnings(
    "ignore:overflow encountered in exp:RuntimeWarning", "ignore:invalid value encountered in divide:RuntimeWarning"
)

K = 4


def _logits(rng: np.random.Generator, n: int, k: int) -> np.ndarray:
    z = rng.normal(scale=2.0, size=(n, k))
    z[:5] *= 20.0  # a few confident rows
    return z


def _labels(rng: np.random.Generator, z: np.ndarray) -> np.ndarray:
    if z.shape[1] == 1:
        return (rng.random(len(z)) < 1.0 / (1.0 + np.exp(-z[:, 0] / 1.5))).astype(np.int64)
    return np.argmax(z / 1.5 + rng.gumbel(size=z.shape), axis=1)


def _params(method: str, z: np.ndarray, y: np.ndarray, rng: np.random.Generator) -> dict:
    """Fitted parameters, perturbed where a fit alone would stay near the identity."""
    k = z.shape[1]
    if method in ("matrix", "dirichlet"):
        return {"W": (np.eye(k) * 1.2 + rng.normal(scale=0.3, size=(k, k))).tolist(), "b": rng.normal(size=k).tolist()}
    if method == "beta":
        return {"a": 2.0, "b": 0.4, "c": 0.3}
    if method == "ensemble-temperature":
        return {"temperature": 1.7, "weights": [0.6, 0.3, 0.1]}
    if method == "ovr-platt":
        return {"a": rng.uniform(0.3, 2.0, size=k).tolist(), "b": rng.normal(size=k).tolist()}
    return MODULES[method].fit(z, y).parameters


# Every method at every width it takes: K logits (multiclass), one (binary).
CASES = [
    (name, k) for name, m in MODULES.items()
    for k in ((K,) if "multiclass" in m.KINDS else ()) + ((1,) if "binary" in m.KINDS else ())
]


def _run_both(model: onnx.ModelProto, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    session = ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"])
    name = model.graph.input[0].name
    return session.run(None, {name: x})[0], ReferenceEvaluator(model).run(None, {name: x})[0]


@pytest.mark.parametrize("opset", [13, 21])
@pytest.mark.parametrize(("method", "k"), CASES)
def test_graph_matches_reference_float32(method, k, opset):
    # References: onnxruntime and onnx.reference.ReferenceEvaluator (the ONNX
    # operator specification in Python) against the module's NumPy apply,
    # itself written from the method's paper (see the module docstring).
    rng = np.random.default_rng(zlib.crc32(f"{method}{k}".encode()))
    z = _logits(rng, 400, k)
    y = _labels(rng, z)
    params = _params(method, z, y, rng)
    mod = MODULES[method]
    x = z.astype(np.float32)
    if method == "beta":  # far out in both tails: the softplus must not overflow
        x[:4, 0] = [1e4, -1e4, 95.0, -95.0]
    model = standalone_model(mod.build("logits", "float32", k, params), "float32", k, opset)
    expected = mod.apply(params, x.astype(np.float64))
    for got in _run_both(model, x):
        assert got.dtype == np.float32 and got.shape == x.shape
        assert np.all(np.isfinite(got))
        np.testing.assert_allclose(got, expected, atol=1e-5, rtol=0)
    if k > 1:
        np.testing.assert_allclose(expected.sum(axis=1), 1.0, atol=1e-12)


@pytest.mark.parametrize(("method", "k"), CASES)
def test_graph_matches_reference_float16(method, k):
    # float16 logits in and probabilities out; the map runs in float32 (or
    # float64 for the lookups) inside, so the error is the output's rounding:
    # float16 has 11 significant bits, 2^-11 ~ 4.9e-4 relative.
    rng = np.random.default_rng(7)
    z = _logits(rng, 300, k)
    y = _labels(rng, z)
    params = _params(method, z, y, rng)
    mod = MODULES[method]
    x = z.astype(np.float16)
    model = standalone_model(mod.build("logits", "float16", k, params), "float16", k, 17)
    expected = mod.apply(params, x.astype(np.float64))
    for got in _run_both(model, x):
        assert got.dtype == np.float16
        np.testing.assert_allclose(got.astype(np.float64), expected, atol=2e-3, rtol=0)


@pytest.mark.parametrize("mod", [matrix, dirichlet, beta])
def test_logits_output_feeds_a_softmax(mod):
    # output="logits" stops before the activation: Softmax / Sigmoid of it
    # (scipy.special, a reference library) equals the probabilities.
    import scipy.special

    rng = np.random.default_rng(3)
    k = 1 if mod is beta else K
    z = _logits(rng, 200, k)
    params = _params(mod.METHOD, z, _labels(rng, z), rng)
    model = standalone_model(mod.build("z", "float32", k, params, output="logits"), "float32", k, 13)
    got = _run_both(model, z.astype(np.float32))[0].astype(np.float64)
    act = scipy.special.expit(got) if k == 1 else scipy.special.softmax(got, axis=1)
    np.testing.assert_allclose(act, mod.apply(params, z.astype(np.float32)), atol=1e-5)


@pytest.mark.parametrize(("method", "k"), CASES)
def test_names_unique_deterministic_standard_domain(method, k):
    rng = np.random.default_rng(1)
    z = _logits(rng, 200, k)
    params = _params(method, z, _labels(rng, z), rng)
    mod = MODULES[method]
    first = mod.build("logits", "float32", k, params)
    again = mod.build("logits", "float32", k, params)
    assert [n.SerializeToString() for n in first.nodes] == [n.SerializeToString() for n in again.nodes]
    assert [t.SerializeToString() for t in first.initializers] == [t.SerializeToString() for t in again.initializers]
    # Names already used in a host graph are avoided.
    taken = set(first.names)
    other = mod.build("logits", "float32", k, params, taken=taken)
    produced = ([o for n in other.nodes for o in n.output] + [n.name for n in other.nodes]
                + [t.name for t in other.initializers])
    assert not taken & set(produced)
    assert len(produced) == len(set(produced))
    # Standard operators only (ONNX operator specification, default domain).
    assert all(n.domain in ("", "ai.onnx") for n in first.nodes)


def test_lookup_cost_is_k_times_knots_comparisons():
    # The docstring's cost: one comparison per class and knot (K x M per row).
    params = {"x": [[0.1, 0.5, 0.9], [0.2, 0.8], [0.5]], "y": [[0.0, 0.4, 1.0], [0.1, 0.9], [0.3]]}
    sub = isotonic.build("z", "float32", 3, params)
    table = next(t for t in sub.initializers if t.name.endswith("thresholds"))
    assert list(table.dims) == [3, 3]


def test_ensemble_and_ovr_platt_are_probabilities_only():
    with pytest.raises(TypeError):
        ensemble.build("z", "float32", 3, {"temperature": 1.0, "weights": [1, 0, 0]}, output="logits")  # type: ignore[call-arg]
    with pytest.raises(TypeError):
        ovr_platt.build("z", "float32", 3, {"a": [1.0] * 3, "b": [0.0] * 3}, output="logits")  # type: ignore[call-arg]
    assert histogram.build("z", "float32", 1, {"edges": [[]], "values": [[0.3]]}).output


@pytest.mark.parametrize(("method", "k"), CASES)
def test_graph_matches_reference_float64(method, k):
    # float64 in and out (onnxruntime's double kernels; the ONNX specification's
    # types for every operator used): the graph and the reference then agree to
    # rounding.
    rng = np.random.default_rng(11)
    z = _logits(rng, 200, k)
    params = _params(method, z, _labels(rng, z), rng)
    mod = MODULES[method]
    model = standalone_model(mod.build("logits", "float64", k, params), "float64", k, 13)
    for got in _run_both(model, z):
        assert got.dtype == np.float64
        np.testing.assert_allclose(got, mod.apply(params, z), atol=1e-9, rtol=0)
