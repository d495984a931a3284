"""onnxcal on classifiers written by real exporters, judged by the framework's own logits.

Every fixture of ``fixtures/exporters/manifest.json`` (made by the scripts
beside it: torch's TorchScript and dynamo exporters, tf2onnx, skl2onnx,
onnxmltools, onnxruntime.quantization, onnxconverter-common's float16) comes
with the logits its framework computed (``<name>_reference.npz``: the torch
or Keras pre-softmax tensor, ``decision_function``, LightGBM's raw score,
XGBoost's margin, log ``predict_proba`` where a model has no logits, or
onnxruntime's pre-softmax tensor of a quantized or float16 model), and the
manifest says which output should be calibrated, what it holds and what
follows the activation. None of that comes from onnxcal, so these checks
cannot be passed by a misreading that is consistent with itself:

a. the finder picks the manifest's output, and ``onnxcal.capture`` returns
   the reference logits (up to a per-row constant for softmax heads);
b. the fitted T equals a scipy fit of the mean NLL on the reference logits;
c. ``onnxcal.calibrate`` writes a model whose calibrated output equals
   post(activation(reference / T)) computed here in float64;
d. drop-in rewrites keep the output names, shapes and dtypes;
e. whenever ``calibrate`` writes a model at all, (c) holds.

Cases the code gets wrong are marked ``xfail(strict=True)`` with the reason;
a fix turns them into an XPASS, which fails until the marker is removed.
Issue 10 fixed every misreading these fixtures reproduced.
"""

from __future__ import annotations

import functools
import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import onnx
import onnxruntime as ort
import pytest
import scipy.optimize
import scipy.special
from conftest import FIXTURES

import onnxcal
from onnxcal import graph
from onnxcal.errors import OnnxcalError
from onnxcal.fit import FitOptions

EXPORTERS = FIXTURES / "exporters"
OPTIONS = FitOptions(method="temperature", holdout=0.0, bootstrap=0)


@dataclass(frozen=True)
class Fixture:
    """One entry of manifest.json (see fixtures/exporters/README.md for the fields)."""

    name: str
    model: str
    val: str
    reference: str
    reference_kind: str
    output: str
    activation: str
    post: str | None
    num_classes: int
    class_axis: int | None
    dtype: str
    labels: str
    issue_item: str | None
    post_params: dict = field(default_factory=dict)
    label_output: str | None = None
    several_heads: bool = False
    calibrate_options: dict = field(default_factory=dict)
    compute_dtype: str | None = None

    @property
    def path(self) -> Path:
        return EXPORTERS / self.model

    @property
    def val_path(self) -> Path:
        return EXPORTERS / self.val

    @property
    def drop_in(self) -> bool:
        return self.activation != "identity"

    @property
    def sigmoid(self) -> bool:
        """Fitted by binary cross-entropy: a Sigmoid head, or raw logits with 0/1 labels."""
        return self.activation == "sigmoid" or (self.activation == "identity" and self.labels != "classes")

    @property
    def float16(self) -> bool:
        return "float16" in (self.dtype, self.compute_dtype)

    @property
    def batch_size(self) -> int | None:
        return self.calibrate_options.get("batch_size")

    @property
    def output_option(self) -> str | None:
        """The output named on the command line: only where several outputs qualify."""
        return self.output if self.several_heads else None


def _load_manifest() -> list[Fixture]:
    names = set(Fixture.__dataclass_fields__)
    rows = json.loads((EXPORTERS / "manifest.json").read_text())
    return [Fixture(**{k: v for k, v in row.items() if k in names}) for row in rows]


FIXTURE_LIST = _load_manifest()
BY_NAME = {f.name: f for f in FIXTURE_LIST}


# --------------------------------------------------------------------------
# What today's code gets wrong (issue 10), by fixture; then, for each test,
# the fixtures it fails on (a refused run fails (c) and (d) but passes (e)).
# Once the finder is fixed these XPASS, which fails: remove the name here.

# Issue 10 fixed every misreading these fixtures reproduced (the finder's spellings, the output
# choice, ai.onnx.ml raw scores and imports, the label output, float16 tolerances, several heads),
# and L1-normalised sigmoids are calibrated as the reference here means, L1(sigmoid(z / T)).
WHAT_GOES_WRONG: dict[str, str] = {}


