"""Honest evaluation of a fit: a stratified holdout split and bootstrap intervals.

Bootstrap (Efron 1979): each replicate draws, with replacement, as many rows
as the fit part has from the fit part and as many as the held-out part has
from the held-out part (the same draw serves both with ``--holdout 0``),
refits the parameters on the resampled fit part and scores the refitted
map on the resampled held-out part, so the intervals carry the uncertainty
of the parameters and the sampling noise of the metrics together. A draw
is a vector of counts (how often each row was drawn), used as weights; no
resampled copy of the logits is made. The interval is the 2.5th to 97.5th
percentile of the replicates (Efron & Tibshirani 1993, ch. 13).

Temperature scaling of a multiclass model has two fast paths whose cost
does not grow with the number of replicates (each replicate still draws
its counts and takes a few vector operations over the rows):

* on a large set, :mod:`onnxcal.expansion`: Taylor series in beta = 1/T
  around the fit, from the cumulants of every row that the pass scoring
  the fit computes anyway (no further pass over the logits);
* on a smaller set, where a replicate's beta can lie too far from the fit
  for that series, a grid: one pass at the fit (for the standard error
  that sets the grid) and one chunked pass compute, for every row, the
  NLL's derivatives (fit part) and the metrics' per-row terms with their
  derivatives (held-out part) at G = 9 values of beta spanning +-6
  standard errors around the fit. A replicate's weighted gradient at the
  grid points is then a dot product with its counts, its root comes from
  cubic Hermite interpolation between the two grid points around it, and
  its metrics from the same interpolation of each row's terms (error of
  order (grid step)^4).

Either way a replicate outside the reach of the approximation is refitted
exactly. When the held-out part is small enough (rows x classes x
replicates below ``EXACT_EVAL_BUDGET``), replicates are scored exactly
instead, classwise ECE included; above it the classwise ECE gets no
interval (it would need every class probability of every row per
replicate). The refitting function is passed in (``refit``), so this
module does not depend on :mod:`onnxcal.fit`.

Dense outputs (a per-position N x T x K or per-pixel N x K x H x W head)
give many score rows per sample, and the rows of one sample are not
independent (neighbouring pixels share their errors). Given ``groups`` (the
sample of each row), the holdout splits samples, not rows, and every
replicate draws whole samples with replacement (the cluster bootstrap:
Davison & Hinkley 1997, section 3.8), so the intervals reflect how many
independent samples there are, not how many rows.

References
----------
Davison & Hinkley, "Bootstrap Methods and their Application", Cambridge
University Press 1997, section 3.8 (resampling clusters).
Efron, "Bootstrap Methods: Another Look at the Jackknife", Annals of
Statistics 7(1), 1979. Efron & Tibshirani, "An Introduction to the
Bootstrap", Chapman & Hall 1993, ch. 13 (percentile intervals).
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Iterator, Sequence
from concurrent.futures import Future, ThreadPoolExecutor
from typing import TYPE_CHECKING, Any, TypeVar, cast

import numpy as np

from . import kernels
from .expansion import Expansion, expand
from .expansion_blocks import Block, CompiledReplicates
from .holdout import (  # re-exported: the split is part of resample's interface
    Samples as Samples,
)
from .holdout import (
    rows_of_samples as rows_of_samples,
)
from .holdout import (
    samples_of as samples_of,
)
from .holdout import (
    split_holdout as split_holdout,
)
from .holdout import (
    split_samples as split_samples,
)
from .holdout import (
    strata_name as strata_name,
)
from .metrics import (
    METRIC_FIELDS,
    ece_from_bins,
    equal_mass_bins,
    evaluate,
    iter_chunks,
    mce_from_bins,
    reliability_bins,
)
from .scaling import Scaling
from .sweep import default_threads

if TYPE_CHECKING:  # onnxcal.fit imports this module
    from .fit.options import FitOptions, FitResult

Refit = Callable[..., object]
"""``refit(logits, labels, options, rows=, weights=, start=)`` -> a FitResult."""

_Item = TypeVar("_Item")
_Out = TypeVar("_Out")

LEVEL = 0.95
GRID_POINTS = 9
GRID_HALF_WIDTH = 6.0  # standard errors of log(beta) on each side of the fit
EXACT_EVAL_BUDGET = 2e7  # held-out rows x classes x replicates scored exactly
BOOTSTRAP = "bootstrap"  # the stage progress() is told about


# --------------------------------------------------------------------------
# Bootstrap


class Draw:
    """One replicate: n draws with replacement from each part's n positions.

    ``fit`` and ``held`` are the drawn positions (the same array for an
    in-sample bootstrap); the counts (how often each position was drawn,
    the weights of the replicate) are made when asked for.
    """

    def __init__(self, fit: np.ndarray, n_fit: int, held: np.ndarray, n_held: int) -> None:
        self.fit, self.held, self.n_fit, self.n_held = fit, held, n_fit, n_held

    @property
    def fit_counts(self) -> np.ndarray:
        return np.bincount(self.fit, minlength=self.n_fit).astype(np.float64)

    @property
    def held_counts(self) -> np.ndarray:
        return np.bincount(self.held, minlength=self.n_held).astype(np.float64)


def _draws(
    rng: np.random.Generator,
    replicates: int,
    n_fit: int,
    n_eval: int | None,
    fit_samples: Samples | None = None,
    eval_samples: Samples | None = None,
) -> Iterator[Draw]:
    """Yield one :class:`Draw` per replicate (the fit part's draws first, then the held-out part's).

    With ``fit_samples``/``eval_samples``, a part's draw takes whole samples
    (as many as the part has, with replacement) and every row of each.
    """
    for _ in range(replicates):
        yield _one_draw(rng, n_fit, n_eval, fit_samples, eval_samples)


def _one_draw(
    rng: np.random.Generator, n_fit: int, n_eval: int | None, fit_samples: Samples | None = None,
    eval_samples: Samples | None = None,
) -> Draw:
    """One replicate's :class:`Draw` (see :func:`_draws`)."""
    fit = _draw(rng, n_fit, fit_samples)
    held = fit if n_eval is None else _draw(rng, n_eval, eval_samples)
    return Draw(fit, n_fit, held, n_fit if n_eval is None else n_eval)


