"""What docs/security.md promises about code and models, checked on their own.

* No code execution from data: the package source has no eval/exec, no
  pickle (nor modules built on it), and every numpy load refuses pickles.
* External data are read only from inside the model's directory, by
  onnxcal's own checks, with onnx's checks switched off.

The bad-input corpus (tests/bad_inputs/) checks the same promises through
the command line, one bad file at a time.
"""

from __future__ import annotations

import ast
import importlib.util
import os
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np
import onnx
import onnx.external_data_helper
import pytest
from conftest import DEMO_MODEL, DEMO_VAL
from onnx import TensorProto, helper, numpy_helper

import onnxcal
from onnxcal import api, graph
from onnxcal.errors import OnnxcalError

PACKAGE = Path(onnxcal.__file__).resolve().parent
_spec = importlib.util.spec_from_file_location("make_corpus", Path(__file__).parent / "bad_inputs" / "make_corpus.py")
make_corpus = importlib.util.module_from_spec(_spec)
_spec.loader.exec_module(make_corpus)

# --------------------------------------------------------------------------
# No code execution from data: a scan of the package source

CODE_BUILTINS = {"eval", "exec", "compile", "__import__"}
PICKLING_MODULES = {"pickle", "_pickle", "cPickle", "marshal", "shelve", "dill", "cloudpickle", "joblib"}
PICKLE_KEYWORDED = {"load", "read_array", "write_array", "save", "savez", "savez_compressed"}


def findings(source: str, name: str = "<source>") -> list[str]:
    """What the scan refuses in a Python source: one line per finding."""
    found = []
    for node in ast.walk(ast.parse(source, name)):
        where = f"{name}:{getattr(node, 'lineno', 0)}"
        if isinstance(node, ast.Import):
            found += [f"{where} imports {a.name}" for a in node.names if a.name.split(".")[0] in PICKLING_MODULES]
        elif isinstance(node, ast.ImportFrom) and (node.module or "").split(".")[0] in PICKLING_MODULES:
            found.append(f"{where} imports from {node.module}")
        elif isinstance(node, ast.Call):
            func = node.func
            called = func.id if isinstance(func, ast.Name) else func.attr if isinstance(func, ast.Attribute) else ""
            # the builtins themselves (``eval(...)``, ``builtins.exec(...)``), not a method
            # of the same name such as ``re.compile``
            builtin = isinstance(func, ast.Name) or (
                isinstance(func, ast.Attribute) and isinstance(func.value, ast.Name) and func.value.id == "builtins"
            )
            if called in CODE_BUILTINS and builtin:
                found.append(f"{where} calls {called}")
            keywords = {k.arg: k.value for k in node.keywords}
            pickle = keywords.get("allow_pickle")
            if pickle is not None and not (isinstance(pickle, ast.Constant) and pickle.value is False):
                found.append(f"{where} passes allow_pickle other than False")
            numpy_call = isinstance(func, ast.Attribute) and _is_numpy(func.value)
            if numpy_call and called in PICKLE_KEYWORDED and called in ("load", "read_array") and pickle is None:
                found.append(f"{where} calls {called} without allow_pickle=False")
    return found


def _is_numpy(node: ast.AST) -> bool:
    """``np``, ``numpy``, or an attribute chain under them (``np.lib.format``)."""
    while isinstance(node, ast.Attribute):
        node = node.value
    return isinstance(node, ast.Name) and node.id in ("np", "numpy")


def test_the_scan_finds_what_it_looks_for():
    # the scan itself, on a source that does every refused thing (so it cannot pass vacuously)
    bad = (
        "import pickle\nfrom joblib import load\nimport numpy as np\n"
        "eval('1')\nexec('x = 1')\nnp.load('a.npy')\nnp.load('a.npy', allow_pickle=True)\n"
        "np.lib.format.read_array(fh)\n"
    )
    assert len(findings(bad)) == 7
    assert findings("import numpy as np\nnp.load('a.npy', allow_pickle=False)\nnp.savez('a', x=1)\n") == []
    assert findings("import re, builtins\nre.compile('x')\nbuiltins.eval('1')\n") == ["<source>:3 calls eval"]


def test_package_source_executes_no_code_from_data():
    files = sorted(PACKAGE.rglob("*.py"))  # subpackages (onnxcal/graph/) included
    assert len(files) >= 10 and any(p.parent.name == "graph" for p in files)
    problems = [f for path in files for f in findings(path.read_text(), str(path.relative_to(PACKAGE)))]
    assert problems == []


