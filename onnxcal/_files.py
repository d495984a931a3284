"""File helpers shared by the stages: hashing, output-path checks, atomic writes.

Outputs are written to a temporary file in the destination directory, flushed
and fsync'ed, then renamed over the destination (and the directory fsync'ed),
so a crash or Ctrl-C leaves either the old state or the complete new file,
never a partial one. Several outputs of one command are written in full
before any is renamed (:func:`atomic_write_files`), and a new directory of
outputs appears whole (:func:`atomic_directory`).
"""

from __future__ import annotations

import contextlib
import errno
import hashlib
import os
import shutil
import tempfile
from collections.abc import Iterable, Iterator, Mapping
from pathlib import Path

from .errors import OnnxcalError

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


def write_error(dest: str | os.PathLike, exc: OSError) -> OnnxcalError:
    """An OSError met while writing ``dest``, as a one-line error naming it."""
    why = exc.strerror or str(exc) or type(exc).__name__
    if exc.errno in (errno.ENOSPC, errno.EDQUOT, errno.EFBIG):
        hint = "free some space (or quota) on that disk, or write to another one"
    elif exc.errno in (errno.EACCES, errno.EPERM, errno.EROFS):
        hint = "choose a directory you may write to, or change its permissions"
    else:
        hint = "check the disk and the directory, then run the command again"
    return OnnxcalError(f"cannot write '{dest}': {why}", hint)


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


@contextlib.contextmanager
def atomic_path(dest: str | os.PathLike) -> Iterator[Path]:
    """Yield a temporary path beside ``dest``; rename it onto ``dest`` on success.

    The caller writes the whole file to the yielded path. On normal exit the
    file is fsync'ed and renamed onto ``dest`` (and the directory fsync'ed);
    on any exception (including KeyboardInterrupt) the temporary file is
    removed and ``dest`` is untouched. An OSError (no space, no permission)
    is raised as an :class:`OnnxcalError` naming ``dest``.
    """
    dest = Path(dest)
    try:
        fd, tmp_name = tempfile.mkstemp(prefix=f".{dest.name}.", suffix=".tmp", dir=dest.parent)
    except OSError as exc:
        raise write_error(dest, exc) from exc
    os.close(fd)
    tmp = Path(tmp_name)
    try:
        os.chmod(tmp, 0o666 & ~_umask())  # mkstemp makes 0600; give the usual mode
        yield tmp
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, dest)
        _fsync_directory(dest.parent)
    except BaseException as exc:
        with contextlib.suppress(FileNotFoundError):
            tmp.unlink()
        if isinstance(exc, OSError):
            raise write_error(dest, exc) from exc
        raise


@contextlib.contextmanager
def atomic_directory(dest: str | os.PathLike) -> Iterator[Path]:
    """Yield a temporary directory beside ``dest`` (which must not exist); rename it onto ``dest`` on success.

    The files written into it are fsync'ed before the rename, so the new
    directory appears whole or not at all; on any exception it is removed.
    """
    dest = Path(dest)
    parent = dest.parent if str(dest.parent) else Path(".")
    try:
        tmp = Path(tempfile.mkdtemp(prefix=f".{dest.name}.", suffix=".tmp", dir=parent))
    except OSError as exc:
        raise write_error(dest, exc) from exc
    try:
        os.chmod(tmp, 0o777 & ~_umask())  # mkdtemp makes 0700
        yield tmp
        for f in tmp.iterdir():
            with open(f, "rb+") as fh:
                os.fsync(fh.fileno())
        _fsync_directory(tmp)
        os.rename(tmp, dest)  # fails, rather than merging, if dest appeared meanwhile
        _fsync_directory(parent)
    except BaseException as exc:
        shutil.rmtree(tmp, ignore_errors=True)
        if isinstance(exc, OSError):
            raise write_error(dest, exc) from exc
        raise


def atomic_write_files(files: Mapping[str | os.PathLike, bytes]) -> None:
    """Write several files together, each atomically (see :func:`atomic_path`).

    Every file is written in full under a temporary name before any is
    renamed into place, so a failure while writing (a full disk) leaves none
    of them. Files of a directory that does not exist yet go into a
    temporary directory renamed into place whole (:func:`atomic_directory`).
    Only a failure between the renames themselves could leave some in place.
    """
    with contextlib.ExitStack() as stack:
        new_dirs: dict[Path, Path] = {}
        for dest, data in files.items():
            dest = Path(dest)
            if dest.parent.is_dir():
                tmp = stack.enter_context(atomic_path(dest))
            else:
                if dest.parent not in new_dirs:
                    new_dirs[dest.parent] = stack.enter_context(atomic_directory(dest.parent))
                tmp = new_dirs[dest.parent] / dest.name
            try:
                tmp.write_bytes(data)
            except OSError as exc:
                raise write_error(dest, exc) from exc


def atomic_write_bytes(dest: str | os.PathLike, data: bytes) -> None:
    """Write ``data`` to ``dest`` atomically (see :func:`atomic_path`)."""
    atomic_write_files({dest: data})