class DirectDraws:
    """Where the replicates' row draws come from (the draws of :func:`_draws`, without groups), for
    :meth:`onnxcal.expansion_blocks.CompiledReplicates.drawn_blocks`, which counts them as it draws them."""

    def __init__(
        self, rng: np.random.Generator, replicates: int, n_fit: int, n_eval: int | None,
        progress: Callable[[str, int, int], None] | None,
    ) -> None:
        self.rng, self.replicates, self.n_fit, self.n_eval, self.progress = rng, replicates, n_fit, n_eval, progress

    def redraw(self) -> Draw:
        """The next replicate's draw, as :func:`_draws` makes it."""
        return _one_draw(self.rng, self.n_fit, self.n_eval)

    def told(self, done: int) -> None:
        """Tell progress that ``done`` replicates are drawn (as :func:`_counted`)."""
        if self.progress is not None:
            self.progress(BOOTSTRAP, done, self.replicates)


def _counted(draws: Iterator[Draw], progress: Callable[[str, int, int], None], total: int) -> Iterator[Draw]:
    """``draws``, calling ``progress("bootstrap", k, total)`` when the replicate after the k-th is
    drawn (the k-th is done; with threads, up to two per thread are still running) and at the end."""
    progress(BOOTSTRAP, 0, total)
    for k, draw in enumerate(draws, 1):
        yield draw
        progress(BOOTSTRAP, k, total)


def _draw(rng: np.random.Generator, n: int, samples: Samples | None) -> np.ndarray:
    # int32 positions where they fit: numpy draws them with the same 32-bit bounded generator as int64 ones, so
    # the values and the generator's state after are the same (tests/test_resample_compiled.py checks it), in
    # half the memory
    m = n if samples is None else samples.count
    drawn = rng.integers(0, m, m, dtype=np.int32 if m < 2**31 else np.int64)
    return drawn if samples is None else samples.rows(drawn)


# A lookup's tables change size from one replicate to the next: no interval per entry.
_LOOKUPS = ("isotonic", "histogram")


def _percentile(values: np.ndarray) -> list[Any] | None:
    """[low, high] per column of (replicates, ...) values; None where any is NaN."""
    q = np.percentile(values, [100 * (1 - LEVEL) / 2, 100 * (1 + LEVEL) / 2], axis=0)
    if q.ndim == 1:
        return None if not np.all(np.isfinite(q)) else [float(q[0]), float(q[1])]
    return [_percentile(values[:, j]) for j in range(values.shape[1])]