def _table(names: set[str]) -> dict[str, str]:
    return {n: WHAT_GOES_WRONG[n] for n in sorted(names)}


XFAIL_FINDER = _table(set(WHAT_GOES_WRONG))
XFAIL_FIT = _table(set(WHAT_GOES_WRONG))
XFAIL_CALIBRATE = _table(set(WHAT_GOES_WRONG))
XFAIL_DROP_IN: dict[str, str] = {}
XFAIL_NEVER_WRONG = _table(set(WHAT_GOES_WRONG))


def cases(table: dict[str, str], fixtures: list[Fixture] | None = None) -> list:
    out = []
    for fx in FIXTURE_LIST if fixtures is None else fixtures:
        marks = [pytest.mark.xfail(strict=True, reason=f"issue 10: {table[fx.name]}")] if fx.name in table else []
        out.append(pytest.param(fx, id=fx.name, marks=marks))
    return out


# --------------------------------------------------------------------------
# The references and the model runs (onnxruntime, no onnxcal)


def reference(fx: Fixture) -> np.ndarray:
    """The framework's logits, float64, rows x K (class axis last)."""
    with np.load(EXPORTERS / fx.reference) as npz:
        assert str(npz["kind"]) == fx.reference_kind
        return npz["logits"].astype(np.float64)


def labels(fx: Fixture) -> np.ndarray:
    with np.load(fx.val_path) as npz:
        return npz["labels"]


def run(path: Path, fx: Fixture) -> dict[str, np.ndarray]:
    """Every output of the model at ``path`` on the whole validation set (ZipMaps as tables)."""
    sess = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])
    with np.load(fx.val_path) as npz:
        feed = {
            i.name: npz[i.name].astype(onnx.helper.tensor_dtype_to_np_dtype(i.type.tensor_type.elem_type))
            for i in onnx.load(str(path), load_external_data=False).graph.input
        }
    n = len(next(iter(feed.values())))
    step = fx.batch_size or n  # a dynamically quantized model: rows one at a time, as the reference
    names = [o.name for o in sess.get_outputs()]
    parts = [sess.run(names, {k: v[i : i + step] for k, v in feed.items()}) for i in range(0, n, step)]
    out = {}
    for j, name in enumerate(names):
        values = [p[j] for p in parts]
        if isinstance(values[0], list):  # ZipMap: a sequence of class -> probability maps
            out[name] = np.array([[row[k] for k in sorted(row)] for v in values for row in v])
        else:
            out[name] = np.concatenate(values)
    return out


# --------------------------------------------------------------------------
# The float64 reference of what a calibrated model should output.
# Reference library: scipy.special (softmax, log_softmax, expit, log_expit).


def activation(z: np.ndarray, fx: Fixture) -> np.ndarray:
    """What the model's head computes from logits z; raw logits get the appended activation."""
    act = fx.activation
    if act == "identity":
        act = "sigmoid" if fx.sigmoid else "softmax"
    if act == "softmax":
        return scipy.special.softmax(z, axis=1)
    if act == "log_softmax":
        return scipy.special.log_softmax(z, axis=1)
    if act == "sigmoid":
        return scipy.special.expit(z)
    assert act == "sigmoid_l1", act
    s = scipy.special.expit(z)
    return s / s.sum(axis=1, keepdims=True)


def quantize(p: np.ndarray, params: dict) -> np.ndarray:
    # ONNX operator spec, QuantizeLinear / DequantizeLinear: saturate(round(x / scale) + zero_point),
    # round half to even; then (q - zero_point) * scale.
    info = np.iinfo(np.dtype(params["dtype"]))
    q = np.clip(np.rint(p / params["scale"]) + params["zero_point"], info.min, info.max)
    return (q - params["zero_point"]) * params["scale"]


def post(p: np.ndarray, fx: Fixture) -> np.ndarray:
    """What follows the activation in the model (the manifest's ``post``)."""
    params = fx.post_params
    if fx.post is None:
        return p
    if fx.post == "x100":
        return p * params["scale"]
    if fx.post == "clip":
        return np.clip(p, params["min"], params["max"])
    if fx.post == "select class 1":
        i = params["index"]
        return p[:, i : i + 1] if params["keepdims"] else p[:, i]
    assert fx.post == "qdq", fx.post
    return quantize(p, params)


