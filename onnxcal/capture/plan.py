"""The batch plan: a session and how to batch for it (a fixed batch dim freed in a copy when
that reproduces the model), one batch run, the memory one batch of inputs needs."""

from __future__ import annotations

import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import onnx

from .._limits import check_memory, format_bytes
from ..data import Dataset
from ..errors import OnnxcalError, OnnxcalWarning
from ..graph import tensor_spec
from .nonfinite import InputWatch
from .session import DEFAULT_BATCH, RunOptions, make_session, runtime_failure


def graph_inputs(model: onnx.ModelProto) -> list[onnx.ValueInfoProto]:
    """The model's inputs that are not initializers: what the data must feed."""
    init = {i.name for i in model.graph.initializer}
    return [vi for vi in model.graph.input if vi.name not in init]


def _fixed_batch(model: onnx.ModelProto) -> int | None:
    for vi in graph_inputs(model):
        shape = tensor_spec(vi).shape
        if shape and isinstance(shape[0], int) and shape[0] > 0:
            return shape[0]
    return None


def free_batch_dim(model: onnx.ModelProto, batch: int) -> onnx.ModelProto:
    """A copy of ``model`` whose inputs' and outputs' leading dim ``batch`` is symbolic.

    Intermediate shape annotations (``value_info``) are dropped from the copy
    so that onnxruntime infers them again; the copy is for running only.
    """
    out = onnx.ModelProto()
    out.CopyFrom(model)
    init = {i.name for i in out.graph.initializer}
    for vi in [*out.graph.input, *out.graph.output]:
        if vi.name in init or not vi.type.HasField("tensor_type"):
            continue
        dims = vi.type.tensor_type.shape.dim
        if len(dims) and dims[0].HasField("dim_value") and dims[0].dim_value == batch:
            dims[0].dim_param = "onnxcal_batch"
    del out.graph.value_info[:]
    return out


@dataclass(frozen=True)
class RunPlan:
    """A session and how to batch for it.

    ``mode`` is ``"batched"``, ``"freed"`` or ``"fixed"`` (see :class:`CaptureMeta`);
    ``pad`` is the fixed batch size that short batches are padded to; with
    ``grow`` the batch size ``step`` is automatic (see :func:`run_batches`).
    """

    session: Any  # an onnxruntime.InferenceSession (onnxruntime ships no type hints)
    names: tuple[str, ...]
    dtypes: Mapping[str, str | None]
    step: int
    pad: int | None
    mode: str
    grow: bool = False


def _dtypes(model: onnx.ModelProto, session: Any) -> dict[str, str | None]:
    """The dtype to cast each session input to (None when the model does not say)."""
    specs = {vi.name: tensor_spec(vi).dtype for vi in model.graph.input}
    return {
        i.name: (None if specs.get(i.name, "unknown") == "unknown" else specs[i.name]) for i in session.get_inputs()
    }


def _itemsize(dtype: str | None) -> int:
    try:
        return np.dtype(dtype).itemsize if dtype not in (None, "unknown") else 4
    except TypeError:
        return 4  # a non-tensor type: counted as float32


def check_input_memory(model: onnx.ModelProto, batch_size: int, dataset: Dataset | None = None) -> None:
    """Refuse a model whose inputs, for one batch, need more memory than is available.

    The batch dim counts as ``batch_size`` (or the model's fixed batch when
    larger); the other dims are the data's when ``dataset`` is given, else
    the model's declared ones (symbolic dims count as 1, so a declared shape
    alone is refused only when its fixed dims are too large). Checked before
    the data are read, and again before the model runs.

    Raises
    ------
    OnnxcalError
        Naming the largest input, its shape and ``--batch-size``.
    """
    needs = []
    for vi in graph_inputs(model):
        spec = tensor_spec(vi)
        if spec.shape is None or not spec.shape:
            continue
        first = spec.shape[0]
        batch = max(batch_size, first if isinstance(first, int) and first > 0 else 0)
        if dataset is not None and spec.name in dataset.inputs:
            row, where = tuple(dataset.inputs[spec.name].shape[1:]), "in the data"
        else:
            row, where = tuple(d if isinstance(d, int) and d > 0 else 1 for d in spec.shape[1:]), "declared"
        per_sample = int(np.prod(row, dtype=np.float64)) * _itemsize(spec.dtype)
        needs.append((batch * per_sample, per_sample, batch, spec, where))
    if not needs:
        return
    total = sum(n[0] for n in needs)
    _, per_sample, batch, spec, where = max(needs, key=lambda n: n[0])
    shape = "[" + ", ".join("?" if d is None else str(d) for d in spec.shape or ()) + "]"
    check_memory(
        total,
        f"a batch of {batch} samples of input '{spec.name}' (shape {shape} {where}, {spec.dtype}, "
        f"{format_bytes(per_sample)} per sample)",
        "lower --batch-size, or check the model's input shape",
    )


