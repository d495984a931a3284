"""Where captured rows go: into memory, or streamed into a capture file's ``logits.npy``; capture files written."""

from __future__ import annotations

import contextlib
import json
import os
import zipfile
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import IO, TypeVar

import numpy as np

from .._files import atomic_path
from .._limits import check_memory
from ..errors import OnnxcalError
from .result import Capture, CaptureMeta

T = TypeVar("T")


class Rows:
    """Receives float32 score rows batch by batch for a known number of samples.

    The first batch fixes the rows per sample and K; storage is allocated
    then, for the whole set.
    """

    def __init__(self, samples: int) -> None:
        self.samples = samples
        self.per_sample: int | None = None
        self.k = 0
        self.filled = 0

    @property
    def total(self) -> int:
        return self.samples * (self.per_sample or 0)

    def add(self, rows: np.ndarray, count: int) -> None:
        r, k = rows.shape
        if self.per_sample is None:
            if r == 0 or r % count:
                raise OnnxcalError(
                    f"the model gave {r} score rows for {count} samples",
                    "choose an output with one row (or a fixed number of rows) per sample",
                )
            self.per_sample, self.k = r // count, k
            self._open()
        elif (r, k) != (self.per_sample * count, self.k):
            raise OnnxcalError(
                f"the model gave {r} x {k} score rows for {count} samples after "
                f"{self.per_sample} x {self.k} per sample for earlier ones",
                "give inputs of one size (e.g. images preprocessed to one size)",
            )
        self._write(np.ascontiguousarray(rows, dtype="<f4"))
        self.filled += r

    def _open(self) -> None:
        raise NotImplementedError

    def _write(self, rows: np.ndarray) -> None:
        raise NotImplementedError


class MemoryRows(Rows):
    """Holds the rows in one float32 array, ``array``, allocated (memory checked) at the first batch."""

    def _open(self) -> None:
        check_memory(
            self.total * self.k * 4,
            f"holding the logits of {self.total} rows x {self.k} classes in memory",
            "capture to a file first ('onnxcal capture --out'), or use --limit",
        )
        self.array = np.empty((self.total, self.k), dtype=np.float32)

    def _write(self, rows: np.ndarray) -> None:
        self.array[self.filled : self.filled + len(rows)] = rows


class NpyRows(Rows):
    """Streams the rows as ``logits.npy`` into an open zip archive.

    Rows are gathered in a buffer of about 1 MiB between writes, so a model
    with small batches does not pay one archive write per batch.
    """

    BUFFER_BYTES = 1 << 20

    def __init__(self, samples: int, archive: zipfile.ZipFile) -> None:
        super().__init__(samples)
        self.archive = archive
        self.fh: IO[bytes] | None = None
        self.held = 0

    def _open(self) -> None:
        self.fh = fh = self.archive.open("logits.npy", "w", force_zip64=True)
        header = {"descr": "<f4", "fortran_order": False, "shape": (self.total, self.k)}
        np.lib.format.write_array_header_1_0(fh, header)
        self.buffer = np.empty((max(1, self.BUFFER_BYTES // (4 * self.k)), self.k), dtype="<f4")

    def _write(self, rows: np.ndarray) -> None:
        assert self.fh is not None  # opened by _open before the first rows
        if self.held + len(rows) > len(self.buffer):
            self._flush()
        if len(rows) > len(self.buffer):
            self.fh.write(rows.data)
            return
        self.buffer[self.held : self.held + len(rows)] = rows
        self.held += len(rows)

    def _flush(self) -> None:
        if self.held:
            assert self.fh is not None  # rows are held only once it is open
            self.fh.write(self.buffer[: self.held].data)
            self.held = 0

    def close(self, complete: bool = True) -> None:
        """Write what is buffered (when ``complete``) and close the member.

        The member is closed also when the last write fails (e.g. the disk is
        full), so the archive's own close reports that error and not an open
        member.
        """
        if self.fh is not None:
            try:
                if complete:
                    self._flush()
            finally:
                self.fh.close()

    def filled_by(self, fill: Callable[[Rows], T]) -> T:
        """``fill(self)``, then the member closed: complete when ``fill`` returned, abandoned when it raised.

        The first error is the one raised; the archive's temporary file is
        removed by whoever opened it (:func:`open_archive`).
        """
        try:
            result = fill(self)
        except BaseException:
            with contextlib.suppress(Exception):  # keep the first error; the temporary is removed
                self.close(complete=False)
            raise
        self.close()
        return result


@contextlib.contextmanager
def open_archive(path: str | os.PathLike[str]) -> Iterator[zipfile.ZipFile]:
    """A capture file open for writing: an uncompressed zip written atomically (see ``_files.atomic_path``)."""
    with atomic_path(Path(path)) as tmp, zipfile.ZipFile(tmp, "w", zipfile.ZIP_STORED, allowZip64=True) as zf:
        yield zf


def _write_member(zf: zipfile.ZipFile, name: str, arr: np.ndarray) -> None:
    with zf.open(f"{name}.npy", "w", force_zip64=True) as fh:
        np.lib.format.write_array(fh, np.asarray(arr), allow_pickle=False)


def write_tail(
    zf: zipfile.ZipFile, labels: np.ndarray, indices: np.ndarray | None, meta: CaptureMeta
) -> None:
    """The members after the logits: labels, indices (when not every row in order) and meta."""
    _write_member(zf, "labels", labels)
    if indices is not None:  # absent: the samples are rows 0..n-1 of the set
        _write_member(zf, "indices", np.asarray(indices, dtype=np.int64))
    _write_member(zf, "meta", np.array(json.dumps(meta.to_dict(), sort_keys=True)))


def save_capture(path: str | os.PathLike[str], cap: Capture) -> None:
    """Write a capture file atomically."""
    with open_archive(path) as zf:
        _write_member(zf, "logits", np.asarray(cap.logits, dtype=np.float32))
        write_tail(zf, cap.labels, cap.indices, cap.meta)
