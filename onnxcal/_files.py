"""File helpers shared by the stages: hashing, output-path checks, atomic writes.

Outputs are written to a temporary file in the destination directory, flushed
and fsync'ed, then renamed over the destination, so a crash or Ctrl-C leaves
either the old state or the complete new file, never a partial one.
"""

from __future__ import annotations

import contextlib
import hashlib
import os
import tempfile
from collections.abc import Iterable, Iterator
from pathlib import Path

from .errors import OnnxcalError

_CHUNK = 1 << 20


def sha256_file(path: str | os.PathLike) -> str:
    """Return the hex SHA-256 of a file, read in 1 MiB chunks."""
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(_CHUNK), b""):
            digest.update(block)
    return digest.hexdigest()


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


def check_output_path(
    out: str | os.PathLike,
    inputs: Iterable[str | os.PathLike] = (),
    *,
    force: bool = False,
    option: str = "--out",
) -> Path:
    """Validate an output path before any work is done.

    Refuses an output that is one of the inputs (also through a symlink or a
    different spelling of the path), an output directory that does not exist,
    and an existing output unless ``force`` is true.
    """
    p = Path(out)
    for src in inputs:
        if _same_file(p, Path(src)):
            raise OnnxcalError(
                f"{option} '{p}' is the input file '{src}'",
                "write the result to a new path; onnxcal never overwrites its input",
            )
    parent = p.parent if str(p.parent) else Path(".")
    if not parent.is_dir():
        raise OnnxcalError(
            f"output directory '{parent}' for {option} does not exist", "create it first"
        )
    if p.is_dir():
        raise OnnxcalError(f"{option} '{p}' is a directory", "give a file path")
    if p.exists() and not force:
        raise OnnxcalError(f"{option} '{p}' already exists", "pass --force to replace it")
    return p


@contextlib.contextmanager
def atomic_path(dest: str | os.PathLike) -> Iterator[Path]:
    """Yield a temporary path beside ``dest``; rename it onto ``dest`` on success.

    The caller writes the whole file to the yielded path. On normal exit the
    file is fsync'ed and renamed onto ``dest``; on any exception (including
    KeyboardInterrupt) the temporary file is removed and ``dest`` is untouched.
    """
    dest = Path(dest)
    fd, tmp_name = tempfile.mkstemp(prefix=f".{dest.name}.", suffix=".tmp", dir=dest.parent)
    os.close(fd)
    tmp = Path(tmp_name)
    try:
        os.chmod(tmp, 0o666 & ~_umask())  # mkstemp makes 0600; give the usual mode
        yield tmp
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, dest)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            tmp.unlink()
        raise


def atomic_write_bytes(dest: str | os.PathLike, data: bytes) -> None:
    """Write ``data`` to ``dest`` atomically (see :func:`atomic_path`)."""
    with atomic_path(dest) as tmp:
        tmp.write_bytes(data)
