"""Reading and writing model files: size limits, checked external data, hashes, atomic saves.

A model's weights in external data stay in their files (``external``): the
graph is read, the locations checked, small tensors read in; saving streams
each weight from its file into the output's own data file.
"""

from __future__ import annotations

import errno
import hashlib
import os
import shutil
import threading
from collections.abc import Callable, Mapping
from pathlib import Path, PureWindowsPath
from typing import Any, cast

import onnx

from .._files import Writer, atomic_write_files
from .._limits import DEFAULT_MAX_MODEL_BYTES, check_model_size, format_bytes
from .._paths import _data_runs, copy_range, require_file, sha256_bytes, sha256_file
from ..errors import OnnxcalError, first_line
from . import external
from .external import Span, _model_tensors, is_external, open_contained
from .tensors import EXTERNAL_THRESHOLD


def _external_locations(model: onnx.ModelProto) -> list[str]:
    locations = []
    for t in _model_tensors(model):
        if t.data_location == onnx.TensorProto.EXTERNAL:
            entry = {e.key: e.value for e in t.external_data}
            location = entry.get("location", "")
            if not isinstance(location, str) or "\0" in location:  # protobuf gives bytes when not UTF-8
                raise OnnxcalError(
                    f"the external data location {location!r} of tensor '{t.name}' is not a file name "
                    "(not UTF-8 text, or it holds a NUL byte)",
                    "re-export the model, or save it without external data",
                )
            locations.append(location)
    return sorted(set(locations))


def _check_location(loc: str, model_path: Path, base: Path) -> Path:
    """The file an external-data location names, refused unless it is safely inside ``base``.

    Refused: an empty or absolute location (POSIX or Windows style), a
    ``..`` component, any component that is a symbolic link, a path that
    resolves outside ``base`` anyway, anything but a regular file, and a file
    with more than one hard link (it may be a link to a file outside, e.g. a
    key, that no path check can see). These checks hold on their own; onnx's
    loader (>= 1.21) makes similar ones as it opens the file. Reference:
    onnx's security advisories on external data, from memory CVE-2022-25882
    and CVE-2024-27318 (path traversal through ``location``), and
    GHSA-538c-55jv-c5g9 (external-data attribute injection, named in onnx
    1.23's ``external_data_helper.py``); see docs/security.md.
    """
    where = f"'{model_path}' keeps weights at external location '{loc}', which is outside the model's directory"
    hint = "keep the external data files beside the .onnx file, named relative to it"
    rel, win = Path(loc), PureWindowsPath(loc)
    if not loc or rel.is_absolute() or win.is_absolute() or win.drive:
        raise OnnxcalError(f"{where} (an absolute path)" if loc else f"{where} (an empty location)", hint)
    if ".." in rel.parts or ".." in win.parts:
        raise OnnxcalError(f"{where} ('..' leads out of it)", hint)
    step = base
    for part in rel.parts:
        step = step / part
        if step.is_symlink():
            raise OnnxcalError(
                f"external data file '{loc}' of '{model_path}' is a symbolic link"
                + ("" if step == base / rel else f" (through '{step.relative_to(base)}')")
                + ", which could lead outside the model's directory",
                "put the weights file itself beside the .onnx file",
            )
    target = base / rel
    if not target.resolve().is_relative_to(base):
        raise OnnxcalError(f"{where} (it resolves to '{target.resolve()}')", hint)
    if not target.is_file():
        raise OnnxcalError(
            f"external data file '{loc}' of '{model_path}' is not a file in '{base}'",
            "copy the weights file beside the .onnx file",
        )
    links = target.stat().st_nlink
    if links > 1:
        raise OnnxcalError(
            f"external data file '{loc}' of '{model_path}' has {links} hard links, so it may be "
            "a file from outside the model's directory",
            "copy the weights beside the .onnx file (a copy, not a hard link)",
        )
    return target


def _check_locations(locations: list[str], model_path: Path) -> tuple[Path, ...]:
    """Resolve external-data locations; refuse any that could read outside the model's directory."""
    base = model_path.resolve().parent
    return tuple(_check_location(loc, model_path, base) for loc in locations)


def _parse(p: Path) -> onnx.ModelProto:
    """The ModelProto of a file, without its external data; errors name the file."""
    try:
        return onnx.load(str(p), load_external_data=False)
    except OSError as exc:
        raise OnnxcalError(f"cannot read model '{p}': {exc.strerror or exc}",
                           "check that the file is readable") from exc
    except Exception as exc:  # protobuf DecodeError, ...
        raise OnnxcalError(
            f"'{p}' is not a readable ONNX model (its bytes do not parse as an ONNX ModelProto: "
            "a truncated download, or another kind of file)",
            "give the path of an .onnx file exported by your framework",
        ) from exc


