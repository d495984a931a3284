"""Capture benchmarks: onnxcal against the loop a user would write by hand.

  throughput  onnxcal capture vs a bare onnxruntime loop over the same
              memory-mapped arrays, same batch size and threads, timed
              alternately (targets: throughput ratio >= 0.97 on the mlp,
              >= 0.95 on the demo model at batch 64); and onnxcal's automatic
              batch size on the demo model against the bare loop at 64
  batch1      a model exported with batch dim 1: onnxcal's batched capture
              (batch dim freed in a copy) vs a per-sample onnxruntime loop
              (target: >= 5x faster)
  rss         peak resident memory of capturing a .npy set larger than 4 GB
              (target: <= model + 2 batches + logits + 200 MB)
  revisions   this tree's capture against another revision's (--baseline DIR,
              a directory holding that revision's onnxcal/ package, e.g.
              git archive main onnxcal | tar -x -C /tmp/base), alternating:
              what a change costs in capture throughput

Run from the repository root, e.g.

    .venv/bin/python tests/benchmarks/bench_capture.py all

Each measurement runs in a fresh subprocess so that peak RSS and caches of
one do not leak into the next. The rss benchmark writes about 4.5 GB under
--workdir (default: the system temp dir) and deletes it afterwards.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import textwrap
from pathlib import Path

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

ROOT = Path(__file__).resolve().parents[2]


def mlp(widths: list[int], batch: int | str = "N", seed: int = 0) -> onnx.ModelProto:
    """Gemm/Relu layers of the given widths, raw logits out."""
    rng = np.random.default_rng(seed)
    nodes, inits, x = [], [], "x"
    for i, (a, b) in enumerate(zip(widths[:-1], widths[1:], strict=True)):
        inits += [
            numpy_helper.from_array((rng.normal(size=(a, b)) / np.sqrt(a)).astype(np.float32), f"w{i}"),
            numpy_helper.from_array(np.zeros(b, np.float32), f"b{i}"),
        ]
        last = i == len(widths) - 2
        y = "logits" if last else f"h{i}"
        nodes.append(helper.make_node("Gemm", [x, f"w{i}", f"b{i}"], [y]))
        if not last:
            nodes.append(helper.make_node("Relu", [y], [f"r{i}"]))
            y = f"r{i}"
        x = y
    graph = helper.make_graph(
        nodes,
        "bench",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, [batch, widths[0]])],
        [helper.make_tensor_value_info("logits", TensorProto.FLOAT, [batch, widths[-1]])],
        initializer=inits,
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    return model


def write_set(d: Path, n: int, features: int, k: int, chunk: int = 1 << 16) -> None:
    """x.npy (float32 n x features) and labels.npy, written in chunks."""
    rng = np.random.default_rng(1)
    x = np.lib.format.open_memmap(d / "x.npy", mode="w+", dtype=np.float32, shape=(n, features))
    for s in range(0, n, chunk):
        x[s : s + chunk] = rng.standard_normal((min(chunk, n - s), features), dtype=np.float32)
    x.flush()
    del x
    np.save(d / "labels.npy", rng.integers(0, k, n))


# Code run in the subprocesses. Each prints one JSON line.
BARE = """
import json, time
import numpy as np, onnxruntime as ort
t0 = time.perf_counter()
o = ort.SessionOptions(); o.log_severity_level = 3
if {threads}: o.intra_op_num_threads = {threads}
sess = ort.InferenceSession({model!r}, sess_options=o, providers=["CPUExecutionProvider"])
x = np.load({x!r}, mmap_mode="r")
step = {batch}
outs = []
for s in range(0, len(x), step):
    outs.append(sess.run(None, {{{name!r}: np.ascontiguousarray(x[s:s + step])}})[0])
    if s == 0:
        t1 = time.perf_counter()
