"""Load labelled validation sets in the forms people keep them, and check them
against a model's inputs.

A validation set is a :class:`Dataset`: one array per model input (first
axis = samples), integer labels, and which of its rows are selected. The
forms (see :class:`DataSpec`):

* an ``.npz`` with one array per model input plus ``labels``;
* one ``.npy`` per model input (``--input NAME=FILE.npy``) plus ``--labels``;
* a CSV table with a header row, for models with one tabular input;
* a folder of images, one subfolder per class (or a labels CSV), with the
  preprocessing given as options or in a small TOML/JSON file.

Nothing is read whole that need not be: ``.npy`` files are opened with
``mmap_mode='r'``, uncompressed ``.npz`` members are memory-mapped in place,
and images are decoded batch by batch. :meth:`Dataset.release` gives the
pages of a batch that has been run back to the kernel, so reading a set
larger than memory keeps the resident size at about one batch. Every load
uses ``allow_pickle=False``.
"""

from __future__ import annotations

import csv
import hashlib
import json
import mmap
import os
import re
import struct
import tomllib
import warnings
import zipfile
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np

from .. import _signals
from .._files import require_file
from .._limits import check_memory, check_range, format_bytes
from ..errors import OnnxcalError, OnnxcalWarning, first_line
from ..graph import TensorSpec

LABELS_KEY = "labels"
IMAGE_SUFFIXES = frozenset({".png", ".jpg", ".jpeg", ".bmp", ".gif", ".tif", ".tiff", ".webp", ".ppm", ".pgm"})


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
    """

    inputs: Mapping[str, np.ndarray]
    labels: np.ndarray | None
    source: str
    class_names: tuple[str, ...] | None = None
    rows: np.ndarray | None = None
    data_id: str = ""
    selection: Selection = field(default_factory=Selection)
    preprocess: dict | None = None

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

    def batch(self, start: int, stop: int, dtypes: Mapping[str, str]) -> dict[str, np.ndarray]:
        """The inputs of selected rows ``start..stop-1``, contiguous, cast to ``dtypes``."""
        key = self._key(start, stop)
        return {
            name: np.ascontiguousarray(self.inputs[name][key], dtype=dtypes[name]) for name in dtypes
        }

    @property
    def mapped_row_bytes(self) -> int:
        """Bytes per row of the memory-mapped inputs (0 when none is mapped)."""
        return sum(
            arr.strides[0] for arr in self.inputs.values()
            if getattr(arr, "_mmap", None) is not None and arr.ndim
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


def _release_rows(arr, first: int, stop: int) -> None:
    mm = getattr(arr, "_mmap", None)  # numpy.memmap keeps its mmap object here
    if mm is None or not hasattr(mm, "madvise") or not arr.flags.c_contiguous or arr.ndim == 0:
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
    or a folder of images) or ``inputs`` (model input name -> ``.npy``).

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
        :data:`IMAGE_OPTIONS`.
    selection : Selection
    """

    path: str | os.PathLike | None = None
    inputs: Mapping[str, str | os.PathLike] = field(default_factory=dict)
    labels: str | os.PathLike | None = None
    label_column: str | None = None
    feature_columns: Sequence[str] | None = None
    classes: str | os.PathLike | None = None
    preprocess: str | os.PathLike | None = None
    image: Mapping[str, object] = field(default_factory=dict)
    selection: Selection = field(default_factory=Selection)

    def files(self) -> list[Path]:
        """Every file or folder this spec reads (for output-path checks)."""
        paths = [self.path, *self.inputs.values(), self.labels, self.classes, self.preprocess]
        return [Path(p) for p in paths if p is not None]


def load_dataset(
    spec: DataSpec, model_inputs: Sequence[TensorSpec], *, require_labels: bool = True
) -> Dataset:
    """Load the set ``spec`` describes for a model with inputs ``model_inputs``.

    Reads the class names, maps string labels through them, checks the set
    against the model's inputs and applies the selection.

    Raises
    ------
    OnnxcalError
        Anything about the files, options or arrays that cannot feed the model.
    """
    check_selection(spec.selection)
    classes = read_classes(spec.classes) if spec.classes is not None else None
    if spec.inputs and spec.path is not None:
        raise OnnxcalError("give either --data or --input NAME=FILE.npy, not both")
    if not spec.inputs and spec.path is None:
        raise OnnxcalError("no validation data given", "pass --data PATH or --input NAME=FILE.npy")
    path = Path(spec.path) if spec.path is not None else None
    form = "images" if path is not None and path.is_dir() else "csv" if _is_csv(path) else "arrays"
    _check_options_apply(spec, form)
    if form == "images":
        ds = load_image_folder(
            path, _single_input(model_inputs, path), image_options(spec.image, spec.preprocess),
            labels_csv=spec.labels, label_column=spec.label_column, classes=classes,
        )
    elif form == "csv":
        ds = load_csv(
            path, _single_input(model_inputs, path), label_column=spec.label_column,
            feature_columns=spec.feature_columns, classes=classes, require_labels=require_labels,
        )
    elif spec.inputs or path.suffix.lower() == ".npy":
        files = dict(spec.inputs) or {_single_input(model_inputs, path).name: path}
        ds = load_npy(files, spec.labels, require_labels=require_labels)
    else:
        ds = load_npz(path, require_labels=require_labels and spec.labels is None)
        if spec.labels is not None:
            if ds.labels is not None:
                raise OnnxcalError(
                    f"'{path}' holds a '{LABELS_KEY}' array and --labels was given too",
                    "drop --labels or the array",
                )
            ds = _with_npy_labels(ds, spec.labels)
    if ds.labels is not None:
        ds = replace(ds, labels=map_labels(ds.labels, classes, ds.source, classes_file=spec.classes))
    if classes is not None:
        ds = replace(ds, class_names=classes)
    match_inputs(ds, model_inputs)
    return select(ds, spec.selection)


def _is_csv(path: Path | None) -> bool:
    return path is not None and path.suffix.lower() in (".csv", ".tsv")


def _check_options_apply(spec: DataSpec, form: str) -> None:
    """Refuse options that the chosen form would silently ignore."""
    if form != "images" and (spec.image or spec.preprocess is not None):
        key = next(iter(spec.image), None)
        what = f"--{key.replace('_', '-')}" if key else "--preprocess"
        raise OnnxcalError(f"{what} applies to image folders only", "drop it for this data")
    if form != "csv" and spec.feature_columns is not None:
        raise OnnxcalError("--feature-columns applies to CSV data only", "drop it for this data")
    if form == "csv" and spec.labels is not None:
        raise OnnxcalError(
            "--labels does not apply to CSV data", "name the label column with --label-column"
        )
    if form == "arrays" and spec.label_column is not None:
        raise OnnxcalError(
            "--label-column applies to CSV tables and image-labels CSV files only",
            "drop it for array data",
        )


def _single_input(model_inputs: Sequence[TensorSpec], path: Path) -> TensorSpec:
    if len(model_inputs) != 1:
        names = ", ".join(s.name for s in model_inputs)
        raise OnnxcalError(
            f"'{path}' can feed a model with one input, but this model has {len(model_inputs)} "
            f"({names})",
            "give one array per input with --input NAME=FILE.npy (or an .npz)",
        )
    return model_inputs[0]