def _sized_model_file(path: str | os.PathLike[str], max_bytes: int) -> Path:
    p = require_file(path, "model")
    check_model_size(p, 0, max_bytes)
    if p.stat().st_size == 0:
        raise OnnxcalError(f"'{p}' is empty (0 bytes)", "give the path of an .onnx file exported by your framework")
    return p


def external_data_files(
    path: str | os.PathLike[str], *, max_bytes: int = DEFAULT_MAX_MODEL_BYTES
) -> tuple[Path, ...]:
    """The external data files a model file uses (checked to lie beside it)."""
    p = _sized_model_file(path, max_bytes)
    try:
        model = onnx.load(str(p), load_external_data=False)
    except Exception:  # load_model reports unreadable files
        return ()
    return _check_locations(_external_locations(model), p)


def load_model(
    path: str | os.PathLike[str], *, max_bytes: int = DEFAULT_MAX_MODEL_BYTES, count_external: bool = True
) -> onnx.ModelProto:
    """Load and check an ONNX model file, with errors that name the file; weights stay in their files.

    The file must be at most ``max_bytes`` (with its external data when
    ``count_external``: the commands that run the model, whose weights
    onnxruntime then holds in memory), checked before it is read. The graph
    is read without its external data; every location is checked first: one
    that could lead outside the model's directory (absolute, ``..``, a
    symlink, a hard link) is refused before any read, and so is external
    data in a tensor onnx does not load (onnxruntime would look for it
    elsewhere). External tensors of at least ``external.RESIDENT_BYTES``
    stay in their files, noted with the model's folder (see
    :mod:`onnxcal.graph.external`); smaller ones are read in. The checker
    runs on the file's path (``onnx.checker.check_model(path)``), as onnx
    asks for models over 2 GiB.

    Raises
    ------
    OnnxcalError
        The file is missing, empty, too large, is not an ONNX model, fails
        onnx's checker, or points outside its directory for external data.
    """
    p = _sized_model_file(path, max_bytes)
    model = _parse(p)
    if model.ir_version == 0 or not model.graph.output:
        raise OnnxcalError(
            f"'{p}' is not an ONNX model (no IR version or no graph outputs)",
            "give the path of an .onnx file exported by your framework",
        )
    if (field_name := _non_text(model)) is not None:
        raise OnnxcalError(
            f"'{p}' is damaged: its field {field_name} holds bytes that are not UTF-8 text",
            "re-export the model",
        )
    locations = _external_locations(model)
    files = _check_locations(locations, p)
    if files:
        left = [t.name for t in _model_tensors(model, dense=False) if is_external(t)]
        if left:
            raise OnnxcalError(
                f"'{p}' keeps tensor '{left[0]}' in external data where onnx does not load it "
                "(e.g. a sparse initializer)",
                "save the model with that tensor inside the .onnx file",
            )
        sizes = {loc: f.stat().st_size for loc, f in zip(locations, files, strict=True)}
        if count_external:
            by_file = {f.resolve(): n for f, n in zip(files, sizes.values(), strict=True)}  # one file, named twice
            check_model_size(p, sum(by_file.values()), max_bytes)
        try:
            external.resolve(_model_tensors(model), p.resolve().parent, sizes)
        except OSError as exc:
            raise OnnxcalError(
                f"cannot read the external data of '{p}' ({exc.strerror or exc})",
                "check that the weights file beside it is readable",
            ) from exc
    try:
        onnx.checker.check_model(str(p))
    except Exception as exc:
        raise OnnxcalError(
            f"'{p}' fails the ONNX checker: {first_line(exc)}",
            "re-export the model or repair it before calibrating",
        ) from exc
    return model


_HASH_BLOCK = 1 << 22


class _Stopped(Exception):
    """A hash stopped before its end (:meth:`SourceHash.close`)."""


def _check_stop(stop: threading.Event | None) -> None:
    if stop is not None and stop.is_set():
        raise _Stopped


