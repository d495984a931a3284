"""What a validation set is: the rows chosen (:class:`Selection`), the set as
loaded (:class:`Dataset`), and where it is and how to read it (:class:`DataSpec`).

The loaders of each form (``arrays``, ``csv``, ``images``) return a
:class:`Dataset` of the whole set; :func:`select` then applies the
:class:`Selection` (``--limit``, ``--shuffle-seed``, ``--shard``).
"""

from __future__ import annotations

import mmap
import os
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from .._limits import check_range
from ..errors import OnnxcalError

if TYPE_CHECKING:
    from .images import ImageArray

LABELS_KEY = "labels"
"""The array of an ``.npz`` that holds the labels."""


# --------------------------------------------------------------------------
# The dataset and its selection


@dataclass(frozen=True)
class Selection:
    """Which rows of a set to use.

    Attributes
    ----------
    limit : int or None
        Keep at most this many rows (after shuffling and sharding).
    shuffle_seed : int or None
        Take the rows of a random permutation with this seed (so ``limit``
        and ``shard`` give a random sample, not the first rows).
    shard : (int, int) or None
        ``(i, n)``: the i-th of n near-equal contiguous blocks of the
        (shuffled) row order, numbered from 1.
    """

    limit: int | None = None
    shuffle_seed: int | None = None
    shard: tuple[int, int] | None = None

    @property
    def shard_text(self) -> str | None:
        return None if self.shard is None else f"{self.shard[0]}/{self.shard[1]}"


@dataclass(frozen=True)
class Constant:
    """A model input given once and fed with every batch (``--constant``).

    Attributes
    ----------
    value : ndarray
        The array fed, in the model's dtype; along ``axis`` (when set) it
        has size 1 and is repeated to each batch's sample count.
    axis : int or None
        The input's batch axis, or None to feed ``value`` as it is.
    given : str
        How it was given, for the capture's record: the number, ``zeros``,
        or a file name or ``array`` with the SHA-256 of the bytes.
    """

    value: np.ndarray
    axis: int | None = None
    given: str = ""

    def fed(self, count: int) -> np.ndarray:
        """The array for a batch of ``count`` samples."""
        if self.axis is None:
            return self.value
        shape = list(self.value.shape)
        shape[self.axis] = count
        return np.ascontiguousarray(np.broadcast_to(self.value, tuple(shape)))


@dataclass(frozen=True)
class Dataset:
    """Model inputs by name, labels, and the rows selected.

    Attributes
    ----------
    inputs : mapping of str to array-like
        One array per model input over the whole set, samples along axis 0
        (ndarrays, memory maps, or a lazy image array).
    labels : ndarray or None
        Labels of the selected rows (shape (n,)), or None for an unlabelled set.
    source : str
        Where the set came from, for messages.
    class_names : tuple of str or None
        Names of the class indices, when known.
    rows : ndarray or None
        Sorted row numbers (in the whole set) of the selected rows; None for all.
    data_id : str
        A fingerprint of the data files (sizes and first/last MiB), the same
        on every machine, so that captures of shards of one set can be matched.
    selection : Selection
        How ``rows`` were chosen.
    preprocess : dict or None
        The resolved image preprocessing, for the capture's record.
    constants : mapping of str to Constant
        Model inputs given once (``--constant``), fed with every batch.
    batch_axes : mapping of str to int
        Inputs whose samples lie on another axis than 0 in the model
        (``--batch-axis``): their arrays in ``inputs`` are views with that
        axis moved first, and :meth:`feed` moves it back.
    """

    inputs: Mapping[str, np.ndarray | ImageArray]
    labels: np.ndarray | None
    source: str
    class_names: tuple[str, ...] | None = None
    rows: np.ndarray | None = None
    data_id: str = ""
    selection: Selection = field(default_factory=Selection)
    preprocess: dict[str, Any] | None = None
    constants: Mapping[str, Constant] = field(default_factory=dict)
    batch_axes: Mapping[str, int] = field(default_factory=dict)

    @property
    def total(self) -> int:
        """Rows in the whole set (before selection)."""
        return len(next(iter(self.inputs.values())))

    @property
    def n(self) -> int:
        """Rows selected."""
        return self.total if self.rows is None else len(self.rows)

    def row_numbers(self) -> np.ndarray:
        """Row numbers in the whole set of the selected rows, int64."""
        return np.arange(self.total, dtype=np.int64) if self.rows is None else self.rows

    def _key(self, start: int, stop: int) -> slice | np.ndarray:
        if self.rows is None:
            return slice(start, stop)
        r = self.rows[start:stop]
        if int(r[-1]) - int(r[0]) == len(r) - 1:  # a contiguous run: read a view
            return slice(int(r[0]), int(r[-1]) + 1)
        return r

    def batch(self, start: int, stop: int, dtypes: Mapping[str, str | None]) -> dict[str, np.ndarray]:
        """The inputs of selected rows ``start..stop-1``, contiguous, cast to ``dtypes`` (None: as they are)."""
        key = self._key(start, stop)
        return {
            name: np.ascontiguousarray(self.inputs[name][key], dtype=dtypes[name])
            for name in dtypes if name in self.inputs
        }

    def feed(self, batch: Mapping[str, np.ndarray]) -> Mapping[str, np.ndarray]:
        """A batch of :meth:`batch` (samples on axis 0) as the model takes it:
        each input's samples moved to its batch axis, the constants added."""
        if not self.batch_axes and not self.constants:
            return batch
        count = len(next(iter(batch.values())))
        fed = dict(batch)
        for name, axis in self.batch_axes.items():
            fed[name] = np.ascontiguousarray(np.moveaxis(batch[name], 0, axis))
        for name, constant in self.constants.items():
            fed[name] = constant.fed(count)
        return fed

    @property
    def mapped_row_bytes(self) -> int:
        """Bytes per row of the memory-mapped inputs (0 when none is mapped)."""
        return sum(
            arr.strides[0] for arr in self.inputs.values()
            if isinstance(arr, np.ndarray) and getattr(arr, "_mmap", None) is not None and arr.ndim
            and arr.flags.c_contiguous
        )

    def release(self, start: int, stop: int) -> None:
        """Hand the pages of memory-mapped rows ``start..stop-1`` back to the kernel.

        Only pages wholly inside the rows' bytes are released; a later read
        maps them in again from the page cache, so this never changes data.
        """
        key = self._key(start, stop)
        first, last = (key.start, key.stop) if isinstance(key, slice) else (int(key[0]), int(key[-1]) + 1)
        for arr in self.inputs.values():
            _release_rows(arr, first, last)


