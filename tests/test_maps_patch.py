"""The maps of onnxcal.maps baked into whole models by ``graph.patch``.

Each map is patched into a small MLP (raw logits, a Softmax or LogSoftmax
head, a one-logit Sigmoid head), the patched model is run by onnxruntime
and by onnx's ReferenceEvaluator (onnx.reference: onnx's own Python
implementation of the operator specification, sharing no code with
onnxruntime), and compared with the float64 NumPy reference
(``Scaling.probabilities``) of the logits the *original* model gives when
onnxruntime runs it (not logits onnxcal read from the graph). The patch is
drop-in (outputs' names and types unchanged), undone by ``unpatch`` (the
original bytes back) and replaced by a re-patch.
"""

from __future__ import annotations

import numpy as np
import onnx
import onnxruntime as ort
import pytest
from conftest import random_mlp
from onnx.reference import ReferenceEvaluator

from onnxcal import graph
from onnxcal.errors import OnnxcalError
from onnxcal.maps import MODULES
from onnxcal.scaling import METHODS_FOR, Scaling, check_scaling

SHA = "0" * 64
K = 4
# The ReferenceEvaluator's Sigmoid is 1 / (1 + exp(-x)): it warns when exp overflows (result still 0 or 1);
# its LogSoftmax is log(softmax) and warns on underflow.
pytestmark = pytest.mark.filterwarnings(
    "ignore:overflow encountered in exp:RuntimeWarning", "ignore:divide by zero:RuntimeWarning"
)


def run_ort(model: onnx.ModelProto, x: np.ndarray, names: list[str] | None = None) -> list[np.ndarray]:
    sess = ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"])
    return sess.run(names, {"x": x})


def run_reference(model: onnx.ModelProto, x: np.ndarray, names: list[str] | None = None) -> list[np.ndarray]:
    return ReferenceEvaluator(model).run(names, {"x": x})


def do_patch(model: onnx.ModelProto, scaling: Scaling, **kw: object) -> onnx.ModelProto:
    return graph.patch(model, scaling, source_sha256=SHA, source_name="model.onnx", **kw)


def _labels(rng: np.random.Generator, z: np.ndarray) -> np.ndarray:
    if z.shape[1] == 1:
        return (rng.random(len(z)) < 1.0 / (1.0 + np.exp(-z[:, 0] / 1.5))).astype(np.int64)
    return np.argmax(z / 1.5 + rng.gumbel(size=z.shape), axis=1)


def fitted(method: str, kind: str, rng: np.random.Generator) -> Scaling:
    """A map fitted on logits drawn from a temperature-scaled softmax / sigmoid, perturbed where a fit
    would stay near the identity."""
    k = 1 if kind == "binary" else K
    z = rng.normal(scale=3.0, size=(400, k))
    params = MODULES[method].fit(z, _labels(rng, z)).parameters
    if method in ("matrix", "dirichlet"):
        params = {"W": (np.asarray(params["W"]) + rng.normal(scale=0.2, size=(k, k))).tolist(), "b": params["b"]}
    return check_scaling(Scaling(method, params, kind), k)


CASES = [(m, kind) for kind in ("multiclass", "binary") for m in METHODS_FOR[kind] if m in MODULES]


def _model_and_logits(rng: np.random.Generator, kind: str, final: str | None, x: np.ndarray):
    model = random_mlp(rng, k=1 if kind == "binary" else K, scale=3.0, final=final)
    z = run_ort(graph.expose(model, ["logits"]) if final else model, x, ["logits" if final else "scores"])[0]
    return model, z.astype(np.float64)


@pytest.mark.parametrize("runner", [run_ort, run_reference])
@pytest.mark.parametrize(("method", "kind"), CASES)
def test_patched_model_matches_reference(rng, runner, method, kind):
    x = rng.normal(size=(64, 6)).astype(np.float32)
    final = "Sigmoid" if kind == "binary" else "Softmax"
    model, z = _model_and_logits(rng, kind, final, x)
    scaling = fitted(method, kind, rng)
    patched = do_patch(model, scaling)
    # Drop-in: the same outputs, names and types.
    assert [o.SerializeToString() for o in patched.graph.output] == [o.SerializeToString() for o in model.graph.output]
    (got,) = runner(patched, x)
    ref = scaling.probabilities(z)
    np.testing.assert_allclose(got, ref, atol=1e-5)
    # Every added operator is from the default ONNX domain.
    assert all(n.domain in ("", "ai.onnx") for n in patched.graph.node)
    # unpatch gives the original bytes back; a re-patch replaces (no stacking).
    assert graph.unpatch(patched).SerializeToString() == model.SerializeToString()
    again = do_patch(patched, scaling)
    assert again.SerializeToString() == patched.SerializeToString()


@pytest.mark.parametrize(("method", "kind"), CASES)
def test_raw_logits_get_an_appended_activation(rng, method, kind):
    x = rng.normal(size=(32, 6)).astype(np.float32)
    model, z = _model_and_logits(rng, kind, None, x)
    scaling = fitted(method, kind, rng)
    patched = do_patch(model, scaling)
    (got,) = run_ort(patched, x, ["probabilities"])
    np.testing.assert_allclose(got, scaling.probabilities(z), atol=1e-5)


