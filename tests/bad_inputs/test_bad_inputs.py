"""The bad-input corpus: every command, every kind of bad file or option.

``make_corpus.py`` writes the files into a temporary directory once per
session; each case below runs one command on them in-process (the CLI's
``main``, as the console script calls it) from inside that directory and
asserts what onnxcal promises for bad input (docs/security.md):

* exit status 2;
* one line on stderr, ``onnxcal: error: ...``, that names the cause (the
  regular expression of the case) and no traceback;
* no file or directory created, and every file of the corpus unchanged
  (sha256 of each before and after; symlinks by their target).

Two cases at the end run the real console script in a subprocess to check
the process's exit status and stderr, and one runs as an unprivileged user
to meet a real permission error.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import shutil
import subprocess
import sys
import tempfile
from dataclasses import dataclass
from pathlib import Path

import make_corpus
import pytest


@pytest.fixture(scope="session")
def corpus(tmp_path_factory) -> Path:
    return make_corpus.make(tmp_path_factory.mktemp("bad_inputs") / "corpus")


def snapshot(root: Path) -> dict[str, str]:
    """Every path under ``root``: sha256 of files, 'dir' for directories, link targets."""
    state = {}
    for top, dirs, files in os.walk(root):
        for name in dirs + files:
            p = Path(top) / name
            rel = str(p.relative_to(root))
            if p.is_symlink():
                state[rel] = "-> " + os.readlink(p)
            elif p.is_dir():
                state[rel] = "dir"
            else:
                state[rel] = hashlib.sha256(p.read_bytes()).hexdigest()
    return state


# --------------------------------------------------------------------------
# Simulated environments (see docs/security.md, "Unwritable directories")


def unwritable_readonly(monkeypatch, corpus: Path) -> None:
    """``readonly/`` as an unprivileged user sees it.

    The tests run as root here, and root may write into a directory whatever
    its mode bits, so ``chmod`` alone proves nothing. onnxcal asks the OS
    whether it may write there (``os.access``) before any work; this makes
    the OS answer "no" for ``readonly/`` exactly as it would for a user
    without write permission. The real kernel refusal is checked in
    ``test_unprivileged_user_meets_a_real_permission_error`` below.
    """
    real = os.access
    target = (corpus / "readonly").resolve()

    def access(path, mode, *args, **kwargs):
        if mode & os.W_OK and Path(path).resolve() == target:
            return False
        return real(path, mode, *args, **kwargs)

    monkeypatch.setattr(os, "access", access)


def eacces_on_create(monkeypatch, corpus: Path) -> None:
    """Creating the temporary file fails with EACCES although ``os.access`` said yes
    (as on an NFS export with root squashed, or under a mandatory access policy)."""
    real = tempfile.mkstemp

    def mkstemp(*args, dir=None, **kwargs):
        if dir is not None and Path(dir).resolve() == (corpus / "readonly").resolve():
            raise PermissionError(13, "Permission denied", str(Path(dir) / "tmpfile"))
        return real(*args, dir=dir, **kwargs)

    monkeypatch.setattr(tempfile, "mkstemp", mkstemp)


def memory(available: int):
    """A machine with ``available`` bytes of memory free (as the kernel and the cgroup would say)."""

    def setup(monkeypatch, corpus: Path) -> None:
        from onnxcal import _limits

        monkeypatch.setattr(_limits, "available_memory", lambda: available)

    return setup


# --------------------------------------------------------------------------
# The table


@dataclass(frozen=True)
class Case:
    id: str
    args: tuple
    message: str  # a regular expression the error line must match
    setup: object = None  # setup(monkeypatch, corpus) before the run

    def argv(self, corpus: Path) -> list[str]:
        return [str(a).replace("{corpus}", str(corpus)) for a in self.args]


def case(id, *args, message, setup=None) -> Case:
    return Case(id, args, message, setup)


NPZ = ("--data", "val.npz")
T2 = ("--temperature", "2")

CASES = [
    # ---- the command line itself
    case("option-not-a-number", "fit", "cap.npz", "--bins", "many", message=r"Invalid value for '--bins'.*; see 'onnxcal fit --help'"),
    case("missing-option", "patch", "model.onnx", *T2, message=r"Missing option '--out'; see 'onnxcal patch --help'"),
    case("verify-rows-zero", "calibrate", "model.onnx", *NPZ, "--out", "o.onnx", "--verify-rows", "0", message=r"Invalid value for '--verify-rows': Input should be greater than or equal to 1"),
    case("unknown-option", "verify", "patched.onnx", *NPZ, "--max-ec", "0.1", message=r"No such option: --max-ec"),
    # ---- ONNX files that are not (usable) models
    case("truncated-onnx", "inspect", "truncated.onnx", message=r"'truncated.onnx' is not a readable ONNX model"),
    case("zero-byte-onnx", "capture", "empty.onnx", *NPZ, "--out", "c.npz", message=r"'empty.onnx' is empty \(0 bytes\)"),
    case("text-named-onnx", "patch", "text.onnx", *T2, "--out", "p.onnx", message=r"'text.onnx' is not a readable ONNX model"),
    case("other-protobuf", "inspect", "tensor_proto.onnx", message=r"'tensor_proto.onnx' is not a readable ONNX model"),
    case("other-protobuf-that-parses", "capture", "graph_proto.onnx", *NPZ, "--out", "c.npz", message=r"'graph_proto.onnx' is not an ONNX model \(no IR version"),
    case("directory-named-onnx", "inspect", "model_dir.onnx", message=r"model 'model_dir.onnx' is not a regular file"),
    case("graph-with-cycle", "calibrate", "cycle.onnx", *NPZ, "--out", "o.onnx", message=r"'cycle.onnx' fails the ONNX checker: .*topologically sorted"),
    case("missing-initializer", "patch", "missing_initializer.onnx", *T2, "--out", "p.onnx", message=r"'missing_initializer.onnx' fails the ONNX checker: .*w1"),
    case("int64-only-output", "calibrate", "int64_output.onnx", "--data", "val3.npz", "--out", "o.onnx", message=r"no floating-point output to calibrate \(outputs: label \(int64\)\)"),
    case("no-such-output", "capture", "model.onnx", *NPZ, "--output", "nope", "--out", "c.npz", message=r"no output named 'nope'; choose one of: scores"),
    case("class-axis-out-of-range", "patch", "class_axis.onnx", *T2, "--out", "p.onnx", message=r"class axis 5 is out of range for output 'scores' of rank 2"),
    # ---- reading the model: which output, what it holds, whose fit
    case("several-probability-outputs", "patch", "two_outputs.onnx", *T2, "--out", "p.onnx", message=r"2 outputs of class probabilities: 'probs' .*'probs_pct'.*choose one with --output"),
    case("output-holds-unknown", "patch", "model.onnx", *T2, "--out", "p.onnx", "--output-holds", "odds", message=r"--output-holds 'odds' is not one of: logits, probabilities, log-probabilities"),
    case("output-holds-contradicts-graph", "patch", "two_outputs.onnx", *T2, "--out", "p.onnx", "--output", "probs", "--output-holds", "logits", message=r"output 'probs' comes from Softmax, so it holds probabilities, not logits"),
    case("output-holds-contradicts-data", "capture", "model.onnx", *NPZ, "--out", "c.npz", "--output-holds", "probabilities", message=r"--output-holds probabilities: on the first .* rows of 'val.npz', only 0 of .* rows"),
    case("fit-of-another-model", "patch", "other_model.onnx", "--fit", "fit.json", "--out", "p.onnx", message=r"'fit.json' was fitted on the model with sha256 .*, not on 'other_model.onnx'.*--fitted-on-twin"),
    case("l1-sigmoid-vector", "fit", "l1_cap.npz", "--method", "vector", "--bootstrap", "0", message=r"--method vector does not apply to L1-normalised sigmoids .*fits one temperature, L1\(sigmoid\(z / T\)\)"),
    case("l1-sigmoid-fit-on-logits", "patch", "model.onnx", "--fit", "l1_fit.json", "--fitted-on-twin", "--out", "p.onnx", message=r"a sigmoid-l1 calibration \(for sigmoid-l1 outputs\) does not fit output 'scores', which is calibrated through a softmax"),
    case("twin-without-fit", "patch", "model.onnx", *T2, "--out", "p.onnx", "--fitted-on-twin", message=r"--fitted-on-twin applies to --fit"),
    case("concat-of-boxes-and-scores", "patch", "detector.onnx", *T2, "--out", "p.onnx", message=r"'detections' concatenates values of different kinds along axis 1 .*positions 0\.\.3 from tensor 'boxes'.*positions 4\.\.7 from sigmoid.*--score-columns 4:8"),
    case("score-columns-not-start-stop", "patch", "detector.onnx", *T2, "--out", "p.onnx", "--score-columns", "4-8", message=r"--score-columns '4-8' is not START:STOP"),
    case("score-columns-not-one-part", "calibrate", "detector.onnx", *NPZ, "--out", "o.onnx", "--score-columns", "3:8", message=r"--score-columns 3:8 is not the part of one activation"),
    case("score-columns-without-concat", "patch", "model.onnx", *T2, "--out", "p.onnx", "--score-columns", "0:2", message=r"--score-columns: output 'scores' is not a Concat of class scores"),
    case("recurrent-state-as-output", "capture", "recurrent.onnx", *NPZ, "--out", "c.npz", "--output", "hn", message=r"output 'hn' is the state output Y_h of LSTM 'lstm'.*not class scores"),
    case("branches-disagree", "patch", "branches_disagree.onnx", *T2, "--out", "p.onnx", message=r"the subgraphs of If 'which' compute 'out' in different ways \(then_branch: probabilities .*else_branch: raw values\)"),
    # ---- inputs that are not samples: a scalar, a state with its samples on axis 1 (issue 12)
    case("scalar-input-not-given", "capture", "stateful.onnx", "--data", "val_state.npz", "--batch-axis", "h0=1", "--out", "c.npz", message=r"model input 'sr' is a single number \(shape \[\]\) .*give it once with --constant sr=VALUE"),
    case("state-input-samples-on-axis-1", "calibrate", "stateful.onnx", "--data", "val_state.npz", "--constant", "sr=16000", "--out", "o.onnx", message=r"input 'h0' has shape \[1, N, 3\] in the model, samples on axis 1 .*--batch-axis h0=1 .*or --constant h0=zeros"),
    case("constant-not-a-number", "capture", "stateful.onnx", "--data", "val_state.npz", "--constant", "sr=fast", "--batch-axis", "h0=1", "--out", "c.npz", message=r"--constant sr=fast: 'fast' is not a number, 'zeros' or an .npy file"),
    case("constant-fraction-for-int-input", "verify", "stateful.onnx", "--data", "val_state.npz", "--constant", "sr=0.5", "--batch-axis", "h0=1", message=r"constant 'sr' is float64 \(0.5\) but the model's input is int64"),
    case("constant-and-array-both", "capture", "stateful.onnx", "--data", "val_state.npz", "--constant", "sr=8000", "--constant", "h0=zeros", "--out", "c.npz", message=r"input 'h0' is given both in 'val_state.npz' and by --constant"),
    case("constant-not-an-input", "capture", "stateful.onnx", "--data", "val_state.npz", "--constant", "rate=8000", "--out", "c.npz", message=r"--constant names 'rate', which is not a model input"),
    case("batch-axis-out-of-range", "capture", "stateful.onnx", "--data", "val_state.npz", "--constant", "sr=8000", "--batch-axis", "h0=3", "--out", "c.npz", message=r"--batch-axis h0=3 is out of range: input 'h0' has rank 3"),
    case("batch-axis-not-a-number", "calibrate", "stateful.onnx", "--data", "val_state.npz", "--batch-axis", "h0=one", "--out", "o.onnx", message=r"--batch-axis h0=one: the axis must be a whole number"),
    case("batch-axis-on-csv", "capture", "model.onnx", "--data", "val.csv", "--batch-axis", "x=1", "--out", "c.npz", message=r"--batch-axis applies to array data"),
    case("custom-op-domain", "capture", "custom_op.onnx", *NPZ, "--out", "c.npz", message=r"unsupported operator 'VibrationScore' in domain 'com.example.belt'"),
    case("model-over-size-limit", "inspect", "model.onnx", "--max-model-bytes", "100", message=r"'model.onnx' is \d+ bytes .*more than --max-model-bytes 100"),
    case("bad-size-limit", "patch", "model.onnx", *T2, "--out", "p.onnx", "--max-model-bytes", "lots", message=r"--max-model-bytes 'lots' is not a size"),
    case("declared-input-too-big", "capture", "huge_input.onnx", *NPZ, "--out", "c.npz", message=r"a batch of 64 samples of input 'x' \(shape \[N, 4, 1048576, 1048576\] declared, float32, 16 TiB per sample\) needs 1 PiB, more than the .* of memory available; lower --batch-size"),
    # ---- external data outside the model's directory
    case("external-dotdot", "inspect", "ext_dotdot/model.onnx", message=r"external location '\.\./outside/weights.bin', which is outside the model's directory"),
    case("external-absolute", "patch", "ext_absolute/model.onnx", *T2, "--out", "p.onnx", message=r"external location '/.*weights.bin', which is outside the model's directory"),
    case("external-symlink", "capture", "ext_symlink/model.onnx", *NPZ, "--out", "c.npz", message=r"external data file 'weights.bin' of '.*' is a symbolic link"),
    case("external-hardlink", "verify", "ext_hardlink/model.onnx", *NPZ, message=r"external data file 'weights.bin' of '.*' has 2 hard links"),
    # ---- data files
    case("npz-pickled-objects", "capture", "model.onnx", "--data", "pickled.npz", "--out", "c.npz", message=r"array 'x' in 'pickled.npz' holds Python objects"),
    case("npz-missing-input", "capture", "model.onnx", "--data", "missing_input.npz", "--out", "c.npz", message=r"'missing_input.npz' has no array for model input 'x'"),
    case("wrong-dtype", "capture", "model.onnx", "--data", "wrong_dtype.npz", "--out", "c.npz", message=r"input 'x' is complex64 in the data but float32 in the model"),
    case("wrong-rank", "calibrate", "model.onnx", "--data", "wrong_rank.npz", "--out", "o.onnx", message=r"input 'x' has rank 3 .* but rank 2 in the model"),
    case("wrong-feature-count", "verify", "patched.onnx", "--data", "wrong_features.npz", message=r"input 'x' has size 5 on axis 1 in the data but 6 in the model"),
    case("empty-data-set", "capture", "model.onnx", "--data", "empty_set.npz", "--out", "c.npz", message=r"'empty_set.npz' holds no samples"),
    case("labels-with-fractions", "calibrate", "model.onnx", "--data", "fraction_labels.npz", "--out", "o.onnx", message=r"label 1.5 at row 7 in 'fraction_labels.npz' is not a whole class index"),
    case("negative-labels", "capture", "model.onnx", "--data", "negative_labels.npz", "--out", "c.npz", message=r"label -1 at row 3 .* outside \[0, 4\)"),
    case("labels-at-least-k", "calibrate", "model.onnx", "--data", "labels_too_big.npz", "--out", "o.onnx", message=r"label 4 at row 9 .* outside \[0, 4\)"),
    case("length-mismatch", "capture", "model.onnx", "--data", "length_mismatch.npz", "--out", "c.npz", message=r"different numbers of samples \(x: 40, labels: 39\)"),
    case("nan-inf-rows-calibrate", "calibrate", "identity3.onnx", "--data", "nonfinite.npz", "--out", "o.onnx", "-q", message=r"NaN or Inf in 4 of 40 rows \(first rows: 2, 5, 7, 11\).*--drop-nonfinite"),
    case("nan-inf-rows-fit", "fit", "nonfinite_cap.npz", "--out", "f.json", message=r"NaN or Inf in 4 of 40 rows \(first rows: 2, 5, 7, 11\).*--drop-nonfinite"),
    case("nan-inf-rows-verify", "verify", "patched3.onnx", "--data", "nonfinite.npz", "--max-ece", "0.5", message=r"outputs or the reference logits on 'nonfinite.npz' hold NaN or Inf in 4 of 40 rows \(first rows: 2, 5, 7, 11\).*--drop-nonfinite"),
    case("nan-inf-rows-report", "report", "nonfinite_cap.npz", "--out", "rep", *T2, message=r"NaN or Inf in 4 of 40 rows \(first rows: 2, 5, 7, 11\)"),
    case("csv-non-numeric-cell", "capture", "model.onnx", "--data", "non_numeric.csv", "--out", "c.npz", message=r"line 4, column 'f2' .* holds 'n/a', not a number"),
    case("npz-compressed-bomb", "capture", "model.onnx", "--data", "bomb.npz", "--out", "c.npz", message=r"array 'x' in 'bomb.npz' \(compressed, shape \[1048576, 1048576\] float64\) needs 8 TiB, more than the .* of memory available"),
    case("npz-member-shorter-than-header", "capture", "model.onnx", "--data", "short_member.npz", "--out", "c.npz", message=r"array 'x' in 'short_member.npz' is truncated: its header says \[40000, 6\] float32 \(938 KiB\)"),
    case("npz-damaged-header", "capture", "model.onnx", "--data", "damaged_header.npz", "--out", "c.npz", message=r"array 'x' in 'damaged_header.npz' cannot be read"),
    case("npz-unknown-compression", "calibrate", "model.onnx", "--data", "odd_compression.npz", "--out", "o.onnx", message=r"array 'x' in 'odd_compression.npz' cannot be read \(That compression method is not supported\)"),
    case("images-corrupt", "capture", "belt.onnx", "--data", "images_corrupt", "--out", "c.npz", message=r"image '.*broken.png' cannot be read"),
    case("images-non-image-file", "calibrate", "belt.onnx", "--data", "images_not_image", "--out", "o.onnx", message=r"image '.*notes.png' cannot be read"),
    case("images-empty-class", "capture", "belt.onnx", "--data", "images_empty_class", "--out", "c.npz", message=r"class subfolder '.*class3' holds no images"),
    case("images-decompression-bomb", "capture", "belt.onnx", "--data", "images_bomb", "--out", "c.npz", message=r"image '.*huge.png' claims 1600000000 pixels, more than Pillow's limit"),
    # ---- captures
    case("truncated-capture", "fit", "truncated_cap.npz", message=r"'truncated_cap.npz' is not an onnxcal capture file .*not an .npz archive"),
    case("capture-text-not-unicode", "report", "bad_text_cap.npz", "--out", "rep", *T2, message=r"array 'meta' in 'bad_text_cap.npz' holds text that is not valid Unicode"),
    case("data-file-as-capture", "fit", "val.npz", message=r"'val.npz' is not an onnxcal capture file"),
    case("shards-of-different-models", "fit", "shard1.npz", "other_cap.npz", message=r"were captured from different models"),
    case("overlapping-shards", "fit", "shard1.npz", "cap.npz", message=r"both hold row 0 of"),
    # ---- fit files
    case("fit-negative-temperature", "patch", "model.onnx", "--fit", "fit_negative_t.json", "--out", "p.onnx", message=r"temperature -1.5 is not a positive finite number"),
    case("fit-non-numeric-temperature", "report", "cap.npz", "--out", "rep", "--fit", "fit_text_t.json", message=r"'warm' is not a number"),
    case("fit-matrix-w-shape", "patch", "model.onnx", "--fit", "fit_matrix_w_shape.json", "--out", "p.onnx", message=r"matrix parameter 'W' has shape 3 x 3, expected 4 x 4"),
    case("fit-ets-weights", "report", "cap.npz", "--out", "rep", "--fit", "fit_ets_weights.json", message=r"ensemble-temperature parameter 'weights' is \[0.5, 0.6, 0.1\], but it must be three numbers >= 0 adding up to 1"),
    case("fit-isotonic-decreasing", "patch", "model.onnx", "--fit", "fit_isotonic_decreasing.json", "--out", "p.onnx", message=r"isotonic parameter 'y\[0\]' decreases"),
    case("fit-unknown-method", "patch", "model.onnx", "--fit", "fit_unknown_method.json", "--out", "p.onnx", message=r"unknown calibration method 'magic'"),
    case("fold-map-not-linear", "patch", "model.onnx", "--fit", "fit_ets_good.json", "--fold", "--drop-logits", "--out", "p.onnx", message=r"--fold: ensemble temperature scaling is a weighted mixture of softmaxes, not one softmax of a linear map of the logits, so it cannot be folded into a linear layer"),
    case("fold-matrix-shared-weight", "patch", "fold_shared_weight.onnx", "--fit", "fit_matrix_good.json", "--fold", "--drop-logits", "--out", "p.onnx", message=r"--fold: the weight 'w1' is shared with other nodes; leave out --fold"),
    case("fit-not-json", "patch", "model.onnx", "--fit", "fit_not_json.json", "--out", "p.onnx", message=r"'fit_not_json.json' is not an onnxcal fit file"),
    case("report-dir-is-a-file", "calibrate", "model.onnx", *NPZ, "--out", "o.onnx", "--report", "fit_deep.json", message=r"--report 'fit_deep.json' is a file"),
    case("fit-json-nested-too-deep", "patch", "model.onnx", "--fit", "fit_deep.json", "--out", "p.onnx", message=r"'fit_deep.json' is not an onnxcal fit file"),
    # ---- patched models whose record disagrees with their graph
    # verify reports such a model as a failed check (exit 1, issue 6); the commands that
    # build on the record (patch re-patches by undoing it, report takes its parameters)
    # cannot work from a record that misdescribes the graph, so for them it is bad input.
    case("record-lost-node-repatch", "patch", "record_lost_node.onnx", *T2, "--out", "p.onnx", message=r"calibration record of 'record_lost_node.onnx' does not match its graph: node 'onnxcal_div' .* is missing"),
    case("record-lost-node-report", "report", "cap.npz", "--out", "rep", "--model", "record_lost_node.onnx", message=r"does not match its graph"),
    case("record-wrong-t-report", "report", "cap.npz", "--out", "rep", "--model", "record_wrong_t.onnx", message=r"calibration record of 'record_wrong_t.onnx' does not match the parameters in its graph \(record T = [\d.]+, graph T = [\d.]+"),
    case("record-garbled", "patch", "record_garbled.onnx", *T2, "--out", "p.onnx", message=r"calibration record .* is damaged"),
    # ---- outputs
    case("out-equals-input", "patch", "model.onnx", *T2, "--out", "model.onnx", "--force", message=r"--out 'model.onnx' is the input file 'model.onnx'"),
    case("out-other-spelling", "patch", "model.onnx", *T2, "--out", "sub/../model.onnx", "--force", message=r"is the input file 'model.onnx'"),
    case("out-absolute-spelling", "fit", "cap.npz", "--out", "{corpus}/cap.npz", "--force", message=r"is the input file 'cap.npz'"),
    case("out-through-symlink", "capture", "model.onnx", "--data", "val_link.npz", "--out", "val.npz", "--force", message=r"is the input file 'val_link.npz'"),
    case("out-is-fit-file", "patch", "model.onnx", "--fit", "fit.json", "--out", "fit.json", "--force", message=r"is the input file 'fit.json'"),
    case("out-is-input-external-data", "patch", "ext_good/model.onnx", *T2, "--out", "ext_good/model.onnx.data", "--force", message=r"is the input file '.*model.onnx.data'"),
    case("out-data-is-input-external-data", "patch", "ext_named/model.onnx", *T2, "--out", "ext_named/shared.onnx", "--force", message=r"--out's data file 'ext_named/shared.onnx.data' is the input file"),
    case("junit-is-input", "verify", "patched.onnx", *NPZ, "--junit", "patched.onnx", "--force", message=r"--junit 'patched.onnx' is the input file"),
    case("out-inside-image-folder", "capture", "belt.onnx", "--data", "images", "--out", "images/class0/c.npz", message=r"--out 'images/class0/c.npz' is inside the input folder 'images'"),
    case("report-inside-image-folder", "calibrate", "belt.onnx", "--data", "images", "--out", "o.onnx", "--report", "images", message=r"--report 'images' is inside the input folder 'images'"),
    case("existing-out", "fit", "cap.npz", "--out", "existing.json", message=r"--out 'existing.json' already exists; pass --force"),
    case("existing-junit", "verify", "patched.onnx", *NPZ, "--junit", "existing.json", message=r"--junit 'existing.json' already exists"),
    case("existing-report-file", "report", "cap.npz", "--out", "old_report", *T2, message=r"'old_report/report.html' already exists"),
    case("existing-calibrate-report", "calibrate", "model.onnx", *NPZ, "--out", "o.onnx", "--report", "old_report", message=r"'old_report/report.html' already exists"),
    case("existing-external-data-out", "calibrate", "ext_good/model.onnx", *NPZ, "--out", "ext_out.onnx", message=r"'ext_out.onnx.data' already exists"),
    case("out-is-a-device", "fit", "cap.npz", "--out", "/dev/null", "--force", message=r"--out '/dev/null' is not a regular file \(a device or a pipe\)"),
    case("output-dir-missing", "capture", "model.onnx", *NPZ, "--out", "nowhere/c.npz", message=r"output directory 'nowhere' for --out does not exist"),
    case("unwritable-dir-capture", "capture", "model.onnx", *NPZ, "--out", "readonly/c.npz", setup=unwritable_readonly, message=r"cannot write to directory 'readonly' \(--out\)"),
    case("unwritable-dir-report", "report", "cap.npz", "--out", "readonly/rep", *T2, setup=unwritable_readonly, message=r"cannot write to directory 'readonly' \(--out\)"),
    case("eacces-on-write", "patch", "model.onnx", *T2, "--out", "readonly/p.onnx", setup=eacces_on_create, message=r"cannot write 'readonly/p.onnx': permission denied"),
    # ---- issue 11: parameters the graph's dtype cannot compute with (every probability would be NaN)
    case("temperature-subnormal", "patch", "model.onnx", "--temperature", "1e-45", "--out", "p.onnx", message=r"temperature 1e-45 is below 1.18e-38, the smallest normal float32 number \(the patched model computes the calibration in float32\).*--compute-dtype float64"),
    case("temperature-too-large", "patch", "model.onnx", "--temperature", "1e300", "--out", "p.onnx", message=r"temperature 1e\+300 is above 3.4e\+38, the largest float32 number"),
    case("fit-json-temperature-subnormal", "patch", "model.onnx", "--fit", "fit_tiny_t.json", "--out", "p.onnx", message=r"temperature 1e-300 is below 1.18e-38, the smallest normal float32 number"),
    case("logits-over-t-overflow", "report", "huge_logits_cap.npz", "--temperature", "1e-280", "--out", "rep", message=r"temperature 1e-280 makes the calibrated logits overflow float64 \(the report computes in float64\): the largest \|logit\| seen is 3e\+38.*T must be at least"),
    case("verify-every-row-dropped", "verify", "patched3.onnx", "--data", "all_nan.npz", "--drop-nonfinite", "-q", message=r"NaN or Inf in 40 of 40 rows .*: every row, so there is nothing left to check \(40 of 40 rows would be dropped\)"),
    case("fit-every-row-dropped", "fit", "all_nan_cap.npz", "--drop-nonfinite", "--out", "f.json", message=r"NaN or Inf in 40 of 40 rows .*: every row, so nothing is left to work on"),
    # ---- issue 11: every numeric option within its range, with the range in the message
    case("threads-out-of-range", "capture", "model.onnx", *NPZ, "--out", "c.npz", "--threads", "100000", message=r"--threads 100000 is out of range: give a number of threads .* from 0 to \d+"),
    case("batch-size-out-of-range", "calibrate", "model.onnx", *NPZ, "--out", "o.onnx", "--batch-size", "100000000", message=r"--batch-size 100000000 is out of range: give a number of samples from 1 to 16777216"),
    case("seed-negative", "fit", "cap.npz", "--seed", "-5", message=r"--seed -5 is out of range: give a seed from 0 to 4294967295"),
    case("shuffle-seed-negative", "capture", "model.onnx", *NPZ, "--out", "c.npz", "--limit", "5", "--shuffle-seed", "-1", message=r"--shuffle-seed -1 is out of range: give a seed from 0 to 4294967295"),
    case("bins-out-of-range", "fit", "cap.npz", "--bins", "2000000000", message=r"--bins 2000000000 is out of range: give a number of bins from 2 to 100000"),
    case("bins-over-memory", "fit", "cap.npz", "--bins", "100000", "--bootstrap", "0", setup=memory(1 << 20), message=r"--bins 100000 for 4 classes \(the per-class bin sums of the classwise ECE\) needs 12.2 MiB, more than the 1 MiB of memory available; lower --bins"),
    case("bootstrap-out-of-range", "calibrate", "model.onnx", *NPZ, "--out", "o.onnx", "--bootstrap", "1000000", message=r"--bootstrap 1000000 is out of range: give a number of replicates .* from 0 to 10000"),
    case("l2-out-of-range", "fit", "cap.npz", "--method", "vector", "--l2", "1e308", message=r"--l2 1e\+308 is out of range: give a penalty \(0 for none\) from 0 to 1e\+06"),
    case("latency-runs-out-of-range", "verify", "patched.onnx", *NPZ, "--latency-runs", "0", message=r"--latency-runs 0 is out of range: give a number of runs from 1 to 100000"),
    case("max-model-bytes-out-of-range", "inspect", "model.onnx", "--max-model-bytes", "9" * 400, message=r"--max-model-bytes '9+' is out of range: give a size from 1 byte to 8 EiB"),
    case("resize-out-of-range", "capture", "belt.onnx", "--data", "images", "--out", "c.npz", "--resize", "70000", message=r"--resize = 70000 is not a number of pixels from 1 to 65535"),
    case("resize-over-memory", "capture", "belt.onnx", "--data", "images", "--out", "c.npz", "--resize", "20000", setup=memory(2 << 30), message=r"image 'class0/img0.png' \(32x32, height x width\) resized by --resize 20000 to 20000x20000 needs 5.59 GiB, more than the 2 GiB of memory available; lower --resize"),
    # ---- issue 11: file names of any bytes, image paths inside the folder, pixel depths
    case("images-name-not-utf8", "capture", "belt.onnx", "--data", "images_bad_name", "--out", "c.npz", message=r"image 'images_bad_name/class1/broken\\xff\.png' cannot be read"),
    case("images-csv-outside-folder", "capture", "belt.onnx", "--data", "images", "--labels", "outside_labels.csv", "--out", "c.npz", message=r"line 3 of 'outside_labels.csv' names '\.\./outside\.png', which is outside the image folder 'images'"),
    case("images-32-bit-float", "calibrate", "belt.onnx", "--data", "images_32bit", "--out", "o.onnx", message=r"image 'class2/depth.tif' has 32-bit floating-point pixels \(Pillow mode 'F'\)"),
    case("csv-float16-overflow", "capture", "f16.onnx", "--data", "f16_overflow.csv", "--out", "c.npz", message=r"line 6, column 'f1' of 'f16_overflow.csv' holds 70000, outside what model input 'x' \(float16\) can hold \(-65504 to 65504\)"),
    # ---- issue 11: a model that fails at run time: one line naming the node and the rows
    case("model-fails-at-run-time", "capture", "reshape_fails.onnx", *NPZ, "--out", "c.npz", "-q", message=r"node 'impossible_reshape' \(Reshape\) failed \(.*cannot be reshaped.*\) on rows 0\.\.39 of 'val.npz'"),
    # ---- issue 16: decision outputs
    case("accept-error-out-of-range", "calibrate", "model.onnx", *NPZ, "--out", "o.onnx", "--accept-error", "1.5", message=r"--accept-error must be a number strictly between 0 and 1, got 1.5"),
    case("set-score-unknown", "calibrate", "model.onnx", *NPZ, "--out", "o.onnx", "--set-coverage", "0.9", "--set-score", "raps", message=r"--set-score 'raps' is not one of: las, aps"),
    case("set-per-class-without-coverage", "patch", "model.onnx", *T2, "--out", "p.onnx", "--set-per-class", message=r"--set-score and --set-per-class apply to --set-coverage"),
    case("decisions-with-holdout-0", "calibrate", "model.onnx", *NPZ, "--out", "o.onnx", "--holdout", "0", "--accept-error", "0.1", message=r"with --holdout 0 every row is fitted on.*--decision-data"),
    case("patch-decisions-without-rows", "patch", "model.onnx", *T2, "--out", "p.onnx", "--set-coverage", "0.9", message=r"patch has none.*--decision-data"),
    case("decision-data-without-labels", "patch", "model.onnx", *T2, "--out", "p.onnx", "--accept-error", "0.1", "--decision-data", "unlabelled.npz", message=r"'unlabelled.npz' has no array named 'labels'"),
    case("verify-targets-without-decisions", "verify", "patched.onnx", *NPZ, "--accept-error", "0.1", message=r"hold the model's decision outputs to targets, and it has none"),
]


@pytest.mark.parametrize("c", CASES, ids=[c.id for c in CASES])
def test_bad_input(corpus, run_cli, monkeypatch, c):
    monkeypatch.chdir(corpus)
    if c.setup is not None:
        c.setup(monkeypatch, corpus)
    before = snapshot(corpus)
    try:
        r = run_cli(*c.argv(corpus))
        lines = [line for line in r.err.splitlines() if line.strip()]
        assert r.code == 2, r.err
        assert "Traceback" not in r.err and "internal error" not in r.err, r.err
        assert len(lines) == 1 and lines[0].startswith("onnxcal: error: "), r.err
        assert re.search(c.message, lines[0]), lines[0]
        assert snapshot(corpus) == before  # nothing created, nothing changed
    finally:
        _remove_new(corpus, before)  # a failing case must not change what the next ones see


def _remove_new(root: Path, before: dict[str, str]) -> None:
    for rel in sorted(set(snapshot(root)) - set(before), key=len, reverse=True):
        p = root / rel
        shutil.rmtree(p) if p.is_dir() and not p.is_symlink() else p.unlink()


def test_the_corpus_covers_every_command_and_forty_cases():
    commands = {c.args[0] for c in CASES}
    assert commands == {"inspect", "capture", "fit", "patch", "verify", "report", "calibrate"}
    assert len(CASES) >= 40 and len({c.id for c in CASES}) == len(CASES)


def test_the_fixes_the_errors_suggest_work(corpus, run_cli, monkeypatch):
    monkeypatch.chdir(corpus)
    before = snapshot(corpus)
    r = run_cli("fit", "nonfinite_cap.npz", "--drop-nonfinite", "--bootstrap", "0")
    assert r.code == 0 and "note: dropped 4 rows: the logits in 'nonfinite_cap.npz' contain NaN or Inf" in r.out
    r = run_cli("verify", "patched3.onnx", "--data", "nonfinite.npz", "--max-ece", "0.5", "--drop-nonfinite")
    assert r.code == 0 and "note: dropped 4 rows" in r.out and "all checks passed" in r.out
    assert run_cli("inspect", "model.onnx", "--max-model-bytes", "1KiB").code == 0
    assert run_cli("capture", "huge_input.onnx", *NPZ, "--out", "c.npz", "--batch-size", "1").code == 2  # still 16 TiB
    assert snapshot(corpus) == before


def test_verify_reports_a_record_that_disagrees_as_a_failed_check(corpus, run_cli, monkeypatch):
    # issue 6's design: for the CI gate a record that does not match its graph is a failed
    # check (exit 1) with the figures, not bad input; patch and report refuse it (above)
    monkeypatch.chdir(corpus)
    for model, failed in (("record_lost_node.onnx", "reference"), ("record_wrong_t.onnx", "record")):
        r = run_cli("verify", model, *NPZ, "--json")
        assert r.code == 1, r.err
        assert failed in {c["name"] for c in json.loads(r.out)["checks"] if c["status"] == "fail"}


# --------------------------------------------------------------------------
# The real process: exit status and stderr


def _console() -> list[str]:
    exe = Path(sys.executable).with_name("onnxcal")
    return [str(exe)] if exe.exists() else [sys.executable, "-m", "onnxcal"]


@pytest.mark.parametrize(
    "args, message",
    [
        (["inspect", "truncated.onnx"], "is not a readable ONNX model"),
        (["capture", "model.onnx", "--data", "pickled.npz", "--out", "c.npz"], "holds Python objects"),
        # onnxruntime's own (coloured, multi-line) log goes to the process's stderr, which only a
        # real process shows: it must be silent, leaving onnxcal's one line (issue 11)
        (["capture", "reshape_fails.onnx", "--data", "val.npz", "--out", "c.npz", "-q"],
         "node 'impossible_reshape' (Reshape) failed"),
    ],
    ids=["truncated-onnx", "pickled-npz", "runtime-failure"],
)
def test_console_script_exit_status_and_stderr(corpus, args, message):
    before = snapshot(corpus)
    r = subprocess.run(_console() + args, cwd=corpus, capture_output=True, text=True, timeout=120)
    assert r.returncode == 2 and r.stdout == ""
    assert r.stderr.count("\n") == 1 and r.stderr.startswith("onnxcal: error: ") and message in r.stderr
    assert snapshot(corpus) == before


@pytest.mark.parametrize("c", [c for c in CASES if c.id in ("truncated-onnx", "graph-with-cycle", "images-corrupt")],
                         ids=lambda c: c.id)
def test_debug_keeps_the_original_error(corpus, run_cli, monkeypatch, c):
    """--debug shows the library's own exception (chained under onnxcal's) and still ends with the one line."""
    monkeypatch.chdir(corpus)
    r = run_cli("--debug", *c.argv(corpus))
    assert r.code == 2
    assert "Traceback" in r.err and "The above exception was the direct cause" in r.err
    assert r.err.rstrip().splitlines()[-1].startswith("onnxcal: error: ")


def test_unprivileged_user_meets_a_real_permission_error():
    """The kernel's own EACCES, without simulation: run as 'nobody' when we are root."""
    work = Path(tempfile.mkdtemp(prefix="onnxcal-eacces-"))
    try:
        work.chmod(0o755)
        shutil.copyfile(Path(make_corpus.BELT_MODEL), work / "model.onnx")
        (work / "locked").mkdir()
        (work / "locked").chmod(0o555)
        cmd = _console() + ["patch", "model.onnx", "--temperature", "2", "--out", "locked/p.onnx"]
        if os.geteuid() == 0:
            if shutil.which("setpriv") is None:
                pytest.skip("running as root without setpriv: cannot drop privileges for a real EACCES")
            drop = ["setpriv", "--reuid=65534", "--regid=65534", "--clear-groups", "--"]
            can_read = "import importlib.util, os, sys; s = importlib.util.find_spec('onnxcal'); sys.exit(not os.access(s.origin, os.R_OK))"
            probe = subprocess.run(drop + [sys.executable, "-c", can_read], cwd=work, capture_output=True)
            if probe.returncode:
                pytest.skip("user nobody cannot read this checkout or its venv (a private home directory?)")
            cmd = drop + cmd
        r = subprocess.run(cmd, cwd=work, capture_output=True, text=True, timeout=120)
        assert r.returncode == 2, r.stderr
        assert r.stderr.startswith("onnxcal: error: cannot write to directory 'locked' (--out)"), r.stderr
        assert "Traceback" not in r.stderr and os.listdir(work / "locked") == []
    finally:
        (work / "locked").chmod(0o755)
        shutil.rmtree(work)
