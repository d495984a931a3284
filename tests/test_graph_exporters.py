"""Graph surgery on models made by real exporters (fixtures/exporters/).

Every fixture is patched and run with onnxruntime and with onnx's
``onnx.reference.ReferenceEvaluator`` (onnx's own Python implementation of
the ONNX operator specification, independent of onnxruntime's kernels);
the output must equal the scipy reference computed from the original
model's scores. The fixtures come from torch.onnx.export and skl2onnx (see
the scripts beside them); the scikit-learn ones are trained on
scikit-learn's bundled digits and wine data.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import onnx
import onnxruntime as ort
import pytest
import scipy.special
from conftest import FIXTURES
from onnx.reference import ReferenceEvaluator

from onnxcal import api, graph
from onnxcal.capture import as_rows
from onnxcal.errors import OnnxcalError
from onnxcal.scaling import Scaling
from onnxcal.verify import folded_record_check, tolerance

EXPORTERS = FIXTURES / "exporters"
SHA = "0" * 64
T = 2.5


@dataclass(frozen=True)
class Fixture:
    name: str
    val: str
    output: str
    activation: str | None
    classes: int
    class_axis: int = 1
    foldable: bool = False
    ml: bool = False
    rank: int = 2

    @property
    def path(self) -> Path:
        return EXPORTERS / f"{self.name}.onnx"

    @property
    def drop_in(self) -> bool:
        return self.activation is not None


FIXTURE_LIST = [
    Fixture("belt_spectrogram_logits_op17", "belt_spectrogram", "logits", None, 4, foldable=True),
    Fixture("belt_spectrogram_softmax_op13", "belt_spectrogram", "probabilities", "softmax", 4, foldable=True),
    Fixture("belt_spectrogram_softmax_op11", "belt_spectrogram", "probabilities", "softmax", 4, foldable=True),
    Fixture("belt_spectrogram_softmax_fp16_op13", "belt_spectrogram", "probabilities", "softmax", 4, foldable=True),
    Fixture("belt_spectrogram_external", "belt_spectrogram", "logits", None, 4, foldable=True),
    Fixture("belt_surface_logits_op17", "belt_surface", "logits", None, 3, rank=4),
    Fixture("belt_surface_logits_op11", "belt_surface", "logits", None, 3, rank=4),
    Fixture("belt_surface_softmax_op11", "belt_surface", "probabilities", "softmax", 3, rank=4),
    Fixture("belt_tear_sigmoid_op17", "belt_tear_sigmoid_op17", "tear_probability", "sigmoid", 1, foldable=True),
    Fixture("belt_faults_multilabel_op17", "belt_faults_multilabel_op17", "fault_probabilities", "sigmoid", 4,
            foldable=True),
    Fixture("digits_logreg_tensor", "digits", "probabilities", "softmax", 10, ml=True),
    Fixture("digits_logreg_zipmap", "digits", "output_probability", "softmax", 10, ml=True),
    Fixture("wine_boosted_tensor", "wine", "probabilities", "softmax", 3, ml=True),
    Fixture("wine_boosted_zipmap", "wine", "output_probability", "softmax", 3, ml=True),
]
BY_NAME = {f.name: f for f in FIXTURE_LIST}
IDS = [f.name for f in FIXTURE_LIST]


def val_path(fx: Fixture) -> Path:
    return EXPORTERS / f"{fx.val}_val.npz"


def inputs(model: onnx.ModelProto, fx: Fixture, n: int) -> dict[str, np.ndarray]:
    """The first n validation samples, cast to the model input's dtype."""
    (vi,) = [vi for vi in model.graph.input if vi.name not in {i.name for i in model.graph.initializer}]
    dtype = graph.np_dtype(graph.tensor_spec(vi).dtype)
    with np.load(val_path(fx)) as npz:
        return {vi.name: npz[vi.name][:n].astype(dtype)}


def run_ort(model: onnx.ModelProto, feed: dict, names: list[str]) -> list:
    sess = ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"])
    return sess.run(names, feed)