def plan_run(
    model: onnx.ModelProto,
    dataset: Dataset,
    names: Sequence[str],
    options: RunOptions | None = None,
) -> RunPlan:
    """Open a session for ``model`` and decide the batching (see the module docstring)."""
    options = options or RunOptions()
    grow = options.batch_size is None
    batch = DEFAULT_BATCH if options.batch_size is None else options.batch_size
    check_input_memory(model, batch, dataset)
    session = make_session(model, options)
    dtypes = _dtypes(model, session)
    fixed = _fixed_batch(model)
    if fixed is None:
        return RunPlan(session, tuple(names), dtypes, batch, None, "batched", grow)
    native = RunPlan(session, tuple(names), dtypes, fixed, fixed, "fixed")
    if batch <= fixed or dataset.n <= fixed:
        return native
    probe = min(batch, dataset.n)
    try:
        freed = RunPlan(make_session(free_batch_dim(model, fixed), options), tuple(names), dtypes,
                        batch, None, "freed", grow)
        got = run_batch(freed, dataset, 0, probe)
        reason = _disagreement(got, run_span(native, dataset, 0, probe), names, probe, fixed)
    except OnnxcalError as exc:
        reason = f"it fails on a batch of {probe} ({exc.message})"
    if reason is None:
        return freed
    warnings.warn(
        OnnxcalWarning(
            f"the model's batch dim is fixed at {fixed} and a copy with it freed does not "
            f"reproduce the exported model: {reason}; running {fixed} sample(s) per call instead, "
            "which is slower"
        ),
        stacklevel=2,
    )
    return native


def run_span(plan: RunPlan, dataset: Dataset, start: int, stop: int) -> list[np.ndarray]:
    """Selected rows ``start..stop-1`` run ``plan.step`` samples per call, the outputs concatenated."""
    parts = [run_batch(plan, dataset, s, min(s + plan.step, stop)) for s in range(start, stop, plan.step)]
    return [np.concatenate(p) for p in zip(*parts, strict=True)]


def _disagreement(
    got: list[np.ndarray], want: list[np.ndarray], names: Sequence[str], probe: int, fixed: int
) -> str | None:
    """Why a freed batch does not reproduce the exported model's runs, or None.

    Results of one sample computed alone or within a batch may differ in
    the last bits (kernels may sum in another order), so floats are compared
    to 1e-5 relative to their scale, or 8 units in the last place of a
    narrower dtype such as float16 (common practice).
    """
    for name, g, w in zip(names, got, want, strict=True):
        if g.shape != w.shape:
            return f"output '{name}' has shape {g.shape} for {probe} samples instead of {w.shape}"
        if w.dtype.kind == "f":
            scale = max(1.0, float(np.nanmax(np.abs(w)))) if w.size else 1.0
            err = float(np.nanmax(np.abs(g.astype(np.float64) - w))) if w.size else 0.0
            same_nan = np.array_equal(np.isnan(g), np.isnan(w))
            if not same_nan or err > max(1e-5, 8 * float(np.finfo(w.dtype).eps)) * scale:
                return f"output '{name}' differs from {fixed}-sample runs by up to {err:.3g}"
        elif not np.array_equal(g, w):
            return f"output '{name}' differs from {fixed}-sample runs"
    return None


def run_batch(
    plan: RunPlan, dataset: Dataset, start: int, stop: int, watch: InputWatch | None = None
) -> list[np.ndarray]:
    """Run selected rows ``start..stop-1``; one array per name, samples on axis 0.

    With ``watch``, the inputs' rows holding NaN or Inf are counted in it.
    """
    feed = dataset.batch(start, stop, plan.dtypes)
    count = stop - start
    if watch is not None:
        watch.add(feed, start, stop)
    if plan.pad is not None and count < plan.pad:  # pad a short batch of a fixed-batch model
        feed = padded(feed, plan.pad)
    try:
        outs = plan.session.run(list(plan.names), feed)
    except Exception as exc:  # onnxruntime raises its own exception types
        rows = dataset.row_numbers()
        raise OnnxcalError(
            f"{runtime_failure(exc)} on rows {int(rows[start])}..{int(rows[stop - 1])} of '{dataset.source}'",
            "check that the data matches the model's inputs",
        ) from exc
    return [np.asarray(o)[:count] if plan.pad is not None else np.asarray(o) for o in outs]


def padded(feed: Mapping[str, np.ndarray], size: int) -> dict[str, np.ndarray]:
    """A short batch of a fixed-batch model, padded to ``size`` samples with copies of its last one."""
    return {k: np.concatenate([v, np.repeat(v[-1:], size - len(v), axis=0)]) for k, v in feed.items()}
