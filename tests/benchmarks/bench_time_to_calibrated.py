"""Time to a calibrated model: ``onnxcal calibrate`` against an expert's short script, and an
image-folder capture against the same images pre-decoded in an ``.npz``.

  calibrate  ``onnxcal calibrate`` with its defaults vs a ~50-line script an
             expert would write (an onnxruntime loop, a scalar NLL fit of T
             with scipy, Div + Softmax appended with onnx.helper), both as
             fresh processes on the same .npz, timed alternately
             (target: calibrate within 1.3x of the script)
  images     ``onnxcal capture`` of an image folder (JPEGs decoded by onnxcal,
             the next batch decoded while the runtime runs the current one)
             vs ``onnxcal capture`` of the same images pre-decoded in an .npz
             (target: within 1.1x)

The model has ResNet-18's convolutions (7x7/2 stem, max pool, four stages of
two basic blocks with 64..512 channels, global average pool, a linear layer
to 10 logits; no batch norm), random weights, built with onnx.helper: about
1.8 GFLOP per 224x224 image. Run from the repository root:

    .venv/bin/python tests/benchmarks/bench_time_to_calibrated.py all --images 2000

  revisions  ``onnxcal calibrate`` of this tree (or PYTHONPATH) vs of another
             revision's onnxcal (--baseline DIR), alternately (target: 1.0,
             i.e. not slower)

--size 112 quarters the cost per image (the ratios are what is compared);
--keep DIR keeps the model and images for the next run. Each round prints
as it ends; the last lines give each median ratio against its target (wall
time; CPU time beside it), MET or MISSED, and in how many rounds it was met.
On a busy machine run it again when it is quieter: the ratios move with the
load. The commands run in the temporary folder, so ``PYTHONPATH=DIR``
measures the onnxcal package in DIR (a snapshot of a tree being edited).
"""

from __future__ import annotations

import argparse
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

ROOT = Path(__file__).resolve().parents[2]
CLASSES = 10
FROM_SOURCE = False  # --from-source: the environment as it is, no bytecode compiled beforehand

EXPERT = '''
import sys, numpy as np, onnx, onnxruntime as ort
from onnx import helper, numpy_helper, TensorProto
from scipy.optimize import minimize_scalar
from scipy.special import log_softmax

model_path, data_path, out_path = sys.argv[1:4]
data = np.load(data_path)
x, y = data["x"], data["labels"]
sess = ort.InferenceSession(model_path, providers=["CPUExecutionProvider"])
name = sess.get_inputs()[0].name
logits = np.concatenate([sess.run(["logits"], {name: x[i:i + 64]})[0] for i in range(0, len(x), 64)])
z = logits.astype(np.float64)

def nll(log_t):
    return -log_softmax(z / np.exp(log_t), axis=1)[np.arange(len(y)), y].mean()

t = float(np.exp(minimize_scalar(nll, bounds=(-5, 5), method="bounded").x))
m = onnx.load(model_path)
g = m.graph
g.initializer.append(numpy_helper.from_array(np.array(t, np.float32), "temperature"))
g.node.append(helper.make_node("Div", ["logits", "temperature"], ["scaled"]))
g.node.append(helper.make_node("Softmax", ["scaled"], ["probabilities"], axis=1))
out = helper.make_tensor_value_info("probabilities", TensorProto.FLOAT, ["N", logits.shape[1]])
del g.output[:]
g.output.append(out)
onnx.checker.check_model(m)
onnx.save(m, out_path)
print(f"T = {t:.4f}")
'''


