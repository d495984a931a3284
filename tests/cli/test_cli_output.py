"""What the commands print (onnxcal/cli/console.py, render.py, commands.py): tables that never cut
a figure or a name, prose wrapped at word boundaries on a terminal, --quiet, the caution once, the
help, the grammar of the lines.

A terminal is simulated with rich's TTY_COMPATIBLE=1 and its width with COLUMNS (rich reads both
when the console is made, once per run); without them the output is a pipe's.
"""

from __future__ import annotations

import io
import json
import re
from pathlib import Path

import pytest
from conftest import DEMO_MODEL, DEMO_TEST, DEMO_VAL

from onnxcal.cli import console
from onnxcal.cli.app import COMMANDS
from onnxcal.cli.defaults import METHODS

ANSI = re.compile(r"\x1b\[[0-9;?]*[A-Za-z]")
FIGURE = re.compile(r"-?\d+\.\d{3,}")


@pytest.fixture(scope="module")
def capture_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    from onnxcal import api

    path = tmp_path_factory.mktemp("out") / "cap.npz"
    api.capture(DEMO_MODEL, DEMO_VAL, out=path)
    return path


def _terminal(monkeypatch: pytest.MonkeyPatch, columns: int) -> None:
    monkeypatch.setenv("TTY_COMPATIBLE", "1")
    monkeypatch.setenv("COLUMNS", str(columns))
    monkeypatch.setenv("NO_COLOR", "1")


def test_piped_tables_are_plain_full_width_and_never_cut(capture_file, run_cli, monkeypatch):
    monkeypatch.setenv("COLUMNS", "40")  # a pipe ignores the width
    r = run_cli("fit", capture_file, "--bootstrap", "20")
    assert r.code == 0, r.err
    assert "…" not in r.out and all(line == line.rstrip() for line in r.out.splitlines())
    header = next(line for line in r.out.splitlines() if line.startswith("metric"))
    assert "after: 95% interval" in header and "fit part before" in header and "fit part after" in header
    summary = json.loads(run_cli("fit", capture_file, "--bootstrap", "20", "--json").out)
    nll = next(line for line in r.out.splitlines() if line.startswith("NLL "))
    before, after = summary["metrics"]["before"]["nll"], summary["metrics"]["after"]["nll"]
    assert nll.split()[1:3] == [f"{before:.4f}", f"{after:.4f}"]  # whole figures, in their columns
    r = run_cli("inspect", DEMO_MODEL)
    assert re.search(r"^input +band_energies +float32 +\[batch, 16\]$", r.out, re.M), r.out
    # a long path stays on one line, untruncated
    assert f"{DEMO_MODEL}  (opset" in r.out


def test_narrow_terminal_stacks_the_table_with_every_figure_whole(capture_file, run_cli, monkeypatch):
    piped = run_cli("fit", capture_file, "--bootstrap", "20")
    _terminal(monkeypatch, 44)
    r = run_cli("fit", capture_file, "--bootstrap", "20")
    assert r.code == 0, r.err
    text = ANSI.sub("", r.out)
    assert "…" not in text
    assert max(len(line) for line in text.splitlines()) <= 44
    assert sorted(FIGURE.findall(piped.out)) == sorted(FIGURE.findall(text))
    assert "  fit part after: " in text  # the stacked layout names each cell


def test_wide_terminal_draws_a_table_and_names_stay_whole(run_cli, monkeypatch):
    _terminal(monkeypatch, 120)
    text = ANSI.sub("", run_cli("inspect", DEMO_MODEL).out)
    assert re.search(r"│ input +│ band_energies +│ float32 +│ \[batch, 16\] +│", text), text
    _terminal(monkeypatch, 30)
    text = ANSI.sub("", run_cli("inspect", DEMO_MODEL).out)
    assert "band_energies" in text and "[batch, 16]" in text and "…" not in text


