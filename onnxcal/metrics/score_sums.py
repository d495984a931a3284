"""The sums behind the metrics of softmax(beta z), gathered in one :mod:`onnxcal.sweep` pass.

:class:`ScoreSums` is a consumer of the pass: chunk by chunk it adds the
NLL, Brier, reliability and classwise sums of each part of the rows;
:class:`RowScores` keeps every row's top-label confidence and correctness
(the adaptive ECE needs them all). :func:`onnxcal.metrics.score_metrics`
turns them into :class:`~onnxcal.metrics.Metrics`.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any, cast

import numpy as np

from ..sweep import ALL_ROWS, Chunk, Columns, Consumer, ExpTerms, Selection, Tile, run_pass
from .binning import DEFAULT_BINS, bin_ids


def _flat_true(mask: np.ndarray) -> np.ndarray:
    """``numpy.flatnonzero(mask)`` for a C-contiguous boolean array with few True entries.

    The search runs over 8-byte words first (an eighth of the entries),
    then over the bytes of the words that are not zero.
    """
    flat = mask.reshape(-1)
    whole = flat.size // 8 * 8
    words = flat[:whole].view(np.uint64)
    found = np.flatnonzero(words != 0)
    inside = np.flatnonzero(words[found].view(np.bool_))
    found = found[inside >> 3] * 8 + (inside & 7)
    if whole < flat.size:
        found = np.concatenate([found, whole + np.flatnonzero(flat[whole:])])
    return found


class RowScores:
    """Per-row scores of one pass, written by every lane at its rows' positions (9 bytes a row)."""

    def __init__(self, n: int) -> None:
        self.conf = np.empty(n)  # probability of the top class
        self.correct = np.empty(n, dtype=bool)  # the top class is the label