def expected(fx: Fixture, t: float) -> np.ndarray:
    return post(activation(reference(fx) / t, fx), fx)


def mean_nll(z: np.ndarray, y: np.ndarray, fx: Fixture) -> float:
    """Mean negative log-likelihood of the labels under the head's activation of z."""
    if fx.sigmoid:  # binary cross-entropy, one term per logit
        y = y.reshape(z.shape).astype(np.float64)
        return float(-(y * scipy.special.log_expit(z) + (1 - y) * scipy.special.log_expit(-z)).mean())
    if fx.activation == "sigmoid_l1":
        s = scipy.special.log_expit(z)
        log_p = s - scipy.special.logsumexp(s, axis=1, keepdims=True)
    else:  # softmax and log-softmax heads, and log-probability references: softmax(z / T)
        log_p = scipy.special.log_softmax(z, axis=1)
    return float(-log_p[np.arange(len(y)), y].mean())


def scipy_temperature(fx: Fixture) -> float:
    """T minimising the mean NLL of the reference logits / T (scipy.optimize.minimize_scalar)."""
    z, y = reference(fx), labels(fx)
    res = scipy.optimize.minimize_scalar(
        lambda log_t: mean_nll(z / np.exp(log_t), y, fx), bounds=(-7.0, 7.0), method="bounded",
        options={"xatol": 1e-9},
    )
    assert res.success and -6.9 < res.x < 6.9
    return float(np.exp(res.x))


def tolerance(fx: Fixture, values: np.ndarray) -> float:
    """How close a calibrated output must be to the float64 reference."""
    if fx.post == "qdq":  # within one quantization step of the output
        return fx.post_params["scale"] * 1.001
    tol = 5e-3 if fx.float16 else 1e-5
    return tol * max(1.0, float(np.abs(values).max()))  # x100 and log-probabilities scale up


def logits_tolerance(fx: Fixture, z: np.ndarray) -> float:
    """How close captured logits must be to the reference (a misread tensor or axis is off by O(1))."""
    if "logits_scale" in fx.post_params:  # quantized logits: one step
        return fx.post_params["logits_scale"] * 1.001
    rel = 2e-3 if fx.float16 else 1e-4  # the framework's float32 vs onnxruntime's
    return rel * (1.0 + float(np.abs(z[np.isfinite(z)]).max()))


# --------------------------------------------------------------------------
# onnxcal's runs, once per fixture (a raised error is kept and raised again)


def _once(fn):
    cached = functools.cache(lambda name: _outcome(fn, BY_NAME[name]))

    @functools.wraps(fn)
    def wrapper(fx: Fixture):
        ok, value = cached(fx.name)
        if not ok:
            raise value
        return value

    return wrapper


def _outcome(fn, fx):
    try:
        return True, fn(fx)
    except Exception as exc:  # noqa: BLE001 - kept and raised again for each test that asks
        return False, exc


@_once
def captured(fx: Fixture):
    return onnxcal.capture(fx.path, fx.val_path, output=fx.output_option, batch_size=fx.batch_size or 64)


@_once
def fitted(fx: Fixture):
    return onnxcal.fit(captured(fx), options=OPTIONS)


@pytest.fixture(scope="module")
def workdir(tmp_path_factory) -> Path:
    return tmp_path_factory.mktemp("real_models")


_CALIBRATED: dict[str, tuple[bool, object]] = {}


def calibrated(fx: Fixture, workdir: Path):
    """``onnxcal.calibrate`` on the fixture: (result, written path or None)."""
    if fx.name not in _CALIBRATED:
        out = workdir / f"{fx.name}.onnx"
        options = {"output": fx.output_option, **fx.calibrate_options}
        _CALIBRATED[fx.name] = _outcome(lambda f: (onnxcal.calibrate(f.path, f.val_path, out, options=OPTIONS,
                                                                     **options), out), fx)
    ok, value = _CALIBRATED[fx.name]
    if not ok:
        raise value
    result, out = value
    return result, (out if result.patch is not None else None)