def without_zipmap(model: onnx.ModelProto) -> onnx.ModelProto:
    """onnx's reference evaluator has no ZipMap: drop it (the tensor before it is what we check)."""
    out = onnx.ModelProto()
    out.CopyFrom(model)
    zipmaps = [n for n in out.graph.node if n.op_type == "ZipMap"]
    for node in zipmaps:
        out.graph.node.remove(node)
    dropped = {o for n in zipmaps for o in n.output}
    keep = [vi for vi in out.graph.output if vi.name not in dropped]
    del out.graph.output[:]
    out.graph.output.extend(keep)
    return out


def run_reference(model: onnx.ModelProto, feed: dict, names: list[str]) -> list:
    return ReferenceEvaluator(without_zipmap(model)).run(names, feed)


# ReferenceEvaluator runs convolutions in Python: few samples keep it fast.
RUNNERS = {"onnxruntime": (run_ort, 64), "reference": (run_reference, 4)}


def scores_of(model: onnx.ModelProto, site: graph.ScoreSite, feed: dict, runner) -> np.ndarray:
    """The original model's class scores as rows (class axis last), float64."""
    exposed, name = graph.expose_scores(model, site)
    (z,) = runner(graph.expose(exposed, [name]), feed, [name])
    # expose_scores builds the logits as the patch does (log p, a classifier's raw scores, ...)
    return as_rows(np.asarray(z), site.class_axis).astype(np.float64)


def reference(z: np.ndarray, t: float, activation: str) -> np.ndarray:
    # Reference library: scipy.special.softmax / log_softmax / expit.
    if activation == "sigmoid":
        return scipy.special.expit(z / t)
    if activation == "logsoftmax":
        return scipy.special.log_softmax(z / t, axis=1)
    return scipy.special.softmax(z / t, axis=1)


def do_patch(model, t=T, **kw):
    return graph.patch(model, t, source_sha256=SHA, source_name="model.onnx", **kw)


def calibrated_rows(patched: onnx.ModelProto, feed: dict, runner) -> np.ndarray:
    record = graph.read_record(patched)
    site = graph.find_scores(patched, record.output)
    (p,) = runner(graph.expose(patched, [site.tensor]), feed, [site.tensor])
    return as_rows(np.asarray(p), site.class_axis).astype(np.float64)


@pytest.fixture(scope="module")
def models() -> dict[str, onnx.ModelProto]:
    return {f.name: graph.load_model(f.path) for f in FIXTURE_LIST}


# --------------------------------------------------------------------------


@pytest.mark.parametrize("fx", FIXTURE_LIST, ids=IDS)
def test_inspect_reports_the_class_scores(fx):
    info = api.inspect(fx.path)
    site = info.site
    assert site.output == fx.output and site.activation == fx.activation
    assert site.num_classes == fx.classes and site.class_axis == fx.class_axis
    assert site.from_probabilities == fx.ml and site.rank == fx.rank
    assert info.opset == graph.opset_version(onnx.load(str(fx.path), load_external_data=False))
    assert not info.batch_fixed  # every exporter was given a dynamic batch dim
    assert bool(info.external_data) == (fx.name == "belt_spectrogram_external")


@pytest.mark.parametrize("runner_name", list(RUNNERS))
@pytest.mark.parametrize("fx", FIXTURE_LIST, ids=IDS)
def test_patched_output_matches_reference(models, fx, runner_name):
    runner, n = RUNNERS[runner_name]
    model = models[fx.name]
    site = graph.find_scores(model)
    feed = inputs(model, fx, n)
    z = scores_of(model, site, feed, runner)
    patched = do_patch(model)
    record = graph.read_record(patched)
    got = calibrated_rows(patched, feed, runner)
    want = reference(z, T, record.activation)
    tol = tolerance((site.dtype, site.output_dtype))
    np.testing.assert_allclose(got, want, atol=tol, rtol=0)
    if record.activation == "sigmoid":  # T only scales: every 0.5 decision is kept
        np.testing.assert_array_equal(got > 0.5, z > 0)
    else:
        np.testing.assert_array_equal(got.argmax(1), z.argmax(1))
    if fx.drop_in:  # same output names, types and shapes
        assert [o.SerializeToString() for o in patched.graph.output] == [
            o.SerializeToString() for o in model.graph.output
        ]
    else:
        assert [o.name for o in patched.graph.output] == [o.name for o in model.graph.output] + [
            "probabilities"
        ]


