"""External data left on disk: where a loaded model's weights are, reading one tensor, copying them out.

A model loaded by :func:`onnxcal.graph.load_model` keeps every external tensor
of at least ``RESIDENT_BYTES`` in its file: the tensor's ``external_data``
entries keep the location as the model names it, and gain one entry,
``FOLDER_KEY``, holding the model's folder (resolved, absolute), so that the
model in memory says where its weights are wherever it is copied (``expose``,
``patch``, ``at_identity``). Smaller external tensors (biases, shapes, a
class-score layer's scale) are read in at load time, so the score finder and
the records see their values like any constant.

That entry is onnxcal's own and exists only in memory: onnxruntime refuses
keys it does not know, so :func:`for_onnxruntime` gives it a copy without
them (locations relative to one folder, named in the session options), and
``io.model_files`` writes every tensor's new place in the output's own data
file. Every read goes through :func:`open_contained`, which repeats the
loader's checks as it opens the file (no symbolic link on the way, a regular
file with one link), so a file swapped after the check is refused, not read.
"""

from __future__ import annotations

import os
import stat
import tempfile
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path, PurePosixPath

import numpy as np
import onnx
from onnx import numpy_helper

from ..errors import OnnxcalError

FOLDER_KEY = "onnxcal.folder"
RESIDENT_BYTES = 1 << 20
"""External tensors smaller than this (1 MiB) are read into memory when a model is loaded."""

# onnxruntime's session option naming the folder external data are read from
# when a session is made from bytes (onnxruntime's session_options_config_keys.h).
ORT_FOLDER_OPTION = "session.model_external_initializers_file_folder_path"


def _attribute_tensors(a: onnx.AttributeProto, dense: bool = True) -> Iterator[onnx.TensorProto]:
    """Tensors an attribute holds, whatever its declared type says (a hostile file may
    set ``t`` on an INT attribute; onnx's loader would still read it); with
    ``dense=False`` only the parts of sparse tensors."""
    if dense:
        if a.HasField("t"):
            yield a.t
        yield from a.tensors
    for sparse in [a.sparse_tensor] * a.HasField("sparse_tensor") + list(a.sparse_tensors):
        yield sparse.values
        yield sparse.indices
    for g in [a.g] * a.HasField("g") + list(a.graphs):
        yield from _tensors(g, dense)


def _tensors(graph: onnx.GraphProto, dense: bool = True) -> Iterator[onnx.TensorProto]:
    """Every tensor of a graph: initializers (sparse ones too), attributes, subgraphs'."""
    if dense:
        yield from graph.initializer
    for sparse in graph.sparse_initializer:
        yield sparse.values
        yield sparse.indices
    for node in graph.node:
        for a in node.attribute:
            yield from _attribute_tensors(a, dense)


def _model_tensors(model: onnx.ModelProto, dense: bool = True) -> Iterator[onnx.TensorProto]:
    """Every tensor of a model: its graph's and those of its local functions
    (``dense=False``: only the values and indices of sparse tensors, which onnx never loads)."""
    yield from _tensors(model.graph, dense)
    for function in model.functions:
        for node in function.node:
            for a in node.attribute:
                yield from _attribute_tensors(a, dense)


def is_external(t: onnx.TensorProto) -> bool:
    return t.data_location == onnx.TensorProto.EXTERNAL


def external_tensors(model: onnx.ModelProto) -> list[onnx.TensorProto]:
    """The tensors of ``model`` whose values are still in a file."""
    return [t for t in _model_tensors(model) if is_external(t)]


@dataclass(frozen=True)
class Span:
    """Where one external tensor's bytes are: ``length`` bytes at ``offset`` of ``location`` in ``folder``."""

    folder: str
    location: str
    offset: int
    length: int

    @property
    def path(self) -> Path:
        return Path(self.folder) / self.location


def _entries(t: onnx.TensorProto) -> dict[str, str]:
    """The ``external_data`` entries of ``t`` as a dict."""
    return {e.key: e.value for e in t.external_data}


