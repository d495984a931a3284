"""NumPy arrays: an ``.npz`` with one array per model input plus ``labels``, or
one ``.npy`` per model input (``--input NAME=FILE.npy``) plus ``--labels``.

Nothing is read whole that need not be: ``.npy`` files are opened with
``mmap_mode='r'``, and uncompressed ``.npz`` members are memory-mapped in
place. Every load uses ``allow_pickle=False``, and an array of Python
objects is refused from its header's dtype before numpy reads it.
"""

from __future__ import annotations

import hashlib
import os
import struct
import zipfile
from collections import Counter
from collections.abc import Collection, Mapping, Sequence
from dataclasses import replace
from pathlib import Path
from typing import IO, TYPE_CHECKING, Any

import numpy as np

from .._limits import check_memory, format_bytes
from .._paths import require_file
from ..errors import OnnxcalError, first_line
from ..graph import TensorSpec
from .axes import lengths_hint, samples_first
from .fingerprint import combine, file_fingerprint
from .inputs import show_shape
from .spec import LABELS_KEY, Dataset

if TYPE_CHECKING:
    from .images import ImageArray
if TYPE_CHECKING:
    from ..graph import TensorSpec



def _member_header(fh: IO[bytes]) -> tuple[tuple[int, ...], bool, np.dtype] | None:
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
            f"array '{key}' in '{path}' is truncated: its header says {show_shape(shape)} {dtype} "
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


def _read_member(path: Path, npz: Any, zf: zipfile.ZipFile, info: zipfile.ZipInfo | None, key: str) -> np.ndarray:
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
            f"array '{key}' in '{path}' (compressed, shape {show_shape(shape)} {dtype})",
            "save the data uncompressed (numpy.savez), which onnxcal reads without loading it whole",
        )
    member: np.ndarray = npz[key]  # numpy.lib.npyio.NpzFile: its members are arrays
    return member


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


def load_npz(
    path: str | os.PathLike[str],
    *,
    require_labels: bool = True,
    batch_axes: Mapping[str, int] | None = None,
    specs: Sequence[TensorSpec] = (),
    constants: Collection[str] = (),
) -> Dataset:
    """Read an ``.npz`` whose arrays are named after the model inputs, plus ``labels``.

    An input named in ``batch_axes`` has its samples on that axis (a view
    moves it first); an array of rank 0 is left for the caller to take as a
    constant (one number for every sample), and so are the arrays named in
    ``constants`` (given once as well: the caller refuses them). ``specs``,
    the model's inputs, only sharpen the message when the arrays disagree
    on the sample count.

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
    arrays = samples_first(arrays, batch_axes or {}, str(p))
    _same_lengths({k: a for k, a in arrays.items() if k not in constants}, labels, str(p), specs, batch_axes)
    return Dataset(inputs=arrays, labels=labels, source=str(p), data_id=combine([("npz", file_fingerprint(p))]))


MEMORY_SOURCE = "the arrays given"
"""How messages name a validation set given as arrays in memory."""


def load_arrays(
    given: Mapping[str | None, object] | tuple[Any, Any],
    model_inputs: Sequence[TensorSpec],
    *,
    require_labels: bool = True,
    batch_axes: Mapping[str, int] | None = None,
    constants: Collection[str] = (),
) -> Dataset:
    """A set given in memory: model input name -> array, plus ``labels``; or one array under the
    name ``None`` for a one-input model; or an ``(inputs, labels)`` pair (:func:`memory_arrays`).
    The same checks as an ``.npz`` of those arrays (``batch_axes`` and ``constants`` as for
    :func:`load_npz`).

    Raises
    ------
    OnnxcalError
        A value that is not a numeric or text array, Python objects, no
        ``labels`` when required, arrays of different lengths.
    """
    arrays: dict[str, np.ndarray] = {}
    for key, value in memory_arrays(given).items():
        name = key if key is not None else _only_input(model_inputs)
        if not isinstance(name, str):
            raise OnnxcalError(f"the arrays given are keyed by {type(key).__name__} {key!r}",
                               "key each array by the name of the model input it feeds (a str), labels by 'labels'")
        arrays[name] = _memory_array(value, name)
    labels = arrays.pop(LABELS_KEY, None)
    if labels is None and require_labels:
        raise OnnxcalError(f"{MEMORY_SOURCE} hold no '{LABELS_KEY}'",
                           f"add the class labels under '{LABELS_KEY}', or pass (inputs, labels)")
    if not arrays:
        raise OnnxcalError(f"{MEMORY_SOURCE} hold no input arrays", "add one array per model input, keyed by its name")
    arrays = samples_first(arrays, batch_axes or {}, MEMORY_SOURCE)
    _same_lengths({k: a for k, a in arrays.items() if k not in constants}, labels, MEMORY_SOURCE, model_inputs,
                  batch_axes)
    parts = [(name, _array_fingerprint(a)) for name, a in sorted(arrays.items())]
    if labels is not None:
        parts.append((LABELS_KEY, _array_fingerprint(labels)))
    return Dataset(inputs=arrays, labels=labels, source=MEMORY_SOURCE, data_id=combine(parts))


def memory_arrays(given: Mapping[str | None, object] | tuple[Any, Any]) -> Mapping[str | None, object]:
    """A set in memory as one mapping: an ``(inputs, labels)`` pair (inputs a mapping of input
    name to array, or one array for a one-input model) becomes inputs plus ``labels``."""
    if not isinstance(given, tuple):
        return given
    if len(given) != 2:
        raise OnnxcalError(f"{MEMORY_SOURCE} are a tuple of {len(given)}, not an (inputs, labels) pair",
                           "give (inputs, labels), or a mapping of input name to array with 'labels'")
    inputs, labels = given
    if not isinstance(inputs, Mapping):
        return {None: inputs, LABELS_KEY: labels}
    if LABELS_KEY in inputs:
        raise OnnxcalError(f"the inputs of (inputs, labels) hold '{LABELS_KEY}' too",
                           f"drop '{LABELS_KEY}' from the inputs, or pass the mapping alone")
    return {**inputs, LABELS_KEY: labels}


def _only_input(model_inputs: Sequence[TensorSpec]) -> str:
    if len(model_inputs) != 1:
        names = ", ".join(s.name for s in model_inputs)
        raise OnnxcalError(
            f"one array was given, but the model has {len(model_inputs)} inputs ({names})",
            "give a mapping of input name to array",
        )
    return model_inputs[0].name


def _memory_array(value: object, key: str) -> np.ndarray:
    """``value`` as an ndarray (no copy of an ndarray), refused when it holds Python objects."""
    try:
        arr = np.asarray(value)
    except Exception as exc:  # ragged lists and other values numpy cannot make an array of
        raise OnnxcalError(f"'{key}' of {MEMORY_SOURCE} is not an array ({first_line(exc)})",
                           "give numpy arrays with the samples along the first axis") from exc
    if arr.dtype.hasobject or arr.dtype.kind not in "biufcUS":
        raise OnnxcalError(f"'{key}' of {MEMORY_SOURCE} holds {arr.dtype} values, not numbers",
                           "give a numeric numpy array (or text labels as a str array)")
    return arr


def _array_fingerprint(arr: np.ndarray) -> str:
    """SHA-256 of an array's dtype, shape and its first and last MiB of bytes (as for a file)."""
    digest = hashlib.sha256(f"{arr.dtype.str}{arr.shape}".encode())
    flat = np.ascontiguousarray(arr).reshape(-1).view(np.uint8) if arr.size else np.zeros(0, np.uint8)
    digest.update(flat[: 1 << 20].tobytes())
    digest.update(flat[-(1 << 20):].tobytes())
    return digest.hexdigest()


