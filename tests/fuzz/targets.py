"""Fuzz targets: the code that reads untrusted files, and the property each must keep.

Each target takes the bytes of one file, writes them where onnxcal will read
them and runs the boundary a user's command runs on such a file. The property:
it returns, or raises :class:`onnxcal.errors.OnnxcalError`; any other
exception is a finding (the fuzzer also catches hangs, by its ``-timeout``,
and crashes of the interpreter). ``fuzz_load.py`` runs them under atheris;
``test_targets.py`` runs them on the seed corpus and on a few hundred
mutations in the default suite, so the harness cannot rot.

Targets:

- ``model``: a .onnx file through ``api.inspect`` (load, checker, external
  data, describe, record; the JSON of ``inspect --json``), then
  ``graph.find_scores`` and ``graph.patch`` with T = 1.5.
- ``npz``: a validation ``.npz`` loaded for the demo model's inputs
  (``data.load_dataset``: pickle refusal, dtypes, shapes, labels).
- ``capture``: a capture file through ``capture.load_capture`` and
  ``api.fit`` (labels, metadata, the fit).
- ``fit``: a FIT.json through ``fit.load_fit`` and ``graph.patch`` of the
  demo model with its scaling.
"""

from __future__ import annotations

import atexit
import io
import json
import random
import shutil
import tempfile
import warnings
from pathlib import Path

import numpy as np
import onnx

from onnxcal import api, graph
from onnxcal.capture import load_capture
from onnxcal.data import DataSpec, load_dataset
from onnxcal.errors import OnnxcalError
from onnxcal.fit import FitOptions, load_fit

ROOT = Path(__file__).resolve().parents[2]
FIXTURES = ROOT / "fixtures"
DEMO_MODEL = FIXTURES / "conveyor_faults.onnx"
DEMO_VAL = FIXTURES / "conveyor_faults_val.npz"
EXTERNAL_DATA = FIXTURES / "exporters" / "belt_spectrogram_external.onnx.data"
SHA = "0" * 64

_work: Path | None = None
_demo: onnx.ModelProto | None = None


def workdir() -> Path:
    """One directory per process for the fuzzed files, removed when the process exits."""
    global _work
    if _work is None:
        _work = Path(tempfile.mkdtemp(prefix="onnxcal-fuzz-"))
        atexit.register(shutil.rmtree, _work, ignore_errors=True)
        shutil.copy(EXTERNAL_DATA, _work / EXTERNAL_DATA.name)  # so seeds with external data resolve
    return _work


def use_workdir(path: Path) -> None:
    """Write the fuzzed files in ``path`` (fuzz_load.py: libFuzzer exits without Python's atexit)."""
    global _work
    path.mkdir(parents=True, exist_ok=True)
    shutil.copy(EXTERNAL_DATA, path / EXTERNAL_DATA.name)
    _work = path


def demo_model() -> onnx.ModelProto:
    global _demo
    if _demo is None:
        _demo = graph.load_model(DEMO_MODEL)
    return _demo


def _write(name: str, data: bytes) -> Path:
    path = workdir() / name
    path.write_bytes(data)
    return path


