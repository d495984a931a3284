"""Atomic writes of the outputs, and their publication (hashing and output-path checks: ``_paths``).

Outputs are written to a temporary file in the destination directory, flushed
and fsync'ed, then moved onto the destination (and the directory fsync'ed),
so a crash or Ctrl-C leaves either the old state or the complete new file,
never a partial one. Several outputs of one command are written in full
before any is moved into place, and the moves of a group are not cut by
SIGINT or SIGTERM (:func:`atomic_write_files`). An output that did not
exist when the command checked it is published without replacing anything
(``renameat2(RENAME_NOREPLACE)``, else ``link`` + ``unlink``, else a check
under a lock of the directory), so a file that appears meanwhile (another
program, another run) is kept and the command fails; with ``--force`` it is
replaced.

Each temporary ``.NAME.XXXXXXXX.tmp`` has an owner record
``.NAME.XXXXXXXX.owner`` beside it, created first and locked (``flock``) by
the writing process for as long as it lives; only a temporary whose record
proves it, whose lock is free and whose process is gone is ever removed by a
later run (:func:`remove_stale_temporaries`, in :mod:`onnxcal._temporaries`
with the no-replace rename).

The hashing, copying and path-checking helpers of :mod:`onnxcal._paths` are
re-exported here, where the stages import them from.
"""

from __future__ import annotations

import contextlib
import errno
import json
import os
import socket
import sys
import tempfile
import time
from collections.abc import Callable, Iterator, Mapping, Sequence
from pathlib import Path
from typing import Any

from . import _signals, _temporaries
from ._paths import (  # noqa: F401 - re-exported: the stages, graph.io and tests import them from _files
    _COMMAND,
    Command,
    _data_runs,
    _key,
    _umask,
    check_not_input,
    check_output_path,
    check_writable,
    command,
    copy_range,
    current_command,
    one_command,
    require_file,
    sha256_bytes,
    sha256_file,
)
from ._temporaries import STALE_SECONDS, fcntl  # noqa: F401 - STALE_SECONDS: the rule, for tests and docs
from .errors import OnnxcalError


