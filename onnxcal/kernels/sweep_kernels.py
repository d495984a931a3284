"""The float32 chunk of a :mod:`onnxcal.sweep` pass as one compiled loop per row.

:func:`chunk_pass` does for one chunk of float32 logits what the numpy code of
``sweep._tile``, ``ScoreSums.tile`` and the classwise part of ``ScoreSums.add``
does (that code stays, as the reference the tests compare this against;
``ONNXCAL_COMPILED=0`` selects it): per row the maximum and its first index,
the shift s = b max z, x = b z - s, e = exp(x), the power sums sum e x^j, the
sums at 2 beta sum e^2 x^j, and, for the metric passes, the classwise ECE's
column sums of p = e (1 + eps x) / total per part, the sums of the entries
above 1/M per (class, bin) and the labels' bins. Each value of the chunk is
read once from memory (selected rows in place, by index); the row's x and e
live in row-sized scratch arrays (in the core's first-level cache) between
the loops over them.

Precision and fast-math. x is computed by :func:`_shifted`, compiled without
fast-math flags, so that it is rounded as numpy rounds it (a product, then a
difference, never fused), and every row is shifted (x <= 0). The exponential
is computed in :func:`_exps` (see docs/maths.md: Cody & Waite's argument reduction
and a degree-7 polynomial whose coefficients are those of the Cephes library's
expf, from memory; below 2 ulp of the float64 exponential on [-87.3, 0], and 0
below -87.3, where float32 results are subnormal). The loops are compiled with
the fast-math flags ``nnan ninf nsz reassoc contract``: they let LLVM vectorise
the sums (reordering them: a different float32 rounding of each sum, not a
larger one) and fuse the polynomial's products and sums. They assume no NaN or
infinity: the commands refuse logits with NaN or Inf (or drop those rows, with
``--drop-nonfinite``) before any pass (``api/common.py``); a library caller who
passes them gets unspecified numbers where numpy would give NaN. They change no
comparison: max and equality are exact in any
order, and the comparisons (the underflow cut, the candidates' threshold) are
between finite numbers. Sums are accumulated in float32 within a row (as the
numpy code's BLAS sums are) and returned in float64.

Compiled with ``cache=True`` for the one signature used (eagerly, when this
module is first imported: in the thread that starts the pass, before any
chunk; see :func:`onnxcal.sweep.run_pass`). ``nogil=True``: the lanes of a pass
run these calls on their own threads.
"""

from __future__ import annotations

from typing import Any, Literal

import numpy as np
from numba import njit, types

FAST = {"nnan", "ninf", "nsz", "reassoc", "contract"}

LOW = np.float32(-87.3)
"""Below this x, exp(x) < 2^-125.9 and is taken as 0 (float32's normal range ends at 2^-126)."""
_LOG2E = np.float32(1.4426950408889634)
_C1 = np.float32(0.693359375)  # ln 2 = C1 + C2; C1 has 9 significant bits, so n C1 is exact (Cody & Waite 1980)
_C2 = np.float32(-2.12194440e-4)
# exp(r) = 1 + r + r^2 P(r) on |r| <= ln(2)/2, P's coefficients as in Cephes' expf (from memory)
_P0 = np.float32(1.9875691500e-4)
_P1 = np.float32(1.3981999507e-3)
_P2 = np.float32(8.3334519073e-3)
_P3 = np.float32(4.1665795894e-2)
_P4 = np.float32(1.6666665459e-1)
_P5 = np.float32(5.0000001201e-1)
_ONE = np.float32(1.0)
_HALF = np.float32(0.5)
_BIAS = np.int32(127)
_MANT = np.int32(23)
_ZERO = np.float32(0.0)


def _array(dtype: Any, ndim: int, layout: Literal["C", "A"] = "C", readonly: bool = False) -> Any:
    return types.Array(dtype, ndim, layout, readonly=readonly)


# The inputs are read-only arrays (a writable array converts to one; logits may be a read-only memory map).
CHUNK_SIG = types.int64(
    _array(types.float32, 2, readonly=True), _array(types.int64, 1, readonly=True),
    types.float32, types.float64, types.int64, types.int64, types.int64,
    _array(types.boolean, 1, readonly=True), _array(types.float64, 1, readonly=True),
    _array(types.intp, 1, readonly=True), types.int64, types.float64,
    _array(types.int64, 1, readonly=True), _array(types.float64, 1, readonly=True),
    _array(types.int64, 1), _array(types.float32, 1), _array(types.float64, 2, "A"), _array(types.float64, 2, "A"),
    _array(types.float64, 2), _array(types.float64, 1), _array(types.float64, 1), _array(types.float64, 1),
)


