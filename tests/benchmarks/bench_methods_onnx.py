"""Every method end to end through ONNX, and ``--method auto``, side by side with CalibratedClassifierCV.

    .venv/bin/python tests/benchmarks/bench_methods_onnx.py                 # --repeats 5 --bootstrap 200
    .venv/bin/python tests/benchmarks/bench_methods_onnx.py --only skl2onnx_mlp_tensor --out /tmp/table.md

The models are real exports (fixtures/exporters/, made by skl2onnx from
scikit-learn models trained on scikit-learn's bundled wine, digits and
breast-cancer sets; see fixtures/exporters/README.md), each with its
validation set. Each repeat splits a set (stratified, seed = repeat) into a
calibration half and a test half. onnxcal and scikit-learn get exactly the
same calibration rows and neither sees the test half. onnxcal sees the
calibration half through its own API as the CLI runs it: ``capture`` of
the ONNX model, ``fit`` (holdout 0.25 for its held-out report; the
parameters baked in are fitted on the whole calibration half, as every
``fit`` does; ``auto`` cross-fits every method on the whole calibration
half), ``patch``; the patched ONNX model is then run by onnxruntime on the
test half, and its output is what is scored. So every onnxcal figure goes
through the graph onnxcal wrote.

scikit-learn: ``CalibratedClassifierCV(FrozenEstimator(m), method=...)``
for sigmoid, isotonic and temperature, where ``m`` is the same ONNX model
run by onnxruntime (its probabilities as ``predict_proba``), fitted on the
same calibration half, scored on the same test half.

"auto chose" names each split's choice ("uncalibrated": the model left as
it is; "(smoothed targets)": the map baked in was fitted to Platt's smoothed
targets: the calibration half is classified without error, or the chosen
map, fitted, classifies all of it correctly).

"auto (one split)": the rule before cross-fitting, for comparison (fit on
75 % of the calibration half, the simplest method whose NLL on the other
25 % lies within the best one's 95 % bootstrap interval), computed here from
the same capture; its row is the chosen method's patched model.

Metrics on the test half: NLL (sklearn.metrics.log_loss, which clips),
top-label ECE with 15 equal-width bins (onnxcal.metrics), Brier score in
its multiclass form mean_i sum_k (p_ik - y_ik)^2 over all columns (binary
problems included, i.e. twice the binary form), accuracy. Means over the
repeats. Verdicts: per pair (the issue's target), auto's mean test NLL
against the best scikit-learn method's mean (within 1e-4 is equal); per
split, against the best scikit-learn method of that split.

Not here: the onnxmltools LightGBM and XGBoost exports import default-domain
opset 9 (their IR version allows no later one); the maps' subgraphs need
opset 13, so ``patch`` refuses them, saying so.
"""

from __future__ import annotations

import argparse
import json
import tempfile
import time
import warnings
from collections import defaultdict
from pathlib import Path

import numpy as np
import onnxruntime as ort
from bench_methods import metrics as numpy_route_metrics  # the sibling script, on sys.path[0]
from sklearn.base import BaseEstimator, ClassifierMixin
from sklearn.calibration import CalibratedClassifierCV
from sklearn.frozen import FrozenEstimator
from sklearn.model_selection import train_test_split

from onnxcal import api, resample
from onnxcal.choose import METHODS, candidate_methods, n_parameters
from onnxcal.data import DataSpec
from onnxcal.fit import FitOptions, fit_scaling
from onnxcal.fit.auto import row_nll

FIXTURES = Path(__file__).resolve().parents[2] / "fixtures" / "exporters"
# (fixture name in the manifest, short label)
MODELS = (
    ("skl2onnx_logreg_pipeline_tensor", "logreg/wine"),
    ("skl2onnx_random_forest_tensor", "forest/wine"),
    ("skl2onnx_mlp_tensor", "mlp/digits"),
    ("skl2onnx_svc_tensor", "svc/breast cancer"),
    ("skl2onnx_logreg_saturated_tensor", "logreg-saturated/breast cancer"),
)
SKLEARN = ("sigmoid", "isotonic", "temperature")


class OnnxClassifier(ClassifierMixin, BaseEstimator):
    """An ONNX classifier as a fitted scikit-learn estimator: predict_proba runs it with onnxruntime."""

    def __init__(self, path: str = "", output: str = "", classes: int = 2) -> None:
        self.path, self.output, self.classes = path, output, classes

    def fit(self, x: np.ndarray, y: np.ndarray) -> OnnxClassifier:
        self.classes_ = np.arange(self.classes)
        return self

    def predict_proba(self, x: np.ndarray) -> np.ndarray:
        sess = ort.InferenceSession(self.path, providers=["CPUExecutionProvider"])
        name = sess.get_inputs()[0].name
        p = sess.run([self.output], {name: np.asarray(x, dtype=np.float32)})[0]
        return np.asarray(p, dtype=np.float64)

    def predict(self, x: np.ndarray) -> np.ndarray:
        return self.predict_proba(x).argmax(axis=1)


