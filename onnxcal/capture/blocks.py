"""Running over the whole set in blocks of batches, with the automatic batch size."""

from __future__ import annotations

import contextvars
import time
from collections.abc import Callable, Iterator, Mapping, Sequence
from concurrent.futures import Future, ThreadPoolExecutor
from typing import Any

import numpy as np
import onnx

from ..data import Dataset
from ..errors import OnnxcalError
from .nonfinite import InputWatch
from .plan import RunPlan, decoded_as_read, first, padded, plan_run
from .session import RunOptions, resolve_options, runtime_failure

ProgressFn = Callable[[str, int, int], None]
"""Called as ``progress(description, samples_done, samples_total)`` after each batch."""

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


def _run_block(
    plan: RunPlan, names: Sequence[str], dataset: Dataset, feed: Mapping[str, np.ndarray], start: int, step: int,
    timed: bool,
) -> tuple[list[np.ndarray], float]:
    """Run a block's inputs ``step`` samples per call: the outputs ``names`` concatenated, and
    (when ``timed``) the seconds spent in the runtime."""
    count = len(next(iter(feed.values())))
    names, items, run, fed = list(names), list(feed.items()), plan.session.run, dataset.feed
    got: list[list[np.ndarray]] = []
    spent, s = 0.0, 0
    try:
        for s in range(0, count, step):
            batch = {k: v[s : s + step] for k, v in items}
            if plan.pad is not None and count - s < plan.pad:  # pad a short batch of a fixed-batch model
                batch = padded(batch, plan.pad)
            if timed:
                t0 = time.perf_counter()
                got.append(run(names, fed(batch)))
                spent += time.perf_counter() - t0
            else:
                got.append(run(names, fed(batch)))
    except Exception as exc:  # onnxruntime raises its own exception types
        rows = dataset.row_numbers()
        raise OnnxcalError(  # worded as run_batch words it: the node, its reason, the rows
            f"{runtime_failure(exc)} on rows {int(rows[start + s])}..{int(rows[start + min(s + step, count) - 1])} "
            f"of '{dataset.source}'",
            "check that the data matches the model's inputs",
        ) from exc
    outs = []
    for i in range(len(names)):
        parts = [np.asarray(g[i]) for g in got]
        if plan.pad is not None:
            parts[-1] = first(parts[-1], count - (len(got) - 1) * step, plan.axis(i))
        outs.append(parts[0] if len(parts) == 1 else np.concatenate(parts, axis=plan.axis(i)))
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
    at :data:`DEFAULT_BATCH` after the first block. For a set decoded as
    it is read, waiting for the decoder is not counted (a larger batch
    would not decode faster), so an image folder runs the batch size its
    pre-decoded arrays run.

    After each block has been consumed ``progress`` is called; the input
    pages of consumed rows are released (:meth:`Dataset.release`) whenever
    they add up to :data:`RELEASE_BYTES`, so the resident size stays bounded
    without paying a page-table flush on every small block.
    """
    with Pass(plan, dataset, watch=watch) as run:
        yield from run.blocks(progress=progress, description=description)


class _Reader:
    """Reads a block of inputs; for a set that is decoded as it is read (images), the next block is
    decoded in a worker thread while the runtime runs the current one.

    Pillow and onnxruntime release the GIL while they work, so decoding and
    running overlap; the session of such a set is opened without spinning
    (``plan_run``): onnxruntime's intra-op threads then sleep between its
    parallel sections instead of holding the cores the decoder needs (with
    spinning, the image capture took 1.15 times as long as without the
    worker on 2 busy cores; docs/benchmarks.md). Arrays and memory maps
    are read in place (a copy of a few MiB, no worker): prefetching them
    would only hold a second block in memory.
    """

    def __init__(self, dataset: Dataset, dtypes: Mapping[str, Any]) -> None:
        self.dataset, self.dtypes = dataset, dtypes
        decoded = decoded_as_read(dataset)
        self.pool = ThreadPoolExecutor(1, thread_name_prefix="onnxcal-decode") if decoded else None
        self.ahead: tuple[int, int, Future[dict[str, np.ndarray]]] | None = None

    def read(self, start: int, stop: int) -> dict[str, np.ndarray]:
        ahead, self.ahead = self.ahead, None
        if ahead is not None and ahead[:2] == (start, stop):
            return ahead[2].result()
        if ahead is not None and not ahead[2].cancel():
            ahead[2].exception()  # wait for it: the set is not read from two threads at once
        return self.dataset.batch(start, stop, self.dtypes)

    def prefetch(self, start: int, stop: int) -> None:
        if self.pool is not None and start < stop:
            # in the caller's context: a warning made while decoding is spelled as the caller's (errors.OnnxcalWarning)
            work = contextvars.copy_context().run
            self.ahead = (start, stop, self.pool.submit(work, self.dataset.batch, start, stop, self.dtypes))

    def close(self) -> None:
        if self.pool is not None:
            if self.ahead is not None:
                self.ahead[2].cancel()
            self.pool.shutdown(wait=True)


class Pass:
    """One pass over the selected rows with one session, read in parts (see :func:`run_batches`).

    :meth:`blocks` runs the rows from where the last part stopped up to
    ``until``: so the first rows can be run with more outputs than the rest
    (the probe that checks the reading wants the model's output beside the
    logits; the capture that follows wants the logits alone) and no row
    runs twice. The batch size, the block ahead being decoded and the input
    watch carry over from one part to the next. Close it (or use it as a
    context manager) to stop the decoding worker.
    """

    def __init__(self, plan: RunPlan, dataset: Dataset, *, watch: InputWatch | None = None) -> None:
        self.plan, self.dataset, self.watch = plan, dataset, watch
        self.reader = _Reader(dataset, plan.dtypes)
        self.done = self.released = 0
        self.step, self.block, self.grow = plan.step, plan.step, plan.grow

    def __enter__(self) -> Pass:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        self.reader.close()

    def _block_size(self, row_bytes: float) -> int:
        """Rows per block at the present batch size: whole batches, about BLOCK_BYTES of inputs."""
        return max(self.step, int(BLOCK_BYTES // max(row_bytes, 1.0)) // self.step * self.step)

    def blocks(
        self, names: Sequence[str] | None = None, until: int | None = None, *, progress: ProgressFn | None = None,
        description: str = "running model",
    ) -> Iterator[tuple[int, int, list[np.ndarray]]]:
        """Yield ``(start, stop, outputs)`` from the first row not yet run up to ``until`` (every row by
        default); ``names`` (default: the plan's) must be the first of the plan's names."""
        names = tuple(self.plan.names if names is None else names)
        assert names == self.plan.names[: len(names)]  # the samples' axis of output i is the plan's
        n, dataset, reader = self.dataset.n, self.dataset, self.reader
        end = n if until is None else min(until, n)
        mapped = dataset.mapped_row_bytes
        while self.done < end:
            t0 = time.perf_counter()
            start = self.done
            stop = min(start + self.block, end)
            feed = reader.read(start, stop)
            if reader.pool is not None:  # decoding costs the same per image at any batch size: not counted
                t0 = time.perf_counter()
            row_bytes = sum(v.nbytes for v in feed.values()) / (stop - start)
            # the next block at the present batch size (a batch size that grows later runs it in fewer calls);
            # past ``end`` too, where the next part starts
            reader.prefetch(stop, min(stop + self._block_size(row_bytes), end if stop < end else n))
            if self.watch is not None:
                self.watch.add(feed, start, stop)
            outs, spent = _run_block(self.plan, names, dataset, feed, start, self.step, self.grow)
            self.done = stop
            yield start, stop, outs
            if mapped and ((stop - self.released) * mapped >= RELEASE_BYTES or stop == n):
                dataset.release(self.released, stop)
                self.released = stop
            if progress is not None:
                progress(description, stop, n)
            if self.grow and start > 0:  # the first block (one batch) pays the runtime's warm-up
                bigger = _grown(self.step, time.perf_counter() - t0, spent, row_bytes)
                self.step, self.grow = (bigger, True) if bigger else (self.step, False)
            self.block = self._block_size(row_bytes)
        if self.watch is not None and self.done == n:
            self.watch.flush()


def run_model(
    model: onnx.ModelProto,
    dataset: Dataset,
    names: Sequence[str],
    *,
    batch_size: int | None = None,
    options: RunOptions | None = None,
    progress: ProgressFn | None = None,
    description: str = "running model",
    out_axes: Sequence[int] = (),
) -> list[np.ndarray]:
    """Run ``model`` over ``dataset`` in batches; return the tensors ``names``.

    Each returned array has the samples along axis 0, or along its entry of
    ``out_axes`` (a recurrent state 1 x N x H: 1). Inputs are cast to the
    model's dtypes batch by batch, so memory-mapped inputs are read lazily.
    """
    plan = plan_run(model, dataset, names, resolve_options(options, batch_size), out_axes)
    return run_plan(plan, dataset, progress=progress, description=description)


def run_plan(
    plan: RunPlan, dataset: Dataset, *, progress: ProgressFn | None = None, description: str = "running model"
) -> list[np.ndarray]:
    """:func:`run_model` with a session already open: the tensors ``plan.names`` over ``dataset``."""
    parts: list[list[np.ndarray]] = [[] for _ in plan.names]
    for _, _, outs in run_batches(plan, dataset, progress=progress, description=description):
        for part, out in zip(parts, outs, strict=True):
            part.append(out)
    return [np.concatenate(p, axis=plan.axis(i)) for i, p in enumerate(parts)]