@pytest.mark.parametrize("fx", FIXTURE_LIST, ids=IDS)
def test_patched_graph_passes_checker_and_strict_inference(models, fx):
    patched = do_patch(models[fx.name])
    onnx.checker.check_model(patched, full_check=True)
    try:  # onnx infers no types for ai.onnx.ml TreeEnsembleClassifier-1's outputs
        onnx.shape_inference.infer_shapes(models[fx.name], strict_mode=True)
    except onnx.shape_inference.InferenceError:
        assert fx.name == "wine_boosted_tensor"
    else:
        onnx.shape_inference.infer_shapes(patched, strict_mode=True)
    assert graph.opset_version(patched) == graph.opset_version(models[fx.name])  # never bumped
    assert [(i.domain, i.version) for i in patched.opset_import] == [
        (i.domain, i.version) for i in models[fx.name].opset_import
    ]


@pytest.mark.parametrize("fx", FIXTURE_LIST, ids=IDS)
def test_patch_is_byte_identical_and_repatching_replaces(models, fx):
    model = models[fx.name]
    once = do_patch(model, 1.7)
    assert once.SerializeToString() == do_patch(model, 1.7).SerializeToString()
    # Re-patching undoes the first patch: same bytes as patching the original.
    twice = do_patch(once, 1.7)
    assert twice.SerializeToString() == once.SerializeToString()
    assert len(do_patch(once, 3.0).graph.node) == len(once.graph.node)
    assert graph.unpatch(once).SerializeToString() == model.SerializeToString()


@pytest.mark.parametrize("fx", FIXTURE_LIST, ids=IDS)
def test_temperature_one_on_a_patched_model_gives_the_original(models, fx):
    model = models[fx.name]
    site = graph.find_scores(model)
    feed = inputs(model, fx, 64)
    original = calibrated_rows_of_original(model, site, feed)
    back = calibrated_rows(do_patch(do_patch(model, 2.0), 1.0), feed, run_ort)
    # x / 1 is exact in IEEE arithmetic; the ML path's log/softmax round trip is not.
    np.testing.assert_allclose(back, original, atol=1e-6 if fx.ml else 0, rtol=0)


def calibrated_rows_of_original(model, site, feed) -> np.ndarray:
    if site.activation is None:  # raw logits: softmax / sigmoid of them, at T = 1
        z = scores_of(model, site, feed, run_ort)
        p = run_ort(do_patch(model, 1.0), feed, ["probabilities"])[0]
        np.testing.assert_allclose(as_rows(p, site.class_axis), reference(z, 1.0, graph.fit_kind(site)), atol=1e-6)
        return as_rows(p, site.class_axis).astype(np.float64)
    (p,) = run_ort(graph.expose(model, [site.tensor]), feed, [site.tensor])
    return as_rows(p, site.class_axis).astype(np.float64)


@pytest.mark.parametrize("fx", [f for f in FIXTURE_LIST if f.foldable], ids=lambda f: f.name)
def test_fold_equals_unfolded(models, fx):
    model = models[fx.name]
    feed = inputs(model, fx, 64)
    unfolded = do_patch(model, drop_logits=True)
    folded = do_patch(model, fold=True, drop_logits=True)
    record = graph.read_record(folded)
    assert record.folded and record.temperature_initializer == ""
    extra = 1 if fx.activation is None else 0  # the appended Softmax
    assert len(folded.graph.node) == len(model.graph.node) + extra  # zero extra ops otherwise
    site = graph.find_scores(model)
    tol = tolerance((site.dtype, site.output_dtype))
    a, b = calibrated_rows(unfolded, feed, run_ort), calibrated_rows(folded, feed, run_ort)
    np.testing.assert_allclose(b, a, atol=tol, rtol=0)
    assert graph.temperature_value(folded, record, model) == pytest.approx(T, rel=1e-3)
    # Re-patching unfolds first: T = 1 gives back the original weights (one rounding).
    back = do_patch(folded, 1.0)
    for name in record.changes["scaled"]:
        w0 = onnx.numpy_helper.to_array(graph._initializer(model.graph, name))
        w1 = onnx.numpy_helper.to_array(graph._initializer(back.graph, name))
        np.testing.assert_allclose(w1, w0, rtol=float(np.finfo(w0.dtype).eps), atol=0)