# --------------------------------------------------------------------------
# Fingerprints


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


def _combine(parts: Sequence[tuple[str, str]]) -> str:
    digest = hashlib.sha256()
    for role, fp in parts:
        digest.update(f"{role}\0{fp}\n".encode())
    return digest.hexdigest()[:32]


# --------------------------------------------------------------------------
# NumPy arrays


def _member_header(fh) -> tuple[tuple[int, ...], bool, np.dtype] | None:
    """The shape, order and dtype in an ``.npy`` header read from ``fh``, or None."""
    try:
        version = np.lib.format.read_magic(fh)
        reader = {(1, 0): np.lib.format.read_array_header_1_0, (2, 0): np.lib.format.read_array_header_2_0}
        if version not in reader:
            return None
        return reader[version](fh)
    except Exception:  # not a header numpy can parse (ValueError, tokenize's TokenError, EOF, ...)
        return None


def _npz_member(path: Path, info: zipfile.ZipInfo, key: str) -> np.ndarray | None:
    """Memory-map an uncompressed ``.npy`` member of an ``.npz`` in place, or None.

    Raises
    ------
    OnnxcalError
        The member's header claims more bytes than the member holds.
    """
    if info.compress_type != zipfile.ZIP_STORED or info.flag_bits & 0x1:  # compressed/encrypted
        return None
    with open(path, "rb") as fh:
        fh.seek(info.header_offset)
        local = fh.read(30)
        if len(local) < 30 or local[:4] != b"PK\x03\x04":
            return None
        name_len, extra_len = struct.unpack("<HH", local[26:30])
        start = info.header_offset + 30 + name_len + extra_len
        fh.seek(start)
        header = _member_header(fh)
        if header is None:
            return None
        shape, fortran, dtype = header
        offset = fh.tell()
    if dtype.hasobject or int(np.prod(shape)) == 0:
        return None
    need = int(np.prod(shape, dtype=np.float64)) * dtype.itemsize
    if offset - start + need > info.file_size:
        raise OnnxcalError(
            f"array '{key}' in '{path}' is truncated: its header says {_show(shape)} {dtype} "
            f"({format_bytes(need)}) but the file holds {format_bytes(max(0, info.file_size - (offset - start)))}",
            "save the array again with numpy.savez",
        )
    return np.memmap(path, dtype=dtype, mode="r", offset=offset, shape=shape, order="F" if fortran else "C")


def _checked_text(arr: np.ndarray, key: str, path: Path) -> np.ndarray:
    """``arr``, refused when it is text holding code points that are not Unicode characters.

    numpy stores text as raw 32-bit code points and turns any of them into
    Python strings, also surrogates and values above U+10FFFF, which then
    break string handling far from the file (even printing an error).
    """
    if arr.dtype.kind != "U" or not arr.size:
        return arr
    order = arr.dtype.byteorder if arr.dtype.byteorder in "<>" else "="
    codes = np.ascontiguousarray(arr).view(f"{order}u4")
    if ((codes > 0x10FFFF) | ((codes >= 0xD800) & (codes <= 0xDFFF))).any():
        raise OnnxcalError(
            f"array '{key}' in '{path}' holds text that is not valid Unicode (a damaged or forged file)",
            "save the text again with numpy from Python strings",
        )
    return arr


def _read_member(path: Path, npz, zf: zipfile.ZipFile, info: zipfile.ZipInfo | None, key: str) -> np.ndarray:
    """One member of an ``.npz``: its header read first, then mapped in place or read whole.

    Python objects are refused from the header's dtype, before numpy reads
    anything; a compressed member is read whole only when its header's size
    fits in the memory available.
    """
    header = None
    if info is not None:
        with zf.open(info) as fh:
            header = _member_header(fh)
    if header is not None and header[2].hasobject:
        raise OnnxcalError(
            f"array '{key}' in '{path}' holds Python objects, which onnxcal will not unpickle",
            "save it as a numeric array",
        )
    mapped = _npz_member(path, info, key) if info is not None else None
    if mapped is not None:
        return mapped
    if header is not None:
        shape, _, dtype = header
        check_memory(
            int(np.prod(shape, dtype=np.float64)) * dtype.itemsize,
            f"array '{key}' in '{path}' (compressed, shape {_show(shape)} {dtype})",
            "save the data uncompressed (numpy.savez), which onnxcal reads without loading it whole",
        )
    return npz[key]


def read_npz(path: Path, hint: str) -> dict[str, np.ndarray]:
    """Every array of an ``.npz``; uncompressed members are memory maps.

    Compressed members are read whole, after checking from their header
    that they fit in memory; no member is ever unpickled. Whatever a damaged
    archive makes zipfile, zlib or numpy raise is reported as one error
    naming the file and the array.
    """
    if not zipfile.is_zipfile(path):
        raise OnnxcalError(f"'{path}' is not an .npz archive", hint)
    try:
        npz = np.load(path, allow_pickle=False)
        zf = zipfile.ZipFile(path)
        infos = {i.filename: i for i in zf.infolist()}
    except Exception as exc:  # a damaged archive: zipfile and numpy raise many kinds
        raise OnnxcalError(f"'{path}' is not a readable .npz file ({first_line(exc)})", hint) from exc
    arrays: dict[str, np.ndarray] = {}
    with npz, zf:
        for key in npz.files:
            try:
                arrays[key] = _checked_text(_read_member(path, npz, zf, infos.get(key + ".npy"), key), key, path)
            except OnnxcalError:
                raise
            except Exception as exc:  # a damaged member: zip, zlib, the .npy header or its data
                raise OnnxcalError(f"array '{key}' in '{path}' cannot be read ({first_line(exc)})", hint) from exc
    return arrays


def load_npz(path: str | os.PathLike, *, require_labels: bool = True) -> Dataset:
    """Read an ``.npz`` whose arrays are named after the model inputs, plus ``labels``.

    Raises
    ------
    OnnxcalError
        Not an npz, pickled (object) arrays, no ``labels`` when required,
        arrays of different lengths.
    """
    p = require_file(path, "data file")
    hint = "save the inputs and labels with numpy.savez(path, <input>=..., labels=...)"
    arrays = read_npz(p, hint)
    labels = arrays.pop(LABELS_KEY, None)
    if labels is None and require_labels:
        raise OnnxcalError(
            f"'{p}' has no array named '{LABELS_KEY}'",
            f"add the integer class labels as '{LABELS_KEY}'",
        )
    if not arrays:
        raise OnnxcalError(f"'{p}' holds no input arrays", "add one array per model input")
    _same_lengths(arrays, labels, str(p))
    return Dataset(inputs=arrays, labels=labels, source=str(p), data_id=_combine([("npz", file_fingerprint(p))]))


