"""Every calibration map side by side with scikit-learn's CalibratedClassifierCV.

    .venv/bin/python tests/benchmarks/bench_methods.py            # --repeats 3 --out table.md
    .venv/bin/python tests/benchmarks/bench_methods.py --l2-grid  # the ODIR strength of matrix / Dirichlet

Data: scikit-learn's bundled digits (10 classes), wine (3) and breast cancer
(2). Base models, trained here with fixed seeds: logistic regression
(C = 100, overconfident), random forest (100 trees, underconfident), MLP
(one hidden layer of 64, almost no penalty, overconfident) and an RBF SVM
(decision values, not probabilities). Each repeat splits every set
(stratified, seed = repeat) into 50 % training, 25 % calibration ("fit")
and 25 % held-out; the base model is trained on the first part, every
calibration method sees only the second, every figure is on the third.

Scores onnxcal calibrates: what the model gives, as a capture of its ONNX
export would hold: ``decision_function`` (logistic regression, SVM; one
column for a binary problem) or log ``predict_proba`` (clipped at 1e-12;
for a binary problem the logit log p1 - log p0). This is route (a) of the
issue: the models are not exported to ONNX here (skl2onnx is allowed only
in fixture scripts); the maps are applied with their NumPy references,
which the tests check against the ONNX subgraphs. The end-to-end ONNX
route comes with the integration into ``calibrate``.

scikit-learn: CalibratedClassifierCV(FrozenEstimator(model), method=m) for
m in sigmoid, isotonic, temperature, fitted on the same calibration part.

"auto": onnxcal's own ``--method auto`` rule (onnxcal.fit.auto.compare:
every applicable method cross-fitted on 5 stratified folds of the
calibration part, 3 times on small sets, each fit to Platt's smoothed
targets where its maximum-likelihood estimate does not exist; the lowest
mean out-of-fold NLL is the best, the simplest method whose paired per-row
NLL difference to it has a 95 % BCa interval reaching 0 is chosen; the
model left as it is when every map is worse than its own probabilities by
a paired interval above 0); the table shows that method fitted on the
whole calibration part as auto bakes it in (``fit_with_estimate``). "auto (one split)": the rule before cross-fitting,
for comparison (split the calibration part 75/25 with onnxcal's stratified
holdout, fit on the 75 %, the simplest method whose NLL on the 25 % lies
inside the best one's 95 % bootstrap interval). Neither sees the held-out
part.

Metrics on the held-out part: NLL (sklearn.metrics.log_loss, which clips
probabilities to [eps, 1 - eps]), top-label ECE with 15 equal-width bins
(onnxcal.metrics), Brier score in its multiclass form
mean_i sum_k (p_ik - y_ik)^2 (binary problems: over both columns, i.e. twice
the binary form). Means over the repeats.
"""

from __future__ import annotations

import argparse
import time
import warnings
from collections import defaultdict
from collections.abc import Callable

import numpy as np
from sklearn.calibration import CalibratedClassifierCV
from sklearn.datasets import load_breast_cancer, load_digits, load_wine
from sklearn.ensemble import RandomForestClassifier
from sklearn.frozen import FrozenEstimator
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import log_loss
from sklearn.model_selection import train_test_split
from sklearn.neural_network import MLPClassifier
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import SVC

from onnxcal import maps, resample
from onnxcal.choose import IDENTITY, Choice
from onnxcal.fit import FitOptions, fit_scaling
from onnxcal.fit.auto import compare, fit_with_estimate
from onnxcal.metrics import expected_calibration_error, sigmoid, softmax