def resnet18(size: int, seed: int = 0) -> onnx.ModelProto:
    """ResNet-18's convolutions with random weights (He init scaled down so activations stay finite)."""
    rng = np.random.default_rng(seed)
    nodes: list[onnx.NodeProto] = []
    inits: list[onnx.TensorProto] = []

    def conv(x: str, cin: int, cout: int, k: int, stride: int, name: str, relu: bool = True) -> str:
        w = (rng.normal(size=(cout, cin, k, k)) * np.sqrt(1.0 / (cin * k * k))).astype(np.float32)
        bias = numpy_helper.from_array(np.zeros(cout, np.float32), f"{name}_b")
        inits.extend([numpy_helper.from_array(w, f"{name}_w"), bias])
        nodes.append(helper.make_node("Conv", [x, f"{name}_w", f"{name}_b"], [name], kernel_shape=[k, k],
                                      strides=[stride, stride], pads=[k // 2] * 4))
        if not relu:
            return name
        nodes.append(helper.make_node("Relu", [name], [f"{name}_r"]))
        return f"{name}_r"

    x = conv("x", 3, 64, 7, 2, "stem")
    nodes.append(helper.make_node("MaxPool", [x], ["pool"], kernel_shape=[3, 3], strides=[2, 2], pads=[1, 1, 1, 1]))
    x, cin = "pool", 64
    for stage, cout in enumerate([64, 128, 256, 512]):
        for block in range(2):
            stride = 2 if stage > 0 and block == 0 else 1
            name = f"s{stage}b{block}"
            h = conv(x, cin, cout, 3, stride, f"{name}c1")
            h = conv(h, cout, cout, 3, 1, f"{name}c2", relu=False)
            short = x if stride == 1 and cin == cout else conv(x, cin, cout, 1, stride, f"{name}sc", relu=False)
            nodes.append(helper.make_node("Add", [h, short], [f"{name}_sum"]))
            nodes.append(helper.make_node("Relu", [f"{name}_sum"], [f"{name}_out"]))
            x, cin = f"{name}_out", cout
    nodes.append(helper.make_node("GlobalAveragePool", [x], ["gap"]))
    nodes.append(helper.make_node("Flatten", ["gap"], ["feat"]))
    w = (rng.normal(size=(512, CLASSES)) * 3.0 / np.sqrt(512)).astype(np.float32)
    inits.extend([numpy_helper.from_array(w, "fc_w"), numpy_helper.from_array(np.zeros(CLASSES, np.float32), "fc_b")])
    nodes.append(helper.make_node("Gemm", ["feat", "fc_w", "fc_b"], ["logits"]))
    graph = helper.make_graph(
        nodes, "resnet18_like", [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", 3, size, size])],
        [helper.make_tensor_value_info("logits", TensorProto.FLOAT, ["N", CLASSES])], inits,
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    onnx.checker.check_model(model)
    return model


def images(work: Path, model: Path, n: int, size: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """``n`` smooth random JPEGs of ``size`` x ``size``, decoded as onnxcal reads them, and labels drawn
    from softmax(z / 2) of the model's own logits z (so that the fit has something to find, T near 2),
    the JPEGs filed in class subfolders by label."""
    import onnxruntime as ort
    from PIL import Image

    rng = np.random.default_rng(seed)
    flat = work / "flat"
    flat.mkdir()
    decoded = np.empty((n, 3, size, size), np.float32)
    for i in range(n):
        low = rng.integers(0, 256, (8, 8, 3)).astype(np.uint8)
        Image.fromarray(low).resize((size, size), Image.BILINEAR).save(flat / f"img{i:05d}.jpg", quality=90)
        with Image.open(flat / f"img{i:05d}.jpg") as im:
            decoded[i] = np.asarray(im.convert("RGB"), np.float32).transpose(2, 0, 1) / 255.0
    sess = ort.InferenceSession(str(model), providers=["CPUExecutionProvider"])
    z = np.concatenate([sess.run(["logits"], {"x": decoded[i : i + 64]})[0] for i in range(0, n, 64)])
    z64 = z.astype(np.float64) / 2.0
    p = np.exp(z64 - z64.max(axis=1, keepdims=True))
    cdf = np.cumsum(p / p.sum(axis=1, keepdims=True), axis=1)
    labels = np.minimum((cdf < rng.random((n, 1))).sum(axis=1), CLASSES - 1)
    for i, label in enumerate(labels):
        folder = work / "images" / f"class{label}"
        folder.mkdir(parents=True, exist_ok=True)
        (flat / f"img{i:05d}.jpg").rename(folder / f"img{i:05d}.jpg")
    # onnxcal reads the class folders in sorted order, the files sorted within each
    order = np.lexsort((np.arange(n), labels))
    return decoded[order], labels[order].astype(np.int64)


def child_env() -> dict[str, str]:
    """The environment of the commands timed: this one without ``PYTHONDONTWRITEBYTECODE``.

    An installed package runs from bytecode (pip compiles it at install), as
    do numpy, onnx, onnxruntime and scipy here; with the variable set, an
    editable onnxcal compiles its 120-odd modules from source on every run
    (about 0.2 s of CPU), which the script's imports never pay.
    """
    if FROM_SOURCE:
        return dict(os.environ)
    return {k: v for k, v in os.environ.items() if k != "PYTHONDONTWRITEBYTECODE"}


def compile_onnxcal(cwd: Path, pythonpath: str | None = None) -> str:
    """Compile the bytecode of the onnxcal that the commands import (``PYTHONPATH``, or ``pythonpath``, honoured);
    its folder."""
    code = ("import compileall, os, onnxcal; d = os.path.dirname(onnxcal.__file__); "
            "compileall.compile_dir(d, quiet=1); print(d)")
    env = child_env() if pythonpath is None else {**child_env(), "PYTHONPATH": pythonpath}
    done = subprocess.run([sys.executable, "-c", code], check=True, cwd=cwd, env=env, capture_output=True, text=True)
    return done.stdout.strip()


def timed(cmd: list[str], cwd: Path, pythonpath: str | None = None) -> tuple[float, float]:
    """Seconds ``cmd`` takes, wall and CPU (user + system of the process), run in ``cwd`` (not the checkout:
    ``python -m`` would import the package from there, ahead of a PYTHONPATH that names the tree to measure)."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t0 = time.perf_counter()
    env = child_env() if pythonpath is None else {**child_env(), "PYTHONPATH": pythonpath}
    subprocess.run(cmd, check=True, cwd=cwd, stdout=subprocess.DEVNULL, env=env)
    wall = time.perf_counter() - t0
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    return wall, (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)


def alternate(label: str, a: list[str], b: list[str], rounds: int, cwd: Path, target: float,
              b_path: str | None = None) -> str:
    """Time ``a`` and ``b`` alternately; print every round as it ends; return the summary lines.

    ``b_path``: the ``PYTHONPATH`` of ``b`` (another revision's onnxcal), when not this process's.

    The target is on wall time. CPU time (user + system) is printed beside it: on a busy machine it moves
    less than wall time, but onnxruntime's spinning threads count in it (the image-folder capture runs
    without spinning, the .npz one with it), so it is a hint, not the measure.
    """
    ta: list[float] = []
    tb: list[float] = []
    ca: list[float] = []
    cb: list[float] = []
    for i in range(rounds):
        (wa, ua), (wb, ub) = timed(a, cwd), timed(b, cwd, b_path)
        for series, value in ((ta, wa), (tb, wb), (ca, ua), (cb, ub)):
            series.append(value)
        print(f"  {label}, round {i + 1}: wall {wa:.1f} s vs {wb:.1f} s, ratio {wa / wb:.3f}; "
              f"CPU {ua:.1f} s vs {ub:.1f} s, ratio {ua / ub:.3f}; load average {os.getloadavg()[0]:.1f}", flush=True)
    ratios = [x / y for x, y in zip(ta, tb, strict=True)]
    cpu = [x / y for x, y in zip(ca, cb, strict=True)]
    median = float(np.median(ratios))
    met = sum(r <= target for r in ratios)
    return (f"{label}: median ratio {median:.3f}, target <= {target}: {'MET' if median <= target else 'MISSED'} "
            f"(met in {met} of {rounds} rounds; per round {', '.join(f'{r:.3f}' for r in ratios)}; "
            f"medians {np.median(ta):.1f} s vs {np.median(tb):.1f} s; CPU time ratio per round "
            f"{', '.join(f'{r:.3f}' for r in cpu)}, median {np.median(cpu):.3f})")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("which", choices=["calibrate", "images", "all", "revisions"])
    parser.add_argument("--images", type=int, default=2000)
    parser.add_argument("--size", type=int, default=224)
    parser.add_argument("--rounds", type=int, default=3)
    parser.add_argument("--workdir", type=Path, default=Path(tempfile.gettempdir()))
    parser.add_argument("--keep", type=Path, default=None,
                        help="make the model and images in this folder and keep them; a later run with the same "
                             "--keep, --images and --size reuses them (making 2 000 images of 224 x 224 takes minutes)")
    parser.add_argument("--baseline", type=Path, default=None,
                        help="revisions: a folder holding another revision's onnxcal package (git archive REV "
                             "onnxcal | tar -x -C DIR); calibrate of this tree against calibrate of that one")
    parser.add_argument("--from-source", action="store_true",
                        help="keep PYTHONDONTWRITEBYTECODE and compile no bytecode first (as the runs before "
                             "December 2026 measured, in an environment that sets it)")
    args = parser.parse_args()
    global FROM_SOURCE
    FROM_SOURCE = args.from_source
    with tempfile.TemporaryDirectory(dir=args.workdir) as tmp:
        work = Path(tmp) if args.keep is None else args.keep / f"{args.images}x{args.size}"
        model, npz, script = work / "resnet18_like.onnx", work / "decoded.npz", work / "expert.py"
        if not (npz.exists() and (work / "images").is_dir()):
            work.mkdir(parents=True, exist_ok=True)
            onnx.save(resnet18(args.size), model)
            x, labels = images(work, model, args.images, args.size)
            np.savez(npz, x=x, labels=labels)
            del x
        script.write_text(EXPERT)
        onnxcal = [sys.executable, "-m", "onnxcal.cli"]
        py = sys.executable
        print(f"{args.images} images of {args.size}x{args.size}, ResNet-18 convolutions, {args.rounds} rounds; "
              f"load average at the start {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores", flush=True)
        if not FROM_SOURCE:
            print(f"onnxcal measured: {compile_onnxcal(work)} (bytecode compiled, as pip does at install)",
                  flush=True)
        summary = []
        if args.which in ("calibrate", "all"):
            summary.append(alternate(
                "calibrate (defaults) vs expert script",
                [*onnxcal, "calibrate", str(model), "--data", str(npz), "--out", str(work / "cal.onnx"), "--force",
                 "--quiet"],
                [py, str(script), str(model), str(npz), str(work / "expert.onnx")],
                args.rounds, work, 1.3,
            ))
        if args.which == "revisions":
            if args.baseline is None:
                parser.error("revisions needs --baseline DIR")
            if not FROM_SOURCE:
                print(f"baseline: {compile_onnxcal(work, str(args.baseline))} (bytecode compiled)", flush=True)
            cal = ["calibrate", str(model), "--data", str(npz), "--force", "--quiet"]
            summary.append(alternate(
                f"calibrate of this tree vs of {args.baseline}",
                [*onnxcal, *cal, "--out", str(work / "cal.onnx")], [*onnxcal, *cal, "--out", str(work / "base.onnx")],
                args.rounds, work, 1.0, b_path=str(args.baseline.resolve()),
            ))
        if args.which in ("images", "all"):
            summary.append(alternate(
                "capture of the image folder vs of the pre-decoded .npz",
                [*onnxcal, "capture", str(model), "--data", str(work / "images"), "--out", str(work / "a.npz"),
                 "--force", "--quiet"],
                [*onnxcal, "capture", str(model), "--data", str(npz), "--out", str(work / "b.npz"), "--force",
                 "--quiet"],
                args.rounds, work, 1.1,
            ))
        print(f"\nload average at the end {os.getloadavg()[0]:.1f}")
        for line in summary:
            print(line)


if __name__ == "__main__":
    main()
