"""One chunked pass over multiclass logits at one inverse temperature.

Every multiclass temperature fit and every softmax score reads the logits
the same way: row chunks, ``e = exp(beta z)``, the row sums of ``e`` and,
when asked, of ``e x^j`` and ``e^2 x^j`` (x = beta z, shifted). This
module does that once per pass, for the solver, the metrics and the
bootstrap together, and hands the per-row results of each chunk to
*consumers* (:class:`MomentSums` here, the metric sums
:class:`onnxcal.metrics.score_sums.ScoreSums`).

Precision. Float32 logits are exponentiated in float32 (the exponential
is what a pass costs) and everything derived from the row sums is float64;
float64 logits stay float64 throughout. A row is shifted by its maximum
before the exponential unless every row of the chunk has
``|beta max_k z_k| <= 20``, where ``exp`` and its square stay in float32's
normal range and the shift (a broadcast, about a third of an exponential)
buys nothing but a little precision in the higher cumulants.

Threads. Chunks are dealt to ``LANES`` lanes (chunk i to lane i mod
LANES), each lane with its own float64 sums, merged in lane order, so the
result does not depend on how many threads ran the lanes. numpy releases
the GIL in the exponential, the BLAS row and column sums and the other
large kernels, so two threads use two cores; BLAS itself is held to one
thread meanwhile (:func:`one_blas_thread`).

Cumulants. With p = softmax(beta z) and L(beta) = log sum_k exp(beta z_k),
the j-th derivative of L is the j-th cumulant of z under p; these are the
derivatives of the NLL in beta that the solvers and the bootstrap use
(see :mod:`onnxcal.fit`). They come from the raw moments
mu_j = sum_k e_k x_k^j / sum_k e_k by the recursion
kappa_n = mu_n - sum_{j=1}^{n-1} C(n-1, j-1) kappa_j mu_{n-j}
(common practice), and kappa_j(z) = kappa_j(x) / beta^j.
"""

from __future__ import annotations

import os
import threading
import warnings
from collections.abc import Callable, Sequence
from concurrent.futures import ThreadPoolExecutor
from contextlib import AbstractContextManager, nullcontext
from dataclasses import dataclass
from typing import Any, Protocol, cast

import numpy as np

from . import _signals, kernels
from .cumulants import row_cumulants
from .errors import OnnxcalWarning

CHUNK_ELEMENTS = 1 << 19
"""Logit values per chunk (2 MiB of float32): the per-row work of a chunk (a few hundred numpy
calls by the consumers) costs little beside its arithmetic at this size."""
COMPILED_CHUNK_ELEMENTS = 1 << 21
"""Logit values per chunk for the compiled kernel (8 MiB of float32): it works row by row, so the chunk
is only the unit of the consumers' per-row numpy work, paid once per chunk."""
TILE_ELEMENTS = 1 << 17
"""Logit values per tile, the unit of the work on whole rows (exponentials, row and column sums):
its scratch arrays (512 KiB each in float32) stay in or near the core's own cache (of 64, 128 and
256 rows of 1 000 classes, 128 ran the same operations fastest)."""
LANES = 4
"""Accumulator lanes: results are the same for 1 to LANES threads."""
PARALLEL_ELEMENTS = 1 << 21
"""Passes over fewer logit values than this run in the calling thread."""
UNSHIFTED_LIMIT = 20.0
"""float32 rows are left unshifted when |beta max z| is at most this (exp(2 * 20) is far from overflow)."""


_BLAS: list[Any] = []


def one_blas_thread() -> AbstractContextManager[Any]:
    """A context in which BLAS (numpy's dot products) runs on one thread.

    onnxcal's passes and bootstrap replicates run on threads of their own; a
    multithreaded BLAS under them would oversubscribe the cores, and its
    threads, woken for every dot product, wait for a core whenever the
    machine is busy (measured: a 17 000-element dot product took 37 ms
    instead of 0.01 ms on a loaded two-core machine). Process-wide while it
    lasts (threadpoolctl).
    """
    from threadpoolctl import ThreadpoolController

    if not _BLAS:
        _BLAS.append(ThreadpoolController())
    return cast("AbstractContextManager[Any]", _BLAS[0].limit(limits=1, user_api="blas"))


def default_threads() -> int:
    """Threads for a pass: the cores this process may use, at most :data:`LANES`."""
    try:
        cores = len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        cores = os.cpu_count() or 1
    return max(1, min(LANES, cores))