def test_prose_wraps_at_word_boundaries_on_a_terminal_and_keeps_paths_whole() -> None:
    from rich.console import Console

    buffer = io.StringIO()
    console.out._console = Console(file=buffer, width=30, force_terminal=True, color_system=None)
    path = "/a/very/long/path/that/is/wider/than/the/terminal.onnx"
    text = f"note: the reference is recomputed from {path} and checked, row by row"
    try:
        console.say(text)
    finally:
        console.reset()
    lines = buffer.getvalue().splitlines()
    assert len(lines) > 2 and "  " + path in lines  # the path alone on its line, not broken
    assert all(len(line) <= 30 for line in lines if path not in line)
    assert " ".join(" ".join(lines).split()) == text  # no word split, nothing lost
    assert all(line.startswith("  ") for line in lines[1:])  # following lines indented


def test_quiet_prints_the_result_line_and_the_verdict(tmp_path, run_cli):
    out = tmp_path / "c.onnx"
    r = run_cli("calibrate", DEMO_MODEL, "--data", DEMO_VAL, "--out", out, "-q", "--bootstrap", "10")
    assert r.code == 0, r.err
    (line,) = r.out.splitlines()  # one line: the fitted map and what was written
    assert line.startswith("temperature scaling, softmax(z / T): T = ")
    assert line.endswith(f"; wrote {out} (calibrated output 'probabilities')")
    assert r.err == ""
    r = run_cli("verify", out, "--data", DEMO_TEST, "-q")
    assert r.code == 0 and r.out == "verify: all checks passed\n" and r.err == ""
    r = run_cli("fit", tmp_path / "missing.npz", "-q")
    assert r.code == 2 and r.out == ""
    cap = tmp_path / "cap.npz"
    r = run_cli("capture", DEMO_MODEL, "--data", DEMO_VAL, "--out", cap, "-q")
    assert r.out.splitlines() == [f"captured 2000 x 5 logits from 'logits' -> {cap}"] and r.err == ""
    r = run_cli("fit", cap, "-q", "--bootstrap", "10")
    assert len(r.out.splitlines()) == 1 and r.out.startswith("temperature scaling") and r.err == ""
    r = run_cli("report", cap, "--out", tmp_path / "rep", "--temperature", "2", "--format", "json", "-q")
    assert r.out == f"wrote 1 report file to {tmp_path / 'rep'}: report.json\n"  # and its grammar


def _bars(err: str) -> dict[str, str]:
    """The progress lines on stderr by stage: {"bootstrap": "20/20 ...", ...}."""
    lines = [ANSI.sub("", line) for line in err.splitlines()]
    found = {}
    stages = "capturing logits|fitting|bootstrap|running patched model|writing the report"
    for line in lines:
        m = re.match(rf"^({stages})\s+\S*\s+(\d+/\d+.*)$", line)
        if m:
            found[m.group(1)] = m.group(2)
    return found


def test_fit_shows_its_stages_and_counts_the_bootstrap_on_stderr(capture_file, run_cli, tmp_path):
    # stderr is not a terminal here: each bar is printed once, complete, as for capture
    r = run_cli("fit", capture_file, "--bootstrap", "20")
    assert r.code == 0, r.err
    bars = _bars(r.err)
    assert bars["bootstrap"].startswith("20/20 ")  # (its rate, replicates/s, when rich could time it)
    assert bars["fitting"].startswith("3/3")
    assert "samples/s" not in r.err  # a fit counts replicates and passes, not samples
    assert not _bars(r.out) and "━" not in r.out  # progress goes to stderr only
    r = run_cli("calibrate", DEMO_MODEL, "--data", DEMO_VAL, "--out", tmp_path / "c.onnx", "--bootstrap", "7",
                "--report", tmp_path / "rep")
    bars = _bars(r.err)
    assert bars["capturing logits"].startswith("2000/2000") and bars["bootstrap"].startswith("7/7 ")
    assert list(bars)[:3] == ["capturing logits", "fitting", "bootstrap"]
    assert bars["writing the report"].startswith("1/1")
    for quiet in (["-q"], ["--json"]):  # no progress at all
        r = run_cli("fit", capture_file, "--bootstrap", "20", *quiet)
        assert r.code == 0 and r.err == "", r.err