@pytest.mark.parametrize("method", [m for m in METHODS_FOR["multiclass"] if m in MODULES])
def test_log_softmax_head_gets_log_probabilities(rng, method):
    x = rng.normal(size=(32, 6)).astype(np.float32)
    model, z = _model_and_logits(rng, "multiclass", "LogSoftmax", x)
    scaling = fitted(method, "multiclass", rng)
    (got,) = run_ort(do_patch(model, scaling), x)
    # Where the reference is > 1e-6 (log p of an exact 0 is clamped, not -inf).
    ref = scaling.probabilities(z)
    keep = ref > 1e-6
    np.testing.assert_allclose(np.exp(got)[keep], ref[keep], atol=1e-5)


@pytest.mark.parametrize("compute", ["float64"])
@pytest.mark.parametrize("method", ["matrix", "isotonic", "ensemble-temperature"])
def test_compute_dtype(rng, method, compute):
    x = rng.normal(size=(32, 6)).astype(np.float32)
    model, z = _model_and_logits(rng, "multiclass", "Softmax", x)
    scaling = fitted(method, "multiclass", rng)
    patched = do_patch(model, scaling, compute_dtype=compute)
    (got,) = run_ort(patched, x)
    np.testing.assert_allclose(got, scaling.probabilities(z), atol=1e-5)


def test_fold_is_refused_for_a_map_that_is_not_linear(rng):
    # matrix scaling folds (tests/test_fold_matrix.py); a lookup table does not
    model = random_mlp(rng, k=K)
    with pytest.raises(OnnxcalError, match="--fold: isotonic regression is a lookup table on the probability"):
        do_patch(model, fitted("isotonic", "multiclass", rng), fold=True)


def test_map_for_the_wrong_kind_is_refused(rng):
    model = random_mlp(rng, k=K, final="Softmax")
    with pytest.raises(OnnxcalError, match="beta scaling does not apply to a multiclass"):
        do_patch(model, Scaling("beta", {"a": 1.0, "b": 1.0, "c": 0.0}, "multiclass"))


def test_bad_parameters_are_refused_naming_the_field(rng):
    model = random_mlp(rng, k=K, final="Softmax")
    bad = Scaling("ensemble-temperature", {"temperature": -1.0, "weights": [1.0, 0.0, 0.0]}, "multiclass")
    with pytest.raises(OnnxcalError, match="temperature"):
        do_patch(model, bad)
    bad = Scaling("matrix", {"W": np.eye(3).tolist(), "b": [0.0] * 3}, "multiclass")
    with pytest.raises(OnnxcalError, match="'W'"):
        do_patch(model, bad)


def test_record_keeps_method_and_parameters(rng):
    model = random_mlp(rng, k=K, final="Softmax")
    scaling = fitted("histogram", "multiclass", rng)
    record = graph.read_record(do_patch(model, scaling))
    assert record.method == "histogram"
    assert record.parameters == scaling.parameters
    assert record.scaling == scaling


@pytest.mark.parametrize(("method", "kind"), CASES)
def test_record_check_reads_the_map_back(rng, method, kind):
    from onnxcal.verify import record_check

    model = random_mlp(rng, k=1 if kind == "binary" else K, scale=3.0,
                       final="Sigmoid" if kind == "binary" else "Softmax")
    scaling = fitted(method, kind, rng)
    patched = do_patch(model, scaling)
    record = graph.read_record(patched)
    expected = graph.recorded_values(patched, record)
    found = graph.parameter_values(patched, record)
    assert expected and record_check(expected, found, graph.temperature_dtype(patched, record)).passed
    # A changed parameter in the graph is caught.
    name = sorted(record.initializers.values())[0]
    init = next(i for i in patched.graph.initializer if i.name == name)
    arr = onnx.numpy_helper.to_array(init).copy()
    init.CopyFrom(onnx.numpy_helper.from_array((arr + 0.5).astype(arr.dtype), name))
    assert not record_check(expected, graph.parameter_values(patched, record), "float32").passed


@pytest.mark.parametrize(("method", "kind"), CASES)
def test_identity_gives_the_original_or_is_said_unavailable(rng, method, kind):
    x = rng.normal(size=(32, 6)).astype(np.float32)
    final = "Sigmoid" if kind == "binary" else "Softmax"
    model = random_mlp(rng, k=1 if kind == "binary" else K, scale=3.0, final=final)
    patched = do_patch(model, fitted(method, kind, rng))
    records = graph.read_records(patched)
    why = graph.identity_unavailable(records)
    if method in ("isotonic", "histogram") or (method == "ovr-platt" and kind == "multiclass"):
        assert why is not None and method in why
        return
    assert why is None
    at_one = graph.at_identity(patched, records)
    assert at_one is not None
    np.testing.assert_allclose(run_ort(at_one, x)[0], run_ort(model, x)[0], atol=1e-6)