@pytest.mark.parametrize(
    "name, match",
    [
        ("belt_surface_softmax_op11", "come from a Conv, not a Gemm"),
        ("digits_logreg_tensor", "ai.onnx.ml classifier"),
        ("belt_spectrogram_logits_op17", "would change the logits output 'logits' itself"),
    ],
)
def test_fold_refused_clearly(models, name, match):
    with pytest.raises(OnnxcalError, match=match):
        do_patch(models[name], fold=True)


def test_fold_refuses_shared_weights(models):
    model = onnx.ModelProto()
    model.CopyFrom(models["belt_spectrogram_softmax_op13"])
    gemm = next(n for n in model.graph.node if n.op_type == "Gemm")
    # A second reader of the head's weight: folding would change it as well.
    model.graph.node.append(onnx.helper.make_node("Identity", [gemm.input[1]], ["weight_copy"]))
    model.graph.output.append(onnx.helper.make_empty_tensor_value_info("weight_copy"))
    with pytest.raises(OnnxcalError, match="is shared with other nodes"):
        do_patch(model, fold=True)


def test_float16_compute_dtype_casts_and_keeps_output_type(models):
    fx = BY_NAME["belt_spectrogram_softmax_fp16_op13"]
    model = models[fx.name]
    patched = do_patch(model, compute_dtype="float32")
    record = graph.read_record(patched)
    assert record.compute_dtype == "float32"
    added = [n for n in patched.graph.node if n.name in set(record.changes["nodes"])]
    assert [n.op_type for n in added] == ["Cast", "Div", "Cast"]
    t = graph._initializer(patched.graph, record.temperature_initializer)
    assert t.data_type == onnx.TensorProto.FLOAT  # T in the compute dtype
    assert patched.graph.output[0].SerializeToString() == model.graph.output[0].SerializeToString()
    plain = do_patch(model)
    t16 = graph._initializer(plain.graph, graph.read_record(plain).temperature_initializer)
    assert t16.data_type == onnx.TensorProto.FLOAT16  # T in the scores' dtype
    feed = inputs(model, fx, 64)
    site = graph.find_scores(model)
    z = scores_of(model, site, feed, run_ort)
    (p,) = run_ort(patched, feed, ["probabilities"])
    assert p.dtype == np.float16
    np.testing.assert_allclose(p.astype(np.float64), reference(z, T, "softmax"), atol=tolerance("float16"))
    assert graph.unpatch(patched).SerializeToString() == model.SerializeToString()


def test_opset11_segmentation_uses_a_per_axis_softmax(models):
    model = models["belt_surface_logits_op11"]
    patched = do_patch(model)
    ops = [n.op_type for n in patched.graph.node[len(model.graph.node) :]]
    assert ops == ["Div", "Transpose", "Softmax", "Transpose"]
    softmax = next(n for n in patched.graph.node if n.op_type == "Softmax")
    assert graph._attr(softmax, "axis", None) == 3  # the last axis: per class at opset 11 too


def test_opset11_softmax_on_axis1_is_not_per_class():
    # ONNX operator spec, Softmax changelog: Softmax-11 coerces its input to
    # 2-D around `axis`, so on N x K x H x W with axis 1 it normalises over
    # K*H*W values at once. onnxruntime follows the spec here; onnx 1.23's
    # ReferenceEvaluator (measured) normalises per axis at every opset, so it
    # cannot show the difference.
    x = np.random.default_rng(0).normal(size=(2, 3, 4, 4)).astype(np.float32)
    node = onnx.helper.make_node("Softmax", ["x"], ["y"], axis=1)
    g = onnx.helper.make_graph(
        [node], "s", [onnx.helper.make_tensor_value_info("x", 1, [2, 3, 4, 4])],
        [onnx.helper.make_tensor_value_info("y", 1, [2, 3, 4, 4])],
    )
    m = onnx.helper.make_model(g, opset_imports=[onnx.helper.make_opsetid("", 11)])
    m.ir_version = 8
    (y,) = run_ort(m, {"x": x}, ["y"])
    np.testing.assert_allclose(y.sum(axis=(1, 2, 3)), 1.0, rtol=1e-5)  # jointly, not per pixel
    with pytest.raises(OnnxcalError, match="normalises over axes 1..3 jointly"):
        graph.find_scores(m)