def bootstrap(
    logits: np.ndarray,
    labels: np.ndarray,
    options: FitOptions,
    fit_rows: np.ndarray,
    eval_rows: np.ndarray,
    start: Scaling,
    *,
    refit: Refit,
    expansion: Expansion | None = None,
    threads: int | None = None,
    groups: np.ndarray | None = None,
    progress: Callable[[str, int, int], None] | None = None,
) -> dict[str, Any]:
    """Percentile intervals for the parameters and every after-metric.

    Parameters
    ----------
    options : onnxcal.fit.FitOptions
        Method, replicates (``bootstrap``), seed, bins.
    fit_rows, eval_rows : ndarray of int
        The two parts (the same array for an in-sample evaluation).
    start : Scaling
        The fit on ``fit_rows``: the replicates start from it.
    refit : callable
        ``refit(logits, labels, options, rows=, weights=, start=)`` -> FitResult
        (:func:`onnxcal.fit.fit_scaling`), for the replicates refitted exactly.
    expansion : Expansion, optional
        The per-row terms at the fit (multiclass temperature), when the
        caller's pass made them; else a pass makes them here.
    threads : int, optional
        Threads for the passes and the replicates; the result does not depend on it.
    groups : ndarray of int, optional
        The sample of each row (sorted), for outputs with several rows per
        sample: replicates then draw whole samples (see the module docstring).
    progress : callable, optional
        ``progress("bootstrap", done, total)``: at the start and after each replicate, in order.

    Returns
    -------
    dict
        ``level``, ``replicates``, ``parameters`` ({name: [low, high] or a list
        of them}), ``after`` ({metric: [low, high] or None}), ``method``
        (how the replicates were computed), ``resampled`` (``"rows"`` or
        ``"samples"``, with ``samples_fit`` and ``samples_holdout``) and ``notes``.
    """
    rng = np.random.default_rng([options.seed, 1])
    same = fit_rows is eval_rows
    fast = start.method == "temperature" and start.kind == "multiclass"
    fit_samples = None if groups is None else samples_of(np.asarray(groups)[fit_rows])
    eval_samples = fit_samples if groups is None or same else samples_of(np.asarray(groups)[eval_rows])
    draws = _draws(rng, options.bootstrap, len(fit_rows), None if same else len(eval_rows), fit_samples,
                   eval_samples)
    if progress is not None:
        draws = _counted(draws, progress, options.bootstrap)
    run = Replicates(logits, labels, options, fit_rows, eval_rows, start, refit, threads)
    how = "exact"
    if fast:
        assert start.temperature is not None  # fast: a multiclass temperature scaling has its T
        expansion = expansion or expand(logits, labels, fit_rows, eval_rows, 1.0 / start.temperature, threads)
        how = "taylor" if expansion.accurate else "grid"
        direct = None if fit_samples is not None else DirectDraws(
            rng, options.bootstrap, len(fit_rows), None if same else len(eval_rows), progress)
        params, metrics, fallbacks = (run.taylor(expansion, draws, direct) if expansion.accurate else run.grid(draws))
    else:
        params, metrics = run.exact(draws)
        fallbacks = 0
    names = [] if start.method in _LOOKUPS else list(start.parameters)
    out: dict[str, Any] = {
        "level": LEVEL,
        "kind": "percentile",
        "replicates": options.bootstrap,
        "seed": options.seed,
        "replicates_by": how,
        "parameters": {name: _percentile(np.array([p[name] for p in params])) for name in names},
        "after": {f: _percentile(np.array([m[f] for m in metrics])) for f in METRIC_FIELDS},
        "notes": [],
        **_resampled(fit_samples, eval_samples),
    }
    if start.temperature is not None:
        out["temperature"] = out["parameters"]["temperature"]
    what = "held-out" if not same else "in-sample"
    by = "" if fit_samples is None else ", drawing whole samples with all their rows"
    out["notes"].append(
        f"95% percentile intervals from {options.bootstrap} bootstrap replicates (refit on a resampled "
        f"fit part, scored on a resampled {what} part{by})"
    )
    if out["after"]["classwise_ece"] is None:
        out["notes"].append(
            "no interval for classwise ECE: the held-out part is too large to score every "
            "replicate's class probabilities exactly"
        )
    if fallbacks:
        where = "outside the interpolation grid" if how == "grid" else "too far from the fit for its expansion"
        out["notes"].append(f"{fallbacks} replicates fell {where} and were refitted exactly")
    return out


def _resampled(fit_samples: Samples | None, eval_samples: Samples | None) -> dict[str, object]:
    """What the replicates drew, for the record."""
    if fit_samples is None or eval_samples is None:
        return {"resampled": "rows"}
    return {"resampled": "samples", "samples_fit": fit_samples.count, "samples_holdout": eval_samples.count}


