"""Reports: the files, what they contain, the plots, and the variants by kind of model."""

import base64
import json
import os
import re
import shutil
import signal
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from conftest import DEMO_MODEL, DEMO_TEST, DEMO_VAL, FIXTURES, files_in
from PIL import Image

from onnxcal import api
from onnxcal.fit import FitOptions
from onnxcal.metrics import METRIC_FIELDS, evaluate
from onnxcal.report import AFTER_COLOUR, BEFORE_COLOUR, CAUTIONS, PLOT_PIXELS, PLOTS

CLASSES = FIXTURES / "conveyor_faults_classes.txt"
EXPORTERS = FIXTURES / "exporters"
ALL_FILES = {"report.html", "summary.md", "report.json", *(f"{p}.png" for p in PLOTS)}


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """The demo calibrated through the CLI with --report, plus its capture and FIT.json."""
    from onnxcal.cli import main

    d = tmp_path_factory.mktemp("report")
    code = main(["calibrate", str(DEMO_MODEL), "--data", str(DEMO_VAL), "--out", str(d / "calibrated.onnx"),
                 "--report", str(d / "report"), "--classes", str(CLASSES), "--bootstrap", "50", "-q"])
    assert code == 0
    cap = api.capture(DEMO_MODEL, DEMO_VAL, out=d / "scores.npz")
    api.fit(cap, out=d / "fit.json", options=FitOptions(bootstrap=50))
    return d


def _content(directory: Path) -> dict:
    def refuse(name):  # report.json must be strict JSON: no NaN or Infinity
        raise ValueError(name)

    return json.loads((directory / "report.json").read_text(), parse_constant=refuse)


class _Page(HTMLParser):
    """Tags, attributes and visible text of an HTML page (standard library html.parser)."""

    def __init__(self):
        super().__init__()
        self.tags, self.attrs, self.text, self.open = [], [], [], []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        self.attrs.append((tag, dict(attrs)))
        if tag not in ("meta", "img", "br"):
            self.open.append(tag)

    def handle_endtag(self, tag):
        assert self.open and self.open[-1] == tag, f"</{tag}> closes <{self.open[-1] if self.open else None}>"
        self.open.pop()

    def handle_data(self, data):
        self.text.append(data)


def _page(path: Path) -> _Page:
    page = _Page()
    page.feed(path.read_text())
    page.close()
    return page


def test_calibrate_report_writes_every_file(demo):
    assert {p.name for p in (demo / "report").iterdir()} == ALL_FILES


def test_html_is_well_formed_and_self_contained(demo):
    page = _page(demo / "report" / "report.html")
    assert page.open == []  # every element closed, in order
    assert "style" in page.tags and "script" not in page.tags and "link" not in page.tags
    for tag, attrs in page.attrs:
        for key in ("src", "href"):
            if key in attrs:
                assert attrs[key].startswith(("data:", "#")), (tag, attrs[key][:40])
    # The embedded images are the PNG files, byte for byte.
    images = [a["src"] for t, a in page.attrs if t == "img"]
    assert len(images) == len(PLOTS)
    files = {(demo / "report" / f"{p}.png").read_bytes() for p in PLOTS}
    embedded = {base64.b64decode(src.split(",", 1)[1]) for src in images}
    assert all(src.startswith("data:image/png;base64,") for src in images) and embedded == files


def test_html_shows_every_number_of_report_json(demo):
    content = _content(demo / "report")
    text = " ".join(_page(demo / "report" / "report.html").text)
    m = content["metrics"]
    assert m["basis"] == "held-out" and m["after_interval"] and m["fit_part"]
    for key in METRIC_FIELDS:
        for part in ("before", "after"):
            assert f"{m[part][key]:.4f}" in text, (part, key)
            assert f"{m['fit_part'][part][key]:.4f}" in text, ("fit part", part, key)
        low, high = m["after_interval"][key]
        assert f"{low:.4f} to {high:.4f}" in text, key
    c = content["calibration"]
    assert f"{c['temperature']:.4f}" in text
    assert "{:.4f} to {:.4f}".format(*c["interval"]["temperature"]) in text
    assert content["model"]["sha256"] in text and content["calibrated_model"]["sha256"] in text
    assert content["model"]["name"] in text and str(content["data"]["n"]) in text
    for entry in content["data"]["balance"]:
        assert entry["name"] in text and str(entry["count"]) in text
    for line in content["verdict"] + content["notes"]:
        assert line in text
    assert "Cautions" in text and all(c in text for c in CAUTIONS)
    assert "licensed" in text and "validation set" in text
    assert content["verification"]["passed"] and "Verification passed" in text


