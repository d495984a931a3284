"""Run a model with onnxruntime over a validation set and collect its class scores.

When the model already ends in a Softmax, LogSoftmax or Sigmoid, the tensor
captured is that activation's input (the logits), exposed as an extra output
of an in-memory copy; the model file is never changed.

Batching. Models with a dynamic batch dim run ``batch_size`` samples per
call. A model exported with a fixed batch dim B (often 1, on edge devices)
is first tried in a copy with that dim made symbolic: the copy runs the
first batch, and its output is compared with B-sample runs of the model as
exported. If they agree the capture runs batched; if not (a Reshape that
hard-codes the batch, say) it falls back to B samples per call with an
:class:`~onnxcal.errors.OnnxcalWarning`.

A capture file is an uncompressed ``.npz`` with ``logits`` (float32,
rows x k), ``labels`` (int64, one per row; or uint8, rows x k 0/1 for a
multi-label model), ``indices`` (int64, the row number of each
sample in the validation set; absent when the capture holds every row in
order) and ``meta`` (a JSON string, see
:class:`CaptureMeta`). :func:`capture` with ``out`` streams the logits into
the file batch by batch, so memory holds one batch whatever the set's size;
the file is written under a temporary name and renamed when complete.
"""

from __future__ import annotations

import contextlib
import json
import os
import re
import time
import warnings
import zipfile
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path
from typing import ClassVar

import numpy as np
import onnx

from . import __version__, _signals
from ._files import atomic_path, require_file
from .data import Dataset, check_label_array, check_labels, match_inputs, read_npz
from ._limits import check_memory, check_range, format_bytes
from .errors import OnnxcalError, OnnxcalWarning, first_line
from .graph import ScoreSite, expose_scores, find_scores, fit_kind, np_dtype, tensor_spec
from .graph.external import ORT_FOLDER_OPTION, for_onnxruntime
from .guard import PROBE_ROWS, RowStats

ProgressFn = Callable[[str, int, int], None]
"""Called as ``progress(description, samples_done, samples_total)`` after each batch."""

DEFAULT_BATCH = 64
"""Samples per call to start from when no batch size is given (see :func:`run_batches`)."""
RELEASE_BYTES = 16 << 20
"""Memory-mapped input pages are handed back to the kernel every this many bytes."""
BLOCK_BYTES = 1 << 20
"""Inputs are read, cast and checked, and outputs handed on, this many bytes of inputs at a time."""
OVERHEAD = 0.05
"""An automatic batch size doubles while onnxcal's own time per call exceeds this share of the call."""
AUTO_BATCH_BYTES = 8 << 20
"""An automatic batch size stops growing before one batch of inputs exceeds this."""
AUTO_BATCH_ROWS = 1 << 14
"""... or this many samples."""
CPU = "CPUExecutionProvider"
OPTIMIZATION_LEVELS = {
    "disable": "ORT_DISABLE_ALL",
    "basic": "ORT_ENABLE_BASIC",
    "extended": "ORT_ENABLE_EXTENDED",
    "all": "ORT_ENABLE_ALL",
}
"""``--optimization`` names for onnxruntime's graph optimisation levels."""


@dataclass(frozen=True)
class RunOptions:
    """How onnxruntime runs the model.

    Attributes
    ----------
    batch_size : int or None
        Samples per call (a fixed batch dim that cannot be freed overrides
        it); None chooses it: :data:`DEFAULT_BATCH`, doubled while onnxcal's
        own work per call costs more than :data:`OVERHEAD` of the call.
    threads : int
        Intra-op threads; 0 leaves onnxruntime's default (one per core).
    optimization : str
        Graph optimisation level, a key of :data:`OPTIMIZATION_LEVELS`.
    provider : str
        Execution provider; the CPU provider backs up any other.
    """

    batch_size: int | None = None
    threads: int = 0
    optimization: str = "all"
    provider: str = CPU


MAX_BATCH = 1 << 24
"""Largest ``--batch-size`` (16 777 216); the memory check usually refuses far less."""


def max_threads() -> int:
    """Largest ``--threads``: 4 per core of this machine, at least 64 (onnxruntime crashes creating 100 000)."""
    return max(64, 4 * (os.cpu_count() or 1))


def onnxruntime():
    """onnxruntime, imported with its telemetry off.

    Left on, onnxruntime writes a device id and a database under
    ``~/.cache/Microsoft/DeveloperTools`` (or ``$XDG_CACHE_HOME``) when it
    starts; onnxcal writes nothing but the outputs the user names.
    ``ORT_DISABLE_TELEMETRY`` must be set before onnxruntime is first imported
    (measured with onnxruntime 1.32); a value the user set is kept.
    """
    os.environ.setdefault("ORT_DISABLE_TELEMETRY", "1")
    with _signals.deferred():  # a signal inside an extension module's import can crash it
        import onnxruntime as ort

    return ort


def check_run_options(options: RunOptions) -> RunOptions:
    """Validate run options, with errors that name the option and its range."""
    ort = onnxruntime()
    if options.batch_size is not None:  # None: automatic (see ``BatchSizer``)
        check_range(options.batch_size, 1, MAX_BATCH, "--batch-size", "a number of samples")
    check_range(options.threads, 0, max_threads(), "--threads",
                "a number of threads (0: onnxruntime's default, one per core)")
    if options.optimization not in OPTIMIZATION_LEVELS:
        raise OnnxcalError(
            f"--optimization {options.optimization!r} is not a graph optimisation level",
            f"choose one of: {', '.join(OPTIMIZATION_LEVELS)}",
        )
    available = ort.get_available_providers()
    if options.provider not in available:
        raise OnnxcalError(
            f"--provider {options.provider} is not available in this onnxruntime",
            f"installed providers: {', '.join(available)}",
        )
    return options


