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
        self.kernels, self.exp, self.rank = resample_kernels, exp, exp.rank

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
        cum = np.empty(len(exp.u) + 1)
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
