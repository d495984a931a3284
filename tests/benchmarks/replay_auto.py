"""Variants of ``--method auto``'s rule replayed at NumPy level on bench_methods_onnx.py's splits.

    .venv/bin/python tests/benchmarks/replay_auto.py                       # 5 pairs x 10 splits
    .venv/bin/python tests/benchmarks/replay_auto.py --only skl2onnx_random_forest_tensor

The same calibration and test halves as bench_methods_onnx.py (stratified,
seed = repeat), captured with onnxcal's ``capture`` (so the logits are the
ones ``fit`` sees); every candidate method is cross-fitted once with
maximum likelihood and once with Platt's smoothed targets (onnxcal's own
folds and resamples, ``onnxcal.fit.auto``), and each variant of the rule
picks from those same per-row out-of-fold NLLs. The pick is then fitted
on the whole calibration half and scored on the test half with its NumPy
reference (the end-to-end benchmark runs the patched ONNX model instead;
for the adopted rule both give the same test NLL to 4 decimals). scikit-
learn: CalibratedClassifierCV(FrozenEstimator(...)) on the ONNX model's
own probabilities, as in bench_methods_onnx.py.

Variants (docs/maths.md, "Choosing automatically"): ``ml`` the rule with
maximum-likelihood fits (before smoothed targets); ``smoothed`` every fit
to smoothed targets; ``adopted-targets`` smoothed targets only when every
calibration row is classified correctly; then, on top of that, the model
as it is (the identity) as a candidate: ``id-parsimony`` (0 parameters,
chosen when its interval reaches 0), ``id-lowest`` (chosen when its
cross-fitted NLL is the lowest), ``adopted`` (chosen only when every map is
worse than it by a paired interval above 0).
"""

from __future__ import annotations

import argparse
import json
import tempfile
import warnings
from pathlib import Path

import numpy as np
from bench_methods_onnx import FIXTURES, MODELS, _run, metrics
from sklearn.base import BaseEstimator, ClassifierMixin
from sklearn.calibration import CalibratedClassifierCV
from sklearn.frozen import FrozenEstimator
from sklearn.model_selection import train_test_split

from onnxcal import api
from onnxcal.choose import FOLDS, METHODS, candidate_methods
from onnxcal.data import DataSpec
from onnxcal.fit import FitOptions, fit_scaling
from onnxcal.fit.auto import _percentile, _resamples, fold_ids, out_of_fold, row_nll
from onnxcal.fit.smoothed import all_correct
from onnxcal.scaling import Scaling

VARIANTS = ("ml", "smoothed", "adopted-targets", "id-parsimony", "id-lowest", "adopted")


class Cached(ClassifierMixin, BaseEstimator):
    """A fitted classifier whose predict_proba looks rows up by index (column 0 of X)."""

    def __init__(self, p: np.ndarray | None = None) -> None:
        self.p = p

    def fit(self, x, y):
        self.classes_ = np.arange(self.p.shape[1])
        return self

    def predict_proba(self, x):
        return self.p[np.asarray(x[:, 0], dtype=int)]

    def predict(self, x):
        return self.predict_proba(x).argmax(axis=1)


def halves(entry: dict, seed: int, work: Path) -> dict[str, np.ndarray]:
    data = np.load(FIXTURES / entry["val"])
    x, y = data["X"], data["labels"].astype(np.int64)
    x_cal, x_test, y_cal, y_test = train_test_split(x, y, test_size=0.5, stratify=y, random_state=seed)
    out = {}
    for part, xx, yy in (("cal", x_cal, y_cal), ("test", x_test, y_test)):
        np.savez(work / "d.npz", X=xx.astype(np.float32), labels=yy)
        cap = api.capture(FIXTURES / entry["model"], DataSpec(work / "d.npz"), out=work / "c.npz", force=True)
        out[f"{part}_z"], out[f"{part}_y"] = np.asarray(cap.logits, dtype=np.float32), np.asarray(cap.labels)
        out[f"{part}_p"] = _run(FIXTURES / entry["model"], entry["output"], xx)
    return out


def sklearn_best(h: dict[str, np.ndarray]) -> dict[str, float]:
    p = np.r_[h["cal_p"], h["test_p"]]
    n = len(h["cal_y"])
    out = {}
    for m in ("sigmoid", "isotonic", "temperature"):
        cal = CalibratedClassifierCV(FrozenEstimator(Cached(p).fit(None, None)), method=m)
        q = cal.fit(np.arange(n)[:, None], h["cal_y"]).predict_proba(np.arange(n, len(p))[:, None])
        out[m] = metrics(q, h["test_y"])["nll"]
    return out


