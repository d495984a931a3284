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
softmax model.
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
    out = [(m, m) for m in candidate_methods("multiclass")]
    if k == 2:
        out += [(m + DIFFERENCE, m) for m in BINARY_ON_DIFFERENCE]
    return out


def _view(name: str, z: np.ndarray) -> np.ndarray:
    return (z[:, 1:] - z[:, :1]).astype(z.dtype) if name.endswith(DIFFERENCE) else z


def tables(entry: dict, seed: int, fold_seed: int = 0) -> dict:
    """One split's table (see the module docstring); ``fold_seed`` is auto's ``--seed`` (folds)."""
    with tempfile.TemporaryDirectory() as tmp:
        h = halves(entry, seed, Path(tmp))
    z, y = h["cal_z"], h["cal_y"]
    fold = fold_ids(y, FOLDS, fold_seed)
    out: dict = {"y": y, "separable": bool(all_correct(z, y)), "sklearn": sklearn_nll(h),
                 "uncalibrated": metrics(h["test_p"], h["test_y"])["nll"], "methods": {}}
    out["methods"]["identity"] = {"size": 0, "ml": row_nll(Scaling.of_temperature(1.0).apply(z.astype(np.float64)), y),
                                  "test": {"ml": out["uncalibrated"], "sm": out["uncalibrated"]}}
    for name, method in _methods(z.shape[1]):
        zz, tz = _view(name, z), _view(name, h["test_z"])
        row: dict = {"test": {}}
        for tag, smooth in (("ml", False), ("sm", True)):
            options = FitOptions(method=method, smoothed_targets=smooth)
            try:
                oof, size, _, _ = out_of_fold(zz, y, options, fold, fit_scaling)
                s = fit_with_estimate(fit_scaling, zz, y, options)[0].scaling
            except Exception as e:  # noqa: BLE001 - a method that cannot be fitted here is left out, said so
                print(f"  {entry['name']} split {seed}: {name} ({tag}) left out: {e}")
                row = {}
                break
            row["size"], row[tag] = size, row_nll(oof, y)
            p = s.probabilities(tz.astype(np.float64))
            if p.shape[1] == 1:
                p = np.c_[1 - p, p]
            row["test"][tag] = metrics(p, h["test_y"])["nll"]
        if row:
            out["methods"][name] = row
    out["methods"]["identity"]["sm"] = out["methods"]["identity"]["ml"]
    return out


def parse_seeds(text: str) -> list[int]:
    """"0-5" or "0,1,2"."""
    if "-" in text:
        lo, hi = text.split("-")
        return list(range(int(lo), int(hi) + 1))
    return [int(s) for s in text.split(",")]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cache", type=Path, required=True)
    ap.add_argument("--repeats", type=int, default=10, help="splits per pair")
    ap.add_argument("--only", default=None, help="one fixture name")
    ap.add_argument("--seeds", default="0", help="auto's --seed values (its folds), e.g. 0-5")
    args = ap.parse_args()
    warnings.simplefilter("ignore")
    manifest = {e["name"]: e for e in json.loads((FIXTURES / "manifest.json").read_text())}
    for seed in parse_seeds(args.seeds):
        folder = args.cache / f"seed{seed}"
        folder.mkdir(parents=True, exist_ok=True)
        for name, label in MODELS:
            if args.only and name != args.only:
                continue
            for split in range(args.repeats):
                path = folder / f"{name}_{split}.pkl"
                if not path.exists():
                    path.write_bytes(pickle.dumps(tables(manifest[name], split, seed)))
            print(f"seed {seed}: {label} cached", flush=True)


if __name__ == "__main__":
    main()
