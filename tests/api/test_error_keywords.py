"""Errors from the Python API name its keywords (``force=True``, ``batch_axes``), not the command
line's options (``--force``, ``--batch-axis``); the command line's errors keep the options.

One mechanism does it (``errors.keyword_errors`` on each public function, with the table
``errors.KEYWORDS``): each case provokes one error through ``onnxcal``'s functions, and a scan of
the source checks that every option a message can name has a keyword to be named by.
"""

from __future__ import annotations

import ast
import dataclasses
import inspect
import re
import warnings
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from conftest import DEMO_MODEL, DEMO_TEST, DEMO_VAL

import onnxcal
from onnxcal.capture import Capture
from onnxcal.data import DataSpec, Selection
from onnxcal.data.preprocess import IMAGE_OPTIONS
from onnxcal.decisions.plan import DecisionOptions
from onnxcal.errors import CLI_ONLY, OnnxcalError, OnnxcalWarning, keyword
from onnxcal.fit import FitOptions

Q = FitOptions(bootstrap=0)
OPTION = re.compile(r"(?<![\w-])--[a-z]")
ANY_OPTION = re.compile(r"(?<![\w-])--([a-z][a-z0-9]*(?:-[a-z0-9]+)*)")  # wherever it stands in the source


@pytest.fixture(scope="module")
def files(tmp_path_factory: pytest.TempPathFactory) -> Path:
    d = tmp_path_factory.mktemp("kw")
    onnxcal.capture(DEMO_MODEL, DEMO_VAL, out=d / "cap.npz")
    (d / "exists.onnx").write_bytes(b"old")
    (d / "bad.json").write_text("{}")
    np.save(d / "labels.npy", np.zeros(2000, np.int64))
    return d


def _nan_capture() -> Capture:
    cap = onnxcal.capture(DEMO_MODEL, DataSpec(path=DEMO_VAL, selection=Selection(limit=50)))
    logits = np.array(cap.logits)
    logits[3, 1] = np.nan
    return replace(cap, logits=logits)


# (id, the call, what the message must name from Python)
CASES = [
    ("force", lambda d: onnxcal.calibrate(DEMO_MODEL, DEMO_VAL, d / "exists.onnx", options=Q),
     ["out '", "pass force=True"]),
    ("drop-nonfinite", lambda d: onnxcal.fit(_nan_capture(), options=Q), ["drop_nonfinite=True"]),
    ("method", lambda d: onnxcal.fit(d / "cap.npz", options=FitOptions(method="nope")), ["method 'nope'"]),
    ("holdout", lambda d: onnxcal.fit(d / "cap.npz", options=FitOptions(holdout=2.0)), ["holdout 2.0"]),
    ("bins", lambda d: onnxcal.fit(d / "cap.npz", options=FitOptions(n_bins=1)), ["n_bins 1"]),
    ("l2", lambda d: onnxcal.fit(d / "cap.npz", options=FitOptions(l2=1.0)), ["l2 applies to method"]),
    ("multilabel", lambda d: onnxcal.fit(d / "cap.npz", options=FitOptions(multilabel="shared")),
     ["multilabel needs", "drop multilabel"]),
    ("limit", lambda d: onnxcal.capture(DEMO_MODEL, DataSpec(path=DEMO_VAL, selection=Selection(limit=0))),
     ["limit 0"]),
    ("shard", lambda d: onnxcal.capture(DEMO_MODEL, DataSpec(path=DEMO_VAL, selection=Selection(shard=(3, 2)))),
     ["shard 3/2"]),
    ("shuffle-seed", lambda d: onnxcal.capture(
        DEMO_MODEL, DataSpec(path=DEMO_VAL, selection=Selection(limit=3, shuffle_seed=-1))), ["shuffle_seed -1"]),
    ("constant", lambda d: onnxcal.capture(DEMO_MODEL, DataSpec(path=DEMO_VAL, constants={"nope": 1})),
     ["constants names 'nope'"]),
    ("batch-axis", lambda d: onnxcal.capture(DEMO_MODEL, DataSpec(path=DEMO_VAL, batch_axes={"nope": 1})),
     ["batch_axes names 'nope'"]),
    ("labels", lambda d: onnxcal.capture(DEMO_MODEL, DataSpec(path=DEMO_VAL, labels=d / "labels.npy")),
     ["labels was given too", "drop labels"]),
    ("label-column", lambda d: onnxcal.capture(DEMO_MODEL, DataSpec(path=DEMO_VAL, label_column="y")),
     ["label_column applies"]),
    ("feature-columns", lambda d: onnxcal.capture(DEMO_MODEL, DataSpec(path=DEMO_VAL, feature_columns=["a"])),
     ["feature_columns applies"]),
    ("resize", lambda d: onnxcal.capture(DEMO_MODEL, DataSpec(path=DEMO_VAL, image={"resize": 32})),
     ["resize applies"]),
    ("batch-size", lambda d: onnxcal.capture(DEMO_MODEL, DEMO_VAL, batch_size=0), ["batch_size 0"]),
    ("threads", lambda d: onnxcal.capture(DEMO_MODEL, DEMO_VAL, threads=100000), ["threads 100000"]),
    ("score-columns", lambda d: onnxcal.capture(DEMO_MODEL, DEMO_VAL, score_columns="x"), ["score_columns 'x'"]),
    ("output-holds", lambda d: onnxcal.capture(DEMO_MODEL, DEMO_VAL, output_holds="nope"),
     ["output_holds 'nope'"]),
    ("activation", lambda d: onnxcal.capture(DEMO_MODEL, DEMO_VAL, activation="nope"), ["activation 'nope'"]),
    ("max-model-bytes", lambda d: onnxcal.inspect(DEMO_MODEL, max_model_bytes="lots"), ["max_model_bytes 'lots'"]),
    ("format", lambda d: onnxcal.report(d / "cap.npz", d / "rep", temperature=2.0, formats="pdf"),
     ["formats 'pdf'"]),
    ("temperature-and-fit", lambda d: onnxcal.patch(DEMO_MODEL, d / "p.onnx"), ["one of temperature and fit"]),
    ("fit-file", lambda d: onnxcal.patch(DEMO_MODEL, d / "p.onnx", fit=d / "bad.json"),
     ["written by onnxcal.fit(out=...)"]),
    ("compute-dtype", lambda d: onnxcal.patch(DEMO_MODEL, d / "p.onnx", temperature=2.0, compute_dtype="x"),
     ["compute_dtype 'x'"]),
    ("decision-data", lambda d: onnxcal.patch(DEMO_MODEL, d / "p.onnx", temperature=2.0,
                                              decisions=DecisionOptions(accept_error=0.1)),
     ["accept_error and set_coverage", "with decision_data"]),
    ("latency-runs", lambda d: onnxcal.verify(DEMO_MODEL, DEMO_TEST, latency_runs=0), ["latency_runs 0"]),
    ("max-ece", lambda d: onnxcal.verify(DEMO_MODEL, DEMO_TEST, max_ece=-1.0), ["max_ece -1.0"]),
    ("junit", lambda d: onnxcal.verify(DEMO_MODEL, DEMO_TEST, junit=d / "exists.onnx"),
     ["junit '", "force=True"]),
    ("report", lambda d: onnxcal.calibrate(DEMO_MODEL, DEMO_VAL, d / "new.onnx", report=d / "exists.onnx",
                                           options=Q), ["report '"]),
]


