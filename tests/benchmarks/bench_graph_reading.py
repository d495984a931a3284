"""Memory and time of reading a large model: onnxcal's own matcher against onnx-ir.

Builds a 400 MiB model (100 Gemm layers of 1024 x 1024 float32, then a
Softmax) in a temporary directory and measures, each in a fresh process
(peak resident set, VmHWM, and wall time), side by side in one run:

* ``load``: onnx.load alone (the floor every approach pays);
* ``dicts``: onnx.load, producer and consumer maps of the graph, serialise
  (what onnxcal's matcher needs besides the ModelProto);
* ``find``: onnx.load and ``onnxcal.graph.find_scores``;
* ``onnx-ir``: onnx.load, ``onnx_ir.serde.deserialize_model``, a producer and
  a use lookup, ``serialize_model`` and serialise (what a rewrite through
  onnxscript's rewriter would do), when onnx_ir is importable.

onnx-ir is no dependency of onnxcal; to include it, run this in a separate
venv: ``python3 -m venv /tmp/irvenv && /tmp/irvenv/bin/pip install onnx-ir
onnxscript -e .`` then ``/tmp/irvenv/bin/python tests/benchmarks/bench_graph_reading.py``.
"""

from __future__ import annotations

import subprocess
import sys
import tempfile
from pathlib import Path

CHILD = r"""
import sys, time, onnx
mode, path = sys.argv[1], sys.argv[2]
t = time.perf_counter()
m = onnx.load(path)
if mode == "dicts":
    prod = {o: n for n in m.graph.node for o in n.output}
    cons = {}
    for n in m.graph.node:
        for i in n.input:
            cons.setdefault(i, []).append(n)
    m.SerializeToString()
elif mode == "find":
    from onnxcal import graph
    graph.find_scores(m)
elif mode == "onnx-ir":
    import onnx_ir as ir
    model = ir.serde.deserialize_model(m)
    model.graph.outputs[0].producer(), list(model.graph.inputs[0].uses())
    ir.serde.serialize_model(model).SerializeToString()
# VmHWM: this process's peak resident set (ru_maxrss would count the parent's memory at fork)
peak = next(int(l.split()[1]) for l in open("/proc/self/status") if l.startswith("VmHWM")) / 1024
print(f"{peak:.0f} {time.perf_counter() - t:.2f}")
"""


def build(path: Path) -> None:
    import numpy as np
    import onnx
    from onnx import helper, numpy_helper

    rng = np.random.default_rng(0)
    nodes, inits, x, d = [], [], "x", 1024
    for i in range(100):
        inits.append(numpy_helper.from_array(rng.standard_normal((d, d), dtype=np.float32), f"w{i}"))
        inits.append(numpy_helper.from_array(np.zeros(d, np.float32), f"b{i}"))
        nodes.append(helper.make_node("Gemm", [x, f"w{i}", f"b{i}"], [f"h{i}"]))
        nodes.append(helper.make_node("Relu", [f"h{i}"], [f"r{i}"]))
        x = f"r{i}"
    nodes.append(helper.make_node("Softmax", [x], ["p"], axis=1))
    g = helper.make_graph(nodes, "big", [helper.make_tensor_value_info("x", 1, ["N", d])],
                          [helper.make_tensor_value_info("p", 1, ["N", d])], initializer=inits)
    onnx.save(helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)]), str(path))


def main() -> None:
    modes = ["load", "dicts", "find"]
    try:
        import onnx_ir  # noqa: F401

        modes.append("onnx-ir")
    except ImportError:
        print("onnx_ir not importable: its row is left out (see the module docstring)")
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "big.onnx"
        subprocess.run([sys.executable, __file__, "--build", str(path)], check=True)  # keeps this process small
        print(f"model: {path.stat().st_size / 2**20:.0f} MiB")
        rows: dict[str, list[tuple[float, float]]] = {m: [] for m in modes}
        for _ in range(2):  # alternating rounds: the machine is shared
            for mode in modes:
                out = subprocess.run([sys.executable, "-c", CHILD, mode, str(path)], capture_output=True, text=True,
                                     check=True).stdout.split()
                rows[mode].append((float(out[0]), float(out[1])))
        base_mem, base_time = min(r[0] for r in rows["dicts"]), min(r[1] for r in rows["dicts"])
        for mode, runs in rows.items():
            mem, secs = min(r[0] for r in runs), min(r[1] for r in runs)
            print(f"{mode:8s} peak {mem:6.0f} MiB ({mem / base_mem:.2f}x dicts)  "
                  f"{secs:5.2f} s ({secs / base_time:.2f}x dicts)")


if __name__ == "__main__":
    if sys.argv[1:2] == ["--build"]:
        build(Path(sys.argv[2]))
    else:
        main()