def _options(options: RunOptions | None, batch_size: int | None) -> RunOptions:
    options = options or RunOptions()
    return options if batch_size is None else replace(options, batch_size=batch_size)


@dataclass(frozen=True)
class CaptureMeta:
    """Where a capture came from.

    Attributes
    ----------
    model_sha256, model_path : str
        The model file that was run.
    output : str
        The graph output chosen as class scores.
    scores : str
        The tensor captured (the logits behind ``output``).
    activation : str or None
        What the model applies to ``scores`` (None for raw logits;
        ``"softmax"`` for an ai.onnx.ml classifier's probabilities, whose
        logarithm is captured).
    class_axis : int
        Class axis of ``output`` in the model.
    num_classes : int
        K.
    n : int
        Number of captured rows.
    data_source : str
        The validation set.
    fit_as : str
        ``"softmax"`` (labels are class indices, one per row),
        ``"sigmoid"`` (labels are 0/1, one per logit: binary or multi-label)
        or ``"sigmoid-l1"`` (class indices; the logits enter one sigmoid per
        class, L1-normalised after: fitted as L1(sigmoid(z / T)), ``l1_fit``).
    onnxcal_version : str
    class_names : tuple of str or None
        Names of the classes, when known (``--classes`` or folder names).
    data_id : str
        Fingerprint of the validation files (see :class:`onnxcal.data.Dataset`).
    data_total : int
        Samples in the whole validation set, before ``--limit``/``--shard``.
    shard : str or None
        ``"I/N"`` when the capture is one shard of the set.
    limit, shuffle_seed : int or None
        The selection options used.
    preprocess : dict or None
        Image preprocessing, resolved against the model input.
    batching : str
        ``"batched"`` (dynamic batch dim), ``"freed"`` (a fixed batch dim made
        symbolic in a copy) or ``"fixed"`` (run at the exported batch size).
    merged_from : tuple of str
        Capture files this one was merged from.
    holds, logits_from, spelling : str
        How the output was read (``graph.ScoreSite``): what it holds, how
        the logits were obtained (e.g. ``"log"`` for log p), the pattern
        recognised. ``patch --fit`` reads the model the same way.
    score_columns : str
        ``"START:STOP"`` when only these positions of a Concat output are
        class scores (``--score-columns``); "" otherwise.
    """

    model_sha256: str
    model_path: str
    output: str
    scores: str
    activation: str | None
    class_axis: int
    num_classes: int
    n: int
    data_source: str
    fit_as: str = "softmax"
    onnxcal_version: str = __version__
    class_names: tuple[str, ...] | None = None
    data_id: str = ""
    data_total: int = 0
    shard: str | None = None
    limit: int | None = None
    shuffle_seed: int | None = None
    preprocess: dict | None = None
    batching: str = ""
    merged_from: tuple[str, ...] = ()
    holds: str = ""
    logits_from: str = "tensor"
    spelling: str = ""
    score_columns: str = ""

    def to_dict(self) -> dict:
        return asdict(self)

    @classmethod
    def from_dict(cls, data: dict) -> CaptureMeta:
        """Inverse of :meth:`to_dict` (JSON lists back to tuples)."""
        data = dict(data)
        for key in ("class_names", "merged_from"):
            if isinstance(data.get(key), list):
                data[key] = tuple(data[key])
        return cls(**data)


@dataclass
class Nonfinite:
    """Rows holding NaN or Inf, counted batch by batch: how many, and the first few row numbers."""

    count: int = 0
    first: list[int] = field(default_factory=list)
    keep: ClassVar[int] = 5

    def add(self, bad: np.ndarray, rows: np.ndarray) -> None:
        """Count the rows where ``bad`` is true; ``rows`` are their row numbers in the set."""
        idx = np.flatnonzero(bad)
        self.count += int(idx.size)
        for r in rows[idx]:
            if len(self.first) >= self.keep:
                break
            if int(r) not in self.first:
                self.first.append(int(r))

    def describe(self, total: int) -> str:
        """``'4 of 40 rows (first rows: 2, 5, 7, 11)'``."""
        return f"{self.count} of {total} rows (first rows: {', '.join(map(str, self.first))})"


@dataclass(frozen=True)
class Capture:
    """Captured logits, labels and where they came from.

    ``indices`` holds the row number in the validation set of each sample,
    or None when the samples are all rows of the set in order.
    """

    logits: np.ndarray
    labels: np.ndarray
    meta: CaptureMeta
    indices: np.ndarray | None = None
    nonfinite_inputs: Mapping[str, Nonfinite] = field(default_factory=dict)
    """Inputs whose rows held NaN or Inf in the run that made this capture (empty when read from a file)."""
    stats: RowStats | None = None
    """What the captured rows look like (``guard``), from the run that made this capture."""
    notes: tuple[str, ...] = ()
    """What the reader should know about how the output was read (e.g. read as probabilities)."""

    def sample_indices(self) -> np.ndarray:
        """``indices``, or 0..n-1 when the capture holds every row in order."""
        if self.indices is not None:
            return self.indices
        return np.arange(self.meta.data_total or len(self.labels), dtype=np.int64)


# --------------------------------------------------------------------------
# Sessions and the batch plan


