"""The command line: the demo end to end, exit codes, and bad input."""

import json
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import onnx
import pytest
from onnx import numpy_helper

from conftest import (
    BELT_CLASSES,
    BELT_IMAGES,
    BELT_MODEL,
    DEMO_MODEL,
    DEMO_TEST,
    DEMO_VAL,
    TICKETS,
    TICKETS_LABELS,
    TICKETS_MODEL,
    files_in,
    identity_model,
    onehot_int_model,
    random_mlp,
    save_model,
)
from onnxcal import graph


def test_demo_end_to_end(tmp_path, run_cli):
    out = tmp_path / "calibrated.onnx"
    r = run_cli("calibrate", DEMO_MODEL, "--data", DEMO_VAL, "--out", out, "--quiet")
    assert r.code == 0, r.err
    assert "ECE (15 bins)" in r.out and "all checks passed" in r.out
    assert "validation set" in r.out  # the caution is printed
    r = run_cli("verify", out, "--data", DEMO_TEST, "--quiet")
    assert r.code == 0, r.err
    r = run_cli("verify", out, "--data", DEMO_TEST, "--json")
    data = json.loads(r.out)
    assert data["passed"] and {c["name"] for c in data["checks"]} >= {"reference", "argmax", "record"}


def test_calibrate_json_shows_ece_falling(tmp_path, run_cli):
    r = run_cli("calibrate", DEMO_MODEL, "--data", DEMO_VAL, "--out", tmp_path / "c.onnx", "--json")
    assert r.code == 0, r.err
    m = json.loads(r.out)["fit"]["metrics"]
    assert m["after"]["ece"] < m["before"]["ece"]


def test_step_by_step_commands(tmp_path, run_cli):
    cap, fit, patched = tmp_path / "c.npz", tmp_path / "fit.json", tmp_path / "p.onnx"
    assert run_cli("capture", DEMO_MODEL, "--data", DEMO_VAL, "--out", cap, "-q").code == 0
    r = run_cli("fit", cap, "--out", fit)
    assert r.code == 0 and "temperature scaling" in r.out and "T = " in r.out
    t = json.loads(fit.read_text())["temperature"]
    r = run_cli("fit", cap, "--json")
    assert json.loads(r.out)["temperature"] == t
    assert run_cli("patch", DEMO_MODEL, "--fit", fit, "--out", patched).code == 0
    r = run_cli("inspect", patched, "--json")
    info = json.loads(r.out)
    assert info["record"]["temperature"] == t and info["site"]["output"] == "probabilities"
    r = run_cli("inspect", DEMO_MODEL)
    assert "band_energies" in r.out and "raw logits" in r.out and "dynamic" in r.out


def test_wrong_temperature_in_a_copy_fails_verify(tmp_path, run_cli):
    out = tmp_path / "calibrated.onnx"
    assert run_cli("patch", DEMO_MODEL, "--temperature", "2.0", "--out", out).code == 0
    model = onnx.load(str(out))
    record = graph.read_record(model)
    for init in model.graph.initializer:
        if init.name == record.temperature_initializer:
            init.CopyFrom(numpy_helper.from_array(np.array(2.5, np.float32), init.name))
    tampered = tmp_path / "tampered.onnx"
    onnx.save(model, tampered)
    r = run_cli("verify", tampered, "--data", DEMO_VAL, "--original", DEMO_MODEL, "-q")
    assert r.code == 1
    assert "FAIL" in r.out


