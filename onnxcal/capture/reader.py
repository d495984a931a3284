"""Capture files read, and several merged into one (the shards of a set)."""

from __future__ import annotations

import json
import os
import warnings
from collections.abc import Sequence
from dataclasses import replace

import numpy as np

from .._paths import require_file
from ..data import read_npz
from ..errors import OnnxcalError, OnnxcalWarning, first_line
from .result import Capture, CaptureMeta
from .rows import label_rows


def load_capture(path: str | os.PathLike[str]) -> Capture:
    """Read a capture file written by :func:`capture` or :func:`save_capture`.

    The logits are a read-only memory map of the file.

    Raises
    ------
    OnnxcalError
        Not a capture file, or its arrays have the wrong shape or type.
    """
    p = require_file(path, "capture file")
    hint = "give a file written by 'onnxcal capture'"
    try:
        arrays = read_npz(p, hint)
        logits, labels, meta_json = arrays["logits"], np.asarray(arrays["labels"]), str(arrays["meta"])
        meta = CaptureMeta.from_dict(json.loads(meta_json))
    except OnnxcalError as exc:
        raise OnnxcalError(f"'{p}' is not an onnxcal capture file ({exc.message})", hint) from exc
    except Exception as exc:  # missing arrays, a meta that is not the JSON onnxcal writes, ...
        raise OnnxcalError(f"'{p}' is not an onnxcal capture file ({first_line(exc)})", hint) from exc
    if logits.ndim != 2 or logits.dtype.kind != "f":
        raise OnnxcalError(f"'{p}' holds logits of shape {logits.shape} ({logits.dtype})", hint)
    labels = label_rows(labels, logits.shape, meta.fit_as, str(p))
    indices = arrays.get("indices")
    if indices is not None:
        indices = np.asarray(indices)
        if indices.ndim != 1 or indices.dtype.kind not in "iu" or len(indices) == 0 or logits.shape[0] % len(indices):
            raise OnnxcalError(f"'{p}' holds sample indices of shape {indices.shape} ({indices.dtype})", hint)
        indices = indices.astype(np.int64)
    return Capture(logits=logits, labels=labels, meta=meta, indices=indices)


_SAME = (
    ("model_sha256", "were captured from different models (sha256)"),
    ("output", "hold different model outputs"),
    ("scores", "hold different logits tensors"),
    ("activation", "hold scores with different activations"),
    ("logits_from", "read the output differently (how the logits were obtained)"),
    ("fit_as", "are fitted as different kinds (softmax or sigmoid)"),
    ("class_axis", "have different class axes"),
    ("num_classes", "have different numbers of classes"),
    ("class_names", "have different class lists"),
    ("constants", "were run with different constant inputs (--constant)"),
    ("batch_axes", "were run with different batch axes (--batch-axis)"),
)


def merge_captures(captures: Sequence[Capture], sources: Sequence[str]) -> Capture:
    """One capture from several of one model, output and class list.

    Rows are identified by the validation set's fingerprint and row number;
    two captures holding the same row are refused. The merged rows are in
    row order per set, so the shards of a set merge into exactly the
    capture of the whole set.

    Raises
    ------
    OnnxcalError
        The captures differ in model, output or class list, or overlap.
    """
    if len(captures) == 1:
        return captures[0]
    _check_alike(captures, sources)
    r = _rows_per_sample(captures, sources)
    groups: dict[str, list[int]] = {}
    for i, cap in enumerate(captures):
        key = cap.meta.data_id or f"\0unidentified-{i}"  # files from before fingerprints
        groups.setdefault(key, []).append(i)
    samples = np.concatenate([_samples_in_order(captures, sources, members) for members in groups.values()])
    rows = (samples[:, None] * r + np.arange(r)).ravel()
    logits = np.concatenate([np.asarray(c.logits) for c in captures])[rows]
    labels = np.concatenate([c.labels for c in captures])[rows]
    indices = np.concatenate([c.sample_indices() for c in captures])[samples]
    first = captures[0].meta
    meta = replace(
        first,
        n=int(len(logits)),
        data_source=" + ".join(dict.fromkeys(c.meta.data_source for c in captures)),
        data_total=sum(captures[m[0]].meta.data_total for m in groups.values()),
        shard=None,
        limit=None,
        batching=",".join(sorted({c.meta.batching for c in captures} - {""})),
        merged_from=tuple(str(s) for s in sources),
    )
    return Capture(logits, labels, meta, indices)