def make_session(model: onnx.ModelProto, options: RunOptions | None = None):
    """An onnxruntime session for an in-memory model (CPU unless ``options`` say else).

    Weights the model keeps in external data are read by onnxruntime from
    their files (never serialised into one message, which could not exceed 2 GiB).
    """
    ort = onnxruntime()
    options = options or RunOptions()
    opts = ort.SessionOptions()
    # FATAL only: a run-time failure is reported once, as onnxcal's one line (rows and node),
    # not also by onnxruntime's own coloured log lines on stderr
    opts.log_severity_level = 4
    if options.threads:
        opts.intra_op_num_threads = options.threads
    opts.graph_optimization_level = getattr(
        ort.GraphOptimizationLevel, OPTIMIZATION_LEVELS[options.optimization]
    )
    providers = [options.provider] + ([CPU] if options.provider != CPU else [])
    data, folder = for_onnxruntime(model)  # weights left in their files are read from there
    if folder is not None:
        opts.add_session_config_entry(ORT_FOLDER_OPTION, folder)
    try:
        return ort.InferenceSession(data, sess_options=opts, providers=providers)
    except Exception as exc:  # onnxruntime raises its own exception types
        op = _unsupported_operator(model, str(exc))
        if op is not None:
            op_type, domain, node = op
            raise OnnxcalError(
                f"unsupported operator '{op_type}' in domain '{domain or 'ai.onnx'}' (node '{node}'): "
                "onnxruntime has no kernel for it",
                "export the model with standard ONNX operators, or run it where its custom-op library is installed",
            ) from exc
        raise OnnxcalError(
            f"onnxruntime cannot load the model: {first_line(exc)}",
            "check that the model runs in onnxruntime on CPU",
        ) from exc


_NODE_FAILED = re.compile(r"while running (\w+) node\. Name:'(.*?)' Status Message: (?:\S+:\d+ )?(?:\S+\(.*?\) )?(.*)")


def runtime_failure(exc: BaseException) -> str:
    """onnxruntime's run-time error as the start of one sentence: which node failed, and why.

    onnxruntime words it "... Non-zero status code returned while running
    Reshape node. Name:'r' Status Message: <file>:<line> <function> <what>"
    (onnxruntime 1.2x-1.3x, measured); when the text has another form the
    first line of it is quoted as it is.

    >>> runtime_failure(RuntimeError("[ONNXRuntimeError] : 1 : FAIL : Non-zero status code returned while "
    ...                 "running Div node. Name:'int_div' Status Message: element_wise_ops.cc:703 Compute "
    ...                 "Integer division by zero"))
    "node 'int_div' (Div) failed (Compute Integer division by zero)"
    """
    m = _NODE_FAILED.search(first_line(exc, limit=10_000))
    if m is None:
        return f"onnxruntime failed ({first_line(exc)})"
    why = m.group(3).strip() or "no reason given"
    return f"node '{m.group(2)}' ({m.group(1)}) failed ({why if len(why) <= 300 else why[:297] + '...'})"


def _nodes(graph: onnx.GraphProto) -> Iterator[onnx.NodeProto]:
    for node in graph.node:
        yield node
        for a in node.attribute:
            for g in [a.g] * a.HasField("g") + list(a.graphs):
                yield from _nodes(g)


def _unsupported_operator(model: onnx.ModelProto, message: str) -> tuple[str, str, str] | None:
    """(op, domain, node) of the node onnxruntime refused, when its message names one.

    onnxruntime words it as "DOMAIN:OP(VERSION) is not a registered
    function/op" for an unknown domain, or "Could not find an implementation
    for OP(VERSION) node with name 'NAME'" for a known one (onnxruntime
    1.2x messages, from memory; anything else keeps the general message).
    """
    local = {(f.domain, f.name) for f in model.functions}
    nodes = [n for n in _nodes(model.graph) if (n.domain, n.op_type) not in local]
    for n in nodes:
        if n.domain not in ("", "ai.onnx") and f"{n.domain}:{n.op_type}(" in message:
            return n.op_type, n.domain, n.name or n.output[0]
    named = re.search(r"implementation for (\w+)\(\d+\) node with name '([^']*)'", message)
    if named:
        for n in nodes:
            if n.op_type == named.group(1) and (n.name or "") == named.group(2):
                return n.op_type, n.domain, n.name or n.output[0]
    return None


def _graph_inputs(model: onnx.ModelProto) -> list[onnx.ValueInfoProto]:
    init = {i.name for i in model.graph.initializer}
    return [vi for vi in model.graph.input if vi.name not in init]


def _fixed_batch(model: onnx.ModelProto) -> int | None:
    for vi in _graph_inputs(model):
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

    session: object
    names: tuple[str, ...]
    dtypes: Mapping[str, str | None]
    step: int
    pad: int | None
    mode: str
    grow: bool = False


def _dtypes(model: onnx.ModelProto, session) -> dict[str, str | None]:
    specs = {vi.name: tensor_spec(vi).dtype for vi in model.graph.input}
    return {i.name: (None if specs.get(i.name, "unknown") == "unknown" else specs[i.name]) for i in session.get_inputs()}


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
    for vi in _graph_inputs(model):
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
    shape = "[" + ", ".join("?" if d is None else str(d) for d in spec.shape) + "]"
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
    batch = DEFAULT_BATCH if grow else options.batch_size
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
        reason = _disagreement(got, _run_span(native, dataset, 0, probe), names, probe, fixed)
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


def _run_span(plan: RunPlan, dataset: Dataset, start: int, stop: int) -> list[np.ndarray]:
    parts = [run_batch(plan, dataset, s, min(s + plan.step, stop)) for s in range(start, stop, plan.step)]
    return [np.concatenate(p) for p in zip(*parts)]


def _disagreement(
    got: list[np.ndarray], want: list[np.ndarray], names: Sequence[str], probe: int, fixed: int
) -> str | None:
    """Why a freed batch does not reproduce the exported model's runs, or None.

    Results of one sample computed alone or within a batch may differ in
    the last bits (kernels may sum in another order), so floats are compared
    to 1e-5 relative to their scale, or 8 units in the last place of a
    narrower dtype such as float16 (common practice).
    """
    for name, g, w in zip(names, got, want):
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