def test_console_script_runs(tmp_path):
    # The installed entry point, as a user would call it (beside this interpreter).
    exe = Path(sys.executable).with_name("onnxcal")
    cmd = [str(exe)] if exe.exists() else [sys.executable, "-m", "onnxcal"]
    r = subprocess.run(cmd + ["inspect", str(DEMO_MODEL), "--json"], capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    assert json.loads(r.stdout)["opset"] == 17
    r = subprocess.run(cmd + ["inspect", str(tmp_path / "missing.onnx")], capture_output=True, text=True)
    assert r.returncode == 2 and "Traceback" not in r.stderr


# --------------------------------------------------------------------------
# Bad input: one line on stderr, exit 2, no traceback, nothing written.


@pytest.fixture
def work(tmp_path, rng):
    d = tmp_path / "work"
    d.mkdir()
    save_model(random_mlp(rng), d / "model.onnx")
    x = rng.normal(size=(20, 6)).astype(np.float32)
    np.savez(d / "val.npz", x=x, labels=rng.integers(0, 4, 20))
    np.savez(d / "nolabels.npz", x=x)
    np.savez(d / "biglabels.npz", x=x, labels=np.full(20, 4))
    np.savez(d / "short.npz", x=x, labels=np.zeros(19, np.int64))
    (d / "text.onnx").write_text("not a model\n")
    save_model(onehot_int_model(), d / "intonly.onnx")
    save_model(identity_model(3), d / "identity.onnx")
    z = rng.normal(size=(20, 3)).astype(np.float32)
    z[[2, 5, 11], 1] = np.nan
    z[7, 0] = np.inf
    np.savez(d / "nan.npz", x=z, labels=rng.integers(0, 3, 20))
    np.savez(d / "x3.npz", x=z[:, :3], labels=rng.integers(0, 3, 20))
    return d


BAD = [
    (["inspect", "text.onnx"], "not a readable ONNX model"),
    (["calibrate", "text.onnx", "--data", "val.npz", "--out", "o.onnx"], "not a readable ONNX model"),
    (["calibrate", "intonly.onnx", "--data", "x3.npz", "--out", "o.onnx"], "no floating-point output"),
    (["capture", "model.onnx", "--data", "nolabels.npz", "--out", "c.npz"], "no array named 'labels'"),
    (["calibrate", "model.onnx", "--data", "biglabels.npz", "--out", "o.onnx"], r"label 4 at row 0 .*outside \[0, 4\)"),
    (["capture", "model.onnx", "--data", "short.npz", "--out", "c.npz"], "different numbers of samples"),
    (["calibrate", "identity.onnx", "--data", "nan.npz", "--out", "o.onnx", "-q"], "NaN or Inf in 4 of 20 rows .first rows: 2, 5, 7, 11"),
    (["patch", "model.onnx", "--temperature", "2", "--out", "model.onnx"], "is the input file"),
    (["patch", "model.onnx", "--temperature", "2", "--out", "./sub/../model.onnx"], "is the input file"),
    (["calibrate", "model.onnx", "--data", "val.npz", "--out", "missing_dir/o.onnx"], "output directory .* does not exist"),
    (["patch", "model.onnx", "--temperature", "0", "--out", "o.onnx"], "not a positive finite number"),
    (["patch", "model.onnx", "--temperature", "2", "--output", "nope", "--out", "o.onnx"], "no output named 'nope'"),
    (["fit", "val.npz"], "not an onnxcal capture file"),
    (["capture", "model.onnx", "--data", "model.onnx", "--out", "c.npz"], "not an .npz archive"),
]


@pytest.mark.parametrize("args, message", BAD, ids=[" ".join(a[:2]) + f"-{i}" for i, (a, _) in enumerate(BAD)])
def test_bad_input(work, run_cli, monkeypatch, args, message):
    monkeypatch.chdir(work)
    (work / "sub").mkdir(exist_ok=True)
    before = files_in(work)
    r = run_cli(*args)
    assert r.code == 2
    assert "Traceback" not in r.err
    lines = [line for line in r.err.splitlines() if line.strip()]
    assert len(lines) == 1, r.err
    assert lines[0].startswith("onnxcal: error:")
    assert re.search(message, lines[0]), lines[0]
    assert files_in(work) == before  # nothing created, nothing changed


def test_existing_output_needs_force(work, run_cli, monkeypatch):
    monkeypatch.chdir(work)
    assert run_cli("patch", "model.onnx", "--temperature", "2", "--out", "p.onnx").code == 0
    first = (work / "p.onnx").read_bytes()
    r = run_cli("patch", "model.onnx", "--temperature", "3", "--out", "p.onnx")
    assert r.code == 2 and "already exists" in r.err and "--force" in r.err
    assert (work / "p.onnx").read_bytes() == first
    assert run_cli("patch", "model.onnx", "--temperature", "3", "--out", "p.onnx", "--force").code == 0
    assert (work / "p.onnx").read_bytes() != first


def test_debug_shows_traceback(work, run_cli, monkeypatch):
    monkeypatch.chdir(work)
    r = run_cli("inspect", "text.onnx", "--debug")
    assert r.code == 2 and "Traceback" in r.err


def test_version(run_cli):
    from onnxcal import __version__

    r = run_cli("--version")
    assert r.code == 0 and r.out.strip() == f"onnxcal {__version__}"


def test_usage_error_exits_2(run_cli):
    r = run_cli("patch")
    assert r.code == 2


# --------------------------------------------------------------------------
# Data forms, shards and warnings on the command line



def test_images_and_npy_inputs_on_the_command_line(tmp_path, run_cli):
    r = run_cli(
        "calibrate", BELT_MODEL, "--data", BELT_IMAGES, "--classes", BELT_CLASSES,
        "--resize", "32", "--crop", "32", "--mean", "0.485,0.456,0.406", "--std", "0.229,0.224,0.225",
        "--out", tmp_path / "belt.onnx", "-q", "--json", "--bootstrap", "0",
    )
    assert r.code == 0, r.err
    assert json.loads(r.out)["fit"]["capture"]["preprocess"]["mean"] == [0.485, 0.456, 0.406]
    r = run_cli(
        "capture", TICKETS_MODEL, "--input", f"input_ids={TICKETS['input_ids']}",
        "--input", f"attention_mask={TICKETS['attention_mask']}", "--labels", TICKETS_LABELS,
        "--threads", "1", "--out", tmp_path / "t.npz", "-q",
    )
    assert r.code == 0, r.err and "captured 300 x 3 logits" in r.out


def test_capture_shards_then_fit_them_together(tmp_path, run_cli):
    for i in (1, 2):
        r = run_cli("capture", DEMO_MODEL, "--data", DEMO_VAL, "--shard", f"{i}/2", "--out", tmp_path / f"{i}.npz", "-q")
        assert r.code == 0, r.err
    r = run_cli("fit", tmp_path / "1.npz", tmp_path / "2.npz", "--json", "--bootstrap", "0")
    assert r.code == 0, r.err
    whole = run_cli("fit", tmp_path / "1.npz", "--json", "--bootstrap", "0")
    assert json.loads(r.out)["capture"]["n"] == 2000 and json.loads(whole.out)["capture"]["n"] == 1000
    r = run_cli("fit", tmp_path / "1.npz", tmp_path / "1.npz")
    assert r.code == 2 and "both hold row 0" in r.err


def test_fallback_warning_is_one_line(tmp_path, run_cli, rng):
    model = random_mlp(rng, batch=1)
    coupled = onnx.ModelProto()
    coupled.CopyFrom(model)  # make it couple samples across the batch
    g = coupled.graph
    g.node.insert(0, onnx.helper.make_node("ReduceMean", ["x"], ["mu"], axes=[0, 1], keepdims=1))
    g.node.insert(1, onnx.helper.make_node("Sub", ["x", "mu"], ["xc"]))
    g.node[2].input[0] = "xc"
    save_model(coupled, tmp_path / "m.onnx")
    np.savez(tmp_path / "v.npz", x=rng.normal(size=(30, 6)).astype(np.float32), labels=rng.integers(0, 4, 30))
    r = run_cli("capture", tmp_path / "m.onnx", "--data", tmp_path / "v.npz", "--out", tmp_path / "c.npz", "-q")
    assert r.code == 0, r.err
    lines = [line for line in r.err.splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith("warning: the model's batch dim is fixed at 1")


DATA_BAD = [
    (["capture", "model.onnx", "--data", "val.npz", "--out", "c.npz", "--shard", "0/3"], "--shard 0/3 is out of range"),
    (["capture", "model.onnx", "--input", "x", "--out", "c.npz"], "--input 'x' is not of the form NAME=FILE.npy"),
    (["capture", "model.onnx", "--out", "c.npz"], "no validation data given; pass --data PATH or --input"),
    (["capture", "model.onnx", "--data", "val.npz", "--resize", "8", "--out", "c.npz"], "--resize applies to image folders only"),
    (["calibrate", "model.onnx", "--data", "val.npz", "--provider", "Nope", "--out", "o.onnx"], "--provider Nope is not available"),
    (["calibrate", "model.onnx", "--data", "val.npz", "--optimization", "max", "--out", "o.onnx"], "--optimization 'max'"),
    (["capture", "model.onnx", "--data", "bad.csv", "--out", "c.npz"], "line 3, column 'b' .* holds 'oops', not a number"),
    (["verify", "model.onnx", "--data", "val.npz", "--limit", "0"], "--limit 0 is out of range: give a number of samples of at least 1"),
    (["capture", "model.onnx", "--data", "val.npz", "--out", "val.npz", "--force"], "is the input file"),
]


@pytest.mark.parametrize("args, message", DATA_BAD, ids=[f"data-{i}" for i in range(len(DATA_BAD))])
def test_bad_data_input(work, run_cli, monkeypatch, args, message):
    monkeypatch.chdir(work)
    (work / "bad.csv").write_text("a,b,c,d,e,f,label\n1,2,3,4,5,6,0\n1,oops,3,4,5,6,1\n")
    before = files_in(work)
    r = run_cli(*args)
    assert r.code == 2
    lines = [line for line in r.err.splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith("onnxcal: error:"), r.err
    assert re.search(message, lines[0]), lines[0]
    assert files_in(work) == before


EXPORTERS = Path(__file__).resolve().parents[1] / "fixtures" / "exporters"


def test_patch_options_on_exported_models(tmp_path, run_cli):
    fp16 = EXPORTERS / "belt_spectrogram_softmax_fp16_op13.onnx"
    r = run_cli("patch", fp16, "--temperature", "2", "--compute-dtype", "float32", "--out", tmp_path / "a.onnx")
    assert r.code == 0 and "computed in float32" in r.out
    cnn = EXPORTERS / "belt_spectrogram_softmax_op13.onnx"
    r = run_cli("patch", cnn, "--temperature", "2", "--fold", "--out", tmp_path / "b.onnx")
    assert r.code == 0 and "folded" in r.out
    r = run_cli("inspect", tmp_path / "b.onnx", "--json")
    assert json.loads(r.out)["record"]["folded"] is True
    r = run_cli("verify", tmp_path / "b.onnx", "--data", EXPORTERS / "belt_spectrogram_val.npz", "-q")
    assert r.code == 0, r.out
    seg = EXPORTERS / "belt_surface_softmax_op11.onnx"
    r = run_cli("patch", seg, "--temperature", "2", "--fold", "--out", tmp_path / "c.onnx")
    assert r.code == 2 and "not a Gemm or MatMul" in r.err and not (tmp_path / "c.onnx").exists()
    r = run_cli("patch", cnn, "--temperature", "2", "--activation", "sigmoid", "--out", tmp_path / "d.onnx")
    assert r.code == 2 and "already comes from softmax" in r.err
    r = run_cli("patch", cnn, "--temperature", "2", "--compute-dtype", "half", "--out", tmp_path / "e.onnx")
    assert r.code == 2 and "--compute-dtype 'half' is not one of" in r.err


def test_calibrate_raw_multi_logit_head_as_sigmoid(tmp_path, run_cli):
    # The multi-label head without its Sigmoid: --activation sigmoid says how to read it.
    model = onnx.load(str(EXPORTERS / "belt_faults_multilabel_op17.onnx"))
    sigmoid = next(n for n in model.graph.node if n.op_type == "Sigmoid")
    model.graph.node.remove(sigmoid)
    model.graph.output[0].name = sigmoid.input[0]
    raw = save_model(model, tmp_path / "raw.onnx")
    val = EXPORTERS / "belt_faults_multilabel_op17_val.npz"
    r = run_cli("calibrate", raw, "--data", val, "--out", tmp_path / "s.onnx", "--activation", "sigmoid", "-q")
    assert r.code == 0, r.err
    assert graph.read_record(onnx.load(str(tmp_path / "s.onnx"))).rewrite == "append-sigmoid"
    r = run_cli("calibrate", raw, "--data", val, "--out", tmp_path / "t.onnx", "-q")
    assert r.code == 2 and "labels" in r.err  # read as a softmax, 0/1 flags are no class indices


def test_inspect_zipmap_model(run_cli):
    r = run_cli("inspect", EXPORTERS / "wine_boosted_zipmap.onnx")
    assert r.code == 0
    assert "seq(map(int64, float32))" in r.out and "ai.onnx.ml classifier" in r.out


def test_calibrate_refuses_an_already_calibrated_model(tmp_path, run_cli):
    out = tmp_path / "c.onnx"
    assert run_cli("patch", DEMO_MODEL, "--temperature", "2", "--out", out).code == 0
    r = run_cli("calibrate", out, "--data", DEMO_VAL, "--out", tmp_path / "d.onnx", "-q")
    assert r.code == 2 and "already calibrated" in r.err


# --------------------------------------------------------------------------
# fit options


@pytest.fixture(scope="module")
def demo_capture(tmp_path_factory):
    from onnxcal import api

    path = tmp_path_factory.mktemp("cap") / "cap.npz"
    api.capture(DEMO_MODEL, DEMO_VAL, out=path)
    return path


def test_fit_table_shows_held_out_intervals_and_fit_part(demo_capture, run_cli):
    r = run_cli("fit", demo_capture, "--bootstrap", "30", "--seed", "3")
    assert r.code == 0, r.err
    for text in ("held-out", "95% interval", "fit part", "MCE", "adaptive ECE", "classwise ECE", "gap", "refitted on all 2000"):
        assert text in r.out, text
    r = run_cli("fit", demo_capture, "--holdout", "0", "--bootstrap", "0")
    assert "in-sample" in r.out and "95% interval" not in r.out and "fit part" not in r.out


def test_fit_vector_then_patch_and_verify(demo_capture, tmp_path, run_cli):
    fit = tmp_path / "fit.json"
    r = run_cli("fit", demo_capture, "--method", "vector", "--l2", "0.001", "--bootstrap", "10", "--out", fit)
    assert r.code == 0, r.err
    assert "vector scaling" in r.out
    data = json.loads(fit.read_text())
    assert data["method"] == "vector" and data["options"]["l2"] == 0.001
    assert len(data["intervals"]["parameters"]["w"]) == 5 and data["temperature"] is None
    out = tmp_path / "p.onnx"
    r = run_cli("patch", DEMO_MODEL, "--fit", fit, "--out", out)
    assert r.code == 0 and "Mul + Add + Softmax appended" in r.out
    assert "vector scaling" in run_cli("inspect", out).out
    r = run_cli("verify", out, "--data", DEMO_TEST, "-q")
    assert r.code == 0, r.out


BAD_FIT = [
    (["--holdout", "1.5"], r"--holdout 1.5 is out of range: give a fraction \(0 scores in-sample\) from 0 to 0.9"),
    (["--method", "platt"], "--method platt does not apply to a multiclass"),
    (["--method", "nope"], "--method 'nope' is not one of"),
    (["--multilabel", "shared"], "--multilabel needs an N x K"),
    (["--bootstrap", "-1"], r"--bootstrap -1 is out of range: give a number of replicates \(0 skips the intervals\) from 0 to 10000"),
    (["--l2", "0.1"], "--l2 applies to --method vector and platt"),
]


@pytest.mark.parametrize("args, message", BAD_FIT, ids=[a[0] for a, _ in BAD_FIT])
def test_bad_fit_options(demo_capture, tmp_path, run_cli, args, message):
    r = run_cli("fit", demo_capture, "--out", tmp_path / "fit.json", *args)
    assert r.code == 2 and "Traceback" not in r.err
    assert re.search(message, r.err), r.err
    assert not (tmp_path / "fit.json").exists()


# --------------------------------------------------------------------------
# verify as a CI gate: exit codes, thresholds, JUnit, references without the original


@pytest.fixture(scope="module")
def gate(tmp_path_factory):
    """The demo patched with its fitted T, the original's scores on the test split, and a copy
    of the original whose record path is gone (for the patched-graph reference)."""
    from onnxcal import api

    d = tmp_path_factory.mktemp("gate")
    # the original beside the calibrated model, where verify looks for it (the record holds its file name)
    (d / DEMO_MODEL.name).write_bytes(DEMO_MODEL.read_bytes())
    api.calibrate(d / DEMO_MODEL.name, DEMO_VAL, d / "calibrated.onnx", options=api.FitOptions(bootstrap=0))
    api.capture(DEMO_MODEL, DEMO_TEST, out=d / "test_scores.npz")
    test = np.load(DEMO_TEST)
    np.savez(d / "test_inputs.npz", band_energies=test["band_energies"])
    (d / "copy.onnx").write_bytes(DEMO_MODEL.read_bytes())
    api.patch(d / "copy.onnx", d / "orphan.onnx", temperature=2.0)
    (d / "copy.onnx").unlink()
    return d


def _json(r):
    assert "Traceback" not in r.err, r.err
    return json.loads(r.out)


def _patched_probabilities(path):
    import onnxruntime as ort

    test = np.load(DEMO_TEST)
    sess = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])
    return sess.run(["probabilities"], {"band_energies": test["band_energies"]})[0], test["labels"]


def test_verify_thresholds_are_the_patched_models_own_figures(gate, run_cli):
    # Reference library: scikit-learn's log_loss and accuracy_score on the patched model's
    # onnxruntime outputs; the ECE by its definition (Guo et al. 2017, eq. 3) with np.digitize.
    from sklearn.metrics import accuracy_score, log_loss

    r = run_cli("verify", gate / "calibrated.onnx", "--data", DEMO_TEST, "--json",
                "--max-ece", "1", "--max-nll", "100", "--min-accuracy", "0")
    assert r.code == 0
    checks = {c["name"]: c for c in _json(r)["checks"]}
    p, y = _patched_probabilities(gate / "calibrated.onnx")
    p = p.astype(np.float64)
    p /= p.sum(axis=1, keepdims=True)  # float32 rows sum to 1 within 1e-7
    assert checks["max-nll"]["value"] == pytest.approx(log_loss(y, p, labels=range(5)), rel=1e-5)
    assert checks["min-accuracy"]["value"] == pytest.approx(accuracy_score(y, p.argmax(1)), abs=0)
    conf, right = p.max(1), (p.argmax(1) == y)
    bins = np.digitize(conf, np.linspace(0, 1, 16)[1:-1], right=True)
    ece = sum(abs(right[bins == b].mean() - conf[bins == b].mean()) * (bins == b).mean()
              for b in range(15) if (bins == b).any())
    assert checks["max-ece"]["value"] == pytest.approx(ece, rel=1e-5)


def test_max_ece_below_the_real_ece_fails_above_passes(gate, run_cli, tmp_path):
    r = run_cli("verify", gate / "calibrated.onnx", "--data", DEMO_TEST, "--json", "--max-ece", "1")
    ece = next(c["value"] for c in _json(r)["checks"] if c["name"] == "max-ece")
    assert 0 < ece < 0.1
    below = run_cli("verify", gate / "calibrated.onnx", "--data", DEMO_TEST, "-q", "--max-ece", f"{ece * 0.99:.6f}",
                    "--junit", tmp_path / "below.xml")
    assert below.code == 1 and "FAILED (max-ece)" in below.out
    above = run_cli("verify", gate / "calibrated.onnx", "--data", DEMO_TEST, "-q", "--max-ece", f"{ece * 1.01:.6f}",
                    "--junit", tmp_path / "above.xml")
    assert above.code == 0 and "all checks passed" in above.out
    import xml.etree.ElementTree as ET

    failed = ET.parse(tmp_path / "below.xml").getroot()
    assert failed.get("failures") == "1"
    (case,) = [c for c in failed.iter("testcase") if c.find("failure") is not None]
    assert case.get("name") == "max-ece"
    assert ET.parse(tmp_path / "above.xml").getroot().get("failures") == "0"


def _tampered(gate, tmp_path, value):
    model = onnx.load(str(gate / "calibrated.onnx"))
    record = graph.read_record(model)
    for init in model.graph.initializer:
        if init.name == record.temperature_initializer:
            init.CopyFrom(numpy_helper.from_array(np.array(value, np.float32), init.name))
    return save_model(model, tmp_path / "tampered.onnx")


def _restamped_original(tmp_path):
    model = onnx.load(str(DEMO_MODEL))
    model.doc_string = "re-exported"  # same computation, another file
    return save_model(model, tmp_path / "restamped.onnx")


FAILURES = [
    ("reference", lambda g, t: [_tampered(g, t, 2.5)], {"reference", "record"}),
    ("argmax", lambda g, t: [_tampered(g, t, -3.0)], {"reference", "argmax", "record"}),
    ("record", lambda g, t: [DEMO_MODEL], {"record"}),
    ("source", lambda g, t: [g / "calibrated.onnx", "--original", _restamped_original(t)], {"source"}),
    ("max-ece", lambda g, t: [g / "calibrated.onnx", "--max-ece", "0.001"], {"max-ece"}),
    ("max-nll", lambda g, t: [g / "calibrated.onnx", "--max-nll", "0.01"], {"max-nll"}),
    ("min-accuracy", lambda g, t: [g / "calibrated.onnx", "--min-accuracy", "0.99"], {"min-accuracy"}),
    ("latency", lambda g, t: [g / "calibrated.onnx", "--max-latency-ratio", "1e-6", "--latency-runs", "3"], {"latency"}),
]


@pytest.mark.parametrize("kind, args, failed", FAILURES, ids=[f[0] for f in FAILURES])
def test_verify_exits_1_on_each_kind_of_failure(gate, tmp_path, run_cli, kind, args, failed):
    made = args(gate, tmp_path)
    r = run_cli("verify", made[0], "--data", DEMO_TEST, "--json", *made[1:], "--junit", tmp_path / "j.xml")
    assert r.code == 1
    data = _json(r)
    assert not data["passed"]
    assert {c["name"] for c in data["checks"] if c["status"] == "fail"} == failed
    import xml.etree.ElementTree as ET

    suite = ET.parse(tmp_path / "j.xml").getroot().find("testsuite")
    assert {c.get("name") for c in suite.iter("testcase") if c.find("failure") is not None} == failed


def test_verify_with_captured_scores_needs_no_original(gate, tmp_path, run_cli):
    r = run_cli("verify", gate / "calibrated.onnx", "--data", gate / "test_inputs.npz",
                "--scores", gate / "test_scores.npz", "--max-ece", "0.2", "--json")
    assert r.code == 0, r.out
    data = _json(r)
    assert data["reference_from"] == "scores" and data["passed"]
    checks = {c["name"]: c for c in data["checks"]}
    assert checks["source"]["status"] == "pass" and checks["max-ece"]["status"] == "pass"  # labels from the capture
    # Several capture files, in the data's order.
    from onnxcal import api

    api.capture(DEMO_MODEL, DEMO_VAL, out=tmp_path / "val_scores.npz")
    val, test = np.load(DEMO_VAL), np.load(DEMO_TEST)
    both = {k: np.concatenate([val[k], test[k]]) for k in ("band_energies", "labels")}
    np.savez(tmp_path / "both.npz", **both)
    r = run_cli("verify", gate / "calibrated.onnx", "--data", tmp_path / "both.npz", "--json",
                "--scores", tmp_path / "val_scores.npz", "--scores", gate / "test_scores.npz")
    assert r.code == 0 and _json(r)["n"] == len(both["labels"])
    r = run_cli("verify", gate / "calibrated.onnx", "--data", tmp_path / "both.npz", "-q",
                "--scores", gate / "test_scores.npz", "--scores", tmp_path / "val_scores.npz")
    assert r.code == 1 and "reference" in r.out  # the wrong order is caught


def test_verify_without_original_or_scores_uses_the_patched_graph(gate, tmp_path, run_cli):
    r = run_cli("verify", gate / "orphan.onnx", "--data", DEMO_TEST, "--json", "--junit", tmp_path / "j.xml")
    assert r.code == 0
    data = _json(r)
    assert data["reference_from"] == "patched-graph" and any("own logits" in n for n in data["notes"])
    checks = {c["name"]: c for c in data["checks"]}
    assert checks["reference"]["status"] == "pass" and checks["source"]["status"] == "skip"
    import xml.etree.ElementTree as ET

    suite = ET.parse(tmp_path / "j.xml").getroot().find("testsuite")
    assert suite.get("skipped") == "1" and [c.get("name") for c in suite.iter("testcase") if c.find("skipped") is not None] == ["source"]
    r = run_cli("verify", gate / "orphan.onnx", "--data", DEMO_TEST, "-q")
    assert "patched graph's own logits" in r.out
    # A wrong T inside the orphan is still caught by the recomputed reference.
    model = onnx.load(str(gate / "orphan.onnx"))
    record = graph.read_record(model)
    for init in model.graph.initializer:
        if init.name == record.temperature_initializer:
            init.CopyFrom(numpy_helper.from_array(np.array(2.2, np.float32), init.name))
    r = run_cli("verify", save_model(model, tmp_path / "bad_orphan.onnx"), "--data", DEMO_TEST, "--json")
    assert r.code == 1 and {c["name"] for c in _json(r)["checks"] if c["status"] == "fail"} == {"reference", "record"}


def test_verify_latency_is_reported_as_a_ratio(gate, run_cli):
    r = run_cli("verify", gate / "calibrated.onnx", "--data", DEMO_TEST, "--json", "--latency", "--latency-runs", "5")
    assert r.code == 0
    (lat,) = [c for c in _json(r)["checks"] if c["name"] == "latency"]
    assert lat["value"] > 0 and lat["limit"] is None and "original" in lat["detail"]


BAD_VERIFY = [
    (["--original", "DEMO", "--scores", "SCORES"], "give --original or --scores, not both"),
    (["--max-ece", "1.5"], r"--max-ece 1.5 is not a number between 0 and 1"),
    (["--min-accuracy", "-0.1"], "--min-accuracy -0.1 is not a number between 0 and 1"),
    (["--max-nll", "-1"], "--max-nll -1.0 is not a non-negative number"),
    (["--max-latency-ratio", "0"], "--max-latency-ratio 0.0 is not a positive number"),
    (["--data", "INPUTS", "--max-ece", "0.1"], "need labels"),
    (["--data", "HALF", "--scores", "SCORES"], "holds 2000 rows of scores but the patched model gives 1000 rows"),
    (["--junit", "EXISTING"], "already exists"),
    (["--junit", "MISSINGDIR"], "does not exist"),
    (["--latency-runs", "0"], "--latency-runs 0 is out of range: give a number of runs from 1 to 100000"),
]


@pytest.mark.parametrize("args, message", BAD_VERIFY, ids=[str(i) for i in range(len(BAD_VERIFY))])
def test_verify_exits_2_on_bad_input(gate, tmp_path, run_cli, args, message):
    (tmp_path / "existing.xml").write_text("keep me")
    test = np.load(DEMO_TEST)
    np.savez(tmp_path / "half.npz", band_energies=test["band_energies"][:1000])
    swap = {"DEMO": DEMO_MODEL, "SCORES": gate / "test_scores.npz", "INPUTS": gate / "test_inputs.npz",
            "HALF": tmp_path / "half.npz", "EXISTING": tmp_path / "existing.xml",
            "MISSINGDIR": tmp_path / "nope" / "j.xml"}
    data = [] if "--data" in args else ["--data", DEMO_TEST]
    before = files_in(tmp_path)
    r = run_cli("verify", gate / "calibrated.onnx", *data, *[swap.get(a, a) for a in args], "-q")
    assert r.code == 2 and "Traceback" not in r.err
    assert re.search(message, r.err), r.err
    assert files_in(tmp_path) == before


def test_verify_help_documents_the_exit_codes(run_cli):
    r = run_cli("verify", "--help")
    assert r.code == 0
    text = " ".join(r.out.split())
    assert "0 every check passed" in text and "1 a check failed" in text and "2 bad input" in text
    for option in ("--max-ece", "--max-nll", "--min-accuracy", "--latency", "--max-latency-ratio", "--junit", "--scores"):
        assert option in text


# --------------------------------------------------------------------------
# docs/ci.md, run as written


def _ci_blocks() -> list[tuple[str, str]]:
    """(kind, body) of each example block of docs/ci.md, in order.

    The blocks are marked with HTML comments (invisible when rendered):
    ``run`` is run in the repository root, ``file PATH`` is written to PATH,
    ``job`` is the CI job (its ``PATH=`` line is run with this test's onnxcal
    on PATH; its install lines need a network and a package index).
    """
    text = (Path(__file__).resolve().parents[1] / "docs" / "ci.md").read_text()
    return re.findall(r"<!-- ci-example: (.+?) -->\n```sh\n(.*?)```", text, re.S)


def test_ci_example_works_as_written(tmp_path):
    import os
    import xml.etree.ElementTree as ET

    blocks = _ci_blocks()
    assert [k for k, _ in blocks] == ["run", "run", "file ci/calibration.env", "file ci/check-calibration.sh", "job"]
    (tmp_path / "fixtures").symlink_to(DEMO_MODEL.parent)
    env = {**os.environ, "PATH": f"{Path(sys.executable).parent}{os.pathsep}{os.environ['PATH']}"}

    def bash(script):
        return subprocess.run(["bash", "-c", script], cwd=tmp_path, env=env, capture_output=True, text=True, timeout=300)

    for kind, body in blocks:
        if kind == "run":
            r = bash("set -euo pipefail\n" + body)
            assert r.returncode == 0, r.stderr
        elif kind.startswith("file "):
            (tmp_path / kind.split(" ", 1)[1]).write_text(body)
        else:
            assert "python3 -m venv .venv" in body and "pip install" in body
            (job,) = [line for line in body.splitlines() if line.startswith("PATH=")]
    r = bash(job)
    assert r.returncode == 0, r.stdout + r.stderr
    junit = ET.parse(tmp_path / "reports" / "calibration-junit.xml").getroot()
    assert junit.get("failures") == "0"
    names = {c.get("name") for c in junit.iter("testcase")}
    assert names >= {"reference", "argmax", "record", "source", "max-ece", "max-nll", "min-accuracy", "latency"}
    for d in ("calibration", "calibration-test"):
        assert (tmp_path / "reports" / d / "report.html").is_file()
    # A bound the model does not meet fails the job, and the report is still written.
    env_file = tmp_path / "ci" / "calibration.env"
    env_file.write_text(env_file.read_text().replace("CAL_MAX_ECE=0.05", "CAL_MAX_ECE=0.001"))
    (tmp_path / "reports" / "calibration-test" / "report.html").unlink()
    r = bash(job)
    assert r.returncode == 1 and "verify: FAILED (max-ece)" in r.stdout
    assert (tmp_path / "reports" / "calibration-test" / "report.html").is_file()
    # A changed file fails the checksum step before anything runs.
    (tmp_path / "validation" / "conveyor_faults_test_scores.npz").write_bytes(b"changed")
    r = bash(job)
    assert r.returncode != 0 and "FAILED" in r.stdout + r.stderr