def compute_dtype(logits: np.ndarray) -> np.dtype:
    """float32 for float32 (and narrower float) logits, else float64."""
    dt = np.dtype(logits.dtype)
    return np.dtype(np.float32) if dt.kind == "f" and dt.itemsize <= 4 else np.dtype(np.float64)


def rows_per_chunk(n_classes: int, compiled: bool = False) -> int:
    return max(1, (COMPILED_CHUNK_ELEMENTS if compiled else CHUNK_ELEMENTS) // max(1, n_classes))


@dataclass(frozen=True)
class Chunk:
    """Rows ``start..start+len(y)-1`` of a pass (positions among its selected rows).

    ``z`` holds the chunk's logits, or, when ``rows`` is given (the compiled
    pass reads scattered rows in place), the whole logits array, of which
    rows ``rows`` are the chunk's.
    """

    index: int
    start: int
    z: np.ndarray
    y: np.ndarray
    w: np.ndarray | None
    part: np.ndarray | None
    rows: np.ndarray | None = None


class Consumer(Protocol):
    """A pass consumer: ``add`` per chunk; it may also have ``tile(chunk, view)``, called with
    each :class:`Tile` of the chunk's exponentials (the only time they exist)."""

    def add(self, chunk: Chunk, terms: ExpTerms) -> None: ...


@dataclass
class Tile:
    """The exponentials of rows ``start..start+len(total)-1`` of a chunk (scratch, valid during the call).

    ``e = exp(x)``, ``x = b z - s`` and ``ex`` = e x (or None), as in
    :class:`ExpTerms`; ``total`` the rows' totals at the exact beta (float64).
    """

    start: int
    e: np.ndarray
    x: np.ndarray
    ex: np.ndarray | None
    total: np.ndarray
    eps: float

    def probabilities(self, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
        """Probabilities of the entries (rows, cols) of the tile, float64."""
        e = self.e[rows, cols].astype(np.float64)
        if self.eps:
            e *= 1.0 + self.eps * self.x[rows, cols]
        p: np.ndarray = e / self.total[rows]
        return p


@dataclass(frozen=True)
class Columns:
    """The classwise ECE's sums of a chunk, asked of the compiled kernel by a consumer (its ``tile`` work and more).

    With p = e (1 + eps x) / total, weights ``weights``, parts ``part``
    (0..parts-1), labels ``labels`` and the M - 1 inner bin ``edges``: the
    kernel adds w p to ``column`` (parts, k); for the entries with p >
    ``first`` (1/M) w p to ``p_sum`` at ((part k + class) M + bin) and to
    ``upper`` at (part k + class); and w to ``y_sum`` at ((part k + label) M
    + the bin of the label's p): what
    :meth:`onnxcal.metrics.score_sums.ScoreSums.tile` and ``add`` do with numpy.
    """

    weights: np.ndarray
    part: np.ndarray
    parts: int
    first: float
    labels: np.ndarray
    edges: np.ndarray
    column: np.ndarray
    p_sum: np.ndarray
    upper: np.ndarray
    y_sum: np.ndarray


@dataclass
class ExpTerms:
    """Per-row results of one chunk at one beta (float64 arrays of the chunk's length).

    The chunk's exponentials are ``e = exp(x)`` with ``x = b z - s``: ``b``
    is beta rounded to the logits' dtype, ``s`` a per-row shift (0, or b
    times the row maximum). The exact beta differs from b by the factor
    1 + ``eps``; weights at the exact beta are ``e exp(eps x)``, which the
    sums take to first order (``eps`` is below 6e-8, so the error is of
    order 1e-12). The exponentials exist only tile by tile (see
    :class:`Tile`); :meth:`entries` computes a few of them again from the
    chunk's logits ``z`` and the rows' shifts ``shift`` (None: 0).
    ``total`` is sum_k e_k (1 + eps x_k), so a probability is
    e (1 + eps x) / total.

    ``log_total`` is L(beta) = log sum_k exp(beta z_k), ``cumulants[:, j-1]``
    the j-th cumulant of z under softmax(beta z) (the j-th derivative of L),
    ``sq_log_total`` and ``sq_cumulants`` the same at 2 beta (from e^2).
    ``classwise``: the compiled kernel added the classwise sums of a
    :class:`Columns` (the numpy code leaves them to the consumer's tiles).
    """

    beta: float
    b: float
    eps: float
    z: np.ndarray
    shift: np.ndarray | None
    total: np.ndarray
    log_total: np.ndarray
    top: np.ndarray
    zmax: np.ndarray
    zy: np.ndarray
    cumulants: np.ndarray
    sq_log_total: np.ndarray | None = None
    sq_cumulants: np.ndarray | None = None
    classwise: bool = False
    index: np.ndarray | None = None

    @property
    def nll(self) -> np.ndarray:
        return self.log_total - self.beta * self.zy

    def entries(self, rows: np.ndarray, cols: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """e and x at the entries (rows, cols) of the chunk, computed as the tiles computed them."""
        x = self.z[rows if self.index is None else self.index[rows], cols]
        if self.shift is not None or self.b != 1.0:
            x = x * x.dtype.type(self.b)
        if self.shift is not None:
            x = x - self.shift[rows]
        return np.exp(x), x

    def probabilities(self, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
        """Probabilities of the entries (rows, cols) of the chunk, float64."""
        e32, x = self.entries(rows, cols)
        e = e32.astype(np.float64)
        if self.eps:
            e *= 1.0 + self.eps * x
        p: np.ndarray = e / self.total[rows]
        return p


class _Buffers:
    """Scratch arrays of one thread: five tile-sized arrays and a chunk's row sums (numpy), or the
    compiled kernel's per-row outputs (``compiled``: float32 logits, see :mod:`onnxcal.kernels`)."""

    def __init__(self, rows: int, k: int, dtype: np.dtype, powers: int = 8, compiled: bool = False) -> None:
        self.compiled = compiled
        self.tile = max(1, min(rows, TILE_ELEMENTS // max(1, k)))
        self.r = np.arange(rows)
        sums = np.float64 if compiled else dtype
        self.sums = np.empty((powers + 1, rows), sums)
        self.sq_sums = np.empty((powers + 1, rows), sums)
        if compiled:  # ExpTerms.top and .shift are views of these: valid until the thread's next chunk
            self.top = np.empty(rows, np.int64)
            self.shift = np.empty(rows, np.float32)
            self.all_rows = np.ones(rows, bool)
            return
        self.x, self.e, self.ex, self.p, self.q = (np.empty((self.tile, k), dtype) for _ in range(5))
        self.sq_picked = np.empty((powers + 1, rows), dtype)  # the same, gathered, for the rows asked for


_ONES: dict[tuple[int, np.dtype[Any]], np.ndarray] = {}


def _ones(k: int, dtype: np.dtype) -> np.ndarray:
    key = (k, np.dtype(dtype))
    if key not in _ONES:
        _ONES[key] = np.ones(k, dtype)
    return _ONES[key]


def _row_dot(a: np.ndarray, b: np.ndarray, out: np.ndarray) -> None:
    """Row-wise dot products of two (rows, k) arrays into ``out`` (``numpy.vecdot``, numpy >= 2;
    einsum, slower, before)."""
    if hasattr(np, "vecdot"):
        np.vecdot(a, b, out=out)
    else:  # numpy 1.26
        np.einsum("ij,ij->i", a, b, out=out)


def _power_sums(
    w: np.ndarray, x: np.ndarray, count: int, first: np.ndarray, scratch: np.ndarray, out: np.ndarray
) -> np.ndarray:
    """Row sums of w x^j, j = 0..count, into the rows of ``out`` (count + 1, rows), in w's dtype.

    ``first`` receives w x, ``scratch`` the higher powers but the last
    (either may be ``w`` itself when it is not needed afterwards). The last
    power beyond the first is a row-wise dot product (:func:`_row_dot`: one
    sweep instead of a product and a sum).
    """
    ones = _ones(w.shape[1], w.dtype)
    np.matmul(w, ones, out=out[0])
    prev = w
    for j in range(1, count + 1):
        if j == count and j >= 2:
            _row_dot(prev, x, out[j])
            break
        dest = first if j == 1 else scratch
        np.multiply(prev, x, out=dest)
        np.matmul(dest, ones, out=out[j])
        prev = dest
    return out


def exp_terms(
    z: np.ndarray,
    y: np.ndarray,
    beta: float,
    moments: int,
    sq_moments: int | None,
    buf: _Buffers,
    sq_rows: np.ndarray | None = None,
    tile_hook: Callable[[Tile], None] | None = None,
    columns: Columns | None = None,
    index: np.ndarray | None = None,
) -> ExpTerms:
    """The exponentials of one chunk and their row sums (see :class:`ExpTerms`).

    ``moments``: cumulants 1..moments of z under softmax(beta z).
    ``sq_moments``: None for nothing at 2 beta, else L(2 beta) for every row
    and cumulants 1..sq_moments under softmax(2 beta z) for the rows of the
    boolean mask ``sq_rows`` (all when None; NaN elsewhere).
    The work on whole rows of logits after the row maxima runs tile by tile
    (:data:`TILE_ELEMENTS` values, whose arrays stay in the core's own
    cache), and ``tile_hook`` sees each tile's exponentials; with
    ``buf.compiled`` it is one compiled call instead
    (:func:`onnxcal.kernels.sweep_kernels.chunk_pass`), which does the work
    of ``columns`` in place of the tile hook, and reads rows ``index`` of ``z``
    in place when given (compiled only).
    """
    c = len(y)
    r = buf.r[:c]
    dtype = np.dtype(np.float32) if buf.compiled else buf.e.dtype
    z = np.asarray(z, dtype=dtype)
    b = float(dtype.type(beta))
    eps = beta / b - 1.0
    count = max(moments, 1 if eps else 0)  # the total at the exact beta needs the first power
    extra = 1 if eps else 0
    sq_count = max(sq_moments or 0, extra)
    pick = None if sq_rows is None or not sq_moments else np.flatnonzero(sq_rows)
    found = False
    s32: np.ndarray | None
    if buf.compiled:  # one compiled call; it shifts every row by b times its maximum
        from .kernels.sweep_kernels import run_chunk

        z = np.ascontiguousarray(z)
        sq_all = -1 if sq_moments is None else (sq_count if pick is None else extra)  # the powers at 2 beta
        marked = buf.all_rows[:c] if pick is None else np.ascontiguousarray(sq_rows, dtype=bool)
        top, s32 = buf.top[:c], buf.shift[:c]
        at = r if index is None else np.ascontiguousarray(index, dtype=np.int64)  # a selection may be strided
        sums_at = (buf.sums[:, :c], buf.sq_sums[:, :c])
        found = run_chunk(z, at, b, eps, count, sq_all, sq_count, marked, columns, top, s32, *sums_at)
        sq_source = buf.sq_sums
    else:
        top = z.argmax(axis=1)
        zmax_all = z[r, top]
        largest = max(abs(float(zmax_all.max())), abs(float(zmax_all.min()))) if c else 0.0
        unshifted = dtype == np.float32 and c > 0 and b * largest <= UNSHIFTED_LIMIT
        s32 = None if unshifted else (b * zmax_all.astype(np.float64)).astype(dtype)
        for a in range(0, c, buf.tile):
            _tile(z, a, min(a + buf.tile, c), b, s32, eps, count, sq_moments, sq_count, pick, buf, tile_hook)
        sq_source = buf.sq_sums if pick is None else buf.sq_picked
    at = r if index is None else index
    zmax = z[at, top].astype(np.float64)
    zy = z[at, y].astype(np.float64)
    s: float | np.ndarray = 0.0 if s32 is None else s32.astype(np.float64)
    total, kappa = row_cumulants(buf.sums[: count + 1, :c].astype(np.float64), eps, moments, s, b)
    scale = beta / b
    log_total = np.log(total)
    if s32 is not None:
        log_total += scale * s
    terms = ExpTerms(beta, b, eps, z, s32, total, log_total, top, zmax, zy, kappa.T, index=index)
    terms.classwise = found
    if sq_moments is not None:
        sums = buf.sq_sums[: extra + 1, :c].astype(np.float64)
        sq_total = sums[0] + 2.0 * eps * sums[1] if extra else sums[0]
        terms.sq_log_total = np.log(sq_total) + 2.0 * scale * s
        terms.sq_cumulants = np.full((c, sq_moments), np.nan)
        if sq_moments:
            rows = slice(None) if pick is None else pick
            sums = sq_source[: sq_count + 1, :c][:, rows].astype(np.float64)
            _, sq_kappa = row_cumulants(sums, 2.0 * eps, sq_moments, s if s32 is None else cast(np.ndarray, s)[rows], b)
            terms.sq_cumulants[rows] = sq_kappa.T
    return terms


def _tile(
    z: np.ndarray, a: int, end: int, b: float, s32: np.ndarray | None, eps: float, count: int,
    sq_moments: int | None, sq_count: int, pick: np.ndarray | None, buf: _Buffers, hook: Callable[[Tile], None] | None,
) -> None:
    """Rows a..end-1 of a chunk: their exponentials and the sums over their classes, into ``buf``."""
    t, dtype = end - a, buf.e.dtype
    zt, x, e = z[a:end], buf.x[:t], buf.e[:t]
    if s32 is None and b == 1.0:
        x = zt
    else:
        np.multiply(zt, dtype.type(b), out=x)
        if s32 is not None:
            np.subtract(x, s32[a:end, None], out=x)
    np.exp(x, out=e)
    ex = buf.ex[:t]
    _power_sums(e, x, count, ex, buf.p[:t], buf.sums[: count + 1, a:end])
    if hook is not None:
        total = buf.sums[0, a:end].astype(np.float64)
        if eps:
            total += eps * buf.sums[1, a:end].astype(np.float64)
        hook(Tile(a, e, x, ex if count else None, total, eps))
    if sq_moments is None:
        return
    higher = sq_count if pick is None else (1 if eps else 0)  # the powers of x every row needs at 2 beta
    if higher:
        e2, q = np.multiply(e, e, out=buf.p[:t]), buf.q[:t]
        _power_sums(e2, x, higher, q, q, buf.sq_sums[: higher + 1, a:end])
    _row_dot(e, e, buf.sq_sums[0, a:end])  # the total at 2 beta, one sweep, the same on every path
    if pick is None:
        return
    lo, hi = np.searchsorted(pick, [a, end])
    if hi > lo:  # the cumulants at 2 beta of the rows asked for, gathered
        local = pick[lo:hi] - a
        w2 = e[local]
        np.multiply(w2, w2, out=w2)
        out = np.empty((sq_count + 1, hi - lo), dtype)
        _power_sums(w2, x[local], sq_count, w2, w2, out)
        buf.sq_picked[: sq_count + 1, pick[lo:hi]] = out


# --------------------------------------------------------------------------
# Running a pass


@dataclass(frozen=True)
class Selection:
    """Which rows a pass reads: all (``rows`` None) or sorted indices; optional
    per-row weights and part numbers (both indexed like the selected rows)."""

    rows: np.ndarray | None = None
    weights: np.ndarray | None = None
    part: np.ndarray | None = None


ALL_ROWS = Selection()


def _chunk(
    logits: np.ndarray, labels: np.ndarray, sel: Selection, step: int, index: int, gather: bool = True
) -> Chunk:
    """The chunk ``index``; scattered rows are copied out unless ``gather`` is False (then ``Chunk.rows``)."""
    start = index * step
    key: slice | np.ndarray
    if sel.rows is None:
        key = slice(start, start + step)
    else:
        key = sel.rows[start : start + step]
        if len(key) and int(key[-1]) - int(key[0]) == len(key) - 1:
            key = slice(int(key[0]), int(key[-1]) + 1)  # a contiguous run: read a view
    pick = slice(start, start + step)
    w = None if sel.weights is None else np.asarray(sel.weights[pick], dtype=np.float64)
    part = None if sel.part is None else sel.part[pick]
    if not gather and isinstance(key, np.ndarray):
        return Chunk(index, start, logits, np.asarray(labels[key]), w, part, key)
    return Chunk(index, start, logits[key], np.asarray(labels[key]), w, part)


def _kernels_loaded() -> bool:
    """Import the compiled kernel (numba's import, the kernel's compilation or cache load), in this thread,
    before any chunk; False, with a warning, if that fails (the numpy code then runs: same results)."""
    try:
        with _signals.deferred():  # a signal inside an extension module's import can crash it
            from .kernels import sweep_kernels  # noqa: F401
    except Exception as exc:  # an optimisation: never worth failing a fit for
        warnings.warn(OnnxcalWarning(f"the compiled pass is not available ({exc}); using numpy"), stacklevel=3)
        return False
    return True


def run_pass(
    logits: np.ndarray,
    labels: np.ndarray,
    beta: float,
    consumers: Callable[[], Sequence[Consumer]],
    *,
    selection: Selection = ALL_ROWS,
    moments: int = 0,
    sq_moments: int | None = None,
    sq_part: int | None = None,
    threads: int | None = None,
) -> list[Sequence[Consumer]]:
    """One pass: call every consumer on every chunk (and tile); return the consumers of each lane.

    ``consumers()`` makes the consumers of one lane. Lanes hold disjoint sets
    of chunks (chunk i in lane i mod LANES); merge their sums in lane order.
    ``moments`` and ``sq_moments`` as in :func:`exp_terms`; the cumulants at
    2 beta only for the rows of part ``sq_part`` (all when None).
    """
    n = len(logits) if selection.rows is None else len(selection.rows)
    k = logits.shape[1]
    dtype = compute_dtype(logits)
    compiled = dtype == np.float32 and kernels.worth_it(n * k) and _kernels_loaded()
    in_place = compiled and logits.dtype == np.float32 and logits.flags.c_contiguous  # the kernel reads rows by index
    step = rows_per_chunk(k, compiled)
    n_chunks = -(-n // step)
    lanes = [consumers() for _ in range(LANES)]
    threads = default_threads() if threads is None else max(1, min(int(threads), LANES))
    if n * k < PARALLEL_ELEMENTS:
        threads = 1

    stop = threading.Event()  # set when the calling thread is interrupted: the workers end after their chunk

    def work(worker: int) -> None:
        buf = _Buffers(min(step, max(n, 1)), k, dtype, compiled=compiled)
        for index in range(n_chunks):
            lane = index % LANES
            if lane % threads != worker or stop.is_set():
                continue
            chunk = _chunk(logits, labels, selection, step, index, gather=not in_place)
            mask = None if sq_part is None or chunk.part is None else chunk.part == sq_part
            if compiled:  # the kernel does the tiles' work, for the consumer that asks for Columns
                asks = [fn for fn in (getattr(c, "columns", None) for c in lanes[lane]) if fn is not None]
                assert len(asks) <= 1, "one consumer per pass may ask for column sums"
                columns = asks[0](chunk) if asks else None
                terms = exp_terms(chunk.z, chunk.y, beta, moments, sq_moments, buf, mask, None, columns, chunk.rows)
                for consumer in lanes[lane]:
                    consumer.add(chunk, terms)
                continue
            tiles: list[Callable[[Chunk, Tile], None]] = [
                fn for fn in (getattr(c, "tile", None) for c in lanes[lane]) if fn is not None
            ]

            def hook(tile: Tile, chunk: Chunk = chunk, tiles: list[Callable[[Chunk, Tile], None]] = tiles) -> None:
                for fn in tiles:
                    fn(chunk, tile)

            terms = exp_terms(chunk.z, chunk.y, beta, moments, sq_moments, buf, mask, hook if tiles else None)
            for consumer in lanes[lane]:
                consumer.add(chunk, terms)

    with one_blas_thread() if threading.current_thread() is threading.main_thread() else nullcontext():
        if threads == 1:
            work(0)
        else:
            with ThreadPoolExecutor(threads) as pool:
                try:
                    for f in [pool.submit(work, t) for t in range(threads)]:
                        f.result()
                except BaseException:  # Ctrl-C (or an error): do not wait for the other chunks
                    stop.set()
                    raise
    return lanes


class MomentSums:
    """Weighted sums per part of the NLL's beta-derivatives, and optionally per-row terms.

    For a row with label y the NLL is L(beta) - beta z_y, so its first
    derivative is g = kappa_1 - z_y and its j-th (j >= 2) kappa_j.
    ``sums[part]`` holds [sum w g, sum w kappa_2, ..., sum w kappa_m] and
    ``weight[part]`` the total weight; ``wrong[part]`` the weight of rows whose
    label is not the (first) top logit. With ``keep`` the per-row
    [g, kappa_2, ...] go into ``keep[positions]`` (shared by all lanes).
    """

    def __init__(self, parts: int, order: int, keep: np.ndarray | None = None) -> None:
        self.sums = np.zeros((parts, order))
        self.weight = np.zeros(parts)
        self.wrong = np.zeros(parts)
        self.keep = keep
        self.parts = parts

    def add(self, chunk: Chunk, terms: ExpTerms) -> None:
        d = terms.cumulants.copy()
        d[:, 0] -= terms.zy
        w = np.ones(len(d)) if chunk.w is None else chunk.w
        part = np.zeros(len(d), np.intp) if chunk.part is None else chunk.part
        onehot = np.zeros((self.parts, len(d)))
        onehot[part, np.arange(len(d))] = w
        self.sums += onehot @ d
        self.weight += onehot.sum(axis=1)
        self.wrong += onehot @ (terms.top != chunk.y)
        if self.keep is not None:
            self.keep[chunk.start : chunk.start + len(d)] = d

    @staticmethod
    def merge(lanes: Sequence[MomentSums]) -> MomentSums:
        out = lanes[0]
        for other in lanes[1:]:
            out.sums += other.sums
            out.weight += other.weight
            out.wrong += other.wrong
        return out
