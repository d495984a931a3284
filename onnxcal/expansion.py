"""Bootstrap replicates of a multiclass temperature from one pass at the fit.

A replicate differs from the fit only in its weights (bootstrap counts),
and on a large set its beta = 1/T lies within a few standard errors of the
fit's beta0. Everything a replicate needs is then a Taylor series in
d = beta - beta0 whose coefficients come from the cumulants of each row at
beta0 (see :mod:`onnxcal.sweep`), computed in the same pass that scores
the fit:

* its beta: the root of f'(beta0 + d) = sum_j F_j d^j / j!, with
  F_j = sum_i c_i (g_i, kappa_2,i, kappa_3,i), then the fit part's mean
  kappa_4 and kappa_5 (from the fit's own last pass, a step away) times
  the replicate's weight (their replicate-to-replicate variation, and the
  step, move the root by about 1e-3 of those terms, far below the bound);
* per held-out row, log p_top (the top class's log-probability,
  beta z_max - L(beta)), log p_y = log p_top + beta (z_y - z_max) and
  log sum_k p_k^2 = L(2 beta) - 2 L(beta), each to the order its terms
  need, so the NLL, the Brier score and the mean confidence are dot
  products with the replicate's counts;
* the binned errors (ECE, MCE, adaptive ECE): with the held-out rows kept
  in the order of their confidence at beta0, a replicate's confidences are
  out of that order by at most delta = max_i |p_top,i(beta) - p_top,i(beta0)|,
  so a bin's sums are prefix sums up to the rows within delta of its edge,
  and only those rows are looked at one by one; the same bound finds the
  order statistics that the equal-mass edges interpolate. These are the
  bins and quantiles of the replicate's own confidences, exactly.

The expansion is used when the bound on the error of a root 6 standard
errors from the fit is below :data:`TAYLOR_TOL`; a replicate whose own
bound is above it is refitted and scored exactly.
"""

from __future__ import annotations

from dataclasses import dataclass
from math import factorial
from typing import Any, cast

import numpy as np

from .metrics.binning import ece_from_bins, lerp_quantiles, mce_from_bins
from .sweep import Chunk, ExpTerms, Selection, run_pass
from .tempfit import ORDER, taylor_root

TERMS = 3
"""Cumulants kept per row (the fit part's g, kappa_2, kappa_3; the held-out part's series to d^3)."""
SQ_ORDER = 3
"""Cumulants at 2 beta per held-out row (the Brier score's terms; a fourth would add
about 16 kappa'_4 d^4 / 4!, below 1e-12 where the expansion is used)."""
TAYLOR_TOL = 1e-8
"""Bound on the error of a replicate's beta (relative) from the expansion."""
TERM_TOL = 1e-13
"""A per-row series drops its highest terms while they are below this (for every row)."""
SERIES_LIMIT = 1e-6
"""A per-row series whose last term exceeds this for some row is not converging: score exactly."""
HALF_WIDTH = 6.0
"""Standard errors of beta on each side of the fit the expansion must cover."""


def _series_top(largest: np.ndarray, d: float) -> int | None:
    """The highest order a series needs at d (see :func:`_series`), or None if it is not converging there."""
    top = len(largest) - 1
    while top > 0 and largest[top] * abs(d) ** top / factorial(top) <= TERM_TOL:
        top -= 1
    if top == len(largest) - 1 and largest[top] * abs(d) ** top / factorial(top) > SERIES_LIMIT:
        return None
    return top


def _series(derivs: np.ndarray, largest: np.ndarray, d: float) -> np.ndarray | None:
    """sum_j derivs[j] d^j / j! over the columns, to the order the terms need.

    Terms are dropped from the top while the largest of them (over the
    rows) is below TERM_TOL. None when the last term exceeds SERIES_LIMIT
    for some row: the series is then not converging at d (the replicate's
    root, accepted by its own bound, keeps d far inside that).
    """
    top = _series_top(largest, d)
    if top is None:
        return None
    acc: np.ndarray = derivs[top].copy()
    for j in range(top - 1, -1, -1):
        acc *= d / (j + 1)
        acc += derivs[j]
    return acc