def _hash_range(digest: Any, fd: int, offset: int, length: int | None, stop: threading.Event | None = None) -> None:
    """Feed ``length`` bytes of ``fd`` from ``offset`` (None: to the end) to ``digest``.

    One buffer is read into again and again (a new bytes object per read
    would have its pages cleared by the kernel first); the holes of a
    sparse file are hashed as the zeros they read as, without reading them.
    Once ``stop`` is set, the next block raises ``_Stopped``.
    """
    end = os.fstat(fd).st_size if length is None else offset + length
    buffer = memoryview(bytearray(_HASH_BLOCK))
    zeros = memoryview(bytes(_HASH_BLOCK))
    pos = offset
    for start, run_end in [*_data_runs(fd, offset, end), (end, end)]:
        while pos < start:  # a hole before this run
            _check_stop(stop)
            n = min(_HASH_BLOCK, start - pos)
            digest.update(zeros[:n])
            pos += n
        while pos < run_end:
            _check_stop(stop)
            n = os.preadv(fd, [buffer[:min(_HASH_BLOCK, run_end - pos)]], pos)
            if n == 0:
                raise OSError(errno.EIO, f"the file ends {end - pos} bytes early")
            digest.update(buffer[:n])
            pos += n


def _sha256_contained(folder: Path, location: str, stop: threading.Event | None = None) -> str:
    digest = hashlib.sha256()
    fd = open_contained(folder, location)
    try:
        _hash_range(digest, fd, 0, None, stop)
    finally:
        os.close(fd)
    return digest.hexdigest()


def _file_sha256(p: Path, stop: threading.Event | None) -> str:
    """:func:`~onnxcal._paths.sha256_file` (read to the end, the same error), stopping once ``stop`` is set."""
    if stop is None:
        return sha256_file(p)
    digest, buffer = hashlib.sha256(), memoryview(bytearray(_HASH_BLOCK))
    try:
        with open(p, "rb", buffering=0) as fh:
            while n := fh.readinto(buffer):
                _check_stop(stop)
                digest.update(buffer[:n])
    except OSError as exc:
        raise OnnxcalError(f"cannot read '{p}': {exc.strerror or exc}", "check that the file is readable") from exc
    return digest.hexdigest()


def _listing_line(digest: str, name: str) -> str:
    """A line as GNU ``sha256sum`` prints it; a name holding a backslash or newline is escaped
    (``\\\\``, ``\\n``) and the line starts with a backslash."""
    if "\\" not in name and "\n" not in name:
        return f"{digest}  {name}\n"
    return "\\" + f"{digest}  " + name.replace("\\", "\\\\").replace("\n", "\\n") + "\n"


def model_sha256(path: str | os.PathLike[str], *, stop: threading.Event | None = None) -> str:
    """The SHA-256 that identifies a model: of its file, and with external data of its files' listing.

    Without external data: the file's SHA-256 (``sha256sum model.onnx``).
    With external data: the SHA-256 of the listing ``sha256sum`` prints for
    the model file read from standard input (its name does not count: a
    renamed copy is the same model) followed by each distinct external-data
    location the model names, sorted by code point (``LC_ALL=C sort``), as
    written in the model, from the model's folder::

        cd MODEL_FOLDER && { sha256sum < model.onnx; sha256sum LOCATION...; } | sha256sum

    Every byte is read, streamed; the locations are checked as by
    :func:`load_model` first (docs/graph.md). :class:`SourceHash` runs this
    on a second thread (``stop`` ends it early).
    """
    p = Path(path)
    try:
        model = onnx.load(str(p), load_external_data=False)
    except Exception:  # not a model: hash the bytes (load_model says what is wrong)
        return _file_sha256(p, stop)
    locations = _external_locations(model)
    if not locations:
        return _file_sha256(p, stop)
    _check_locations(locations, p)
    folder = p.resolve().parent
    lines = [_listing_line(_file_sha256(p, stop), "-")]
    try:
        lines += [_listing_line(_sha256_contained(folder, loc, stop), loc) for loc in locations]
    except OSError as exc:
        raise OnnxcalError(f"cannot read the external data of '{p}' ({exc.strerror or exc})",
                           "check that the weights files beside it are readable") from exc
    return sha256_bytes("".join(lines).encode())