def _same_lengths(arrays: Mapping[str, np.ndarray], labels: np.ndarray | None, source: str) -> None:
    lengths = {k: (a.shape[0] if a.ndim else None) for k, a in arrays.items()}
    if labels is not None:
        lengths[LABELS_KEY] = labels.shape[0] if labels.ndim else None
    if len(set(lengths.values())) != 1 or None in lengths.values():
        shown = ", ".join(f"{k}: {v}" for k, v in lengths.items())
        raise OnnxcalError(
            f"arrays in '{source}' have different numbers of samples ({shown})",
            "every array needs the samples along its first axis, the same count each",
        )
    if next(iter(lengths.values())) == 0:
        raise OnnxcalError(f"'{source}' holds no samples", "give a non-empty validation set")


def read_npy(path: str | os.PathLike, what: str) -> np.ndarray:
    """Open one ``.npy`` with ``mmap_mode='r'`` (never unpickling).

    The header is read first: an array of Python objects is refused from
    its dtype alone, before numpy is asked to load anything.
    """
    p = require_file(path, what)
    hint = "save it with numpy.save"
    try:
        with open(p, "rb") as fh:
            header = _member_header(fh)
    except OSError as exc:
        raise OnnxcalError(f"cannot read {what} '{p}': {exc.strerror or exc}", "check that the file is readable") from exc
    if header is None:
        if zipfile.is_zipfile(p):  # an .npz given where an .npy was expected
            raise OnnxcalError(f"{what} '{p}' is not an .npy file", "give one array saved with numpy.save")
        raise OnnxcalError(f"{what} '{p}' is not a readable .npy file (no .npy header)", hint)
    if header[2].hasobject:
        raise OnnxcalError(
            f"{what} '{p}' holds Python objects, which onnxcal will not unpickle", "save it as a numeric array"
        )
    try:
        arr = np.load(p, mmap_mode="r", allow_pickle=False)
    except (ValueError, OSError, EOFError) as exc:
        raise OnnxcalError(f"{what} '{p}' is not a readable .npy file ({first_line(exc)})", hint) from exc
    return arr


def load_npy(
    files: Mapping[str, str | os.PathLike],
    labels: str | os.PathLike | None,
    *,
    require_labels: bool = True,
) -> Dataset:
    """One memory-mapped ``.npy`` per model input, plus a labels ``.npy``."""
    arrays = {name: read_npy(path, f"input '{name}'") for name, path in files.items()}
    source = ", ".join(f"{name}={path}" for name, path in files.items())
    if labels is None and require_labels:
        raise OnnxcalError(f"no labels for '{source}'", "pass --labels FILE.npy")
    label_array = read_npy(labels, "labels file") if labels is not None else None
    _same_lengths(arrays, label_array, source)
    parts = [(f"input:{name}", file_fingerprint(Path(p))) for name, p in sorted(files.items())]
    return Dataset(inputs=arrays, labels=label_array, source=source, data_id=_combine(parts))


def _with_npy_labels(ds: Dataset, labels: str | os.PathLike) -> Dataset:
    arr = read_npy(labels, "labels file")
    _same_lengths(ds.inputs, arr, f"{ds.source} + {labels}")
    data_id = _combine([("data", ds.data_id), ("labels", file_fingerprint(Path(labels)))])
    return replace(ds, labels=arr, data_id=data_id)


# --------------------------------------------------------------------------
# Class names and string labels


def read_classes(path: str | os.PathLike) -> tuple[str, ...]:
    """Class names from a text file, one per line, in the model's class order.

    Raises
    ------
    OnnxcalError
        No names, a blank line between names, or a name given twice.
    """
    p = require_file(path, "classes file")
    try:
        lines = p.read_text(encoding="utf-8-sig").splitlines()
    except (OSError, UnicodeDecodeError) as exc:
        raise OnnxcalError(f"classes file '{p}' is not readable UTF-8 text ({exc})") from exc
    names = [line.strip() for line in lines]
    while names and not names[-1]:
        names.pop()
    if not names:
        raise OnnxcalError(f"classes file '{p}' lists no class names", "write one class name per line")
    if "" in names:
        raise OnnxcalError(
            f"line {names.index('') + 1} of classes file '{p}' is blank",
            "write one class name per line, with no blank lines between them",
        )
    seen: dict[str, int] = {}
    for i, name in enumerate(names, start=1):
        if name in seen:
            raise OnnxcalError(
                f"class '{name}' is listed twice in '{p}' (lines {seen[name]} and {i})",
                "list each class once",
            )
        seen[name] = i
    return tuple(names)


def class_indices(
    values: np.ndarray,
    classes: Sequence[str],
    describe: Callable[[int], str],
    classes_file: str | os.PathLike | None = None,
) -> np.ndarray:
    """Map class names to their indices in ``classes`` (vectorised).

    ``describe(i)`` names where value ``i`` came from, for the error.
    """
    names = np.asarray(classes)
    order = np.argsort(names, kind="stable")
    ordered = names[order]
    wanted = np.char.strip(np.asarray(values).astype(str))
    pos = np.clip(np.searchsorted(ordered, wanted), 0, len(ordered) - 1)
    found = ordered[pos] == wanted
    if not found.all():
        i = int(np.flatnonzero(~found)[0])
        listed = ", ".join(classes[:8]) + (", ..." if len(classes) > 8 else "")
        where = f"the class list '{classes_file}'" if classes_file else "the class list"
        raise OnnxcalError(
            f"label '{wanted[i]}' at {describe(i)} is not in {where} ({listed}; "
            f"{int((~found).sum())} unknown in all)",
            "fix the label or add the class to the class list",
        )
    return order[pos].astype(np.int64)


def map_labels(
    labels: np.ndarray,
    classes: Sequence[str] | None,
    source: str,
    *,
    classes_file: str | os.PathLike | None = None,
    describe: Callable[[int], str] | None = None,
) -> np.ndarray:
    """String labels mapped to class indices; numeric labels unchanged."""
    labels = np.asarray(labels)
    if labels.dtype.kind not in "US":
        return labels
    if classes is None:
        first = str(labels.reshape(-1)[0]) if labels.size else ""
        raise OnnxcalError(
            f"the labels in '{source}' are names (e.g. '{first}'), not class indices",
            "pass --classes FILE with the class names, one per line, in the model's class order",
        )
    return class_indices(labels, classes, describe or (lambda i: f"row {i} of '{source}'"), classes_file)


# --------------------------------------------------------------------------
# CSV tables