def _fsync_directory(directory: Path) -> None:
    """Make a rename in ``directory`` durable (POSIX; a no-op where directories cannot be opened)."""
    if not hasattr(os, "O_DIRECTORY"):
        return
    try:
        fd = os.open(directory, os.O_RDONLY | os.O_DIRECTORY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:  # some file systems do not fsync directories
        pass
    finally:
        os.close(fd)




# Test hook (tests only; see DEVELOPERS.md): seconds to sleep once the temporaries
# are complete and fsync'ed, just before they are moved onto the outputs, so a
# test can kill the process at that moment. Unset, it costs one environment lookup.
PAUSE_HOOK = "ONNXCAL_TEST_PAUSE_BEFORE_RENAME"

_WRITE_ERRNOS = {errno.ENOSPC, errno.EDQUOT, errno.EFBIG, errno.EROFS}
_REASONS = {
    errno.ENOSPC: ("the disk is full", "free space on that disk or write the output elsewhere"),
    errno.EDQUOT: ("the disk quota is used up", "free space within your quota or write the output elsewhere"),
    errno.EFBIG: ("the file is too large for its file system", "write the output to another file system"),
    errno.EROFS: ("the file system is read-only", "write the output elsewhere"),
    errno.EACCES: ("permission denied", "write the output to a directory you can write to"),
    errno.EPERM: ("the operation is not permitted", "write the output to a directory you can write to"),
}


def write_error(exc: OSError, dests: str | os.PathLike[str] | Sequence[str | os.PathLike[str]]) -> OnnxcalError:
    """An OnnxcalError for a failed write of ``dests`` (disk full, permission denied, ...)."""
    if isinstance(dests, (str, os.PathLike)):
        dests = [dests]
    names = ", ".join(f"'{d}'" for d in dests)
    reason, hint = _REASONS.get(exc.errno or 0, (exc.strerror or str(exc), "check the output path and its disk"))
    detail = f" ({exc.strerror})" if exc.strerror and exc.strerror.lower() != reason else ""
    return OnnxcalError(f"cannot write {names}: {reason}{detail}", f"{hint}; no output was written")


def appeared_error(dest: Path) -> OnnxcalError:
    """An OnnxcalError for an output that another run or program created while this one worked."""
    return OnnxcalError(
        f"'{dest}' was written by another run or program while this one worked (it did not exist when "
        "this run started); it was left as it is and this run wrote nothing",
        "pass --force to replace it, or write to another path",
    )


# --------------------------------------------------------------------------
# Temporaries


def remove_stale_temporaries(dest: str | os.PathLike[str]) -> list[Path]:
    """Remove the temporaries of ``dest`` a stopped onnxcal process left, never an input of this command
    (see :func:`onnxcal._temporaries.remove_stale_temporaries` for when a temporary counts as stale)."""
    run = _COMMAND.get()
    return _temporaries.remove_stale_temporaries(dest, run.protected if run is not None else frozenset())



class _Temporary:
    """A temporary file beside ``dest`` and its locked owner record, to be moved onto ``dest``."""

    def __init__(self, dest: Path, replace: bool) -> None:
        self.dest, self.replace = dest, replace
        self.path: Path | None = None
        self.owner: Path | None = None
        self.identity: tuple[int, int] | None = None
        self._fd = -1
        self._record: dict[str, Any] = {}
        remove_stale_temporaries(dest)
        parent = dest.parent if str(dest.parent) else Path(".")
        try:
            with _signals.deferred():  # never a record without its bookkeeping
                self._create(dest, parent)
        except OSError as exc:
            self.discard()
            raise write_error(exc, dest) from exc
        except BaseException:
            self.discard()
            raise

    def _create(self, dest: Path, parent: Path) -> None:
        for _ in range(100):  # a name taken by someone else's file: draw another
            self._fd, name = tempfile.mkstemp(prefix=f".{dest.name}.", suffix=".owner", dir=str(parent))
            self.owner = Path(name)
            token = self.owner.name[len(dest.name) + 2 : -len(".owner")]
            if fcntl is not None:
                fcntl.flock(self._fd, fcntl.LOCK_EX)
            st = os.fstat(self._fd)
            self._record = {
                "kind": _temporaries.OWNER_KIND, "pid": os.getpid(), "host": socket.gethostname(),
                "started": time.time(), "device": st.st_dev, "inode": st.st_ino,
                "output": dest.name, "temporary": _temporaries.temporary_name(dest, token), "temporary_inode": None,
            }
            self._write_record()
            path = self.owner.parent / self._record["temporary"]  # absolute, as mkstemp's
            try:
                fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_NOFOLLOW, 0o666)
            except FileExistsError:
                self._drop_owner()
                continue
            self.path = path
            try:
                tst = os.fstat(fd)
            finally:
                os.close(fd)
            self.identity = (tst.st_dev, tst.st_ino)
            self._record["temporary_inode"] = tst.st_ino
            self._write_record()
            return
        raise FileExistsError(errno.EEXIST, "no free temporary name", str(parent))

    def _write_record(self) -> None:
        data = json.dumps(self._record).encode()
        os.ftruncate(self._fd, 0)
        os.pwrite(self._fd, data, 0)

    def _drop_owner(self) -> None:
        if self.owner is not None:
            with contextlib.suppress(OSError):
                os.unlink(self.owner)
            self.owner = None
        if self._fd >= 0:
            fd, self._fd = self._fd, -1  # never closed twice, whatever happens next
            os.close(fd)

    @property
    def written(self) -> Path:
        """The temporary's path (while it exists)."""
        if self.path is None:
            raise AssertionError(f"the temporary of '{self.dest}' is already gone")
        return self.path

    def sync(self) -> None:
        with open(self.written, "rb+") as fh:
            os.fsync(fh.fileno())

    def publish(self) -> None:
        """Move the temporary onto ``dest`` (replacing it only when allowed); then drop the record."""
        if self.replace:
            os.replace(self.written, self.dest)
        else:
            _temporaries.rename_noreplace(self.written, self.dest)
        self.path = None
        self._drop_owner()

    def unpublish(self) -> None:
        """Remove ``dest`` again if it is still the file this temporary became (roll back a new output)."""
        with contextlib.suppress(OSError):
            st = os.lstat(self.dest)
            if (st.st_dev, st.st_ino) == self.identity:
                os.unlink(self.dest)

    def discard(self) -> None:
        """Remove the temporary and its record. Safe to call more than once."""
        if self.path is not None:
            path, self.path = self.path, None
            with contextlib.suppress(FileNotFoundError):
                os.unlink(path)
        self._drop_owner()