def test_report_shows_its_writing_on_stderr(capture_file, run_cli, tmp_path):
    r = run_cli("report", capture_file, "--out", tmp_path / "rep", "--temperature", "2")
    assert r.code == 0, r.err
    assert _bars(r.err)["writing the report"].startswith("1/1") and not _bars(r.out)
    r = run_cli("report", capture_file, "--out", tmp_path / "rep2", "--temperature", "2", "-q")
    assert r.code == 0 and r.err == "", r.err


def test_fit_progress_on_a_terminal_is_redrawn_on_stderr(capture_file, run_cli, monkeypatch):
    _terminal(monkeypatch, 100)
    r = run_cli("fit", capture_file, "--bootstrap", "20")
    assert r.code == 0, r.err
    assert "bootstrap" in r.err and "20/20" in ANSI.sub("", r.err)
    assert not _bars(r.out) and "━" not in r.out  # not on stdout
    r = run_cli("fit", capture_file, "--bootstrap", "20", "-q")
    assert r.err == "", r.err


def test_the_caution_is_printed_once_where_probabilities_are_produced_or_judged(tmp_path, run_cli):
    caution = "Calibration holds only for data like the validation set"
    out, cap = tmp_path / "c.onnx", tmp_path / "cap.npz"
    r = run_cli("calibrate", DEMO_MODEL, "--data", DEMO_VAL, "--out", out, "--bootstrap", "10",
                "--report", tmp_path / "rep")
    assert r.out.count(caution) == 1
    assert run_cli("verify", out, "--data", DEMO_TEST).out.count(caution) == 1
    assert run_cli("capture", DEMO_MODEL, "--data", DEMO_VAL, "--out", cap).out.count(caution) == 0
    assert run_cli("fit", cap, "--bootstrap", "10").out.count(caution) == 1
    assert run_cli("report", cap, "--out", tmp_path / "r2", "--temperature", "2").out.count(caution) == 1
    assert run_cli("patch", DEMO_MODEL, "--temperature", "2", "--out", tmp_path / "p.onnx").out.count(caution) == 0
    assert run_cli("inspect", out).out.count(caution) == 0


@pytest.mark.parametrize("command", ["", *COMMANDS])
def test_help_shows_forms_and_choices_not_python_types(run_cli, monkeypatch, command):
    monkeypatch.setenv("COLUMNS", "200")
    r = run_cli(*([command] if command else []), "--help")
    assert r.code == 0, r.err
    assert not re.search(r"<[a-z]|[{}]|\blist\[|int range", r.out), r.out
    assert not re.search(r"--[a-z-]+ [A-Z_]{3,}_[A-Z]", r.out), r.out  # OUT_PATH and the like
    if command in ("capture", "verify", "calibrate"):
        for heading in ("Data options:", "Image preprocessing options:", "Runtime options:", "Output options:"):
            assert heading in r.out, heading
        assert "--optimization disable|basic|extended|all" in r.out
        assert "--interpolation nearest|bilinear|bicubic|lanczos" in r.out
    if command in ("fit", "calibrate"):
        assert "--method METHOD" in r.out and "--multilabel shared|per-label" in r.out
        flat = " ".join(r.out.split())
        for method in (*METHODS, "auto"):  # each choice is listed in the help
            assert f" {method} " in flat or f" {method} (" in flat or f" {method}," in flat, method


@pytest.mark.parametrize("command", ["", *COMMANDS])
@pytest.mark.parametrize("columns", [60, 120])
def test_help_lines_fit_the_terminal(run_cli, monkeypatch, command, columns):
    # a line wider than the terminal is broken by the terminal wherever it falls, mid-word
    monkeypatch.setenv("COLUMNS", str(columns))
    r = run_cli(*([command] if command else []), "--help")
    assert r.code == 0, r.err
    assert max(len(line) for line in r.out.splitlines()) <= columns, r.out


