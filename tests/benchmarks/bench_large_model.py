"""Memory and time of `onnxcal patch` on a ~3 GB model with external data, against `cp`.

Generates, in a temporary folder removed at the end (also on failure or
Ctrl-C), a model of about 3 GB: 11 Gemm layers of 8192 x 8192 float32
random weights (256 MiB each) with Relu between them, a Gemm to 1000
classes and a Softmax, every weight in ``model.onnx.data``. Then, side by
side and alternating (patch, cp, cp + sync, patch, ...), ``--runs`` times:

* ``patch``: ``python -m onnxcal patch model.onnx --temperature 1.5 --out out.onnx``
  in a fresh process: its peak resident set (GNU time's ``%M``) and wall time;
* ``startup``: ``python -m onnxcal patch small.onnx ...``, the same command on a
  model of 2 KB (one small Gemm and a Softmax, no external data): what every
  patch pays whatever the model's size (the interpreter, the imports, the
  checker), subtracted from patch's time in the last line;
* ``cp``: ``cp model.onnx.data copy.data`` (the floor: the same bytes copied);
* ``cp + sync``: the same followed by ``sync copy.data``, since onnxcal
  fsyncs what it writes before renaming it.

Each run's outputs are removed before the next. With ``--onnx-ir`` (in a
venv where ``onnx_ir`` is installed) a fourth contender loads the model
with ``onnx_ir.load`` (external tensors lazy), inserts the Div before the
Softmax and saves it with ``onnx_ir.save(..., external_data=...)``.

``--python`` runs patch and startup with another interpreter (a venv with
other versions of the dependencies, e.g. of ml_dtypes, whose import is most of
the start-up: docs/benchmarks.md).

Run: ``.venv/bin/python tests/benchmarks/bench_large_model.py`` (about
9 GB of free disk: the model, the patched copy and cp's copy). Targets
(issue 17): patch's peak RSS under 300 MB plus the output's graph, its
time within 1.5x of cp. Figures: docs/benchmarks.md.
"""

from __future__ import annotations

import argparse
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HIDDEN, LAYERS, CLASSES = 8192, 11, 1000
ROOT = Path(__file__).resolve().parents[2]  # the children run this checkout's onnxcal
TIME = "/usr/bin/time"  # GNU time (Debian's package time)

IR_CHILD = r"""
import sys, onnx_ir as ir
src, out = sys.argv[1], sys.argv[2]
model = ir.load(src)
soft = next(n for n in model.graph if n.op_type == "Softmax")
z = soft.inputs[0]
t = ir.Value(name="temperature", const_value=ir.tensor(1.5, dtype=ir.DataType.FLOAT))
model.graph.register_initializer(t)
div = ir.node("Div", inputs=[z, t], name="onnxcal_div")
model.graph.insert_before(soft, div)
soft.replace_input_with(0, div.outputs[0])
ir.save(model, out, external_data=out.rsplit("/", 1)[1] + ".data")
"""