t2 = time.perf_counter()
np.save({out!r}, np.concatenate(outs))
print(json.dumps({{"seconds": time.perf_counter() - t0, "steady": (len(x) - step) / (t2 - t1), "n": len(x)}}))
"""

ONNXCAL = """
import json, time
import onnxruntime  # imported before the clock starts, as in the bare loop
from onnxcal import api
from onnxcal.data import DataSpec
marks = []
t0 = time.perf_counter()
cap = api.capture({model!r}, DataSpec(path={x!r}, labels={labels!r}), out={out!r}, batch_size={batch},
                  threads={threads}, force=True,
                  progress=lambda d, done, total: marks.append((time.perf_counter(), done)))
seconds = time.perf_counter() - t0
steady = (marks[-1][1] - marks[0][1]) / (marks[-1][0] - marks[0][0]) if len(marks) > 1 else float("nan")
hwm = [l for l in open("/proc/self/status") if l.startswith("VmHWM")][0].split()[1]
print(json.dumps({{"seconds": seconds, "steady": steady, "n": cap.meta.n, "batching": cap.meta.batching,
                  "peak_kib": int(hwm)}}))
"""

BASELINE_RSS = """
import json
import numpy as np, onnxruntime, onnx
from onnxcal import api
hwm = [l for l in open("/proc/self/status") if l.startswith("VmHWM")][0].split()[1]
print(json.dumps({{"peak_kib": int(hwm)}}))
"""

BARE_RSS = """
import json
import numpy as np, onnxruntime as ort
sess = ort.InferenceSession({model!r}, providers=["CPUExecutionProvider"])
x = np.load({x!r}, mmap_mode="r")
for s in range(0, len(x), {batch}):
    sess.run(None, {{"x": np.ascontiguousarray(x[s:s + {batch}])}})