@dataclass
class Expansion:
    """Per-row Taylor terms in beta at the fit ``beta0`` (see the module docstring).

    Fit part: ``fit_terms`` (rows, TERMS) = [g, kappa_2, kappa_3] per row
    (g = kappa_1 - z_y; transposed by :meth:`finish`) and ``high``, the means
    of kappa_4 and kappa_5.
    Held-out part, in ``order`` (ascending confidence ``u`` at beta0):
    ``log_top`` (TERMS + 1, rows), the derivatives of log p_top; ``gap`` =
    z_y - z_max; ``log_sq`` (SQ_ORDER + 1, rows), the derivatives of
    log sum_k p_k^2; ``correct``.
    """

    beta0: float
    fit_terms: np.ndarray
    log_top: np.ndarray
    gap: np.ndarray
    log_sq: np.ndarray
    correct: np.ndarray
    accurate: bool = False
    order: np.ndarray | None = None  # held-out positions in ascending confidence
    rank: np.ndarray | None = None  # the inverse: a position's place in that order
    u: np.ndarray | None = None
    high: np.ndarray | None = None  # mean kappa_4, kappa_5 over the fit rows
    top_max: np.ndarray | None = None  # largest |derivative| of each order
    sq_max: np.ndarray | None = None

    def root(self, counts: np.ndarray) -> float | None:
        """The replicate's d = beta - beta0 (``counts``: how often each fit row was drawn),
        or None when the expansion cannot give it to TAYLOR_TOL."""
        return self.root_of(self.fit_terms @ counts, float(counts.sum()))

    def root_of(self, sums: np.ndarray, weight: float) -> float | None:
        """:meth:`root` from the replicate's sums of the fit terms and its total weight."""
        assert self.high is not None  # set by finish(), which expand() always calls
        derivs = np.concatenate([sums, weight * self.high])
        found = taylor_root(derivs)
        if found is None or found[1] > TAYLOR_TOL * self.beta0:
            return None
        return found[0]

    def metrics(self, drawn: np.ndarray, d: float, n_bins: int) -> dict[str, Any] | None:
        """Every metric but the classwise ECE at beta0 + d (``drawn``: the positions drawn
        from the held-out part); None if out of the series' reach."""
        # set by finish() when the expansion is accurate, the only case where metrics() is called
        assert self.top_max is not None and self.sq_max is not None
        assert self.rank is not None and self.u is not None
        log_top = _series(self.log_top, self.top_max, d)
        log_sq = _series(self.log_sq, self.sq_max, d)
        if log_top is None or log_sq is None:
            return None
        c = np.bincount(self.rank[drawn], minlength=len(self.u)).astype(np.float64)  # counts, in u order
        total = float(len(drawn))
        v = np.exp(log_top)
        np.minimum(v, 1.0, out=v)
        log_py = log_top
        log_py += (self.beta0 + d) * self.gap  # in place: log_top is not needed any more
        delta = float(np.abs(v - self.u).max()) * (1 + 1e-9) + 1e-15
        sums = _Prefix(self.u, v, c, self.correct, delta)
        edges = np.linspace(0.0, 1.0, n_bins + 1)[1:-1]
        width = sums.bins(edges)
        mass = sums.bins(sums.quantiles(np.linspace(0.0, 1.0, n_bins + 1)[1:-1]))  # the inner edges
        smooth = (float(c @ log_py), float(c @ np.exp(log_sq)), float(c @ np.exp(log_py)))
        return replicate_metrics(smooth, width, mass, total)

    def finish(self, high: np.ndarray) -> Expansion:
        """Take the fit part's mean kappa_4, kappa_5 (``high``), sort the held-out rows by
        confidence, and decide whether the expansion is accurate.

        Accurate: the root's error bound (see :func:`onnxcal.tempfit.taylor_root`)
        at HALF_WIDTH sandwich standard errors from the fit is below TAYLOR_TOL.
        """
        t = self.fit_terms
        g, h = t[:, 0], t[:, 1]
        self.high = np.asarray(high, dtype=np.float64)[: ORDER - TERMS]
        se = float(np.sqrt(g @ g) / max(h.sum(), 1e-300))  # Var(beta) = sum g^2 / (sum h)^2
        reach = HALF_WIDTH * max(se, 1e-4 * self.beta0)
        bound = abs(self.high[-1]) * len(t) * reach ** (ORDER - 1) / factorial(ORDER - 1) / max(h.sum(), 1e-300)
        self.accurate = bool(len(t) and bound <= TAYLOR_TOL * self.beta0)
        self.fit_terms = np.ascontiguousarray(t.T)  # (TERMS, rows): a dot product per term with the counts
        if self.accurate:
            u = np.exp(self.log_top[0])
            self.order = np.argsort(u, kind="stable")
            self.rank = np.empty_like(self.order)
            self.rank[self.order] = np.arange(len(self.order))
            self.u = u[self.order]
            self.log_top = np.ascontiguousarray(self.log_top[:, self.order])
            self.log_sq = np.ascontiguousarray(self.log_sq[:, self.order])
            self.gap, self.correct = self.gap[self.order], self.correct[self.order].astype(np.float64)
            self.top_max = np.abs(self.log_top).max(axis=1)
            self.sq_max = np.abs(self.log_sq).max(axis=1)
        return self


