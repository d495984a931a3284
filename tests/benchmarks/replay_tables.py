"""Per-split tables for replaying ``--method auto``'s rule: computed once, cached, then any rule in seconds.

    .venv/bin/python tests/benchmarks/replay_tables.py --cache /tmp/replay --seeds 0-5   # ~1.5 min per seed
    .venv/bin/python tests/benchmarks/replay_auto.py --cache /tmp/replay --seeds 0-5     # the rule variants

For every pair of bench_methods_onnx.py and every split (stratified halves,
seed = split, as there): the calibration half captured by onnxcal
(``capture``, the logits ``fit`` sees); every candidate method cross-fitted
on it with onnxcal's own folds for auto's ``--seed`` (``onnxcal.fit.auto``),
its per-row out-of-fold NLL kept, twice: ``ml``, each fit as auto makes it
(``fit_with_estimate``: maximum likelihood where the estimate exists), and
``sm``, every fit to Platt's smoothed targets (what auto does when every
calibration row is classified correctly); every method fitted on the whole
half the same two ways and scored on the test half with its NumPy
reference; scikit-learn's three calibrators on the ONNX model's own
probabilities (CalibratedClassifierCV on a frozen estimator).
On two-class softmax pairs also the binary maps (Platt, beta, isotonic,
histogram) on the logit difference z1 - z0, which is the same 2-class
softmax model. A third set of out-of-fold NLLs, ``plain``, fits every fold
as asked whether its estimate exists or not (the rule before 3 December
2026; replay_auto.py's ``before`` column).

``--route numpy``: the same for bench_methods.py's splits instead (its
scikit-learn models trained in the script on half of a bundled set, its
scores as a capture of their export would hold, calibration and test
quarters; seed = split).
"""

from __future__ import annotations

import argparse
import json
import pickle
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
from onnxcal.choose import FOLDS, candidate_methods
from onnxcal.data import DataSpec
from onnxcal.fit import FitOptions, fit_scaling
from onnxcal.fit.auto import fit_with_estimate, fold_ids, out_of_fold, row_nll
from onnxcal.fit.smoothed import all_correct
from onnxcal.scaling import Scaling

# Binary maps tried on z1 - z0 of a two-class softmax, named with this suffix.
DIFFERENCE = " (z1-z0)"
BINARY_ON_DIFFERENCE = ("platt", "beta", "isotonic", "histogram")


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


def sklearn_nll(h: dict[str, np.ndarray]) -> dict[str, float]:
    p = np.r_[h["cal_p"], h["test_p"]]
    n = len(h["cal_y"])
    out = {}
    for m in ("sigmoid", "isotonic", "temperature"):
        cal = CalibratedClassifierCV(FrozenEstimator(Cached(p).fit(None, None)), method=m)
        q = cal.fit(np.arange(n)[:, None], h["cal_y"]).predict_proba(np.arange(n, len(p))[:, None])
        out[m] = metrics(q, h["test_y"])["nll"]
    return out


def _methods(k: int) -> list[tuple[str, str]]:
    """(name in the table, onnxcal method)."""
    out = [(m, m) for m in candidate_methods("binary" if k == 1 else "multiclass")]
    if k == 2:
        out += [(m + DIFFERENCE, m) for m in BINARY_ON_DIFFERENCE]
    return out


def _view(name: str, z: np.ndarray) -> np.ndarray:
    return (z[:, 1:] - z[:, :1]).astype(z.dtype) if name.endswith(DIFFERENCE) else z


def _plain_out_of_fold(z: np.ndarray, y: np.ndarray, options: FitOptions, fold: np.ndarray) -> np.ndarray:
    """Out-of-fold logits with every fold fitted as asked, whether its estimate exists or not (the rule before)."""
    out = np.empty(z.shape, dtype=np.float64)
    for f in np.unique(fold):
        s = fit_scaling(z, y, options, rows=np.flatnonzero(fold != f)).scaling
        out[fold == f] = s.apply(np.asarray(z[fold == f], dtype=np.float64))
    return out


