"""The bootstrap of the ``fit`` command alone (the expansion path), compiled against numpy, in logsumexp passes.

    .venv/bin/python tests/benchmarks/bench_bootstrap.py --cache /tmp/onnxcal-bench [--n 1000000] [--k 1000] \
        [--replicates 200] [--rounds 3]

Data: the logits of ``bench_fit.py command`` (``--cache``; made there if missing). As ``fit`` does with its
defaults: a stratified 25 % holdout, the temperature fit on the fit part, the pass at the fit that keeps the
per-row terms (:func:`onnxcal.expansion.expand`), then :func:`onnxcal.resample.bootstrap` with ``--replicates``
replicates: through the numpy code (``ONNXCAL_COMPILED=0``) and through the compiled kernels, on one and on two
threads (under ``sweep.one_blas_thread()``, as ``summarize`` runs it). Every bootstrap is timed between two float32
logsumexp passes over the logits (``bench_fit.logsumexp_pass``, one thread) and divided by their mean; one thread
in CPU time of the process, two threads in wall time (CPU time printed beside). The four cases alternate, in
reversed order every other round. The kernels are compiled (or loaded from numba's cache) and checked once before
the first round. Printed: every round, the medians, and the largest
relative difference between the two paths' interval ends (same seed, same draws).
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_fit import cached_data, logsumexp_pass  # noqa: E402

from onnxcal import kernels, resample  # noqa: E402
from onnxcal.expansion import expand  # noqa: E402
from onnxcal.fit import FitOptions, fit_scaling, fit_temperature  # noqa: E402
from onnxcal.sweep import one_blas_thread  # noqa: E402


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--cache", default=None)
    ap.add_argument("--n", type=int, default=1_000_000)
    ap.add_argument("--k", type=int, default=1000)
    ap.add_argument("--replicates", type=int, default=200)
    ap.add_argument("--rounds", type=int, default=3)
    args = ap.parse_args()
    z, y = cached_data(args.n, args.k, args.cache)
    opts = FitOptions(bootstrap=args.replicates)
    fit_rows, eval_rows = resample.split_holdout(y, opts.holdout, opts.seed)
    start = fit_temperature(z, y, rows=fit_rows).scaling
    assert start.temperature is not None
    exp = expand(z, y, fit_rows, eval_rows, 1.0 / start.temperature)
    assert exp.accurate, "the expansion is not accurate on these data: the bootstrap takes the grid"

    def boot(compiled: bool, threads: int) -> dict[str, object]:
        os.environ[kernels.ENV] = "1" if compiled else "0"
        with one_blas_thread():  # as summarize runs it: a threaded BLAS under onnxcal's threads oversubscribes
            return resample.bootstrap(z, y, opts, fit_rows, eval_rows, start, refit=fit_scaling, expansion=exp,
                                      threads=threads)

    boot(True, 1)  # compile or load the kernels, and numba's one-time check of the draws
    logsumexp_pass(z)
    cases = [(False, 1), (True, 1), (False, 2), (True, 2)]
    ratios: dict[tuple[bool, int], list[float]] = {c: [] for c in cases}
    cpu: dict[tuple[bool, int], list[float]] = {c: [] for c in cases}
    results: dict[tuple[bool, int], dict[str, object]] = {}
    for r in range(args.rounds):
        for case in cases if r % 2 == 0 else cases[::-1]:
            clock = time.process_time if case[1] == 1 else time.perf_counter
            p0 = clock()
            logsumexp_pass(z)
            p1, c1 = clock(), time.process_time()
            results[case] = boot(*case)
            p2, c2 = clock(), time.process_time()
            logsumexp_pass(z)
            p3 = clock()
            passes = ((p1 - p0) + (p3 - p2)) / 2
            ratios[case].append((p2 - p1) / passes)
            cpu[case].append((c2 - c1) / passes)
            name = f"{'compiled' if case[0] else 'numpy   '}, {case[1]} thread{'s' if case[1] > 1 else ' '}"
            print(f"round {r + 1}, {name}: {ratios[case][-1]:.2f} P (CPU {cpu[case][-1]:.2f} P; P = {passes:.2f} s)",
                  flush=True)
    for case in cases:
        name = f"{'compiled' if case[0] else 'numpy'}, {case[1]} thread(s)"
        rounds = ", ".join(f"{x:.2f}" for x in ratios[case])
        print(f"{name}: median {statistics.median(ratios[case]):.2f} P (rounds {rounds}); "
              f"CPU median {statistics.median(cpu[case]):.2f} P")
    worst = 0.0
    ref = results[(False, 1)]
    for got in results.values():
        assert got["replicates_by"] == "taylor"
        pairs = [(ref["temperature"], got["temperature"])]
        pairs += [(a, got["after"][key]) for key, a in ref["after"].items() if a is not None]  # type: ignore[index, union-attr]
        for a, b in pairs:
            worst = max(worst, float(np.max(np.abs(np.asarray(b) / np.asarray(a) - 1))))
    print(f"largest relative difference of an interval end to the numpy path: {worst:.1e}")


if __name__ == "__main__":
    main()
