"""Generate the bad-input corpus that ``test_bad_inputs.py`` feeds to every command.

Run:  python tests/bad_inputs/make_corpus.py DIR

Every file is made here from code (numpy, onnx, Pillow, and onnxcal itself
for the good captures, fits and patched models that the bad ones are
tampered copies of); nothing is a hand-edited binary. The test runs this
into a temporary directory once per session, so the corpus is never
committed. The good files first, then one bad file (or directory) per
cause; the table of cases in ``test_bad_inputs.py`` says which command is
given which file and what the error must say.

All data are invented (tiny random models on random inputs).
"""

from __future__ import annotations

import io
import json
import os
import shutil
import struct
import sys
import warnings
import zipfile
import zlib
from pathlib import Path

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))  # tests/: the model builders of conftest.py

from conftest import BELT_MODEL, identity_model, mlp_model, onehot_int_model, random_mlp  # noqa: E402

from onnxcal import api  # noqa: E402
from onnxcal.data import DataSpec, Selection  # noqa: E402
from onnxcal.errors import OnnxcalWarning  # noqa: E402
from onnxcal.fit import FitOptions  # noqa: E402
from onnxcal.graph import model_sha256  # noqa: E402

SEED = 20270107
N = 40  # rows of the good validation set
D, K = 6, 4  # features and classes of the good model


def _save(model: onnx.ModelProto, path: Path) -> Path:
    path.write_bytes(model.SerializeToString())
    return path


def _finish(graph: onnx.GraphProto, opset: int = 17, **kw) -> onnx.ModelProto:
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", opset)], **kw)
    model.ir_version = 8
    return model


def _vi(name: str, shape, elem=TensorProto.FLOAT) -> onnx.ValueInfoProto:
    return helper.make_tensor_value_info(name, elem, shape)


# --------------------------------------------------------------------------
# Good files


def good_files(d: Path, rng: np.random.Generator) -> None:
    model = random_mlp(rng, d=D, k=K)
    _save(model, d / "model.onnx")
    _save(random_mlp(rng, d=D, k=K), d / "other_model.onnx")  # same inputs, another sha256
    _save(identity_model(3), d / "identity3.onnx")
    x = rng.normal(size=(N, D)).astype(np.float32)
    y = np.arange(N) % K
    np.savez(d / "val.npz", x=x, labels=y)
    np.savez(d / "val3.npz", x=x[:, :3], labels=np.arange(N) % 3)  # for the 3-input models
    np.savez(d / "unlabelled.npz", x=x)  # inputs only (issue 16: --decision-data needs labels)
    header = ",".join(f"f{i}" for i in range(D)) + ",label\n"
    rows = "".join(",".join(f"{v:.4f}" for v in row) + f",{label}\n" for row, label in zip(x, y, strict=True))
    (d / "val.csv").write_text(header + rows)
    api.capture(d / "model.onnx", d / "val.npz", out=d / "cap.npz")
    api.capture(d / "other_model.onnx", d / "val.npz", out=d / "other_cap.npz")
    for i in (1, 2):
        spec = DataSpec(path=d / "val.npz", selection=Selection(shard=(i, 2)))
        api.capture(d / "model.onnx", spec, out=d / f"shard{i}.npz")
    api.fit(d / "cap.npz", out=d / "fit.json", options=FitOptions(bootstrap=0))
    api.patch(d / "model.onnx", d / "patched.onnx", fit=d / "fit.json")
    api.patch(d / "identity3.onnx", d / "patched3.onnx", temperature=2.0)  # scores = x: NaN in, NaN out
    (d / "existing.json").write_text('{"keep": "me"}\n')
    os.symlink("val.npz", d / "val_link.npz")  # another name of the data file
    (d / "sub").mkdir()
    (d / "readonly").mkdir()
    # the image model of the fixtures (float32 N x 3 x 32 x 32) and a small folder for it
    shutil.copyfile(BELT_MODEL, d / "belt.onnx")
    images = d / "images"
    for k, colour in enumerate([(120, 120, 120), (140, 100, 80), (90, 120, 130)]):
        (images / f"class{k}").mkdir(parents=True)
        for j in range(2):
            _png(images / f"class{k}" / f"img{j}.png", colour)
    # an existing report, for report and calibrate --report without --force
    (d / "old_report").mkdir()
    (d / "old_report" / "report.html").write_text("<p>an earlier report</p>\n")


