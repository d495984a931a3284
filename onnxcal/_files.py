"""File helpers shared by the stages: hashing, output-path checks, atomic writes.

Outputs are written to a temporary file in the destination directory, flushed
and fsync'ed, then renamed over the destination (and the directory fsync'ed),
so a crash or Ctrl-C leaves either the old state or the complete new file,
never a partial one. Several outputs of one command are written in full
before any is renamed (:func:`atomic_write_files`).
"""

from __future__ import annotations

import contextlib
import errno
import hashlib
import os
import re
import stat
import sys
import tempfile
import time
import warnings
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from pathlib import Path

from .errors import OnnxcalError, OnnxcalWarning

try:
    import fcntl
except ImportError:  # Windows: no locks, so stale temporaries are left alone
    fcntl = None

_CHUNK = 1 << 20


def sha256_file(path: str | os.PathLike) -> str:
    """Return the hex SHA-256 of a file, read in 1 MiB chunks."""
    digest = hashlib.sha256()
    try:
        with open(path, "rb") as fh:
            for block in iter(lambda: fh.read(_CHUNK), b""):
                digest.update(block)
    except OSError as exc:
        raise OnnxcalError(f"cannot read '{path}': {exc.strerror or exc}", "check that the file is readable") from exc
    return digest.hexdigest()


def _data_runs(src: int, start: int, end: int) -> Iterator[tuple[int, int]]:
    """The (offset, stop) runs of ``src`` between ``start`` and ``end`` that may hold data (not holes).

    ``SEEK_DATA`` / ``SEEK_HOLE`` where the OS and file system answer; else the whole range.
    """
    if not hasattr(os, "SEEK_DATA"):
        yield start, end
        return
    pos = start
    while pos < end:
        try:
            data = os.lseek(src, pos, os.SEEK_DATA)
            hole = os.lseek(src, data, os.SEEK_HOLE)
        except OSError as exc:
            if exc.errno == errno.ENXIO:  # only a hole from pos to the end of the file
                return
            yield pos, end  # the file system cannot tell
            return
        if data >= end:
            return
        yield data, min(hole, end)
        pos = hole


def copy_range(
    src: int, dst: int, length: int, src_offset: int, dst_offset: int, *, skip_holes: bool = False
) -> None:
    """Copy ``length`` bytes from ``src`` at ``src_offset`` to ``dst`` at ``dst_offset`` (file descriptors).

    The kernel copies (``os.copy_file_range``: no bytes pass through this
    process, and a file system that can share extents copy-on-write, or a
    network file system that copies on the server, does so; the result is
    an independent file either way); where it cannot (another file system,
    an old kernel, another OS) through a buffer of 8 MiB. Memory stays flat
    whatever ``length`` is. With ``skip_holes`` the holes of a sparse
    source are left unwritten, so the destination stays sparse: only for a
    destination that reads zeros there (a new file, extended at the end).
    """
    runs = _data_runs(src, src_offset, src_offset + length) if skip_holes else [(src_offset, src_offset + length)]
    for start, stop in runs:
        _copy_run(src, dst, stop - start, start, dst_offset + start - src_offset)


def _copy_run(src: int, dst: int, length: int, src_offset: int, dst_offset: int) -> None:
    done = 0
    fast = hasattr(os, "copy_file_range")
    while done < length:
        count = length - done
        if fast:
            try:
                n = os.copy_file_range(src, dst, count, src_offset + done, dst_offset + done)
            except OSError as exc:
                if exc.errno not in (errno.EXDEV, errno.ENOSYS, errno.EINVAL, errno.EOPNOTSUPP, errno.ENOTSUP):
                    raise
                fast, n = False, -1
            if n == 0:
                raise OSError(errno.EIO, f"the source ends {length - done} bytes early")
            if n > 0:
                done += n
                continue
        block = os.pread(src, min(count, 8 << 20), src_offset + done)
        if not block:
            raise OSError(errno.EIO, f"the source ends {length - done} bytes early")
        os.pwrite(dst, block, dst_offset + done)
        done += len(block)


def sha256_bytes(data: bytes) -> str:
    """Hex SHA-256 of ``data`` (of a file about to be written)."""
    return hashlib.sha256(data).hexdigest()