def test_object_arrays_are_refused_not_unpickled(tmp_path):
    # numpy itself raises on a pickled member when allow_pickle is False (numpy.load docs)
    np.save(tmp_path / "objects.npy", np.array([{"a": 1}], dtype=object), allow_pickle=True)
    from onnxcal.data import read_npy

    with pytest.raises(OnnxcalError, match="holds Python objects, which onnxcal will not unpickle"):
        read_npy(tmp_path / "objects.npy", "input 'x'")


# --------------------------------------------------------------------------
# External data: onnxcal's checks hold without onnx's


@pytest.fixture(scope="module")
def ext(tmp_path_factory) -> Path:
    d = tmp_path_factory.mktemp("ext")
    rng = np.random.default_rng(3)
    make_corpus.external_data(d, rng)
    return d


def _naive_open(base_dir, location, tensor_name, read_only):
    """onnx's external-data open with its checks taken out: join and open."""
    return os.open(os.path.join(base_dir, location), os.O_RDONLY)


@pytest.fixture
def onnx_unchecked(monkeypatch):
    monkeypatch.setattr(onnx.external_data_helper, "_open_external_data_fd", _naive_open)


OUTSIDE = [
    ("ext_dotdot", r"'\.\.' leads out of it"),
    ("ext_absolute", r"an absolute path"),
    ("ext_symlink", r"is a symbolic link"),
    ("ext_hardlink", r"has 2 hard links"),
]


@pytest.mark.parametrize("folder, message", OUTSIDE, ids=[f for f, _ in OUTSIDE])
def test_onnx_checks_refuse_external_data_outside(ext, folder, message):
    # onnx >= 1.21 refuses these itself (see onnx's security advisories; docs/security.md)
    with pytest.raises(Exception, match="(?i)outside|absolute|symbolic|hard ?link"):
        onnx.load(str(ext / folder / "model.onnx"))


@pytest.mark.parametrize("folder, message", OUTSIDE, ids=[f for f, _ in OUTSIDE])
def test_onnxcal_refuses_external_data_outside_without_onnx_checks(ext, onnx_unchecked, folder, message):
    model = ext / folder / "model.onnx"
    loaded = onnx.load(str(model))  # without its checks, onnx reads the file outside ...
    weights = numpy_helper.to_array(loaded.graph.initializer[0])
    assert weights.shape == (make_corpus.D, 64)
    with pytest.raises(OnnxcalError, match=message):  # ... and onnxcal refuses it before any read
        graph.load_model(model)
    with pytest.raises(OnnxcalError, match=message):
        api.inspect(model)
    with pytest.raises(OnnxcalError, match=message):
        graph.external_data_files(model)


def test_external_data_inside_the_directory_still_loads(ext, onnx_unchecked):
    model = graph.load_model(ext / "ext_good" / "model.onnx")
    assert all(t.data_location != TensorProto.EXTERNAL for t in model.graph.initializer)
    good = ext / "ext_good"
    assert graph.external_data_files(good / "model.onnx") == ((good / "model.onnx.data").resolve(),)


def _with_external(tensor: onnx.TensorProto, location: str) -> onnx.TensorProto:
    tensor.ClearField("raw_data")
    tensor.data_location = TensorProto.EXTERNAL
    for key, value in (("location", location), ("offset", "0"), ("length", "16")):
        entry = tensor.external_data.add()
        entry.key, entry.value = key, value
    return tensor


def _function_model(tensor: onnx.TensorProto) -> onnx.ModelProto:
    """scores = Scale(x), a local function whose Constant holds ``tensor``."""
    fn = helper.make_function(
        "local.belt", "Scale", ["x"], ["y"],
        [helper.make_node("Constant", [], ["c"], value=tensor), helper.make_node("Mul", ["x", "c"], ["y"])],
        opset_imports=[helper.make_opsetid("", 17)],
    )
    g = helper.make_graph(
        [helper.make_node("Scale", ["x"], ["scores"], domain="local.belt")], "fn",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", 4])],
        [helper.make_tensor_value_info("scores", TensorProto.FLOAT, ["N", 4])],
    )
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", 17), helper.make_opsetid("local.belt", 1)],
                          functions=[fn])
    m.ir_version = 8
    return m