class SourceHash:
    """:func:`model_sha256` of a model, computed on a second thread while the caller works on.

    The reads and hashlib release the GIL (hashlib on buffers over 2 KiB), so
    ``patch`` copies the weights into the output's data file (the kernel's
    copy) on one core while the source is hashed on the other; the record,
    which holds the hash, is written last. :meth:`result` waits for the
    hash and raises what :func:`model_sha256` raised; :meth:`close` (also
    on leaving a ``with`` block) stops it early, within one block of 4 MiB,
    and waits for the thread to end, so that a refusal is not held up by a
    hash nobody needs.
    """

    def __init__(self, path: str | os.PathLike[str]) -> None:
        self._stop = threading.Event()
        self._value: str | None = None
        self._error: BaseException | None = None
        self._thread = threading.Thread(target=self._run, args=(path,), name="onnxcal-source-hash", daemon=True)
        self._thread.start()

    def _run(self, path: str | os.PathLike[str]) -> None:
        try:
            self._value = model_sha256(path, stop=self._stop)
        except BaseException as exc:  # handed to the thread that asks for the result
            self._error = exc

    def result(self) -> str:
        """The hash, once computed (raises the hash's error, e.g. an unreadable data file)."""
        self._thread.join()
        if self._error is not None:
            raise self._error
        assert self._value is not None  # the thread ended without an error
        return self._value

    def close(self) -> None:
        """Stop the hash, if it still runs, and wait for its thread."""
        self._stop.set()
        self._thread.join()

    def __enter__(self) -> SourceHash:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def _repeated(fd: Any) -> bool:
    flag = getattr(fd, "is_repeated", None)  # protobuf >= 6; older ones have only the label
    return bool(flag) if flag is not None else fd.label == fd.LABEL_REPEATED


def _non_text(message: Any) -> str | None:
    """The first string field (depth first) of a protobuf message whose value is not text.

    protobuf hands over the bytes of a ``string`` field that is not valid
    UTF-8 as ``bytes``; every name in onnx and onnxruntime is text.
    """
    for fd, value in message.ListFields():
        if fd.type not in (fd.TYPE_STRING, fd.TYPE_MESSAGE):
            continue
        for v in value if _repeated(fd) else (value,):
            if fd.type == fd.TYPE_STRING:
                if not isinstance(v, str):
                    return cast(str, fd.full_name)
            elif (found := _non_text(v)) is not None:
                return found
    return None


ALIGN = 1 << 16
"""Tensors of at least ``ALIGN_FROM`` bytes start at a multiple of this in the data file (as onnx's
``save_model`` aligns them: 64 KiB, the allocation granularity a memory map needs on Windows)."""
ALIGN_FROM = 1 << 20


