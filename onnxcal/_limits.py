"""Resource limits checked before loading: model size, memory a batch needs.

A model file from another team or the internet may be far larger than
expected, and an input's declared shape (or an ``.npz`` header) may ask for
more memory than the machine has. Both are refused with a message naming
the file or input and the option to change, before anything is read or
allocated, rather than ending in the kernel's out-of-memory killer.
"""

from __future__ import annotations

import os
import re
from pathlib import Path
from typing import Any

from .errors import OnnxcalError

DEFAULT_MAX_MODEL_BYTES = 8 << 30
"""Default of ``--max-model-bytes``: 8 GiB (the .onnx file plus its external data)."""
MAX_SIZE = 1 << 63
"""Sizes are below 8 EiB (what a file offset can address)."""

_UNITS = {"": 1, "b": 1, "k": 1000, "kb": 1000, "m": 1000**2, "mb": 1000**2, "g": 1000**3, "gb": 1000**3,
          "t": 1000**4, "tb": 1000**4, "kib": 1 << 10, "mib": 1 << 20, "gib": 1 << 30, "tib": 1 << 40}


def parse_size(text: str | int, option: str = "--max-model-bytes") -> int:
    """A byte count: an integer, or a number with a unit (``512MiB``, ``8GiB``, ``2GB``).

    >>> parse_size("8GiB") == 8 * 2**30, parse_size("1.5 kB"), parse_size(100)
    (True, 1500, 100)
    """
    if isinstance(text, int) and not isinstance(text, bool):
        value = text
    else:
        m = re.fullmatch(r"\s*(\d+(?:\.\d+)?)\s*([a-zA-Z]*)\s*", str(text))
        if not m or m.group(2).lower() not in _UNITS:
            raise OnnxcalError(
                f"{option} {str(text)!r} is not a size", "give bytes, or a number with KiB, MiB, GiB (e.g. 8GiB)"
            )
        number = float(m.group(1)) * _UNITS[m.group(2).lower()]
        if not number < MAX_SIZE:  # also inf, from a number too long for a float
            raise OnnxcalError(f"{option} {str(text)!r} is out of range: give a size from 1 byte to 8 EiB", "e.g. 8GiB")
        value = int(number)
    if not 0 < value < MAX_SIZE:
        raise OnnxcalError(f"{option} {text!r} is out of range: give a size from 1 byte to 8 EiB", "e.g. 8GiB")
    return value


def format_bytes(n: float) -> str:
    """``1536`` -> ``'1.5 KiB'`` (binary units, three significant figures).

    >>> format_bytes(512), format_bytes(1536), format_bytes(8 * 2**40)
    ('512 B', '1.5 KiB', '8 TiB')
    """
    for unit in ("B", "KiB", "MiB", "GiB", "TiB", "PiB"):
        if n < 1024 or unit == "PiB":
            return f"{n:.3g} {unit}"
        n /= 1024
    raise AssertionError("unreachable")


def check_model_size(path: Path, extra: int, max_bytes: int) -> None:
    """Refuse a model whose file (plus ``extra`` bytes of external data) exceeds ``max_bytes``."""
    size = path.stat().st_size + extra
    if size > max_bytes:
        what = "with its external data " if extra else ""
        raise OnnxcalError(
            f"'{path}' is {size} bytes {what}({format_bytes(size)}), more than --max-model-bytes "
            f"{max_bytes} ({format_bytes(max_bytes)})",
            "raise --max-model-bytes if the model is meant to be that large",
        )


def _read_int(path: str) -> int | None:
    try:
        text = Path(path).read_text().split()[0]
    except (OSError, IndexError):
        return None
    return int(text) if text.isdigit() else None


def _meminfo_available() -> int | None:
    try:
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemAvailable:"):
                return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    return None


def _cgroup_available() -> int | None:
    """Room left under this process's cgroup memory limit (v2, then v1), if there is one."""
    for limit, usage in (
        ("/sys/fs/cgroup/memory.max", "/sys/fs/cgroup/memory.current"),
        ("/sys/fs/cgroup/memory/memory.limit_in_bytes", "/sys/fs/cgroup/memory/memory.usage_in_bytes"),
    ):
        lim, used = _read_int(limit), _read_int(usage)
        if lim is not None and used is not None and lim < 1 << 60:  # v1 says "no limit" with ~2^63
            return max(0, lim - used)
    return None


def available_memory() -> int | None:
    """Bytes this process can still allocate without swapping, or None when unknown.

    The smaller of the kernel's MemAvailable estimate (Linux ``/proc/meminfo``)
    and the room under a cgroup memory limit (containers, batch schedulers);
    elsewhere the free physical pages ``os.sysconf`` reports.
    """
    known = [v for v in (_meminfo_available(), _cgroup_available()) if v is not None]
    if not known:
        try:
            known = [os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")]
        except (ValueError, OSError, AttributeError):
            return None
    return min(known)


def check_memory(needed: int, what: str, hint: str) -> None:
    """Refuse ``what`` when it needs ``needed`` bytes and fewer are available."""
    available = available_memory()
    if available is not None and needed > available:
        raise OnnxcalError(
            f"{what} needs {format_bytes(needed)}, more than the {format_bytes(available)} of memory available",
            hint,
        )


def check_range(value: Any, low: float, high: float | None, option: str, what: str = "a number") -> None:
    """Refuse an option's value outside [low, high] (``high`` None: no upper bound), with the range in the message.

    >>> check_range(100000, 0, 64, "--threads", "a number of threads")
    Traceback (most recent call last):
    ...
    onnxcal.errors.OnnxcalError: --threads 100000 is out of range: give a number of threads from 0 to 64
    """
    ok = value is not None and not isinstance(value, bool) and low <= value and (high is None or value <= high)
    if not ok:  # NaN fails too
        span = f"of at least {_plain(low)}" if high is None else f"from {_plain(low)} to {_plain(high)}"
        raise OnnxcalError(f"{option} {value!r} is out of range: give {what} {span}")


def _plain(x: float) -> str:
    return str(x) if isinstance(x, int) else f"{x:g}"


MAX_BINS = 100_000
"""Largest ``--bins``: beyond it the bins hold a handful of samples even in a million."""


def check_bins_memory(n_bins: int, num_classes: int, option: str = "--bins") -> None:
    """Refuse ``n_bins`` when the per-class bin sums (a few float64 arrays of K x M) do not fit in memory."""
    check_memory(
        4 * 8 * int(num_classes) * int(n_bins),
        f"{option} {n_bins} for {num_classes} classes (the per-class bin sums of the classwise ECE)",
        f"lower {option}",
    )