def _typed_attribute_model(tensor: onnx.TensorProto) -> onnx.ModelProto:
    """An INT attribute that also carries a tensor (a hostile file); onnx's loader reads any ``t``."""
    g = helper.make_graph(
        [helper.make_node("Softmax", ["x"], ["scores"], axis=1)], "typed",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", 4])],
        [helper.make_tensor_value_info("scores", TensorProto.FLOAT, ["N", 4])],
    )
    g.node[0].attribute[0].t.CopyFrom(tensor)
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)])
    m.ir_version = 8
    return m


def _sparse_model(tensor: onnx.TensorProto) -> onnx.ModelProto:
    """A sparse initializer whose values are external data (onnx does not load those)."""
    indices = numpy_helper.from_array(np.arange(4, dtype=np.int64), "idx")
    g = helper.make_graph(
        [helper.make_node("Add", ["x", "w"], ["scores"])], "sparse",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", 4])],
        [helper.make_tensor_value_info("scores", TensorProto.FLOAT, ["N", 4])],
        sparse_initializer=[helper.make_sparse_tensor(tensor, indices, [4])],
    )
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)])
    m.ir_version = 8
    return m


HIDING_PLACES = [_function_model, _typed_attribute_model, _sparse_model]


@pytest.mark.parametrize("build", HIDING_PLACES, ids=[f.__name__[1:] for f in HIDING_PLACES])
def test_external_data_in_every_tensor_is_checked(ext, tmp_path, onnx_unchecked, build):
    tensor = _with_external(numpy_helper.from_array(np.ones(4, np.float32), "w"), "../outside/weights.bin")
    model = build(tensor)
    folder = tmp_path / "m"
    folder.mkdir()
    (tmp_path / "outside").mkdir()
    (tmp_path / "outside" / "weights.bin").write_bytes(bytes(16))
    path = folder / "model.onnx"
    path.write_bytes(model.SerializeToString())
    with pytest.raises(OnnxcalError, match=r"'\.\.' leads out of it"):
        graph.load_model(path)


def test_tensors_onnx_would_load_are_all_seen():
    # onnxcal's walk covers at least the tensors onnx's loader fills in (its _get_all_tensors)
    tensor = _with_external(numpy_helper.from_array(np.ones(4, np.float32), "w"), "w.bin")
    for build in HIDING_PLACES[:2]:
        model = build(onnx.TensorProto.FromString(tensor.SerializeToString()))
        theirs = [t.SerializeToString() for t in onnx.external_data_helper._get_all_tensors(model)]
        ours = [t.SerializeToString() for t in graph._model_tensors(model)]
        assert theirs and all(t in ours for t in theirs)


def test_external_data_onnx_leaves_unloaded_is_refused(tmp_path):
    # a sparse initializer's data inside the directory: onnx does not load it, and onnxruntime,
    # given the model as bytes, would look for it elsewhere; refused
    (tmp_path / "w.bin").write_bytes(bytes(16))
    model = _sparse_model(_with_external(numpy_helper.from_array(np.ones(4, np.float32), "w"), "w.bin"))
    (tmp_path / "model.onnx").write_bytes(model.SerializeToString())
    with pytest.raises(OnnxcalError, match="keeps tensor 'w' in external data where onnx does not load it"):
        graph.load_model(tmp_path / "model.onnx")


# --------------------------------------------------------------------------
# Names from a hostile file cannot drive the terminal


def test_escape_sequences_in_a_model_are_shown_not_obeyed(tmp_path, run_cli):
    # ESC [ 2 J clears the screen and ESC ] 0 ; ... BEL retitles the window (ECMA-48 / xterm
    # control sequences); printed raw they would act on the user's terminal
    clear, title = "\x1b[2J", "\x1b]0;pwned\x07"
    g = helper.make_graph(
        [helper.make_node("Softmax", [f"x{clear}"], [f"probs{title}"], axis=1)], "hostile",
        [helper.make_tensor_value_info(f"x{clear}", TensorProto.FLOAT, ["N", 3])],
        [helper.make_tensor_value_info(f"probs{title}", TensorProto.FLOAT, ["N", 3])],
    )
    model = helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    path = tmp_path / "hostile.onnx"
    path.write_bytes(model.SerializeToString())
    for args in (["inspect", path], ["inspect", path, "--json"], ["patch", path, "--temperature", "2", "--output",
                                                                  "nope", "--out", tmp_path / "p.onnx"]):
        r = run_cli(*args)
        assert "\x1b" not in r.out + r.err and "\x07" not in r.out + r.err
    assert "probs\\x1b]0;pwned\\x07" in run_cli("inspect", path).out.replace("\n", "")  # shown, escaped
    assert "choose one of: probs\\x1b]0;pwned\\x07" in r.err  # the error names the outputs, escaped