DATASETS: dict[str, Callable] = {"digits": load_digits, "wine": load_wine, "breast_cancer": load_breast_cancer}
MODELS: dict[str, Callable[[int], object]] = {
    "logreg": lambda seed: make_pipeline(StandardScaler(), LogisticRegression(C=100.0, max_iter=5000)),
    "forest": lambda seed: RandomForestClassifier(n_estimators=100, random_state=seed),
    "mlp": lambda seed: make_pipeline(StandardScaler(), MLPClassifier((64,), alpha=1e-6, max_iter=2000,
                                                                      random_state=seed)),
    "svm": lambda seed: make_pipeline(StandardScaler(), SVC(C=1.0)),
}
ONNXCAL_MULTICLASS = ("temperature", "vector", "matrix", "dirichlet", "ensemble-temperature", "ovr-platt", "isotonic",
                      "histogram")
ONNXCAL_BINARY = ("temperature", "platt", "beta", "isotonic", "histogram")
SKLEARN = ("sigmoid", "isotonic", "temperature")
AUTOS = ("auto", "auto (one split)")


def scores_of(model, x: np.ndarray, binary: bool) -> np.ndarray:
    """What a capture of the model's ONNX export would hold (see the module docstring)."""
    if hasattr(model, "decision_function"):
        f = model.decision_function(x)
        return f[:, None] if binary else f
    logp = np.log(np.clip(model.predict_proba(x), 1e-12, None))
    return (logp[:, 1] - logp[:, 0])[:, None] if binary else logp


def probs_of_scores(z: np.ndarray) -> np.ndarray:
    """Probabilities over all classes from onnxcal scores (K columns, or one logit)."""
    if z.shape[1] == 1:
        p1 = sigmoid(z[:, 0])
        return np.c_[1 - p1, p1]
    return softmax(z)


def two_columns(p: np.ndarray) -> np.ndarray:
    return np.c_[1 - p[:, 0], p[:, 0]] if p.shape[1] == 1 else p


def metrics(p: np.ndarray, y: np.ndarray) -> dict[str, float]:
    k = p.shape[1]
    onehot = np.eye(k)[y]
    return {
        "nll": float(log_loss(y, p, labels=np.arange(k))),
        "ece": expected_calibration_error(p.max(axis=1), (p.argmax(axis=1) == y).astype(float), 15),
        "brier": float(np.mean(np.sum((p - onehot) ** 2, axis=1))),
        "accuracy": float(np.mean(p.argmax(axis=1) == y)),
    }


# --------------------------------------------------------------------------
# onnxcal's methods: fit on some rows, predict probabilities for others


def n_parameters(method: str, k: int, params: dict | None) -> int:
    return {"temperature": 1, "vector": 2 * k, "platt": 2}.get(method) or maps.module(method).n_parameters(k, params)


def fit_onnxcal(method: str, z: np.ndarray, y: np.ndarray, **kw) -> Callable[[np.ndarray], np.ndarray]:
    """Fit one method; return the map from scores to full probability rows, and its parameter count."""
    if method in ("temperature", "vector", "platt"):
        z32 = np.ascontiguousarray(z, dtype=np.float32)
        scaling = fit_scaling(z32, y, FitOptions(method=method, holdout=0, bootstrap=0)).scaling
        predict = lambda s: probs_of_scores(scaling.apply(s))  # noqa: E731
        return predict, n_parameters(method, z.shape[1], None)
    mod = maps.module(method)
    params = mod.fit(z, y, **kw).parameters
    return (lambda s: two_columns(mod.apply(params, s))), n_parameters(method, z.shape[1], params)


def one_split_choice(methods, z, y, seed: int, n_boot: int = 200) -> str:
    """The rule before cross-fitting (see the module docstring)."""
    fit_rows, eval_rows = resample.split_holdout(y, 0.25, seed)
    losses: dict[str, np.ndarray] = {}
    sizes = {}
    for m in methods:
        predict, sizes[m] = fit_onnxcal(m, z[fit_rows], y[fit_rows])
        p = np.clip(predict(z[eval_rows]), 1e-15, 1.0)
        losses[m] = -np.log(p[np.arange(len(eval_rows)), y[eval_rows]])
    means = {m: float(v.mean()) for m, v in losses.items()}
    best = min(means, key=means.__getitem__)
    rng = np.random.default_rng(seed)
    n = len(losses[best])
    hi = float(np.percentile([losses[best][rng.integers(0, n, n)].mean() for _ in range(n_boot)], 97.5))
    return min((m for m in methods if means[m] <= hi), key=lambda m: (sizes[m], means[m]))