def _read_table(path: Path) -> tuple[list[str], list[list[str]], list[int]]:
    """Header, rows of cells and each row's line number; blank lines skipped."""
    delimiter = "\t" if path.suffix.lower() == ".tsv" else ","
    try:
        with open(path, newline="", encoding="utf-8-sig") as fh:
            reader = csv.reader(fh, delimiter=delimiter)
            header = next(reader, None)
            rows, lines = [], []
            for row in reader:
                if row and any(cell.strip() for cell in row):
                    rows.append(row)
                    lines.append(reader.line_num)
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise OnnxcalError(f"'{path}' is not a readable CSV file ({exc})", "save it as UTF-8 CSV") from exc
    if not header or not any(h.strip() for h in header):
        raise OnnxcalError(f"'{path}' has no header row", "put the column names on the first line")
    header = [h.strip() for h in header]
    dup = next((h for i, h in enumerate(header) if h in header[:i]), None)
    if dup is not None:
        raise OnnxcalError(f"column '{dup}' appears twice in the header of '{path}'", "give each column a unique name")
    widths = np.fromiter((len(r) for r in rows), dtype=np.int64, count=len(rows))
    bad = np.flatnonzero(widths != len(header))
    if bad.size:
        i = int(bad[0])
        raise OnnxcalError(
            f"line {lines[i]} of '{path}' has {widths[i]} cells but the header has {len(header)} columns",
            "give every row one cell per column",
        )
    if not rows:
        raise OnnxcalError(f"'{path}' has a header but no rows", "give a non-empty validation set")
    return header, rows, lines


def _column(rows: list[list[str]], j: int) -> np.ndarray:
    return np.array([r[j] for r in rows])


def _numeric_column(cells: np.ndarray, path: Path, name: str, j: int, lines: list[int]) -> np.ndarray:
    try:
        return cells.astype(np.float64)
    except ValueError:
        for i, cell in enumerate(cells):  # find the first bad cell for the message
            try:
                float(cell)
            except ValueError:
                shown = "an empty cell" if not cell.strip() else f"'{cell}'"
                raise OnnxcalError(
                    f"line {lines[i]}, column '{name}' (column {j + 1}) of '{path}' holds {shown}, "
                    "not a number",
                    "fix the cell, or leave the column out with --feature-columns",
                ) from None
        raise


def _check_fits(values: np.ndarray, dtype: np.dtype, where: str, lines: list[int], input_name: str) -> None:
    """Refuse finite values the model input's dtype cannot hold (float16 above 65504, int8 above 127, ...).

    Cast, they would become Inf or wrap around without a word.
    """
    info = np.finfo(dtype) if dtype.kind == "f" else np.iinfo(dtype) if dtype.kind in "iu" else None
    if info is None or dtype == np.float64:
        return
    low, high = float(info.min), float(info.max)
    bad = np.isfinite(values) & ((values < low) | (values > high))
    if bad.any():
        i = int(np.argmax(bad))
        raise OnnxcalError(
            f"line {lines[i]}, {where} holds {values[i]:g}, outside what model input '{input_name}' "
            f"({dtype.name}) can hold ({low:g} to {high:g})",
            "rescale that column as the model was trained, or check the data",
        )


def load_csv(
    path: str | os.PathLike,
    model_input: TensorSpec,
    *,
    label_column: str | None = None,
    feature_columns: Sequence[str] | None = None,
    classes: Sequence[str] | None = None,
    require_labels: bool = True,
) -> Dataset:
    """A CSV table (header row) for a model with one (samples x features) input.

    Parameters
    ----------
    path : path
    model_input : TensorSpec
        The model's one input; features are cast to its dtype.
    label_column : str, default "label"
        Holds class indices, or class names when ``classes`` is given.
    feature_columns : sequence of str, optional
        Columns fed to the model, in order; by default every column but the
        label column, in file order.
    classes : sequence of str, optional
    require_labels : bool

    Raises
    ------
    OnnxcalError
        No header, ragged rows, a missing column, or a cell that is not a
        number (naming its line and column).
    """
    p = require_file(path, "data file")
    header, rows, lines = _read_table(p)
    label_name = label_column or "label"
    has_labels = label_name in header
    if require_labels and not has_labels:
        raise OnnxcalError(
            f"'{p}' has no column '{label_name}' (columns: {', '.join(header)})",
            "name the label column with --label-column",
        )
    if feature_columns is None:
        features = [h for h in header if h != label_name]
    else:
        features = list(feature_columns)
        missing = [c for c in features if c not in header]
        if missing:
            raise OnnxcalError(
                f"--feature-columns names '{missing[0]}', which is not a column of '{p}' "
                f"(columns: {', '.join(header)})",
                "check the column names",
            )
    if not features:
        raise OnnxcalError(f"'{p}' has no feature columns", "give the features as columns beside the labels")
    shape = model_input.shape
    want = shape[1] if shape is not None and len(shape) == 2 and isinstance(shape[1], int) else None
    if shape is not None and len(shape) != 2:
        raise OnnxcalError(
            f"model input '{model_input.name}' has rank {len(shape)}, but a CSV table gives "
            "samples x features (rank 2)",
            "save the inputs as .npy or .npz instead",
        )
    if want is not None and want > 0 and want != len(features):
        raise OnnxcalError(
            f"'{p}' gives {len(features)} feature columns but model input '{model_input.name}' "
            f"takes {want} features",
            "choose the model's features, in order, with --feature-columns",
        )
    dtype = np.dtype(model_input.dtype) if model_input.dtype != "unknown" else np.dtype(np.float32)
    x = np.empty((len(rows), len(features)), dtype=dtype if dtype.kind == "f" else np.float64)
    for col, name in enumerate(features):
        j = header.index(name)
        values = _numeric_column(_column(rows, j), p, name, j, lines)
        _check_fits(values, dtype, f"column '{name}' of '{p}'", lines, model_input.name)
        x[:, col] = values
    if dtype.kind in "iub":
        whole = np.isfinite(x) & (x == np.round(x))
        if not whole.all():
            i, col = (int(v[0]) for v in np.nonzero(~whole))
            raise OnnxcalError(
                f"line {lines[i]}, column '{features[col]}' of '{p}' holds {x[i, col]!r}, but model "
                f"input '{model_input.name}' takes {dtype} values",
                "give whole numbers",
            )
        x = x.astype(dtype)
    labels = None
    if has_labels:
        labels = _csv_labels(_column(rows, header.index(label_name)), p, label_name, lines, classes)
    return Dataset(
        inputs={model_input.name: x},
        labels=labels,
        source=str(p),
        data_id=_combine([("csv", file_fingerprint(p))]),
    )


def _csv_labels(
    cells: np.ndarray, path: Path, name: str, lines: list[int], classes: Sequence[str] | None
) -> np.ndarray:
    try:
        return cells.astype(np.float64)
    except ValueError:
        pass
    if classes is None:
        first = next(c for c in cells if not _is_number(c))
        raise OnnxcalError(
            f"column '{name}' of '{path}' holds class names (e.g. '{first.strip()}'), not class indices",
            "pass --classes FILE with the class names, one per line, in the model's class order",
        )
    return class_indices(cells, classes, lambda i: f"line {lines[i]} of '{path}'")


def _is_number(cell: str) -> bool:
    try:
        float(cell)
    except ValueError:
        return False
    return True


# --------------------------------------------------------------------------
# Image folders

IMAGE_OPTIONS = (
    "resize", "crop", "scale", "mean", "std", "channel_order", "layout", "dtype", "interpolation",
)
"""Preprocessing keys, as ``--resize`` etc. on the command line or keys of the file."""

_INTERPOLATION = ("nearest", "bilinear", "bicubic", "lanczos")
MAX_SIDE = 65535
"""Largest ``--resize`` and ``--crop`` side in pixels (PNG and most formats stop there or near)."""

