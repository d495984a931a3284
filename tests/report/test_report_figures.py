"""Reports a reviewer can trust: every number of a plot is a number of a table, named the same way;
a point estimate outside its own interval is footnoted; each bin of a reliability diagram has its
Wilson interval and is drawn as faint as its count is small."""

from __future__ import annotations

import copy
import json
import os
import re
import subprocess
import sys
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from conftest import DEMO_MODEL, DEMO_VAL, FIXTURES

from onnxcal import api
from onnxcal.data import DataSpec
from onnxcal.fit import FitOptions
from onnxcal.metrics import METRIC_LABELS, Z_95, wilson_interval
from onnxcal.report import render_html, render_markdown
from onnxcal.report.plots import figures
from onnxcal.report.tables import MARK, outside_interval

CLASSES = FIXTURES / "conveyor_faults_classes.txt"
EXPORTERS = FIXTURES / "exporters"
NUMBER = re.compile(r"-?\d+\.\d{4}\b")
PAIR = re.compile(r"([A-Za-z][A-Za-z ()0-9-]*?) = (-?\d+\.\d{4})\b")


# --------------------------------------------------------------------------
# The Wilson interval


def test_wilson_interval_against_scipy_and_the_formula():
    from scipy.stats import binomtest

    # Wilson 1927, JASA 22(158), pp. 209-212 (the score interval); Agresti & Coull 1998, eq. (2),
    # worked by hand for 5 of 10 at 95 %: centre (5 + z²/2)/(10 + z²) = 0.5,
    # half-width z/(10 + z²) sqrt(5·5/10 + z²/4) = 0.26341 -> 0.23659 to 0.76341.
    low, high = wilson_interval(np.array([5.0]), np.array([10.0]))
    z = 1.959963984540054
    half = z / (10 + z * z) * np.sqrt(25 / 10 + z * z / 4)
    assert (low[0], high[0]) == pytest.approx((0.5 - half, 0.5 + half), abs=1e-15)
    assert (low[0], high[0]) == pytest.approx((0.23659, 0.76341), abs=1e-5)
    # scipy's binomtest(...).proportion_ci(method="wilson") (a general-purpose reference library).
    k = np.array([0, 1, 3, 7, 50, 199, 200, 413, 414])
    n = np.array([1, 1, 10, 9, 100, 200, 200, 414, 414])
    low, high = wilson_interval(k.astype(float), n.astype(float))
    for i in range(len(k)):
        ci = binomtest(int(k[i]), int(n[i])).proportion_ci(confidence_level=0.95, method="wilson")
        assert (low[i], high[i]) == pytest.approx((ci.low, ci.high), abs=1e-12), (k[i], n[i])
    from scipy.stats import norm

    assert norm.ppf(0.975) == pytest.approx(Z_95, rel=1e-15)
    # An empty bin has no interval; k = n never gives an empty or out-of-range one.
    low, high = wilson_interval(np.array([0.0, 3.0]), np.array([0.0, 3.0]))
    assert np.isnan(low[0]) and np.isnan(high[0]) and 0 < low[1] < high[1] == 1.0


# --------------------------------------------------------------------------
# Reports of the three kinds of model


class _Tables(HTMLParser):
    """Every <table> of a page as a list of rows of cell texts (standard library html.parser)."""

    def __init__(self) -> None:
        super().__init__()
        self.tables: list[list[list[str]]] = []
        self.cell: list[str] | None = None

    def handle_starttag(self, tag: str, attrs: list) -> None:
        if tag == "table":
            self.tables.append([])
        elif tag == "tr":
            self.tables[-1].append([])
        elif tag in ("td", "th"):
            self.cell = []

    def handle_endtag(self, tag: str) -> None:
        if tag in ("td", "th") and self.cell is not None:
            self.tables[-1][-1].append("".join(self.cell).strip())
            self.cell = None

    def handle_data(self, data: str) -> None:
        if self.cell is not None:
            self.cell.append(data)


def _tables(html: str) -> list[list[list[str]]]:
    parser = _Tables()
    parser.feed(html)
    parser.close()
    return parser.tables


def _texts(fig) -> list[str]:
    """Every text written on a figure: titles, legends, labels, the numbers along the top."""
    out = [t.get_text() for t in fig.findobj(lambda a: hasattr(a, "get_text") and hasattr(a, "get_position"))]
    return [t for t in out if t]