def _release_rows(arr: np.ndarray | ImageArray, first: int, stop: int) -> None:
    mm = getattr(arr, "_mmap", None)  # numpy.memmap keeps its mmap object here
    if not isinstance(arr, np.memmap) or mm is None or not hasattr(mm, "madvise"):
        return
    if not arr.flags.c_contiguous or arr.ndim == 0:
        return
    row = arr.strides[0]
    delta = arr.offset % mmap.ALLOCATIONGRANULARITY  # the map starts at a granularity boundary
    begin = delta + first * row
    end = delta + stop * row
    begin += -begin % mmap.PAGESIZE  # round inward to whole pages
    end -= end % mmap.PAGESIZE
    if end > begin:
        mm.madvise(mmap.MADV_DONTNEED, begin, end - begin)


def parse_shard(text: str) -> tuple[int, int]:
    """Parse ``--shard I/N`` (1 <= I <= N).

    >>> parse_shard("2/8")
    (2, 8)
    """
    m = re.fullmatch(r"\s*(\d+)\s*/\s*(\d+)\s*", str(text))
    if not m:
        raise OnnxcalError(f"--shard '{text}' is not of the form I/N", "write e.g. --shard 2/8")
    i, n = int(m.group(1)), int(m.group(2))
    if n < 1 or not 1 <= i <= n:
        raise OnnxcalError(
            f"--shard {i}/{n} is out of range", f"shards are numbered 1 to N, e.g. 1/{max(n, 1)}"
        )
    return i, n


MAX_SEED = 2**32 - 1


def check_selection(selection: Selection) -> Selection:
    """Validate a selection's numbers, with errors naming the option and its range."""
    if selection.limit is not None:
        check_range(selection.limit, 1, None, "--limit", "a number of samples")
    if selection.shuffle_seed is not None:
        check_range(selection.shuffle_seed, 0, MAX_SEED, "--shuffle-seed", "a seed")
    if selection.shard is not None:
        parse_shard(f"{selection.shard[0]}/{selection.shard[1]}")
    return selection


