"""_files: output-path checks; atomic, durable writes for every writer, their error
messages, the test hook and stale temporaries."""

from __future__ import annotations

import errno
import fcntl
import os
import signal
import stat
import subprocess
import sys
import time
from pathlib import Path

import pytest
from conftest import DEMO_MODEL, DEMO_VAL, files_in, random_mlp

from onnxcal import _files, _temporaries, api
from onnxcal.errors import OnnxcalError, OnnxcalWarning, cli_spelling, keyword_errors
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
    # the hint names the option; a public api function (errors.keyword_errors) names the keyword
    # from Python, and the option again on the command line
    with pytest.raises(OnnxcalError, match=r"already exists; pass --force to replace it$"):
        _files.check_output_path(existing)
    with pytest.raises(OnnxcalError, match=r"already exists; pass force=True to replace it$"):
        keyword_errors(_files.check_output_path)(existing)
    with cli_spelling(), pytest.raises(OnnxcalError, match=r"already exists; pass --force to replace it$"):
        keyword_errors(_files.check_output_path)(existing)
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
    with pytest.raises(OnnxcalError,
                       match=r"cannot write '.*c.bin': the disk is full \(No space left on device\); free space"):
        _files.atomic_write_files(files, replace=True)
    assert files_in(tmp_path) == {"b.bin": b"kept"}  # no new file, the old one untouched, no temporaries
    monkeypatch.undo()
    _files.atomic_write_files(files, replace=True)
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
    with pytest.raises(OnnxcalError,
                       match=r"cannot write '.*out.bin': permission denied; write the output to a directory"):
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
    real_noreplace = _temporaries.rename_noreplace

    def fsync(fd):
        events.append(("fsync", os.readlink(f"/proc/self/fd/{fd}")))
        return real_fsync(fd)

    def replace(src, dst):
        events.append(("rename", str(Path(src).resolve()), str(Path(dst).resolve())))
        return real_replace(src, dst)

    def rename(src, dst):
        events.append(("rename", str(Path(src).resolve()), str(Path(dst).resolve())))
        return real_rename(src, dst)

    def rename_noreplace(src, dst):  # renameat2 through ctypes: not seen by the os module
        events.append(("rename", str(Path(src).resolve()), str(Path(dst).resolve())))
        return real_noreplace(src, dst)

    if not Path("/proc/self/fd").is_dir():
        pytest.skip("needs /proc/self/fd to name fsync'ed descriptors")
    monkeypatch.setattr(os, "fsync", fsync)
    monkeypatch.setattr(os, "replace", replace)
    monkeypatch.setattr(os, "rename", rename)
    monkeypatch.setattr(_temporaries, "rename_noreplace", rename_noreplace)
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
    # a new report directory is created, then its files written and renamed like any others
    "report (new directory)": lambda d: (api.report(d.parent / "c.npz", d / "rep", temperature=2.0, formats="md,json"),
                                         [d / "rep" / "summary.md", d / "rep" / "report.json"]),
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


# --------------------------------------------------------------------------
# Atomic writes: temporaries, the test hook, stale temporaries of killed writers


def _leftovers(directory):
    """Temporaries and their owner records."""
    return sorted(p.name for p in directory.iterdir() if p.name.endswith((".tmp", ".owner")))


def _age(path, seconds: float = 2 * _files.STALE_SECONDS) -> None:
    old = time.time() - seconds
    os.utime(path, (old, old))


def test_atomic_write_replaces_and_leaves_no_temporary(tmp_path):
    dest = tmp_path / "out.bin"
    dest.write_bytes(b"old")
    _files.atomic_write_bytes(dest, b"new contents", replace=True)
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
    assert dest.read_bytes() == b"old" and _leftovers(tmp_path) == []


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
    _files.atomic_write_bytes(dest, b"again", replace=True)
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
    assert dest.read_bytes() == b"old" and _leftovers(tmp_path) == []


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
    assert _leftovers(tmp_path) == []


def _dead_pid() -> int:
    """The pid of a process that has ended (a child, waited for)."""
    child = subprocess.Popen([sys.executable, "-c", "pass"])
    child.wait()
    return child.pid