def calibrated_output(fx: Fixture, written: Path) -> np.ndarray:
    """The output that should hold the calibrated values: the manifest's, or the one appended after logits."""
    outputs = run(written, fx)
    if fx.drop_in:
        return outputs[fx.output]
    original = {o.name for o in onnx.load(str(fx.path), load_external_data=False).graph.output}
    (added,) = [name for name in outputs if name not in original]
    return outputs[added]


def check_calibrated(fx: Fixture, written: Path, t: float) -> None:
    """The written model's output against post(activation(reference / T)) in float64."""
    got = calibrated_output(fx, written).astype(np.float64)
    want = expected(fx, t)
    assert got.shape == want.shape
    tol = tolerance(fx, want)
    np.testing.assert_allclose(got, want, atol=tol, rtol=0 if fx.post == "qdq" else tol)
    if fx.label_output is not None:  # temperature scaling keeps the label: the framework's own predict
        with np.load(EXPORTERS / fx.reference) as npz:
            np.testing.assert_array_equal(run(written, fx)[fx.label_output], npz["label"])


# --------------------------------------------------------------------------
# The tests


def test_manifest_files_exist_and_are_small():
    assert len(FIXTURE_LIST) == len(BY_NAME)
    for fx in FIXTURE_LIST:
        for name in (fx.model, fx.val, fx.reference):
            assert (EXPORTERS / name).stat().st_size < 1_000_000, name
        z, y = reference(fx), labels(fx)
        assert z.shape[0] == len(y) and np.isfinite(z).all(), fx.name
        if fx.labels == "classes":
            assert z.shape[1] == fx.num_classes and y.max() < fx.num_classes, fx.name


@pytest.mark.parametrize("fx", cases(XFAIL_FINDER))
def test_finder_reads_the_framework_logits(fx):
    """(a) The chosen output, and the captured scores against the framework's logits."""
    if fx.several_heads:  # the user names the head
        site = graph.find_scores(graph.load_model(fx.path), fx.output)
    else:  # what `onnxcal inspect` shows
        site = onnxcal.inspect(fx.path).site
    assert site.output == fx.output
    logits = np.asarray(captured(fx).logits, dtype=np.float64)
    z = reference(fx)
    tol = logits_tolerance(fx, z)
    if fx.sigmoid or fx.activation == "sigmoid_l1":  # sigmoid is not shift-invariant: the logits themselves
        np.testing.assert_allclose(logits, z.reshape(logits.shape), atol=tol, rtol=0)
    elif logits.shape[1] == 1 and z.shape[1] == 2:  # one class selected: its logit against the other
        np.testing.assert_allclose(logits[:, 0], z[:, 1] - z[:, 0], atol=tol, rtol=0)
    else:  # softmax(z) = softmax(z + c): equal up to a constant per row
        assert logits.shape == z.shape
        np.testing.assert_allclose(
            logits - logits.mean(axis=1, keepdims=True), z - z.mean(axis=1, keepdims=True), atol=tol, rtol=0
        )


@pytest.mark.parametrize("fx", cases(XFAIL_FIT))
def test_fitted_temperature_equals_scipy_on_the_framework_logits(fx):
    """(b) onnxcal's T against scipy.optimize.minimize_scalar of the mean NLL of the reference logits."""
    t = fitted(fx).temperature
    assert t == pytest.approx(scipy_temperature(fx), rel=1e-3)


@pytest.mark.parametrize("fx", cases(XFAIL_CALIBRATE))
def test_calibrated_model_matches_the_framework_reference(fx, workdir):
    """(c) calibrate writes a model whose output is post(activation(reference / T))."""
    result, written = calibrated(fx, workdir)
    assert written is not None, [c for c in result.verification.checks if not c.passed]
    check_calibrated(fx, written, result.summary.temperature)


@pytest.mark.parametrize("fx", cases(XFAIL_DROP_IN, [f for f in FIXTURE_LIST if f.drop_in]))
def test_drop_in_keeps_output_names_shapes_and_dtypes(fx, workdir):
    """(d) The written model's outputs are declared exactly as the original's."""
    _, written = calibrated(fx, workdir)
    assert written is not None
    before = onnx.load(str(fx.path), load_external_data=False).graph.output
    after = onnx.load(str(written), load_external_data=False).graph.output
    assert [o.SerializeToString() for o in after] == [o.SerializeToString() for o in before]