def _number(t: onnx.TensorProto, entries: dict[str, str], key: str) -> int | None:
    text = entries.get(key)
    if text is None:
        return None
    if not text.isdigit():
        raise OnnxcalError(
            f"the external data {key} {text!r} of tensor '{t.name}' is not a number of bytes",
            "re-export the model, or save it without external data",
        )
    return int(text)


def open_contained(folder: str | os.PathLike[str], location: str) -> int:
    """A read-only descriptor of ``location`` inside ``folder``, opened component by component.

    Each directory on the way and the file itself are opened without
    following symbolic links (``O_NOFOLLOW``, relative to the descriptor of
    the one before), and the file must be a regular file with one link:
    the loader's checks (``io._check_location``) made again at the moment
    of reading, so a file swapped for a link since is refused.
    """
    parts = PurePosixPath(location).parts
    nofollow = getattr(os, "O_NOFOLLOW", 0)
    where = f"external data file '{location}' in '{folder}'"
    fd = os.open(folder, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
    try:
        for i, part in enumerate(parts):
            last = i == len(parts) - 1
            flags = os.O_RDONLY | nofollow | (0 if last else getattr(os, "O_DIRECTORY", 0))
            try:
                nxt = os.open(part, flags, dir_fd=fd)
            except OSError as exc:
                raise OnnxcalError(
                    f"cannot open {where}: {exc.strerror or exc} (was it replaced, e.g. by a symbolic link, "
                    "since the model was loaded?)",
                    "keep the model's files unchanged while onnxcal runs",
                ) from exc
            os.close(fd)
            fd = nxt
        st = os.fstat(fd)
        if not stat.S_ISREG(st.st_mode) or st.st_nlink > 1:
            raise OnnxcalError(
                f"{where} is no longer a regular file with one link (was it replaced since the model was loaded?)",
                "keep the model's files unchanged while onnxcal runs",
            )
        opened, fd = fd, -1
        return opened
    finally:
        if fd >= 0:
            os.close(fd)


def _span(t: onnx.TensorProto, folder: str | None = None, size: int | None = None) -> Span:
    """The span of an external tensor; ``size`` (its file's) fills in a missing length and checks the end."""
    entries = _entries(t)
    folder = entries.get(FOLDER_KEY, folder)
    if folder is None:
        raise OnnxcalError(
            f"tensor '{t.name}' keeps its values in external data, and the model was not loaded from a file",
            "load the model with onnxcal.graph.load_model, which notes where its external data are",
        )
    location = entries.get("location", "")
    offset = _number(t, entries, "offset") or 0
    length = _number(t, entries, "length")
    if size is not None:
        if length is None:
            length = max(0, size - offset)
        if offset + length > size:
            raise OnnxcalError(
                f"the external data of tensor '{t.name}' end at byte {offset + length} of '{location}', "
                f"which holds {size} bytes",
                "check that the weights file beside the model is complete",
            )
    if length is None:
        fd = open_contained(folder, location)
        try:
            length = max(0, os.fstat(fd).st_size - offset)
        finally:
            os.close(fd)
    return Span(folder, location, offset, length)


def span(t: onnx.TensorProto) -> Span:
    """Where the bytes of an external tensor of a loaded model are."""
    return _span(t)


def read_span(where: Span) -> bytes:
    """The bytes of one span (read with ``os.pread``, the file opened by :func:`open_contained`)."""
    fd = open_contained(where.folder, where.location)
    try:
        chunks, done = [], 0
        while done < where.length:
            chunk = os.pread(fd, min(where.length - done, 1 << 26), where.offset + done)
            if not chunk:
                raise OnnxcalError(
                    f"external data file '{where.location}' in '{where.folder}' ends before byte "
                    f"{where.offset + where.length}",
                    "check that the weights file beside the model is complete",
                )
            chunks.append(chunk)
            done += len(chunk)
        return b"".join(chunks)
    finally:
        os.close(fd)


def _make_resident(t: onnx.TensorProto, raw: bytes) -> None:
    t.ClearField("external_data")
    t.data_location = onnx.TensorProto.DEFAULT
    t.raw_data = raw


def tensor_array(t: onnx.TensorProto) -> np.ndarray:
    """``numpy_helper.to_array``, also for a tensor whose values are still in a file (read now)."""
    if not is_external(t):
        return numpy_helper.to_array(t)
    copy = onnx.TensorProto()
    copy.CopyFrom(t)
    _make_resident(copy, read_span(span(t)))
    return numpy_helper.to_array(copy)


def resolve(tensors: Iterable[onnx.TensorProto], folder: Path, sizes: dict[str, int]) -> None:
    """At load: note ``folder`` in every external tensor; read in those under ``RESIDENT_BYTES``.

    ``sizes`` gives each location's file size, to check that every span
    lies inside its file (a cut file is refused here, not in onnxruntime).
    """
    for t in tensors:
        if not is_external(t):
            continue
        where = _span(t, str(folder), sizes[_entries(t).get("location", "")])
        if where.length < RESIDENT_BYTES:
            _make_resident(t, read_span(where))
        else:
            entry = t.external_data.add()
            entry.key, entry.value = FOLDER_KEY, str(folder)


def _point_to(t: onnx.TensorProto, location: str, offset: int | None = None, length: int | None = None) -> None:
    """Make ``t`` name ``location`` (and ``offset``, ``length``), without onnxcal's folder entry."""
    entries = {"location": location}
    old = _entries(t)
    if offset is not None or "offset" in old:
        entries["offset"] = str(old.get("offset", "0") if offset is None else offset)
    if length is not None or "length" in old:
        entries["length"] = str(old["length"] if length is None else length)
    del t.external_data[:]
    for key, value in entries.items():
        entry = t.external_data.add()
        entry.key, entry.value = key, value


def for_onnxruntime(model: onnx.ModelProto) -> tuple[bytes, str | None]:
    """The bytes to give onnxruntime, and the folder its external data are named from (None: none).

    External tensors may come from several folders (a patched model's
    weights next to the original's, for the identity check); their
    locations become relative to the folders' common one.
    """
    tensors = external_tensors(model)
    if not tensors:
        return model.SerializeToString(), None
    copy = onnx.ModelProto()
    copy.CopyFrom(model)
    tensors = external_tensors(copy)
    spans = [span(t) for t in tensors]
    common = os.path.commonpath([s.folder for s in spans])
    for t, s in zip(tensors, spans, strict=True):
        inner = os.path.relpath(s.folder, common)
        _point_to(t, s.location if inner == "." else PurePosixPath(Path(inner).as_posix(), s.location).as_posix())
    return copy.SerializeToString(), common


CHECK_DATA_NAME = "weights.data"


def check_model(model: onnx.ModelProto) -> None:
    """``onnx.checker.check_model(full_check=True)``: on the message, or on a path when weights are external.

    onnx's checker looks for an external tensor's file beside the model
    (relative to the working directory for a message) but never reads it,
    and a message over 2 GiB cannot be checked at all. A model with
    external tensors is therefore written (its graph only) into a scratch
    folder beside an empty file its tensors name, and checked from that path.
    """
    if not external_tensors(model):
        onnx.checker.check_model(model, full_check=True)
        return
    copy = onnx.ModelProto()
    copy.CopyFrom(model)
    for t in external_tensors(copy):
        _point_to(t, CHECK_DATA_NAME, 0, span(t).length)
    with tempfile.TemporaryDirectory(prefix="onnxcal-check-") as scratch:
        path = Path(scratch) / "model.onnx"
        path.write_bytes(copy.SerializeToString())
        (Path(scratch) / CHECK_DATA_NAME).touch()
        onnx.checker.check_model(str(path), full_check=True)