def _named_in_table(tables, name: str, value: str) -> bool:
    """True when ``value`` is in a row headed ``name`` or in a column headed ``name``."""
    for table in tables:
        head = table[0]
        for row in table:
            if row and row[0] == name and value in row[1:]:
                return True
        if name in head:
            j = head.index(name)
            if any(len(row) > j and row[j] == value for row in table[1:]):
                return True
    return False


def _row(tables, name: str) -> list[str]:
    (row,) = [r for t in tables for r in t if r and r[0] == name and len(r) >= 3][:1]
    return row


@pytest.fixture(scope="module")
def reports(tmp_path_factory) -> dict[str, tuple[dict, str]]:
    """(content, report.html) of the demo (held-out, class names) and of a binary and a multi-label model."""
    d = tmp_path_factory.mktemp("figures")
    out = {}
    r = api.calibrate(DEMO_MODEL, DataSpec(path=DEMO_VAL, classes=CLASSES), d / "demo.onnx", report=d / "demo")
    out["multiclass"] = r.report.content
    for kind, model, data in (
        ("binary", "belt_tear_sigmoid_op17.onnx", "belt_tear_sigmoid_op17_val.npz"),
        ("multilabel", "belt_faults_multilabel_op17.onnx", "belt_faults_multilabel_op17_val.npz"),
    ):
        r = api.calibrate(EXPORTERS / model, EXPORTERS / data, d / f"{kind}.onnx", report=d / kind,
                          options=FitOptions(bootstrap=40))
        out[kind] = r.report.content
    return {k: (c, Path(d / ("demo" if k == "multiclass" else k) / "report.html").read_text()) for k, c in out.items()}


KINDS = ("multiclass", "binary", "multilabel")


@pytest.mark.parametrize("kind", KINDS)
def test_every_number_of_a_plot_is_a_number_of_a_table_of_the_same_name(reports, kind):
    content, html = reports[kind]
    assert content["data"]["kind"] == kind
    tables = _tables(html)
    cells = {c for t in tables for r in t for c in r}
    for name, fig in figures(content).items():
        texts = _texts(fig)
        for text in texts:
            for number in NUMBER.findall(text):
                assert number in cells, (name, text)
            # A figure given a name is under that name in a table (a row or a column heading).
            for label, number in PAIR.findall(text):
                words = label.strip().split("\n")[-1].split(" ")
                names = [" ".join(words[i:]) for i in range(len(words))]  # "... with T" -> "T"
                assert any(_named_in_table(tables, n, number) for n in names), (name, label, number)
        assert any(PAIR.search(t) for t in texts), name  # each plot states at least one table figure


@pytest.mark.parametrize("kind", KINDS)
def test_reliability_titles_quote_the_table_row_of_their_panel(reports, kind):
    content, html = reports[kind]
    tables = _tables(html)
    fig = figures(content)["reliability"]
    before_title, after_title = (ax.get_title() for ax in fig.axes[:2])
    # Multiclass: the top-label diagram's error is the ECE. Binary: the diagram of the positive
    # probability is the one-class classwise ECE (the table's ECE is the top-label max(p, 1 - p)
    # form, another number). Multi-label: the bars pool the labels; the title quotes the classwise
    # ECE, the mean of the per-label errors, and says so.
    key = "ece" if kind == "multiclass" else "classwise_ece"
    label = METRIC_LABELS[key].format(bins=content["metrics"]["n_bins"])
    row = _row(tables, label)
    assert f"{label} = {row[1]}" in before_title and f"{label} = {row[2]}" in after_title
    rel = content["reliability"]
    if kind != "multilabel":  # the bars drawn have exactly that error
        for part, cell in (("before", row[1]), ("after", row[2])):
            assert f"{rel[part]['error']:.4f}" == cell
    else:
        assert "pool" in before_title and "mean over labels" in before_title
    if kind == "binary":
        ece = _row(tables, METRIC_LABELS["ece"].format(bins=content["metrics"]["n_bins"]))
        assert ece[1] not in before_title  # the old title's mix-up: another row's number