def test_transpose_softmax_transpose_is_tracked(models):
    model = models["belt_surface_softmax_op11"]
    site = graph.find_scores(model)
    assert [model.graph.node[i].op_type for i in site.layout] == ["Transpose"]
    assert site.scores == "/Transpose_output_0" and site.class_axis == 1


def test_ml_label_output_is_the_classifiers_own(models):
    # The label is the classifier's own decision: the patch leaves the node that computes it as it was
    # (it used to recompute it from the new argmax, which changes an SVM's decisions where its label and
    # the argmax of its Platt probabilities disagree). Temperature scaling cannot change the argmax.
    for name in ("digits_logreg_zipmap", "wine_boosted_tensor"):
        model = models[name]
        fx = BY_NAME[name]
        feed = inputs(model, fx, 64)
        patched = do_patch(model, 0.5)  # T < 1 sharpens; the argmax still stays
        label_name = patched.graph.output[0].name
        classifier = next(n for n in model.graph.node if n.domain == "ai.onnx.ml" and n.op_type.endswith("Classifier"))
        assert any(n.SerializeToString() == classifier.SerializeToString()
                   or (n.op_type == classifier.op_type and n.output[0] == classifier.output[0])
                   for n in patched.graph.node)
        assert not any(n.op_type in ("ArgMax", "Gather") and label_name in n.output for n in patched.graph.node)
        site = graph.find_scores(patched, fx.output)
        labels, probs = run_ort(graph.expose(patched, [site.tensor]), feed, [label_name, site.tensor])
        (before,) = run_ort(model, feed, [label_name])
        np.testing.assert_array_equal(labels, before)
        np.testing.assert_array_equal(labels, probs.argmax(1))  # classes are 0..K-1 here


def test_zipmap_output_keeps_its_type_and_matches_the_tensor(models):
    model = models["wine_boosted_zipmap"]
    feed = inputs(model, BY_NAME["wine_boosted_zipmap"], 16)
    patched = do_patch(model)
    assert patched.graph.output[1].SerializeToString() == model.graph.output[1].SerializeToString()
    site = graph.find_scores(patched, "output_probability")
    maps, probs = run_ort(graph.expose(patched, [site.tensor]), feed, ["output_probability", site.tensor])
    table = np.array([[m[k] for k in sorted(m)] for m in maps])
    np.testing.assert_allclose(table, probs, rtol=1e-6)


# -- external data ---------------------------------------------------------


def test_external_data_round_trip(tmp_path, models):
    fx = BY_NAME["belt_spectrogram_external"]
    out = tmp_path / "patched.onnx"
    api.patch(fx.path, out, temperature=T)
    data = tmp_path / "patched.onnx.data"
    assert data.is_file() and data.stat().st_size > 1024
    assert graph.external_data_files(out) == (data.resolve(),)
    feed = inputs(models[fx.name], fx, 32)
    sess = ort.InferenceSession(str(out), providers=["CPUExecutionProvider"])  # reads the side file
    (p,) = sess.run(["probabilities"], feed)
    z = scores_of(models[fx.name], graph.find_scores(models[fx.name]), feed, run_ort)
    np.testing.assert_allclose(p, reference(z, T, "softmax"), atol=1e-5)
    first = out.read_bytes(), data.read_bytes()
    api.patch(fx.path, out, temperature=T, force=True)
    assert (out.read_bytes(), data.read_bytes()) == first  # deterministic


def _with_location(tmp_path: Path, location: str) -> Path:
    model = onnx.load(str(BY_NAME["belt_spectrogram_external"].path), load_external_data=False)
    for t in model.graph.initializer:
        for e in t.external_data:
            if e.key == "location":
                e.value = location
    path = tmp_path / "model" / "m.onnx"
    path.parent.mkdir(exist_ok=True)
    path.write_bytes(model.SerializeToString())
    return path


