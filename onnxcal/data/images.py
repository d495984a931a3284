"""Folders of images: one subfolder per class, or the files listed in a labels
CSV; decoded with Pillow batch by batch, as a lazy array (:class:`ImageArray`).
"""

from __future__ import annotations

import hashlib
import os
import re
import warnings
from collections.abc import Sequence
from pathlib import Path
from types import ModuleType
from typing import TYPE_CHECKING

import numpy as np

from .. import _signals
from .._limits import check_memory, format_bytes
from .._paths import require_file
from ..errors import OnnxcalError, OnnxcalWarning, first_line
from ..graph import TensorSpec
from .csv import column, csv_labels, read_table
from .fingerprint import combine, file_fingerprint
from .labels import class_indices
from .preprocess import ImageOptions, ImagePlan, plan_images
from .spec import Dataset

if TYPE_CHECKING:
    from PIL.Image import Image as PILImage

IMAGE_SUFFIXES = frozenset({".png", ".jpg", ".jpeg", ".bmp", ".gif", ".tif", ".tiff", ".webp", ".ppm", ".pgm"})

ENLARGE_WARNING = 8
"""A --resize that enlarges an image more than this many times per side is warned about (once)."""

_SIXTEEN_BITS = {"I;16", "I;16L", "I;16B", "I;16N"}
_UNKNOWN_RANGE = {"I": "32-bit integer", "F": "32-bit floating-point", "I;32": "32-bit integer"}


class ImageArray:
    """Images as a lazy array (n, C, H, W) or (n, H, W, C): decoded when indexed."""

    def __init__(self, root: Path, files: Sequence[str], plan: ImagePlan, spec: TensorSpec) -> None:
        self.root, self.files, self.plan, self.spec = root, list(files), plan, spec
        self._warned = False
        height, width = self._planned_size(0)  # from the header: nothing decoded before the memory checks
        self._check_size(height, width)
        self.shape_hw = (height, width)
        c = plan.channels
        self.shape = (len(self.files), c, height, width) if plan.layout == "NCHW" else (len(self.files), height, width,
                                                                                        c)
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
        height, width = (w if isinstance(w, int) and w > 0 else None for w in want)
        return height, width

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

    def _open(self, name: str) -> PILImage:
        """The image ``name``, opened (its header read): Pillow's errors as OnnxcalError."""
        Image = _pillow()

        try:
            with warnings.catch_warnings():
                # Pillow warns above MAX_IMAGE_PIXELS and raises at twice that; refuse both
                warnings.simplefilter("error", Image.DecompressionBombWarning)
                opened: PILImage = Image.open(self.root / name)
                return opened
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
                img = _eight_bits(img, shown(name))
                mode = "L" if self.plan.channels == 1 else "RGB"
                if img.mode != mode:  # convert() to the mode an image has already would only copy it
                    img = img.convert(mode)
                size = self._resized(name, *img.size)
                if size != img.size:
                    img = img.resize(size, getattr(Image.Resampling, self.plan.options.interpolation.upper()))
                if (box := self._crop_box(name, *img.size)) is not None:
                    img = img.crop(box)
                # the bytes numpy.asarray(img) reads too (Pillow's __array_interface__), without its detour
                raw = img.tobytes()
                width, height = img.size
        except OnnxcalError:
            raise
        except Exception as exc:
            raise self._unreadable(name, exc) from exc
        return np.frombuffer(raw, np.uint8).reshape(height, width, len(mode))

    def __getitem__(self, key: int | slice | Sequence[int] | np.ndarray) -> np.ndarray:
        idx = range(len(self.files))[key] if isinstance(key, slice) else np.atleast_1d(key)
        p = self.plan
        batch = np.empty((len(idx), *self.shape_hw, p.channels), np.uint8)  # (n, H, W, C), each image in place
        for j, i in enumerate(idx):
            img = self._load(int(i))
            if img.shape[:2] != self.shape_hw:
                self._check_size(img.shape[0], img.shape[1], name=self.files[int(i)])
            batch[j] = img[..., self._chan]
        channels: tuple[slice | None, ...] = (slice(None),)
        if p.layout == "NCHW":  # laid out while still bytes: the float work below then runs on contiguous rows
            batch, channels = np.ascontiguousarray(batch.transpose(0, 3, 1, 2)), (slice(None), None, None)
        if p.dtype.kind != "f":
            return np.ascontiguousarray(batch, dtype=p.dtype)
        # each value: float32(byte) * float32(1/255), then - mean, / std, in float32: the same operations
        # in the same order as one array at a time, so the same values to the bit
        out = np.empty(batch.shape, np.float32)
        if p.scale:
            np.multiply(batch, np.float32(1.0 / 255.0), out=out)
        else:
            out[...] = batch
        if self._mean is not None:
            out -= self._mean[channels]
        if self._std is not None:
            out /= self._std[channels]
        return out if p.dtype == np.float32 else out.astype(p.dtype)