def test_the_after_panels_say_which_t_they_use(reports):
    content, html = reports["multiclass"]
    tables = _tables(html)
    # Held-out figures: the fit part's T, not the T baked in, and both are in the parameter table.
    (t_row,) = [r for t in tables for r in t if r and r[0] == "T"]
    baked, fit_part = t_row[1], t_row[3]
    assert baked == f"{content['calibration']['temperature']:.4f}" and fit_part != baked
    header = next(t[0] for t in tables if t[0][:2] == ["parameter", "value baked in"])
    assert "fit part alone" in header[3]
    for name, fig in figures(content).items():
        titles = [ax.get_title() for ax in fig.axes] + [t.get_text() for ax in fig.axes if ax.get_legend()
                                                         for t in ax.get_legend().get_texts()]
        said = [t for t in titles if "T = " in t]
        assert said and all(f"T = {fit_part} (fitted on the fit part alone)" in t for t in said), name
        assert not any(f"T = {baked}" in t for t in titles)
    # A report with the T baked in (another capture) says so.
    given = copy.deepcopy(content)
    given["calibration"]["figures_use"] = dict(given["calibration"]["parameters"])
    title = figures(given)["reliability"].axes[1].get_title()
    assert f"T = {baked} (the T baked in)" in title


@pytest.mark.parametrize("kind", KINDS)
def test_bars_wilson_lines_and_counts_are_the_bin_table(reports, kind):
    content, html = reports[kind]
    tables = _tables(html)
    bin_tables = [t for t in tables if t[0][:2] == ["bin", "predictions"]]
    assert len(bin_tables) == 2  # before and after
    fig = figures(content)["reliability"]
    for ax, table, part in zip(fig.axes[:2], bin_tables, ("before", "after"), strict=True):
        rows = [r for r in table[1:] if r[0] != "all bins" and r[1] != "0"]
        filled = [p for p in ax.patches if p.get_facecolor()[3] > 0 and p.get_hatch() is None]
        assert [f"{p.get_height():.4f}" for p in filled] == [r[3] for r in rows]
        # Opacity grows with the count: the fullest bin is opaque, a smaller one fainter.
        alphas = np.array([p.get_facecolor()[3] for p in filled])
        counts = np.array([int(r[1]) for r in rows])
        assert alphas[counts.argmax()] == pytest.approx(1.0)
        assert np.all(np.diff(alphas[np.argsort(counts, kind="stable")]) >= -1e-12)
        if counts.min() < counts.max():
            assert alphas.min() < 0.9
        # The error bars are the Wilson column; the numbers along the top are the counts.
        (bars,) = [c for c in ax.containers if c.__class__.__name__ == "ErrorbarContainer"]
        segments = bars.lines[2][0].get_segments()
        drawn = [f"{min(s[:, 1]):.4f} to {max(s[:, 1]):.4f}" for s in segments]
        assert drawn == [r[4] for r in rows]
        strip = [t.get_text() for t in ax.texts]
        assert strip == [r[1] for r in rows]
        # The Wilson column is the interval of the bin's successes (scipy, as above).
        r = content["reliability"][part]
        for i, c in enumerate(r["counts"]):
            if c:
                low, high = wilson_interval(np.array([r["observed"][i] * c]), np.array([float(c)]))
                assert r["observed_interval"][i] == pytest.approx([low[0], high[0]], abs=1e-12)


@pytest.mark.parametrize("kind", KINDS)
def test_class_bars_are_the_class_table(reports, kind):
    content, html = reports[kind]
    tables = _tables(html)
    (table,) = [t for t in tables if t[0][1:] == ["calibration error before", "calibration error after"]]
    assert [r[0] for r in table[1:]] == content["data"]["class_names"]
    ax = figures(content)["classes"].axes[0]
    heights = [f"{p.get_height():.4f}" for p in ax.patches]
    k = len(table) - 1
    assert heights[:k] == [r[1] for r in table[1:]] and heights[k:] == [r[2] for r in table[1:]]
    if kind == "multiclass":  # the bundled class names, not "class 0"
        assert [t.get_text() for t in ax.get_xticklabels()] == CLASSES.read_text().split()


# --------------------------------------------------------------------------
# A point estimate outside its own interval


def test_a_point_outside_its_interval_is_marked_and_explained(reports):
    content, _ = reports["multiclass"]
    m = content["metrics"]
    moved = copy.deepcopy(content)
    ece = m["after"]["ece"]
    moved["metrics"]["after_interval"]["ece"] = [ece + 0.01, ece + 0.02]  # as a binned error's can be
    moved["metrics"]["after_interval"]["nll"] = [m["after"]["nll"] - 0.01, m["after"]["nll"] + 0.01]
    assert "ece" in outside_interval(moved) and "nll" not in outside_interval(moved)
    for text, table_rows in ((render_html(moved, _no_plots()), _html_rows), (render_markdown(moved), _md_rows)):
        rows = table_rows(text)
        ece_row = rows[METRIC_LABELS["ece"].format(bins=m["n_bins"])]
        assert ece_row[3].endswith(MARK) and not rows["NLL"][3].endswith(MARK)
        footnote = next(line for line in text.splitlines() if MARK + " The point estimate" in line)
        assert "biased upward" in footnote and "maths.md" in footnote and "not an error" in footnote
    # Nothing outside: no mark, no footnote.
    inside = copy.deepcopy(content)
    for key, value in inside["metrics"]["after"].items():
        if key in inside["metrics"]["after_interval"] and value is not None:
            inside["metrics"]["after_interval"][key] = [value - 1, value + 1]
    assert outside_interval(inside) == []
    assert MARK not in render_html(inside, _no_plots()) and MARK not in render_markdown(inside)