@njit("float32(float32, float32, float32)", nogil=True, cache=True)
def _shifted(b: np.float32, z: np.float32, s: np.float32) -> np.float32:
    """x = b z - s rounded as numpy rounds it (no fast-math: the product and the difference are not fused)."""
    return b * z - s


@njit("float32(float32, float32)", nogil=True, cache=True)
def _reduced(x: np.float32, n: np.float32) -> np.float32:
    """r = x - n C1 - n C2 in this order (no fast-math: reassociated, it would become x - n ln 2 rounded)."""
    return x - n * _C1 - n * _C2


@njit(nogil=True, cache=True, fastmath=FAST)
def exp_values(x, out, xb, eb, ib):  # type: ignore[no-untyped-def]
    """e = exp(x) for a 1-d float32 array in rows of the scratch arrays' length (for the tests)."""
    k = len(eb)
    fb = ib.view(np.float32)
    for a in range(0, len(x), k):
        t = min(k, len(x) - a)
        for j in range(t):
            xb[j] = x[a + j]
        _exps(xb, eb, ib, fb, t)
        for j in range(t):
            out[a + j] = eb[j]


@njit(nogil=True, cache=True, fastmath=FAST, inline="always")
def _exps(xb, eb, ib, fb, k):  # type: ignore[no-untyped-def]
    """eb[:k] = exp(xb[:k]) for x >= LOW, 0 below; returns sum e and sum e^2.

    Cody & Waite: n = round(x / ln 2), r = x - n C1 - n C2 (|r| <= ln(2)/2), exp(x) = 2^n exp(r);
    exp(r) = 1 + r + r^2 P(r). Two vectorised loops: the polynomial and the bits of the float32 2^n
    (n + 127 in the exponent field), then their product (and the two sums).
    """
    for j in range(k):
        x = max(xb[j], LOW)
        n = np.floor(x * _LOG2E + _HALF)
        r = _reduced(x, n)
        poly = ((((_P0 * r + _P1) * r + _P2) * r + _P3) * r + _P4) * r + _P5
        eb[j] = poly * (r * r) + r + _ONE
        ib[j] = (np.int32(n) + _BIAS) << _MANT
    s0 = _ZERO
    sq = _ZERO
    for j in range(k):
        e = eb[j] * fb[j]
        e = e if xb[j] >= LOW else _ZERO
        eb[j] = e
        s0 += e
        sq += e * e
    return s0, sq


@njit(nogil=True, cache=True, fastmath=FAST, inline="always")
def _higher_sums(eb, square, xb, k, count, out, i):  # type: ignore[no-untyped-def]
    """out[j, i] = sum_k w x^j for j = 1..count (count <= 5), w = e, or e^2 when ``square``.

    One loop with five accumulators when count > 2 (the unused ones cost a few products per value,
    less than another sweep of the row), one with two otherwise.
    """
    if count < 1:
        return
    a1 = a2 = a3 = a4 = a5 = _ZERO
    if count <= 2:
        for j in range(k):
            w = eb[j] * eb[j] if square else eb[j]
            x = xb[j]
            v = w * x
            a1 += v
            a2 += v * x
    else:
        for j in range(k):
            w = eb[j] * eb[j] if square else eb[j]
            x = xb[j]
            v1 = w * x
            v2 = v1 * x
            v3 = v2 * x
            v4 = v3 * x
            a1 += v1
            a2 += v2
            a3 += v3
            a4 += v4
            a5 += v4 * x
    acc = (a1, a2, a3, a4, a5)
    for p in range(count):
        out[p + 1, i] = acc[p]