def test_report_json_holds_the_fit_and_the_verification(demo):
    content = _content(demo / "report")
    fit = json.loads((demo / "fit.json").read_text())
    # The same capture and fit options: the held-out headline of FIT.json, redrawn.
    for key in ("nll", "ece", "brier", "accuracy"):
        assert content["metrics"]["before"][key] == pytest.approx(fit["metrics"]["before"][key], rel=1e-12)
        assert content["metrics"]["after"][key] == pytest.approx(fit["metrics"]["after"][key], rel=1e-12)
    assert content["calibration"]["temperature"] == pytest.approx(fit["temperature"], rel=1e-12)
    assert content["data"]["class_names"] == CLASSES.read_text().split()
    counts = np.bincount(np.load(DEMO_VAL)["labels"], minlength=5)
    assert [b["count"] for b in content["data"]["balance"]] == counts.tolist()
    rel = content["reliability"]
    assert sum(rel["before"]["counts"]) == sum(rel["after"]["counts"]) == content["metrics"]["before"]["n"]
    # The diagram's binned error is the table's ECE (top-label, same bins).
    assert rel["after"]["error"] == pytest.approx(content["metrics"]["after"]["ece"], rel=1e-9)
    assert {c["name"] for c in content["verification"]["checks"]} >= {"reference", "argmax", "record"}


def test_plots_are_non_blank_and_of_the_expected_size(demo):
    for name in PLOTS:
        image = Image.open(demo / "report" / f"{name}.png")
        assert image.format == "PNG" and image.size == PLOT_PIXELS
        pixels = np.asarray(image.convert("RGB"), dtype=np.float64)
        assert pixels.var() > 0
        # Both series are drawn in their (Okabe-Ito) colours.
        for colour in (BEFORE_COLOUR, AFTER_COLOUR):
            rgb = np.array([int(colour[i : i + 2], 16) for i in (1, 3, 5)])
            assert (np.abs(pixels - rgb).sum(axis=2) < 30).sum() > 500, (name, colour)


def test_summary_md_has_the_before_after_table(demo):
    content = _content(demo / "report")
    lines = (demo / "report" / "summary.md").read_text().splitlines()
    start = next(i for i, line in enumerate(lines) if line.startswith("| metric | before | after"))
    assert re.fullmatch(r"\|---\|(---:\|)+", lines[start + 1])
    rows = [line.strip("|").split("|") for line in lines[start + 2 : start + 2 + len(METRIC_FIELDS)]]
    assert len(rows) == len(METRIC_FIELDS)
    for key, row in zip(METRIC_FIELDS, rows, strict=True):
        cells = [c.strip() for c in row]
        assert cells[1] == f"{content['metrics']['before'][key]:.4f}"
        assert cells[2] == f"{content['metrics']['after'][key]:.4f}"
        assert "to" in cells[3]  # the 95% interval
    text = "\n".join(lines)
    assert "T = " in text and "95% interval" in text
    assert all(f"- {v}" in text for v in content["verdict"]) and "Cautions" in text


def test_format_selects_the_outputs(demo, tmp_path, run_cli):
    r = run_cli("report", demo / "scores.npz", "--fit", demo / "fit.json", "--out", tmp_path / "r", "--format",
                "md,json")
    assert r.code == 0, r.err
    assert {p.name for p in (tmp_path / "r").iterdir()} == {"summary.md", "report.json"}
    assert "validation set" in r.out  # the caution