@pytest.mark.parametrize("kind", ["absolute", "dotdot", "symlink"])
def test_external_data_outside_the_model_directory_is_refused(tmp_path, kind):
    secret = tmp_path / "elsewhere.data"
    secret.write_bytes((EXPORTERS / "belt_spectrogram_external.onnx.data").read_bytes())
    if kind == "absolute":
        path = _with_location(tmp_path, str(secret))
    elif kind == "dotdot":
        path = _with_location(tmp_path, "../elsewhere.data")
    else:
        path = _with_location(tmp_path, "weights.data")
        os.symlink(secret, path.parent / "weights.data")
    for call in (graph.load_model, api.inspect):
        with pytest.raises(OnnxcalError, match="outside the model's directory"):
            call(path)
    with pytest.raises(OnnxcalError, match="outside the model's directory"):
        api.patch(path, tmp_path / "out.onnx", temperature=2.0)
    assert not (tmp_path / "out.onnx").exists()


def test_external_data_renamed_inside_the_directory_is_fine(tmp_path):
    path = _with_location(tmp_path, "weights.data")
    (path.parent / "weights.data").write_bytes((EXPORTERS / "belt_spectrogram_external.onnx.data").read_bytes())
    assert graph.load_model(path).graph.initializer
    # onnx itself refuses to read external data through any symlink; so do we, clearly.
    (path.parent / "weights.data").rename(path.parent / "real.data")
    os.symlink(path.parent / "real.data", path.parent / "weights.data")
    with pytest.raises(OnnxcalError, match="is a symbolic link"):
        graph.load_model(path)


# -- calibrate + verify end to end -----------------------------------------


@pytest.mark.parametrize("fx", FIXTURE_LIST, ids=IDS)
def test_calibrate_and_verify_pass(tmp_path, fx):
    out = tmp_path / "calibrated.onnx"
    result = api.calibrate(fx.path, val_path(fx), out)
    assert result.verification.passed and result.patch is not None
    s = result.summary
    assert s.after.nll < s.before.nll  # the fitted T improves the likelihood
    assert s.temperature > 1.0  # briefly trained on few samples: overconfident
    assert s.after.accuracy == s.before.accuracy
    again = api.verify(out, val_path(fx))
    assert again.passed
    assert {c.name for c in again.checks} >= {"reference", "record", "source"}


# -- folding per-class scalings (vector, Platt, per-label temperatures) ------

FOLD_SCALINGS = {
    "belt_spectrogram_softmax_op13": Scaling.of_affine(
        [0.6, 1.3, 0.9, 1.1], [0.2, -0.4, 0.1, 0.1], "vector", "multiclass"
    ),
    "belt_spectrogram_logits_op17": Scaling.of_affine(
        [1.4, 0.7, 1.0, 0.8], [-0.3, 0.0, 0.5, -0.2], "vector", "multiclass"
    ),
    "belt_spectrogram_softmax_fp16_op13": Scaling.of_affine(
        [0.6, 1.3, 0.9, 1.1], [0.2, -0.4, 0.1, 0.1], "vector", "multiclass"
    ),
    "belt_tear_sigmoid_op17": Scaling.of_affine(0.6, -0.3, "platt", "binary"),
    "belt_faults_multilabel_op17": Scaling.of_temperature([0.5, 1.0, 2.0, 3.0], "multilabel"),
}


def affine_reference(z: np.ndarray, scaling: Scaling, activation: str) -> np.ndarray:
    # Reference library: scipy.special.softmax / expit of w * z + b (vector
    # scaling, Guo et al. 2017, sec. 4.2; Platt 1999; z / T_k per label).
    w, b = scaling.affine()
    u = z * w + b
    return scipy.special.expit(u) if activation == "sigmoid" else scipy.special.softmax(u, axis=1)