@njit(nogil=True, cache=True, fastmath=FAST, inline="always")
def _row_max(row, k, ib, fb):  # type: ignore[no-untyped-def]
    """The row's maximum and the first index where it occurs (numpy's max and argmax), in two vectorised loops.

    The maximum is taken over integer keys, which order float32 numbers as their values do (the bits of
    a negative number with the magnitude bits flipped); the index is the least j with row[j] equal to it
    (a float comparison, so -0 and +0 are equal, as for numpy). Integer reductions vectorise; a float
    maximum with a select does not here.
    """
    bits = row.view(np.int32)
    mk = np.int32(-2147483648)
    for j in range(k):
        v = bits[j]
        mk = max(mk, v ^ ((v >> np.int32(31)) & np.int32(0x7FFFFFFF)))
    ib[0] = mk ^ ((mk >> np.int32(31)) & np.int32(0x7FFFFFFF))
    m = fb[0]
    t = np.int64(k)
    for j in range(k):
        t = min(t, np.int64(j) if row[j] == m else np.int64(k))
    return m, t


@njit(nogil=True, cache=True, inline="always")
def _bin(p, edges):  # type: ignore[no-untyped-def]
    """The bin of p among M equal-width bins: the number of inner edges below p (``np.searchsorted``)."""
    n = 0
    for edge in edges:
        n += 1 if edge < p else 0
    return n


@njit(nogil=True, cache=True, fastmath=FAST, inline="always")
def _candidates(eb, xb, k, threshold, i, cand, cand_e, cand_x, n):  # type: ignore[no-untyped-def]
    """Append the entries of row i with e > ``threshold`` (flat index i k + j, e, x); returns the new count.

    Blocks of 64 are counted in one vectorised loop; only blocks with entries above are looked at one by
    one. ``cand`` has room for k entries more than the chunk can give (the room is checked per row).
    """
    full = k - k % 64
    for a in range(0, full, 64):
        hits = 0
        for j in range(a, a + 64):  # a constant trip count: vectorised
            hits += 1 if eb[j] > threshold else 0
        if hits:
            for j in range(a, a + 64):
                if eb[j] > threshold:
                    cand[n] = i * k + j
                    cand_e[n] = eb[j]
                    cand_x[n] = xb[j]
                    n += 1
    for j in range(full, k):
        if eb[j] > threshold:
            cand[n] = i * k + j
            cand_e[n] = eb[j]
            cand_x[n] = xb[j]
            n += 1
    return n


@njit(nogil=True, cache=True)
def _upper_entries(cand, cand_e, cand_x, n, k, eps, totals, w, part, first, edges, p_sum, upper):  # type: ignore[no-untyped-def]
    """The classwise sums of the candidates (``ScoreSums._upper_bins``): p = e (1 + eps x) / total in
    float64; if p > ``first``, w p goes to p_sum at ((part k + class) M + bin) and to upper at (part k + class)."""
    m = len(edges) + 1
    for t in range(n):
        i = cand[t] // k
        j = cand[t] - i * k
        p = np.float64(cand_e[t]) * (1.0 + eps * np.float64(cand_x[t])) / totals[i]
        if p > first:
            at = part[i] * k + j
            wp = w[i] * p
            p_sum[at * m + _bin(p, edges)] += wp
            upper[at] += wp