def auto_choice(z: np.ndarray, y: np.ndarray, seed: int, n_boot: int = 200) -> Choice:
    """onnxcal's --method auto rule on these scores (cross-fitted, paired)."""
    kind = "binary" if z.shape[1] == 1 else "multiclass"
    options = FitOptions(method="auto", bootstrap=n_boot, seed=seed)
    return compare(np.ascontiguousarray(z, dtype=np.float32), y, options, kind, fit_scaling)[0]


def auto_rows(choice: Choice, rows: dict, z_cal: np.ndarray, y_cal: np.ndarray, z_te: np.ndarray,
              y_te: np.ndarray) -> dict:
    """The held-out figures of auto's choice: the model as it is, or the chosen method fitted on the whole
    calibration part as auto bakes it in (fit_with_estimate: smoothed targets where its estimate does not exist)."""
    if choice.chosen == IDENTITY:
        return dict(rows["uncalibrated"], choice=IDENTITY)
    z32 = np.ascontiguousarray(z_cal, dtype=np.float32)
    options = FitOptions(method=choice.chosen, smoothed_targets=choice.smoothed_targets)
    result, smoothed = fit_with_estimate(fit_scaling, z32, y_cal, options)
    name = choice.chosen + (" (smoothed)" if smoothed else "")
    return dict(metrics(probs_of_scores(result.scaling.apply(z_te)), y_te), choice=name)


# --------------------------------------------------------------------------


def one_pair(dataset: str, model_name: str, seed: int, grid: list[float] | None):
    x, y = DATASETS[dataset](return_X_y=True)
    binary = len(np.unique(y)) == 2
    x_tr, x_rest, y_tr, y_rest = train_test_split(x, y, test_size=0.5, random_state=seed, stratify=y)
    x_cal, x_te, y_cal, y_te = train_test_split(x_rest, y_rest, test_size=0.5, random_state=seed, stratify=y_rest)
    model = MODELS[model_name](seed).fit(x_tr, y_tr)
    z_cal, z_te = scores_of(model, x_cal, binary), scores_of(model, x_te, binary)
    rows: dict[str, dict[str, float]] = {"uncalibrated": metrics(probs_of_scores(z_te), y_te)}
    methods = ONNXCAL_BINARY if binary else ONNXCAL_MULTICLASS
    timing = {}
    for m in methods:
        t0 = time.perf_counter()
        predict, _ = fit_onnxcal(m, z_cal, y_cal)
        timing[m] = time.perf_counter() - t0
        rows[m] = metrics(predict(z_te), y_te)
    rows["auto"] = auto_rows(auto_choice(z_cal, y_cal, seed), rows, z_cal, y_cal, z_te, y_te)
    old = one_split_choice(methods, z_cal, y_cal, seed)
    rows["auto (one split)"] = dict(rows[old], choice=old)
    for m in SKLEARN:
        cal = CalibratedClassifierCV(FrozenEstimator(model), method=m).fit(x_cal, y_cal)
        rows[f"sklearn {m}"] = metrics(cal.predict_proba(x_te), y_te)
    if grid and not binary:
        for m in ("matrix", "dirichlet"):
            for lam in grid:
                predict, _ = fit_onnxcal(m, z_cal, y_cal, l2=lam)
                rows[f"{m} l2={lam:g}"] = metrics(predict(z_te), y_te)
    return rows, timing


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--l2-grid", action="store_true", help="also fit matrix/Dirichlet at l2 = 1e-2, 1, 10, 100, 1000")
    ap.add_argument("--out", default=None, help="write the Markdown tables to this file too")
    ap.add_argument("--sets", default=",".join(DATASETS), help="comma-separated: digits, wine, breast_cancer")
    args = ap.parse_args()
    warnings.simplefilter("ignore")
    grid = [1e-2, 1.0, 10.0, 100.0, 1000.0] if args.l2_grid else None
    results: dict[tuple[str, str], list[dict]] = defaultdict(list)
    times: dict[str, list[float]] = defaultdict(list)
    for dataset in args.sets.split(","):
        for model_name in MODELS:
            for seed in range(args.repeats):
                rows, timing = one_pair(dataset, model_name, seed, grid)
                results[(dataset, model_name)].append(rows)
                for m, t in timing.items():
                    times[m].append(t)
            print(f"done {dataset} / {model_name}", flush=True)
    text = report(results, times, args.repeats)
    print(text)
    if args.out:
        with open(args.out, "w") as fh:
            fh.write(text)


