"""How often each way of choosing an acceptance threshold finds one, how much it accepts, how often it misses.

A population of known class probabilities (softmax of N(0, 2.5^2) logits, 5
classes, 4,000 rows; labels drawn from the probabilities, so they are
calibrated exactly); for each number of held-out rows n, DRAWS calibration
sets drawn from it. For each method: the fraction of draws with a threshold,
the mean fraction of the population it accepts (0 when none), and the
fraction of draws whose threshold's population error among accepted rows
exceeds epsilon (the guarantee bounds it by delta). The last line per n is
the best threshold knowing the population (the most it could accept).

    .venv/bin/python tests/benchmarks/compare_accept_methods.py [DRAWS]
"""

from __future__ import annotations

import sys

import numpy as np
from scipy.special import softmax

from onnxcal.decisions import choose_accept_threshold, threshold_grid

EPS, CONFIDENCE, K = 0.1, 0.9, 5


def main(draws: int) -> None:
    rng = np.random.default_rng(20260)
    pool = softmax(rng.normal(0, 2.5, (4000, K)), axis=1)
    conf = np.sort(pool.max(axis=1))
    wrong_mass = np.r_[np.cumsum((1.0 - conf)[::-1])[::-1], 0.0]

    def population(tau: float) -> tuple[float, float]:
        first = int(np.searchsorted(conf, tau, side="left"))
        return (len(conf) - first) / len(conf), wrong_mass[first] / max(len(conf) - first, 1)

    risks = wrong_mass[:-1] / (len(conf) - np.arange(len(conf)))
    best = conf[np.argmax(risks <= EPS)]
    print(f"epsilon {EPS}, confidence {CONFIDENCE}, {draws} draws per n")
    print(f"{'n':>6}  {'method':<34} {'found':>6} {'accepted':>9} {'missed':>7}")
    for n in (250, 1000, 4000):
        idx = rng.integers(0, len(pool), (draws, n))
        u = rng.random((draws, n, 1))
        labels = np.minimum((np.cumsum(pool[idx], axis=-1) < u).sum(axis=-1), K - 1)
        grid = threshold_grid(pool.max(axis=1), n, EPS, CONFIDENCE)  # the population's quantiles: fixed in advance
        methods = {
            "ltt, built-in grid, 10 sequences": {},
            "ltt, built-in grid, 1 sequence": {"starts": 1},
            "ltt, other rows' grid, 10 sequences": {"thresholds": grid},
            "ltt, other rows' grid, 1 sequence": {"thresholds": grid, "starts": 1},
            "sgr": {"method": "sgr"},
        }
        for name, options in methods.items():
            found, accepted, missed = 0, 0.0, 0
            for s in range(draws):
                r = choose_accept_threshold(pool[idx[s]], labels[s], np.arange(n), error=EPS,
                                            confidence=CONFIDENCE, **options)
                if r.threshold is not None:
                    cov, risk = population(r.threshold)
                    found, accepted, missed = found + 1, accepted + cov, missed + (risk > EPS)
            print(f"{n:>6}  {name:<34} {found / draws:>6.2f} {accepted / draws:>9.3f} {missed / draws:>7.3f}")
        print(f"{n:>6}  {'(best, knowing the population)':<34} {1.0:>6.2f} {population(best)[0]:>9.3f} {0.0:>7.3f}")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 1000)