def build(folder: Path) -> Path:
    """model.onnx + model.onnx.data, written layer by layer in chunks (flat memory)."""
    import numpy as np
    import onnx
    from onnx import TensorProto, helper, numpy_helper

    rng = np.random.default_rng(0)
    data = folder / "model.onnx.data"
    nodes, inits, x, offset = [], [], "x", 0

    def external(name: str, dims: list[int], fh) -> None:
        nonlocal offset
        rows, cols = dims if len(dims) == 2 else (1, dims[0])
        scale = np.float32(1.0 / np.sqrt(rows))
        step = max(1, (64 << 20) // (cols * 4))
        for r in range(0, rows, step):  # uniform in [-1, 1) / sqrt(fan-in), 64 MiB at a time
            block = (rng.random((min(step, rows - r), cols), dtype=np.float32) * 2 - 1) * scale
            fh.write(block.tobytes())
        t = onnx.TensorProto()
        t.name, t.data_type = name, TensorProto.FLOAT
        t.dims.extend(dims)
        t.data_location = TensorProto.EXTERNAL
        length = rows * cols * 4
        for key, value in (("location", data.name), ("offset", str(offset)), ("length", str(length))):
            entry = t.external_data.add()
            entry.key, entry.value = key, value
        offset += length
        inits.append(t)

    with open(data, "wb") as fh:
        for i in range(LAYERS + 1):
            out = CLASSES if i == LAYERS else HIDDEN
            external(f"w{i}", [HIDDEN, out], fh)
            external(f"b{i}", [out], fh)
            y = "logits" if i == LAYERS else f"h{i}"
            nodes.append(helper.make_node("Gemm", [x, f"w{i}", f"b{i}"], [y], name=f"gemm{i}"))
            if i < LAYERS:
                nodes.append(helper.make_node("Relu", [y], [f"r{i}"], name=f"relu{i}"))
                y = f"r{i}"
            x = y
    nodes.append(helper.make_node("Softmax", ["logits"], ["probabilities"], name="softmax", axis=1))
    g = helper.make_graph(
        nodes, "large", [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", HIDDEN])],
        [helper.make_tensor_value_info("probabilities", TensorProto.FLOAT, ["N", CLASSES])], initializer=inits,
    )
    model = helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    path = folder / "model.onnx"
    path.write_bytes(model.SerializeToString())
    w = (rng.random((8, 4), dtype=np.float32) - 0.5)
    small = helper.make_graph(
        [helper.make_node("Gemm", ["x", "w"], ["logits"], name="gemm"),
         helper.make_node("Softmax", ["logits"], ["probabilities"], name="softmax", axis=1)],
        "small", [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", 8])],
        [helper.make_tensor_value_info("probabilities", TensorProto.FLOAT, ["N", 4])],
        initializer=[numpy_helper.from_array(w, "w")],
    )
    small_model = helper.make_model(small, opset_imports=[helper.make_opsetid("", 17)])
    small_model.ir_version = 8
    (folder / "small.onnx").write_bytes(small_model.SerializeToString())
    return path


# another revision's onnxcal, from the source tree on PYTHONPATH: the finder of an editable install is
# taken off first, or it would serve this checkout's onnxcal (as in bench_startup.py)
LAUNCH = (
    "import sys; "
    "sys.meta_path[:] = [f for f in sys.meta_path if '__editable__' not in str(getattr(f, '__module__', ''))]; "
    "from onnxcal.cli import main; sys.exit(main())"
)


def timed(cmd: list[str], cwd: Path, tree: Path = ROOT) -> tuple[float, float]:
    """Wall seconds and peak RSS (MiB) of one command in a fresh process.

    The peak is GNU time's ``%M`` (the command's own ``ru_maxrss``): measured
    from this process, whose pages a forked child starts with, it would read
    this process's size for a small command.
    """
    rss = cwd / ".rss"
    start = time.perf_counter()
    subprocess.run([TIME, "-f", "%M", "-o", str(rss), *cmd], cwd=cwd, check=True,
                   env={**os.environ, "PYTHONPATH": str(tree)})
    seconds = time.perf_counter() - start
    peak = int(rss.read_text().split()[-1]) / 1024
    rss.unlink()
    return seconds, peak


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--runs", type=int, default=3)
    parser.add_argument("--onnx-ir", action="store_true", help="also time onnx_ir's load, edit and save")
    parser.add_argument("--dir", default=None, help="where to make the temporary folder (default: the system's)")
    parser.add_argument("--python", default=sys.executable, help="the interpreter that runs patch and startup")
    parser.add_argument("--baseline", type=Path, default=None,
                        help="also time another revision's patch and startup (a source tree holding onnxcal/: "
                             "git archive REV onnxcal | tar -x -C DIR)")
    args = parser.parse_args()
    if not os.access(TIME, os.X_OK):
        raise SystemExit(f"{TIME} (GNU time) is needed to measure each command's peak memory: apt-get install time")
    free = shutil.disk_usage(args.dir or tempfile.gettempdir()).free
    if free < 10 << 30:
        raise SystemExit(f"needs 10 GiB free, {free >> 30} GiB free")
    folder = Path(tempfile.mkdtemp(prefix="onnxcal-bench-large-", dir=args.dir))
    try:
        started = time.perf_counter()
        model = build(folder)
        size = sum(f.stat().st_size for f in folder.iterdir())
        print(f"interpreter of patch: {args.python}")
        print(f"model: {size / 1e9:.2f} GB ({size / 2**30:.2f} GiB) in {time.perf_counter() - started:.0f} s; "
              f"graph {model.stat().st_size} bytes")
        py = args.python
        contenders = {
            "patch": [py, "-m", "onnxcal", "patch", "model.onnx", "--temperature", "1.5", "--out", "out.onnx"],
            # what every patch pays before and after the bytes: start-up, imports, checker, save
            "startup": [py, "-m", "onnxcal", "patch", "small.onnx", "--temperature", "1.5", "--out", "small_out.onnx"],
            "cp": ["cp", "model.onnx.data", "copy.data"],
            "cp + sync": ["sh", "-c", "cp model.onnx.data copy.data && sync copy.data"],
        }
        trees = {name: ROOT for name in contenders}
        if args.baseline is not None:
            for name in ("patch", "startup"):
                contenders[f"baseline {name}"] = [py, "-c", LAUNCH, *contenders[name][3:]]
                trees[f"baseline {name}"] = args.baseline.resolve()
        if args.onnx_ir:
            contenders["onnx-ir"] = [sys.executable, "-c", IR_CHILD, str(model), str(folder / "ir.onnx")]
        results: dict[str, list[tuple[float, float]]] = {name: [] for name in contenders}
        for run in range(args.runs):
            for name, cmd in contenders.items():
                results[name].append(timed(cmd, folder, trees.get(name, ROOT)))
                print(f"run {run + 1} {name}: {results[name][-1][0]:.1f} s, peak RSS {results[name][-1][1]:.0f} MiB",
                      flush=True)
                for leftover in ("out.onnx", "out.onnx.data", "copy.data", "ir.onnx", "ir.onnx.data", "small_out.onnx"):
                    (folder / leftover).unlink(missing_ok=True)
        # the patched graph, for the "plus the output's graph" of the target
        subprocess.run(contenders["patch"], cwd=folder, check=True, env={**os.environ, "PYTHONPATH": str(ROOT)})
        graph_mib = (folder / "out.onnx").stat().st_size / 2**20
        cp = statistics.median(s for s, _ in results["cp"])
        print(f"\nmedian of {args.runs} alternating runs (output's graph: {graph_mib:.2f} MiB)")
        for name, runs in results.items():
            seconds = statistics.median(s for s, _ in runs)
            peak = max(m for _, m in runs)
            rounds = " ".join(f"{s / c:.2f}" for (s, _), (c, _) in zip(runs, results["cp"], strict=True))
            print(f"  {name:16s} {seconds:6.1f} s  {seconds / cp:4.2f}x cp   peak RSS {peak:6.0f} MiB"
                  f"   x cp by round: {rounds}")
        for label in ("", "baseline ") if args.baseline is not None else ("",):
            pairs = list(zip(results[f"{label}patch"], results[f"{label}startup"], results["cp"], strict=True))
            work = statistics.median(p - s for (p, _), (s, _), _ in pairs)
            rounds = " ".join(f"{(p - s) / c:.2f}" for (p, _), (s, _), (c, _) in pairs)
            print(f"  {label}patch less startup (per run, median) {work:.1f} s: {work / cp:.2f}x cp; "
                  f"x cp by round: {rounds}")
    finally:
        shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    main()
