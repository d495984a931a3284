"""Benchmark: the peak resident memory of ``onnxcal calibrate --report`` against the size of the logits.

    .venv/bin/python tests/benchmarks/bench_calibrate_memory.py [--n 200000] [--k 1000] [--bootstrap 200]
        [--baseline DIR]

The model is one Gemm from 16 float32 features to k logits (its file is
16 k float32 weights); the data are n rows of features with labels drawn
from softmax(z / 1.5) by Gumbel-max sampling, so the fit has something to
find. The logits the command must hold are n x k float32.

Each measurement runs in a fresh subprocess and reads the kernel's high-water
mark of its resident memory (``VmHWM`` in ``/proc/self/status``) at the end:

* ``imports``: python with numpy, onnx, onnxruntime, scipy and onnxcal
  imported, nothing run (what any command costs before it starts);
* ``calibrate``: the whole command line, ``calibrate MODEL --data DATA.npz
  --out OUT --report DIR -q --bootstrap B``, run through ``onnxcal.cli.main``;
* with ``--baseline DIR`` (a directory holding another revision's
  ``onnxcal/`` package, e.g. ``git archive main onnxcal | tar -x -C DIR``),
  the same command with that code, measured alternately with this tree's.

The target (issue 11): peak RSS at most 3 x the logits plus the model file,
beyond what the imports alone take.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]

MAKE = """
import numpy as np, onnx
from onnx import helper, numpy_helper
n, k, d = {n}, {k}, 16
rng = np.random.default_rng(0)
w = rng.normal(size=(d, k)).astype(np.float32)
graph = helper.make_graph(
    [helper.make_node("Gemm", ["x", "w", "b"], ["logits"], name="head")], "wide",
    [helper.make_tensor_value_info("x", 1, ["N", d])], [helper.make_tensor_value_info("logits", 1, ["N", k])],
    initializer=[numpy_helper.from_array(w, "w"), numpy_helper.from_array(np.zeros(k, np.float32), "b")])
model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
model.ir_version = 8
onnx.save(model, {model!r})
x = rng.normal(size=(n, d)).astype(np.float32)
y = np.empty(n, np.int64)
for s in range(0, n, 5000):  # chunked: the Gumbel noise never needs n x k float64
    z = x[s:s + 5000].astype(np.float64) @ w
    y[s:s + 5000] = np.argmax(z / 1.5 + rng.gumbel(size=z.shape), axis=1)
np.savez({data!r}, x=x, labels=y)
"""

IMPORTS = """
import json
import numpy, onnx, onnxruntime, scipy.optimize
from onnxcal import api, cli
assert api.__file__.startswith({root!r}), api.__file__
hwm = [line for line in open("/proc/self/status") if line.startswith("VmHWM")][0].split()[1]
print(json.dumps({{"peak_kib": int(hwm)}}))
"""

CALIBRATE = """
import json, time
from onnxcal.cli import main
import onnxcal
assert onnxcal.__file__.startswith({root!r}), onnxcal.__file__
t0 = time.perf_counter()
code = main({argv!r})
seconds = time.perf_counter() - t0
hwm = [line for line in open("/proc/self/status") if line.startswith("VmHWM")][0].split()[1]
print(json.dumps({{"peak_kib": int(hwm), "code": code, "seconds": seconds}}))
"""


def run(code: str, source: Path = ROOT, **kw) -> dict | None:
    """Run ``code`` in a fresh python importing onnxcal from ``source`` (from a neutral directory:
    ``python -c`` puts the working directory first on the path)."""
    env = dict(os.environ, PYTHONPATH=str(source))
    out = subprocess.run([sys.executable, "-c", code.format(**kw)], env=env, capture_output=True, text=True,
                         cwd=tempfile.gettempdir())
    if out.returncode != 0:
        raise SystemExit(out.stderr)
    lines = out.stdout.strip().splitlines()
    return json.loads(lines[-1]) if lines else None


def calibrate(work: Path, source: Path, args, tag: str) -> dict:
    out, rep = work / f"out-{tag}.onnx", work / f"rep-{tag}"
    argv = ["calibrate", str(work / "m.onnx"), "--data", str(work / "d.npz"), "--out", str(out),
            "--report", str(rep), "-q", "--bootstrap", str(args.bootstrap)]
    result = run(CALIBRATE, source, argv=argv, root=str(source))
    if result["code"] != 0:
        raise SystemExit(f"calibrate exited {result['code']}")
    out.unlink()
    shutil.rmtree(rep)
    return result


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--n", type=int, default=200_000)
    parser.add_argument("--k", type=int, default=1000)
    parser.add_argument("--bootstrap", type=int, default=200)
    parser.add_argument("--rounds", type=int, default=1)
    parser.add_argument("--baseline", type=Path, help="a directory with another revision's onnxcal/ package")
    parser.add_argument("--workdir", type=Path, default=Path(tempfile.gettempdir()))
    args = parser.parse_args()
    if args.baseline is not None and not (args.baseline / "onnxcal" / "__init__.py").is_file():
        raise SystemExit("--baseline needs DIR with DIR/onnxcal/__init__.py")
    work = Path(tempfile.mkdtemp(prefix="onnxcal-bench-", dir=args.workdir))
    try:
        run(MAKE, n=args.n, k=args.k, model=str(work / "m.onnx"), data=str(work / "d.npz"))
        mib = 2**20
        logits = args.n * args.k * 4
        model = (work / "m.onnx").stat().st_size
        imports = run(IMPORTS, root=str(ROOT))["peak_kib"] * 1024
        print(f"calibrate --report, {args.n} x {args.k} float32 logits = {logits / mib:.0f} MiB, "
              f"model {model / mib:.2f} MiB, --bootstrap {args.bootstrap}:")
        print(f"  imports alone: {imports / mib:.0f} MiB")
        for r in range(args.rounds):
            trees = [("this tree", ROOT)] + ([("baseline", args.baseline)] if args.baseline else [])
            for name, source in trees if r % 2 == 0 else trees[::-1]:
                got = calibrate(work, source, args, name.replace(" ", "-"))
                peak = got["peak_kib"] * 1024
                print(f"  {name:10s} round {r + 1}: peak RSS {peak / mib:7.0f} MiB = {peak / logits:5.2f} x the "
                      f"logits; beyond the imports {(peak - imports) / logits:5.2f} x; {got['seconds']:.0f} s")
                if name == "this tree":
                    ratio = (peak - imports) / (3 * logits + model)
                    print(f"    (peak - imports) / (3 x logits + model) = {ratio:.2f} (target <= 1)")
    finally:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