def _boundary(run) -> None:
    """Run ``run()``; OnnxcalError is the expected way to refuse a file."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            run()
        except OnnxcalError:
            pass


def fuzz_model(data: bytes) -> None:
    path = _write("fuzz.onnx", data)

    def run():
        info = api.inspect(path)
        json.dumps(info.to_dict(), default=str)  # what inspect --json prints
        model = graph.load_model(path)
        graph.find_scores(model)
        graph.patch(model, 1.5, source_sha256=SHA, source_name=path)

    _boundary(run)


def fuzz_npz(data: bytes) -> None:
    path = _write("fuzz.npz", data)
    specs = [graph.tensor_spec(vi) for vi in demo_model().graph.input]
    _boundary(lambda: load_dataset(DataSpec(path=path), specs))


def fuzz_capture(data: bytes) -> None:
    path = _write("fuzz_capture.npz", data)

    def run():
        load_capture(path)
        api.fit(path, options=FitOptions(bootstrap=0, holdout=0.0))

    _boundary(run)


def fuzz_fit(data: bytes) -> None:
    path = _write("fuzz_fit.json", data)

    def run():
        summary = load_fit(path)
        graph.patch(demo_model(), summary.scaling, source_sha256=SHA, source_name=DEMO_MODEL)

    _boundary(run)


TARGETS = {"model": fuzz_model, "npz": fuzz_npz, "capture": fuzz_capture, "fit": fuzz_fit}


# --------------------------------------------------------------------------
# Seed corpus, made from the fixtures (small files: mutations of big ones are slow)


def _npz_bytes(**arrays) -> bytes:
    buf = io.BytesIO()
    np.savez(buf, **arrays)
    return buf.getvalue()


def seeds(target: str) -> dict[str, bytes]:
    """The seed inputs of ``target``, by file name."""
    val = np.load(DEMO_VAL)
    small = {k: val[k][:24] for k in val.files}
    if target == "model":
        out = {p.name: p.read_bytes() for p in sorted(FIXTURES.rglob("*.onnx")) if p.stat().st_size < 40_000}
        patched = graph.patch(demo_model(), 1.7, source_sha256=SHA, source_name=DEMO_MODEL)
        out["demo_patched.onnx"] = patched.SerializeToString()
        return out
    if target == "npz":
        return {
            "demo_small.npz": _npz_bytes(**small),
            "demo_string_labels.npz": _npz_bytes(band_energies=small["band_energies"], labels=np.array(["a"] * 24)),
        }
    with tempfile.TemporaryDirectory() as d:
        d = Path(d)
        np.savez(d / "val.npz", **small)
        api.capture(DEMO_MODEL, d / "val.npz", out=d / "c.npz")
        if target == "capture":
            return {"demo_capture.npz": (d / "c.npz").read_bytes()}
        api.fit(d / "c.npz", out=d / "fit.json", options=FitOptions(bootstrap=5, holdout=0.25))
        api.fit(d / "c.npz", out=d / "vector.json", options=FitOptions(method="vector", bootstrap=0, holdout=0))
        return {"fit.json": (d / "fit.json").read_bytes(), "vector.json": (d / "vector.json").read_bytes()}


# --------------------------------------------------------------------------
# A structure-aware mutation for ONNX models: byte flips of a protobuf rarely
# parse, so half of the mutations edit the parsed model instead.

_OPS = [
    "Softmax", "LogSoftmax", "Sigmoid", "Gemm", "MatMul", "Add", "Div", "Mul", "Reshape", "Transpose",
    "Identity", "Cast", "Flatten", "Squeeze", "Unsqueeze", "Concat", "ZipMap", "LinearClassifier",
    "TreeEnsembleClassifier", "Normalizer", "ArgMax", "NoSuchOp",
]
_DOMAINS = ["", "ai.onnx", "ai.onnx.ml", "com.example.custom"]
_LOCATIONS = [
    "../outside.bin", "/etc/passwd", "fuzz.onnx", "missing.bin", "a/../../b.bin", "",
    EXTERNAL_DATA.name, "sub/../" + EXTERNAL_DATA.name,
]
_INTS = [-(2**63), -(2**31), -3, -2, -1, 0, 1, 2, 3, 4, 2**31 - 1, 2**62]


def _tensors_and_values(m: onnx.ModelProto):
    g = m.graph
    return list(g.input) + list(g.output) + list(g.value_info)


def _edit(m: onnx.ModelProto, rnd: random.Random) -> None:
    g = m.graph
    choice = rnd.randrange(11)
    nodes, values, inits = list(g.node), _tensors_and_values(m), list(g.initializer)
    names = [t for n in nodes for t in (*n.input, *n.output)] + [v.name for v in values] + ["", "nowhere"]
    if choice == 0 and nodes:
        node = rnd.choice(nodes)
        node.op_type = rnd.choice(_OPS)
        if rnd.random() < 0.3:
            node.domain = rnd.choice(_DOMAINS)
    elif choice == 1 and nodes:
        node = rnd.choice(nodes)
        if node.attribute and rnd.random() < 0.7:
            a = rnd.choice(list(node.attribute))
            if a.type == onnx.AttributeProto.INT:
                a.i = rnd.choice(_INTS)
            elif a.type == onnx.AttributeProto.FLOAT:
                a.f = rnd.choice([0.0, -1.0, 1e38, float("nan"), float("inf")])
            elif a.type == onnx.AttributeProto.INTS and a.ints:
                a.ints[rnd.randrange(len(a.ints))] = rnd.choice(_INTS)
        else:
            node.attribute.append(onnx.helper.make_attribute("axis", rnd.choice(_INTS)))
    elif choice == 2 and values:
        v = rnd.choice(values)
        dims = v.type.tensor_type.shape.dim
        if dims:
            d = dims[rnd.randrange(len(dims))]
            if rnd.random() < 0.7:
                d.dim_value = rnd.choice([0, 1, 2, 3, 5, 2**31, 2**62])
            else:
                d.dim_param = rnd.choice(["N", "batch", ""])
        elif rnd.random() < 0.5:
            v.type.tensor_type.shape.dim.add().dim_value = rnd.choice([1, 4, 2**40])
    elif choice == 3 and (values or inits):
        if inits and rnd.random() < 0.5:
            rnd.choice(inits).data_type = rnd.randrange(0, 24)
        elif values:
            rnd.choice(values).type.tensor_type.elem_type = rnd.randrange(0, 24)
    elif choice == 4 and nodes:
        node = rnd.choice(nodes)
        if node.input:
            node.input[rnd.randrange(len(node.input))] = rnd.choice(names)  # cycles, dangling names
    elif choice == 5 and nodes:
        del g.node[rnd.randrange(len(nodes))]
    elif choice == 6 and inits:
        t = rnd.choice(inits)
        t.data_location = onnx.TensorProto.EXTERNAL
        t.ClearField("raw_data")
        del t.external_data[:]
        for key, value in (("location", rnd.choice(_LOCATIONS)), ("offset", str(rnd.choice([0, 16, 2**40]))),
                           ("length", str(rnd.choice([0, 4, 64, 2**40])))):
            e = t.external_data.add()
            e.key, e.value = key, value
    elif choice == 7:
        if m.opset_import and rnd.random() < 0.7:
            rnd.choice(list(m.opset_import)).version = rnd.choice([1, 7, 11, 12, 13, 17, 21, 99])
        else:
            m.ir_version = rnd.choice([0, 1, 3, 7, 8, 10, 11, 99])
    elif choice == 8:
        text = json.dumps(_record_like(rnd))
        for p in m.metadata_props:
            if p.key == graph.RECORD_KEY:
                p.value = text
                break
        else:
            p = m.metadata_props.add()
            p.key, p.value = graph.RECORD_KEY, text
    elif choice == 9 and g.output:
        if rnd.random() < 0.5:
            g.output.append(g.output[0])  # duplicate outputs
        else:
            g.output[rnd.randrange(len(g.output))].name = rnd.choice(names)
    elif choice == 10 and inits:
        t = rnd.choice(inits)
        if t.dims:
            t.dims[rnd.randrange(len(t.dims))] = rnd.choice([0, 1, 3, 2**31])
        elif rnd.random() < 0.5:
            t.raw_data = t.raw_data[: len(t.raw_data) // 2]


_record: dict | None = None


def _record_like(rnd: random.Random) -> dict:
    """A real calibration record with some fields replaced by junk."""
    global _record
    if _record is None:
        patched = graph.patch(demo_model(), 1.7, source_sha256=SHA, source_name=DEMO_MODEL)
        _record = graph.read_record(patched).to_dict()
    record = json.loads(json.dumps(_record))
    junk = [None, -1, 0, 1.5, "x", [], {}, [1, 2], {"temperature": -2}, 1e308, "NaN"]
    for key in rnd.sample(sorted(record), rnd.randrange(1, 5)):
        record[key] = rnd.choice(junk)
    return record


def mutate_model(data: bytes, max_size: int, seed: int, byte_mutate) -> bytes:
    """Half the time edit the parsed model (1-3 edits), else ``byte_mutate(data, max_size)``."""
    rnd = random.Random(seed)
    if rnd.random() < 0.5:
        m = onnx.ModelProto()
        try:
            m.ParseFromString(data)
        except Exception:
            m = None
        if m is not None and m.graph.node:
            try:
                for _ in range(rnd.randint(1, 3)):
                    _edit(m, rnd)
                out = m.SerializeToString()
            except Exception:  # e.g. a name that is not UTF-8 after byte mutations
                out = b""
            if out and len(out) <= max_size:
                return out
    return byte_mutate(data, max_size)