def _plan_data(model: onnx.ModelProto, location: str) -> tuple[onnx.ModelProto, list[tuple[int, Span | bytes]], int]:
    """A copy of ``model`` whose weights are in ``location``, and what goes where in that file.

    Every tensor still in a file, and every initializer of the main graph
    holding at least ``EXTERNAL_THRESHOLD`` bytes, in the order the model
    lists them; each piece is a :class:`~onnxcal.graph.external.Span` to
    copy, or bytes (a tensor in memory, e.g. a folded weight).
    """
    copy = onnx.ModelProto()
    copy.CopyFrom(model)
    main = len(copy.graph.initializer)  # _model_tensors yields these first
    pieces: list[tuple[int, Span | bytes]] = []
    end = 0
    for i, t in enumerate(_model_tensors(copy)):
        if is_external(t):
            span = external.span(t)
            piece: Span | bytes = span
            length = span.length
        elif i < main and t.HasField("raw_data") and len(t.raw_data) >= EXTERNAL_THRESHOLD:
            piece = t.raw_data
            length = len(piece)
            t.ClearField("raw_data")
            t.data_location = onnx.TensorProto.EXTERNAL
        else:
            continue
        if length >= ALIGN_FROM:
            end = -(-end // ALIGN) * ALIGN
        external._point_to(t, location, end, length)
        pieces.append((end, piece))
        end += length
    return copy, pieces, end


def _data_writer(pieces: list[tuple[int, Span | bytes]], size: int) -> Writer:
    """Writes the data file: each span copied from its file (:func:`~onnxcal._files.copy_range`).

    The file is new (a temporary), so the holes of a sparse source stay holes.
    """

    def write(path: Path) -> None:
        sources: dict[tuple[str, str], int] = {}
        fh = Path(path).open("r+b")  # noqa: SIM115 (closed below, with the sources)
        fd = fh.fileno()
        try:
            for offset, piece in pieces:
                if isinstance(piece, bytes):
                    view, done = memoryview(piece), 0
                    while done < len(view):
                        done += os.pwrite(fd, view[done:done + (1 << 26)], offset + done)
                    continue
                key = (piece.folder, piece.location)
                if key not in sources:
                    sources[key] = open_contained(piece.folder, piece.location)
                if os.fstat(sources[key]).st_size < piece.offset + piece.length:
                    raise OnnxcalError(
                        f"external data file '{piece.location}' in '{piece.folder}' is shorter than when the "
                        "model was loaded", "keep the model's files unchanged while onnxcal runs",
                    )
                copy_range(sources[key], fd, piece.length, piece.offset, offset, skip_holes=True)
            os.ftruncate(fd, size)
            os.fsync(fd)  # now, while a SourceHash may still run (the write's own fsync then finds nothing to do)
        finally:
            fh.close()
            for src in sources.values():
                os.close(src)

    return write


def external_data_path(path: str | os.PathLike[str]) -> Path:
    """Where ``save_model(..., external=True)`` puts the weights of ``path``."""
    p = Path(path)
    return p.with_name(p.name + ".data")


def _check_room(path: Path, needed: int) -> None:
    """Refuse a write that the output's file system has no room for, before writing."""
    folder = path.parent if str(path.parent) else Path(".")
    try:
        free = shutil.disk_usage(folder).free
    except OSError:
        return
    if needed > free:
        raise OnnxcalError(
            f"writing '{path}' and its data file needs {format_bytes(needed)}, and only {format_bytes(free)} "
            f"is free on its disk",
            "free space on that disk or write the output elsewhere; no output was written",
        )


Finish = Callable[[onnx.ModelProto], None]
"""Completes, in place, the model about to be serialised, once the data file is written (see
:func:`model_files`); it must not change the serialised size (e.g. a pending hash of the same length)."""


def model_files(
    model: onnx.ModelProto, path: str | os.PathLike[str], *, external: bool = False, finish: Finish | None = None
) -> dict[Path, bytes | Writer]:
    """What ``save_model`` writes: ``path``'s bytes, and with external data ``<path>.data``'s writer.

    With ``external`` (always, when tensors of ``model`` are still in their
    files), the weights go to ``<path>.data`` beside it: every tensor still
    in a file, streamed from it (never held in memory; copied, so the output
    does not depend on the input's files), and the initializers of at least
    ``EXTERNAL_THRESHOLD`` bytes held in memory. The layout is deterministic:
    the same model gives the same bytes.

    ``finish``: ``path`` becomes a writer that first calls ``finish`` on the
    message it serialises (``model`` itself, or with external data its
    copy that points at the data file), after the data file is written.
    ``patch`` fills in the source hash this way, computed meanwhile by a
    :class:`SourceHash`.
    """
    if not external and not external_tensors_of(model):
        return {Path(path): model.SerializeToString() if finish is None else _graph_writer(model, finish)}
    data = external_data_path(path)
    copy, pieces, size = _plan_data(model, data.name)
    graph_bytes = copy.SerializeToString()
    _check_room(Path(path), size + len(graph_bytes))
    graph_file = graph_bytes if finish is None else _graph_writer(copy, finish)
    return {data: _data_writer(pieces, size), Path(path): graph_file}


def _graph_writer(model: onnx.ModelProto, finish: Finish) -> Writer:
    def write(path: Path) -> None:
        finish(model)
        Path(path).write_bytes(model.SerializeToString())

    return write


def saved_sha256(model: onnx.ModelProto, path: str | os.PathLike[str], *, external: bool = False) -> str:
    """:func:`model_sha256` of the files ``save_model(model, path, external=...)`` writes, before writing them.

    The weights are streamed from their files through the hash (read once more).
    """
    if not external and not external_tensors_of(model):
        return sha256_bytes(model.SerializeToString())
    data = external_data_path(path)
    copy, pieces, size = _plan_data(model, data.name)
    graph_bytes = copy.SerializeToString()
    digest, end = hashlib.sha256(), 0
    for offset, piece in pieces:
        digest.update(bytes(offset - end))
        if isinstance(piece, bytes):
            digest.update(piece)
        else:
            fd = open_contained(piece.folder, piece.location)
            try:
                _hash_range(digest, fd, piece.offset, piece.length)
            finally:
                os.close(fd)
        end = offset + (len(piece) if isinstance(piece, bytes) else piece.length)
    digest.update(bytes(size - end))
    listing = _listing_line(sha256_bytes(graph_bytes), "-") + _listing_line(digest.hexdigest(), data.name)
    return sha256_bytes(listing.encode())


def external_tensors_of(model: onnx.ModelProto) -> bool:
    """True when some tensor of ``model`` is still in its file."""
    return any(is_external(t) for t in _model_tensors(model))


def save_model(
    model: onnx.ModelProto, path: str | os.PathLike[str], *, external: bool = False, finish: Finish | None = None
) -> None:
    """Write ``model`` atomically to ``path`` (see :func:`model_files`, also for ``finish``).

    With external data both files are complete before either is renamed into
    place, the data file first: an error in ``finish`` leaves neither.
    """
    files = model_files(model, path, external=external, finish=finish)
    atomic_write_files(cast("Mapping[str | os.PathLike[str], bytes | Writer]", files))
