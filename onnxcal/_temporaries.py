"""The temporaries of atomic writes: their owner records, removing those a stopped run left, and
moving a temporary onto an output without ever replacing a file (see :mod:`onnxcal._files`).

Each temporary ``.NAME.XXXXXXXX.tmp`` has an owner record
``.NAME.XXXXXXXX.owner`` beside it, created first (``tempfile.mkstemp``) and
locked (``flock``) by the writing process for as long as it lives; the
record names the process, its host, and the inode of itself and of the
temporary. Only a temporary whose record proves it (same inodes), whose lock
is free and whose process is gone is ever removed by a later run; never an
input of the running command, and never a file without a record.
"""

from __future__ import annotations

import contextlib
import ctypes
import errno
import functools
import json
import os
import re
import socket
import stat
import sys
import time
import warnings
from collections.abc import Callable, Iterator
from collections.abc import Set as AbstractSet
from pathlib import Path
from typing import Any

from . import _signals
from .errors import OnnxcalWarning

try:
    import fcntl as fcntl  # re-exported: _files locks through the same name (None where absent)
except ImportError:  # Windows: no locks, so stale temporaries are left alone
    fcntl = None  # type: ignore[assignment]


# --------------------------------------------------------------------------
# Owner records and stale temporaries

# A temporary whose owner record names another host (a shared file system) is
# removed only once this old: there the process cannot be looked up.
STALE_SECONDS = 60.0

OWNER_KIND = "onnxcal temporary owner"
_TOKEN = r"[a-z0-9_]{8}"  # tempfile.mkstemp's random part


def _owner_pattern(dest: Path) -> re.Pattern[str]:
    return re.compile(re.escape(f".{dest.name}.") + f"({_TOKEN})" + re.escape(".owner"))


def temporary_name(dest: Path, token: str) -> str:
    return f".{dest.name}.{token}.tmp"


def _process_gone(record: dict[str, Any], age: float) -> bool:
    """True when the process that wrote ``record`` has ended (or, on another host, long ago)."""
    if record.get("host") != socket.gethostname():
        return age >= STALE_SECONDS
    pid = record.get("pid")
    if not isinstance(pid, int) or pid <= 0 or pid == os.getpid():
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return True
    except OSError:  # EPERM: alive, another user's
        return False
    return False


def _read_owner(fd: int, st: os.stat_result) -> dict[str, Any] | None:
    """The owner record open at ``fd``, if it is one and describes itself (its own inode)."""
    if not stat.S_ISREG(st.st_mode) or st.st_size > 4096:
        return None
    try:
        record = json.loads(os.pread(fd, 4096, 0).decode())
    except (OSError, ValueError):
        return None
    if not isinstance(record, dict) or record.get("kind") != OWNER_KIND:
        return None
    if (record.get("device"), record.get("inode")) != (st.st_dev, st.st_ino):
        return None  # a copy of a record (cp -a) proves nothing
    return record


def _stale_pair(
    parent: Path, name: str, token: str, dest: Path, protected: AbstractSet[tuple[int, int]]
) -> tuple[Path, Path | None, dict[str, Any]] | None:
    """(owner, its temporary or None, record) when ``name`` is a provably stale owner record; else None.

    Holds the owner's lock while deciding and removing, so two runs cannot
    both act on one record.
    """
    owner = parent / name
    try:
        fd = os.open(owner, os.O_RDONLY | os.O_NOFOLLOW | os.O_CLOEXEC)
    except OSError:
        return None
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)  # fails while the writer lives
        except OSError:
            return None
        st = os.fstat(fd)
        record = _read_owner(fd, st)
        if record is None or (st.st_dev, st.st_ino) in protected:
            return None
        if record.get("temporary") != temporary_name(dest, token):
            return None
        if not _process_gone(record, time.time() - st.st_mtime):
            return None
        path = parent / str(record["temporary"])
        removed: Path | None = None
        try:
            tst = os.lstat(path)
        except FileNotFoundError:
            pass
        else:
            if (tst.st_dev, tst.st_ino) in protected:
                return None  # an input of this command: neither it nor its record is touched
            if stat.S_ISREG(tst.st_mode) and (tst.st_dev, tst.st_ino) == (st.st_dev, record.get("temporary_inode")):
                os.unlink(path)
                removed = path
            # else: not provably the file onnxcal made, left alone
        os.unlink(owner)
        return owner, removed, record
    except OSError:
        return None
    finally:
        os.close(fd)