ENLARGE_WARNING = 8
"""A --resize that enlarges an image more than this many times per side is warned about (once)."""

_SIXTEEN_BITS = {"I;16", "I;16L", "I;16B", "I;16N"}
_UNKNOWN_RANGE = {"I": "32-bit integer", "F": "32-bit floating-point", "I;32": "32-bit integer"}


@dataclass(frozen=True)
class ImageOptions:
    """How images become model input, in this order.

    Attributes
    ----------
    resize : int or None
        Resize so the shorter side is this many pixels (aspect kept).
    crop : (int, int) or None
        Centre crop to (height, width).
    scale : bool or None
        Divide by 255 to [0, 1]; None: yes for a float input, no for an integer one.
    mean, std : tuple of float or None
        Per channel (in the channel order of the model), applied after scaling:
        ``(x - mean) / std``.
    channel_order : str
        ``"RGB"`` or ``"BGR"``.
    layout : str or None
        ``"NCHW"`` or ``"NHWC"``; None: read from the model's input shape
        (NCHW when it cannot tell).
    dtype : str or None
        The input dtype; None: the model's.
    interpolation : str
        Resampling filter for ``resize``.
    """

    resize: int | None = None
    crop: tuple[int, int] | None = None
    scale: bool | None = None
    mean: tuple[float, ...] | None = None
    std: tuple[float, ...] | None = None
    channel_order: str = "RGB"
    layout: str | None = None
    dtype: str | None = None
    interpolation: str = "bilinear"


def read_preprocess_file(path: str | os.PathLike) -> dict:
    """The preprocessing options of a ``.toml`` or ``.json`` file."""
    p = require_file(path, "preprocessing file")
    try:
        if p.suffix.lower() == ".toml":
            with open(p, "rb") as fh:
                data = tomllib.load(fh)
        elif p.suffix.lower() == ".json":
            data = json.loads(p.read_text(encoding="utf-8"))
        else:
            raise OnnxcalError(f"preprocessing file '{p}' is neither .toml nor .json", "rename it or convert it")
    except (OSError, UnicodeDecodeError, ValueError) as exc:  # TOMLDecodeError is a ValueError
        raise OnnxcalError(f"preprocessing file '{p}' cannot be parsed ({exc})", "check its syntax") from exc
    if not isinstance(data, dict):
        raise OnnxcalError(f"preprocessing file '{p}' is not a table of options", f"use the keys {', '.join(IMAGE_OPTIONS)}")
    return data


def image_options(values: Mapping[str, object], file: str | os.PathLike | None = None) -> ImageOptions:
    """Validate preprocessing options: those of ``file``, overridden by ``values``.

    Values may be typed (``256``, ``[0.5, 0.5, 0.5]``) or strings as typed on
    the command line (``"256"``, ``"0.5,0.5,0.5"``, ``"224x224"``).

    Raises
    ------
    OnnxcalError
        An unknown key or a value that does not fit, naming the option or the
        file key.
    """
    merged: dict[str, tuple[object, str]] = {}
    if file is not None:
        for key, value in read_preprocess_file(file).items():
            merged[key] = (value, f"'{key}' in '{file}'")
    for key, value in values.items():
        if value is not None:
            merged[key] = (value, f"--{key.replace('_', '-')}")
    unknown = [where for key, (_, where) in merged.items() if key not in IMAGE_OPTIONS]
    if unknown:
        raise OnnxcalError(f"{unknown[0]} is not a preprocessing option", f"the options are: {', '.join(IMAGE_OPTIONS)}")
    out = {key: _image_value(key, value, where) for key, (value, where) in merged.items()}
    return ImageOptions(**out)


def _image_value(key: str, value, where: str):
    def fail(what: str):
        raise OnnxcalError(f"{where} = {value!r} is not {what}")

    if key == "resize":
        n = _as_int(value)
        return n if n is not None and 0 < n <= MAX_SIDE else fail(f"a number of pixels from 1 to {MAX_SIDE}")
    if key == "crop":
        if isinstance(value, str):
            parts = re.split(r"[x,]", value.lower())
        elif isinstance(value, (list, tuple)):
            parts = list(value)
        else:
            parts = [value]
        dims = [_as_int(v) for v in parts]
        if len(dims) not in (1, 2) or any(d is None or not 0 < d <= MAX_SIDE for d in dims):
            fail(f"a size N or HxW in pixels, each from 1 to {MAX_SIDE}")
        return (dims[0], dims[-1])
    if key == "scale":
        text = str(value).strip().lower()
        if value is True or text in ("true", "yes", "1"):
            return True
        if value is False or text in ("false", "no", "0"):
            return False
        fail("true or false")
    if key in ("mean", "std"):
        parts = value.split(",") if isinstance(value, str) else value if isinstance(value, (list, tuple)) else [value]
        try:
            nums = tuple(float(v) for v in parts)
        except (TypeError, ValueError):
            fail("a list of numbers, one per channel")
        if not nums or not all(np.isfinite(nums)) or (key == "std" and min(nums) <= 0):
            fail("a list of finite numbers (std > 0), one per channel")
        return nums
    if key == "channel_order":
        text = str(value).upper()
        return text if text in ("RGB", "BGR") else fail("RGB or BGR")
    if key == "layout":
        text = str(value).upper()
        return text if text in ("NCHW", "NHWC") else fail("NCHW or NHWC")
    if key == "dtype":
        try:
            return np.dtype(str(value)).name
        except TypeError:
            fail("a numpy dtype name such as float32 or uint8")
    text = str(value).lower()  # interpolation
    return text if text in _INTERPOLATION else fail(f"one of {', '.join(_INTERPOLATION)}")


def _as_int(value) -> int | None:
    if isinstance(value, bool):
        return None
    if isinstance(value, int):
        return value
    if isinstance(value, str) and value.strip().isdigit():
        return int(value)
    return None


@dataclass(frozen=True)
class _ImagePlan:
    """Preprocessing resolved against the model input."""

    options: ImageOptions
    channels: int
    layout: str
    dtype: np.dtype
    scale: bool

    def to_dict(self) -> dict:
        o = self.options
        return {
            "resize": o.resize, "crop": list(o.crop) if o.crop else None, "scale": self.scale,
            "mean": list(o.mean) if o.mean else None, "std": list(o.std) if o.std else None,
            "channel_order": o.channel_order, "layout": self.layout, "dtype": self.dtype.name,
            "interpolation": o.interpolation, "channels": self.channels,
        }