@pytest.mark.parametrize("command", ["", *COMMANDS])
def test_help_shows_no_range_hints(run_cli, monkeypatch, command):
    # typer adds "[x>=1]" to an option declared with min=; the help says the range in words instead
    monkeypatch.setenv("COLUMNS", "120")
    r = run_cli(*([command] if command else []), "--help")
    assert r.code == 0, r.err
    assert not re.search(r"\bx\s*[<>]=|[<>]=\s*x\b", r.out), r.out
    if command in ("capture", "verify", "calibrate"):
        assert "1 to 16777216" in " ".join(r.out.split())  # --batch-size's range, in words


def test_range_checks_stay_when_the_hints_go(run_cli, tmp_path):
    r = run_cli("calibrate", DEMO_MODEL, "--data", DEMO_VAL, "--out", tmp_path / "c.onnx", "--verify-rows", "0")
    assert r.code == 2 and "--verify-rows" in r.err and not (tmp_path / "c.onnx").exists()
    r = run_cli("capture", DEMO_MODEL, "--data", DEMO_VAL, "--out", tmp_path / "c.npz", "--batch-size", "0")
    assert r.code == 2 and "--batch-size" in r.err
    r = run_cli("capture", DEMO_MODEL, "--data", DEMO_VAL, "--out", tmp_path / "c.npz", "--threads", "-1")
    assert r.code == 2 and "--threads" in r.err


def test_command_summaries_are_whole_and_debug_goes_anywhere(run_cli, monkeypatch):
    monkeypatch.setenv("COLUMNS", "200")
    r = run_cli("--help")
    flat = " ".join(r.out.split())
    assert "verify Check a patched model, e.g. for a CI gate; each check is reported with its figure." in flat
    assert "inspect Show a model's inputs, outputs, opset, class-score output and calibration record." in flat
    assert "..." not in r.out.split("Commands:")[1]  # no summary cut short
    assert "--debug Show the traceback behind an error (may go anywhere on the line)." in flat
    r = run_cli("verify", "--help", "--debug")  # accepted after the command too
    assert r.code == 0


def test_did_you_mean_reads_as_a_sentence(run_cli):
    r = run_cli("calibrat")
    assert r.code == 2
    assert r.err.strip() == "onnxcal: error: No such command 'calibrat'. Did you mean 'calibrate'? See 'onnxcal --help'"


def test_an_estimate_outside_its_interval_is_marked_and_explained(capture_file, run_cli):
    # as the report does (report/tables.py): the example, classwise ECE 0.0307 with 0.035 to 0.050
    from onnxcal.metrics import METRIC_LABELS

    data = json.loads(run_cli("fit", capture_file, "--json").out)
    after, intervals = data["metrics"]["after"], data["intervals"]["after"]
    outside = {k for k, pair in intervals.items() if pair and not pair[0] <= after[k] <= pair[1]}
    assert "classwise_ece" in outside  # the demo's case; the rest is checked against the JSON's own figures
    lines = run_cli("fit", capture_file).out.splitlines()
    for key, label in METRIC_LABELS.items():
        (row,) = [line for line in lines if line.startswith(label.format(bins=15) + "  ")]
        assert ("†" in row) == (key in outside), row
    notes = [line for line in lines if line.startswith("note: † The point estimate lies outside its own 95%")]
    assert len(notes) == 1 and "(classwise ECE)" in notes[0] and "biased upward" in notes[0]


@pytest.mark.parametrize(
    ("stages", "said"),
    [
        ([], " (fit stopped)"),
        (["capturing logits"], " (fit stopped while capturing logits)"),
        (["fitting", "bootstrap"], " (fit stopped during 'bootstrap')"),  # a stage named by a noun reads as one
        (["vector: bootstrap"], " (fit stopped during 'vector: bootstrap')"),
    ],
)
def test_the_interruption_line_names_the_stage_in_a_sentence(monkeypatch, stages, said):
    import importlib

    app = importlib.import_module("onnxcal.cli.app")  # the module (onnxcal.cli.app is also the typer app's name)
    monkeypatch.setattr(console, "stage", list(stages))
    assert app._what_stopped(["fit", "cap.npz"]) == said