def remove_stale_temporaries(
    dest: str | os.PathLike[str], protected: AbstractSet[tuple[int, int]] = frozenset()
) -> list[Path]:
    """Remove the temporaries of ``dest`` that a stopped onnxcal process left beside it.

    A temporary is removed only when all of these hold: its owner record
    ``.NAME.XXXXXXXX.owner`` is a regular file that parses as onnxcal's and
    names its own inode (so a copied or hand-made file does not count); the
    record's lock can be taken (a live writer holds it until it is done, and
    the kernel drops it when the process dies, SIGKILL included); the
    process it names is gone (on another host: the record is older than
    ``STALE_SECONDS``); the temporary is a regular file with the inode the
    record names; and neither is an input of the running command. The record
    is removed with it. Each removal is reported in one warning naming the
    file and why. Without ``fcntl`` (Windows) nothing is removed.

    Returns the temporaries removed.
    """
    dest = Path(dest)
    if fcntl is None:
        return []
    parent = dest.parent if str(dest.parent) else Path(".")
    pattern = _owner_pattern(dest)
    try:
        names = [(e.name, m.group(1)) for e in os.scandir(parent) if (m := pattern.fullmatch(e.name))]
    except OSError:
        return []
    removed = []
    for name, token in names:
        with _signals.deferred():  # a record and its temporary go together
            found = _stale_pair(parent, name, token, dest, protected)
        if found is None:
            continue
        owner, temporary, record = found
        started = time.strftime("%Y-%m-%d %H:%M:%S", time.localtime(record.get("started", 0)))
        what = f"'{temporary}' and its owner record '{owner.name}'" if temporary else f"the owner record '{owner}'"
        warnings.warn(
            OnnxcalWarning(
                f"removed {what}: left by onnxcal process {record.get('pid')} on {record.get('host')} "
                f"(started {started}), which stopped before renaming it; that process is gone and "
                "no process holds the file"
            ),
            stacklevel=4,
        )
        if temporary is not None:
            removed.append(temporary)
    return removed


# --------------------------------------------------------------------------
# Publication: replace, or never replace


def _renameat2(src: Path, dst: Path) -> bool:
    """``renameat2(src, dst, RENAME_NOREPLACE)``; False when the system or file system lacks it.

    Raises FileExistsError when ``dst`` exists, OSError for other failures.
    """
    fn = _libc_renameat2()
    if fn is None:
        return False
    at_fdcwd, rename_noreplace = -100, 1  # <fcntl.h>, <linux/fs.h>
    if fn(at_fdcwd, os.fsencode(src), at_fdcwd, os.fsencode(dst), rename_noreplace) == 0:
        return True
    err = ctypes.get_errno()
    if err in (errno.EINVAL, errno.ENOSYS, errno.ENOTSUP, errno.EOPNOTSUPP):
        return False
    raise OSError(err, os.strerror(err), str(dst))


@functools.lru_cache(maxsize=1)
def _libc_renameat2() -> Callable[..., int] | None:
    if not sys.platform.startswith("linux"):
        return None
    try:
        fn = ctypes.CDLL(None, use_errno=True).renameat2  # glibc >= 2.28
    except (OSError, AttributeError):
        return None
    fn.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p, ctypes.c_uint]
    fn.restype = ctypes.c_int
    return fn


@contextlib.contextmanager
def _directory_lock(directory: Path) -> Iterator[None]:
    """An exclusive ``flock`` on ``directory`` (no-op where directories cannot be locked)."""
    fd = None
    with contextlib.suppress(OSError, AttributeError):
        fd = os.open(directory, os.O_RDONLY | os.O_DIRECTORY)
        if fcntl is not None:
            fcntl.flock(fd, fcntl.LOCK_EX)
    try:
        yield
    finally:
        if fd is not None:
            os.close(fd)


def rename_noreplace(src: Path, dst: Path) -> None:
    """Move ``src`` onto ``dst`` only if ``dst`` does not exist (FileExistsError otherwise).

    ``renameat2(RENAME_NOREPLACE)`` (Linux 3.15, glibc 2.28) does it in one
    step; where the file system lacks it, ``link`` (which never replaces)
    then ``unlink`` of the temporary name; where links are not allowed
    either, a check that ``dst`` is absent and a rename, both under a lock
    of the directory that every onnxcal run takes there (another program
    could still slip in between; the window is a few microseconds).
    """
    if _renameat2(src, dst):
        return
    try:
        os.link(src, dst)
    except FileExistsError:
        raise
    except OSError as exc:
        if exc.errno not in (errno.EPERM, errno.ENOTSUP, errno.EOPNOTSUPP, errno.EMLINK, errno.ENOSYS, errno.EXDEV):
            raise
    else:
        try:
            os.unlink(src)
        except OSError:
            with contextlib.suppress(OSError):
                os.unlink(dst)  # the link just made: not published after all
            raise
        return
    with _directory_lock(dst.parent):
        if os.path.lexists(dst):
            raise FileExistsError(errno.EEXIST, os.strerror(errno.EEXIST), str(dst))
        os.rename(src, dst)