def _plan_images(options: ImageOptions, spec: TensorSpec) -> _ImagePlan:
    shape = spec.shape
    if shape is not None and len(shape) != 4:
        raise OnnxcalError(
            f"model input '{spec.name}' has rank {len(shape)}, but an image batch has rank 4 "
            "(N, C, H, W or N, H, W, C)",
            "save the inputs as .npy or .npz instead",
        )
    dims = [d if isinstance(d, int) and d > 0 else None for d in (shape or (None,) * 4)]
    layout = options.layout
    if layout is None:
        first, last = dims[1] in (1, 3), dims[3] in (1, 3)
        layout = "NHWC" if last and not first else "NCHW"
    channels = dims[1] if layout == "NCHW" else dims[3]
    if channels is None:
        channels = len(options.mean or options.std or ()) or 3
    if channels not in (1, 3):
        other = "NHWC" if layout == "NCHW" else "NCHW"
        raise OnnxcalError(
            f"model input '{spec.name}' (shape {_show(shape)}) has {channels} channels in layout {layout}",
            f"set --layout {other} if that is the model's layout; onnxcal reads 1- or 3-channel images",
        )
    model_dtype = np.dtype(spec.dtype) if spec.dtype != "unknown" else np.dtype(np.float32)
    dtype = np.dtype(options.dtype) if options.dtype else model_dtype
    if dtype != model_dtype:
        raise OnnxcalError(
            f"--dtype {dtype.name} does not match model input '{spec.name}', which takes {model_dtype.name}",
            f"set --dtype {model_dtype.name} (or drop it)",
        )
    scale = options.scale if options.scale is not None else dtype.kind == "f"
    if dtype.kind != "f" and (scale or options.mean or options.std):
        raise OnnxcalError(
            f"model input '{spec.name}' takes {dtype.name} pixels, which cannot hold scaled or normalised values",
            "drop --scale, --mean and --std for this model",
        )
    for key in ("mean", "std"):
        values = getattr(options, key)
        if values is not None and len(values) not in (1, channels):
            raise OnnxcalError(
                f"--{key} has {len(values)} values but the model takes {channels}-channel images",
                f"give {channels} values (or one for all channels)",
            )
    return _ImagePlan(options, channels, layout, dtype, bool(scale))


class ImageArray:
    """Images as a lazy array (n, C, H, W) or (n, H, W, C): decoded when indexed."""

    def __init__(self, root: Path, files: Sequence[str], plan: _ImagePlan, spec: TensorSpec):
        self.root, self.files, self.plan, self.spec = root, list(files), plan, spec
        self._warned = False
        height, width = self._planned_size(0)  # from the header: nothing decoded before the memory checks
        self._check_size(height, width)
        self.shape_hw = (height, width)
        c = plan.channels
        self.shape = (len(self.files), c, height, width) if plan.layout == "NCHW" else (len(self.files), height, width, c)
        self.dtype = plan.dtype
        self.ndim = 4
        o = plan.options
        self._chan = slice(None, None, -1) if o.channel_order == "BGR" and c == 3 else slice(None)
        # mean and std are listed in the model's channel order, so they apply after the reorder
        self._mean = np.asarray(o.mean, np.float32) if o.mean else None
        self._std = np.asarray(o.std, np.float32) if o.std else None

    def __len__(self) -> int:
        return len(self.files)

    def _model_size(self) -> tuple[int | None, int | None]:
        dims = self.spec.shape
        if dims is None:
            return None, None
        want = (dims[2], dims[3]) if self.plan.layout == "NCHW" else (dims[1], dims[2])
        return tuple(w if isinstance(w, int) and w > 0 else None for w in want)

    def _check_size(self, height: int, width: int, name: str | None = None) -> None:
        """Refuse an image that does not come out at the model's (or the first image's) size."""
        fixed = self._model_size()
        first = getattr(self, "shape_hw", (height, width))
        h, w = fixed[0] or first[0], fixed[1] or first[1]
        if (h, w) == (height, width):
            return
        size = f"{h}" if h == w else f"{h}x{w}"
        whose = (
            f"model input '{self.spec.name}' takes {h}x{w}"
            if any(fixed) else f"'{self.files[0]}' came out {h}x{w}"
        )
        raise OnnxcalError(
            f"image '{name or self.files[0]}' comes out {height}x{width} (height x width) after "
            f"preprocessing, but {whose}",
            f"set --crop {size} (with --resize to the size the model was trained with, "
            "often a little larger than the crop)",
        )

    def _resized(self, name: str, w: int, h: int) -> tuple[int, int]:
        """(width, height) after --resize, checked against the memory one such image needs."""
        o = self.plan.options
        if o.resize is None:
            return w, h
        s = o.resize / min(w, h)
        size = (max(1, round(w * s)), max(1, round(h * s)))
        what = f"image '{shown(name)}' ({h}x{w}, height x width) resized by --resize {o.resize} to {size[1]}x{size[0]}"
        needs = size[0] * size[1] * self.plan.channels * (1 + self.plan.dtype.itemsize)
        check_memory(needs, what, "lower --resize to the size the model takes")
        if s > ENLARGE_WARNING and not self._warned:
            self._warned = True
            warnings.warn(
                OnnxcalWarning(f"{what}, {s:.0f} times its size in each direction ({format_bytes(needs)} while it "
                               "is preprocessed); check --resize, the shorter side after resizing in pixels"),
                stacklevel=2,
            )
        return size

    def _crop_box(self, name: str, w: int, h: int) -> tuple[int, int, int, int] | None:
        o = self.plan.options
        if o.crop is None:
            return None
        ch, cw = o.crop
        if ch > h or cw > w:
            raise OnnxcalError(
                f"--crop {ch}x{cw} is larger than image '{shown(name)}' ({h}x{w} after --resize)",
                "lower --crop or raise --resize",
            )
        left, top = (w - cw) // 2, (h - ch) // 2
        return left, top, left + cw, top + ch

    def _planned_size(self, i: int) -> tuple[int, int]:
        """(height, width) of image ``i`` after preprocessing, from its header alone."""
        name = self.files[i]
        with self._open(name) as img:
            w, h = self._resized(name, *img.size)
        box = self._crop_box(name, w, h)
        return (h, w) if box is None else (box[3] - box[1], box[2] - box[0])

    def _open(self, name: str):
        """The image ``name``, opened (its header read): Pillow's errors as OnnxcalError."""
        Image = _pillow()

        try:
            with warnings.catch_warnings():
                # Pillow warns above MAX_IMAGE_PIXELS and raises at twice that; refuse both
                warnings.simplefilter("error", Image.DecompressionBombWarning)
                return Image.open(self.root / name)
        except Exception as exc:
            raise self._unreadable(name, exc) from exc

    def _unreadable(self, name: str, exc: Exception) -> OnnxcalError:
        Image = _pillow()

        if isinstance(exc, (Image.DecompressionBombWarning, Image.DecompressionBombError)):
            return OnnxcalError(
                f"image '{shown(self.root / name)}' claims {_pixels(exc)} pixels, more than Pillow's limit of "
                f"{Image.MAX_IMAGE_PIXELS} for safe decoding (a decompression bomb?)",
                "remove the file, or resize the images before calibrating",
            )
        # a damaged image: Pillow's decoders raise many kinds (OSError, struct.error, ...)
        return OnnxcalError(
            f"image '{shown(self.root / name)}' cannot be read ({first_line(exc)})", "fix or remove the file"
        )

    def _load(self, i: int) -> np.ndarray:
        """One image as uint8 (H, W, C), resized and cropped."""
        Image = _pillow()

        name = self.files[i]
        img = self._open(name)
        try:
            with img, warnings.catch_warnings():
                warnings.simplefilter("error", Image.DecompressionBombWarning)
                img = _eight_bits(img, shown(name)).convert("L" if self.plan.channels == 1 else "RGB")
                size = self._resized(name, *img.size)
                if size != img.size:
                    img = img.resize(size, getattr(Image.Resampling, self.plan.options.interpolation.upper()))
                if (box := self._crop_box(name, *img.size)) is not None:
                    img = img.crop(box)
                arr = np.asarray(img, dtype=np.uint8)
        except OnnxcalError:
            raise
        except Exception as exc:
            raise self._unreadable(name, exc) from exc
        return arr[:, :, None] if arr.ndim == 2 else arr

    def __getitem__(self, key) -> np.ndarray:
        idx = range(len(self.files))[key] if isinstance(key, slice) else np.atleast_1d(key)
        images = [self._load(int(i)) for i in idx]
        for i, img in zip(idx, images):
            if img.shape[:2] != self.shape_hw:
                self._check_size(*img.shape[:2], name=self.files[int(i)])
        batch = np.stack(images)[..., self._chan]
        p = self.plan
        if p.dtype.kind == "f":
            batch = batch.astype(np.float32)
            if p.scale:
                batch *= np.float32(1.0 / 255.0)
            if self._mean is not None:
                batch -= self._mean
            if self._std is not None:
                batch /= self._std
        if p.layout == "NCHW":
            batch = batch.transpose(0, 3, 1, 2)
        return np.ascontiguousarray(batch, dtype=p.dtype)