def test_the_demo_report_marks_exactly_its_rows_outside_their_interval(reports):
    content, html = reports["multiclass"]
    m = content["metrics"]
    expected = [k for k, (lo, hi) in m["after_interval"].items()
                if m["after"][k] is not None and lo is not None and not lo <= m["after"][k] <= hi]
    assert outside_interval(content) == expected
    rows = _html_rows(html)
    for key in m["after_interval"]:
        label = METRIC_LABELS[key].format(bins=m["n_bins"])
        assert rows[label][3].endswith(MARK) == (key in expected), key
    assert (f"{MARK} The point estimate" in html) == bool(expected)


def _no_plots() -> dict[str, bytes]:
    return dict.fromkeys(("reliability", "confidence", "classes"), b"")


def _html_rows(html: str) -> dict[str, list[str]]:
    (table,) = [t for t in _tables(html) if t[0][:3] == ["metric", "before", "after"]]
    return {r[0]: r for r in table[1:]}


def _md_rows(md: str) -> dict[str, list[str]]:
    rows = [[c.strip() for c in line.strip("|").split("|")] for line in md.splitlines() if line.startswith("| ")]
    return {r[0]: r for r in rows[1:]}


# --------------------------------------------------------------------------
# The demo is calibrated with its class names where the docs calibrate it

ROOT = Path(__file__).resolve().parents[2]


def _run(command: str, cwd: Path) -> subprocess.CompletedProcess[str]:
    env = {**os.environ, "PATH": f"{Path(sys.executable).parent}{os.pathsep}{os.environ['PATH']}"}
    return subprocess.run(["bash", "-c", "set -euo pipefail\n" + command], cwd=cwd, env=env,
                          capture_output=True, text=True, timeout=300)


def test_readme_quick_start_calibrates_the_demo_with_its_class_names(tmp_path):
    text = (ROOT / "README.md").read_text()
    quick = text.split("## Quick start", 1)[1].split("\n## ", 1)[0]
    blocks = re.findall(r"```sh\n(.*?)```", quick, re.S)
    assert len(blocks) == 2 and all(len(b.strip().splitlines()) == 1 for b in blocks)  # two commands
    calibrate = blocks[0].strip().split(" && ")[-1]
    assert calibrate.startswith(".venv/bin/onnxcal calibrate fixtures/conveyor_faults.onnx")
    assert "--classes fixtures/conveyor_faults_classes.txt" in calibrate
    (tmp_path / "fixtures").symlink_to(FIXTURES)
    # As written, with this checkout's onnxcal for the one installed in .venv (the install needs an index).
    r = _run(calibrate.replace(".venv/bin/onnxcal", "onnxcal", 1) + " --report report", tmp_path)
    assert r.returncode == 0, r.stderr
    names = json.loads((tmp_path / "report" / "report.json").read_text())["data"]["class_names"]
    assert names == CLASSES.read_text().split() and "class 0" not in (tmp_path / "report" / "report.html").read_text()


def test_the_guide_calibrates_the_demo_with_its_class_names(tmp_path):
    text = (ROOT / "docs" / "guide-handed-off-model.md").read_text()
    (command,) = re.findall(r"\n    (onnxcal calibrate fixtures/conveyor_faults\.onnx .*?)\n\n", text, re.S)
    assert "--classes fixtures/conveyor_faults_classes.txt" in command and "--report report/" in command
    (tmp_path / "fixtures").symlink_to(FIXTURES)
    r = _run(command.replace("\n    ", "\n"), tmp_path)  # as written, the continuation lines unindented
    assert r.returncode == 0, r.stderr
    content = json.loads((tmp_path / "report" / "report.json").read_text())
    assert content["data"]["class_names"] == CLASSES.read_text().split()
    assert [b["name"] for b in content["data"]["balance"]] == CLASSES.read_text().split()