def scored(z: np.ndarray, y: np.ndarray, smoothed: bool, fold: np.ndarray) -> dict[str, tuple]:
    """Per method: (parameters, per-row out-of-fold NLL, bootstrap means); the identity too."""
    out = {}
    draws = list(_resamples(len(y), 200, 0, None))
    for m in ("identity", *candidate_methods("multiclass")):
        if m == "identity":
            oof, size = Scaling.of_temperature(1.0).apply(z.astype(np.float64)), 0
        else:
            oof, size, _ = out_of_fold(z, y, FitOptions(method=m, smoothed_targets=smoothed), fold, fit_scaling)
        losses = row_nll(oof, y)
        out[m] = (size, losses, np.array([c @ losses / c.sum() for c in draws]))
    return out


def pick(table: dict[str, tuple], identity: str) -> str:
    maps = {m: v for m, v in table.items() if m != "identity"}
    best = min(maps, key=lambda m: maps[m][1].mean())
    model = table["identity"]
    if identity == "adopted" and all(_percentile(v[2] - model[2])[0] > 0 for v in maps.values()):
        return "identity"
    if identity == "lowest" and model[1].mean() < maps[best][1].mean():
        return "identity"
    pool = table if identity == "parsimony" else maps
    if identity == "parsimony" and model[1].mean() < maps[best][1].mean():
        best = "identity"
    within = [best, *(m for m in pool if m != best and _percentile(pool[m][2] - pool[best][2])[0] <= 1e-12)]
    return min(within, key=lambda m: (pool[m][0], -1 if m == "identity" else METHODS.index(m)))


def test_nll(h: dict[str, np.ndarray], method: str, smoothed: bool) -> float:
    if method == "identity":
        return metrics(h["test_p"], h["test_y"])["nll"]
    s = fit_scaling(h["cal_z"], h["cal_y"], FitOptions(method=method, smoothed_targets=smoothed)).scaling
    return metrics(s.probabilities(h["test_z"].astype(np.float64)), h["test_y"])["nll"]


def one_split(entry: dict, seed: int) -> dict[str, float]:
    with tempfile.TemporaryDirectory() as tmp:
        h = halves(entry, seed, Path(tmp))
    z, y = h["cal_z"], h["cal_y"]
    fold = fold_ids(y, FOLDS, 0)
    ml, sm = scored(z, y, False, fold), scored(z, y, True, fold)
    separable = all_correct(z, y)
    chosen = {"ml": ("ml", pick(ml, "none")), "smoothed": ("sm", pick(sm, "none"))}
    adopted = sm if separable else ml
    for name, identity in (("adopted-targets", "none"), ("id-parsimony", "parsimony"), ("id-lowest", "lowest"),
                           ("adopted", "adopted")):
        chosen[name] = ("sm" if separable else "ml", pick(adopted, identity))
    row = {v: test_nll(h, m, tag == "sm") for v, (tag, m) in chosen.items()}
    row.update({f"sklearn {m}": v for m, v in sklearn_best(h).items()})
    row["uncalibrated"] = metrics(h["test_p"], h["test_y"])["nll"]
    return row


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=10)
    ap.add_argument("--only", default=None, help="one fixture name")
    args = ap.parse_args()
    warnings.simplefilter("ignore")
    manifest = {e["name"]: e for e in json.loads((FIXTURES / "manifest.json").read_text())}
    print("| pair | best scikit-learn (mean) | uncalibrated | " + " | ".join(VARIANTS) + " |")
    print("|---|" + "---:|" * (len(VARIANTS) + 2))
    for name, label in MODELS:
        if args.only and name != args.only:
            continue
        rows = [one_split(manifest[name], seed) for seed in range(args.repeats)]
        sk = min(("sigmoid", "isotonic", "temperature"), key=lambda m: np.mean([r[f"sklearn {m}"] for r in rows]))
        cells = [f"{sk} {np.mean([r[f'sklearn {sk}'] for r in rows]):.4f}"]
        cells += [f"{np.mean([r[c] for r in rows]):.4f}" for c in ("uncalibrated", *VARIANTS)]
        print(f"| {label} | " + " | ".join(cells) + " |", flush=True)


if __name__ == "__main__":
    main()