def _pillow():
    """``PIL.Image``, imported with SIGINT and SIGTERM held back (an extension module's import
    interrupted by a signal can crash the process)."""
    with _signals.deferred():
        from PIL import Image
    return Image


def shown(name: str | os.PathLike) -> str:
    r"""A file name as the user can read it: bytes that are not UTF-8 shown escaped.

    Names come from the file system as str with undecodable bytes kept as
    lone surrogates (Python's ``surrogateescape``); they print as ``\xff``.

    >>> shown(os.fsdecode(b"class0/caf\xe9.png"))
    'class0/caf\\xe9.png'
    """
    return os.fsencode(name).decode("utf-8", "backslashreplace")


def _eight_bits(img, name: str):
    """``img`` with 8-bit channels: 16-bit greyscale reduced by its high byte.

    Pillow opens a 16-bit greyscale PNG as mode ``I;16`` and its
    ``convert("L")`` then saturates every value above 255 (1000 and 20000
    both become 255). onnxcal keeps the high byte instead, as Pillow itself
    does for 16-bit colour PNGs (48-bit RGB opens as 8-bit RGB that way).
    32-bit integer or floating-point images (``I``, ``F``: some TIFFs) have
    no fixed range, so they are refused, naming the mode.
    """
    Image = _pillow()

    if img.mode in _SIXTEEN_BITS:
        return Image.fromarray((np.asarray(img, dtype=np.uint16) >> 8).astype(np.uint8), mode="L")
    if img.mode in _UNKNOWN_RANGE:
        raise OnnxcalError(
            f"image '{name}' has {_UNKNOWN_RANGE[img.mode]} pixels (Pillow mode '{img.mode}'), whose range "
            "onnxcal cannot know to bring them to the 0-255 the preprocessing works in",
            "convert the images to 8- or 16-bit PNG or JPEG first",
        )
    return img


def _pixels(exc: Exception) -> str:
    """The pixel count in Pillow's decompression-bomb message ("Image size (N pixels) exceeds ...")."""
    m = re.search(r"\((\d+) pixels\)", str(exc))
    return m.group(1) if m else "too many"


def _image_files(folder: Path) -> list[str]:
    return sorted(
        str(p.relative_to(folder)).replace(os.sep, "/")
        for p in folder.rglob("*")
        if p.is_file() and p.suffix.lower() in IMAGE_SUFFIXES and not p.name.startswith(".")
    )


def load_image_folder(
    folder: str | os.PathLike,
    model_input: TensorSpec,
    options: ImageOptions,
    *,
    labels_csv: str | os.PathLike | None = None,
    label_column: str | None = None,
    classes: Sequence[str] | None = None,
) -> Dataset:
    """Images in ``folder``: one subfolder per class, or listed in ``labels_csv``.

    With subfolders, the sorted subfolder names are the classes (indices
    0, 1, ...), unless ``classes`` gives the names in the model's order.
    A labels CSV has a header with a ``file`` column (paths relative to the
    folder) and a label column (class names or indices).

    Raises
    ------
    OnnxcalError
        No images, a subfolder or label not in the class list, or images
        that do not fit the model input after preprocessing (naming the
        option to change).
    """
    root = Path(folder)
    plan = _plan_images(options, model_input)
    if labels_csv is not None:
        files, labels = _listed_images(root, Path(labels_csv), label_column or "label", classes)
        names = tuple(classes) if classes is not None else None
    else:
        if label_column is not None:
            raise OnnxcalError("--label-column applies to a labels CSV", "give it with --labels FILE.csv")
        files, labels, names = _class_folders(root, classes)
    listing = hashlib.sha256()
    for name in files:  # names as bytes: any bytes a file system allows
        listing.update(os.fsencode(name) + f"\0{(root / name).stat().st_size}\n".encode())
    parts = [("images", listing.hexdigest())]
    if labels_csv is not None:
        parts.append(("labels", file_fingerprint(Path(labels_csv))))
    return Dataset(
        inputs={model_input.name: ImageArray(root, files, plan, model_input)},
        labels=labels,
        source=shown(root),
        class_names=names,
        data_id=_combine(parts),
        preprocess=plan.to_dict(),
    )


def _class_folders(root: Path, classes: Sequence[str] | None) -> tuple[list[str], np.ndarray, tuple[str, ...]]:
    stray = [p.name for p in root.iterdir() if p.is_file() and p.suffix.lower() in IMAGE_SUFFIXES]
    if stray:
        raise OnnxcalError(
            f"image '{stray[0]}' lies directly in '{root}', not in a class subfolder",
            "move each image into the subfolder of its class, or list them with --labels FILE.csv",
        )
    folders = sorted(p.name for p in root.iterdir() if p.is_dir() and not p.name.startswith("."))
    if not folders:
        raise OnnxcalError(f"'{root}' has no class subfolders", "put the images of each class in a subfolder named after it")
    names = tuple(classes) if classes is not None else tuple(shown(f) for f in folders)
    if classes is not None:
        index = class_indices(np.array(folders), classes, lambda i: f"subfolder '{folders[i]}' of '{root}'")
    else:
        index = np.arange(len(folders))
    files: list[str] = []
    labels: list[np.ndarray] = []
    for folder, k in zip(folders, index):
        found = [f"{folder}/{f}" for f in _image_files(root / folder)]
        if not found:
            raise OnnxcalError(f"class subfolder '{root / folder}' holds no images", f"add images ({', '.join(sorted(IMAGE_SUFFIXES))}) or remove it")
        files += found
        labels.append(np.full(len(found), k, dtype=np.int64))
    return files, np.concatenate(labels), names