hwm = [l for l in open("/proc/self/status") if l.startswith("VmHWM")][0].split()[1]
print(json.dumps({{"peak_kib": int(hwm)}}))
"""


def run(code: str, **kw) -> dict:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    src = textwrap.dedent(code).format(**{k: str(v) if isinstance(v, Path) else v for k, v in kw.items()})
    out = subprocess.run([sys.executable, "-c", src], capture_output=True, text=True, env=env, check=False)
    if out.returncode:
        raise SystemExit(out.stderr)
    return json.loads(out.stdout.strip().splitlines()[-1])


def alternate(d: Path, model: Path, rounds: int, batch, threads: int, name: str = "x") -> list[dict]:
    """Bare and onnxcal results per round, bare first in odd rounds, onnxcal first in even.

    ``batch`` None: onnxcal chooses its batch size, the bare loop runs 64 per call.
    """
    kw = dict(model=model, x=d / "x.npy", labels=d / "labels.npy", threads=threads)
    results = []
    for r in range(rounds):
        order = ("bare", "onnxcal") if r % 2 == 0 else ("onnxcal", "bare")
        got = {}
        for which in order:
            if which == "bare":
                got[which] = run(BARE, out=d / "bare.npy", batch=batch or 64, name=name, **kw)
            else:
                got[which] = run(ONNXCAL, out=d / "cap.npz", batch=batch, **kw)
        results.append(got)
    return results


def bench_throughput(work: Path, args) -> None:
    demo = onnx.load(ROOT / "fixtures" / "conveyor_faults.onnx")  # 16 band energies -> 5 fault logits
    cases = [
        ("mlp 256-512-512-10", mlp([256, 512, 512, 10]), args.batch, args.n),
        ("demo model", demo, args.batch, 10 * args.n),
        ("demo model, onnxcal's automatic batch size (bare loop: 64)", demo, None, 10 * args.n),
    ]
    for name, model_proto, batch, n in cases:
        d = Path(tempfile.mkdtemp(dir=work))
        model = d / "m.onnx"
        model.write_bytes(model_proto.SerializeToString())
        dims = [model_proto.graph.input[0].type.tensor_type.shape.dim[1].dim_value,
                model_proto.graph.output[0].type.tensor_type.shape.dim[1].dim_value]
        write_set(d, n, dims[0], dims[1])
        results = alternate(d, model, args.rounds, batch, args.threads, model_proto.graph.input[0].name)
        print(f"throughput, {name}, n={n}, batch {batch or 'automatic'}, threads {args.threads} (samples/s):")
        whole, steady = [], []
        for i, g in enumerate(results):
            b, c = g["bare"], g["onnxcal"]
            whole.append(b["seconds"] / c["seconds"])
            steady.append(c["steady"] / b["steady"])
            print(f"  round {i + 1}: end to end bare {n / b['seconds']:10.0f}, onnxcal {n / c['seconds']:10.0f}, "
                  f"ratio {whole[-1]:.3f} | after the first batch bare {b['steady']:10.0f}, "
                  f"onnxcal {c['steady']:10.0f}, ratio {steady[-1]:.3f}")
        print(f"  median ratio onnxcal/bare: end to end {np.median(whole):.3f}, "
              f"after the first batch {np.median(steady):.3f} (target >= {0.97 if 'mlp' in name else 0.95})")
        shutil.rmtree(d)


def bench_revisions(work: Path, args) -> None:
    """This tree's api.capture against the baseline's, same data and model, alternating order."""
    global ROOT
    here = ROOT
    cases = [("mlp 256-512-512-10", [256, 512, 512, 10], args.n), ("demo-size mlp 16-48-5", [16, 48, 5], 10 * args.n)]
    for name, widths, n in cases:
        d = Path(tempfile.mkdtemp(dir=work))
        (d / "m.onnx").write_bytes(mlp(widths).SerializeToString())
        write_set(d, n, widths[0], widths[-1])
        kw = dict(model=d / "m.onnx", x=d / "x.npy", labels=d / "labels.npy", batch=args.batch, threads=args.threads)
        whole, steady = [], []
        print(f"revisions, {name}, n={n}, batch {args.batch}, threads {args.threads}: this tree / baseline")
        for r in range(args.rounds):
            got = {}
            for which in (("baseline", "this") if r % 2 == 0 else ("this", "baseline")):
                ROOT = args.baseline if which == "baseline" else here
                got[which] = run(ONNXCAL, out=d / "cap.npz", **kw)
            ROOT = here
            whole.append(got["baseline"]["seconds"] / got["this"]["seconds"])
            steady.append(got["this"]["steady"] / got["baseline"]["steady"])
            print(f"  round {r + 1}: baseline {got['baseline']['seconds']:.3f} s, this {got['this']['seconds']:.3f} s, "
                  f"throughput ratio end to end {whole[-1]:.3f}, after the first batch {steady[-1]:.3f}")
        print(f"  median throughput ratio this / baseline: end to end {np.median(whole):.3f}, "
              f"after the first batch {np.median(steady):.3f}")
        shutil.rmtree(d)


def bench_batch1(work: Path, args) -> None:
    for name, widths in (("mlp 256-512-512-10", [256, 512, 512, 10]), ("demo-size mlp 16-48-5", [16, 48, 5])):
        d = Path(tempfile.mkdtemp(dir=work))
        model = d / "m1.onnx"
        model.write_bytes(mlp(widths, batch=1).SerializeToString())
        n = args.n1
        write_set(d, n, widths[0], widths[-1])
        kw = dict(model=model, x=d / "x.npy", labels=d / "labels.npy", threads=args.threads)
        rows = []
        for _ in range(args.rounds):
            loop = run(BARE, out=d / "bare.npy", batch=1, name="x", **kw)["seconds"]
            cap = run(ONNXCAL, out=d / "cap.npz", batch=args.batch, **kw)
            rows.append((loop, cap["seconds"], cap["batching"]))
        print(f"batch-1 model, {name}, n={n}, threads {args.threads}:")
        for i, (loop, cap, mode) in enumerate(rows):
            print(f"  round {i + 1}: per-sample loop {loop:.2f} s, onnxcal ({mode}, batch {args.batch}) "
                  f"{cap:.2f} s, speed-up {loop / cap:.1f}x")
        print(f"  median speed-up: {np.median([a / b for a, b, _ in rows]):.1f}x (target >= 5x)")
        shutil.rmtree(d)


def bench_rss(work: Path, args) -> None:
    need = args.rss_n * 1024 * 4
    free = shutil.disk_usage(work).free
    if free < need * 1.3:
        raise SystemExit(f"need {need * 1.3 / 2**30:.1f} GiB free in {work}, have {free / 2**30:.1f}")
    d = Path(tempfile.mkdtemp(dir=work))
    try:
        widths = [1024, 10]
        model = d / "m.onnx"
        model.write_bytes(mlp(widths).SerializeToString())
        write_set(d, args.rss_n, widths[0], widths[-1])
        size = (d / "x.npy").stat().st_size
        kw = dict(model=model, x=d / "x.npy", labels=d / "labels.npy", batch=args.batch, threads=args.threads)
        cap = run(ONNXCAL, out=d / "cap.npz", **kw)
        base = run(BASELINE_RSS)["peak_kib"] * 1024
        bare = run(BARE_RSS, **kw)["peak_kib"] * 1024
        peak = cap["peak_kib"] * 1024
        mib = 2**20
        model_b = model.stat().st_size
        batch_b = args.batch * widths[0] * 4
        logits_b = args.rss_n * widths[-1] * 4
        budget = model_b + 2 * batch_b + logits_b + 200 * mib
        print(f"peak RSS, {args.rss_n} x {widths[0]} float32 .npy = {size / 2**30:.2f} GiB, batch {args.batch}:")
        print(f"  onnxcal capture peak RSS      {peak / mib:8.1f} MiB  ({args.rss_n / cap['seconds']:.0f} samples/s)")
        print(f"  budget (model {model_b / mib:.2f} + 2 batches {2 * batch_b / mib:.2f} + logits {logits_b / mib:.1f}"
              f" + 200 MiB) = {budget / mib:.1f} MiB")
        print(f"  for scale: python + numpy + onnxruntime + onnxcal imported: {base / mib:.1f} MiB; "
              f"a bare onnxruntime loop over the same memmap: {bare / mib:.1f} MiB")
        print(f"  ratio peak / budget: {peak / budget:.3f} (target <= 1)")
    finally:
        shutil.rmtree(d)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("which", choices=["throughput", "batch1", "rss", "revisions", "all"])
    parser.add_argument("--baseline", type=Path, help="for revisions: a directory with another onnxcal/ package")
    parser.add_argument("--rounds", type=int, default=5)
    parser.add_argument("--batch", type=int, default=64)
    parser.add_argument("--threads", type=int, default=1)
    parser.add_argument("--n", type=int, default=400_000, help="samples for throughput")
    parser.add_argument("--n1", type=int, default=50_000, help="samples for batch1")
    parser.add_argument("--rss-n", type=int, default=1_100_000, help="samples of 1024 float32 for rss")
    parser.add_argument("--workdir", type=Path, default=Path(tempfile.gettempdir()))
    args = parser.parse_args()
    work = Path(tempfile.mkdtemp(prefix="onnxcal-bench-", dir=args.workdir))
    try:
        for which in ("throughput", "batch1", "rss"):
            if args.which in (which, "all"):
                {"throughput": bench_throughput, "batch1": bench_batch1, "rss": bench_rss}[which](work, args)
        if args.which == "revisions":
            if args.baseline is None or not (args.baseline / "onnxcal" / "__init__.py").is_file():
                raise SystemExit("revisions needs --baseline DIR with DIR/onnxcal/__init__.py")
            bench_revisions(work, args)
    finally:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