def _abandon(dest: Path, pid: int | None = None, host: str | None = None) -> tuple[Path, Path]:
    """What a writer killed outright leaves: a complete temporary and its owner record, lock free.

    Made with the writer's own code, then the record rewritten to name a
    process that has ended (this one is alive) and its descriptor closed
    without removing anything, as the kernel does for a killed process.
    """
    t = _files._Temporary(dest, False)
    t.path.write_bytes(b"complete output")
    t._record["pid"] = _dead_pid() if pid is None else pid
    if host is not None:
        t._record["host"] = host
    t._write_record()
    os.close(t._fd)
    return t.path, t.owner


def test_a_proven_stale_temporary_is_removed_and_the_warning_says_why(tmp_path):
    dest = tmp_path / "out.onnx"
    tmp, owner = _abandon(dest)
    with pytest.warns(OnnxcalWarning) as seen:
        assert _files.remove_stale_temporaries(dest) == [tmp]
    (w,) = seen
    text = str(w.message)
    assert f"removed '{tmp}' and its owner record '{owner.name}'" in text
    assert "which stopped before renaming it; that process is gone and no process holds the file" in text
    assert list(tmp_path.iterdir()) == []


def test_files_named_like_temporaries_are_never_removed_without_proof(tmp_path):
    """Issue 11: a user's '.FIT.json.backup01.tmp' beside FIT.json was deleted."""
    dest = tmp_path / "FIT.json"
    user = {
        ".FIT.json.backup01.tmp": b"the user's backup",
        ".FIT.json.abcd1234.tmp": b"named exactly like a temporary",
        ".FIT.json.abcd1234.owner": b'{"kind": "onnxcal temporary owner"}',  # a record that names no inode
    }
    for name, data in user.items():
        (tmp_path / name).write_bytes(data)
        _age(tmp_path / name, 86400)
    # a real stale pair, then copied (cp -a keeps names and contents, not inodes): the copies prove nothing
    tmp, owner = _abandon(dest)
    copy = tmp_path / "copy"
    copy.mkdir()
    for p in (tmp, owner):
        (copy / p.name).write_bytes(p.read_bytes())
    assert _files.remove_stale_temporaries(copy / "FIT.json") == []
    assert sorted(p.name for p in copy.iterdir()) == sorted([tmp.name, owner.name])
    # the temporary replaced by another file under its name: the record is removed, the file kept
    other = tmp_path / "other"
    other.write_bytes(b"another file under that name")
    os.replace(other, tmp)
    with pytest.warns(OnnxcalWarning, match="removed the owner record"):
        assert _files.remove_stale_temporaries(dest) == []
    assert tmp.read_bytes() == b"another file under that name" and not owner.exists()
    assert all((tmp_path / name).read_bytes() == data for name, data in user.items())


def test_a_temporary_whose_process_lives_or_whose_lock_is_held_stays(tmp_path):
    dest = tmp_path / "out.onnx"
    sleeper = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    try:
        tmp, owner = _abandon(dest, pid=sleeper.pid)  # lock free, but the process named is alive
        assert _files.remove_stale_temporaries(dest) == [] and tmp.exists() and owner.exists()
    finally:
        sleeper.kill()
        sleeper.wait()
    holder = os.open(owner, os.O_RDONLY)  # a live writer holds the lock of its record
    fcntl.flock(holder, fcntl.LOCK_EX)
    try:
        assert _files.remove_stale_temporaries(dest) == [] and tmp.exists()
    finally:
        os.close(holder)
    with pytest.warns(OnnxcalWarning, match="removed"):  # both gone: removed
        assert _files.remove_stale_temporaries(dest) == [tmp]


def test_a_record_from_another_host_is_trusted_only_when_old(tmp_path):
    dest = tmp_path / "out.onnx"
    tmp, owner = _abandon(dest, pid=1, host="another-host.example")  # a shared file system
    assert _files.remove_stale_temporaries(dest) == [] and tmp.exists()
    _age(owner)
    with pytest.warns(OnnxcalWarning, match="on another-host.example"):
        assert _files.remove_stale_temporaries(dest) == [tmp]


def test_an_input_of_the_command_is_never_removed(tmp_path):
    """Issue 11: 'onnxcal patch .p.onnx.XXXXXXXX.tmp ... --out p.onnx' deleted its own input."""
    dest = tmp_path / "p.onnx"
    tmp, owner = _abandon(dest)  # even a real stale temporary, once it is an input
    with _files.command():
        _files.check_output_path(dest, [tmp])
        assert _files.remove_stale_temporaries(dest) == []
    assert tmp.read_bytes() == b"complete output" and owner.exists()