# Replicates ------------------------------------------------------------------


class Replicates:
    """The replicates of one bootstrap: refitted exactly, on the grid, or from the expansion."""

    def __init__(
        self,
        logits: np.ndarray,
        labels: np.ndarray,
        options: FitOptions,
        fit_rows: np.ndarray,
        eval_rows: np.ndarray,
        start: Scaling,
        refit: Refit,
        threads: int | None,
    ) -> None:
        self.logits, self.labels, self.options = logits, labels, options
        self.fit_rows, self.eval_rows, self.start = fit_rows, eval_rows, start
        self.refit, self.threads = refit, threads

    def _refit(self, cf: np.ndarray) -> FitResult:
        return cast(
            "FitResult",
            self.refit(self.logits, self.labels, self.options, rows=self.fit_rows, weights=cf, start=self.start),
        )

    def _score(self, scaling: Scaling | float, ce: np.ndarray) -> dict[str, Any]:
        m = evaluate(self.logits, self.labels, scaling, self.options.n_bins, rows=self.eval_rows, weights=ce)
        return m.to_dict()

    def exact(self, draws: Iterable[Draw]) -> tuple[list[dict[str, np.ndarray]], list[dict[str, Any]]]:
        params: list[dict[str, np.ndarray]] = []
        metrics: list[dict[str, Any]] = []
        for draw in draws:
            res = self._refit(draw.fit_counts)
            params.append({} if res.scaling.method in _LOOKUPS else res.scaling.arrays())
            metrics.append(self._score(res.scaling, draw.held_counts))
        return params, metrics

    def grid(self, draws: Iterable[Draw]) -> tuple[list[dict[str, np.ndarray]], list[dict[str, Any]], int]:
        return _grid_replicates(
            self.logits, self.labels, self.options, self.fit_rows, self.eval_rows, self.start, draws, self.refit
        )

    def taylor(
        self, exp: Expansion, draws: Iterable[Draw], direct: DirectDraws | None = None
    ) -> tuple[list[dict[str, np.ndarray]], list[dict[str, Any]], int]:
        """Each replicate from the expansion; refitted exactly when its root is too far out."""
        n_bins = self.options.n_bins
        exact_eval = len(self.eval_rows) * self.logits.shape[1] * self.options.bootstrap <= EXACT_EVAL_BUDGET

        def settle(
            d: float | None, m: dict[str, Any] | None, fit_counts: Callable[[], np.ndarray],
            held_counts: Callable[[], np.ndarray],
        ) -> tuple[dict[str, np.ndarray], dict[str, Any], bool]:
            """The replicate's result; refitted exactly when d is None, scored exactly when m is None."""
            if d is None:
                t = self._refit(fit_counts()).temperature
                assert t is not None  # a multiclass temperature refit has its T
                beta = 1.0 / t
            else:
                beta = exp.beta0 + d
            if m is None:
                m = self._score(1.0 / beta, held_counts())
                if not exact_eval:
                    m["classwise_ece"] = float("nan")
            return {"temperature": np.array(1.0 / beta)}, m, d is None

        def one(draw: Draw) -> tuple[dict[str, np.ndarray], dict[str, Any], bool]:
            counts = draw.fit_counts
            d = exp.root(counts)
            m = None if exact_eval or d is None else exp.metrics(draw.held, d, n_bins)
            return settle(d, m, lambda: counts, lambda: draw.held_counts)

        threads = default_threads() if self.threads is None else self.threads
        if exact_eval or not kernels.worth_it(
            self.options.bootstrap * (len(self.fit_rows) + len(self.eval_rows)), kernels.MIN_REPLICATE_ROWS
        ):
            done = _map_in_order(one, draws, threads)
        else:
            fast = CompiledReplicates(exp)

            def block(b: Block) -> list[tuple[dict[str, np.ndarray], dict[str, Any], bool]]:
                ds = fast.roots(b)
                ms = fast.metrics(b, ds, n_bins)
                return [one(b.wrapped[r]) if b.wrapped[r] is not None else in_block(b, r, d, m)
                        for r, (d, m) in enumerate(zip(ds, ms, strict=True))]

            def in_block(
                b: Block, r: int, d: float | None, m: dict[str, Any] | None
            ) -> tuple[dict[str, np.ndarray], dict[str, Any], bool]:
                return settle(d, m, lambda: fast.fit_counts(b, r), lambda: fast.held_counts(b, r))

            blocks = fast.blocks(draws) if direct is None else fast.drawn_blocks(direct)
            done = [r for b in _map_in_order(block, blocks, threads) for r in b]
        return [r[0] for r in done], [r[1] for r in done], sum(r[2] for r in done)


