"""Fingerprints of data files: the same on every machine, cheap on large files.

A :class:`~onnxcal.data.Dataset`'s ``data_id`` combines them, so that the
captures of shards of one set can be matched.
"""

from __future__ import annotations

import hashlib
from collections.abc import Sequence
from pathlib import Path

_EDGE = 1 << 20


def file_fingerprint(path: Path) -> str:
    """SHA-256 of a file's size and its first and last MiB (cheap on large files)."""
    digest = hashlib.sha256()
    size = path.stat().st_size
    digest.update(str(size).encode())
    with open(path, "rb") as fh:
        digest.update(fh.read(_EDGE))
        if size > _EDGE:
            fh.seek(max(_EDGE, size - _EDGE))
            digest.update(fh.read(_EDGE))
    return digest.hexdigest()


def combine(parts: Sequence[tuple[str, str]]) -> str:
    """One ``data_id`` from the fingerprints of a set's files, each with its role."""
    digest = hashlib.sha256()
    for role, fp in parts:
        digest.update(f"{role}\0{fp}\n".encode())
    return digest.hexdigest()[:32]
