"""onnxruntime for a capture: the import, the run options, a session, the wording of its failures."""

from __future__ import annotations

import os
import re
from collections.abc import Iterator
from dataclasses import dataclass, replace
from types import ModuleType
from typing import Any

import onnx

from .. import _signals
from .._limits import check_range
from ..errors import OnnxcalError, first_line
from ..graph.external import ORT_FOLDER_OPTION, for_onnxruntime

DEFAULT_BATCH = 64
"""Samples per call to start from when no batch size is given (see :func:`run_batches`)."""
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


def onnxruntime() -> ModuleType:
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

    module: ModuleType = ort
    return module


def check_run_options(options: RunOptions) -> RunOptions:
    """Validate run options, with errors that name the option and its range."""
    ort = onnxruntime()
    if options.batch_size is not None:  # None: automatic (see ``blocks.run_batches``)
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


def resolve_options(options: RunOptions | None, batch_size: int | None) -> RunOptions:
    """``options`` (default: :class:`RunOptions`), with ``batch_size`` when one is given."""
    options = options or RunOptions()
    return options if batch_size is None else replace(options, batch_size=batch_size)


def make_session(model: onnx.ModelProto, options: RunOptions | None = None, *, spinning: bool = True) -> Any:
    """An onnxruntime session for an in-memory model (CPU unless ``options`` say else).

    Weights the model keeps in external data are read by onnxruntime from
    their files (never serialised into one message, which could not exceed 2 GiB).
    Without ``spinning`` the runtime's idle intra-op threads sleep instead of
    spinning: for a set decoded in a worker thread while the model runs
    (images), which needs a core the spinning threads would hold.
    """
    ort = onnxruntime()
    options = options or RunOptions()
    opts = ort.SessionOptions()
    # FATAL only: a run-time failure is reported once, as onnxcal's one line (rows and node),
    # not also by onnxruntime's own coloured log lines on stderr
    opts.log_severity_level = 4
    if options.threads:
        opts.intra_op_num_threads = options.threads
    if not spinning:
        opts.add_session_config_entry("session.intra_op.allow_spinning", "0")
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
