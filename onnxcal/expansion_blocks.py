"""The expansion's bootstrap replicates in blocks, through compiled loops.

:meth:`onnxcal.expansion.Expansion.root` and :meth:`~onnxcal.expansion.Expansion.metrics` compute one replicate
at a time with numpy: each replicate reads every per-row term from memory (about 40 MB on a million rows), makes
its counts with ``bincount`` and its confidences, series and exponentials as whole arrays, and on a large set that
is bound by memory. Here the replicates go by blocks of :data:`BLOCK`: their counts are kept as uint8 (a row drawn
255 times sends its replicate back to the numpy path), and the loops of :mod:`onnxcal.kernels.resample_kernels`
read the per-row terms tile by tile, computing every replicate of the block from a tile while it is in the core's
cache. The binned errors then use the same bound as the numpy code (every confidence within delta of its value at
the fit, rows in that order), and the equal-mass edges the same order statistics and interpolation.

The draws are those of the numpy path (the same generator, in the same order); the results equal it to rounding
(sums in another order, an exponential within 1e-15; see the tests), not to the bit.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np

from .expansion import TERMS, Expansion, _series_top, replicate_metrics
from .metrics.binning import lerp_quantiles

BLOCK = 8
"""Replicates computed together from each tile of per-row terms."""


class Drawn(Protocol):
    """A replicate's drawn positions in each part (:class:`onnxcal.resample.Draw`)."""

    fit: np.ndarray
    held: np.ndarray


class Source(Protocol):
    """The generator the replicates draw rows from, and how (:class:`onnxcal.resample.DirectDraws`)."""

    rng: np.random.Generator
    replicates: int
    n_fit: int
    n_eval: int | None  # None: the held-out part is the fit part (an in-sample bootstrap)

    def redraw(self) -> Drawn: ...

    def told(self, done: int) -> None: ...


@dataclass
class Block:
    """A block's counts: ``fit`` (replicates, fit rows) and ``held`` (replicates, held-out rows in ascending
    confidence at the fit), uint8; ``wrapped[r]`` is replicate r's draw when one of its counts reached 255 (its
    uint8 counts may have wrapped: it takes the numpy path), else None."""

    fit: np.ndarray
    held: np.ndarray
    n_fit: list[int]
    n_held: list[int]
    wrapped: list[Any]


