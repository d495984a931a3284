"""verify as a CI gate: exit codes, thresholds, JUnit, references without the original; docs/ci.md run as
written (onnxcal/cli/commands.py, the verify command)."""

import json
import re
import shlex
import subprocess
import sys
import sysconfig
from pathlib import Path

import numpy as np
import onnx
import pytest
from conftest import DEMO_MODEL, DEMO_TEST, DEMO_VAL, ROOT, files_in, save_model
from onnx import numpy_helper

from onnxcal import graph


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
    ("latency", lambda g, t: [g / "calibrated.onnx", "--max-latency-ratio", "1e-6", "--latency-runs", "3"],
     {"latency"}),
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
    assert suite.get("skipped") == "1"
    assert [c.get("name") for c in suite.iter("testcase") if c.find("skipped") is not None] == ["source"]
    r = run_cli("verify", gate / "orphan.onnx", "--data", DEMO_TEST)  # the table and notes (not -q)
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


# --------------------------------------------------------------------------
# docs/ci.md, run as written


def _ci_blocks() -> list[tuple[str, str]]:
    """(kind, body) of each example block of docs/ci.md, in order.

    The blocks are marked with HTML comments (invisible when rendered):
    ``run`` is run in the repository root, ``file PATH`` is written to PATH,
    ``job`` is the CI job, run line by line as written: a fresh venv, onnxcal
    installed into it from ``$ONNXCAL_SOURCE`` (this checkout), the CI step.
    """
    text = (ROOT / "docs" / "ci.md").read_text()
    return re.findall(r"<!-- ci-example: (.+?) -->\n```sh\n(.*?)```", text, re.S)


def test_ci_example_works_as_written(tmp_path):
    import os
    import xml.etree.ElementTree as ET

    blocks = _ci_blocks()
    assert [k for k, _ in blocks] == ["run", "run", "file ci/calibration.env", "file ci/check-calibration.sh", "job"]
    (tmp_path / "fixtures").symlink_to(DEMO_MODEL.parent)
    env = {**os.environ, "PATH": f"{Path(sys.executable).parent}{os.pathsep}{os.environ['PATH']}"}

    def bash(script):
        return subprocess.run(["bash", "-c", script], cwd=tmp_path, env=env, capture_output=True, text=True,
                              timeout=300)

    for kind, body in blocks:
        if kind == "run":
            r = bash("set -euo pipefail\n" + body)
            assert r.returncode == 0, r.stderr
        elif kind.startswith("file "):
            (tmp_path / kind.split(" ", 1)[1]).write_text(body)
        else:
            venv, install, job = body.splitlines()
    assert venv == "python3 -m venv .venv" and job.startswith("PATH=")
    # without ONNXCAL_SOURCE the install line stops, naming it (it never installs a bare name from an index)
    r = bash(install)
    assert r.returncode != 0 and "ONNXCAL_SOURCE: set it to a checkout of onnxcal or a pinned wheel file" in r.stderr
    assert bash(venv).returncode == 0
    # onnxcal's dependencies come from this test's environment (a .pth file), so the test downloads no
    # numpy or onnxruntime; onnxcal itself is built and installed from the checkout by the line as written
    job_python = tmp_path / ".venv" / "bin" / "python"
    purelib = "import sysconfig; print(sysconfig.get_paths()['purelib'])"
    site = Path(subprocess.run([job_python, "-c", purelib], capture_output=True, text=True, check=True).stdout.strip())
    (site / "_onnxcal_test_dependencies.pth").write_text(sysconfig.get_paths()["purelib"] + "\n")
    r = bash(f"export ONNXCAL_SOURCE={shlex.quote(str(ROOT))}\n{install}")
    assert r.returncode == 0, r.stderr
    assert (tmp_path / ".venv" / "bin" / "onnxcal").is_file()
    env["PATH"] = os.environ["PATH"]  # the job's onnxcal is the one on PATH, not this test's
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
