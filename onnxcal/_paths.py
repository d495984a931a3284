"""What the stages check and read of their files before anything is written.

Hashes and sparse-aware copies of byte ranges; one command's record of its inputs and outputs
(:func:`command`), so that no output replaces an input; the checks of an output path.
The atomic writes that use them are in :mod:`onnxcal._files`.
"""

from __future__ import annotations

import contextlib
import contextvars
import errno
import functools
import hashlib
import os
from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TypeVar

from .errors import OnnxcalError

_CHUNK = 1 << 20


def sha256_file(path: str | os.PathLike[str]) -> str:
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


# --------------------------------------------------------------------------
# One command's writes


@dataclass
class Command:
    """What one command (one ``api`` call) has told this module about its files.

    Attributes
    ----------
    protected : set of (int, int)
        ``(st_dev, st_ino)`` of the command's inputs: never removed, even
        when named like a temporary of onnxcal's.
    replace : dict of str to bool
        Each output checked by :func:`check_output_path` (absolute path)
        and whether it may replace an existing file (``--force``).
    written : list of Path
        Outputs published so far (for the message of an interrupted run).
    """

    protected: set[tuple[int, int]] = field(default_factory=set)
    replace: dict[str, bool] = field(default_factory=dict)
    written: list[Path] = field(default_factory=list)


_COMMAND: contextvars.ContextVar[Command | None] = contextvars.ContextVar("onnxcal_command", default=None)


@contextlib.contextmanager
def command() -> Iterator[Command]:
    """The scope of one command; a command inside another (the CLI's) shares the outer scope."""
    current = _COMMAND.get()
    if current is not None:
        yield current
        return
    run = Command()
    token = _COMMAND.set(run)
    try:
        yield run
    finally:
        _COMMAND.reset(token)


F = TypeVar("F", bound=Callable[..., Any])


def one_command(fn: F) -> F:
    """Decorate an ``api`` function: its checks and writes share one :class:`Command`."""

    @functools.wraps(fn)
    def wrapper(*args: object, **kwargs: object) -> object:
        with command():
            return fn(*args, **kwargs)

    return wrapper  # type: ignore[return-value]


def current_command() -> Command | None:
    """The :class:`Command` in force, if any."""
    return _COMMAND.get()


def _key(path: str | os.PathLike[str]) -> str:
    return os.path.abspath(os.fspath(path))


def _protect(paths: Iterable[str | os.PathLike[str]]) -> None:
    run = _COMMAND.get()
    if run is None:
        return
    for p in paths:
        with contextlib.suppress(OSError, ValueError):
            st = os.stat(p)
            run.protected.add((st.st_dev, st.st_ino))


def require_file(path: str | os.PathLike[str], what: str) -> Path:
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
    out: str | os.PathLike[str], inputs: Iterable[str | os.PathLike[str]] = (), option: str = "--out"
) -> Path:
    """Refuse an output that is one of the inputs, or lies in an input folder.

    Symlinks, hard links and different spellings of one path are seen
    through (``os.path.samefile`` for existing files, resolved paths else).
    """
    p = Path(out)
    inputs = list(inputs)
    _protect(inputs)
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


def check_writable(directory: str | os.PathLike[str], option: str = "--out") -> None:
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
    out: str | os.PathLike[str],
    inputs: Iterable[str | os.PathLike[str]] = (),
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
    if (run := _COMMAND.get()) is not None:  # at the end, replace only with --force
        run.replace[_key(p)] = force
    return p