def test_report_from_the_patched_model_and_from_a_given_temperature(demo, tmp_path):
    via_model = api.report(demo / "scores.npz", tmp_path / "m", model=demo / "calibrated.onnx", formats="json")
    assert via_model.content["metrics"]["basis"] == "held-out"
    assert via_model.content["calibrated_model"]["name"] == "calibrated.onnx"
    t = 2.5
    given = api.report(demo / "scores.npz", tmp_path / "t", temperature=t, formats=["json"])
    c = given.content
    assert c["metrics"]["basis"] == "given" and c["calibration"]["given"] and c["metrics"]["after_interval"] is None
    data = np.load(demo / "scores.npz")
    expected = evaluate(data["logits"], data["labels"], t)
    assert c["metrics"]["after"]["ece"] == pytest.approx(expected.ece, rel=1e-12)
    assert c["metrics"]["before"]["n"] == 2000


def test_report_on_another_capture_uses_every_sample(demo, tmp_path):
    # The test split was not used by the fit: all of it is scored with the baked-in T.
    cap = api.capture(DEMO_MODEL, DEMO_TEST, out=tmp_path / "test.npz")
    result = api.report(tmp_path / "test.npz", tmp_path / "r", fit=demo / "fit.json", formats="json")
    m = result.content["metrics"]
    assert m["basis"] == "other data" and m["after_interval"] is None and m["fit_part"] is None
    fit = json.loads((demo / "fit.json").read_text())
    assert m["after"]["nll"] == pytest.approx(evaluate(cap.logits, cap.labels, fit["temperature"]).nll, rel=1e-12)
    assert any("other than the one the fit was made on" in n for n in [m["description"]])


def test_several_capture_files_are_one_set(demo, tmp_path):
    val, test = tmp_path / "val.npz", tmp_path / "test.npz"
    a, b = api.capture(DEMO_MODEL, DEMO_VAL, out=val), api.capture(DEMO_MODEL, DEMO_TEST, out=test)
    result = api.report([val, test], tmp_path / "r", temperature=2.0, formats="json")
    assert result.content["data"]["n"] == len(a.logits) + len(b.logits)
    logits, labels = np.concatenate([a.logits, b.logits]), np.concatenate([a.labels, b.labels])
    assert result.content["metrics"]["after"]["nll"] == pytest.approx(evaluate(logits, labels, 2.0).nll, rel=1e-12)


@pytest.mark.parametrize(
    "model, data, kind",
    [("belt_tear_sigmoid_op17.onnx", "belt_tear_sigmoid_op17_val.npz", "binary"),
     ("belt_faults_multilabel_op17.onnx", "belt_faults_multilabel_op17_val.npz", "multilabel")],
)
def test_binary_and_multilabel_variants(tmp_path, model, data, kind):
    result = api.calibrate(EXPORTERS / model, EXPORTERS / data, tmp_path / "p.onnx", report=tmp_path / "r",
                           options=FitOptions(bootstrap=20))
    c = result.report.content
    assert c["data"]["kind"] == kind and c["reliability"]["before"]["quantity"] == "positive"
    k = c["data"]["num_classes"]
    assert len(c["reliability"]["after"]["class_error"]) == k
    # The per-label errors average to the classwise ECE of the table.
    assert np.mean(c["reliability"]["after"]["class_error"]) == pytest.approx(c["metrics"]["after"]["classwise_ece"],
                                                                              rel=1e-9)
    if kind == "binary":
        assert [b["name"] for b in c["data"]["balance"]] == ["positive class absent (0)", "positive class present (1)"]
    text = " ".join(_page(tmp_path / "r" / "report.html").text)
    assert "label" in text
    for name in PLOTS:
        image = Image.open(tmp_path / "r" / f"{name}.png")
        assert image.size == PLOT_PIXELS and np.asarray(image.convert("L")).var() > 0


def test_many_classes_show_the_worst(tmp_path, rng):
    from onnxcal.capture import Capture, CaptureMeta
    from onnxcal.report import MAX_CLASS_BARS

    k, n = 60, 600
    logits = rng.normal(scale=4, size=(n, k)).astype(np.float32)
    labels = rng.integers(0, k, n)
    meta = CaptureMeta("0" * 64, "wide.onnx", "y", "y", None, 1, k, n, "wide.npz")
    result = api.report(Capture(logits, labels, meta), tmp_path / "r", temperature=3.0)
    assert MAX_CLASS_BARS < k and len(result.content["reliability"]["before"]["class_error"]) == k
    image = Image.open(tmp_path / "r" / "classes.png")
    assert image.size == PLOT_PIXELS and np.asarray(image.convert("L")).var() > 0
    # With a given T the data are still checked: 10 samples per class is too few.
    assert any("samples per class" in w for w in result.content["warnings"])


