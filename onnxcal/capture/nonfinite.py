"""NaN and Inf: the inputs' rows counted as batches go by (``InputWatch``), the logits' rows found,
and a capture without them."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import replace

import numpy as np

from ..data import Dataset
from .result import Capture, Nonfinite


def _surely_finite(a: np.ndarray) -> bool:
    """True when ``a`` (contiguous, float) holds no NaN or Inf; False when it may.

    One dot product of ``a`` with itself is the fast test: NaN and Inf carry
    through it (IEEE 754), and a BLAS dot costs a fraction of a pass of
    ``isfinite``. A False may also be an overflow of the sum of squares,
    which the caller's exact test then sorts out. float16 and other narrow
    types, which a dot would overflow, get the exact test at once.
    """
    if a.dtype not in (np.float32, np.float64):
        return bool(np.isfinite(a).all())
    flat = a.reshape(-1)
    with np.errstate(over="ignore", invalid="ignore"):
        return bool(np.isfinite(np.dot(flat, flat)))


class InputWatch:
    """Counts the rows of float inputs holding NaN or Inf as batches go by.

    Small batches are tested together, about 1 MiB at a time, so a tiny
    model pays one dot product per MiB of inputs rather than one per batch;
    only a block that may hold NaN or Inf is searched row by row. ``found``
    maps input names to their :class:`Nonfinite` rows; call :meth:`flush`
    after the last batch.
    """

    FLUSH_BYTES = 1 << 20

    def __init__(self, dataset: Dataset) -> None:
        self.dataset = dataset
        self.found: dict[str, Nonfinite] = {}
        self._floats: list[str] | None = None  # the float inputs, from the first batch
        self._pending: list[list[np.ndarray]] = []  # per batch, the float inputs in ``_floats`` order
        self._first = 0
        self._stop = 0
        self._bytes = 0

    def add(self, feed: Mapping[str, np.ndarray], start: int, stop: int) -> None:
        """Take the inputs of selected rows ``start..stop-1`` (batches in order)."""
        if self._floats is None:
            self._floats = [k for k, v in feed.items() if v.dtype.kind == "f"]
        if not self._floats:
            return
        if not self._pending:
            self._first = start
        arrays = [feed[k] for k in self._floats]
        self._pending.append(arrays)
        self._stop = stop
        self._bytes += sum(a.nbytes for a in arrays)
        if self._bytes >= self.FLUSH_BYTES:
            self.flush()

    def flush(self) -> None:
        """Test what is pending."""
        if not self._pending:
            return
        for i, name in enumerate(self._floats or ()):
            parts = [arrays[i] for arrays in self._pending]
            block = parts[0] if len(parts) == 1 else np.concatenate(parts)
            if not block.size or _surely_finite(block):
                continue
            bad = ~np.isfinite(block.reshape(len(block), -1)).all(axis=1)
            if bad.any():
                rows = self.dataset.row_numbers()[self._first : self._stop]
                self.found.setdefault(name, Nonfinite()).add(bad, rows)
        self._pending, self._bytes = [], 0


def nonfinite_rows(logits: np.ndarray, chunk: int = 1 << 16) -> np.ndarray:
    """Indices of rows holding NaN or Inf (read in chunks: ``logits`` may be a memory map).

    A chunk that is surely finite (one dot product, see ``_surely_finite``)
    is skipped; only the others are searched row by row.
    """
    parts = [np.zeros(0, np.int64)]
    for start in range(0, len(logits), chunk):
        block = np.ascontiguousarray(logits[start : start + chunk])
        if block.size and not _surely_finite(block):
            parts.append(start + np.flatnonzero(~np.isfinite(block).all(axis=1)))
    return np.concatenate(parts)


def nonfinite_logits(cap: Capture) -> Nonfinite:
    """The score rows of ``cap`` holding NaN or Inf, with the set's row numbers of the first samples."""
    rows = nonfinite_rows(cap.logits)
    found = Nonfinite()
    if rows.size:
        found.add(np.ones(rows.size, bool), cap.sample_indices()[rows // cap.rows_per_sample])
    return found


def finite_mask(cap: Capture) -> np.ndarray:
    """True for the score rows of the samples whose logits are all finite (every row of a sample alike)."""
    rows = nonfinite_rows(cap.logits)
    r = cap.rows_per_sample
    keep_samples = np.ones(len(cap.logits) // r, bool)
    keep_samples[rows // r] = False
    return np.repeat(keep_samples, r)


def without_nonfinite(cap: Capture) -> Capture:
    """``cap`` without the samples whose logits hold NaN or Inf (every row of such a sample)."""
    keep = finite_mask(cap)
    if keep.all():
        return cap
    logits = np.asarray(cap.logits)[keep]
    samples = cap.sample_indices()[keep[:: cap.rows_per_sample]]
    return Capture(
        logits, cap.labels[keep], replace(cap.meta, n=int(len(logits))), samples, cap.nonfinite_inputs, cap.stats
    )
