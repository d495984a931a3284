"""The entry point: exit status, one line for every ending, no traceback, nothing written (onnxcal/cli/app.py)."""

import json
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import onnx
import pytest
from conftest import DEMO_MODEL, files_in, identity_model, onehot_int_model, random_mlp, save_model


def test_console_script_runs(tmp_path):
    # The installed entry point, as a user would call it (beside this interpreter).
    exe = Path(sys.executable).with_name("onnxcal")
    cmd = [str(exe)] if exe.exists() else [sys.executable, "-m", "onnxcal"]
    r = subprocess.run(cmd + ["inspect", str(DEMO_MODEL), "--json"], capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    assert json.loads(r.stdout)["opset"] == 17
    r = subprocess.run(cmd + ["inspect", str(tmp_path / "missing.onnx")], capture_output=True, text=True)
    assert r.returncode == 2 and "Traceback" not in r.stderr


def test_version(run_cli):
    from onnxcal import __version__

    r = run_cli("--version")
    assert r.code == 0 and r.out.strip() == f"onnxcal {__version__}"


def test_usage_error_exits_2(run_cli):
    r = run_cli("patch")
    assert r.code == 2


def test_verify_help_documents_the_exit_codes(run_cli):
    r = run_cli("verify", "--help")
    assert r.code == 0
    text = " ".join(r.out.split())
    assert "0 every check passed" in text and "1 a check failed" in text and "2 bad input" in text
    for option in ("--max-ece", "--max-nll", "--min-accuracy", "--latency", "--max-latency-ratio", "--junit",
                   "--scores"):
        assert option in text


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
    (["calibrate", "identity.onnx", "--data", "nan.npz", "--out", "o.onnx", "-q"],
     "NaN or Inf in 4 of 20 rows .first rows: 2, 5, 7, 11"),
    (["patch", "model.onnx", "--temperature", "2", "--out", "model.onnx"], "is the input file"),
    (["patch", "model.onnx", "--temperature", "2", "--out", "./sub/../model.onnx"], "is the input file"),
    (["calibrate", "model.onnx", "--data", "val.npz", "--out", "missing_dir/o.onnx"],
     "output directory .* does not exist"),
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


# --------------------------------------------------------------------------
# Bad data options on the command line


DATA_BAD = [
    (["capture", "model.onnx", "--data", "val.npz", "--out", "c.npz", "--shard", "0/3"], "--shard 0/3 is out of range"),
    (["capture", "model.onnx", "--input", "x", "--out", "c.npz"], "--input 'x' is not of the form NAME=FILE.npy"),
    (["capture", "model.onnx", "--out", "c.npz"], "no validation data given; pass --data PATH or --input"),
    (["capture", "model.onnx", "--data", "val.npz", "--resize", "8", "--out", "c.npz"],
     "--resize applies to image folders only"),
    (["calibrate", "model.onnx", "--data", "val.npz", "--provider", "Nope", "--out", "o.onnx"],
     "--provider Nope is not available"),
    (["calibrate", "model.onnx", "--data", "val.npz", "--optimization", "max", "--out", "o.onnx"],
     "--optimization 'max'"),
    (["capture", "model.onnx", "--data", "bad.csv", "--out", "c.npz"],
     "line 3, column 'b' .* holds 'oops', not a number"),
    (["verify", "model.onnx", "--data", "val.npz", "--limit", "0"],
     "--limit 0 is out of range: give a number of samples of at least 1"),
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