@pytest.mark.parametrize("runner_name", list(RUNNERS))
@pytest.mark.parametrize("name", list(FOLD_SCALINGS))
def test_per_class_fold_equals_unfolded(models, name, runner_name):
    fx, model, scaling = BY_NAME[name], models[name], FOLD_SCALINGS[name]
    runner, n = RUNNERS[runner_name]
    feed = inputs(model, fx, n)
    folded = do_patch(model, scaling, fold=True, drop_logits=True)
    record = graph.read_record(folded)
    assert record.folded and record.method == scaling.method
    extra = 1 if fx.activation is None else 0  # the appended Softmax
    assert len(folded.graph.node) == len(model.graph.node) + extra  # zero extra ops otherwise
    site = graph.find_scores(model)
    tol = tolerance((site.dtype, site.output_dtype))
    got = calibrated_rows(folded, feed, runner)
    unfolded = calibrated_rows(do_patch(model, scaling, drop_logits=True), feed, runner)
    np.testing.assert_allclose(got, unfolded, atol=tol, rtol=0)
    z = scores_of(model, site, feed, runner)
    np.testing.assert_allclose(got, affine_reference(z, scaling, record.activation), atol=tol, rtol=0)
    # The record check verify runs; unpatch gives the weight back within one
    # rounding, the bias exactly.
    assert folded_record_check(scaling, graph.folded_values(folded, record, model)).passed
    back = graph.unpatch(folded)
    fold = record.changes["fold"]
    w0, w1 = (onnx.numpy_helper.to_array(graph._initializer(m.graph, fold["weight"])) for m in (model, back))
    np.testing.assert_allclose(w1, w0, rtol=float(np.finfo(w0.dtype).eps), atol=0)
    b0, b1 = (graph._initializer(m.graph, fold["bias"]) for m in (model, back))
    assert onnx.numpy_helper.to_array(b1).tobytes() == onnx.numpy_helper.to_array(b0).tobytes()


CLI_FOLDS = [
    (FIXTURES / "conveyor_faults.onnx", FIXTURES / "conveyor_faults_val.npz", ["--method", "vector", "--drop-logits"]),
    (EXPORTERS / "belt_tear_sigmoid_op17.onnx", EXPORTERS / "belt_tear_sigmoid_op17_val.npz", ["--method", "platt"]),
    (
        EXPORTERS / "belt_faults_multilabel_op17.onnx",
        EXPORTERS / "belt_faults_multilabel_op17_val.npz",
        ["--multilabel", "per-label"],
    ),
]


def _tamper(path: Path, name: str, change) -> None:
    model = onnx.load(str(path))
    init = graph._initializer(model.graph, name)
    arr = onnx.numpy_helper.to_array(init).copy()
    change(arr)
    init.CopyFrom(onnx.numpy_helper.from_array(arr, name))
    onnx.save(model, str(path))


def _scale_largest_entry(a: np.ndarray) -> None:
    a.flat[np.argmax(np.abs(a))] *= 1.001


def _shift(a: np.ndarray) -> None:
    a += 1e-3


def _record_check(run_cli, path: Path, val: Path, original: Path) -> tuple[int, dict]:
    # The record names the original by file name; verify looks for it beside the patched model,
    # so a patched model written elsewhere is verified with --original.
    r = run_cli("verify", path, "--data", val, "--original", original, "--json")
    return r.code, next(c for c in json.loads(r.out)["checks"] if c["name"] == "record")


@pytest.mark.parametrize("model, val, options", CLI_FOLDS, ids=["demo-vector", "platt", "per-label"])
def test_calibrate_fold_then_verify_through_the_cli(tmp_path, run_cli, model, val, options):
    out = tmp_path / "folded.onnx"
    r = run_cli("calibrate", model, "--data", val, "--out", out, "--fold", "--bootstrap", "0", "--json", *options)
    assert r.code == 0, r.err
    patched, original = onnx.load(str(out)), onnx.load(str(model))
    record = graph.read_record(patched)
    assert record.folded and record.method == ("temperature" if "--multilabel" in options else options[1])
    appended = 1 if "--drop-logits" in options else 0  # the Softmax after raw logits
    assert len(patched.graph.node) == len(original.graph.node) + appended
    code, check = _record_check(run_cli, out, val, model)
    assert code == 0 and check["passed"] and check["value"] <= check["limit"]
    # A folded weight changed by 0.1 % (its largest entry), or a bias by 1e-3: verify fails.
    fold = record.changes["fold"]
    _tamper(out, fold["weight"], _scale_largest_entry)
    code, check = _record_check(run_cli, out, val, model)
    assert code == 1 and not check["passed"]
    graph.save_model(patched, out)
    _tamper(out, fold["bias"], _shift)
    code, check = _record_check(run_cli, out, val, model)
    assert code == 1 and not check["passed"]