def _surely_finite(a: np.ndarray) -> bool:
    """True when ``a`` (contiguous, float) holds no NaN or Inf; False when it may.

    One dot product of ``a`` with itself is the fast test: NaN and Inf carry
    through it (IEEE 754), and a BLAS dot costs a fraction of a pass of
    ``isfinite``. A False may also be an overflow of the sum of squares,
    which the caller's exact test then sorts out. float16 and other narrow
    types, which a dot would overflow, get the exact test at once.
    """
    if a.dtype not in (np.float32, np.float64):
        return bool(np.isfinite(a).all())
    flat = a.reshape(-1)
    with np.errstate(over="ignore", invalid="ignore"):
        return bool(np.isfinite(np.dot(flat, flat)))


class InputWatch:
    """Counts the rows of float inputs holding NaN or Inf as batches go by.

    Small batches are tested together, about 1 MiB at a time, so a tiny
    model pays one dot product per MiB of inputs rather than one per batch;
    only a block that may hold NaN or Inf is searched row by row. ``found``
    maps input names to their :class:`Nonfinite` rows; call :meth:`flush`
    after the last batch.
    """

    FLUSH_BYTES = 1 << 20

    def __init__(self, dataset: Dataset) -> None:
        self.dataset = dataset
        self.found: dict[str, Nonfinite] = {}
        self._floats: list[str] | None = None  # the float inputs, from the first batch
        self._pending: list[list[np.ndarray]] = []  # per batch, the float inputs in ``_floats`` order
        self._first = 0
        self._stop = 0
        self._bytes = 0

    def add(self, feed: Mapping[str, np.ndarray], start: int, stop: int) -> None:
        """Take the inputs of selected rows ``start..stop-1`` (batches in order)."""
        if self._floats is None:
            self._floats = [k for k, v in feed.items() if v.dtype.kind == "f"]
        if not self._floats:
            return
        if not self._pending:
            self._first = start
        arrays = [feed[k] for k in self._floats]
        self._pending.append(arrays)
        self._stop = stop
        self._bytes += sum(a.nbytes for a in arrays)
        if self._bytes >= self.FLUSH_BYTES:
            self.flush()

    def flush(self) -> None:
        """Test what is pending."""
        if not self._pending:
            return
        for i, name in enumerate(self._floats):
            parts = [arrays[i] for arrays in self._pending]
            block = parts[0] if len(parts) == 1 else np.concatenate(parts)
            if not block.size or _surely_finite(block):
                continue
            bad = ~np.isfinite(block.reshape(len(block), -1)).all(axis=1)
            if bad.any():
                rows = self.dataset.row_numbers()[self._first : self._stop]
                self.found.setdefault(name, Nonfinite()).add(bad, rows)
        self._pending, self._bytes = [], 0


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
        feed = {k: np.concatenate([v, np.repeat(v[-1:], plan.pad - count, axis=0)]) for k, v in feed.items()}
    try:
        outs = plan.session.run(list(plan.names), feed)
    except Exception as exc:  # onnxruntime raises its own exception types
        rows = dataset.row_numbers()
        raise OnnxcalError(
            f"{runtime_failure(exc)} on rows {int(rows[start])}..{int(rows[stop - 1])} of '{dataset.source}'",
            "check that the data matches the model's inputs",
        ) from exc
    return [np.asarray(o)[:count] if plan.pad is not None else np.asarray(o) for o in outs]


def _run_block(
    plan: RunPlan, dataset: Dataset, feed: Mapping[str, np.ndarray], start: int, step: int, timed: bool
) -> tuple[list[np.ndarray], float]:
    """Run a block's inputs ``step`` samples per call: the outputs concatenated, and
    (when ``timed``) the seconds spent in the runtime."""
    count = len(next(iter(feed.values())))
    names, items, run = list(plan.names), list(feed.items()), plan.session.run
    got: list[list] = []
    spent, s = 0.0, 0
    try:
        for s in range(0, count, step):
            batch = {k: v[s : s + step] for k, v in items}
            if plan.pad is not None and count - s < plan.pad:  # pad a short batch of a fixed-batch model
                batch = {k: np.concatenate([v, np.repeat(v[-1:], plan.pad - len(v), axis=0)]) for k, v in batch.items()}
            if timed:
                t0 = time.perf_counter()
                got.append(run(names, batch))
                spent += time.perf_counter() - t0
            else:
                got.append(run(names, batch))
    except Exception as exc:  # onnxruntime raises its own exception types
        rows = dataset.row_numbers()
        raise OnnxcalError(
            f"onnxruntime failed on rows {int(rows[start + s])}..{int(rows[start + min(s + step, count) - 1])} of "
            f"'{dataset.source}': {first_line(exc)}",
            "check that the data matches the model's inputs",
        ) from exc
    outs = []
    for i in range(len(names)):
        parts = [np.asarray(g[i]) for g in got]
        if plan.pad is not None:
            parts[-1] = parts[-1][: count - (len(got) - 1) * step]
        outs.append(parts[0] if len(parts) == 1 else np.concatenate(parts))
    return outs, spent


def _grown(step: int, wall: float, spent: float, row_bytes: float) -> int | None:
    """The next automatic batch size, or None to keep ``step`` from now on.

    ``wall`` is a block's whole time (reading, checking, running, handing
    on), ``spent`` its time in the runtime: their difference is onnxcal's
    own work, which must stay below OVERHEAD of the runtime's.
    """
    if wall - spent <= OVERHEAD * spent:
        return None
    bigger = 2 * step
    if bigger > AUTO_BATCH_ROWS or bigger * row_bytes > AUTO_BATCH_BYTES:
        return None
    return bigger