class ScoreSums:
    """Sums behind the metrics of softmax(beta z), per part (a pass consumer).

    Chunk by chunk: the total weight, NLL and Brier sums per part, the
    top-label reliability sums (counts, confidence, correct) over
    ``n_bins`` equal-width bins, and the classwise sums (probability and
    label indicator per (class, bin), flat index class * M + bin). Per row
    it keeps the top-label confidence and correctness (in a shared
    :class:`RowScores`: the adaptive ECE needs them all). The probability
    side of the classwise sums needs every entry: a softmax row has fewer than M
    probabilities above the first edge 1/M; only those are binned one by
    one, found by one comparison of the exponentials with a threshold per
    tile, tile by tile (:meth:`tile`, while the exponentials exist), and
    computed again from their logits. The first bin of each class gets the rest, by subtraction from
    the class's column sum (a matrix-vector product).
    """

    def __init__(self, parts: int, k: int, n_bins: int, rows: RowScores) -> None:
        self.parts, self.k, self.n_bins, self.rows = parts, k, n_bins, rows
        self.weight, self.nll, self.brier = np.zeros(parts), np.zeros(parts), np.zeros(parts)
        self.bins = np.zeros((parts, 3, n_bins))
        self.p_sum = np.zeros(parts * k * n_bins)
        self.y_sum = np.zeros(parts * k * n_bins)
        self.column = np.zeros(parts * k)  # sum of p per (part, class)
        self.upper = np.zeros(parts * k)  # of which above the first edge
        self.first = float(np.linspace(0.0, 1.0, n_bins + 1)[1])
        self._mask = np.zeros((0, k), bool)  # the current chunk's entries that may be above 1/M
        self._w = np.zeros((parts, 0))  # the current chunk's weights per part

    def add(self, chunk: Chunk, terms: ExpTerms) -> None:
        c = len(chunk.y)
        at = slice(chunk.start, chunk.start + c)
        log_total, beta, P, M = terms.log_total, terms.beta, self.parts, self.n_bins
        w = np.ones(c) if chunk.w is None else chunk.w
        part = None if chunk.part is None else chunk.part.astype(np.intp)
        conf = np.exp(beta * terms.zmax - log_total, out=self.rows.conf[at])
        correct = np.equal(terms.top, chunk.y, out=self.rows.correct[at])
        ids = bin_ids(conf, M) if part is None else bin_ids(conf, M) + M * part
        # the three reliability sums in one bincount: index j * (P M) + part * M + bin
        flat = np.concatenate([ids, ids + P * M, ids + 2 * P * M])
        sums = np.bincount(flat, np.concatenate([w, w * conf, w * correct]), 3 * P * M)
        self.bins += sums.reshape(3, P, M).swapaxes(0, 1)
        log_py = beta * terms.zy - log_total
        # ScoreSums runs only in temperature_pass, whose sq_moments is an int, so L(2 beta) is there
        assert terms.sq_log_total is not None
        # sum_k (p_k - y_k)^2 = sum_k p_k^2 - 2 p_y + 1, sum_k p_k^2 = exp(L(2 beta) - 2 L(beta))
        brier = np.exp(terms.sq_log_total - 2.0 * log_total) - 2.0 * np.exp(log_py) + 1.0
        if part is None:
            self.weight += w.sum()
            self.nll -= w @ log_py
            self.brier += w @ brier
        else:
            sums = np.bincount(
                np.concatenate([part, part + P, part + 2 * P]), np.concatenate([w, w * log_py, w * brier]), 3 * P
            )
            self.weight += sums[:P]
            self.nll -= sums[P : 2 * P]
            self.brier += sums[2 * P :]
        if terms.classwise:  # the compiled pass added the classwise sums (Columns)
            return
        p_y = terms.probabilities(np.arange(c), chunk.y)  # as the classwise bins see it
        where = bin_ids(p_y, M) + M * chunk.y
        if part is not None:
            where += (self.k * M) * part
        np.add.at(self.y_sum, where, w)
        self._upper_bins(chunk, terms, w, part)

    def columns(self, chunk: Chunk) -> Columns:
        """The classwise sums of a chunk, for the compiled pass to add (for :meth:`tile` and part of ``add``)."""
        c = len(chunk.y)
        w = np.ones(c) if chunk.w is None else chunk.w
        part = np.zeros(c, np.intp) if chunk.part is None else chunk.part.astype(np.intp)
        edges = np.linspace(0.0, 1.0, self.n_bins + 1)[1:-1]  # bin_ids' rule: np.searchsorted on the inner edges
        column = self.column.reshape(self.parts, self.k)
        return Columns(w, part, self.parts, self.first, chunk.y, edges, column, self.p_sum, self.upper, self.y_sum)

    def tile(self, chunk: Chunk, terms: Tile) -> None:
        """From a tile's exponentials: the column sums of p per part, and which entries may be above 1/M."""
        e, total = terms.e, terms.total
        t, dtype = len(total), e.dtype
        at = slice(terms.start, terms.start + t)
        if terms.start == 0:  # the chunk's first tile
            self._mask = np.empty((len(chunk.y), self.k), bool)
            w = np.ones(len(chunk.y)) if chunk.w is None else chunk.w
            if self.parts == 1:
                self._w = w[None, :]
            else:  # row p: the weights of the part's rows, 0 elsewhere
                self._w = np.zeros((self.parts, len(w)))
                self._w[cast(np.ndarray, chunk.part), np.arange(len(w))] = w  # parts > 1: the pass has parts
        # p > 1/M needs e > total / M, give or take eps x (below 1e-6)
        np.greater(e, dtype.type(float(total.min()) * self.first * (1.0 - 1e-5)), out=self._mask[at])
        coef = (self._w[:, at] / total).astype(dtype)
        col = coef @ e
        if terms.eps:  # p = e (1 + eps x) / total
            col += dtype.type(terms.eps) * (coef @ terms.ex)
        self.column += col.ravel()

    def _upper_bins(self, chunk: Chunk, terms: ExpTerms, w: np.ndarray, part: np.ndarray | None) -> None:
        """The classwise sums of the entries above the first edge 1/M (the tiles marked the candidates)."""
        k, M = self.k, self.n_bins
        rows, cols = np.divmod(_flat_true(self._mask), k)
        p = terms.probabilities(rows, cols)
        keep = p > self.first
        rows, cols, p = rows[keep], cols[keep], p[keep]
        wp = p * w[rows]
        where = cols if part is None else cols + k * part[rows]
        np.add.at(self.p_sum, bin_ids(p, M) + M * where, wp)
        np.add.at(self.upper, where, wp)

    def classwise(self, part: int) -> tuple[np.ndarray, np.ndarray]:
        """The (class, bin) sums of probabilities and labels of one part."""
        size = self.k * self.n_bins
        p_sum = self.p_sum[part * size : (part + 1) * size].copy()
        rest = self.column - self.upper
        p_sum[:: self.n_bins] += rest[part * self.k : (part + 1) * self.k]
        return p_sum, self.y_sum[part * size : (part + 1) * size]

    @staticmethod
    def merge(lanes: Sequence[ScoreSums]) -> ScoreSums:
        out = lanes[0]
        for o in lanes[1:]:
            for name in ("weight", "nll", "brier", "bins", "p_sum", "y_sum", "column", "upper"):
                getattr(out, name).__iadd__(getattr(o, name))
        return out


def temperature_pass(
    logits: np.ndarray,
    labels: np.ndarray,
    beta: float,
    n_bins: int = DEFAULT_BINS,
    *,
    selection: Selection = ALL_ROWS,
    parts: int = 1,
    moments: int = 0,
    sq_moments: int = 0,
    sq_part: int | None = None,
    extra: Callable[[], Sequence[Any]] | None = None,
    threads: int | None = None,
) -> tuple[ScoreSums, list[Any]]:
    """One pass scoring softmax(beta z) per part (and feeding ``extra`` consumers).

    Returns the merged :class:`~onnxcal.metrics.score_sums.ScoreSums` and,
    per lane, the ``extra`` consumers (for the caller to merge).
    """
    n = len(logits) if selection.rows is None else len(selection.rows)
    rows = RowScores(n)
    k = logits.shape[1]

    def make() -> tuple[Consumer, ...]:
        return (ScoreSums(parts, k, n_bins, rows), *(extra() if extra else ()))

    lanes = run_pass(
        logits, labels, beta, make, selection=selection, moments=moments, sq_moments=sq_moments,
        sq_part=sq_part, threads=threads,
    )
    sums = ScoreSums.merge([cast(ScoreSums, lane[0]) for lane in lanes])  # make() puts it first
    return sums, [lane[1:] for lane in lanes]