_PIL_IMAGE: list[ModuleType] = []  # PIL.Image once imported


def _pillow() -> ModuleType:
    """``PIL.Image``, imported with SIGINT and SIGTERM held back (an extension module's import
    interrupted by a signal can crash the process); once imported, at the cost of a lookup (it is
    called several times per image: holding the signals back each time cost a third of a decode)."""
    if not _PIL_IMAGE:
        with _signals.deferred():
            from PIL import Image
        _PIL_IMAGE.append(Image)
    return _PIL_IMAGE[0]


def shown(name: str | os.PathLike[str]) -> str:
    r"""A file name as the user can read it: bytes that are not UTF-8 shown escaped.

    Names come from the file system as str with undecodable bytes kept as
    lone surrogates (Python's ``surrogateescape``); they print as ``\xff``.

    >>> shown(os.fsdecode(b"class0/caf\xe9.png"))
    'class0/caf\\xe9.png'
    """
    return os.fsencode(name).decode("utf-8", "backslashreplace")


def _eight_bits(img: PILImage, name: str) -> PILImage:
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
        reduced: PILImage = Image.fromarray((np.asarray(img, dtype=np.uint16) >> 8).astype(np.uint8), mode="L")
        return reduced
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
    folder: str | os.PathLike[str],
    model_input: TensorSpec,
    options: ImageOptions,
    *,
    labels_csv: str | os.PathLike[str] | None = None,
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
    plan = plan_images(options, model_input)
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
        data_id=combine(parts),
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
        raise OnnxcalError(f"'{root}' has no class subfolders",
                           "put the images of each class in a subfolder named after it")
    names = tuple(classes) if classes is not None else tuple(shown(f) for f in folders)
    if classes is not None:
        index = class_indices(np.array(folders), classes, lambda i: f"subfolder '{folders[i]}' of '{root}'")
    else:
        index = np.arange(len(folders))
    files: list[str] = []
    labels: list[np.ndarray] = []
    for folder, k in zip(folders, index, strict=True):
        found = [f"{folder}/{f}" for f in _image_files(root / folder)]
        if not found:
            raise OnnxcalError(f"class subfolder '{root / folder}' holds no images",
                               f"add images ({', '.join(sorted(IMAGE_SUFFIXES))}) or remove it")
        files += found
        labels.append(np.full(len(found), k, dtype=np.int64))
    return files, np.concatenate(labels), names


def _listed_images(
    root: Path, table: Path, label_column: str, classes: Sequence[str] | None
) -> tuple[list[str], np.ndarray]:
    require_file(table, "labels file")
    header, rows, lines = read_table(table)
    for col in ("file", label_column):
        if col not in header:
            raise OnnxcalError(
                f"labels file '{table}' has no column '{col}' (columns: {', '.join(header)})",
                "give a header with 'file' (paths relative to the image folder) and the label column "
                "(--label-column, default 'label')",
            )
    files = [f.strip() for f in column(rows, header.index("file"))]
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
    labels = csv_labels(column(rows, header.index(label_column)), table, label_column, lines, classes)
    return files, labels