def table(z: np.ndarray, y: np.ndarray, z_test: np.ndarray, y_test: np.ndarray, test_p: np.ndarray,
          sklearn: dict[str, float], score, fold_seed: int, label: str) -> dict:
    """One split's table from its arrays (see the module docstring). ``score(p, y)`` gives the test metrics."""
    fold = fold_ids(y, FOLDS, fold_seed)
    out: dict = {"y": y, "separable": bool(all_correct(z, y)), "sklearn": sklearn,
                 "uncalibrated": score(test_p, y_test)["nll"], "methods": {}}
    own = row_nll(Scaling.of_temperature(1.0).apply(z.astype(np.float64)), y)
    out["methods"]["identity"] = {"size": 0, "ml": own, "sm": own, "plain": own,
                                  "test": {t: out["uncalibrated"] for t in ("ml", "sm", "plain")}}
    for name, method in _methods(z.shape[1]):
        zz, tz = _view(name, z), _view(name, z_test)
        row: dict = {"test": {}}
        try:
            for tag, smooth in (("ml", False), ("sm", True), ("plain", False)):
                options = FitOptions(method=method, smoothed_targets=smooth)
                if tag == "plain":
                    oof, s = _plain_out_of_fold(zz, y, options, fold), fit_scaling(zz, y, options).scaling
                else:
                    oof, row["size"], _, _ = out_of_fold(zz, y, options, fold, fit_scaling)
                    s = fit_with_estimate(fit_scaling, zz, y, options)[0].scaling
                row[tag] = row_nll(oof, y)
                p = s.probabilities(tz.astype(np.float64))
                row["test"][tag] = score(np.c_[1 - p, p] if p.shape[1] == 1 else p, y_test)["nll"]
        except Exception as e:  # noqa: BLE001 - a method that cannot be fitted here is left out, said so
            print(f"  {label}: {name} left out: {e}")
            continue
        out["methods"][name] = row
    return out


def onnx_tables(entry: dict, split: int, fold_seed: int) -> dict:
    """A split of bench_methods_onnx.py: its halves captured by onnxcal, its ONNX model's own probabilities."""
    with tempfile.TemporaryDirectory() as tmp:
        h = halves(entry, split, Path(tmp))
    return table(h["cal_z"], h["cal_y"], h["test_z"], h["test_y"], h["test_p"], sklearn_nll(h), metrics, fold_seed,
                 f"{entry['name']} split {split}")


def numpy_tables(pair: str, split: int, fold_seed: int) -> dict:
    """A split of bench_methods.py (route (a): its scores, its models trained here, seed = split)."""
    import bench_methods as bm

    dataset, model_name = pair.split("/")
    x, y = bm.DATASETS[dataset](return_X_y=True)
    binary = len(np.unique(y)) == 2
    x_tr, x_rest, y_tr, y_rest = train_test_split(x, y, test_size=0.5, random_state=split, stratify=y)
    x_cal, x_te, y_cal, y_te = train_test_split(x_rest, y_rest, test_size=0.5, random_state=split, stratify=y_rest)
    model = bm.MODELS[model_name](split).fit(x_tr, y_tr)
    z_cal, z_te = bm.scores_of(model, x_cal, binary), bm.scores_of(model, x_te, binary)
    sk = {m: bm.metrics(CalibratedClassifierCV(FrozenEstimator(model), method=m).fit(x_cal, y_cal).predict_proba(x_te),
                        y_te)["nll"] for m in ("sigmoid", "isotonic", "temperature")}
    return table(z_cal.astype(np.float32), y_cal, z_te.astype(np.float32), y_te, bm.probs_of_scores(z_te), sk,
                 bm.metrics, fold_seed, f"{pair} split {split}")


def pairs(route: str, sets: str) -> list[tuple[str, str]]:
    """(name in the cache, label) of a route's pairs."""
    if route == "onnx":
        return list(MODELS)
    import bench_methods as bm

    return [(f"{d}/{m}", f"{d} / {m}") for d in sets.split(",") for m in bm.MODELS]


def parse_seeds(text: str) -> list[int]:
    """"0-5" or "0,1,2"."""
    if "-" in text:
        lo, hi = text.split("-")
        return list(range(int(lo), int(hi) + 1))
    return [int(s) for s in text.split(",")]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cache", type=Path, required=True)
    ap.add_argument("--route", choices=("onnx", "numpy"), default="onnx",
                    help="onnx: bench_methods_onnx.py's exported fixtures; numpy: bench_methods.py's models")
    ap.add_argument("--sets", default="wine,breast_cancer", help="the numpy route's data sets")
    ap.add_argument("--repeats", type=int, default=10, help="splits per pair")
    ap.add_argument("--seeds", default="0", help="auto's --seed values (its folds), e.g. 0-5")
    args = ap.parse_args()
    warnings.simplefilter("ignore")
    args.cache.mkdir(parents=True, exist_ok=True)
    todo = pairs(args.route, args.sets)
    (args.cache / "pairs.json").write_text(json.dumps(todo))
    manifest = {e["name"]: e for e in json.loads((FIXTURES / "manifest.json").read_text())}
    for seed in parse_seeds(args.seeds):
        folder = args.cache / f"seed{seed}"
        folder.mkdir(parents=True, exist_ok=True)
        for name, label in todo:
            for split in range(args.repeats):
                path = folder / f"{name.replace('/', '_')}_{split}.pkl"
                if not path.exists():
                    t = (onnx_tables(manifest[name], split, seed) if args.route == "onnx"
                         else numpy_tables(name, split, seed))
                    path.write_bytes(pickle.dumps(t))
            print(f"seed {seed}: {label} cached", flush=True)


if __name__ == "__main__":
    main()