def metrics(p: np.ndarray, y: np.ndarray) -> dict[str, float]:
    """bench_methods.metrics (the same four figures on both routes) on rows renormalised first:
    float32 outputs sum to 1 within rounding, and log_loss warns otherwise."""
    return numpy_route_metrics(p / p.sum(axis=1, keepdims=True), y)


def _run(path: Path, output: str, x: np.ndarray) -> np.ndarray:
    sess = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])
    return np.asarray(sess.run([output], {sess.get_inputs()[0].name: x.astype(np.float32)})[0], dtype=np.float64)


def one_split_rule(logits: np.ndarray, labels: np.ndarray, kind: str, seed: int = 0, replicates: int = 200) -> str:
    """The rule before cross-fitting (see the module docstring), on a capture's logits."""
    fit_rows, held = resample.split_holdout(labels, 0.25, seed)
    nll, size = {}, {}
    for m in candidate_methods(kind):
        s = fit_scaling(logits, labels, FitOptions(method=m), rows=fit_rows).scaling
        nll[m], size[m] = row_nll(s.apply(logits[held]), labels[held]), n_parameters(s, logits.shape[1])
    best = min(nll, key=lambda m: nll[m].mean())
    rng = np.random.default_rng(seed)
    hi = np.percentile([nll[best][rng.integers(0, len(held), len(held))].mean() for _ in range(replicates)], 97.5)
    return min((m for m in nll if nll[m].mean() <= hi), key=lambda m: (size[m], METHODS.index(m)))


def onnxcal_route(entry: dict, x_cal, y_cal, x_test, methods, bootstrap: int, work: Path) -> tuple[dict, str, float]:
    """Per method: (test probabilities, the fit summary), "auto" too; the one-split rule's pick; auto's seconds."""
    model = FIXTURES / entry["model"]
    np.savez(work / "cal.npz", X=x_cal.astype(np.float32), labels=y_cal)
    cap = api.capture(model, DataSpec(work / "cal.npz"), out=work / "cal_logits.npz", force=True)
    out: dict[str, tuple] = {}
    auto_seconds = 0.0
    for method in (*methods, "auto"):
        options = FitOptions(method=method, holdout=0.25, bootstrap=bootstrap if method == "auto" else 0)
        t0 = time.perf_counter()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            summary = api.fit(cap, out=work / f"fit_{method}.json", force=True, options=options)
        if method == "auto":
            auto_seconds = time.perf_counter() - t0
        patched = work / f"patched_{method}.onnx"
        api.patch(model, patched, fit=summary, force=True)
        p = _run(patched, entry["output"], x_test)
        out[method] = (p, summary)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        logits = np.asarray(cap.logits, dtype=np.float32)
        old = one_split_rule(logits, np.asarray(cap.labels), "multiclass")
    return out, old, auto_seconds


def sklearn_route(entry: dict, x_cal, y_cal, x_test) -> dict[str, np.ndarray]:
    base = OnnxClassifier(str(FIXTURES / entry["model"]), entry["output"], entry["num_classes"]).fit(x_cal, y_cal)
    out = {}
    for m in SKLEARN:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            cal = CalibratedClassifierCV(FrozenEstimator(base), method=m).fit(x_cal, y_cal)
        out[f"sklearn {m}"] = cal.predict_proba(x_test)
    return out


def one_split(entry: dict, seed: int, bootstrap: int) -> tuple[dict[str, dict[str, float]], str, str, float]:
    data = np.load(FIXTURES / entry["val"])
    x, y = data["X"], data["labels"].astype(np.int64)
    x_cal, x_test, y_cal, y_test = train_test_split(x, y, test_size=0.5, stratify=y, random_state=seed)
    # Every fixture's output holds K >= 2 probabilities, captured as K log-probabilities: multiclass maps.
    methods = candidate_methods("multiclass")
    base = _run(FIXTURES / entry["model"], entry["output"], x_test)
    rows: dict[str, dict[str, float]] = {"uncalibrated": metrics(base, y_test)}
    with tempfile.TemporaryDirectory() as tmp:
        ours, old, seconds = onnxcal_route(entry, x_cal, y_cal, x_test, methods, bootstrap, Path(tmp))
    for m, (p, _) in ours.items():
        rows[m] = metrics(p, y_test)
    rows["auto (one split)"] = dict(rows[old])
    for m, p in sklearn_route(entry, x_cal, y_cal, x_test).items():
        rows[m] = metrics(p, y_test)
    choice = ours["auto"][1].choice
    smoothed = ours["auto"][1].options.smoothed_targets  # every candidate, or the chosen map's own fit
    return rows, choice.chosen + (" (smoothed targets)" if smoothed else ""), old, seconds


