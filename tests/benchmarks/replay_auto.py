"""Variants of ``--method auto``'s rule replayed on the benchmarks' splits, from replay_tables.py's cache.

    .venv/bin/python tests/benchmarks/replay_tables.py --cache /tmp/replay --seeds 0-5   # ~2 min per seed, once
    .venv/bin/python tests/benchmarks/replay_auto.py --cache /tmp/replay --seeds 0-5     # the variants, in seconds
    .venv/bin/python tests/benchmarks/replay_tables.py --route numpy --cache /tmp/np --seeds 0-2  # bench_methods.py
    .venv/bin/python tests/benchmarks/replay_auto.py --cache /tmp/np --seeds 0-2

Each cached split holds, per candidate method, its per-row out-of-fold NLL
on the calibration half (onnxcal's own folds for auto's ``--seed`` s) and its
test-half NLL when fitted on the whole half, as ``fit`` bakes it in. A
variant of the rule picks a method from the out-of-fold NLLs; its figure is
that method's test NLL. The ``R=3`` columns average each row's out-of-fold
NLL over 3 consecutive seeds (s, s+1, ..., as ``auto --seed s`` does), so seeds
0-5 give 6 realisations of R = 1 and 2 of R = 3; the figures are means over
realisations and splits, against the best scikit-learn calibrator's mean.

``before``: the rule of commit 921d8f7 on the same splits (one
cross-fitting, each fold fitted as asked whether its estimate exists or
not, smoothed targets only when every row is classified correctly,
percentile intervals).

Intervals of the paired per-row NLL difference (``onnxcal.fit.paired``):
``percentile`` (adopted), ``bca`` (scipy.stats.bootstrap's BCa on auto's
resamples: tried and dropped), ``one-se``
(mean +- one bootstrap standard error: the one-standard-error rule of
cross-validated model selection). Resamples: auto's, with the realisation's
first seed.
"""

from __future__ import annotations

import argparse
import json
import pickle
import warnings
from pathlib import Path

import numpy as np
import scipy.stats
from bench_methods_onnx import MODELS
from replay_tables import DIFFERENCE, parse_seeds

from onnxcal.choose import METHODS
from onnxcal.fit import paired
from onnxcal.fit.auto import _resamples

INTERVALS = ("percentile", "bca", "one-se")
SKLEARN = ("sigmoid", "isotonic", "temperature")


def load(cache: Path, name: str, split: int, seeds: list[int]) -> dict:
    """One split's table, each row's out-of-fold NLL averaged over ``seeds``' cross-fittings."""
    tables = [pickle.loads((cache / f"seed{s}" / f"{name.replace('/', '_')}_{split}.pkl").read_bytes())
              for s in seeds]
    t = tables[0]
    for m, row in t["methods"].items():
        for tag in ("ml", "sm", "plain"):
            if tag in row:
                row[tag] = np.mean([u["methods"][m][tag] for u in tables], axis=0)
    return t


def tag_of(t: dict, before: bool) -> str:
    """The fits a rule scores: smoothed when every row is correct; else auto's (``ml``) or the rule before's."""
    return "sm" if t["separable"] else ("plain" if before else "ml")


def _order(name: str, size: int) -> tuple[int, float]:
    return size, -1 if name == "identity" else METHODS.index(name.split(" ")[0]) + (0.5 if DIFFERENCE in name else 0)


class _Distribution:
    """A previous result for scipy.stats.bootstrap(bootstrap_result=...): auto's own resample means."""

    def __init__(self, replicates: np.ndarray) -> None:
        self.bootstrap_distribution = replicates


def _bca(d: np.ndarray, replicates: np.ndarray) -> list[float]:
    """scipy's BCa interval (Efron 1987) of mean(d) on auto's resamples (n_resamples=0 adds none of its own)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # a degenerate distribution: scipy says so and returns NaN
        ci = scipy.stats.bootstrap((d,), np.mean, n_resamples=0, bootstrap_result=_Distribution(replicates),
                                   method="BCa").confidence_interval
    lo, hi = float(ci.low), float(ci.high)
    return [lo, hi] if np.isfinite(lo) and np.isfinite(hi) else paired.percentile(replicates) or [np.inf, np.inf]


def pick(t: dict, interval: str, seed: int, with_difference: bool = False, before: bool = False) -> str:
    """The rule of onnxcal.choose with ``interval`` for the paired differences (``before``: on the fits of the
    rule before, each fold fitted as asked whether its estimate exists or not)."""
    tag = tag_of(t, before)
    ms = {k: v for k, v in t["methods"].items() if with_difference or DIFFERENCE not in k}
    counts = np.array(list(_resamples(len(t["y"]), 200, seed, None)))
    draws = {k: counts @ v[tag] / counts.sum(axis=1) for k, v in ms.items()}

    def span(a: str, b: str) -> list[float]:
        d, r = ms[a][tag] - ms[b][tag], draws[a] - draws[b]
        if interval == "percentile":
            return paired.percentile(r) or [np.inf, np.inf]
        if interval == "bca":
            return _bca(d, r)
        se = float(r.std(ddof=1))
        return [float(d.mean()) - se, float(d.mean()) + se]

    maps = {k: v for k, v in ms.items() if k != "identity"}
    best = min(maps, key=lambda k: (maps[k][tag].mean(), _order(k, maps[k]["size"])))
    if all(span(m, "identity")[0] > 0 for m in maps):
        return "identity"
    within = [best, *(m for m in maps if m != best and span(m, best)[0] <= 1e-12)]
    return min(within, key=lambda k: _order(k, maps[k]["size"]))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cache", type=Path, required=True)
    ap.add_argument("--seeds", default="0-5", help="seeds cached by replay_tables.py, e.g. 0-5 or 0,1,2")
    ap.add_argument("--splits", type=int, default=10)
    ap.add_argument("--difference", action="store_true", help="also the binary maps on z1 - z0 (two classes)")
    args = ap.parse_args()
    seeds = parse_seeds(args.seeds)
    listed = args.cache / "pairs.json"
    todo = [tuple(p) for p in json.loads(listed.read_text())] if listed.exists() else list(MODELS)
    variants = [("before", 1, "percentile"), *((f"R={r} {i}", r, i) for r in (1, 3) if len(seeds) >= r
                                               for i in INTERVALS)]
    print("| pair | best scikit-learn | " + " | ".join(v[0] for v in variants) + " |")
    print("|---|---|" + "---:|" * len(variants))
    for name, label in todo:
        cells, sk = [], None
        for title, r, interval in variants:
            groups = [seeds[k:k + r] for k in range(0, len(seeds) - r + 1, r)]
            values, sklearn = [], []
            for group in groups:
                for split in range(args.splits):
                    t = load(args.cache, name, split, group)
                    before = title == "before"
                    if before and "plain" not in t["methods"]["temperature"]:
                        continue  # a cache made before the rule's fits were kept
                    tag = tag_of(t, before)
                    values.append(t["methods"][pick(t, interval, group[0], args.difference, before)]["test"][tag])
                    sklearn.append(t["sklearn"])
            if not values:
                cells.append("-")
                continue
            means = {m: float(np.mean([s[m] for s in sklearn])) for m in SKLEARN}
            sk = sk or min(means, key=lambda m: means[m])
            mean, ref = float(np.mean(values)), means[sk]
            verdict = "equal" if abs(mean - ref) <= 1e-4 else ("better" if mean < ref else "worse")
            cells.append(f"{mean:.4f} {verdict}")
        print(f"| {label} | {sk} {means[sk]:.4f} | " + " | ".join(cells) + " |", flush=True)


if __name__ == "__main__":
    main()