@njit(CHUNK_SIG, nogil=True, cache=True, fastmath=FAST, boundscheck=False)
def chunk_pass(  # type: ignore[no-untyped-def]
    z, at, b, eps, count, sq_all, sq_pick, picked, w, part, parts, first, y, edges, top, shift, sums, sq_sums,
    columns, p_sum, upper, y_sum,
):
    """One chunk: see the module docstring.

    z: logits, of which rows ``at`` (c of them) are the chunk's; b: beta in float32; eps = beta / b - 1.
    count: sums[j, i] = sum_k e x^j for j = 0..count.
    sq_all: -1 for nothing at 2 beta, else sq_sums[j, i] = sum e^2 x^j for j = 0..sq_all on every row,
    and for j = 0..sq_pick on the rows where ``picked``.
    parts: 0 for no classwise sums; else, with p = e (1 + eps x) / total, weights ``w``, parts ``part``,
    labels ``y`` and the M - 1 inner bin edges ``edges``: columns[part, :] += w p (float32 over 128
    rows at a time, then float64, as the numpy tiles), the sums of the entries above ``first`` (1/M)
    into p_sum and upper (see :func:`_upper_entries`), and w into y_sum at ((part k + y) M + bin of p_y).
    top[i] the first index of the row maximum, shift[i] = b max z (float32). Returns 0.
    """
    c, k = len(at), z.shape[1]
    m = len(edges) + 1
    xb = np.empty(k, np.float32)
    eb = np.empty(k, np.float32)
    ib = np.empty(k, np.int32)
    fb = ib.view(np.float32)
    room = c * m + k if parts else 0
    cand = np.empty(room, np.int64)
    cand_e = np.empty(room, np.float32)
    cand_x = np.empty(room, np.float32)
    totals = np.empty(c if parts else 0)
    n_cand = 0
    acc = np.zeros((max(parts, 1), k), np.float32)
    eps32 = np.float32(eps)
    for i in range(c):
        row = z[at[i]]
        mx, top[i] = _row_max(row, k, ib, fb)
        s = b * mx
        shift[i] = s
        for j in range(k):
            xb[j] = _shifted(b, row[j], s)
        s0, sq = _exps(xb, eb, ib, fb, k)
        sums[0, i] = s0
        _higher_sums(eb, False, xb, k, count, sums, i)
        if sq_all >= 0:
            sq_sums[0, i] = sq
            _higher_sums(eb, True, xb, k, sq_pick if picked[i] else sq_all, sq_sums, i)
        if parts == 0:
            continue
        total = sums[0, i] + eps * sums[1, i] if eps != 0.0 else sums[0, i]
        wi = w[i]
        coef = np.float32(wi / total)
        into = acc[part[i]]
        if eps != 0.0:
            for j in range(k):
                into[j] += coef * (eb[j] + eps32 * eb[j] * xb[j])
        else:
            for j in range(k):
                into[j] += coef * eb[j]
        base = part[i] * k
        threshold = np.float32(total * first * (1.0 - 1e-5))
        totals[i] = total
        if threshold < np.float32(1.0):  # e <= 1 everywhere (x <= 0): nothing above it otherwise
            if n_cand + k > len(cand):  # flush the candidates (rarely: there is room for M per row)
                _upper_entries(cand, cand_e, cand_x, n_cand, k, eps, totals, w, part, first, edges, p_sum, upper)
                n_cand = 0
            n_cand = _candidates(eb, xb, k, threshold, i, cand, cand_e, cand_x, n_cand)
        label = y[i]
        p_y = np.float64(eb[label]) * (1.0 + eps * np.float64(xb[label])) / total
        y_sum[(base + label) * m + _bin(p_y, edges)] += wi
        if (i + 1) % 128 == 0 or i == c - 1:
            for p in range(parts):
                for j in range(k):
                    columns[p, j] += acc[p, j]
                    acc[p, j] = _ZERO
    if parts:
        _upper_entries(cand, cand_e, cand_x, n_cand, k, eps, totals, w, part, first, edges, p_sum, upper)
    return 0


def run_chunk(
    z: np.ndarray, at: np.ndarray, b: float, eps: float, count: int, sq_all: int, sq_pick: int, picked: np.ndarray,
    columns: Any, top: np.ndarray, shift: np.ndarray, sums: np.ndarray, sq_sums: np.ndarray,
) -> bool:
    """:func:`chunk_pass` with ``columns`` (an :class:`onnxcal.sweep.Columns`, or None) unpacked.

    Returns whether the classwise sums were added (into the arrays of ``columns``).
    """
    k = z.shape[1]
    if columns is None:
        none = np.zeros(0)
        w, part, parts, first, y, edges = none, np.zeros(0, np.intp), 0, 0.0, np.zeros(0, np.int64), none
        col, p_sum, upper, y_sum = np.zeros((1, k)), none, none, none
    else:
        w = np.ascontiguousarray(columns.weights, dtype=np.float64)
        part, parts, first = np.ascontiguousarray(columns.part, dtype=np.intp), columns.parts, columns.first
        y, edges = np.ascontiguousarray(columns.labels, dtype=np.int64), columns.edges
        col, p_sum, upper, y_sum = columns.column, columns.p_sum, columns.upper, columns.y_sum
    chunk_pass(
        z, at, np.float32(b), eps, count, sq_all, max(sq_pick, sq_all), picked, w, part, parts, first, y, edges,
        top, shift, sums, sq_sums, col, p_sum, upper, y_sum,
    )
    return columns is not None