def report(results, times, repeats: int) -> str:
    out = []
    for metric in ("nll", "ece", "brier"):
        out.append(f"\n### Held-out {metric.upper()} (mean of {repeats} splits; lower is better)\n")
        columns = sorted({name for runs in results.values() for name in runs[0]}, key=_order)
        out.append("| set / model | " + " | ".join(columns) + " |")
        out.append("|---" * (len(columns) + 1) + "|")
        for (dataset, model), runs in results.items():
            cells = []
            for c in columns:
                vals = [r[c][metric] for r in runs if c in r]
                cells.append(f"{np.mean(vals):.3f}" if vals else "")
            out.append(f"| {dataset} / {model} | " + " | ".join(cells) + " |")
    out.append("\n### auto against the best scikit-learn method per pair (mean held-out NLL)\n")
    out.append("| set / model | auto | auto (one split) | best scikit-learn | auto vs it | one split vs it |")
    out.append("|---|---:|---:|---|---|---|")
    for (dataset, model), runs in results.items():
        sk = {m: float(np.mean([r[f"sklearn {m}"]["nll"] for r in runs])) for m in SKLEARN}
        best = min(sk, key=sk.__getitem__)
        ours = {a: float(np.mean([r[a]["nll"] for r in runs])) for a in AUTOS}
        word = {a: "better" if ours[a] < sk[best] - 1e-4 else "equal" if ours[a] <= sk[best] + 1e-4 else "worse"
                for a in AUTOS}
        out.append(f"| {dataset} / {model} | {ours['auto']:.4f} | {ours['auto (one split)']:.4f} | "
                   f"{best} {sk[best]:.4f} | {word['auto']} | {word['auto (one split)']} |")
    for name in AUTOS:
        out.append(f"\n### {name} against the best scikit-learn method, per split (held-out NLL)\n")
        wins = ties = losses = 0
        picks: dict[str, int] = defaultdict(int)
        worse_pairs = set()
        for pair, runs in results.items():
            for r in runs:
                best_sk = min(r[f"sklearn {m}"]["nll"] for m in SKLEARN)
                a = r[name]["nll"]
                picks[r[name]["choice"]] += 1
                if a < best_sk - 1e-4:
                    wins += 1
                elif a <= best_sk + 1e-4:
                    ties += 1
                else:
                    losses += 1
                    worse_pairs.add(" / ".join(pair))
        out.append(f"better on {wins}, equal (within 1e-4) on {ties}, worse on {losses} "
                   f"of {wins + ties + losses} splits"
                   + (f" (worse on: {', '.join(sorted(worse_pairs))})." if worse_pairs else "."))
        out.append("Choices: " + ", ".join(f"{m} {n}" for m, n in sorted(picks.items(), key=lambda kv: -kv[1])) + ".")
    out.append("\nMean fit time per method (s, on the calibration part): " + ", ".join(f"{m} {np.mean(t):.3f}" for m,
                                                                                       t in times.items()))
    return "\n".join(out) + "\n"


def _order(name: str) -> tuple[int, str]:
    order = ["uncalibrated", *ONNXCAL_MULTICLASS, "platt", "beta", *AUTOS, *(f"sklearn {m}" for m in SKLEARN)]
    return (order.index(name) if name in order else len(order), name)


if __name__ == "__main__":
    main()