def _same_lengths(
    arrays: Mapping[str, np.ndarray | ImageArray],
    labels: np.ndarray | None,
    source: str,
    specs: Sequence[TensorSpec] = (),
    batch_axes: Mapping[str, int] | None = None,
) -> None:
    """Every array of rank > 0 and the labels hold the same number of samples on axis 0."""
    lengths = {k: a.shape[0] for k, a in arrays.items() if a.ndim}
    if labels is not None:
        lengths[LABELS_KEY] = labels.shape[0] if labels.ndim else None
    if len(set(lengths.values())) != 1 or None in lengths.values():
        n = lengths.get(LABELS_KEY) or Counter(lengths.values()).most_common(1)[0][0]
        if (refusal := lengths_hint(arrays, n, specs, batch_axes or {})) is not None:
            raise refusal
        shown = ", ".join(f"{k}: {v}" for k, v in lengths.items())
        raise OnnxcalError(
            f"arrays in '{source}' have different numbers of samples ({shown})",
            "every array needs the samples along its first axis, the same count each",
        )
    if not lengths:
        raise OnnxcalError(f"'{source}' holds no array with samples", "add one array per model input")
    if next(iter(lengths.values())) == 0:
        raise OnnxcalError(f"'{source}' holds no samples", "give a non-empty validation set")


def read_npy(path: str | os.PathLike[str], what: str) -> np.ndarray:
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
        raise OnnxcalError(f"cannot read {what} '{p}': {exc.strerror or exc}",
                           "check that the file is readable") from exc
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
    checked: np.ndarray = arr  # allow_pickle=False: an array, not a pickled object
    return checked


def load_npy(
    files: Mapping[str, str | os.PathLike[str]],
    labels: str | os.PathLike[str] | None,
    *,
    require_labels: bool = True,
    batch_axes: Mapping[str, int] | None = None,
    specs: Sequence[TensorSpec] = (),
    constants: Collection[str] = (),
) -> Dataset:
    """One memory-mapped ``.npy`` per model input, plus a labels ``.npy``
    (``batch_axes``, ``specs`` and ``constants`` as for :func:`load_npz`)."""
    arrays = {name: read_npy(path, f"input '{name}'") for name, path in files.items()}
    source = ", ".join(f"{name}={path}" for name, path in files.items())
    if labels is None and require_labels:
        raise OnnxcalError(f"no labels for '{source}'", "pass --labels FILE.npy")
    label_array = read_npy(labels, "labels file") if labels is not None else None
    arrays = samples_first(arrays, batch_axes or {}, source)
    _same_lengths({k: a for k, a in arrays.items() if k not in constants}, label_array, source, specs, batch_axes)
    parts = [(f"input:{name}", file_fingerprint(Path(p))) for name, p in sorted(files.items())]
    return Dataset(inputs=arrays, labels=label_array, source=source, data_id=combine(parts))


def with_npy_labels(ds: Dataset, labels: str | os.PathLike[str]) -> Dataset:
    """``ds`` with the labels of a ``.npy`` (``--labels`` beside an ``.npz`` without them)."""
    arr = read_npy(labels, "labels file")
    _same_lengths(ds.inputs, arr, f"{ds.source} + {labels}")
    data_id = combine([("data", ds.data_id), ("labels", file_fingerprint(Path(labels)))])
    return replace(ds, labels=arr, data_id=data_id)