def test_publication_never_replaces_a_file_that_appeared_meanwhile(tmp_path):
    dest = tmp_path / "out.onnx"
    with _files.command():
        _files.check_output_path(dest)  # absent at the check: the write may not replace anything
        with pytest.raises(OnnxcalError, match=r"'.*out.onnx' was written by another run or program while this one "
                           r"worked .*left as it is and this run wrote nothing; pass --force"):
            with _files.atomic_path(dest) as tmp:
                tmp.write_bytes(b"ours")
                dest.write_bytes(b"theirs")  # another program, while this run works
    assert dest.read_bytes() == b"theirs" and _leftovers(tmp_path) == []
    with _files.command():
        _files.check_output_path(dest, force=True)  # --force: replaced
        _files.atomic_write_bytes(dest, b"ours")
    assert dest.read_bytes() == b"ours"


def test_a_group_that_meets_an_appeared_file_publishes_nothing(tmp_path, monkeypatch):
    a, b = tmp_path / "m.onnx.data", tmp_path / "m.onnx"
    real = _temporaries.rename_noreplace

    def late(src, dst):  # b appears between the group's check and its move
        if Path(dst) == b:
            b.write_bytes(b"theirs")
        return real(src, dst)

    monkeypatch.setattr(_temporaries, "rename_noreplace", late)
    with pytest.raises(OnnxcalError, match="m.onnx' was written by another run"):
        _files.atomic_write_files({a: b"weights", b: b"graph"}, replace=False)
    assert files_in(tmp_path) == {"m.onnx": b"theirs"}  # the new m.onnx.data was taken back


@pytest.mark.parametrize("how", ["renameat2", "link", "locked check"])
def test_no_replace_publication_on_every_path(tmp_path, monkeypatch, how):
    if how != "renameat2":  # a file system without RENAME_NOREPLACE
        monkeypatch.setattr(_temporaries, "_renameat2", lambda src, dst: False)
    if how == "locked check":  # and without hard links (FAT, some network file systems)
        def no_link(src, dst):
            raise OSError(errno.EPERM, "Operation not permitted")

        monkeypatch.setattr(os, "link", no_link)
    src, dst = tmp_path / "src", tmp_path / "dst"
    src.write_bytes(b"new")
    dst.write_bytes(b"old")
    with pytest.raises(FileExistsError):
        _temporaries.rename_noreplace(src, dst)
    assert dst.read_bytes() == b"old" and src.read_bytes() == b"new"
    dst.unlink()
    _temporaries.rename_noreplace(src, dst)
    assert dst.read_bytes() == b"new" and not src.exists() and dst.stat().st_nlink == 1