def _map_in_order(fn: Callable[[_Item], _Out], items: Iterable[_Item], threads: int) -> list[_Out]:
    """[fn(item) for item in items], on ``threads`` threads, items drawn in order."""
    if threads <= 1:
        return [fn(item) for item in items]
    with ThreadPoolExecutor(threads) as pool:
        pending: list[Future[_Out]] = []
        out: list[_Out] = []
        for item in items:  # the draws come from one generator, in order
            pending.append(pool.submit(fn, item))
            if len(pending) > 2 * threads:
                out.append(pending.pop(0).result())
        out.extend(f.result() for f in pending)
    return out


# The grid (multiclass temperature scaling on small sets) --------------------


def _grid_terms(
    logits: np.ndarray, labels: np.ndarray, rows: np.ndarray, betas: Sequence[float] | np.ndarray, held_out: bool
) -> dict[str, np.ndarray]:
    """Per-row terms at each beta of the grid, float32 arrays of shape (rows, G).

    Fit part: ``g`` (dNLL/dbeta) and ``h`` (d2NLL/dbeta2). Held-out part:
    NLL, confidence and Brier terms with their beta-derivatives, and whether
    the (beta-invariant) argmax is right.
    """
    g_count = len(betas)
    names = ("nll", "g", "conf", "dconf", "brier", "dbrier") if held_out else ("g", "h")
    out: dict[str, np.ndarray] = {k: np.empty((len(rows), g_count), dtype=np.float32) for k in names}
    correct = np.empty(len(rows), dtype=bool)
    start = 0
    for z, y, _ in iter_chunks(logits, labels, rows):
        c = len(y)
        r = np.arange(c)
        correct[start : start + c] = z.argmax(axis=1) == y
        z -= z.max(axis=1, keepdims=True)
        zy = z[r, y]
        for j, beta in enumerate(betas):
            e = np.exp(beta * z)
            tot = e.sum(axis=1)
            m1 = np.einsum("ij,ij->i", e, z) / tot  # E_p[z] (shifted)
            sl = (slice(start, start + c), j)
            out["g"][sl] = m1 - zy
            if not held_out:
                m2 = np.einsum("ij,ij,ij->i", e, z, z) / tot
                out["h"][sl] = np.maximum(m2 - m1 * m1, 0.0)
                continue
            p_y = np.exp(beta * zy) / tot
            sq = np.einsum("ij,ij->i", e, e) / (tot * tot)  # sum_k p_k^2
            sqz = np.einsum("ij,ij,ij->i", e, e, z) / (tot * tot)  # sum_k p_k^2 z_k
            out["nll"][sl] = np.log(tot) - beta * zy
            out["conf"][sl] = 1.0 / tot  # the top class has z = 0 after the shift
            out["dconf"][sl] = -m1 / tot  # p_max (z_max - E_p z)
            out["brier"][sl] = sq - 2.0 * p_y + 1.0
            out["dbrier"][sl] = 2.0 * (sqz - m1 * sq) - 2.0 * p_y * (zy - m1)
        start += c
    if held_out:
        out["correct"] = correct
    return out


def _hermite(t: float, h: float, y0: Any, d0: Any, y1: Any, d1: Any) -> Any:  # floats or arrays
    """Cubic Hermite interpolation on an interval of length h at t in [0, 1]."""
    t2, t3 = t * t, t * t * t
    return (
        (2 * t3 - 3 * t2 + 1) * y0 + (t3 - 2 * t2 + t) * h * d0 + (-2 * t3 + 3 * t2) * y1 + (t3 - t2) * h * d1
    )


def _grid(logits: np.ndarray, labels: np.ndarray, fit_rows: np.ndarray, beta_hat: float) -> np.ndarray:
    """Betas around the fit, +-GRID_HALF_WIDTH sandwich standard errors of log(beta)."""
    terms = _grid_terms(logits, labels, fit_rows, [beta_hat], held_out=False)
    g = terms["g"][:, 0].astype(np.float64)
    h = terms["h"][:, 0].astype(np.float64)
    # Sandwich variance of an M-estimator: Var(beta) = sum g_i^2 / (sum h_i)^2.
    se_log = float(np.sqrt(np.sum(g * g)) / max(np.sum(h), 1e-300) / beta_hat)
    half = GRID_HALF_WIDTH * max(se_log, 1e-4)
    betas: np.ndarray = beta_hat * np.exp(np.linspace(-half, half, GRID_POINTS))
    return betas


