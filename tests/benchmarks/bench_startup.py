"""Start-up time of the command line, side by side with a bare interpreter.

Targets (issue 14): ``onnxcal --help`` and ``onnxcal --version`` within
0.25 s of ``python -c pass``; ``onnxcal inspect`` on the demo model within
0.6 s of ``python -c "import onnx"``. ``onnxcal patch`` of the demo model (into a
temporary folder) is timed too, against the same: the fixed cost of every patch,
which the large-model benchmark (bench_large_model.py) pays once. The commands are run in turns (one of
each per round, in a rotating order), so a busy machine slows all of them
alike; the figures are medians over the rounds of each command's wall time
and of its difference from its baseline in the same round.

    .venv/bin/python tests/benchmarks/bench_startup.py                      # 15 rounds
    .venv/bin/python tests/benchmarks/bench_startup.py --rounds 30 --baseline /tmp/main-src

``--baseline DIR`` also times another revision's package (``git archive main
onnxcal _onnxcal_launch.py | tar -x -C DIR``), started the same way.
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
DEMO = ROOT / "fixtures" / "conveyor_faults.onnx"
OUT = tempfile.TemporaryDirectory(prefix="onnxcal-bench-startup-")  # removed at exit
# The console script's own code (_onnxcal_launch.main), from the source tree given on PYTHONPATH: the
# finder of an editable install is taken off first, or it would serve the checkout's onnxcal for every tree.
LAUNCH = (
    "import sys; "
    "sys.meta_path[:] = [f for f in sys.meta_path if '__editable__' not in str(getattr(f, '__module__', ''))]; "
    "from _onnxcal_launch import main; sys.argv[0] = 'onnxcal'; sys.exit(main())"
)


def commands(tree: Path, label: str) -> dict[str, list[str]]:
    cli = [sys.executable, "-c", LAUNCH]
    return {
        f"{label} --help": [*cli, "--help"],
        f"{label} --version": [*cli, "--version"],
        f"{label} inspect demo": [*cli, "inspect", str(DEMO)],
        f"{label} patch demo": [*cli, "patch", str(DEMO), "--temperature", "1.5", "--force",
                                "--out", str(Path(OUT.name) / f"{label}.onnx")],
    }


def run(argv: list[str], env: dict[str, str]) -> tuple[float, float]:
    """Wall time and CPU time (user + system) of one run of ``argv``."""
    start = time.perf_counter()
    proc = subprocess.Popen(  # from "/": '' on sys.path must not be a source tree
        argv, env=env, cwd="/", stdout=subprocess.DEVNULL, stderr=subprocess.PIPE
    )
    assert proc.stderr is not None
    errors = proc.stderr.read()
    _, status, usage = os.wait4(proc.pid, 0)
    elapsed = time.perf_counter() - start
    proc.returncode = os.waitstatus_to_exitcode(status)
    if proc.returncode != 0:
        raise SystemExit(f"{argv} failed ({proc.returncode}): {errors.decode()[-500:]}")
    return elapsed, usage.ru_utime + usage.ru_stime


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--rounds", type=int, default=15)
    parser.add_argument("--baseline", type=Path, help="another revision's source tree (holding onnxcal/)")
    args = parser.parse_args()

    trees = {"onnxcal": ROOT} | ({"baseline": args.baseline} if args.baseline else {})
    jobs: dict[str, tuple[list[str], dict[str, str]]] = {}
    plain = dict(os.environ)
    jobs["python -c pass"] = ([sys.executable, "-c", "pass"], plain)
    jobs["python -c 'import onnx'"] = ([sys.executable, "-c", "import onnx"], plain)
    for label, tree in trees.items():
        env = dict(os.environ, PYTHONPATH=str(tree), COLUMNS="100")
        for name, argv in commands(tree, label).items():
            jobs[name] = (argv, env)

    names = list(jobs)
    for name in names:  # warm the page cache and the .pyc files once
        run(*jobs[name])
    wall: dict[str, list[float]] = {name: [] for name in names}
    cpu: dict[str, list[float]] = {name: [] for name in names}
    for r in range(args.rounds):
        order = names[r % len(names):] + names[: r % len(names)]
        for name in order:
            w, c = run(*jobs[name])
            wall[name].append(w)
            cpu[name].append(c)

    print(f"{args.rounds} rounds, {os.cpu_count()} cores, load average {os.getloadavg()[0]:.1f} at the end")
    print("wall: elapsed time; cpu: user + system time of the process (less sensitive to other load)")
    targets = {"--help": ("python -c pass", 0.25), "--version": ("python -c pass", 0.25),
               "inspect demo": ("python -c 'import onnx'", 0.6), "patch demo": ("python -c 'import onnx'", None)}
    for label, times in (("wall", wall), ("cpu", cpu)):
        print(f"\n{label:5} {'command':28} {'median s':>9} {'min s':>7}  difference from its baseline (median)")
        for name in names:
            line = f"{'':5} {name:28} {statistics.median(times[name]):9.3f} {min(times[name]):7.3f}"
            for suffix, (base, limit) in targets.items():
                if name.endswith(suffix):
                    diff = statistics.median(a - b for a, b in zip(times[name], times[base], strict=True))
                    line += f"  {diff:+.3f} s vs {base}"
                    if limit is not None:
                        line += f" ({'within' if diff <= limit else 'OVER'} the {limit} s target)"
            print(line)


if __name__ == "__main__":
    main()
