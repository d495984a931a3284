"""The commands on the demo and on exported models: what they write and print (onnxcal/cli/commands.py)."""

import json
import re

import numpy as np
import onnx
import pytest
from conftest import DEMO_MODEL, DEMO_TEST, DEMO_VAL, FIXTURES, save_model
from onnx import numpy_helper

from onnxcal import graph


def test_demo_end_to_end(tmp_path, run_cli):
    out = tmp_path / "calibrated.onnx"
    r = run_cli("calibrate", DEMO_MODEL, "--data", DEMO_VAL, "--out", out)
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


# --------------------------------------------------------------------------
# Exported models


EXPORTERS = FIXTURES / "exporters"


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
    for text in ("held-out", "95% interval", "fit part", "MCE", "adaptive ECE", "classwise ECE", "gap",
                 "refitted on all 2000"):
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
    (["--bootstrap", "-1"],
     r"--bootstrap -1 is out of range: give a number of replicates \(0 skips the intervals\) from 0 to 10000"),
    (["--l2", "0.1"],
     "--l2 applies to --method vector, platt, matrix, dirichlet, beta, ovr-platt and auto, not temperature"),
]


@pytest.mark.parametrize("args, message", BAD_FIT, ids=[a[0] for a, _ in BAD_FIT])
def test_bad_fit_options(demo_capture, tmp_path, run_cli, args, message):
    r = run_cli("fit", demo_capture, "--out", tmp_path / "fit.json", *args)
    assert r.code == 2 and "Traceback" not in r.err
    assert re.search(message, r.err), r.err
    assert not (tmp_path / "fit.json").exists()