def require_file(path: str | os.PathLike, what: str) -> Path:
    """Return ``path`` as a Path if it is an existing regular file, else raise."""
    p = Path(path)
    if not p.exists():
        raise OnnxcalError(f"{what} '{p}' does not exist", "check the path")
    if not p.is_file():
        raise OnnxcalError(f"{what} '{p}' is not a regular file", "give the path of a file")
    return p


def _same_file(a: Path, b: Path) -> bool:
    """True when ``a`` and ``b`` name one file (symlinks and spellings included)."""
    try:
        return os.path.samefile(a, b)
    except OSError:  # one of them does not exist yet
        return a.resolve() == b.resolve()


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def _inside(path: Path, folder: Path) -> bool:
    """True when ``path`` is the directory ``folder`` or lies under it (resolved)."""
    return path.resolve() == folder.resolve() or path.resolve().is_relative_to(folder.resolve())


def check_not_input(
    out: str | os.PathLike, inputs: Iterable[str | os.PathLike] = (), option: str = "--out"
) -> Path:
    """Refuse an output that is one of the inputs, or lies in an input folder.

    Symlinks, hard links and different spellings of one path are seen
    through (``os.path.samefile`` for existing files, resolved paths else).
    """
    p = Path(out)
    for src in map(Path, inputs):
        if src.is_dir() and _inside(p, src):
            raise OnnxcalError(
                f"{option} '{p}' is inside the input folder '{src}'",
                "write the result outside the folders onnxcal reads",
            )
        if _same_file(p, src):
            raise OnnxcalError(
                f"{option} '{p}' is the input file '{src}'",
                "write the result to a new path; onnxcal never overwrites its input",
            )
    return p


def check_writable(directory: str | os.PathLike, option: str = "--out") -> None:
    """Refuse a directory the OS says this process may not create files in.

    Asked of the OS (``os.access``) so that the refusal comes before any
    work; a write that fails later anyway (a quota, a policy ``os.access``
    does not see) is still reported cleanly by :func:`atomic_path`.
    """
    if not os.access(directory, os.W_OK | os.X_OK, effective_ids=os.access in os.supports_effective_ids):
        raise OnnxcalError(
            f"cannot write to directory '{directory}' ({option})",
            "choose a directory you may write to, or change its permissions",
        )


def check_output_path(
    out: str | os.PathLike,
    inputs: Iterable[str | os.PathLike] = (),
    *,
    force: bool = False,
    option: str = "--out",
) -> Path:
    """Validate an output path before any work is done.

    Refuses an output that is one of the inputs (also through a symlink, a
    hard link or a different spelling of the path) or lies inside an input
    folder, an output directory that does not exist or may not be written
    to, an existing output that is not a regular file (``/dev/null``, which
    the rename would replace), and an existing output unless ``force`` is true.
    """
    p = check_not_input(out, inputs, option)
    parent = p.parent if str(p.parent) else Path(".")
    if not parent.is_dir():
        raise OnnxcalError(
            f"output directory '{parent}' for {option} does not exist", "create it first"
        )
    if p.is_dir():
        raise OnnxcalError(f"{option} '{p}' is a directory", "give a file path")
    if p.exists() and not p.is_file():  # a device, a FIFO: --force would replace it with a file
        raise OnnxcalError(f"{option} '{p}' is not a regular file (a device or a pipe)", "give the path of a file")
    if p.exists() and not force:
        raise OnnxcalError(f"{option} '{p}' already exists", "pass --force to replace it")
    check_writable(parent, option)
    return p


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
# are complete and fsync'ed, just before they are renamed onto the outputs, so a
# test can kill the process at that moment. Unset, it costs one environment lookup.
PAUSE_HOOK = "ONNXCAL_TEST_PAUSE_BEFORE_RENAME"

# A temporary left by a killed writer is removed by the next write of the same
# output once it is at least this old and no process holds its lock.
STALE_SECONDS = 60.0