def _pause_for_tests(temporaries: list[_Temporary]) -> None:
    seconds = os.environ.get(PAUSE_HOOK)
    if seconds:
        names = ", ".join(str(t.path) for t in temporaries)
        sys.stderr.write(f"onnxcal: {PAUSE_HOOK}: {names} complete; renaming in {seconds} s\n")
        sys.stderr.flush()
        time.sleep(float(seconds))


def _owner(exc: OSError, temporaries: list[_Temporary]) -> list[Path] | None:
    """The outputs an OSError raised while writing concerns, or None if it is no write error."""
    for t in temporaries:
        if exc.filename is not None and t.path is not None and os.fsdecode(exc.filename) == str(t.path):
            return [t.dest]
    if exc.errno in _WRITE_ERRNOS or (exc.errno is not None and exc.filename is None):
        return [t.dest for t in temporaries]  # a file object's write: it names no path
    return None


def _may_replace(dest: Path, replace: bool | None) -> bool:
    """Whether ``dest`` may be replaced: as given; in a command, only if checked with --force;
    outside any command (a library call such as ``fit.save_fit``), yes, as a save function does."""
    if replace is not None:
        return replace
    run = _COMMAND.get()
    return True if run is None else run.replace.get(_key(dest), False)


def _publish_group(temporaries: list[_Temporary]) -> None:
    """Move every temporary onto its output, all or none (SIGINT/SIGTERM are held back meanwhile).

    Outputs that may not be replaced are checked first, so a file that
    appeared meanwhile stops the group before anything moves; one that
    appears in the microseconds between that check and its move makes the
    outputs already published (new files of this run) be removed again.
    """
    for t in temporaries:
        if not t.replace and os.path.lexists(t.dest):
            raise appeared_error(t.dest)
    done: list[_Temporary] = []
    try:
        for t in temporaries:
            t.publish()
            done.append(t)
    except OSError as exc:
        for t in reversed(done):
            if not t.replace:
                t.unpublish()
        if isinstance(exc, FileExistsError):
            raise appeared_error(temporaries[len(done)].dest) from exc
        raise write_error(exc, [temporaries[len(done)].dest]) from exc
    for directory in {t.dest.parent for t in temporaries}:  # make the renames durable
        _fsync_directory(directory)
    if (run := _COMMAND.get()) is not None:
        run.written.extend(t.dest for t in temporaries)