def _png(path: Path, colour) -> None:
    from PIL import Image

    Image.new("RGB", (32, 32), colour).save(path)


# --------------------------------------------------------------------------
# Bad ONNX files


def bad_models(d: Path, rng: np.random.Generator) -> None:
    good = (d / "model.onnx").read_bytes()
    (d / "truncated.onnx").write_bytes(good[: len(good) // 2])
    (d / "empty.onnx").write_bytes(b"")
    (d / "text.onnx").write_text("ir_version: 8\nthis is a text file, not a protobuf\n")
    # a valid protobuf of another message: a TensorProto parses as a ModelProto with unknown fields
    (d / "tensor_proto.onnx").write_bytes(numpy_helper.from_array(np.ones((3, 3), np.float32), "t").SerializeToString())
    # another message that does parse as a ModelProto (its fields do not clash): the bare graph
    (d / "graph_proto.onnx").write_bytes(onnx.load(str(d / "model.onnx")).graph.SerializeToString())
    (d / "model_dir.onnx").mkdir()  # a directory named like a model

    # a graph with a cycle: y = Relu(z), z = Relu(y)
    cycle = helper.make_graph(
        [helper.make_node("Relu", ["z"], ["y"], name="a"), helper.make_node("Add", ["x", "y"], ["z"], name="b")],
        "cycle",
        [_vi("x", ["N", K])],
        [_vi("y", ["N", K])],
    )
    _save(_finish(cycle), d / "cycle.onnx")

    # a Gemm whose weight is neither an initializer nor an input
    missing = onnx.load(str(d / "model.onnx"))
    kept = [i for i in missing.graph.initializer if i.name != "w1"]
    del missing.graph.initializer[:]
    missing.graph.initializer.extend(kept)
    _save(missing, d / "missing_initializer.onnx")

    _save(onehot_int_model(), d / "int64_output.onnx")

    # a Softmax on an axis the rank-2 scores do not have
    w = rng.normal(size=(D, K)).astype(np.float32)
    axis = mlp_model([(w, np.zeros(K))], final="Softmax")
    next(n for n in axis.graph.node if n.op_type == "Softmax").attribute[0].i = 5
    _save(axis, d / "class_axis.onnx")

    # an operator of a domain onnxruntime has no kernels for
    custom = helper.make_graph(
        [helper.make_node("Gemm", ["x", "w", "b"], ["h"], name="gemm"),
         helper.make_node("VibrationScore", ["h"], ["scores"], name="custom", domain="com.example.belt")],
        "custom_op",
        [_vi("x", ["N", D])],
        [_vi("scores", ["N", K])],
        initializer=[numpy_helper.from_array(w, "w"), numpy_helper.from_array(np.zeros(K, np.float32), "b")],
    )
    model = helper.make_model(
        custom, opset_imports=[helper.make_opsetid("", 17), helper.make_opsetid("com.example.belt", 1)]
    )
    model.ir_version = 8
    _save(model, d / "custom_op.onnx")

    # an input whose declared fixed dims need ~1 TiB per batch of 64: 64 x 4 x 1M x 1M bytes
    huge = helper.make_graph(
        [helper.make_node("ReduceMean", ["x"], ["m"], axes=[2, 3], keepdims=0, name="mean"),
         helper.make_node("Identity", ["m"], ["scores"], name="id")],
        "huge_input",
        [_vi("x", ["N", K, 1 << 20, 1 << 20])],
        [_vi("scores", ["N", K])],
    )
    _save(_finish(huge), d / "huge_input.onnx")

    # two outputs of class probabilities (one the other x 100): which one is not said
    two = helper.make_graph(
        [helper.make_node("Softmax", ["x"], ["probs"], axis=1, name="softmax"),
         helper.make_node("Mul", ["probs", "hundred"], ["probs_pct"], name="percent")],
        "two_probability_outputs",
        [_vi("x", ["N", K])],
        [_vi("probs", ["N", K]), _vi("probs_pct", ["N", K])],
        initializer=[numpy_helper.from_array(np.array(100.0, np.float32), "hundred")],
    )
    _save(_finish(two), d / "two_outputs.onnx")
    # a model that fails at run time: its Reshape cannot take a batch of 40 x 6 values (issue 11)
    reshape = helper.make_graph(
        [helper.make_node("Reshape", ["x", "shape"], ["scores"], name="impossible_reshape")],
        "reshape_fails",
        [_vi("x", ["N", D])],
        [_vi("scores", ["M", K])],
        initializer=[numpy_helper.from_array(np.array([7, -1], np.int64), "shape")],
    )
    _save(_finish(reshape), d / "reshape_fails.onnx")
    # a float16 model, for CSV values float16 cannot hold
    _save(mlp_model([(rng.normal(size=(D, K)), np.zeros(K))], dtype=np.float16), d / "f16.onnx")

    # a detector head: box coordinates and sigmoid scores in one Concat (issue 12)
    boxes_w, scores_w = rng.normal(size=(D, 4)).astype(np.float32), rng.normal(size=(D, K)).astype(np.float32)
    det = helper.make_graph(
        [helper.make_node("MatMul", ["x", "box_w"], ["boxes"], name="boxes"),
         helper.make_node("MatMul", ["x", "cls_w"], ["cls_logits"], name="cls"),
         helper.make_node("Sigmoid", ["cls_logits"], ["cls_scores"], name="cls_sigmoid"),
         helper.make_node("Concat", ["boxes", "cls_scores"], ["detections"], axis=1, name="det_concat")],
        "detector_concat",
        [_vi("x", ["N", D])],
        [_vi("detections", ["N", 4 + K])],
        initializer=[numpy_helper.from_array(boxes_w, "box_w"), numpy_helper.from_array(scores_w, "cls_w")],
    )
    _save(_finish(det), d / "detector.onnx")

    # an LSTM whose state outputs sit beside a rank-1 sigmoid score (issue 12)
    h = 3
    lstm = helper.make_graph(
        [helper.make_node("Unsqueeze", ["x", "zero"], ["x_seq"], name="one_step"),
         helper.make_node("LSTM", ["x_seq", "lstm_w", "lstm_r"], ["y", "hn", "cn"], hidden_size=h, name="lstm"),
         helper.make_node("Squeeze", ["hn", "zero"], ["h_last"], name="last"),
         helper.make_node("Gemm", ["h_last", "head_w"], ["head"], name="head"),
         helper.make_node("Reshape", ["head", "flat"], ["logit"], name="flatten"),
         helper.make_node("Sigmoid", ["logit"], ["score"], name="score")],
        "recurrent_state",
        [_vi("x", ["N", D])],
        [_vi("score", ["N"]), _vi("hn", [1, "N", h]), _vi("cn", [1, "N", h])],
        initializer=[numpy_helper.from_array(rng.normal(size=(1, 4 * h, D)).astype(np.float32), "lstm_w"),
                     numpy_helper.from_array(rng.normal(size=(1, 4 * h, h)).astype(np.float32), "lstm_r"),
                     numpy_helper.from_array(rng.normal(size=(h, 1)).astype(np.float32), "head_w"),
                     numpy_helper.from_array(np.array([0], np.int64), "zero"),
                     numpy_helper.from_array(np.array([-1], np.int64), "flat")],
    )
    _save(_finish(lstm), d / "recurrent.onnx")

    # inputs that are not samples (issue 12): a scalar sample rate and a state 1 x N x 3
    state = helper.make_graph(
        [helper.make_node("Squeeze", ["h0", "zero"], ["h"], name="squeeze_state"),
         helper.make_node("Concat", ["x", "h"], ["feat"], axis=1, name="concat"),
         helper.make_node("Cast", ["sr"], ["sr_f"], to=TensorProto.FLOAT, name="cast_sr"),
         helper.make_node("Div", ["sr_f", "sr_unit"], ["sr_scale"], name="scale_sr"),
         helper.make_node("MatMul", ["feat", "state_w"], ["proj"], name="matmul"),
         helper.make_node("Mul", ["proj", "sr_scale"], ["logits"], name="by_rate"),
         helper.make_node("Softmax", ["logits"], ["probs"], axis=-1, name="softmax")],
        "stateful",
        [_vi("x", ["N", D]), _vi("sr", [], TensorProto.INT64), _vi("h0", [1, "N", h])],
        [_vi("probs", ["N", K])],
        initializer=[numpy_helper.from_array(rng.normal(size=(D + h, K)).astype(np.float32), "state_w"),
                     numpy_helper.from_array(np.array(16000.0, np.float32), "sr_unit"),
                     numpy_helper.from_array(np.array([0], np.int64), "zero")],
    )
    _save(_finish(state), d / "stateful.onnx")
    n = 24
    np.savez(d / "val_state.npz", x=rng.normal(size=(n, D)).astype(np.float32),
             h0=rng.normal(size=(1, n, h)).astype(np.float32), labels=np.arange(n) % K)

    # an If whose branches compute the output differently: a Sigmoid in one, raw values in the other
    def branch(tag: str, sigmoid: bool) -> onnx.GraphProto:
        nodes = [helper.make_node("MatMul", ["x", f"{tag}_w"], [f"{tag}_z"], name=f"{tag}_matmul")]
        out = f"{tag}_z"
        if sigmoid:
            nodes.append(helper.make_node("Sigmoid", [out], [f"{tag}_p"], name=f"{tag}_sigmoid"))
            out = f"{tag}_p"
        w = numpy_helper.from_array(rng.normal(size=(D, 1)).astype(np.float32), f"{tag}_w")
        return helper.make_graph(nodes, tag, [], [_vi(out, ["N", 1])], initializer=[w])

    mixed = helper.make_graph(
        [helper.make_node("ReduceMax", ["x"], ["x_max"], keepdims=0, name="max"),
         helper.make_node("Greater", ["x_max", "limit"], ["cond"], name="cond"),
         helper.make_node("If", ["cond"], ["out"], then_branch=branch("then", True),
                          else_branch=branch("else", False), name="which")],
        "branches_disagree",
        [_vi("x", ["N", D])],
        [_vi("out", ["N", 1])],
        initializer=[numpy_helper.from_array(np.array(0.0, np.float32), "limit")],
    )
    _save(_finish(mixed), d / "branches_disagree.onnx")

    # the good model patched, then its record made to disagree with its graph
    patched = onnx.load(str(d / "patched.onnx"))
    (record,) = json.loads(next(p.value for p in patched.metadata_props if p.key == "onnxcal.calibration"))
    lost = onnx.ModelProto()
    lost.CopyFrom(patched)  # a tool removed onnxcal's Div but kept the metadata
    div = next(n for n in lost.graph.node if n.name in record["changes"]["nodes"] and n.op_type == "Div")
    for node in lost.graph.node:
        node.input[:] = [div.input[0] if name == div.output[0] else name for name in node.input]
    lost.graph.node.remove(div)
    _save(lost, d / "record_lost_node.onnx")
    other = onnx.ModelProto()
    other.CopyFrom(patched)  # T in the graph changed behind the record's back
    init = next(i for i in other.graph.initializer if i.name == record["temperature_initializer"])
    init.CopyFrom(numpy_helper.from_array(np.array(record["temperature"] * 3, np.float32), init.name))
    _save(other, d / "record_wrong_t.onnx")
    garbled = onnx.ModelProto()
    garbled.CopyFrom(patched)  # a record whose fields have the wrong types
    record_bad = dict(record, changes="nodes: all of them", parameters=[1, 2])
    next(p for p in garbled.metadata_props if p.key == "onnxcal.calibration").value = json.dumps([record_bad])
    _save(garbled, d / "record_garbled.onnx")


# --------------------------------------------------------------------------
# External data pointing outside the model's directory


def _external_model(rng: np.random.Generator) -> onnx.ModelProto:
    w = rng.normal(size=(D, 64)).astype(np.float32)  # 1536 bytes: above onnx's 1024-byte threshold
    return mlp_model([(w, np.zeros(64)), (rng.normal(size=(64, K)), np.zeros(K))])


def _point_to(model: onnx.ModelProto, location: str) -> onnx.ModelProto:
    out = onnx.ModelProto()
    out.CopyFrom(model)
    for init in out.graph.initializer:
        for entry in init.external_data:
            if entry.key == "location":
                entry.value = location
    return out


def external_data(d: Path, rng: np.random.Generator) -> None:
    base = _external_model(rng)
    good = d / "ext_good"
    good.mkdir()
    named = d / "ext_named"  # weights in 'shared.onnx.data': the data file of an output named 'shared.onnx'
    named.mkdir()
    for folder, location in ((good, "model.onnx.data"), (named, "shared.onnx.data")):
        copy = onnx.ModelProto()
        copy.CopyFrom(base)  # onnx.save moves the weights of the proto it is given to the file
        onnx.save(copy, folder / "model.onnx", save_as_external_data=True, location=location)
    outside = d / "outside"
    outside.mkdir()
    shutil.copyfile(good / "model.onnx.data", outside / "weights.bin")
    (d / "ext_out.onnx.data").write_bytes(b"weights of an earlier patched model")
    stored = onnx.load(str(good / "model.onnx"), load_external_data=False)
    cases = {
        "ext_dotdot": "../outside/weights.bin",
        "ext_absolute": str((outside / "weights.bin").resolve()),
        "ext_symlink": "weights.bin",  # a symlink beside the model, to ../outside/weights.bin
        "ext_hardlink": "weights.bin",  # a hard link beside the model, of ../outside/weights.bin
    }
    for name, location in cases.items():
        folder = d / name
        folder.mkdir()
        _save(_point_to(stored, location), folder / "model.onnx")
    os.symlink(os.path.join("..", "outside", "weights.bin"), d / "ext_symlink" / "weights.bin")
    os.link(outside / "weights.bin", d / "ext_hardlink" / "weights.bin")


# --------------------------------------------------------------------------
# Bad data sets


def bad_data(d: Path, rng: np.random.Generator) -> None:
    x = rng.normal(size=(N, D)).astype(np.float32)
    y = np.arange(N) % K
    np.savez(d / "pickled.npz", x=np.array([{"row": i} for i in range(N)], dtype=object), labels=y)
    np.savez(d / "missing_input.npz", band=x, labels=y)
    np.savez(d / "wrong_dtype.npz", x=x.astype(np.complex64), labels=y)
    np.savez(d / "wrong_rank.npz", x=x[:, :, None], labels=y)
    np.savez(d / "wrong_features.npz", x=x[:, :5], labels=y)
    np.savez(d / "empty_set.npz", x=np.zeros((0, D), np.float32), labels=np.zeros(0, np.int64))
    np.savez(d / "fraction_labels.npz", x=x, labels=np.where(np.arange(N) == 7, 1.5, y).astype(np.float64))
    np.savez(d / "negative_labels.npz", x=x, labels=np.where(np.arange(N) == 3, -1, y))
    np.savez(d / "labels_too_big.npz", x=x, labels=np.where(np.arange(N) == 9, K, y))
    np.savez(d / "length_mismatch.npz", x=x, labels=y[:-1])
    z = rng.normal(size=(N, 3)).astype(np.float32)
    z[[2, 5, 11], 1] = np.nan
    z[7, 0] = np.inf
    np.savez(d / "nonfinite.npz", x=z, labels=np.arange(N) % 3)
    with warnings.catch_warnings():  # capture warns about those rows; here they are wanted
        warnings.simplefilter("ignore", OnnxcalWarning)
        api.capture(d / "identity3.onnx", d / "nonfinite.npz", out=d / "nonfinite_cap.npz")
    # every row NaN: nothing is left once they are dropped (issue 11)
    np.savez(d / "all_nan.npz", x=np.full((N, 3), np.nan, np.float32), labels=np.arange(N) % 3)
    # logits near the largest float32: divided by a tiny T they overflow even float64
    np.savez(d / "huge_logits.npz", x=np.where(np.arange(N * 3).reshape(N, 3) % 2, 3e38, -3e38).astype(np.float32),
             labels=np.arange(N) % 3)
    with warnings.catch_warnings():  # capture warns about those rows; here they are wanted
        warnings.simplefilter("ignore", OnnxcalWarning)
        api.capture(d / "identity3.onnx", d / "all_nan.npz", out=d / "all_nan_cap.npz")
    api.capture(d / "identity3.onnx", d / "huge_logits.npz", out=d / "huge_logits_cap.npz")
    text16 = (d / "val.csv").read_text().splitlines()
    cells = text16[5].split(",")
    cells[1] = "70000"  # float16 holds at most 65504
    text16[5] = ",".join(cells)
    (d / "f16_overflow.csv").write_text("\n".join(text16) + "\n")
    # a compressed member whose header claims 2^40 float64 values (8 TiB) in a few bytes
    _npz_claiming(d / "bomb.npz", "x", (1 << 20, 1 << 20), "<f8", y)
    # an uncompressed member whose header claims more rows than the file holds
    _npz_claiming(d / "short_member.npz", "x", (N * 1000, D), "<f4", y, compress=False)
    # an .npy header cut inside its dict (numpy's header parser raises a tokenizer error)
    with zipfile.ZipFile(d / "damaged_header.npz", "w") as zf:
        head = b"{'descr': '<f4', 'fortran_order': False, 'shape': (40,"
        zf.writestr("x.npy", b"\x93NUMPY\x01\x00" + struct.pack("<H", len(head)) + head + bytes(64))
        zf.writestr("labels.npy", _npy_bytes(y))
    # a member whose zip entry names a compression method zipfile does not know (99)
    np.savez(d / "odd_compression.npz", x=x, labels=y)
    raw = bytearray((d / "odd_compression.npz").read_bytes())
    for signature, field in ((b"PK\x03\x04", 8), (b"PK\x01\x02", 10)):  # local and central headers
        at = raw.index(signature)
        raw[at + field : at + field + 2] = struct.pack("<H", 99)
    (d / "odd_compression.npz").write_bytes(bytes(raw))
    text = (d / "val.csv").read_text().splitlines()
    cells = text[3].split(",")
    cells[2] = "n/a"
    text[3] = ",".join(cells)
    (d / "non_numeric.csv").write_text("\n".join(text) + "\n")
    capture = (d / "cap.npz").read_bytes()
    (d / "truncated_cap.npz").write_bytes(capture[: len(capture) * 2 // 3])
    # a capture whose metadata text holds a code point above U+10FFFF (numpy stores raw UCS-4)
    with np.load(d / "cap.npz") as cap:
        arrays = {k: cap[k] for k in cap.files}
    meta = np.array(str(arrays["meta"]))
    meta.reshape(1).view(np.uint32)[3] = 0x110000
    np.savez(d / "bad_text_cap.npz", **dict(arrays, meta=meta))


def _npy_bytes(arr) -> bytes:
    buf = io.BytesIO()
    np.lib.format.write_array(buf, np.asarray(arr))
    return buf.getvalue()


def _npz_claiming(path: Path, key: str, shape, descr: str, labels, compress: bool = True) -> None:
    """An .npz whose member ``key`` has a header claiming ``shape`` but a few bytes of data."""
    head = io.BytesIO()
    np.lib.format.write_array_header_1_0(head, {"descr": descr, "fortran_order": False, "shape": shape})
    method = zipfile.ZIP_DEFLATED if compress else zipfile.ZIP_STORED
    with zipfile.ZipFile(path, "w", method) as zf:
        zf.writestr(f"{key}.npy", head.getvalue() + bytes(64))
        zf.writestr("labels.npy", _npy_bytes(labels))


# --------------------------------------------------------------------------
# Bad image folders


def _raw_png(width: int, height: int, data: bytes) -> bytes:
    """A PNG with an IHDR of the given size and ``data`` as its (compressed) pixels."""

    def chunk(kind: bytes, body: bytes) -> bytes:
        return struct.pack(">I", len(body)) + kind + body + struct.pack(">I", zlib.crc32(kind + body))

    ihdr = struct.pack(">IIBBBBB", width, height, 8, 2, 0, 0, 0)
    return b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", ihdr) + chunk(b"IDAT", zlib.compress(data)) + chunk(b"IEND", b"")


def bad_images(d: Path) -> None:
    def copy(name: str) -> Path:
        shutil.copytree(d / "images", d / name)
        return d / name

    png = (d / "images" / "class0" / "img0.png").read_bytes()
    (copy("images_corrupt") / "class1" / "broken.png").write_bytes(png[: len(png) // 2])
    (copy("images_not_image") / "class2" / "notes.png").write_text("inspection notes, not a picture\n")
    (copy("images_empty_class") / "class3").mkdir()
    # a PNG that claims 40000 x 40000 pixels (1.6e9, past Pillow's decompression-bomb limit)
    (copy("images_bomb") / "class0" / "huge.png").write_bytes(_raw_png(40000, 40000, bytes(1024)))
    # a damaged image whose name is not UTF-8 (a byte 0xff): reported escaped (issue 11)
    (copy("images_bad_name") / "class1" / os.fsdecode(b"broken\xff.png")).write_bytes(png[: len(png) // 2])
    # a 32-bit floating-point TIFF: its range is unknown, so it is refused by mode (issue 11)
    from PIL import Image

    Image.fromarray(np.full((32, 32), 1000.0, np.float32), mode="F").save(copy("images_32bit") / "class2" / "depth.tif")
    # a labels CSV naming a file outside the image folder (issue 11)
    (d / "outside.png").write_bytes(png)
    (d / "outside_labels.csv").write_text("file,label\nclass0/img0.png,0\n../outside.png,1\n")


# --------------------------------------------------------------------------
# Bad fit files


def bad_fits(d: Path) -> None:
    fit = json.loads((d / "fit.json").read_text())
    for name, value in (("negative_t", -1.5), ("text_t", "warm")):
        bad = json.loads(json.dumps(fit))
        bad["temperature"] = value
        bad["parameters"]["temperature"] = value
        (d / f"fit_{name}.json").write_text(json.dumps(bad, indent=2))
    (d / "fit_not_json.json").write_text("temperature = 1.5\n")
    tiny = json.loads(json.dumps(fit))  # a temperature float32 cannot hold: every probability NaN (issue 11)
    tiny["temperature"] = tiny["parameters"]["temperature"] = 1e-300
    (d / "fit_tiny_t.json").write_text(json.dumps(tiny, indent=2))
    (d / "fit_deep.json").write_text("[" * 100_000 + "]" * 100_000)
    maps = {  # the maps of issue 15, each with one bad field (the corpus model has 4 classes)
        "matrix_w_shape": ("matrix", {"W": np.eye(3).tolist(), "b": [0.0] * 3}),
        "ets_weights": ("ensemble-temperature", {"temperature": 1.0, "weights": [0.5, 0.6, 0.1]}),
        "isotonic_decreasing": ("isotonic", {"x": [[0.0, 0.5, 1.0]] * 4, "y": [[0.9, 0.5, 0.1]] * 4}),
        "unknown_method": ("magic", {"t": 1.0}),
    }
    for name, (method, params) in maps.items():
        bad = json.loads(json.dumps(fit))
        bad["method"], bad["parameters"], bad["temperature"] = method, params, None
        bad["split"]["fit_part"] = None
        (d / f"fit_{name}.json").write_text(json.dumps(bad, indent=2))


def l1_sigmoid_files(d: Path) -> None:
    """A model whose probabilities are L1-normalised sigmoids, its capture and its fit (own seed: the
    other files' draws stay as they were)."""
    rng = np.random.default_rng(SEED + 1)
    model = random_mlp(rng, d=D, k=K, final="Sigmoid", output_name="sig")
    g = model.graph
    g.node.extend([
        helper.make_node("ReduceSum", ["sig", "sum_axes"], ["sig_sum"], keepdims=1),
        helper.make_node("Div", ["sig", "sig_sum"], ["probs"]),
    ])
    g.initializer.append(numpy_helper.from_array(np.array([1], np.int64), "sum_axes"))
    g.output[0].name = "probs"
    _save(model, d / "l1_model.onnx")
    api.capture(d / "l1_model.onnx", d / "val.npz", out=d / "l1_cap.npz")
    api.fit(d / "l1_cap.npz", out=d / "l1_fit.json", options=FitOptions(bootstrap=0))


def fold_files(d: Path) -> None:
    """Fits that --fold refuses: a map that is not linear in the logits, and a matrix whose layer's
    weight another node reads too (issue 15)."""
    fit = json.loads((d / "fit.json").read_text())
    maps = {
        "ets_good": ("ensemble-temperature", {"temperature": 1.5, "weights": [0.6, 0.3, 0.1]}),
        "matrix_good": ("matrix", {"W": (np.eye(K) * 0.8).tolist(), "b": [0.1] * K}),
    }
    shared = onnx.load(str(d / "model.onnx"))
    last = shared.graph.node[-1].input[1]  # the final Gemm's weight, read once more for a second output
    shared.graph.node.append(helper.make_node("ReduceSum", [last], ["weight_sum"], keepdims=0))
    shared.graph.output.append(_vi("weight_sum", []))
    _save(shared, d / "fold_shared_weight.onnx")
    for name, (method, params) in maps.items():
        good = json.loads(json.dumps(fit))
        good["method"], good["parameters"], good["temperature"] = method, params, None
        good["split"]["fit_part"] = None
        if method == "matrix":  # fitted on the model with the shared weight (same logits)
            good["capture"]["model_sha256"] = model_sha256(d / "fold_shared_weight.onnx")
            good["capture"]["model_path"] = "fold_shared_weight.onnx"
        (d / f"fit_{name}.json").write_text(json.dumps(good, indent=2))


def make(directory: str | os.PathLike) -> Path:
    """Write the whole corpus into ``directory`` (created; must not exist)."""
    d = Path(directory)
    d.mkdir(parents=True)
    rng = np.random.default_rng(SEED)
    good_files(d, rng)
    bad_models(d, rng)
    external_data(d, rng)
    bad_data(d, rng)
    bad_images(d)
    bad_fits(d)
    l1_sigmoid_files(d)
    fold_files(d)
    return d


if __name__ == "__main__":
    if len(sys.argv) != 2:
        sys.exit("usage: python tests/bad_inputs/make_corpus.py DIR")
    print(f"wrote the corpus to {make(sys.argv[1])}")