@pytest.mark.parametrize(("call", "names"), [c[1:] for c in CASES], ids=[c[0] for c in CASES])
def test_api_errors_name_keywords_not_options(files: Path, call, names: list[str]) -> None:
    with pytest.raises(OnnxcalError) as info:
        call(files)
    text = str(info.value)
    assert not OPTION.search(text), text
    for name in names:
        assert name in text, text
    assert (files / "exists.onnx").read_bytes() == b"old"


# the same errors from the command line: the options, as typed
CLI_CASES = [
    (["calibrate", DEMO_MODEL, "--data", DEMO_VAL, "--out", "{d}/exists.onnx"], ["--out '", "pass --force"]),
    (["fit", "{d}/cap.npz", "--holdout", "2"], ["--holdout 2.0"]),
    (["fit", "{d}/cap.npz", "--bins", "1"], ["--bins 1"]),
    (["capture", DEMO_MODEL, "--data", DEMO_VAL, "--out", "{d}/c.npz", "--constant", "nope=1"],
     ["--constant names 'nope'"]),
    (["capture", DEMO_MODEL, "--data", DEMO_VAL, "--out", "{d}/c.npz", "--batch-axis", "nope=1"],
     ["--batch-axis names 'nope'"]),
    (["capture", DEMO_MODEL, "--data", DEMO_VAL, "--out", "{d}/c.npz", "--labels", "{d}/labels.npy"],
     ["--labels was given too"]),
    (["report", "{d}/cap.npz", "--out", "{d}/rep", "--temperature", "2", "--format", "pdf"], ["--format 'pdf'"]),
    (["patch", DEMO_MODEL, "--out", "{d}/p.onnx", "--fit", "{d}/bad.json"], ["'onnxcal fit --out'"]),
    (["verify", DEMO_MODEL, "--data", DEMO_TEST, "--junit", "{d}/exists.onnx"], ["--junit '", "--force"]),
]


@pytest.mark.parametrize(("args", "names"), CLI_CASES, ids=[c[0][0] + "-" + c[1][0] for c in CLI_CASES])
def test_cli_errors_name_the_options(files: Path, run_cli, args: list[object], names: list[str]) -> None:
    r = run_cli(*[str(a).format(d=files) for a in args])
    assert r.code == 2, r.err
    for name in names:
        assert name in r.err, r.err
    assert "=True" not in r.err