def _check_alike(captures: Sequence[Capture], sources: Sequence[str]) -> None:
    """Every capture of one model output, read alike, with one class list (and one preprocessing per set)."""
    first = captures[0].meta
    for cap, src in zip(captures[1:], sources[1:], strict=True):
        for key, what in _SAME:
            a, b = getattr(first, key), getattr(cap.meta, key)
            if a != b:
                raise OnnxcalError(
                    f"'{sources[0]}' and '{src}' {what} ({_short(a)} vs {_short(b)})",
                    "merge only captures of one model output with one class list",
                )
        if cap.meta.data_id == first.data_id and cap.meta.preprocess != first.preprocess:
            raise OnnxcalError(
                f"'{sources[0]}' and '{src}' read the same images with different preprocessing",
                "capture every shard with the same preprocessing options",
            )


def _rows_per_sample(captures: Sequence[Capture], sources: Sequence[str]) -> int:
    """The score rows per sample, one number for every capture."""
    per_sample = {len(c.labels) // len(c.sample_indices()) for c in captures}
    if len(per_sample) != 1:
        raise OnnxcalError(
            f"the captures {', '.join(sources)} hold different numbers of score rows per sample",
            "merge only captures of inputs of one size",
        )
    (r,) = per_sample
    return r


def _samples_in_order(captures: Sequence[Capture], sources: Sequence[str], members: list[int]) -> np.ndarray:
    """The samples of the captures ``members`` (of one set) in the set's row order, as positions in the
    concatenation of all captures' samples; a row held twice is refused, and the shards' coverage checked."""
    offsets = np.cumsum([0] + [len(c.sample_indices()) for c in captures])
    idx = np.concatenate([captures[i].sample_indices() for i in members])
    owner = np.concatenate([np.full(len(captures[i].sample_indices()), i) for i in members])
    where = np.concatenate([offsets[i] + np.arange(len(captures[i].sample_indices())) for i in members])
    perm = np.argsort(idx, kind="stable")
    dup = np.flatnonzero(idx[perm][1:] == idx[perm][:-1])
    if dup.size:
        a, b = owner[perm][dup[0]], owner[perm][dup[0] + 1]
        raise OnnxcalError(
            f"'{sources[a]}' and '{sources[b]}' both hold row {int(idx[perm][dup[0]])} of "
            f"'{captures[a].meta.data_source}' ({dup.size} shared rows in all)",
            "capture each shard once, with the same --shuffle-seed and distinct --shard I/N",
        )
    _check_coverage([captures[i] for i in members], [sources[i] for i in members])
    return where[perm]


def _check_coverage(parts: Sequence[Capture], sources: Sequence[str]) -> None:
    """Shards i/N of one set, all present, must cover it; warn when some are missing."""
    metas = [c.meta for c in parts]
    shards = [m.shard for m in metas if m.shard is not None]
    if len(shards) < len(metas) or any(m.limit is not None for m in metas):
        return
    counts = {int(s.split("/")[1]) for s in shards}
    seeds = {m.shuffle_seed for m in metas}
    if len(counts) != 1 or len(seeds) != 1:
        return
    (n_shards,) = counts
    have = {int(s.split("/")[0]) for s in shards}
    samples = sum(len(c.sample_indices()) for c in parts)
    if have == set(range(1, n_shards + 1)):
        if samples != metas[0].data_total:
            raise OnnxcalError(
                f"the {n_shards} shards ({', '.join(sources)}) hold {samples} rows of "
                f"'{metas[0].data_source}', which has {metas[0].data_total}",
                "capture every shard with the same data, --shuffle-seed and onnxcal/numpy versions",
            )
        return
    missing = sorted(set(range(1, n_shards + 1)) - have)
    warnings.warn(
        OnnxcalWarning(
            f"merging {len(have)} of {n_shards} shards of '{metas[0].data_source}'; "
            f"shard(s) {', '.join(str(m) for m in missing)} missing"
        ),
        stacklevel=4,  # the caller of merge_captures
    )


def _short(value: object) -> str:
    text = str(value)
    return text[:12] + "..." if len(text) > 15 else text


def load_captures(paths: str | os.PathLike[str] | Sequence[str | os.PathLike[str]]) -> Capture:
    """Load one capture file, or several merged into one (see :func:`merge_captures`)."""
    if isinstance(paths, (str, os.PathLike)):
        paths = [paths]
    paths = list(paths)
    if not paths:
        raise OnnxcalError("no capture files given", "give at least one file written by 'onnxcal capture'")
    return merge_captures([load_capture(p) for p in paths], [str(p) for p in paths])
