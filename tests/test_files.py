"""_files: output-path checks, and atomic, durable writes for every writer."""

from __future__ import annotations

import errno
import os
from pathlib import Path

import numpy as np
import pytest

from conftest import DEMO_MODEL, DEMO_VAL, files_in, random_mlp, save_model
from onnxcal import _files, api
from onnxcal.errors import OnnxcalError
from onnxcal.fit import FitOptions

# --------------------------------------------------------------------------
# Output paths


@pytest.fixture
def inputs(tmp_path):
    (tmp_path / "model.onnx").write_bytes(b"model")
    (tmp_path / "data").mkdir()
    (tmp_path / "data" / "a.png").write_bytes(b"image")
    return tmp_path


SPELLINGS = {
    "same": lambda d: d / "model.onnx",
    "dotted": lambda d: d / "data" / ".." / "model.onnx",
    "symlink": lambda d: (d / "link.onnx").symlink_to(d / "model.onnx") or d / "link.onnx",
    "hard link": lambda d: os.link(d / "model.onnx", d / "hard.onnx") or d / "hard.onnx",
}


@pytest.mark.parametrize("spelling", SPELLINGS, ids=list(SPELLINGS))
def test_an_input_is_never_an_output(inputs, spelling):
    out = SPELLINGS[spelling](inputs)
    with pytest.raises(OnnxcalError, match="is the input file"):
        _files.check_output_path(out, [inputs / "model.onnx"], force=True)
    assert (inputs / "model.onnx").read_bytes() == b"model"


def test_nothing_is_written_into_an_input_folder(inputs):
    for out in (inputs / "data" / "c.npz", inputs / "data" / "sub" / "c.npz"):
        with pytest.raises(OnnxcalError, match="is inside the input folder"):
            _files.check_not_input(out, [inputs / "data"])
    _files.check_not_input(inputs / "database.npz", [inputs / "data"])  # a name that only starts alike


def test_existing_output_needs_force_and_a_writable_directory(inputs, monkeypatch):
    existing = inputs / "old.npz"
    existing.write_bytes(b"old")
    with pytest.raises(OnnxcalError, match="already exists; pass --force"):
        _files.check_output_path(existing)
    assert _files.check_output_path(existing, force=True) == existing
    # What an unprivileged user gets for a directory without write permission (as root,
    # os.access says yes whatever the mode; the real refusal: tests/bad_inputs/).
    monkeypatch.setattr(os, "access", lambda path, mode, *a, **k: False)
    with pytest.raises(OnnxcalError, match=r"cannot write to directory '.*' \(--junit\)"):
        _files.check_output_path(inputs / "new.xml", option="--junit")


# --------------------------------------------------------------------------
# Atomic writes


