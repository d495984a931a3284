"""Benchmarks of fitting: the solver against a scipy baseline, and the whole fit command.

    .venv/bin/python tests/benchmarks/bench_fit.py [solver] [--n 100000] [--k 1000] [--rounds 2]
    .venv/bin/python tests/benchmarks/bench_fit.py command [--n 1000000] [--k 1000] [--rounds 3] [--cache DIR]

``solver``:
Data: n x k float32 logits ~ N(0, 3^2), labels drawn from softmax(z / 1.5)
by Gumbel-max sampling (so the true T is 1.5). The baseline is
``scipy.optimize.minimize_scalar(method="bounded")`` on T over the mean NLL
written with ``scipy.special.logsumexp``. The two run alternately, ``rounds``
times each, in the same process; the figures are the medians.

Also measured: passes over the data, the extra memory of a fit and of the
whole ``fit`` command (holdout + bootstrap) beyond the logits (numpy
allocations traced with tracemalloc), and what the bootstrap costs.

``command``: the whole ``fit`` command (``summarize`` with the defaults:
25 % holdout, every metric before and after on both parts, the refit on
all rows, 200 bootstrap replicates; and with ``--bootstrap 0``), with one
and with two threads, against one float32 logsumexp pass over the same
logits (chunked, max / subtract / exp / sum / log, in place: what an
expert writes; one thread). Every fit is timed between two such passes
and its ratio taken to their mean, so drifting machine load hits both;
the figures are the medians over the rounds. Then the extra memory of
the command without bootstrap (tracemalloc), which must stay below 64 MiB
beyond the logits.
"""

from __future__ import annotations

import argparse
import statistics
import time
import tracemalloc

import numpy as np
import scipy.optimize
import scipy.special

from onnxcal.fit import FitOptions, fit_scaling, fit_temperature, summarize

T_TRUE = 1.5


