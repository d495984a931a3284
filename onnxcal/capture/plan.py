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


def decoded_as_read(dataset: Dataset) -> bool:
    """Whether the set is decoded as it is read (an image folder), not read from arrays or memory maps."""
    return any(not isinstance(v, np.ndarray) for v in dataset.inputs.values())


def _fixed_batch(model: onnx.ModelProto, dataset: Dataset | None = None) -> int | None:
    """The fixed batch size of the first input the data feed per sample (on its batch axis), or None."""
    constants = dataset.constants if dataset is not None else {}
    axes = dataset.batch_axes if dataset is not None else {}
    for vi in graph_inputs(model):
        shape = tensor_spec(vi).shape
        if vi.name in constants or not shape:
            continue
        dim = shape[axes.get(vi.name, 0)]
        if isinstance(dim, int) and dim > 0:
            return dim
    return None


def free_batch_dim(
    model: onnx.ModelProto, batch: int, axes: Mapping[str, int] | None = None, constants: Sequence[str] = ()
) -> onnx.ModelProto:
    """A copy of ``model`` whose inputs' and outputs' batch dim ``batch`` is symbolic.

    The batch dim is the leading one, or the one ``axes`` gives for an input;
    ``constants`` (inputs fed as they are) keep their shape. Intermediate
    shape annotations (``value_info``) are dropped from the copy so that
    onnxruntime infers them again; the copy is for running only.
    """
    out = onnx.ModelProto()
    out.CopyFrom(model)
    init = {i.name for i in out.graph.initializer} | set(constants)
    for vi in [*out.graph.input, *out.graph.output]:
        if vi.name in init or not vi.type.HasField("tensor_type"):
            continue
        dims = vi.type.tensor_type.shape.dim
        at = (axes or {}).get(vi.name, 0)
        if len(dims) > at and dims[at].HasField("dim_value") and dims[at].dim_value == batch:
            dims[at].dim_param = "onnxcal_batch"
    del out.graph.value_info[:]
    return out


@dataclass(frozen=True)
class RunPlan:
    """A session and how to batch for it.

    ``mode`` is ``"batched"``, ``"freed"`` or ``"fixed"`` (see :class:`CaptureMeta`);
    ``pad`` is the fixed batch size that short batches are padded to; with
    ``grow`` the batch size ``step`` is automatic (see :func:`run_batches`);
    ``out_axes`` gives, per name, the axis of its samples when not 0 (a
    recurrent state 1 x N x H), along which batches are cut and joined.
    """

    session: Any  # an onnxruntime.InferenceSession (onnxruntime ships no type hints)
    names: tuple[str, ...]
    dtypes: Mapping[str, str | None]
    step: int
    pad: int | None
    mode: str
    grow: bool = False
    out_axes: tuple[int, ...] = ()

    def axis(self, i: int) -> int:
        """The samples' axis of output ``i``."""
        return self.out_axes[i] if self.out_axes else 0


def first(arr: np.ndarray, count: int, axis: int) -> np.ndarray:
    """The first ``count`` samples of ``arr`` along ``axis`` (a padded batch cut back)."""
    return arr[(slice(None),) * axis + (slice(0, count),)]

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
    constants = dataset.constants if dataset is not None else {}
    axes = dataset.batch_axes if dataset is not None else {}
    for vi in graph_inputs(model):
        spec = tensor_spec(vi)
        if spec.shape is None or not spec.shape or spec.name in constants:  # constants: one copy, not per sample
            continue
        first = spec.shape[axes.get(spec.name, 0)]
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
    out_axes: Sequence[int] = (),
    spinning: bool | None = None,
) -> RunPlan:
    """Open a session for ``model`` and decide the batching (see the module docstring);
    ``out_axes`` as in :class:`RunPlan`; ``spinning`` as in :func:`make_session` (by default off only
    for a set decoded as it is read)."""
    axes = tuple(out_axes)
    options = options or RunOptions()
    grow = options.batch_size is None
    batch = DEFAULT_BATCH if options.batch_size is None else options.batch_size
    check_input_memory(model, batch, dataset)
    if spinning is None:
        spinning = not decoded_as_read(dataset)
    session = make_session(model, options, spinning=spinning)
    dtypes = _dtypes(model, session)
    fixed = _fixed_batch(model, dataset)
    if fixed is None:
        return RunPlan(session, tuple(names), dtypes, batch, None, "batched", grow, axes)
    native = RunPlan(session, tuple(names), dtypes, fixed, fixed, "fixed", out_axes=axes)
    if batch <= fixed or dataset.n <= fixed:
        return native
    probe = min(batch, dataset.n)
    try:
        copy = free_batch_dim(model, fixed, dataset.batch_axes, tuple(dataset.constants))
        freed = RunPlan(make_session(copy, options, spinning=spinning), tuple(names), dtypes,
                        batch, None, "freed", grow, axes)
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
    return [np.concatenate(p, axis=plan.axis(i)) for i, p in enumerate(zip(*parts, strict=True))]


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
        outs = plan.session.run(list(plan.names), dataset.feed(feed))
    except Exception as exc:  # onnxruntime raises its own exception types
        rows = dataset.row_numbers()
        raise OnnxcalError(
            f"{runtime_failure(exc)} on rows {int(rows[start])}..{int(rows[stop - 1])} of '{dataset.source}'",
            "check that the data matches the model's inputs",
        ) from exc
    if plan.pad is None:
        return [np.asarray(o) for o in outs]
    return [first(np.asarray(o), count, plan.axis(i)) for i, o in enumerate(outs)]


def padded(feed: Mapping[str, np.ndarray], size: int) -> dict[str, np.ndarray]:
    """A short batch of a fixed-batch model, padded to ``size`` samples with copies of its last one."""
    return {k: np.concatenate([v, np.repeat(v[-1:], size - len(v), axis=0)]) for k, v in feed.items()}