def _fail_nth_write(monkeypatch, n: int, err: int = errno.ENOSPC) -> None:
    """Make the n-th Path.write_bytes fail as a full disk would, after writing part of the data."""
    real = Path.write_bytes
    calls = []

    def write_bytes(self, data):
        calls.append(self)
        if len(calls) == n:
            real(self, data[: len(data) // 2])
            raise OSError(err, os.strerror(err))
        return real(self, data)

    monkeypatch.setattr(Path, "write_bytes", write_bytes)


def test_several_files_appear_all_or_none(tmp_path, monkeypatch):
    (tmp_path / "b.bin").write_bytes(b"kept")
    files = {tmp_path / "a.bin": b"A" * 100, tmp_path / "b.bin": b"B" * 100, tmp_path / "c.bin": b"C" * 100}
    _fail_nth_write(monkeypatch, 3)
    with pytest.raises(OnnxcalError, match=r"cannot write '.*c.bin': No space left on device; free some space"):
        _files.atomic_write_files(files)
    assert files_in(tmp_path) == {"b.bin": b"kept"}  # no new file, the old one untouched, no temporaries
    monkeypatch.undo()
    _files.atomic_write_files(files)
    assert files_in(tmp_path) == {p.name: b for p, b in files.items()}


def test_a_new_directory_appears_whole_or_not_at_all(tmp_path, monkeypatch):
    files = {tmp_path / "rep" / "report.html": b"<p>", tmp_path / "rep" / "report.json": b"{}"}
    _fail_nth_write(monkeypatch, 2)
    with pytest.raises(OnnxcalError, match="No space left"):
        _files.atomic_write_files(files)
    assert list(tmp_path.iterdir()) == []
    monkeypatch.undo()
    _files.atomic_write_files(files)
    assert sorted(p.name for p in (tmp_path / "rep").iterdir()) == ["report.html", "report.json"]
    assert ((tmp_path / "rep").stat().st_mode & 0o777) == 0o777 & ~_files._umask()


def test_a_refused_temporary_file_is_a_clean_error(tmp_path, monkeypatch):
    import tempfile

    def refuse(*args, **kwargs):
        raise PermissionError(errno.EACCES, "Permission denied")

    monkeypatch.setattr(tempfile, "mkstemp", refuse)
    with pytest.raises(OnnxcalError, match=r"cannot write '.*out.bin': Permission denied; choose a directory"):
        _files.atomic_write_bytes(tmp_path / "out.bin", b"x")
    assert list(tmp_path.iterdir()) == []


def test_written_files_have_the_usual_mode(tmp_path):
    _files.atomic_write_bytes(tmp_path / "out.bin", b"x")
    assert ((tmp_path / "out.bin").stat().st_mode & 0o777) == 0o666 & ~_files._umask()


# --------------------------------------------------------------------------
# Every writer: temporary file in the destination directory, fsync, rename, fsync of the directory


@pytest.fixture
def journal(monkeypatch):
    """Record fsync (by the path of the fd) and rename calls, in order."""
    events = []
    real_fsync, real_replace, real_rename = os.fsync, os.replace, os.rename

    def fsync(fd):
        events.append(("fsync", os.readlink(f"/proc/self/fd/{fd}")))
        return real_fsync(fd)

    def replace(src, dst):
        events.append(("rename", str(Path(src).resolve()), str(Path(dst).resolve())))
        return real_replace(src, dst)

    def rename(src, dst):
        events.append(("rename", str(Path(src).resolve()), str(Path(dst).resolve())))
        return real_rename(src, dst)

    if not Path("/proc/self/fd").is_dir():
        pytest.skip("needs /proc/self/fd to name fsync'ed descriptors")
    monkeypatch.setattr(os, "fsync", fsync)
    monkeypatch.setattr(os, "replace", replace)
    monkeypatch.setattr(os, "rename", rename)
    return events


def _check_durable(events, outputs: list[Path]) -> None:
    """Each output: written under a temporary name in its directory, fsync'ed, renamed, directory fsync'ed."""
    for out in outputs:
        out = out.resolve()
        (i, tmp), = [(i, e[1]) for i, e in enumerate(events) if e[0] == "rename" and e[2] == str(out)] or [(None, None)]
        assert i is not None, f"{out} was not renamed into place"
        assert Path(tmp).parent == out.parent and Path(tmp).name.startswith(".")
        synced_file = [j for j, e in enumerate(events[:i]) if e == ("fsync", tmp)]
        inside_tmp_dir = [j for j, e in enumerate(events[:i]) if e[0] == "fsync" and Path(e[1]).parent == Path(tmp)]
        assert synced_file or inside_tmp_dir, f"{out}: not fsync'ed before the rename"
        assert ("fsync", str(out.parent)) in events[i + 1 :], f"{out}: directory not fsync'ed after the rename"


WRITERS = {
    "capture (streamed)": lambda d: (api.capture(DEMO_MODEL, DEMO_VAL, out=d / "c.npz"), [d / "c.npz"]),
    "fit": lambda d: (api.fit(d.parent / "c.npz", out=d / "f.json", options=FitOptions(bootstrap=0)), [d / "f.json"]),
    "patch (external data)": lambda d: (api.patch(d.parent / "ext.onnx", d / "p.onnx", temperature=2.0),
                                        [d / "p.onnx", d / "p.onnx.data"]),
    "report (new directory)": lambda d: (api.report(d.parent / "c.npz", d / "rep", temperature=2.0, formats="md,json"),
                                         [d / "rep"]),
    "verify --junit": lambda d: (api.verify(d.parent / "p.onnx", DEMO_VAL, junit=d / "j.xml"), [d / "j.xml"]),
}


@pytest.mark.parametrize("writer", WRITERS, ids=list(WRITERS))
def test_every_writer_is_atomic_and_durable(tmp_path, rng, journal, writer):
    import onnx

    api.capture(DEMO_MODEL, DEMO_VAL, out=tmp_path / "c.npz")
    model = random_mlp(rng, d=16, k=5, hidden=40)  # 16 x 40 float32 weights: over the 1 KiB threshold
    onnx.save(model, tmp_path / "ext.onnx", save_as_external_data=True, location="ext.onnx.data", size_threshold=1024)
    api.patch(DEMO_MODEL, tmp_path / "p.onnx", temperature=2.0)
    out = tmp_path / "out"
    out.mkdir()
    journal.clear()
    _, outputs = WRITERS[writer](out)
    _check_durable(journal, outputs)
    assert not [p for p in out.rglob(".*") if p.name.endswith(".tmp")]  # no temporary left behind