@contextlib.contextmanager
def atomic_paths(dests: Sequence[str | os.PathLike[str]], *, replace: bool | None = None) -> Iterator[list[Path]]:
    """Yield temporary paths beside ``dests``; move each onto its destination on success.

    The caller writes every file to its temporary. On normal exit all of
    them are fsync'ed, then moved into place as a group (see
    :func:`_publish_group`); on any exception (including KeyboardInterrupt)
    every temporary and its owner record are removed and no destination is
    touched. An OSError while writing (disk full, permission denied, ...)
    becomes an :class:`OnnxcalError` that names the destination.

    ``replace``: whether an existing destination may be replaced. By
    default, within a command (:func:`command`), what
    :func:`check_output_path` was told for that path (``--force``), and no
    for a path it was not asked about; outside any command, yes.
    """
    temporaries: list[_Temporary] = []
    try:
        for dest in dests:
            temporaries.append(_Temporary(Path(dest), _may_replace(Path(dest), replace)))
        try:
            yield [t.written for t in temporaries]
        except OSError as exc:
            owner = _owner(exc, temporaries)
            if owner is None:
                raise
            raise write_error(exc, owner) from exc
        for t in temporaries:
            _step(t.sync, t.dest)
        _pause_for_tests(temporaries)
        _signals.raise_if_received()  # a signal whose Interrupted a callback swallowed: publish nothing
        with _signals.deferred():
            _publish_group(temporaries)
    finally:
        with _signals.deferred():
            for t in temporaries:
                t.discard()


def _step(action: Callable[[], object], dest: Path) -> None:
    try:
        action()
    except OSError as exc:
        raise write_error(exc, [dest]) from exc


@contextlib.contextmanager
def atomic_path(dest: str | os.PathLike[str], *, replace: bool | None = None) -> Iterator[Path]:
    """Yield a temporary path beside ``dest``; move it onto ``dest`` on success.

    The caller writes the whole file to the yielded path. On normal exit the
    file is fsync'ed and moved onto ``dest`` (and the directory fsync'ed);
    on any exception (including KeyboardInterrupt) the temporary file is
    removed and ``dest`` is untouched (see :func:`atomic_paths`). A process
    killed outright (SIGKILL, power loss) can leave the hidden temporary
    ``.NAME.XXXXXXXX.tmp`` and its owner record behind; the next write of the
    same output removes them (see :func:`remove_stale_temporaries`).
    """
    with atomic_paths([dest], replace=replace) as (tmp,):
        yield tmp


Writer = Callable[[Path], None]
"""Writes a whole file to the (temporary) path it is given: a file too large to hold as bytes."""


def atomic_write_files(files: Mapping[str | os.PathLike[str], bytes | Writer], *, replace: bool | None = None) -> None:
    """Write several files together, each atomically (see :func:`atomic_paths`).

    Each value is the file's bytes, or a :data:`Writer` that writes it to
    the temporary path it is given (streamed, e.g. a model's weights).

    Every file is written in full under a temporary name before any is
    moved into place, and the moves are not interrupted by SIGINT or
    SIGTERM, so a failure or a signal leaves all of them old or all new. A
    destination directory that does not exist yet (a new report directory)
    is created, and removed again if the writing fails or is interrupted;
    a process killed outright can leave such a new directory behind.
    """
    created: list[Path] = []
    try:
        for parent in dict.fromkeys(Path(d).parent for d in files):
            if not parent.is_dir():
                with _signals.deferred():  # a directory made is a directory noted
                    try:
                        parent.mkdir(mode=0o777)
                    except OSError as exc:
                        raise write_error(exc, parent) from exc
                    created.append(parent)
        with atomic_paths(list(files), replace=replace) as tmps:
            for tmp, (dest, data) in zip(tmps, files.items(), strict=True):
                try:
                    if callable(data):
                        data(tmp)
                    else:
                        tmp.write_bytes(data)
                except OSError as exc:
                    raise write_error(exc, dest) from exc
    except BaseException:
        with _signals.deferred():
            for d in reversed(created):
                with contextlib.suppress(OSError):
                    d.rmdir()  # only when empty: never a directory that holds published files
        raise


def atomic_write_bytes(dest: str | os.PathLike[str], data: bytes, *, replace: bool | None = None) -> None:
    """Write ``data`` to ``dest`` atomically (see :func:`atomic_path`)."""
    atomic_write_files({dest: data}, replace=replace)
