"""Compiled loops of the bootstrap's Taylor replicates (:mod:`onnxcal.expansion`, :mod:`onnxcal.resample`).

Replicates go by blocks (:mod:`onnxcal.expansion_blocks`). A replicate of the expansion path needs, from the
per-row terms kept at the fit:

* its counts: :func:`bounded_counts` draws the positions from the generator's 32-bit values exactly as numpy's
  ``Generator.integers`` does and counts them (uint8) without an array of positions (:func:`add_counts` and
  :func:`add_ranked_counts` count positions numpy drew, where the generator is not numpy's default);
* the fit part's sums of (g, kappa_2, kappa_3) weighted by its counts (the root's derivatives): :func:`fit_sums`,
  tile by tile for a whole block of replicates, so the terms are read from memory once per block;
* the held-out part's series, with its counts in the order of the rows' confidence at the fit: one loop over the
  rows (:func:`held_sums`, per tile for the block) evaluates the two Taylor series (log p_top and
  log sum_k p_k^2), the confidence v, log p_y, the sums of c log p_y, c sum_k p_k^2 and c p_y, and the largest
  |v - u| (the bound the binned errors' windows need), reading each per-row term once per block;
* the binned sums (:func:`bin_sums`: count, confidence and correct per bin, right-closed bins as
  ``searchsorted(inner, v, side="left")``: runs of rows between the edges summed whole, the rows within delta of
  an edge one by one) and the order statistics of the pool of confidences that the equal-mass edges interpolate
  (:func:`order_pair`, with :func:`running_counts`).

The arithmetic is that of the numpy code in :mod:`onnxcal.expansion`, except that sums are taken in another order
(vectorised partial sums) and the exponential is :func:`_exp` below, a polynomial that the compiler vectorises
(numba has no vector exponential without Intel's SVML); its relative error against ``numpy.exp`` is below 5e-15
on [-700, 700] (tests/test_resample_compiled.py; 2e-16 measured). Every kernel releases the GIL, so replicates
run on onnxcal's own threads.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from llvmlite import ir  # type: ignore[import-untyped]  # numba's code generator; no type hints
from numba import njit, types
from numba.extending import intrinsic

_JIT: dict[str, Any] = {"nogil": True, "fastmath": True, "cache": True, "error_model": "numpy"}

_NO_REASSOC = {"nnan", "ninf", "nsz", "arcp", "contract", "afn"}
"""fastmath without reassociation, for :func:`_exp`: its range reduction x - k ln2_hi - k ln2_lo must be
evaluated in that order (the compiler inlines the function into the loops, keeping these flags)."""

_LOG2E = 1.4426950408889634
_LN2_HI = 0.6931471803691238  # ln 2 split in two (Cody & Waite): LN2_HI has its low 21 bits zero, so k LN2_HI is
_LN2_LO = 1.9082149292705877e-10  # exact for |k| < 2^21


def _as_float_typer(typingctx: Any, bits: Any) -> Any:
    """The float64 whose bits are the int64 ``bits`` (a vectorisable 2^k)."""

    def codegen(context: Any, builder: Any, signature: Any, args: Any) -> Any:
        return builder.bitcast(args[0], ir.DoubleType())

    return types.float64(types.int64), codegen


_as_float: Any = intrinsic(_as_float_typer)


def _as_bits_typer(typingctx: Any, x: Any) -> Any:
    """The int64 whose bits are the float64 ``x``: for x >= 0 these integers are in the order of the floats, and
    a running maximum of integers vectorises where one of floats does not."""

    def codegen(context: Any, builder: Any, signature: Any, args: Any) -> Any:
        return builder.bitcast(args[0], ir.IntType(64))

    return types.int64(types.float64), codegen


_as_bits: Any = intrinsic(_as_bits_typer)


@njit(nogil=True, cache=True, error_model="numpy", fastmath=_NO_REASSOC)
def _exp(x: float) -> float:
    """exp(x) for x in [-700, 700] (clamped there): 2^k exp(r), |r| <= ln(2)/2, exp(r) to degree 13
    (truncation below 2e-16 relative)."""
    x = min(max(x, -700.0), 700.0)
    k = np.floor(x * _LOG2E + 0.5)
    r: float = (x - k * _LN2_HI) - k * _LN2_LO
    p = 1.0 / 6227020800.0
    p = p * r + 1.0 / 479001600.0
    p = p * r + 1.0 / 39916800.0
    p = p * r + 1.0 / 3628800.0
    p = p * r + 1.0 / 362880.0
    p = p * r + 1.0 / 40320.0
    p = p * r + 1.0 / 5040.0
    p = p * r + 1.0 / 720.0
    p = p * r + 1.0 / 120.0
    p = p * r + 1.0 / 24.0
    p = p * r + 1.0 / 6.0
    p = p * r + 0.5
    p = p * r + 1.0
    p = p * r + 1.0
    scale: float = _as_float((np.int64(k) + 1023) << 52)
    return p * scale


@njit(**_JIT)
def exp_array(x: np.ndarray, out: np.ndarray) -> None:
    """out = _exp(x), for the tests."""
    for i in range(x.shape[0]):
        out[i] = _exp(x[i])


TILE = 2048
"""Rows per tile of the block loops: a tile's per-row terms (about 100 bytes a row) stay in the core's cache while
every replicate of the block reads them."""


@njit(inline="always", **_JIT)
def _bump(counts: np.ndarray, p: int) -> bool:
    """counts[p] += 1 (uint8); True if it was 255 before (it has wrapped: the caller must not use the counts)."""
    x = counts[p]
    counts[p] = x + 1
    return bool(x == 255)


@njit(**_JIT)
def add_counts(drawn: np.ndarray, counts: np.ndarray) -> bool:
    """counts[p] += 1 for each drawn position p (uint8 counts); True if a count reached 255 (it may have wrapped:
    the caller must not use these counts)."""
    full = False
    for i in range(drawn.shape[0]):
        full |= _bump(counts, drawn[i])
    return full


@njit(**_JIT)
def add_ranked_counts(drawn: np.ndarray, rank: np.ndarray, counts: np.ndarray) -> bool:
    """counts[rank[p]] += 1 for each drawn position p, as :func:`add_counts`."""
    full = False
    for i in range(drawn.shape[0]):
        full |= _bump(counts, rank[drawn[i]])
    return full


@njit(**_JIT)
def _dot3(c: np.ndarray, g: np.ndarray, h: np.ndarray, k: np.ndarray) -> tuple[float, float, float]:
    """(sum c g, sum c h, sum c k): a loop from 0 over whole 1-d slices, which the compiler vectorises."""
    s0 = 0.0
    s1 = 0.0
    s2 = 0.0
    for i in range(c.shape[0]):
        w = np.float64(c[i])
        s0 += w * g[i]
        s1 += w * h[i]
        s2 += w * k[i]
    return s0, s1, s2


@njit(**_JIT)
def fit_sums(terms: np.ndarray, counts: np.ndarray, out: np.ndarray) -> None:
    """out[r, j] = sum_i counts[r, i] terms[j, i] for the three rows of ``terms`` (3, rows), tile by tile so that
    the terms are read from memory once for the whole block of replicates."""
    n = terms.shape[1]
    out[:] = 0.0
    for t0 in range(0, n, TILE):
        t1 = min(n, t0 + TILE)
        g, h, k = terms[0, t0:t1], terms[1, t0:t1], terms[2, t0:t1]
        for r in range(counts.shape[0]):
            s0, s1, s2 = _dot3(counts[r, t0:t1], g, h, k)
            out[r, 0] += s0
            out[r, 1] += s1
            out[r, 2] += s2


@njit(**_JIT)
def _series_sums(
    top: tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray],
    sq: tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray],
    gap: np.ndarray,
    u: np.ndarray,
    c: np.ndarray,
    s: np.ndarray,
    v: np.ndarray,
) -> tuple[float, float, float, float]:
    """One tile of :func:`held_sums` for one replicate (whole 1-d slices, vectorised)."""
    f0, f1, f2 = s[0], s[1], s[2]
    t1, t2, t3 = s[3], s[4], s[5]
    q1, q2, q3 = s[6], s[7], s[8]
    beta = s[9]
    a0, a1, a2, a3 = top
    b0, b1, b2, b3 = sq
    nll = 0.0
    total_sq = 0.0
    py = 0.0
    dev = np.int64(0)  # the bits of max |v - u|
    for i in range(u.shape[0]):
        lt = ((a3[i] * t3 * f2 + a2[i] * t2) * f1 + a1[i] * t1) * f0 + a0[i]
        ls = ((b3[i] * q3 * f2 + b2[i] * q2) * f1 + b1[i] * q1) * f0 + b0[i]
        vi = min(_exp(lt), 1.0)
        v[i] = vi
        dev = max(dev, _as_bits(abs(vi - u[i])))
        lpy = lt + beta * gap[i]
        ci = np.float64(c[i])
        nll += ci * lpy
        total_sq += ci * _exp(ls)
        py += ci * _exp(lpy)
    return nll, total_sq, py, _as_float(dev)


@njit(**_JIT)
def held_sums(
    log_top: np.ndarray,
    log_sq: np.ndarray,
    gap: np.ndarray,
    u: np.ndarray,
    counts: np.ndarray,
    series: np.ndarray,
    v: np.ndarray,
    out: np.ndarray,
) -> None:
    """The held-out rows' series for each replicate r of the block, tile by tile.

    ``series[r]`` = [d / 1, d / 2, d / 3, the masks of log p_top's terms 1-3, the masks of log sum_k p_k^2's terms
    1-3, beta] (a mask of 0 drops a term: see ``expansion._series``). Per row, v[r, i] = min(exp(log p_top), 1);
    out[r] = [sum c log p_y, sum c sum_k p_k^2, sum c p_y, max |v - u|].
    """
    n = u.shape[0]
    out[:] = 0.0
    for t0 in range(0, n, TILE):
        t1 = min(n, t0 + TILE)
        top = (log_top[0, t0:t1], log_top[1, t0:t1], log_top[2, t0:t1], log_top[3, t0:t1])
        sq = (log_sq[0, t0:t1], log_sq[1, t0:t1], log_sq[2, t0:t1], log_sq[3, t0:t1])
        for r in range(counts.shape[0]):
            nll, total_sq, py, dev = _series_sums(
                top, sq, gap[t0:t1], u[t0:t1], counts[r, t0:t1], series[r], v[r, t0:t1]
            )
            out[r, 0] += nll
            out[r, 1] += total_sq
            out[r, 2] += py
            out[r, 3] = max(out[r, 3], dev)


@njit(**_JIT)
def _bin_rows(
    v: np.ndarray, c: np.ndarray, correct: np.ndarray, inner: np.ndarray, out: np.ndarray, start: int, stop: int
) -> None:
    """out[:, b] += (sum c, sum c v, sum c correct) over rows start..stop - 1 in bin b = searchsorted(inner, v,
    "left") (a right-closed bin), one row at a time."""
    for i in range(start, stop):
        ci = c[i]
        if ci == 0:
            continue
        vi = v[i]
        lo = 0
        hi = inner.shape[0]
        while lo < hi:  # the first inner edge >= v
            mid = (lo + hi) >> 1
            if inner[mid] < vi:
                lo = mid + 1
            else:
                hi = mid
        w = np.float64(ci)
        out[0, lo] += w
        out[1, lo] += w * vi
        out[2, lo] += w * correct[i]


@njit(**_JIT)
def _run_sums(c: np.ndarray, v: np.ndarray, correct: np.ndarray) -> tuple[float, float, float]:
    """(sum c, sum c v, sum c correct) over whole 1-d slices (vectorised)."""
    s0 = 0.0
    s1 = 0.0
    s2 = 0.0
    for i in range(c.shape[0]):
        w = np.float64(c[i])
        s0 += w
        s1 += w * v[i]
        s2 += w * correct[i]
    return s0, s1, s2


@njit(**_JIT)
def bin_sums(
    u: np.ndarray, v: np.ndarray, c: np.ndarray, correct: np.ndarray, inner: np.ndarray, delta: float, out: np.ndarray
) -> None:
    """out[:, b] = (sum c, sum c v, sum c correct) over the rows in bin b = searchsorted(inner, v, "left").

    Rows are in ascending u and every v is within ``delta`` of its u: the rows with u between two edges, further
    than delta from both, are in the bin between (summed as runs), and only the rows within delta of an edge are
    binned one by one. When those windows overlap, every row is binned one by one.
    """
    nb = inner.shape[0]
    lo = np.searchsorted(u, inner - delta, side="left")
    hi = np.searchsorted(u, inner + delta, side="right")
    out[:] = 0.0
    for b in range(nb - 1):
        if hi[b] > lo[b + 1]:
            _bin_rows(v, c, correct, inner, out, 0, u.shape[0])
            return
    start = 0
    for b in range(nb + 1):
        stop = lo[b] if b < nb else u.shape[0]
        if stop > start:
            s0, s1, s2 = _run_sums(c[start:stop], v[start:stop], correct[start:stop])
            out[0, b] += s0
            out[1, b] += s1
            out[2, b] += s2
        if b < nb:
            _bin_rows(v, c, correct, inner, out, lo[b], hi[b])
            start = max(stop, hi[b])


@njit(**_JIT)
def running_counts(c: np.ndarray, cum: np.ndarray) -> None:
    """cum[0] = 0, cum[i + 1] = c[0] + ... + c[i] (int64 ``cum``: an integer running sum, whose additions do not
    wait on each other as floating-point ones do)."""
    total = np.int64(0)
    cum[0] = 0
    for i in range(c.shape[0]):
        total += c[i]
        cum[i + 1] = total


@njit(nogil=True, cache=True)
def order_pair(
    u: np.ndarray, v: np.ndarray, c: np.ndarray, cum: np.ndarray, delta: float, j: int, n: int
) -> tuple[float, float]:
    """Order statistics j and min(j + 1, n - 1) (0-based) of the pool of v (row i c[i] times); rows in ascending
    u, every v within ``delta`` of its u.

    The pool's order statistics move by at most delta from those of the pool of u (U_j = u[r0], U_j1 = u[r1]), so
    X_j and X_j1 lie in [U_j - delta, U_j1 + delta]; every row with v there has u within 2 delta of that range. The
    values of those rows, each as often as drawn, are sorted; the rows below count from ``cum`` and the window.
    """
    j1 = min(j + 1, n - 1)
    r0 = min(np.searchsorted(cum, j, side="right") - 1, u.shape[0] - 1)
    r1 = min(np.searchsorted(cum, j1, side="right") - 1, u.shape[0] - 1)
    low, high = u[r0] - delta, u[r1] + delta
    lo = np.searchsorted(u, low - delta, side="left")
    hi = np.searchsorted(u, high + delta, side="right")
    below = cum[lo]
    m = 0
    for i in range(lo, hi):
        if v[i] < low:
            below += c[i]
        elif v[i] <= high:
            m += c[i]
    vals = np.empty(m)
    m = 0
    for i in range(lo, hi):
        if low <= v[i] <= high:
            for _ in range(c[i]):
                vals[m] = v[i]
                m += 1
    vals.sort()
    a = int(j - below)
    b = int(j1 - below)
    return vals[a], vals[b]


RUN = 1024
"""Values checked at once for a rejection by :func:`bounded_counts` (none in a run: its positions are counted
without the one-by-one bookkeeping)."""


@njit(**_JIT)
def _rejects(values: np.ndarray, nn: np.uint64, threshold: np.uint64) -> bool:
    """Whether any of ``values`` would be rejected (vectorised)."""
    low = np.uint64(0xFFFFFFFF)
    bad: np.bool = np.False_
    for i in range(values.shape[0]):
        bad |= ((np.uint64(values[i]) * nn) & low) < threshold
    return bool(bad)


@njit(**_JIT)
def _count_run(values: np.ndarray, nn: np.uint64, rank: np.ndarray, counts: np.ndarray) -> bool:
    """counts[rank[p]] (or counts[p]) += 1 for the position p = top half of x n of each value (none rejected)."""
    full = False
    ranked = rank.shape[0] > 0
    for i in range(values.shape[0]):
        p = np.int64((np.uint64(values[i]) * nn) >> np.uint64(32))
        if ranked:
            p = rank[p]
        full |= _bump(counts, p)
    return full


@njit(**_JIT)
def bounded_counts(
    head: np.ndarray, stream: np.ndarray, n: int, todo: int, rank: np.ndarray, counts: np.ndarray,
    positions: np.ndarray,
) -> tuple[int, int, bool]:
    """Draw up to ``todo`` positions in [0, n) from the uint32 values of ``head`` then ``stream`` (in the order
    the bit generator hands them out) as numpy's ``Generator.integers(0, n, size)`` does for n < 2^32 (Lemire's
    multiply-and-reject method: the position is the top half of x n, redrawn while the bottom half is below
    (2^32 - n) mod n), and count them: counts[rank[p]] += 1 (``rank`` empty: counts[p] += 1); or, if
    ``positions`` is not empty, store them there instead (from positions[0]: for the checks against numpy).

    Returns (positions drawn, values used, whether a count reached 255). Stops when the values run out in the
    middle of a position: the caller keeps the unused ones and calls again with more.
    """
    nn = np.uint64(n)
    low = np.uint64(0xFFFFFFFF)
    threshold = (np.uint64(0x100000000) - nn) % nn
    ranked = rank.shape[0] > 0
    store = positions.shape[0] > 0
    h = head.shape[0]
    size = h + stream.shape[0]
    full = False
    used = 0
    done = 0
    slow_until = 0  # a run with a rejection goes one position at a time to its end
    while done < todo and used < size:
        if not store and used >= max(h, slow_until) and used + RUN <= size and done + RUN <= todo:
            run = stream[used - h : used - h + RUN]
            if not _rejects(run, nn, threshold):
                full |= _count_run(run, nn, rank, counts)
                used += RUN
                done += RUN
                continue
            slow_until = used + RUN
        at = used
        m = np.uint64(head[at] if at < h else stream[at - h]) * nn
        at += 1
        if (m & low) < nn:
            while (m & low) < threshold and at < size:
                m = np.uint64(head[at] if at < h else stream[at - h]) * nn
                at += 1
            if (m & low) < threshold:  # the values ran out while rejecting
                break
        used = at
        p = np.int64(m >> np.uint64(32))
        if store:
            positions[done] = p
        else:
            if ranked:
                p = rank[p]
            full |= _bump(counts, p)
        done += 1
    return done, used, full