def _listed_images(
    root: Path, table: Path, label_column: str, classes: Sequence[str] | None
) -> tuple[list[str], np.ndarray]:
    require_file(table, "labels file")
    header, rows, lines = _read_table(table)
    for col in ("file", label_column):
        if col not in header:
            raise OnnxcalError(
                f"labels file '{table}' has no column '{col}' (columns: {', '.join(header)})",
                "give a header with 'file' (paths relative to the image folder) and the label column "
                "(--label-column, default 'label')",
            )
    files = [f.strip() for f in _column(rows, header.index("file"))]
    for i, name in enumerate(files):
        target = (root / name)
        if Path(name).is_absolute() or ".." in Path(name).parts:
            raise OnnxcalError(
                f"line {lines[i]} of '{table}' names '{name}', which is outside the image folder '{root}'",
                "give paths relative to the image folder, without '..' (onnxcal reads images only from there)",
            )
        if not target.is_file():
            raise OnnxcalError(
                f"line {lines[i]} of '{table}' names '{name}', which is not a file in '{root}'",
                "give paths relative to the image folder",
            )
    labels = _csv_labels(_column(rows, header.index(label_column)), table, label_column, lines, classes)
    return files, labels


# --------------------------------------------------------------------------
# Checks against the model


def _kind_ok(data: np.dtype, model: np.dtype) -> bool:
    if data == model:
        return True
    if model.kind == "f":
        return data.kind in "fiub"
    if model.kind in "iu":
        return data.kind in "iub"
    return model.kind == "b" and data.kind == "b"


def match_inputs(dataset: Dataset, specs: Sequence[TensorSpec]) -> None:
    """Check that the set supplies every model input with a fitting dtype and shape.

    Raises
    ------
    OnnxcalError
        An input is missing or extra, or its dtype or shape cannot feed the model.
    """
    names = [s.name for s in specs]
    missing = [n for n in names if n not in dataset.inputs]
    extra = [n for n in dataset.inputs if n not in names]
    if missing:
        raise OnnxcalError(
            f"'{dataset.source}' has no array for model input '{missing[0]}'",
            f"the model's inputs are: {', '.join(names)}; supply each one "
            f"(an .npz array or --input {missing[0]}=FILE.npy)",
        )
    if extra:
        raise OnnxcalError(
            f"'{dataset.source}' has an array '{extra[0]}' that is not a model input",
            f"the model's inputs are: {', '.join(names)} (plus '{LABELS_KEY}')",
        )
    for spec in specs:
        arr = dataset.inputs[spec.name]
        try:
            want = np.dtype(spec.dtype)
        except TypeError:  # a sequence, a map, or no element type at all
            raise OnnxcalError(
                f"model input '{spec.name}' has type {spec.dtype}, which onnxcal cannot feed from arrays",
                "calibrate a model whose inputs are tensors of numbers",
            ) from None
        if not _kind_ok(arr.dtype, want):
            raise OnnxcalError(
                f"input '{spec.name}' is {arr.dtype} in the data but {want} in the model",
                f"save '{spec.name}' as {want}",
            )
        if spec.shape is None:
            continue
        if arr.ndim != len(spec.shape):
            raise OnnxcalError(
                f"input '{spec.name}' has rank {arr.ndim} (shape {arr.shape}) in the data "
                f"but rank {len(spec.shape)} in the model (shape {_show(spec.shape)})",
                "reshape the array so samples are on axis 0 and the rest matches the model",
            )
        for axis, (have, need) in enumerate(zip(arr.shape[1:], spec.shape[1:]), start=1):
            if isinstance(need, int) and need > 0 and have != need:
                raise OnnxcalError(
                    f"input '{spec.name}' has size {have} on axis {axis} in the data "
                    f"but {need} in the model (shape {_show(spec.shape)})",
                    "give data shaped like the model's input",
                )


def _show(shape: Sequence[int | str | None] | None) -> str:
    if shape is None:
        return "?"
    return "[" + ", ".join("?" if d is None else str(d) for d in shape) + "]"


def check_labels(labels: np.ndarray, n: int, num_classes: int, source: str) -> np.ndarray:
    """Return ``labels`` as int64 after checking count, integrality and range.

    Raises
    ------
    OnnxcalError
        Wrong count, non-integer values, or values outside [0, num_classes).
    """
    labels = np.asarray(labels)
    if labels.ndim != 1:
        raise OnnxcalError(
            f"labels in '{source}' have shape {labels.shape}, expected one label per sample",
            "give a 1-D array of class indices",
        )
    if labels.shape[0] != n:
        raise OnnxcalError(
            f"'{source}' has {labels.shape[0]} labels for {n} samples",
            "give exactly one label per sample",
        )
    if labels.dtype.kind == "f":
        bad = ~np.isfinite(labels) | (labels != np.round(labels))
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise OnnxcalError(
                f"label {labels[i].item()!r} at row {i} in '{source}' is not a whole class index",
                "labels must be integer class indices",
            )
    elif labels.dtype.kind not in "iub":
        raise OnnxcalError(
            f"labels in '{source}' have dtype {labels.dtype}, not integers",
            "labels must be integer class indices",
        )
    out = labels.astype(np.int64)
    bad = (out < 0) | (out >= num_classes)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise OnnxcalError(
            f"label {out[i]} at row {i} in '{source}' is outside [0, {num_classes}) "
            f"for a model with {num_classes} classes ({int(bad.sum())} such labels)",
            "check that the labels use the model's class indices",
        )
    return out


def check_multilabel(labels: np.ndarray, n: int, num_labels: int, source: str) -> np.ndarray:
    """Return an N x K 0/1 multi-label array as uint8 after checking it.

    Raises
    ------
    OnnxcalError
        Wrong shape, or values other than 0 and 1.
    """
    labels = np.asarray(labels)
    if labels.ndim != 2 or labels.shape != (n, num_labels):
        raise OnnxcalError(
            f"multi-label labels in '{source}' have shape {labels.shape}, expected ({n}, {num_labels}): "
            "one 0/1 column per model output",
            "give an N x K array of 0 and 1",
        )
    if labels.dtype.kind not in "iubf":
        raise OnnxcalError(f"labels in '{source}' have dtype {labels.dtype}, not numbers", "give 0 and 1")
    bad = (labels != 0) & (labels != 1)
    if bad.any():
        i, j = (int(v) for v in np.argwhere(bad)[0])
        raise OnnxcalError(
            f"label {labels[i, j].item()!r} at row {i}, column {j} in '{source}' is not 0 or 1",
            "multi-label labels must be 0 (absent) or 1 (present)",
        )
    return labels.astype(np.uint8)


def check_label_array(labels: np.ndarray, n: int, num_classes: int, source: str) -> np.ndarray:
    """Check class labels (1-D; 0/1 for a single-logit binary model) or an N x K multi-label array."""
    if np.ndim(labels) == 2:
        return check_multilabel(labels, n, num_classes, source)
    return check_labels(labels, n, max(num_classes, 2), source)
