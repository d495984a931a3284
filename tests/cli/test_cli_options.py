"""The data, image and runtime options shared by capture, calibrate and verify (onnxcal/cli/options.py)."""

import json

from conftest import (
    BELT_CLASSES,
    BELT_IMAGES,
    BELT_MODEL,
    DEMO_MODEL,
    DEMO_VAL,
    TICKETS,
    TICKETS_LABELS,
    TICKETS_MODEL,
)


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
        r = run_cli("capture", DEMO_MODEL, "--data", DEMO_VAL, "--shard", f"{i}/2", "--out", tmp_path / f"{i}.npz",
                    "-q")
        assert r.code == 0, r.err
    r = run_cli("fit", tmp_path / "1.npz", tmp_path / "2.npz", "--json", "--bootstrap", "0")
    assert r.code == 0, r.err
    whole = run_cli("fit", tmp_path / "1.npz", "--json", "--bootstrap", "0")
    assert json.loads(r.out)["capture"]["n"] == 2000 and json.loads(whole.out)["capture"]["n"] == 1000
    r = run_cli("fit", tmp_path / "1.npz", tmp_path / "1.npz")
    assert r.code == 2 and "both hold row 0" in r.err