def test_every_option_a_message_names_has_a_keyword() -> None:
    """A scan of the source outside the command line: every ``--option`` in it (messages, hints) is
    named from Python by a keyword of a public function or a field of the objects they take."""
    known = set(IMAGE_OPTIONS)
    for fn in (onnxcal.inspect, onnxcal.capture, onnxcal.fit, onnxcal.patch, onnxcal.verify, onnxcal.report,
               onnxcal.calibrate):
        known |= set(inspect.signature(fn).parameters)
    for cls in (DataSpec, Selection, FitOptions, DecisionOptions):
        known |= {f.name for f in dataclasses.fields(cls)}
    package = Path(onnxcal.__file__).parent
    missing = {}
    for path in package.rglob("*.py"):
        if path.parent.name == "cli" or path.name == "errors.py":
            continue
        for m in ANY_OPTION.finditer(path.read_text()):
            name = keyword(m.group(1)).split("=")[0]
            if m.group(1) not in CLI_ONLY and name not in known:
                missing[m.group(1)] = str(path.relative_to(package))
    assert not missing, missing


# Warnings: the same spelling as errors (errors.OnnxcalWarning picks it when it is made)


@pytest.fixture(scope="module")
def nan_set(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The demo's first 300 rows with NaN in one row's inputs: its logits are NaN too."""
    data = dict(np.load(DEMO_VAL))
    data = {k: v[:300].copy() for k, v in data.items()}
    data["band_energies"][7, 3] = np.nan
    path = tmp_path_factory.mktemp("kw-warn") / "nan.npz"
    np.savez(path, **data)
    return path


def test_api_warnings_name_keywords_not_options(nan_set: Path) -> None:
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        onnxcal.capture(DEMO_MODEL, nan_set)
    texts = [str(w.message) for w in caught if issubclass(w.category, OnnxcalWarning)]
    logits = [t for t in texts if "logits of" in t]
    assert len(logits) == 1, texts
    assert "unless drop_nonfinite=True" in logits[0] and "onnxcal.fit()" in logits[0], logits[0]
    assert not any(OPTION.search(t) for t in texts), texts


def test_cli_warnings_name_the_options(nan_set: Path, run_cli, tmp_path: Path) -> None:
    r = run_cli("capture", DEMO_MODEL, "--data", nan_set, "--out", tmp_path / "c.npz")
    assert r.code == 0, r.err
    assert "'onnxcal fit' refuses them unless --drop-nonfinite" in r.err, r.err
    assert "=True" not in r.err


def test_a_warning_made_in_the_decoding_worker_is_spelled_as_its_caller(monkeypatch) -> None:
    """The decoder runs in a worker thread (capture.blocks): it runs in a copy of the caller's context, so a
    warning it makes is spelled as the caller's, keywords from Python and options under the command line."""
    import contextlib

    from onnxcal.capture import blocks
    from onnxcal.errors import cli_spelling

    class Warns:
        """A set decoded as it is read (capture.plan.decoded_as_read), whose decoding warns."""

        def batch(self, start, stop, dtypes):
            warnings.warn(OnnxcalWarning("check --resize"), stacklevel=1)
            return {}

    monkeypatch.setattr(blocks, "decoded_as_read", lambda dataset: True)
    for spelled, expected in ((False, "check resize"), (True, "check --resize")):
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            with cli_spelling() if spelled else contextlib.nullcontext():
                reader = blocks._Reader(Warns(), {})
                reader.prefetch(0, 2)
                assert reader.ahead is not None
                reader.read(0, 2)
                reader.close()
        assert [str(w.message) for w in caught] == [expected]


def _warns_outside_onnxcal_warning(path: Path) -> list[int]:
    """Lines of ``path`` calling warnings.warn with a message not made as an OnnxcalWarning."""
    bad = []
    for node in ast.walk(ast.parse(path.read_text())):
        if not (isinstance(node, ast.Call) and getattr(node.func, "attr", getattr(node.func, "id", "")) == "warn"):
            continue
        first = node.args[0] if node.args else None
        category = node.args[1] if len(node.args) > 1 else next(
            (k.value for k in node.keywords if k.arg == "category"), None)
        made = isinstance(first, ast.Call) and getattr(first.func, "id", "") == "OnnxcalWarning"
        named = isinstance(category, ast.Name) and category.id == "OnnxcalWarning"
        passed_on = isinstance(first, ast.Name) and category is None  # a warning object made elsewhere, re-given
        if not (made or named or passed_on):
            bad.append(node.lineno)
    return bad


def test_every_warning_is_an_onnxcal_warning() -> None:
    """A scan of the source: every warnings.warn outside the command line gives an OnnxcalWarning (made
    there, or named as the category), whose message follows the spelling of errors; the scan of option
    names above covers their messages."""
    package = Path(onnxcal.__file__).parent
    bad = {str(p.relative_to(package)): lines for p in package.rglob("*.py")
           if p.parent.name != "cli" and (lines := _warns_outside_onnxcal_warning(p))}
    assert not bad, bad