class CompiledReplicates:
    """The replicates of an accurate, finished :class:`~onnxcal.expansion.Expansion`, a block at a time.

    :meth:`blocks` makes the blocks' counts as the draws come (on the thread that draws); :meth:`roots` and
    :meth:`metrics` may then run on several threads at once (the kernels release the GIL).
    """

    def __init__(self, exp: Expansion) -> None:
        from .kernels import resample_kernels  # numba is imported only when a kernel is needed

        assert exp.rank is not None and exp.u is not None  # an accurate expansion, finished
        self.kernels, self.exp = resample_kernels, exp
        self.rank = exp.rank.astype(np.int32) if len(exp.rank) < 2**31 else exp.rank  # half the bytes to gather

    def blocks(self, draws: Iterable[Drawn], size: int = BLOCK) -> Iterator[Block]:
        """The draws' counts, ``size`` replicates a block (the last may be smaller)."""
        pending: list[Drawn] = []
        for draw in draws:
            pending.append(draw)
            if len(pending) == size:
                yield self._count(pending)
                pending = []
        if pending:
            yield self._count(pending)

    def drawn_blocks(self, source: Source, size: int = BLOCK) -> Iterator[Block]:
        """The blocks of the replicates that ``source`` draws, counted as they are drawn (:func:`draw_counts`: the
        same positions as numpy's ``integers``, and the generator left in the same state), without the arrays of
        drawn positions. A replicate with a count that reached 255 is drawn again from the same state by
        ``source.redraw()`` and takes the numpy path."""
        exp = self.exp
        assert exp.order is not None
        n_held = source.n_fit if source.n_eval is None else source.n_eval
        source.told(0)
        for first in range(0, source.replicates, size):
            count = min(size, source.replicates - first)
            fit = np.zeros((count, source.n_fit), np.uint8)
            held = np.zeros((count, n_held), np.uint8)
            wrapped: list[Any] = []
            for r in range(count):
                state = source.rng.bit_generator.state
                full = self._draw_counts(source.rng, source.n_fit, fit[r], None)
                if source.n_eval is None:
                    held[r] = fit[r][exp.order]
                else:
                    full |= self._draw_counts(source.rng, source.n_eval, held[r], self.rank)
                if full:
                    source.rng.bit_generator.state = state
                wrapped.append(source.redraw() if full else None)
                source.told(first + r + 1)
            yield Block(fit, held, [source.n_fit] * count, [n_held] * count, wrapped)

    def _draw_counts(self, rng: np.random.Generator, n: int, counts: np.ndarray, rank: np.ndarray | None) -> bool:
        if draws_like_numpy(rng, n):
            return draw_counts(self.kernels, rng, n, counts, rank)
        k = self.kernels
        drawn = rng.integers(0, n, n, dtype=np.int32)
        return bool(k.add_counts(drawn, counts) if rank is None else k.add_ranked_counts(drawn, rank, counts))

    def _count(self, draws: list[Drawn]) -> Block:
        k = self.kernels
        fit = np.zeros((len(draws), self.exp.fit_terms.shape[1]), np.uint8)
        held = np.zeros((len(draws), len(self.rank)), np.uint8)
        wrapped: list[Any] = []
        for r, draw in enumerate(draws):
            full = k.add_counts(draw.fit, fit[r]) | k.add_ranked_counts(draw.held, self.rank, held[r])
            wrapped.append(draw if full else None)
        return Block(fit, held, [len(d.fit) for d in draws], [len(d.held) for d in draws], wrapped)

    def fit_counts(self, block: Block, r: int) -> np.ndarray:
        """Replicate r's counts of the fit rows (as ``Draw.fit_counts``)."""
        counts: np.ndarray = block.fit[r].astype(np.float64)
        return counts

    def held_counts(self, block: Block, r: int) -> np.ndarray:
        """Replicate r's counts of the held-out rows, in their own order (as ``Draw.held_counts``)."""
        counts: np.ndarray = block.held[r][self.rank].astype(np.float64)
        return counts

    def roots(self, block: Block) -> list[float | None]:
        """Each replicate's d = beta - beta0, as :meth:`Expansion.root` (None: beyond the expansion; and for a
        wrapped replicate)."""
        sums = np.empty((len(block.n_fit), TERMS))
        self.kernels.fit_sums(self.exp.fit_terms, block.fit, sums)
        return [None if block.wrapped[r] is not None else self.exp.root_of(sums[r], float(n))
                for r, n in enumerate(block.n_fit)]

    def metrics(self, block: Block, ds: list[float | None], n_bins: int) -> list[dict[str, Any] | None]:
        """Each replicate's metrics at beta0 + d, as :meth:`Expansion.metrics` (None where that gives None, and
        where d is None)."""
        exp = self.exp
        assert exp.top_max is not None and exp.sq_max is not None and exp.u is not None
        series = np.zeros((len(ds), 10))  # the layout of resample_kernels.held_sums
        used = []
        for r, d in enumerate(ds):
            top, sq = (None, None) if d is None else (_series_top(exp.top_max, d), _series_top(exp.sq_max, d))
            if d is None or top is None or sq is None:
                continue
            used.append(r)
            series[r, :3] = [d / (j + 1) for j in range(TERMS)]
            series[r, 3:6] = np.arange(1, TERMS + 1) <= top
            series[r, 6:9] = np.arange(1, TERMS + 1) <= sq
            series[r, 9] = exp.beta0 + d
        v = np.empty((len(ds), len(exp.u)))
        out = np.empty((len(ds), 4))
        self.kernels.held_sums(exp.log_top, exp.log_sq, exp.gap, exp.u, block.held, series, v, out)
        found: list[dict[str, Any] | None] = [None] * len(ds)
        cum = np.empty(len(exp.u) + 1, np.int64)
        for r in used:
            found[r] = self._binned(block.held[r], v[r], out[r], cum, block.n_held[r], n_bins)
        return found

    def _binned(
        self, c: np.ndarray, v: np.ndarray, out: np.ndarray, cum: np.ndarray, n: int, n_bins: int
    ) -> dict[str, Any]:
        """One replicate's metrics from its counts ``c``, confidences ``v`` and sums ``out`` (see ``held_sums``)."""
        u, k, correct = self.exp.u, self.kernels, self.exp.correct
        assert u is not None
        delta = float(out[3]) * (1 + 1e-9) + 1e-15  # as Expansion.metrics
        k.running_counts(c, cum)
        inner = np.linspace(0.0, 1.0, n_bins + 1)[1:-1]
        edges = lerp_quantiles(lambda j: k.order_pair(u, v, c, cum, delta, j, n), n, inner)

        def binned(edges: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
            sums = np.empty((3, len(edges) + 1))
            k.bin_sums(u, v, c, correct, edges, delta, sums)
            return sums[0], sums[1], sums[2]

        return replicate_metrics((float(out[0]), float(out[1]), float(out[2])), binned(inner), binned(edges), float(n))


def draw_counts(
    k: Any, rng: np.random.Generator, n: int, counts: np.ndarray, rank: np.ndarray | None,
    positions: np.ndarray | None = None,
) -> bool:
    """counts[p] (or counts[rank[p]]) += 1 for n positions p drawn in [0, n) as ``rng.integers(0, n, n)`` draws
    them, leaving ``rng`` as that call leaves it; True if a count reached 255. (Given ``positions``, draw
    len(positions) of them into it instead, as ``rng.integers(0, n, len(positions))``.)

    numpy draws a position from a 32-bit value of its bit generator (two per 64-bit output, the low half first; a
    half left over is kept for the next call in the generator's state: ``has_uint32``, ``uinteger``). Here the
    64-bit outputs come from ``bit_generator.random_raw``, never more than the positions still to draw could use,
    and the kernel (:func:`onnxcal.kernels.resample_kernels.bounded_counts`) draws from their halves.
    """
    size = n if positions is None else len(positions)
    out = np.empty(0, np.int64) if positions is None else positions
    if n == 1:  # numpy draws nothing from the generator for a range of one value
        if positions is None:
            counts[0 if rank is None else rank[0]] += size
        else:
            positions[:] = 0
        return bool(positions is None and counts.max() == 255)
    bits = rng.bit_generator
    state = bits.state
    head = np.array([state["uinteger"]] if state["has_uint32"] else [], np.uint32)
    stream = np.empty(0, np.uint32)
    last = state["uinteger"]
    order = np.empty(0, np.int64) if rank is None else rank
    done, full = 0, False
    while True:
        got, used, wrapped = k.bounded_counts(head, stream, n, size - done, order, counts, out[done:])
        done, full = done + got, full or wrapped
        # the values left: those of a position cut short by the end of the values (a few), or at most one
        head = np.concatenate([head[used:], stream]) if used < len(head) else stream[used - len(head):].copy()
        if done == size:
            break
        raw = bits.random_raw(max(1, (size - done - len(head) + 1) // 2))
        last = int(raw[-1] >> np.uint64(32))
        stream = raw.view(np.uint32)
    assert len(head) <= 1  # never more 64-bit outputs than the positions left could use
    state = dict(bits.state)
    state["has_uint32"], state["uinteger"] = (1, int(head[0])) if len(head) else (0, last)
    bits.state = state
    return bool(full)


_CHECKED: dict[str, bool] = {}


def draws_like_numpy(rng: np.random.Generator, n: int) -> bool:
    """Whether :func:`draw_counts` gives the counts and state of ``rng.integers(0, n, n)`` for this generator:
    a PCG64 bit generator (``numpy.random.default_rng``), 0 < n < 2^31, and, checked once per process, the same
    positions and final state as numpy's own on a few ranges (a half left over before, many rejections)."""
    name = rng.bit_generator.state.get("bit_generator")
    if name != "PCG64" or not 0 < n < 2**31:
        return False
    if name not in _CHECKED:
        from .kernels import resample_kernels

        same = True
        for m, size in ((1, 3), (2, 1001), (5, 1000), (99_999, 99_999), (2**31 - 1, 5000), (3 * 2**29, 5001)):
            a, b = np.random.default_rng([m, 7]), np.random.default_rng([m, 7])
            a.integers(0, 3, 1, dtype=np.int32)  # leaves a half over
            b.integers(0, 3, 1, dtype=np.int32)
            want = a.integers(0, m, size, dtype=np.int32)
            got = np.empty(size, np.int64)
            draw_counts(resample_kernels, b, m, np.empty(0, np.uint8), None, got)
            same = same and bool(np.array_equal(got, want)) and a.bit_generator.state == b.bit_generator.state
        _CHECKED[name] = same
    return _CHECKED[name]