def table(name: str, results: list[dict[str, dict[str, float]]], chosen: list[str], old: list[str]) -> str:
    mean: dict[str, dict[str, float]] = defaultdict(dict)
    for m in results[0]:
        for f in ("nll", "ece", "brier", "accuracy"):
            mean[m][f] = float(np.mean([r[m][f] for r in results]))
    lines = [f"**{name}**", "", f"auto chose: {', '.join(chosen)}; the one-split rule chose: {', '.join(old)}", "",
             "| method | NLL | ECE | Brier | accuracy |", "|---|---:|---:|---:|---:|"]
    for m, v in mean.items():
        lines.append(f"| {m} | {v['nll']:.4f} | {v['ece']:.4f} | {v['brier']:.4f} | {v['accuracy']:.4f} |")
    return "\n".join(lines)


def verdicts(results: list[dict[str, dict[str, float]]], name: str = "auto") -> tuple[int, int, int]:
    """Splits where ``name``'s test NLL is better than / equal to / worse than the best scikit-learn method's."""
    better = equal = worse = 0
    for r in results:
        best = min(r[f"sklearn {m}"]["nll"] for m in SKLEARN)
        d = r[name]["nll"] - best
        better += d < -1e-4
        equal += abs(d) <= 1e-4
        worse += d > 1e-4
    return better, equal, worse


def pair_verdict(results: list[dict[str, dict[str, float]]], name: str = "auto") -> tuple[str, float, str, float]:
    """The issue's target per pair: ``name``'s mean test NLL against the best scikit-learn method's mean."""
    ours = float(np.mean([r[name]["nll"] for r in results]))
    means = {m: float(np.mean([r[f"sklearn {m}"]["nll"] for r in results])) for m in SKLEARN}
    best = min(means, key=means.__getitem__)
    d = ours - means[best]
    word = "better" if d < -1e-4 else "equal" if d <= 1e-4 else "worse"
    return word, ours, best, means[best]


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--bootstrap", type=int, default=200, help="bootstrap replicates of --method auto")
    ap.add_argument("--out", default=None, help="write the Markdown tables to this file too")
    ap.add_argument("--only", default=None, help="one fixture name")
    args = ap.parse_args()
    manifest = {e["name"]: e for e in json.loads((FIXTURES / "manifest.json").read_text())}
    parts, totals, old_totals, pairs = [], [0, 0, 0], [0, 0, 0], []
    for name, label in MODELS:
        if args.only and name != args.only:
            continue
        t0 = time.perf_counter()
        results, chosen, old, seconds = [], [], [], []
        for seed in range(args.repeats):
            rows, pick, old_pick, s = one_split(manifest[name], seed, args.bootstrap)
            results.append(rows)
            chosen.append(pick)
            old.append(old_pick)
            seconds.append(s)
        b, e, w = verdicts(results)
        ob, oe, ow = verdicts(results, "auto (one split)")
        totals = [totals[0] + b, totals[1] + e, totals[2] + w]
        old_totals = [old_totals[0] + ob, old_totals[1] + oe, old_totals[2] + ow]
        word, ours, best, theirs = pair_verdict(results)
        pairs.append((label, word, ours, best, theirs, pair_verdict(results, "auto (one split)")[0]))
        n_rows = len(np.load(FIXTURES / manifest[name]["val"])["labels"])
        head = f"{label} ({name}, {n_rows} rows: {n_rows - n_rows // 2} to calibrate)"
        parts.append(table(head, results, chosen, old)
                     + f"\n\nPair: auto's mean test NLL {ours:.4f} against the best scikit-learn method's "
                     f"(sklearn {best}) {theirs:.4f}: **{word}**. Per split: better {b}, equal {e}, worse {w} "
                     f"(the one-split rule: better {ob}, equal {oe}, worse {ow}). `fit --method auto` took "
                     f"{np.median(seconds):.1f} s (median; {', '.join(f'{x:.1f}' for x in seconds)}); "
                     f"the pair {time.perf_counter() - t0:.0f} s in all.\n")
        print(parts[-1], flush=True)
    summary = ["| pair | auto's test NLL | best scikit-learn (mean) | auto vs it | one-split rule vs it |",
               "|---|---:|---|---|---|"]
    summary += [f"| {p[0]} | {p[2]:.4f} | {p[3]} {p[4]:.4f} | {p[1]} | {p[5]} |" for p in pairs]
    text = ("\n".join(summary) + "\n\n" + "\n".join(parts)
            + f"\nAll splits: auto better than the best scikit-learn method on {totals[0]}, equal on {totals[1]}, "
            f"worse on {totals[2]} (the one-split rule: {old_totals[0]}, {old_totals[1]}, {old_totals[2]}).\n")
    print("\n".join(summary))
    print(text.splitlines()[-1])
    if args.out:
        Path(args.out).write_text(text)


if __name__ == "__main__":
    main()