def test_a_late_writer_of_the_same_output_is_refused_and_the_first_file_kept(tmp_path):
    """Two writers of one new output: the first to finish wins, the other is refused (issue 11)."""
    dest = tmp_path / "out.bin"
    code = (
        "import sys\n"
        "from onnxcal import _files\n"
        "from onnxcal.errors import OnnxcalError\n"
        f"with _files.command():\n"
        f"    _files.check_output_path({str(dest)!r})\n"
        "    try:\n"
        f"        with _files.atomic_path({str(dest)!r}) as tmp:\n"
        "            tmp.write_bytes(b'first')\n"
        "            print(tmp, flush=True)\n"
        "            input()\n"
        "    except OnnxcalError as exc:\n"
        "        print(exc, flush=True)\n"
        "        sys.exit(2)\n"
    )
    writer = subprocess.Popen([sys.executable, "-c", code], stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
    try:
        tmp = writer.stdout.readline().strip()
        assert _files.remove_stale_temporaries(dest) == []  # a live writer's temporary is not stale
        _files.atomic_write_bytes(dest, b"second")
        assert os.path.exists(tmp)
        out, _ = writer.communicate("\n", timeout=60)
    finally:
        writer.kill()
        writer.wait()
    assert writer.returncode == 2 and "was written by another run or program" in out
    assert dest.read_bytes() == b"second" and _leftovers(tmp_path) == []


def test_a_signal_during_a_group_is_delivered_after_it(tmp_path, monkeypatch):
    """Issue 11, 6a: SIGINT between the renames of a group left a new model beside an old report."""
    files = {tmp_path / name: name.encode() for name in ("model.onnx", "model.onnx.data", "report.json")}
    real = _temporaries.rename_noreplace
    moved = []

    def rename(src, dst):
        moved.append(Path(dst).name)
        if len(moved) == 1:
            signal.raise_signal(signal.SIGINT)  # Ctrl-C after the first rename
        return real(src, dst)

    monkeypatch.setattr(_temporaries, "rename_noreplace", rename)
    with pytest.raises(KeyboardInterrupt):
        _files.atomic_write_files(files, replace=False)
    assert len(moved) == 3 and files_in(tmp_path) == {p.name: d for p, d in files.items()}  # all new


def test_a_failed_rename_in_a_group_cleans_up_everything(tmp_path, monkeypatch):
    """Issue 11, 6a: the clean-up stopped at a descriptor closed twice ("Bad file descriptor")."""
    files = {tmp_path / "rep" / name: b"x" for name in ("a.png", "b.png", "c.png")}
    real = _temporaries.rename_noreplace
    calls = []

    def fail_second(src, dst):
        calls.append(dst)
        if len(calls) == 2:
            raise OSError(errno.EIO, os.strerror(errno.EIO))
        return real(src, dst)

    monkeypatch.setattr(_temporaries, "rename_noreplace", fail_second)
    with pytest.raises(OnnxcalError, match="cannot write '.*b.png'"):
        _files.atomic_write_files(files, replace=False)
    assert list(tmp_path.iterdir()) == []  # a.png taken back, temporaries and the new directory removed


def test_a_temporary_closes_its_descriptor_once_whatever_the_order(tmp_path, monkeypatch):
    closes = []
    real_close = os.close
    monkeypatch.setattr(os, "close", lambda fd: (closes.append(fd), real_close(fd))[1])
    t = _files._Temporary(tmp_path / "out.bin", False)
    fd = t._fd
    t.path.write_bytes(b"x")
    t.publish()
    t.discard()  # the clean-up after a signal that came between the rename and the bookkeeping
    t.discard()
    assert closes.count(fd) == 1 and _leftovers(tmp_path) == [] and (tmp_path / "out.bin").read_bytes() == b"x"


class _RaisesSignalWhenCollected:
    """Its __del__ raises SIGINT: the handler's Interrupted is raised inside __del__, where Python
    cannot propagate it (it calls sys.unraisablehook instead: common practice for any exception
    raised in __del__ or a weakref callback, as a plotting library's cleanup may be)."""

    def __del__(self) -> None:
        signal.raise_signal(signal.SIGINT)


def test_an_interrupt_lost_in_a_callback_still_stops_the_publish(tmp_path, capfd):
    from onnxcal import _signals

    dest = tmp_path / "out.txt"
    with pytest.raises(_signals.Interrupted, match="SIGINT"), _signals.interrupting():
        with _files.atomic_paths([dest]) as (tmp,):
            tmp.write_text("complete")
            _RaisesSignalWhenCollected()  # collected at once; its Interrupted is lost in __del__
            assert _signals.received() == "SIGINT"  # ... yet the run knows it was stopped
    assert not dest.exists() and files_in(tmp_path) == {}  # nothing published, no temporary left
    assert "Exception ignored" not in capfd.readouterr().err  # the lost Interrupted is not printed
    assert signal.getsignal(signal.SIGINT) is not _signals._raise  # handlers restored after the block
    assert _signals.received() is None  # and what the run received ends with it (the next run starts afresh)


def test_the_command_line_ends_a_run_whose_interrupt_was_lost_as_interrupted(tmp_path, monkeypatch, capsys):
    import importlib

    cli_app = importlib.import_module("onnxcal.cli.app")  # the module (onnxcal.cli.app is also the typer app)
    real = cli_app.app

    def runs_then_loses_an_interrupt(*args, **kwargs):
        _RaisesSignalWhenCollected()
        return real(*args, **kwargs)

    monkeypatch.setattr(cli_app, "app", runs_then_loses_an_interrupt)
    assert cli_app.main(["inspect", str(DEMO_MODEL)]) == 130  # 128 + SIGINT, as a shell reports it
    assert "interrupted by SIGINT" in capsys.readouterr().err
