"""What the patch costs at inference: latency of the patched model against the uncalibrated one.

For three model sizes (a tiny MLP, a mid-size MLP, the small CNN exporter
fixture) and batch sizes 1 and 64, the median latency of

  (a) the model ending in a plain, uncalibrated Softmax,
  (b) the patched model (``Div`` by T inserted before the Softmax),
  (c) the ``--fold`` patched model (1/T folded into the last Gemm),

measured alternately in one process (verify.time_alternately: a b c a',
b c a' a, ... every model in every position), so drifting load on a shared
machine hits all alike. (a') is a second session of the plain model: a'/a
is the noise floor of the comparison (same graph, other memory). The whole
measurement is repeated ``--rounds`` times; the ratios printed are medians
over rounds, with their range. Targets: (b)/(a) <= 1.02, (c)/(a) <= 1.005.

    .venv/bin/python tests/benchmarks/bench_patch_latency.py [--threads 1] [--rounds 3] [--budget 2.0]
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from onnxcal import graph  # noqa: E402
from onnxcal.capture import RunOptions, make_session  # noqa: E402
from onnxcal.verify import time_alternately  # noqa: E402

CNN = ROOT / "fixtures" / "exporters" / "belt_spectrogram_softmax_op13.onnx"
T = 1.7
TARGETS = {"patched": 1.02, "folded": 1.005}


def mlp(sizes: list[int], seed: int) -> onnx.ModelProto:
    """Gemm + Relu layers of ``sizes`` (input first), ending in Softmax, like an exporter writes them."""
    rng = np.random.default_rng(seed)
    nodes, inits, x = [], [], "x"
    for i, (a, b) in enumerate(zip(sizes[:-1], sizes[1:], strict=True)):
        w = (rng.normal(size=(a, b)) / np.sqrt(a)).astype(np.float32)
        inits += [numpy_helper.from_array(w, f"w{i}"), numpy_helper.from_array(np.zeros(b, np.float32), f"b{i}")]
        y = f"h{i}"
        nodes.append(helper.make_node("Gemm", [x, f"w{i}", f"b{i}"], [y], name=f"gemm{i}"))
        if i < len(sizes) - 2:
            nodes.append(helper.make_node("Relu", [y], [f"r{i}"], name=f"relu{i}"))
            y = f"r{i}"
        x = y
    nodes.append(helper.make_node("Softmax", [x], ["probabilities"], axis=1, name="softmax"))
    g = helper.make_graph(
        nodes, "bench_mlp",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", sizes[0]])],
        [helper.make_tensor_value_info("probabilities", TensorProto.FLOAT, ["N", sizes[-1]])],
        initializer=inits,
    )
    model = helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    return model


def variants(model: onnx.ModelProto) -> dict[str, onnx.ModelProto]:
    common = dict(source_sha256="0" * 64, source_name="bench.onnx")
    return {
        "plain": model,
        "patched": graph.patch(model, T, **common),
        "folded": graph.patch(model, T, fold=True, **common),
        "control": model,
    }


def feed_for(model: onnx.ModelProto, batch: int, rng) -> dict[str, np.ndarray]:
    (vi,) = [v for v in model.graph.input if v.name not in {i.name for i in model.graph.initializer}]
    dims = [d.dim_value for d in vi.type.tensor_type.shape.dim][1:]
    return {vi.name: rng.normal(size=(batch, *dims)).astype(np.float32)}


def measure(models: dict[str, onnx.ModelProto], feed, options: RunOptions, budget: float, rounds: int):
    sessions = {k: make_session(m, options) for k, m in models.items()}
    calls = [lambda s=s: s.run(None, feed) for s in sessions.values()]
    ref = sessions["plain"].run(None, feed)[0]
    assert np.allclose(sessions["folded"].run(None, feed)[0], sessions["patched"].run(None, feed)[0], atol=1e-5)
    assert ref.shape[0] == next(iter(feed.values())).shape[0]
    start = time.perf_counter()
    for _ in range(20):
        calls[0]()
    per_call = (time.perf_counter() - start) / 20
    repeats = int(np.clip(budget / (len(calls) * per_call), 100, 20000))
    results = []
    for _ in range(rounds):
        times = time_alternately(calls, repeats, warmup=max(5, repeats // 20))
        med = np.median(times, axis=1)
        results.append(dict(zip(models, med, strict=True)))
    return results, repeats


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--threads", type=int, default=1, help="onnxruntime intra-op threads (0: its default)")
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--budget", type=float, default=2.0, help="seconds of timed runs per round and case")
    args = ap.parse_args()
    options = RunOptions(threads=args.threads)
    rng = np.random.default_rng(0)
    cases = {
        "tiny MLP 16-32-5": mlp([16, 32, 5], 1),
        "mid MLP 512-2048-2048-100": mlp([512, 2048, 2048, 100], 2),
        "small CNN fixture": onnx.load(str(CNN)),
    }
    print(f"threads {args.threads}, {args.rounds} rounds, ~{args.budget:g} s of runs per round; "
          f"ratios: median over rounds [min, max]")
    head = ["model".ljust(28), "batch".rjust(5), "runs".rjust(6), "(a) plain".rjust(11)]
    print(" ".join(head + [h.rjust(22) for h in ("(b)/(a)", "(c)/(a)", "(a')/(a)")]))
    misses = []
    for name, model in cases.items():
        models = variants(model)
        for batch in (1, 64):
            results, repeats = measure(models, feed_for(model, batch, rng), options, args.budget, args.rounds)
            plain = np.median([r["plain"] for r in results])
            cells = []
            for key in ("patched", "folded"):
                ratios = np.array([r[key] / r["plain"] for r in results])
                ok = np.median(ratios) <= TARGETS[key]
                if not ok:
                    misses.append(f"{name}, batch {batch}: {key} {np.median(ratios):.4f} > {TARGETS[key]}")
                cells.append(f"{np.median(ratios):.4f} [{ratios.min():.3f}, {ratios.max():.3f}]{'' if ok else ' *'}")
            control = np.array([r["control"] / r["plain"] for r in results])
            cells.append(f"{np.median(control):.4f} [{control.min():.3f}, {control.max():.3f}]")
            print(f"{name:28} {batch:>5} {repeats:>6} {plain * 1e6:>8.1f} us {cells[0]:>22} {cells[1]:>22} "
                  f"{cells[2]:>22}")
    print("targets: (b)/(a) <= 1.02, (c)/(a) <= 1.005; * marks a miss")
    for m in misses:
        print("miss:", m)


if __name__ == "__main__":
    main()
