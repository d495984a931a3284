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
    (["verify", "model.onnx", "--data", "val.npz"], "no onnxcal calibration record"),
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
    (["verify", "model.onnx", "--data", "val.npz", "--limit", "0"], "--limit 0 is not a positive"),
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
    (["--holdout", "1.5"], "--holdout 1.5 is not a fraction"),
    (["--method", "platt"], "--method platt does not apply to a multiclass"),
    (["--method", "nope"], "--method 'nope' is not one of"),
    (["--multilabel", "shared"], "--multilabel needs an N x K"),
    (["--bootstrap", "-1"], "--bootstrap -1 is negative"),
    (["--l2", "0.1"], "--l2 applies to --method vector and platt"),
]


@pytest.mark.parametrize("args, message", BAD_FIT, ids=[a[0] for a, _ in BAD_FIT])
def test_bad_fit_options(demo_capture, tmp_path, run_cli, args, message):
    r = run_cli("fit", demo_capture, "--out", tmp_path / "fit.json", *args)
    assert r.code == 2 and "Traceback" not in r.err
    assert re.search(message, r.err), r.err
    assert not (tmp_path / "fit.json").exists()