# --------------------------------------------------------------------------
# Nothing written outside the outputs the user named (issue 11)


def _console() -> list[str]:
    exe = Path(sys.executable).with_name("onnxcal")
    return [str(exe)] if exe.exists() else [sys.executable, "-m", "onnxcal"]


def _tree(root: Path) -> dict[str, str]:
    return {str(p.relative_to(root)): ("dir" if p.is_dir() else p.read_bytes().hex()[:64]) for p in root.rglob("*")}


def _run_env(home: Path, tmp: Path) -> dict[str, str]:
    env = {k: v for k, v in os.environ.items() if k not in ("MPLCONFIGDIR", "XDG_CACHE_HOME", "XDG_CONFIG_HOME",
                                                          "ORT_DISABLE_TELEMETRY")}
    return {**env, "HOME": str(home), "TMPDIR": str(tmp)}


def test_a_run_writes_nothing_but_its_outputs(tmp_path):
    """onnxruntime wrote a device id and a database under ~/.cache, matplotlib its font cache under
    ~/.cache and ~/.config: a fresh HOME and TMPDIR must be as empty after a run as before."""
    home, tmp, work = tmp_path / "home", tmp_path / "tmp", tmp_path / "work"
    for d in (home, tmp, work):
        d.mkdir()
    shutil.copy(DEMO_MODEL, work / "m.onnx")
    shutil.copy(DEMO_VAL, work / "v.npz")
    r = subprocess.run(_console() + ["calibrate", "m.onnx", "--data", "v.npz", "--out", "o.onnx", "--report", "rep",
                                     "-q", "--bootstrap", "0"],
                       cwd=work, env=_run_env(home, tmp), capture_output=True, text=True, timeout=300)
    assert r.returncode == 0 and r.stderr == "", r.stderr
    assert _tree(home) == {} and _tree(tmp) == {}
    assert {p.name for p in work.iterdir()} == {"m.onnx", "v.npz", "o.onnx", "rep"}


def test_read_only_home_and_tmpdir_give_no_warnings(tmp_path):
    """As an unprivileged user whose HOME and TMPDIR it may not write to: no warning, nothing written.

    (Root may write anywhere, so this runs as user 'nobody' with setpriv, as the test of a
    real permission error in tests/bad_inputs does.)
    """
    if os.geteuid() != 0 or shutil.which("setpriv") is None:
        pytest.skip("needs root and setpriv to run as an unprivileged user")
    drop = ["setpriv", "--reuid=65534", "--regid=65534", "--clear-groups", "--"]
    can_read = ("import importlib.util, os, sys; s = importlib.util.find_spec('onnxcal'); "
                "sys.exit(not os.access(s.origin, os.R_OK))")
    if subprocess.run(drop + [sys.executable, "-c", can_read], capture_output=True).returncode:
        pytest.skip("user nobody cannot read this checkout or its venv (a private home directory?)")
    base = Path(tempfile.mkdtemp(prefix="onnxcal-readonly-"))
    try:
        base.chmod(0o755)
        home, tmp, work = base / "home", base / "tmp", base / "work"
        for d in (home, tmp, work):
            d.mkdir()
        home.chmod(0o555)
        tmp.chmod(0o555)
        work.chmod(0o777)
        shutil.copy(DEMO_MODEL, work / "m.onnx")
        shutil.copy(DEMO_VAL, work / "v.npz")
        r = subprocess.run(drop + _console() + ["calibrate", "m.onnx", "--data", "v.npz", "--out", "o.onnx",
                                                "--report", "rep", "-q", "--bootstrap", "0"],
                           cwd=work, env=_run_env(home, tmp), capture_output=True, text=True, timeout=300)
        assert r.returncode == 0 and r.stderr == "", r.stderr
        assert _tree(home) == {} and _tree(tmp) == {}
        assert (work / "rep" / "reliability.png").is_file()
    finally:
        shutil.rmtree(base, ignore_errors=True)
