"""Reading and writing model files: size limits, checked external data, atomic saves."""

from __future__ import annotations

import os
from collections.abc import Iterator
from pathlib import Path, PureWindowsPath

import onnx

from .._files import atomic_write_files, require_file
from .._limits import DEFAULT_MAX_MODEL_BYTES, check_model_size
from ..errors import OnnxcalError, first_line
from .tensors import EXTERNAL_THRESHOLD


def _attribute_tensors(a: onnx.AttributeProto) -> Iterator[onnx.TensorProto]:
    """Tensors an attribute holds, whatever its declared type says (a hostile file may
    set ``t`` on an INT attribute; onnx's loader would still read it)."""
    if a.HasField("t"):
        yield a.t
    yield from a.tensors
    for sparse in [a.sparse_tensor] * a.HasField("sparse_tensor") + list(a.sparse_tensors):
        yield sparse.values
        yield sparse.indices
    for g in [a.g] * a.HasField("g") + list(a.graphs):
        yield from _tensors(g)


def _tensors(graph: onnx.GraphProto) -> Iterator[onnx.TensorProto]:
    """Every tensor of a graph: initializers (sparse ones too), attributes, subgraphs'."""
    yield from graph.initializer
    for sparse in graph.sparse_initializer:
        yield sparse.values
        yield sparse.indices
    for node in graph.node:
        for a in node.attribute:
            yield from _attribute_tensors(a)


def _model_tensors(model: onnx.ModelProto) -> Iterator[onnx.TensorProto]:
    """Every tensor of a model: its graph's and those of its local functions."""
    yield from _tensors(model.graph)
    for function in model.functions:
        for node in function.node:
            for a in node.attribute:
                yield from _attribute_tensors(a)


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
        raise OnnxcalError(f"cannot read model '{p}': {exc.strerror or exc}", "check that the file is readable") from exc
    except Exception as exc:  # protobuf DecodeError, ...
        raise OnnxcalError(
            f"'{p}' is not a readable ONNX model (its bytes do not parse as an ONNX ModelProto: "
            "a truncated download, or another kind of file)",
            "give the path of an .onnx file exported by your framework",
        ) from exc


def _sized_model_file(path: str | os.PathLike, max_bytes: int) -> Path:
    p = require_file(path, "model")
    check_model_size(p, 0, max_bytes)
    if p.stat().st_size == 0:
        raise OnnxcalError(f"'{p}' is empty (0 bytes)", "give the path of an .onnx file exported by your framework")
    return p


def external_data_files(
    path: str | os.PathLike, *, max_bytes: int = DEFAULT_MAX_MODEL_BYTES
) -> tuple[Path, ...]:
    """The external data files a model file uses (checked to lie beside it)."""
    p = _sized_model_file(path, max_bytes)
    try:
        model = onnx.load(str(p), load_external_data=False)
    except Exception:  # load_model reports unreadable files
        return ()
    return _check_locations(_external_locations(model), p)


def load_model(path: str | os.PathLike, *, max_bytes: int = DEFAULT_MAX_MODEL_BYTES) -> onnx.ModelProto:
    """Load and check an ONNX model file, with errors that name the file.

    The file (plus its external data) must be at most ``max_bytes``, checked
    before it is read. External data are read from the model's directory; a
    location that could lead outside it (absolute, ``..``, a symlink, a
    hard link) is refused before any read, and so is external data left in
    a tensor onnx does not load (onnxruntime would look for it elsewhere).

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
    files = _check_locations(_external_locations(model), p)
    if files:
        check_model_size(p, sum(f.stat().st_size for f in set(files)), max_bytes)
        try:
            onnx.external_data_helper.load_external_data_for_model(model, str(p.resolve().parent))
        except Exception as exc:
            raise OnnxcalError(
                f"cannot read the external data of '{p}' ({first_line(exc)})",
                "check that the weights file beside it is complete",
            ) from exc
        left = [t.name for t in _model_tensors(model) if t.data_location == onnx.TensorProto.EXTERNAL]
        if left:
            raise OnnxcalError(
                f"'{p}' keeps tensor '{left[0]}' in external data where onnx does not load it "
                "(e.g. a sparse initializer)",
                "save the model with that tensor inside the .onnx file",
            )
    try:
        onnx.checker.check_model(model)
    except Exception as exc:
        raise OnnxcalError(
            f"'{p}' fails the ONNX checker: {first_line(exc)}",
            "re-export the model or repair it before calibrating",
        ) from exc
    return model


def _repeated(fd) -> bool:
    flag = getattr(fd, "is_repeated", None)  # protobuf >= 6; older ones have only the label
    return bool(flag) if flag is not None else fd.label == fd.LABEL_REPEATED


def _non_text(message) -> str | None:
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
                    return fd.full_name
            elif (found := _non_text(v)) is not None:
                return found
    return None


def _split_external(model: onnx.ModelProto, location: str) -> bytes:
    """Move large initializers of ``model`` (in place) to one external-data blob."""
    blob = bytearray()
    for init in model.graph.initializer:
        if init.HasField("raw_data") and len(init.raw_data) >= EXTERNAL_THRESHOLD:
            raw = init.raw_data
            entries = {"location": location, "offset": str(len(blob)), "length": str(len(raw))}
            blob += raw
            init.ClearField("raw_data")
            init.data_location = onnx.TensorProto.EXTERNAL
            del init.external_data[:]
            for key, value in entries.items():
                entry = init.external_data.add()
                entry.key, entry.value = key, value
    return bytes(blob)


def external_data_path(path: str | os.PathLike) -> Path:
    """Where ``save_model(..., external=True)`` puts the weights of ``path``."""
    p = Path(path)
    return p.with_name(p.name + ".data")


def model_files(model: onnx.ModelProto, path: str | os.PathLike, *, external: bool = False) -> dict[Path, bytes]:
    """The bytes of each file ``save_model`` writes: ``path``, and with ``external`` ``<path>.data``.

    With ``external``, initializers of at least ``EXTERNAL_THRESHOLD`` bytes
    go to ``<path>.data`` beside it.
    """
    if not external:
        return {Path(path): model.SerializeToString()}
    copy = onnx.ModelProto()
    copy.CopyFrom(model)
    data = external_data_path(path)
    blob = _split_external(copy, data.name)
    return {data: blob, Path(path): copy.SerializeToString()}


def save_model(model: onnx.ModelProto, path: str | os.PathLike, *, external: bool = False) -> None:
    """Serialise ``model`` and write it atomically to ``path`` (see :func:`model_files`).

    With external data both files are complete before either is renamed into place.
    """
    atomic_write_files(model_files(model, path, external=external))