_WRITE_ERRNOS = {errno.ENOSPC, errno.EDQUOT, errno.EFBIG, errno.EROFS}
_REASONS = {
    errno.ENOSPC: ("the disk is full", "free space on that disk or write the output elsewhere"),
    errno.EDQUOT: ("the disk quota is used up", "free space within your quota or write the output elsewhere"),
    errno.EFBIG: ("the file is too large for its file system", "write the output to another file system"),
    errno.EROFS: ("the file system is read-only", "write the output elsewhere"),
    errno.EACCES: ("permission denied", "write the output to a directory you can write to"),
    errno.EPERM: ("the operation is not permitted", "write the output to a directory you can write to"),
}


def write_error(exc: OSError, dests: str | os.PathLike | Sequence[str | os.PathLike]) -> OnnxcalError:
    """An OnnxcalError for a failed write of ``dests`` (disk full, permission denied, ...)."""
    if isinstance(dests, (str, os.PathLike)):
        dests = [dests]
    names = ", ".join(f"'{d}'" for d in dests)
    reason, hint = _REASONS.get(exc.errno, (exc.strerror or str(exc), "check the output path and its disk"))
    detail = f" ({exc.strerror})" if exc.strerror and exc.strerror.lower() != reason else ""
    return OnnxcalError(f"cannot write {names}: {reason}{detail}", f"{hint}; no output was written")


def _tmp_pattern(dest: Path) -> re.Pattern:
    # mkstemp's names: prefix, 8 characters of [a-z0-9_], suffix
    return re.compile(re.escape(f".{dest.name}.") + r"[a-z0-9_]{8}\.tmp")


def remove_stale_temporaries(dest: str | os.PathLike) -> list[Path]:
    """Remove temporaries of ``dest`` that a killed writer left beside it.

    A writer holds an exclusive ``flock`` on its temporary until it renames
    or removes it, and the kernel drops the lock when the process dies (also
    by SIGKILL). A temporary named like ``dest``'s, older than
    ``STALE_SECONDS`` and whose lock can be taken has no live writer, so
    removing it is safe. Without ``fcntl`` (Windows) nothing is removed.
    """
    dest = Path(dest)
    if fcntl is None:
        return []
    pattern, removed = _tmp_pattern(dest), []
    parent = dest.parent if str(dest.parent) else Path(".")
    try:
        entries = [e for e in os.scandir(parent) if pattern.fullmatch(e.name)]
    except OSError:
        return []
    for entry in entries:
        try:
            st = entry.stat(follow_symlinks=False)
            if not stat.S_ISREG(st.st_mode) or time.time() - st.st_mtime < STALE_SECONDS:
                continue
            fd = os.open(entry.path, os.O_RDONLY | os.O_NOFOLLOW)
        except OSError:
            continue
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)  # fails while a writer holds it
            os.unlink(entry.path)
            removed.append(Path(entry.path))
        except OSError:
            pass
        finally:
            os.close(fd)
    if removed:
        warnings.warn(
            OnnxcalWarning(
                f"removed {len(removed)} temporary file(s) that an interrupted onnxcal run left "
                f"beside '{dest}' ({', '.join(p.name for p in removed)})"
            ),
            stacklevel=4,
        )
    return removed


class _Temporary:
    """A locked temporary file beside ``dest``, to be renamed onto it."""

    def __init__(self, dest: Path) -> None:
        self.dest = dest
        remove_stale_temporaries(dest)
        try:
            self.fd, name = tempfile.mkstemp(prefix=f".{dest.name}.", suffix=".tmp", dir=dest.parent)
        except OSError as exc:
            raise write_error(exc, dest) from exc
        self.path = Path(name)
        try:
            if fcntl is not None:
                fcntl.flock(self.fd, fcntl.LOCK_EX)
            os.chmod(self.path, 0o666 & ~_umask())  # mkstemp makes 0600; give the usual mode
        except OSError as exc:
            self.discard()
            raise write_error(exc, dest) from exc

    def sync(self) -> None:
        with open(self.path, "rb+") as fh:
            os.fsync(fh.fileno())

    def commit(self) -> None:
        os.replace(self.path, self.dest)
        os.close(self.fd)

    def discard(self) -> None:
        with contextlib.suppress(FileNotFoundError):
            self.path.unlink()
        os.close(self.fd)


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
        if exc.filename is not None and os.fsdecode(exc.filename) == str(t.path):
            return [t.dest]
    if exc.errno in _WRITE_ERRNOS or (exc.errno is not None and exc.filename is None):
        return [t.dest for t in temporaries]  # a file object's write: it names no path
    return None