HINTED_NAME = "calibrated_probabilities"


@pytest.mark.parametrize("fx", cases(XFAIL_NEVER_WRONG))
def test_no_run_writes_a_wrong_model(fx, workdir):
    """(e) calibrate may refuse (OnnxcalError, or a failed verify and no file), never write a wrong model.

    A refusal whose hint is to choose another name with output_name (--output-name) is
    followed, as a user would, and that run is held to the same rule.
    """
    try:
        result, written = calibrated(fx, workdir)
    except OnnxcalError as exc:
        if "output_name" not in str(exc):  # the api names the keyword (errors.keyword_errors)
            return
        out = workdir / f"{fx.name}_hinted.onnx"
        options = {"output": fx.output_option, **fx.calibrate_options}
        try:
            result = onnxcal.calibrate(fx.path, fx.val_path, out, options=OPTIONS, output_name=HINTED_NAME, **options)
        except OnnxcalError:
            return
        written = out if result.patch is not None else None
    if written is not None:
        check_calibrated(fx, written, result.summary.temperature)


# -- several heads (issue 10, item 8) ----------------------------------------

HEADS = [f for f in FIXTURE_LIST if f.several_heads]
TWO_HEAD_MODELS = sorted({f.model for f in HEADS})
XFAIL_HEAD_CHOICE: dict[str, str] = {}  # issue 10 item 8: fixed
XFAIL_SECOND_HEAD: dict[str, str] = {}


def _model_cases(table: dict[str, str]) -> list:
    return [
        pytest.param(m, id=m, marks=[pytest.mark.xfail(strict=True,
                                                       reason=f"issue 10: {table[m]}")] if m in table else [])
        for m in TWO_HEAD_MODELS
    ]


@pytest.mark.parametrize("model", _model_cases(XFAIL_HEAD_CHOICE))
def test_several_heads_are_not_chosen_silently(model):
    """Two Softmax outputs qualify: the finder refuses and names both, so the user says which."""
    heads = [f.output for f in HEADS if f.model == model]
    with pytest.raises(OnnxcalError) as err:
        graph.find_scores(graph.load_model(EXPORTERS / model))
    assert all(h in str(err.value) for h in heads)


@pytest.mark.parametrize("model", _model_cases(XFAIL_SECOND_HEAD))
def test_calibrating_a_second_head_keeps_the_first(model, workdir):
    """Calibrate head A, then patch head B of that model: head A stays calibrated (or patch refuses)."""
    first, second = [f for f in HEADS if f.model == model]
    result, written = calibrated(first, workdir)
    assert written is not None
    t_first = result.summary.temperature
    out = workdir / f"{Path(model).stem}_both.onnx"
    try:
        onnxcal.patch(written, out, temperature=2.0, output=second.output)
    except OnnxcalError:
        return  # refusing clearly is allowed
    outputs = run(out, first)
    want = expected(first, t_first)
    np.testing.assert_allclose(outputs[first.output], want, atol=tolerance(first, want))
    np.testing.assert_allclose(outputs[second.output], expected(second, 2.0), atol=1e-5)


# -- a misreading forced through the API -------------------------------------

FEATURES_FIRST = [f for f in FIXTURE_LIST if f.name.startswith("torch_") and "_features_first_" in f.name]


@pytest.mark.parametrize(
    "fx",
    cases({}, FEATURES_FIRST),  # issue 10 item 2: fixed (the labels cover 10 of 64 values: refused)
)
def test_a_forced_misreading_is_not_written(fx, workdir):
    """Calibrating the hidden-feature output (labels cover 10 of its 64 columns) is refused or fails verify."""
    out = workdir / f"{fx.name}_features.onnx"
    try:
        result = onnxcal.calibrate(fx.path, fx.val_path, out, options=OPTIONS, output="features",
                                   output_name=HINTED_NAME)
    except OnnxcalError:
        return
    assert result.patch is None and not result.verification.passed
    assert not out.exists()