def _grid_replicates(
    logits: np.ndarray,
    labels: np.ndarray,
    options: FitOptions,
    fit_rows: np.ndarray,
    eval_rows: np.ndarray,
    start: Scaling,
    draws: Iterable[Draw],
    refit: Refit,
) -> tuple[list[dict[str, np.ndarray]], list[dict[str, Any]], int]:
    assert start.temperature is not None  # called for a multiclass temperature scaling only
    betas = _grid(logits, labels, fit_rows, 1.0 / start.temperature)
    fit_terms = _grid_terms(logits, labels, fit_rows, betas, held_out=False)
    g_terms, h_terms = fit_terms["g"].astype(np.float64), fit_terms["h"].astype(np.float64)
    n_classes = logits.shape[1]
    exact_eval = len(eval_rows) * n_classes * options.bootstrap <= EXACT_EVAL_BUDGET
    held = None if exact_eval else _grid_terms(logits, labels, eval_rows, betas, held_out=True)
    steps = np.diff(betas)
    params: list[dict[str, np.ndarray]] = []
    metrics: list[dict[str, Any]] = []
    fallbacks = 0
    for draw in draws:
        cf, ce = draw.fit_counts, draw.held_counts
        s = cf @ g_terms  # weighted gradient at each grid beta
        d = cf @ h_terms
        j: int | None  # None: refitted exactly
        j = int(np.searchsorted(s, 0.0)) - 1  # s is increasing in beta (convex NLL)
        if j < 0 or j >= len(betas) - 1:
            res = cast("FitResult", refit(logits, labels, options, rows=fit_rows, weights=cf, start=start))
            assert res.temperature is not None  # a multiclass temperature refit has its T
            beta, j = 1.0 / res.temperature, None
            fallbacks += 1
        else:
            t = _hermite_root(float(steps[j]), float(s[j]), float(d[j]), float(s[j + 1]), float(d[j + 1]))
            beta = float(betas[j] + t * steps[j])
        params.append({"temperature": np.array(1.0 / beta)})
        if exact_eval or j is None:
            m = evaluate(logits, labels, 1.0 / beta, options.n_bins, rows=eval_rows, weights=ce).to_dict()
            if held is not None:
                m["classwise_ece"] = float("nan")
        else:
            assert held is not None  # made whenever exact_eval is False
            m = _interpolated_metrics(held, ce, j, t, steps[j], options.n_bins)
        metrics.append(m)
    return params, metrics, fallbacks


def _hermite_root(h: float, s0: float, d0: float, s1: float, d1: float) -> float:
    """t in [0, 1] where the Hermite cubic through (s0, d0), (s1, d1) crosses 0."""
    lo, hi = 0.0, 1.0
    for _ in range(60):  # bisection: the cubic is increasing between two such points
        mid = 0.5 * (lo + hi)
        if _hermite(mid, h, s0, d0, s1, d1) < 0:
            lo = mid
        else:
            hi = mid
    return 0.5 * (lo + hi)


def _interpolated_metrics(
    held: dict[str, np.ndarray], weights: np.ndarray, j: int, t: float, h: float, n_bins: int
) -> dict[str, Any]:
    def at(name: str, deriv: str) -> np.ndarray:
        y = held[name].astype(np.float64)
        d = held[deriv].astype(np.float64)
        return cast(np.ndarray, _hermite(t, h, y[:, j], d[:, j], y[:, j + 1], d[:, j + 1]))

    total = weights.sum()
    nll = float(weights @ at("nll", "g")) / total
    brier = float(weights @ at("brier", "dbrier")) / total
    conf = np.clip(at("conf", "dconf"), 0.0, 1.0)
    correct = held["correct"]
    bins = reliability_bins(conf, correct, n_bins, weights)
    accuracy = float(weights @ correct) / total
    mean_conf = float(weights @ conf) / total
    return {
        "nll": nll,
        "ece": ece_from_bins(*bins),
        "mce": mce_from_bins(*bins),
        "adaptive_ece": ece_from_bins(*equal_mass_bins(conf, correct, n_bins, weights)),
        "classwise_ece": float("nan"),
        "brier": brier,
        "accuracy": accuracy,
        "mean_confidence": mean_conf,
        "gap": mean_conf - accuracy,
    }

