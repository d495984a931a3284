"""The whole ``fit`` command of this tree against another revision's, side by side.

    git archive <rev> onnxcal | tar -x -C /tmp/fit-baseline
    .venv/bin/python tests/benchmarks/bench_fit_revisions.py --baseline /tmp/fit-baseline \
        --cache /tmp/onnxcal-bench [--n 1000000] [--bootstrap 0] [--threads 1] [--rounds 3]

Each round runs the two trees one after the other, each in a fresh process
(the order alternating from round to round): load the logits of
``bench_fit.py command`` (``--cache``, made there), then time one float32
logsumexp pass, ``summarize`` with the defaults (and ``--bootstrap``,
``--threads``), and another logsumexp pass, and print the command's ratio to
the mean of the two passes. One thread is timed in CPU time of the process
(less sensitive to other jobs on a shared machine than wall time), two
threads in wall time. The medians and every round are printed.
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
TREE = HERE.parent.parent


def one(args: argparse.Namespace) -> None:
    """In a child process: the ratio of the command to a logsumexp pass, for the tree on sys.path."""
    import onnxcal
    from onnxcal.fit import FitOptions, summarize

    assert Path(onnxcal.__file__).resolve().is_relative_to(Path(args.tree).resolve()), onnxcal.__file__
    sys.path.insert(0, str(HERE))
    from bench_fit import cached_data, logsumexp_pass

    z, y = cached_data(args.n, args.k, args.cache)
    clock = time.process_time if args.threads == 1 else time.perf_counter
    logsumexp_pass(z)  # warm the pages
    times = []
    for fn in (
        lambda: logsumexp_pass(z),
        lambda: summarize(z, y, {}, FitOptions(bootstrap=args.bootstrap), threads=args.threads),
        lambda: logsumexp_pass(z),
    ):
        t0 = clock()
        fn()
        times.append(clock() - t0)
    print(f"{times[1] / ((times[0] + times[2]) / 2):.3f}")


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--baseline", required=True, help="a directory holding another revision's onnxcal/")
    ap.add_argument("--cache", required=True, help="the logits of bench_fit.py command")
    ap.add_argument("--n", type=int, default=1_000_000)
    ap.add_argument("--k", type=int, default=1000)
    ap.add_argument("--bootstrap", type=int, default=0)
    ap.add_argument("--threads", type=int, default=1)
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--tree", help=argparse.SUPPRESS)  # set in the child processes
    args = ap.parse_args()
    if args.tree:
        return one(args)
    trees = {"this tree": str(TREE), "baseline": args.baseline}
    ratios: dict[str, list[float]] = {name: [] for name in trees}
    passed = [a for a in sys.argv[1:] if not a.startswith("--tree")]
    for r in range(args.rounds):
        for name in list(trees) if r % 2 == 0 else list(trees)[::-1]:
            env = dict(os.environ, PYTHONPATH=trees[name])
            out = subprocess.run(
                [sys.executable, __file__, *passed, "--tree", trees[name]], env=env, check=True,
                capture_output=True, text=True, cwd=trees[name],
            )
            ratios[name].append(float(out.stdout.strip().splitlines()[-1]))
            print(f"round {r + 1}, {name}: {ratios[name][-1]:.2f} logsumexp passes", flush=True)
    for name, rs in ratios.items():
        print(f"{name}: bootstrap {args.bootstrap}, threads {args.threads}: median {statistics.median(rs):.2f} "
              f"(rounds {', '.join(f'{x:.2f}' for x in rs)})")


if __name__ == "__main__":
    main()