def replicate_metrics(
    smooth: tuple[float, float, float],
    width: tuple[np.ndarray, np.ndarray, np.ndarray],
    mass: tuple[np.ndarray, np.ndarray, np.ndarray],
    total: float,
) -> dict[str, Any]:
    """A replicate's metrics from its sums: ``smooth`` = (sum c log p_y, sum c sum_k p_k^2, sum c p_y), the
    (count, confidence, correct) sums of the equal-width bins and of the equal-mass bins, and the total count."""
    counts, conf_sum, corr_sum = width
    accuracy, mean_conf = corr_sum.sum() / total, conf_sum.sum() / total
    return {
        "nll": -smooth[0] / total,
        "ece": ece_from_bins(counts, conf_sum, corr_sum),
        "mce": mce_from_bins(counts, conf_sum, corr_sum),
        "adaptive_ece": ece_from_bins(*mass),
        "classwise_ece": float("nan"),
        "brier": (smooth[1] - 2.0 * smooth[2]) / total + 1.0,
        "accuracy": float(accuracy),
        "mean_confidence": float(mean_conf),
        "gap": float(mean_conf - accuracy),
    }


class _Prefix:
    """Sums over the held-out rows of (c, c v, c correct) below any edge.

    Rows are in ascending order of ``u``; every ``v`` is within ``delta``
    of its ``u``, so rows with u < e - delta have v < e and rows with
    u > e + delta have v > e: only the rows between are tested one by one,
    and the rows before are summed in segments between the edges (dot
    products, without a cumulative array for the confidences).
    """

    def __init__(self, u: np.ndarray, v: np.ndarray, c: np.ndarray, correct: np.ndarray, delta: float) -> None:
        self.u, self.v, self.c, self.correct, self.delta = u, v, c, correct, delta
        self.cum = np.zeros(len(c) + 1)
        np.cumsum(c, out=self.cum[1:])

    def _before(self, positions: np.ndarray) -> np.ndarray:
        """(count, confidence, correct) sums over the rows before each of the sorted positions."""
        out = np.zeros((3, len(positions)))
        out[0] = self.cum[positions]
        start, conf, corr = 0, 0.0, 0.0
        for i, stop in enumerate(positions):
            if stop > start:
                c = self.c[start:stop]
                conf += float(c @ self.v[start:stop])
                corr += float(c @ self.correct[start:stop])
                start = stop
            out[1, i], out[2, i] = conf, corr
        return out

    def bins(self, inner: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Sums per bin for right-closed bins with these inner edges (as ``searchsorted(side='left')``)."""
        inner = np.asarray(inner, dtype=np.float64)
        lo = np.searchsorted(self.u, inner - self.delta, side="left")
        hi = np.searchsorted(self.u, inner + self.delta, side="right")
        ends = np.concatenate([lo, [len(self.u)]])
        order = np.argsort(ends, kind="stable")
        below = np.empty((3, len(ends)))
        below[:, order] = self._before(ends[order])
        for j, (a, b) in enumerate(zip(lo, hi, strict=True)):  # rows within delta of an edge, one by one
            if b > a:
                w = self.c[a:b] * (self.v[a:b] <= inner[j])
                below[:, j] += [w.sum(), w @ self.v[a:b], w @ self.correct[a:b]]
        counts, conf, corr = np.diff(np.column_stack([np.zeros(3), below]), axis=1)
        return counts, conf, corr

    def quantiles(self, qs: np.ndarray) -> np.ndarray:
        """Quantiles of the pool of v (each row ``c`` times), as ``numpy.quantile`` of the repeated values."""
        cum = self.cum
        n = int(round(cum[-1]))

        def pair(j: int) -> tuple[float, float]:
            # rows before u = U_(j) - 2 delta have v < X_(j); rows after U_(j+1) + 2 delta, v > X_(j+1)
            r = np.searchsorted(cum, [j, min(j + 1, n - 1)], side="right") - 1
            near = self.u[np.minimum(r, len(self.u) - 1)]
            lo = int(np.searchsorted(self.u, near[0] - 2 * self.delta, side="left"))
            hi = int(np.searchsorted(self.u, near[1] + 2 * self.delta, side="right"))
            vals, counts = self.v[lo:hi], self.c[lo:hi]
            o = np.argsort(vals, kind="stable")
            before = int(round(cum[lo]))
            at = np.searchsorted(np.cumsum(counts[o]), [j - before, min(j + 1, n - 1) - before], side="right")
            return float(vals[o][at[0]]), float(vals[o][at[1]])

        return lerp_quantiles(pair, n, qs)


class ExpansionRows:
    """Fills an :class:`Expansion` from a pass at beta0 (a pass consumer).

    Part 0 rows are fit rows, part 1 held-out rows; without parts (an
    in-sample bootstrap) every row is both. ``local`` maps a pass position
    to the row's index within its part.
    """

    def __init__(self, exp: Expansion, local: np.ndarray | None) -> None:
        self.exp, self.local = exp, local
        self.high = np.zeros(ORDER - TERMS)  # sums of kappa_4, kappa_5 over the fit rows, when the pass has them

    def add(self, chunk: Chunk, terms: ExpTerms) -> None:
        c = len(chunk.y)
        pos = np.arange(chunk.start, chunk.start + c)
        fit = slice(None) if chunk.part is None else chunk.part == 0
        held = slice(None) if chunk.part is None else chunk.part == 1
        at_fit = pos[fit] if self.local is None else self.local[pos[fit]]
        at_held = pos[held] if self.local is None else self.local[pos[held]]
        kappa = terms.cumulants
        g = kappa[:, :TERMS].copy()
        g[:, 0] -= terms.zy
        self.exp.fit_terms[at_fit] = g[fit]
        if kappa.shape[1] >= ORDER:
            self.high += kappa[fit, TERMS:ORDER].sum(axis=0)
        kappa = kappa[:, :TERMS]
        top = np.empty((TERMS + 1, c))
        top[0] = terms.beta * terms.zmax - terms.log_total
        top[1] = terms.zmax - kappa[:, 0]
        top[2:] = -kappa[:, 1:].T
        self.exp.log_top[:, at_held] = top[:, held]
        # every pass that carries an ExpansionRows asks for sq_moments=SQ_ORDER (expand, passes)
        assert terms.sq_log_total is not None and terms.sq_cumulants is not None
        sq = np.empty((SQ_ORDER + 1, c))
        sq[0] = terms.sq_log_total - 2.0 * terms.log_total
        for j in range(1, SQ_ORDER + 1):
            sq[j] = 2.0**j * terms.sq_cumulants[:, j - 1] - 2.0 * kappa[:, j - 1]
        self.exp.log_sq[:, at_held] = sq[:, held]
        self.exp.gap[at_held] = (terms.zy - terms.zmax)[held]
        self.exp.correct[at_held] = (terms.top == chunk.y)[held]


def new_expansion(beta0: float, n_fit: int, n_held: int) -> Expansion:
    return Expansion(
        beta0,
        np.empty((n_fit, TERMS)),
        np.empty((TERMS + 1, n_held)),
        np.empty(n_held),
        np.empty((SQ_ORDER + 1, n_held)),
        np.empty(n_held, dtype=bool),
    )


def expansion_parts(
    n: int, fit_rows: np.ndarray, eval_rows: np.ndarray, local: bool = True
) -> tuple[np.ndarray | None, np.ndarray | None]:
    """(part per row or None, index within its part per row or None) for a pass over all n rows."""
    if fit_rows is eval_rows:
        return None, None
    part = np.zeros(n, np.int8)
    part[eval_rows] = 1
    if not local:
        return part, None
    within = np.empty(n, np.intp)  # not reusing the bool parameter's name, for the type checker
    within[fit_rows] = np.arange(len(fit_rows))
    within[eval_rows] = np.arange(len(eval_rows))
    return part, within


def expand(
    logits: np.ndarray,
    labels: np.ndarray,
    fit_rows: np.ndarray,
    eval_rows: np.ndarray,
    beta0: float,
    threads: int | None = None,
) -> Expansion:
    """One pass at beta0 over both parts, filling an :class:`Expansion`."""
    part, local = expansion_parts(len(logits), fit_rows, eval_rows)
    exp = new_expansion(beta0, len(fit_rows), len(eval_rows))
    lanes = run_pass(
        logits, labels, beta0, lambda: (ExpansionRows(exp, local),), selection=Selection(part=part),
        moments=ORDER, sq_moments=SQ_ORDER, sq_part=None if part is None else 1, threads=threads,
    )
    high = sum(cast(ExpansionRows, lane[0]).high for lane in lanes)  # each lane's only consumer
    return exp.finish(np.asarray(high) / max(len(fit_rows), 1))