BAD_REPORT = [
    ([], "exactly one of --temperature, --fit and --model"),
    (["--temperature", "2", "--fit", "FIT"], "exactly one of"),
    (["--temperature", "0"], "not a positive finite number"),
    (["--temperature", "2", "--format", "pdf"], "--format 'pdf' is not a comma-separated list"),
    (["--temperature", "2", "--classes", "THREE"], "give 3 names for a model with 5 logit"),
    (["--temperature", "2", "--bins", "1"], "--bins 1 is out of range: give a number of bins from 2 to 100000"),
    (["--model", "DEMO"], "has no onnxcal calibration record"),
    (["--fit", "OTHERFIT"], "was made for the model with sha256"),
]


@pytest.mark.parametrize("args, message", BAD_REPORT, ids=[str(i) for i in range(len(BAD_REPORT))])
def test_bad_report_input(demo, tmp_path, run_cli, rng, args, message):
    from conftest import random_mlp, save_model

    (tmp_path / "three.txt").write_text("a\nb\nc\n")
    other = save_model(random_mlp(rng, d=16, k=5), tmp_path / "other.onnx")
    x = np.load(DEMO_VAL)
    np.savez(tmp_path / "other.npz", x=x["band_energies"], labels=x["labels"])
    api.fit(api.capture(other, tmp_path / "other.npz"), out=tmp_path / "other_fit.json",
            options=FitOptions(bootstrap=0))
    swap = {"FIT": demo / "fit.json", "THREE": tmp_path / "three.txt", "DEMO": DEMO_MODEL,
            "OTHERFIT": tmp_path / "other_fit.json"}
    before = files_in(tmp_path)
    r = run_cli("report", demo / "scores.npz", "--out", tmp_path / "r", *[swap.get(a, a) for a in args])
    assert r.code == 2 and "Traceback" not in r.err
    assert re.search(message, r.err), r.err
    assert files_in(tmp_path) == before and not (tmp_path / "r").exists()


def test_existing_report_files_need_force(demo, tmp_path, run_cli):
    args = ["report", demo / "scores.npz", "--temperature", "2", "--out", tmp_path / "r"]
    assert run_cli(*args).code == 0
    first = files_in(tmp_path / "r")
    r = run_cli(*args[:-2], "--temperature", "3", "--out", tmp_path / "r")
    assert r.code == 2 and "already exists" in r.err and files_in(tmp_path / "r") == first
    assert run_cli(*args, "--force").code == 0
    r = run_cli("report", demo / "scores.npz", "--temperature", "2", "--out", tmp_path / "missing" / "r")
    assert r.code == 2 and "does not exist" in r.err


# --------------------------------------------------------------------------
# The HTML in a real browser (optional: needs Debian's chromium)

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")


@pytest.mark.skipif(CHROMIUM is None, reason="chromium is not installed (apt-get install chromium); "
                    "the browser rendering of report.html is not checked")
def test_report_renders_in_headless_chromium(demo, tmp_path):
    shot = tmp_path / "report.png"
    profile = tmp_path / "profile"
    profile.mkdir()
    cmd = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
           "--disable-background-networking", "--disable-component-update", "--disable-sync",
           f"--user-data-dir={profile}", "--window-size=1100,2600", f"--screenshot={shot}",
           (demo / "report" / "report.html").resolve().as_uri()]
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, start_new_session=True)
    try:
        _, err = proc.communicate(timeout=90)
    except subprocess.TimeoutExpired:
        os.killpg(proc.pid, signal.SIGKILL)  # the browser and the helpers it started
        proc.communicate()
        pytest.fail("chromium did not finish within 90 s")
    assert shot.exists(), err.decode(errors="replace")[-500:]
    pixels = np.asarray(Image.open(shot).convert("RGB"), dtype=np.float64)
    assert pixels.shape[:2] == (2600, 1100) and pixels.var() > 0
    # The embedded plots were drawn: the after-calibration blue fills a good area.
    rgb = np.array([int(AFTER_COLOUR[i : i + 2], 16) for i in (1, 3, 5)])
    assert (np.abs(pixels - rgb).sum(axis=2) < 40).sum() > 2000