def make_data(n: int, k: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    z = np.empty((n, k), dtype=np.float32)
    y = np.empty(n, dtype=np.int64)
    step = 5000
    for s in range(0, n, step):  # chunked so the Gumbel noise never needs n x k float64
        c = rng.normal(scale=3.0, size=(min(step, n - s), k))
        z[s : s + len(c)] = c
        y[s : s + len(c)] = np.argmax(c + T_TRUE * rng.gumbel(size=c.shape), axis=1)
    return z, y


def baseline(z: np.ndarray, y: np.ndarray) -> tuple[float, int]:
    """What one writes in a few lines: bounded scalar minimisation of the NLL."""
    rows = np.arange(len(y))
    zy = z[rows, y]

    def nll(t):
        return np.mean(scipy.special.logsumexp(z / t, axis=1) - zy / t)

    res = scipy.optimize.minimize_scalar(nll, bounds=(0.01, 100.0), method="bounded")
    return float(res.x), int(res.nfev)


def nll64(z: np.ndarray, y: np.ndarray, t: float) -> float:
    """The mean NLL at T in float64, chunked (the common yardstick for both fits)."""
    total = 0.0
    for s in range(0, len(y), 4096):
        c = z[s : s + 4096].astype(np.float64) / t
        total += np.sum(scipy.special.logsumexp(c, axis=1) - c[np.arange(len(c)), y[s : s + 4096]])
    return total / len(y)


def traced_peak(fn) -> tuple[float, object]:
    """Peak MiB of numpy/Python allocations made by ``fn()`` beyond what existed before."""
    tracemalloc.start()
    tracemalloc.reset_peak()
    base = tracemalloc.get_traced_memory()[0]
    out = fn()
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    return (peak - base) / 2**20, out


def logsumexp_pass(z: np.ndarray, rows: int = 64) -> np.ndarray:
    """One float32 logsumexp over the rows of z, as an expert writes it (the yardstick)."""
    out = np.empty(len(z))
    buf = np.empty((rows, z.shape[1]), dtype=np.float32)
    for s in range(0, len(z), rows):
        c = z[s : s + rows]
        e = buf[: len(c)]
        m = c.max(axis=1, keepdims=True)
        np.subtract(c, m, out=e)
        np.exp(e, out=e)
        out[s : s + len(c)] = np.log(e.sum(axis=1)) + m[:, 0]
    return out


def cached_data(n: int, k: int, cache: str | None) -> tuple[np.ndarray, np.ndarray]:
    if cache is None:
        return make_data(n, k)
    import pathlib

    d = pathlib.Path(cache)
    zf, yf = d / f"logits_{n}x{k}.npy", d / f"labels_{n}x{k}.npy"
    if not zf.exists():
        d.mkdir(parents=True, exist_ok=True)
        z, y = make_data(n, k)
        np.save(zf, z)
        np.save(yf, y)
    return np.load(zf), np.load(yf)


def bench_command(args) -> None:
    z, y = cached_data(args.n, args.k, args.cache)
    print(f"logits {args.n} x {args.k} float32 ({z.nbytes / 2**30:.2f} GiB), fit command with the defaults")
    logsumexp_pass(z)  # warm the pages
    cases = [(b, t) for b in (0, 200) for t in (1, 2)]
    ratios: dict = {c: [] for c in cases}
    for r in range(args.rounds):
        for boot, threads in cases if r % 2 == 0 else cases[::-1]:
            t0 = time.perf_counter()
            logsumexp_pass(z)
            before = time.perf_counter() - t0
            t0 = time.perf_counter()
            s = summarize(z, y, {}, FitOptions(bootstrap=boot), threads=threads)
            fit = time.perf_counter() - t0
            t0 = time.perf_counter()
            logsumexp_pass(z)
            after = time.perf_counter() - t0
            ratios[(boot, threads)].append(fit / ((before + after) / 2))
            print(f"round {r + 1}, bootstrap {boot:3d}, threads {threads}: logsumexp pass {before:.2f} / "
                  f"{after:.2f} s, fit {fit:.2f} s, ratio {ratios[(boot, threads)][-1]:.2f} "
                  f"(passes: fit part {s.holdout_result.passes:.2f}, refit {s.result.passes:.2f}"
                  f"{', replicates by ' + s.intervals['replicates_by'] if s.intervals else ''})")
    for (boot, threads), rs in ratios.items():
        target = 4.0 if boot else 2.5
        print(f"bootstrap {boot:3d}, threads {threads}: median ratio to one logsumexp pass "
              f"{statistics.median(rs):.2f} (rounds {', '.join(f'{x:.2f}' for x in rs)})  [target <= {target}]")
    mib, _ = traced_peak(lambda: summarize(z, y, {}, FitOptions(bootstrap=0), threads=2))
    print(f"extra memory, fit command without bootstrap: {mib:.1f} MiB beyond the logits  [target <= 64]")
    mib, _ = traced_peak(lambda: summarize(z, y, {}, FitOptions(bootstrap=200), threads=2))
    print(f"extra memory, fit command with 200 bootstrap replicates: {mib:.1f} MiB beyond the logits")


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("which", nargs="?", choices=["solver", "command"], default="solver")
    ap.add_argument("--n", type=int, default=None, help="rows (solver: 100000, command: 1000000)")
    ap.add_argument("--k", type=int, default=1000)
    ap.add_argument("--rounds", type=int, default=None, help="solver: 2, command: 3")
    ap.add_argument("--cache", default=None, help="command: keep the generated logits in this directory")
    ap.add_argument("--skip-extras", action="store_true", help="solver: only the timing comparison")
    args = ap.parse_args()
    if args.which == "command":
        args.n, args.rounds = args.n or 1_000_000, args.rounds or 3
        return bench_command(args)
    args.n, args.rounds = args.n or 100_000, args.rounds or 2
    z, y = make_data(args.n, args.k)
    print(f"logits {args.n} x {args.k} float32 ({z.nbytes / 2**20:.0f} MiB), true T = {T_TRUE}")

    ours_s, base_s = [], []
    for r in range(args.rounds):  # alternate, so drifting machine load hits both
        t0 = time.perf_counter()
        ours = fit_temperature(z, y)
        ours_s.append(time.perf_counter() - t0)
        t0 = time.perf_counter()
        t_base, nfev = baseline(z, y)
        base_s.append(time.perf_counter() - t0)
        print(f"round {r + 1}: onnxcal {ours_s[-1]:.2f} s, baseline {base_s[-1]:.2f} s ({nfev} NLL evaluations)")
    t_ours = ours.temperature
    f_ours, f_base = nll64(z, y, t_ours), nll64(z, y, t_base)
    speed = statistics.median(base_s) / statistics.median(ours_s)
    print(f"speed-up (median baseline / median onnxcal): {speed:.1f}x  [target >= 15x]")
    print(f"T: onnxcal {t_ours:.8f}, baseline {t_base:.8f}, relative difference "
          f"{abs(t_ours - t_base) / t_base:.2e}  [target <= 1e-4]")
    print(f"NLL (float64): onnxcal {f_ours:.10f}, baseline {f_base:.10f}, onnxcal - baseline "
          f"{f_ours - f_base:+.2e}  [target within 1e-7]")
    print(f"passes over the data: {ours.passes:.2f}  [target <= 6]")
    if args.skip_extras:
        return

    mib, _ = traced_peak(lambda: fit_temperature(z, y))
    print(f"extra memory, temperature fit: {mib:.1f} MiB beyond the logits  [target <= 64]")
    opts = FitOptions(bootstrap=0)
    t0 = time.perf_counter()
    mib0, _ = traced_peak(lambda: summarize(z, y, {}, opts))
    t_plain = time.perf_counter() - t0
    opts = FitOptions(bootstrap=200)
    t0 = time.perf_counter()
    mib200, s = traced_peak(lambda: summarize(z, y, {}, opts))
    t_boot = time.perf_counter() - t0
    print(f"fit command (holdout 0.25, refit on all), bootstrap 0: {t_plain:.1f} s, {mib0:.1f} MiB extra")
    print(f"fit command, bootstrap 200: {t_boot:.1f} s, {mib200:.1f} MiB extra "
          f"(bootstrap itself {t_boot - t_plain:.1f} s); T interval {s.intervals['temperature']}")

    zv, yv = z[:20_000, :100].copy(), y[:20_000] % 100
    t0 = time.perf_counter()
    vec = fit_scaling(zv, yv, FitOptions(method="vector"))
    t_vec = time.perf_counter() - t0
    t0 = time.perf_counter()
    summarize(zv, yv, {}, FitOptions(method="vector", bootstrap=10))
    t_vboot = time.perf_counter() - t0
    print(f"vector scaling on 20000 x 100: fit {t_vec:.2f} s ({vec.passes:.0f} passes); "
          f"fit command with 10 bootstrap replicates {t_vboot:.1f} s "
          f"(about {max(t_vboot - 2 * t_vec, 0) / 10:.2f} s per replicate)")


if __name__ == "__main__":
    main()