@contextlib.contextmanager
def atomic_paths(dests: Sequence[str | os.PathLike]) -> Iterator[list[Path]]:
    """Yield temporary paths beside ``dests``; rename each onto its destination on success.

    The caller writes every file to its temporary. On normal exit all of
    them are fsync'ed, then renamed in order (the first first); on any
    exception (including KeyboardInterrupt) every temporary is removed and
    no destination is touched. An OSError while writing (disk full,
    permission denied, ...) becomes an :class:`OnnxcalError` that names the
    destination. A group is renamed file by file, so only a crash between
    two renames can leave some of the new files beside old ones.
    """
    temporaries: list[_Temporary] = []
    try:
        for dest in dests:
            temporaries.append(_Temporary(Path(dest)))
        try:
            yield [t.path for t in temporaries]
        except OSError as exc:
            owner = _owner(exc, temporaries)
            if owner is None:
                raise
            raise write_error(exc, owner) from exc
        for t in temporaries:
            _step(t.sync, t.dest)
        _pause_for_tests(temporaries)
        directories = {t.dest.parent for t in temporaries}
        while temporaries:
            _step(temporaries[0].commit, temporaries[0].dest)
            temporaries.pop(0)
        for directory in directories:  # make the renames durable
            _fsync_directory(directory)
    finally:
        for t in temporaries:
            t.discard()


def _step(action, dest: Path) -> None:
    try:
        action()
    except OSError as exc:
        raise write_error(exc, [dest]) from exc


@contextlib.contextmanager
def atomic_path(dest: str | os.PathLike) -> Iterator[Path]:
    """Yield a temporary path beside ``dest``; rename it onto ``dest`` on success.

    The caller writes the whole file to the yielded path. On normal exit the
    file is fsync'ed and renamed onto ``dest`` (and the directory fsync'ed);
    on any exception (including
    KeyboardInterrupt) the temporary file is removed and ``dest`` is
    untouched (see :func:`atomic_paths`). A process killed outright (SIGKILL,
    power loss) can leave the hidden temporary ``.NAME.XXXXXXXX.tmp`` behind;
    the next write of the same output removes it (see
    :func:`remove_stale_temporaries`).
    """
    with atomic_paths([dest]) as (tmp,):
        yield tmp


Writer = Callable[[Path], None]
"""Writes a whole file to the (temporary) path it is given: a file too large to hold as bytes."""


def atomic_write_files(files: Mapping[str | os.PathLike, bytes | Writer]) -> None:
    """Write several files together, each atomically (see :func:`atomic_paths`).

    Each value is the file's bytes, or a :data:`Writer` that writes it to
    the temporary path it is given (streamed, e.g. a model's weights).

    Every file is written in full under a temporary name before any is
    renamed into place, so a failure while writing (a full disk) leaves none
    of them. A destination directory that does not exist yet (a new report
    directory) is created, and removed again if the writing fails. Only a
    crash between the renames themselves could leave some files in place;
    a process killed outright can leave such a new directory empty.
    """
    created: list[Path] = []
    try:
        for parent in dict.fromkeys(Path(d).parent for d in files):
            if not parent.is_dir():
                try:
                    parent.mkdir(mode=0o777)
                except OSError as exc:
                    raise write_error(exc, parent) from exc
                created.append(parent)
        with atomic_paths(list(files)) as tmps:
            for tmp, (dest, data) in zip(tmps, files.items()):
                try:
                    if callable(data):
                        data(tmp)
                    else:
                        tmp.write_bytes(data)
                except OSError as exc:
                    raise write_error(exc, dest) from exc
    except BaseException:
        for d in reversed(created):
            with contextlib.suppress(OSError):
                d.rmdir()
        raise


def atomic_write_bytes(dest: str | os.PathLike, data: bytes) -> None:
    """Write ``data`` to ``dest`` atomically (see :func:`atomic_path`)."""
    atomic_write_files({dest: data})