def selected_rows(total: int, selection: Selection) -> np.ndarray | None:
    """Sorted row numbers chosen by ``selection`` out of ``total``; None for all.

    The order is ``permutation(total)`` of ``numpy.random.default_rng(seed)``
    when a seed is given, else the file order; shard i of n takes positions
    ``[(i-1) total // n, i total // n)`` of it, then ``limit`` keeps the first
    rows. The result is sorted so the data are read front to back.

    >>> selected_rows(10, Selection(shard=(2, 3))).tolist()
    [3, 4, 5]
    """
    if selection.limit is None and selection.shard is None:
        return None
    if selection.shuffle_seed is not None:
        order = np.random.default_rng(selection.shuffle_seed).permutation(total)
    else:
        order = np.arange(total)
    if selection.shard is not None:
        i, n = selection.shard
        order = order[(i - 1) * total // n : i * total // n]
    if selection.limit is not None:
        order = order[: selection.limit]
    return np.sort(order).astype(np.int64)


def select(dataset: Dataset, selection: Selection) -> Dataset:
    """Apply ``selection`` to a whole set (labels included)."""
    rows = selected_rows(dataset.total, selection)
    if rows is not None and rows.size == 0:
        raise OnnxcalError(
            f"shard {selection.shard_text} of '{dataset.source}' holds no rows "
            f"(the set has {dataset.total})",
            "use fewer shards than rows",
        )
    labels = dataset.labels
    if labels is not None and rows is not None:
        labels = np.asarray(labels[rows])
    elif labels is not None:
        labels = np.asarray(labels)
    return replace(dataset, rows=rows, labels=labels, selection=selection)


# --------------------------------------------------------------------------
# What to load


@dataclass(frozen=True)
class DataSpec:
    """Where a validation set is and how to read it (the ``--data`` options).

    Give ``path`` (an ``.npz``, a ``.npy`` for a one-input model, a ``.csv``,
    or a folder of images), ``inputs`` (model input name -> ``.npy``) or
    ``arrays`` (in memory).

    Attributes
    ----------
    path : path or None
    inputs : mapping of str to path
        One ``.npy`` per model input.
    labels : path or None
        ``.npy`` of labels (with ``inputs`` or a ``.npy`` path), or a CSV
        mapping image files to classes (with an image folder).
    label_column : str or None
        Label column of a CSV table or of an image-labels CSV (default ``label``).
    feature_columns : sequence of str or None
        CSV columns fed to the model, in order (default: all but the label).
    classes : path or None
        Class names, one per line, in the model's class order.
    preprocess : path or None
        TOML or JSON file of image preprocessing options.
    image : mapping
        Image preprocessing options (override ``preprocess``); see
        :data:`~onnxcal.data.preprocess.IMAGE_OPTIONS`.
    selection : Selection
    constants : mapping of str to value
        Model inputs given once and fed with every batch (``--constant``):
        a number, ``"zeros"`` (zeros shaped like the declared input), an
        ``.npy`` path, or an array.
    batch_axes : mapping of str to int
        The axis of an input's array that holds the samples, when not 0
        (``--batch-axis``; e.g. 1 for a recurrent state 1 x N x H).
    arrays : mapping of str to array, (inputs, labels) pair, or None
        A set in memory, checked as an ``.npz`` of the same arrays would be:
        model input name -> array, plus ``labels`` (the key ``None`` names
        the only input of a one-input model); or a pair of such a mapping
        (or one array, for a one-input model) and the labels. ``constants``,
        ``batch_axes``, ``classes`` and ``selection`` apply as to a file.
    """

    path: str | os.PathLike[str] | None = None
    inputs: Mapping[str, str | os.PathLike[str]] = field(default_factory=dict)
    labels: str | os.PathLike[str] | None = None
    label_column: str | None = None
    feature_columns: Sequence[str] | None = None
    classes: str | os.PathLike[str] | None = None
    preprocess: str | os.PathLike[str] | None = None
    image: Mapping[str, object] = field(default_factory=dict)
    selection: Selection = field(default_factory=Selection)
    constants: Mapping[str, str | os.PathLike[str] | int | float | np.ndarray] = field(default_factory=dict)
    batch_axes: Mapping[str, int] = field(default_factory=dict)
    arrays: Mapping[str | None, object] | tuple[Any, Any] | None = None

    def files(self) -> list[Path]:
        """Every file or folder this spec reads (for output-path checks)."""
        paths = [self.path, *self.inputs.values(), self.labels, self.classes, self.preprocess]
        files = [c for c in self.constants.values() if isinstance(c, (str, os.PathLike)) and _is_npy(c)]
        return [Path(p) for p in [*paths, *files] if p is not None]


def _is_npy(value: str | os.PathLike[str]) -> bool:
    return str(value).lower().endswith(".npy")