def run_batches(
    plan: RunPlan,
    dataset: Dataset,
    *,
    progress: ProgressFn | None = None,
    description: str = "running model",
    watch: InputWatch | None = None,
) -> Iterator[tuple[int, int, list[np.ndarray]]]:
    """Yield ``(start, stop, outputs)`` block by block over the selected rows.

    A block is as many whole batches as make about :data:`BLOCK_BYTES` of
    inputs (at least one batch): its inputs are read and cast in one copy
    and handed to ``watch`` (which counts rows holding NaN or Inf; flushed
    after the last block), the model runs on views of them one batch per
    call, and the block's outputs come back concatenated. So onnxcal's own
    work per call is a slice and a few Python operations, whatever the
    batch size; the rest is per block.

    With ``plan.grow`` the batch size is automatic: after each block,
    while onnxcal's own time (the block's time outside the runtime, the
    consumer's included) exceeds :data:`OVERHEAD` of the runtime's, the
    batch size doubles (up to :data:`AUTO_BATCH_ROWS` samples or
    :data:`AUTO_BATCH_BYTES` of inputs); the first time it does not, it
    stays. A model whose calls take more than a few microseconds settles
    at :data:`DEFAULT_BATCH` after the first block.

    After each block has been consumed ``progress`` is called; the input
    pages of consumed rows are released (:meth:`Dataset.release`) whenever
    they add up to :data:`RELEASE_BYTES`, so the resident size stays bounded
    without paying a page-table flush on every small block.
    """
    n = dataset.n
    mapped = dataset.mapped_row_bytes
    released, start, step, block, grow = 0, 0, plan.step, plan.step, plan.grow
    while start < n:
        t0 = time.perf_counter()
        stop = min(start + block, n)
        feed = dataset.batch(start, stop, plan.dtypes)
        if watch is not None:
            watch.add(feed, start, stop)
        outs, spent = _run_block(plan, dataset, feed, start, step, grow)
        yield start, stop, outs
        if mapped and ((stop - released) * mapped >= RELEASE_BYTES or stop == n):
            dataset.release(released, stop)
            released = stop
        if progress is not None:
            progress(description, stop, n)
        row_bytes = sum(v.nbytes for v in feed.values()) / (stop - start)
        if grow and start > 0:  # the first block (one batch) pays the runtime's warm-up
            bigger = _grown(step, time.perf_counter() - t0, spent, row_bytes)
            step, grow = (bigger, True) if bigger else (step, False)
        block = max(step, int(BLOCK_BYTES // max(row_bytes, 1.0)) // step * step)
        start = stop
    if watch is not None:
        watch.flush()


def run_model(
    model: onnx.ModelProto,
    dataset: Dataset,
    names: Sequence[str],
    *,
    batch_size: int | None = None,
    options: RunOptions | None = None,
    progress: ProgressFn | None = None,
    description: str = "running model",
) -> list[np.ndarray]:
    """Run ``model`` over ``dataset`` in batches; return the tensors ``names``.

    Each returned array has the samples along axis 0. Inputs are cast to the
    model's dtypes batch by batch, so memory-mapped inputs are read lazily.
    """
    plan = plan_run(model, dataset, names, _options(options, batch_size))
    parts: list[list[np.ndarray]] = [[] for _ in names]
    for _, _, outs in run_batches(plan, dataset, progress=progress, description=description):
        for part, out in zip(parts, outs):
            part.append(out)
    return [np.concatenate(p) for p in parts]


# --------------------------------------------------------------------------
# Scores, row by row


def as_rows(scores: np.ndarray, class_axis: int) -> np.ndarray:
    """Move the class axis last and flatten the rest: (rows, k)."""
    if scores.ndim == 1:
        return scores.reshape(-1, 1)
    if scores.ndim == 2 and class_axis == 1:
        return scores
    moved = np.moveaxis(scores, class_axis, -1)
    return moved.reshape(-1, moved.shape[-1])


class _Rows:
    """Receives float32 score rows batch by batch for a known number of samples.

    The first batch fixes the rows per sample and K; storage is allocated
    then, for the whole set.
    """

    def __init__(self, samples: int):
        self.samples = samples
        self.per_sample: int | None = None
        self.k = 0
        self.filled = 0

    @property
    def total(self) -> int:
        return self.samples * (self.per_sample or 0)

    def add(self, rows: np.ndarray, count: int) -> None:
        r, k = rows.shape
        if self.per_sample is None:
            if r == 0 or r % count:
                raise OnnxcalError(
                    f"the model gave {r} score rows for {count} samples",
                    "choose an output with one row (or a fixed number of rows) per sample",
                )
            self.per_sample, self.k = r // count, k
            self._open()
        elif (r, k) != (self.per_sample * count, self.k):
            raise OnnxcalError(
                f"the model gave {r} x {k} score rows for {count} samples after "
                f"{self.per_sample} x {self.k} per sample for earlier ones",
                "give inputs of one size (e.g. images preprocessed to one size)",
            )
        self._write(np.ascontiguousarray(rows, dtype="<f4"))
        self.filled += r

    def _open(self) -> None:
        raise NotImplementedError

    def _write(self, rows: np.ndarray) -> None:
        raise NotImplementedError


class _MemoryRows(_Rows):
    def _open(self) -> None:
        check_memory(
            self.total * self.k * 4,
            f"holding the logits of {self.total} rows x {self.k} classes in memory",
            "capture to a file first ('onnxcal capture --out'), or use --limit",
        )
        self.array = np.empty((self.total, self.k), dtype=np.float32)

    def _write(self, rows: np.ndarray) -> None:
        self.array[self.filled : self.filled + len(rows)] = rows


class _NpyRows(_Rows):
    """Streams the rows as ``logits.npy`` into an open zip archive.

    Rows are gathered in a buffer of about 1 MiB between writes, so a model
    with small batches does not pay one archive write per batch.
    """

    BUFFER_BYTES = 1 << 20

    def __init__(self, samples: int, archive: zipfile.ZipFile):
        super().__init__(samples)
        self.archive = archive
        self.fh = None
        self.held = 0

    def _open(self) -> None:
        self.fh = self.archive.open("logits.npy", "w", force_zip64=True)
        header = {"descr": "<f4", "fortran_order": False, "shape": (self.total, self.k)}
        np.lib.format.write_array_header_1_0(self.fh, header)
        self.buffer = np.empty((max(1, self.BUFFER_BYTES // (4 * self.k)), self.k), dtype="<f4")

    def _write(self, rows: np.ndarray) -> None:
        if self.held + len(rows) > len(self.buffer):
            self._flush()
        if len(rows) > len(self.buffer):
            self.fh.write(rows.data)
            return
        self.buffer[self.held : self.held + len(rows)] = rows
        self.held += len(rows)

    def _flush(self) -> None:
        if self.held:
            self.fh.write(self.buffer[: self.held].data)
            self.held = 0

    def close(self, complete: bool = True) -> None:
        """Write what is buffered (when ``complete``) and close the member.

        The member is closed also when the last write fails (e.g. the disk is
        full), so the archive's own close reports that error and not an open
        member.
        """
        if self.fh is not None:
            try:
                if complete:
                    self._flush()
            finally:
                self.fh.close()


def _fill_scores(
    model: onnx.ModelProto,
    dataset: Dataset,
    site: ScoreSite,
    sink: _Rows,
    options: RunOptions,
    progress: ProgressFn | None,
) -> tuple[str, dict[str, Nonfinite], RowStats]:
    """Run the model and pass its logits to ``sink``; return the batching mode, the
    inputs whose rows held NaN or Inf, and what the rows look like (``guard``)."""
    exposed, name = expose_scores(model, site)
    plan = plan_run(exposed, dataset, [name], options)
    watch = InputWatch(dataset)
    stats = RowStats()
    tiny = float(np.finfo(np_dtype(site.dtype)).tiny)
    batches = run_batches(plan, dataset, progress=progress, description="capturing logits", watch=watch)
    for start, stop, (scores,) in batches:
        rows = as_rows(scores, site.class_axis)
        stats.add(rows)
        if site.logits_from == "log":
            stats.add_saturated(rows, tiny)
        sink.add(rows, stop - start)
    return plan.mode, watch.found, stats


def output_rows(values: np.ndarray, site: ScoreSite) -> np.ndarray:
    """The output's values as rows lined up with the captured logits' rows (class axis last).

    An output holding one class's value gives one column (its other axes
    are those of the logits' rows, in order).
    """
    if site.takes_one:
        return np.asarray(values).reshape(-1, 1)
    if site.columns is not None:  # only these positions of a Concat are class scores
        axis, start, stop = site.columns
        values = np.take(values, np.arange(start, stop), axis=axis)
    return as_rows(values, site.class_axis)


def probe(
    model: onnx.ModelProto, dataset: Dataset, site: ScoreSite, options: RunOptions | None = None,
    rows: int = PROBE_ROWS,
) -> tuple[np.ndarray, np.ndarray]:
    """The logits and the output's values of the first ``rows`` samples, as rows.

    Run before a capture to check the reading against the model's own
    output and to see what the output holds.
    """
    exposed, name = expose_scores(model, site, also=(site.tensor,))
    with warnings.catch_warnings():  # the capture that follows warns about the batching, once
        warnings.simplefilter("ignore", OnnxcalWarning)
        plan = plan_run(exposed, dataset, [name, site.tensor], options or RunOptions())
    z, values = _run_span(plan, dataset, 0, min(rows, dataset.n))
    return as_rows(z, site.class_axis), output_rows(values, site)


def log_probabilities(p: np.ndarray) -> np.ndarray:
    """log(max(p, tiny)): logits for probabilities, as the patched graph computes them.

    softmax(log p) = p, and softmax(log p / T) = softmax(z / T) for logits z
    with p = softmax(z), since softmax ignores a constant added to every
    class (common practice). ``tiny`` is the dtype's smallest normal number.
    (Capture builds the same in the graph, ``graph.expose_scores``.)
    """
    return np.log(np.maximum(p, np.finfo(p.dtype).tiny))


def _check_data(model: onnx.ModelProto, dataset: Dataset) -> None:
    match_inputs(dataset, [tensor_spec(vi) for vi in _graph_inputs(model)])


def capture_scores(
    model: onnx.ModelProto,
    dataset: Dataset,
    site: ScoreSite,
    *,
    batch_size: int | None = None,
    options: RunOptions | None = None,
    progress: ProgressFn | None = None,
) -> np.ndarray:
    """The logits behind ``site`` for every selected sample, float32, shape (rows, k).

    Checks the set against the model's inputs first. The class axis is moved
    last and any other axes (e.g. pixels) are flattened into rows.
    """
    _check_data(model, dataset)
    sink = _MemoryRows(dataset.n)
    _fill_scores(model, dataset, site, sink, _options(options, batch_size), progress)
    return sink.array


def capture(
    model: onnx.ModelProto,
    dataset: Dataset,
    *,
    model_path: str | os.PathLike,
    model_sha256: str,
    output: str | None = None,
    batch_size: int | None = None,
    options: RunOptions | None = None,
    progress: ProgressFn | None = None,
    out: str | os.PathLike | None = None,
    activation: str | None = None,
    site: ScoreSite | None = None,
    check: Callable[[RowStats], None] | None = None,
) -> Capture:
    """Run the model over a labelled set and return its logits.

    Parameters
    ----------
    model : onnx.ModelProto
        The model, as loaded by :func:`onnxcal.graph.load_model`.
    dataset : Dataset
        Must carry labels.
    model_path, model_sha256 : str
        Recorded in the capture's metadata.
    output : str, optional
        The class-score output (the likeliest float output by default).
    batch_size : int, optional
        Samples per onnxruntime call (overrides ``options.batch_size``).
    options : RunOptions, optional
    progress : callable, optional
        See :data:`ProgressFn`.
    out : path, optional
        Stream the capture into this file (written atomically); the returned
        capture's logits are then a memory map of it.
    activation : {"softmax", "sigmoid"}, optional
        How raw logits become probabilities (see ``graph.fit_kind``); decides
        the labels' form.
    site : graph.ScoreSite, optional
        How to read the model (default: ``graph.find_scores(model, output)``).
    check : callable, optional
        Called with the statistics of every captured row (``guard.RowStats``)
        before anything is written; it raises to refuse the capture.

    Returns
    -------
    Capture
    """
    if dataset.labels is None:
        raise OnnxcalError(f"'{dataset.source}' has no labels", "add a 'labels' array")
    options = _options(options, batch_size)
    site = site if site is not None else find_scores(model, output)
    kind = fit_kind(site, activation)
    labels = None
    if site.num_classes is not None and kind != "sigmoid" and np.ndim(dataset.labels) == 1:  # class indices
        labels = check_labels(dataset.labels, dataset.n, site.num_classes, dataset.source)  # before the run
    if site.num_classes is not None:
        _check_class_names(dataset, site.num_classes, kind)
    _check_data(model, dataset)

    def finish(sink: _Rows, mode: str) -> tuple[np.ndarray, CaptureMeta]:
        checked = labels is not None and (len(labels), site.num_classes) == (sink.total, sink.k)
        final = labels if checked else label_rows(dataset.labels, (sink.total, sink.k), kind, dataset.source)
        _check_class_names(dataset, sink.k, kind)
        return final, _meta(dataset, site, sink, mode, kind, model_path, model_sha256)

    if out is None:
        sink = _MemoryRows(dataset.n)
        mode, watch, stats = _fill_scores(model, dataset, site, sink, options, progress)
        if check is not None:
            check(stats)
        final, meta = finish(sink, mode)
        return Capture(sink.array, final, meta, dataset.rows, watch, stats)
    with atomic_path(Path(out)) as tmp, zipfile.ZipFile(tmp, "w", zipfile.ZIP_STORED, allowZip64=True) as zf:
        sink = _NpyRows(dataset.n, zf)
        try:
            mode, watch, stats = _fill_scores(model, dataset, site, sink, options, progress)
            if check is not None:
                check(stats)
        except BaseException:
            with contextlib.suppress(Exception):  # keep the first error; the temporary is removed
                sink.close(complete=False)
            raise
        sink.close()
        final, meta = finish(sink, mode)
        _write_tail(zf, final, dataset.rows, meta)
    logits = read_npz(Path(out), "")["logits"]  # a memory map of what was just written
    return Capture(logits, final, meta, dataset.rows, watch, stats)


def _check_class_names(dataset: Dataset, k: int, kind: str) -> None:
    names = dataset.class_names
    want = 2 if kind == "sigmoid" and k == 1 else k  # one logit: negative and positive class
    if names is not None and len(names) != want:
        raise OnnxcalError(
            f"the class list of '{dataset.source}' has {len(names)} classes but the model has {want}",
            "give one class name per model class, in the model's order",
        )


def _meta(dataset: Dataset, site: ScoreSite, sink: _Rows, mode: str, kind: str, path, sha: str) -> CaptureMeta:
    sel = dataset.selection
    return CaptureMeta(
        model_sha256=sha,
        model_path=str(path),
        output=site.output,
        scores=site.scores,
        activation=site.activation,
        class_axis=site.class_axis,
        num_classes=sink.k,
        n=sink.total,
        data_source=dataset.source,
        fit_as=kind,
        class_names=dataset.class_names,
        data_id=dataset.data_id,
        data_total=dataset.total,
        shard=sel.shard_text,
        limit=sel.limit,
        shuffle_seed=sel.shuffle_seed,
        preprocess=dataset.preprocess,
        batching=mode,
        holds=site.holds,
        logits_from=site.logits_from,
        spelling=site.spelling,
        score_columns="" if site.columns is None else f"{site.columns[1]}:{site.columns[2]}",
    )


def label_rows(labels: np.ndarray, shape: tuple[int, int], kind: str, source: str) -> np.ndarray:
    """Labels lined up with captured rows of ``shape`` (rows, k), as int64.

    ``kind == "softmax"`` (or ``"sigmoid-l1"``): class indices, one per row; per-pixel labels
    (e.g. n x H x W for an n x K x H x W output) are flattened in the rows'
    order. ``kind == "sigmoid"``: 0/1 for every logit: (rows,) int64 for one
    logit (binary), (rows, k) uint8 for k labels (multi-label).

    Raises
    ------
    OnnxcalError
        The labels do not fit the rows or are not of the right kind.
    """
    labels = np.asarray(labels)
    rows, k = shape
    if kind != "sigmoid":  # softmax, sigmoid-l1: class indices
        if labels.ndim > 1 and labels.size == rows:
            labels = labels.reshape(-1)
        elif labels.ndim > 1:
            raise OnnxcalError(
                f"labels in '{source}' have shape {labels.shape}, which does not give one "
                f"class index per score row ({rows} rows)",
                "give per-sample labels, or per-pixel labels shaped like the output without its class axis",
            )
        return check_labels(labels, rows, k, source)
    if labels.size != rows * k:
        raise OnnxcalError(
            f"labels in '{source}' have shape {labels.shape}, but a sigmoid output with "
            f"{k} logit(s) per row needs one 0/1 label per logit ({rows} x {k})",
            "give 0/1 labels shaped like the output",
        )
    # binary: one 0/1 class index per row; multi-label: rows x k of 0/1
    return check_label_array(labels.reshape(-1) if k == 1 else labels.reshape(rows, k), rows, k, source)


def nonfinite_rows(logits: np.ndarray, chunk: int = 1 << 16) -> np.ndarray:
    """Indices of rows holding NaN or Inf (read in chunks: ``logits`` may be a memory map).

    A chunk that is surely finite (one dot product, see ``_surely_finite``)
    is skipped; only the others are searched row by row.
    """
    parts = [np.zeros(0, np.int64)]
    for start in range(0, len(logits), chunk):
        block = np.ascontiguousarray(logits[start : start + chunk])
        if block.size and not _surely_finite(block):
            parts.append(start + np.flatnonzero(~np.isfinite(block).all(axis=1)))
    return np.concatenate(parts)


def _rows_per_sample(cap: Capture) -> int:
    return max(1, len(cap.logits) // max(1, len(cap.sample_indices())))


def nonfinite_logits(cap: Capture) -> Nonfinite:
    """The score rows of ``cap`` holding NaN or Inf, with the set's row numbers of the first samples."""
    rows = nonfinite_rows(cap.logits)
    found = Nonfinite()
    if rows.size:
        found.add(np.ones(rows.size, bool), cap.sample_indices()[rows // _rows_per_sample(cap)])
    return found


def finite_mask(cap: Capture) -> np.ndarray:
    """True for the score rows of the samples whose logits are all finite (every row of a sample alike)."""
    rows = nonfinite_rows(cap.logits)
    r = _rows_per_sample(cap)
    keep_samples = np.ones(len(cap.logits) // r, bool)
    keep_samples[rows // r] = False
    return np.repeat(keep_samples, r)


def without_nonfinite(cap: Capture) -> Capture:
    """``cap`` without the samples whose logits hold NaN or Inf (every row of such a sample)."""
    keep = finite_mask(cap)
    if keep.all():
        return cap
    logits = np.asarray(cap.logits)[keep]
    samples = cap.sample_indices()[keep[:: _rows_per_sample(cap)]]
    return Capture(
        logits, cap.labels[keep], replace(cap.meta, n=int(len(logits))), samples, cap.nonfinite_inputs, cap.stats
    )


# --------------------------------------------------------------------------
# Capture files


def _write_member(zf: zipfile.ZipFile, name: str, arr: np.ndarray) -> None:
    with zf.open(f"{name}.npy", "w", force_zip64=True) as fh:
        np.lib.format.write_array(fh, np.asarray(arr), allow_pickle=False)


def _write_tail(
    zf: zipfile.ZipFile, labels: np.ndarray, indices: np.ndarray | None, meta: CaptureMeta
) -> None:
    _write_member(zf, "labels", labels)
    if indices is not None:  # absent: the samples are rows 0..n-1 of the set
        _write_member(zf, "indices", np.asarray(indices, dtype=np.int64))
    _write_member(zf, "meta", np.array(json.dumps(meta.to_dict(), sort_keys=True)))


def save_capture(path: str | os.PathLike, cap: Capture) -> None:
    """Write a capture file atomically."""
    with atomic_path(Path(path)) as tmp, zipfile.ZipFile(tmp, "w", zipfile.ZIP_STORED, allowZip64=True) as zf:
        _write_member(zf, "logits", np.asarray(cap.logits, dtype=np.float32))
        _write_tail(zf, cap.labels, cap.indices, cap.meta)


def load_capture(path: str | os.PathLike) -> Capture:
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
    first = captures[0].meta
    for cap, src in zip(captures[1:], sources[1:]):
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
    per_sample = {len(c.labels) // len(c.sample_indices()) for c in captures}
    if len(per_sample) != 1:
        raise OnnxcalError(
            f"the captures {', '.join(sources)} hold different numbers of score rows per sample",
            "merge only captures of inputs of one size",
        )
    (r,) = per_sample
    offsets = np.cumsum([0] + [len(c.sample_indices()) for c in captures])
    groups: dict[str, list[int]] = {}
    for i, cap in enumerate(captures):
        key = cap.meta.data_id or f"\0unidentified-{i}"  # files from before fingerprints
        groups.setdefault(key, []).append(i)
    order = []  # positions in the concatenation of all captures' samples, in merged order
    for members in groups.values():
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
        order.append(where[perm])
    samples = np.concatenate(order)
    rows = (samples[:, None] * r + np.arange(r)).ravel()
    logits = np.concatenate([np.asarray(c.logits) for c in captures])[rows]
    labels = np.concatenate([c.labels for c in captures])[rows]
    indices = np.concatenate([c.sample_indices() for c in captures])[samples]
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


def _check_coverage(parts: Sequence[Capture], sources: Sequence[str]) -> None:
    """Shards i/N of one set, all present, must cover it; warn when some are missing."""
    metas = [c.meta for c in parts]
    shards = [m.shard for m in metas]
    if any(s is None for s in shards) or any(m.limit is not None for m in metas):
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
        stacklevel=3,
    )


def _short(value) -> str:
    text = str(value)
    return text[:12] + "..." if len(text) > 15 else text


def load_captures(paths: str | os.PathLike | Sequence[str | os.PathLike]) -> Capture:
    """Load one capture file, or several merged into one (see :func:`merge_captures`)."""
    if isinstance(paths, (str, os.PathLike)):
        paths = [paths]
    paths = list(paths)
    if not paths:
        raise OnnxcalError("no capture files given", "give at least one file written by 'onnxcal capture'")
    return merge_captures([load_capture(p) for p in paths], [str(p) for p in paths])

