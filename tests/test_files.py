"""_files: atomic writes, their error messages, the test hook and stale temporaries."""

import errno
import fcntl
import os
import stat
import subprocess
import sys
import time

import pytest

from onnxcal import _files
from onnxcal.errors import OnnxcalError, OnnxcalWarning


def _temporaries(directory):
    return sorted(p.name for p in directory.iterdir() if p.name.endswith(".tmp"))


def _age(path, seconds: float = 2 * _files.STALE_SECONDS) -> None:
    old = time.time() - seconds
    os.utime(path, (old, old))


def test_atomic_write_replaces_and_leaves_no_temporary(tmp_path):
    dest = tmp_path / "out.bin"
    dest.write_bytes(b"old")
    _files.atomic_write_bytes(dest, b"new contents")
    assert dest.read_bytes() == b"new contents"
    assert [p.name for p in tmp_path.iterdir()] == ["out.bin"]
    # the usual mode for a new file (0666 less the umask), not mkstemp's 0600
    mask = os.umask(0)
    os.umask(mask)
    assert stat.S_IMODE(dest.stat().st_mode) == 0o666 & ~mask


def test_failure_in_the_body_removes_the_temporary_and_keeps_the_old_file(tmp_path):
    dest = tmp_path / "out.bin"
    dest.write_bytes(b"old")
    with pytest.raises(KeyboardInterrupt):
        with _files.atomic_path(dest) as tmp:
            tmp.write_bytes(b"half")
            raise KeyboardInterrupt
    assert dest.read_bytes() == b"old" and _temporaries(tmp_path) == []


def test_pause_hook_sleeps_after_the_complete_write_and_before_the_rename(tmp_path, monkeypatch, capsys):
    dest = tmp_path / "out.bin"
    seen = []

    def sleep(seconds):  # what the outputs look like while the hook pauses
        (tmp,) = [p for p in tmp_path.iterdir() if p.name.endswith(".tmp")]
        seen.append((seconds, tmp.read_bytes(), dest.exists()))

    monkeypatch.setattr(_files.time, "sleep", sleep)
    monkeypatch.setenv(_files.PAUSE_HOOK, "2.5")
    _files.atomic_write_bytes(dest, b"payload")
    assert seen == [(2.5, b"payload", False)]  # complete temporary, no output yet
    assert dest.read_bytes() == b"payload"
    assert _files.PAUSE_HOOK in capsys.readouterr().err

    monkeypatch.delenv(_files.PAUSE_HOOK)
    seen.clear()
    _files.atomic_write_bytes(dest, b"again")
    assert seen == [] and capsys.readouterr().err == ""  # unset: no pause, no output


@pytest.mark.parametrize(
    "code, words",
    [
        (errno.ENOSPC, "the disk is full"),
        (errno.EDQUOT, "quota"),
        (errno.EACCES, "permission denied"),
        (errno.EROFS, "read-only"),
        (errno.EIO, "Input/output error"),
    ],
)
def test_write_error_names_the_file_and_the_cause(tmp_path, code, words):
    exc = _files.write_error(OSError(code, os.strerror(code)), tmp_path / "m.onnx")
    text = str(exc)
    assert f"cannot write '{tmp_path / 'm.onnx'}'" in text and words in text
    assert "no output was written" in text and "\n" not in text


def test_enospc_on_fsync_is_a_clean_error_and_the_old_file_stays(tmp_path, monkeypatch):
    dest = tmp_path / "fit.json"
    dest.write_bytes(b"old")

    def fsync(fd):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(os, "fsync", fsync)
    with pytest.raises(OnnxcalError, match=r"cannot write '.*fit\.json': the disk is full"):
        _files.atomic_write_bytes(dest, b"new")
    assert dest.read_bytes() == b"old" and _temporaries(tmp_path) == []


def test_permission_denied_creating_the_temporary(tmp_path, monkeypatch):
    def mkstemp(**kwargs):  # as for a directory the user may not write to
        raise PermissionError(errno.EACCES, "Permission denied", str(kwargs["dir"]))

    monkeypatch.setattr(_files.tempfile, "mkstemp", mkstemp)
    with pytest.raises(OnnxcalError, match=r"cannot write '.*out\.onnx': permission denied"):
        _files.atomic_write_bytes(tmp_path / "out.onnx", b"x")
    assert list(tmp_path.iterdir()) == []


def test_a_read_error_of_another_file_is_not_called_a_write_error(tmp_path):
    with pytest.raises(FileNotFoundError):
        with _files.atomic_path(tmp_path / "out.npz"):
            open(tmp_path / "missing-input.npy", "rb")
    assert list(tmp_path.iterdir()) == []


def test_a_group_is_renamed_only_when_every_file_is_written(tmp_path, monkeypatch):
    first, second = tmp_path / "m.onnx.data", tmp_path / "m.onnx"
    first.write_bytes(b"old weights")
    second.write_bytes(b"old graph")
    real_write = _files.Path.write_bytes

    def write_bytes(self, data):
        if self.name.startswith(".m.onnx.") and not self.name.startswith(".m.onnx.data."):
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        return real_write(self, data)

    monkeypatch.setattr(_files.Path, "write_bytes", write_bytes)
    with pytest.raises(OnnxcalError, match=r"cannot write '.*m\.onnx': the disk is full"):
        _files.atomic_write_files({first: b"new weights", second: b"new graph"})
    # the weights were written completely, but not renamed: the old pair is intact
    assert first.read_bytes() == b"old weights" and second.read_bytes() == b"old graph"
    assert _temporaries(tmp_path) == []


def test_stale_temporaries_are_removed_only_when_safe(tmp_path):
    dest = tmp_path / "out.onnx"
    stale = tmp_path / ".out.onnx.abcd1234.tmp"
    young = tmp_path / ".out.onnx.young123.tmp"
    locked = tmp_path / ".out.onnx.locked12.tmp"
    others = [
        tmp_path / ".out.onnx.short.tmp",  # not mkstemp's 8 characters
        tmp_path / ".out.onnx.abcd1234.tmp.keep",
        tmp_path / ".other.onnx.abcd1234.tmp",  # another output's
        tmp_path / "out.onnx.abcd1234.tmp",  # not hidden
    ]
    for p in [stale, young, locked, *others]:
        p.write_bytes(b"x")
    link = tmp_path / ".out.onnx.link1234.tmp"
    link.symlink_to(tmp_path / "elsewhere")
    folder = tmp_path / ".out.onnx.dir12345.tmp"
    folder.mkdir()
    for p in [stale, locked, *others, folder]:
        _age(p)
    holder = os.open(locked, os.O_RDONLY)  # as a live writer holds its temporary
    fcntl.flock(holder, fcntl.LOCK_EX)
    try:
        with pytest.warns(OnnxcalWarning, match="removed 1 temporary file"):
            removed = _files.remove_stale_temporaries(dest)
    finally:
        os.close(holder)
    assert removed == [stale] and not stale.exists()
    assert all(p.exists() for p in [young, locked, *others, folder]) and link.is_symlink()
    # the lock released (its writer gone), the next write of the output removes it
    with pytest.warns(OnnxcalWarning, match=locked.name):
        _files.atomic_write_bytes(dest, b"model")
    assert not locked.exists() and dest.read_bytes() == b"model"


def test_a_live_writers_temporary_survives_another_run(tmp_path):
    """A second process writing the same output leaves the first one's temporary alone."""
    dest = tmp_path / "out.bin"
    code = (
        "import os, time\n"
        "from onnxcal import _files\n"
        f"with _files.atomic_path({str(dest)!r}) as tmp:\n"
        "    tmp.write_bytes(b'first')\n"
        f"    old = time.time() - 2 * _files.STALE_SECONDS\n"
        "    os.utime(tmp, (old, old))\n"
        "    print(tmp, flush=True)\n"
        "    input()\n"
    )
    writer = subprocess.Popen([sys.executable, "-c", code], stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
    try:
        tmp = writer.stdout.readline().strip()
        assert _files.remove_stale_temporaries(dest) == []  # old, but locked by a live writer
        _files.atomic_write_bytes(dest, b"second")
        assert os.path.exists(tmp)
        writer.communicate("\n", timeout=60)
    finally:
        writer.kill()
        writer.wait()
    assert writer.returncode == 0 and dest.read_bytes() == b"first"  # the last rename wins
    assert _temporaries(tmp_path) == []


def test_sha256_of_an_unreadable_file_is_a_clean_error(tmp_path):
    with pytest.raises(OnnxcalError, match=r"cannot read '.*'"):
        _files.sha256_file(tmp_path)  # a directory: open() fails with IsADirectoryError
