"""What the captured values are, judged from the data alone, whatever the graph says.

A reading of the graph can be wrong (a spelling onnxcal does not know, a
probability computed inside a subgraph). The data cannot lie about one
thing: rows of probabilities lie in [0, 1] and sum to 1, rows of
log-probabilities are at most 0 and their log-sum-exp is 0. Fitting such
rows as if they were logits gives a wrong model (softmax(p / T) with T
about 0.16), so this module counts, batch by batch, how many rows look like
each, and decides:

* raw logits whose rows are probability vectors on at least 99 % of rows
  (``AUTO_SHARE``) are read as probabilities (calibrated through log p);
  log-probability rows as log-probabilities; one value per row in [0, 1]
  (or K values of a sigmoid head) as probabilities (through logit p);
* an explicit ``--output-holds`` is refused when the data clearly disagree
  (fewer than 90 % of rows fit it, ``STATED_SHARE``; or the user says
  logits and 99 % of rows are probability vectors);
* the logits behind a recognised Softmax that are themselves probability
  rows (a softmax applied to probabilities) are refused.

Tolerances: a row sums to 1 within 1e-3 (``SUM_TOL``; float16 rows carry
about K * 5e-4 of rounding, common practice), values lie in [0, 1] within
1e-6, log-probabilities are at most 1e-6.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

SUM_TOL = 1e-3
VALUE_TOL = 1e-6
AUTO_SHARE = 0.99
STATED_SHARE = 0.90
PROBE_ROWS = 256
"""Samples run before a capture to decide how to read the output."""


@dataclass
class RowStats:
    """How many rows look like probabilities, log-probabilities, or values in [0, 1]."""

    rows: int = 0
    probabilities: int = 0
    log_probabilities: int = 0
    unit: int = 0
    saturated: int = 0
    k: int = 0

    def add(self, rows: np.ndarray) -> None:
        """Count ``rows`` (n x K, class axis last); NaN rows count as neither."""
        r = np.asarray(rows, dtype=np.float64)
        if r.ndim != 2 or not r.size:
            return
        self.k = r.shape[1]
        self.rows += len(r)
        finite = np.isfinite(r).all(axis=1)
        unit = finite & (r >= -VALUE_TOL).all(axis=1) & (r <= 1 + VALUE_TOL).all(axis=1)
        self.unit += int(unit.sum())
        sums = np.where(finite.reshape(-1, 1), r, 0.0).sum(axis=1)  # a row of inf and -inf would warn: not summed
        self.probabilities += int((unit & (np.abs(sums - 1) <= SUM_TOL)).sum()) if r.shape[1] > 1 else 0
        from scipy.special import logsumexp  # here, not at import: scipy.special takes ~0.5 s to import

        with np.errstate(invalid="ignore", over="ignore"):
            lse = logsumexp(np.where(finite.reshape(-1, 1), r, 0.0), axis=1)
        logp = finite & (r <= VALUE_TOL).all(axis=1) & (np.abs(lse) <= SUM_TOL)
        self.log_probabilities += int(logp.sum()) if r.shape[1] > 1 else 0

    def add_saturated(self, logits: np.ndarray, tiny: float) -> None:
        """Count rows of log p that hold a probability rounded to 1 or to 0 (clamped to ``tiny``)."""
        r = np.asarray(logits, dtype=np.float64)
        if r.ndim == 2 and r.size:
            self.saturated += int(((r == 0).any(axis=1) | (r <= np.log(tiny) + 1e-6).any(axis=1)).sum())

    def share(self, what: str) -> float:
        return getattr(self, what.replace("-", "_")) / self.rows if self.rows else 0.0

    def merge(self, other: RowStats) -> None:
        for name in ("rows", "probabilities", "log_probabilities", "unit", "saturated"):
            setattr(self, name, getattr(self, name) + getattr(other, name))
        self.k = self.k or other.k


def looks_like(stats: RowStats, kind: str, share: float = AUTO_SHARE) -> str:
    """What the rows hold, judging by the data: ``"probabilities"``, ``"log-probabilities"`` or ``"logits"``.

    ``kind`` is how the output would be fitted (``"softmax"`` or
    ``"sigmoid"``): K values that each lie in [0, 1] are probabilities of
    a sigmoid head even when their rows do not sum to 1, and so is one
    value per row in [0, 1].
    """
    if stats.rows == 0:
        return "logits"
    if stats.k > 1 and stats.share("probabilities") >= share:
        return "probabilities"
    if stats.k > 1 and stats.share("log-probabilities") >= share:
        return "log-probabilities"
    if (stats.k == 1 or kind == "sigmoid") and stats.share("unit") >= share:
        return "probabilities"
    return "logits"


def _percent(x: float) -> str:
    return f"{100 * x:.1f} %"


def describe(stats: RowStats) -> str:
    """``"412 of 412 rows (100.0 %) are probability vectors"`` for the strongest evidence."""
    if stats.k > 1 and stats.probabilities >= stats.log_probabilities:
        what, n = "probability vectors (in [0, 1], summing to 1)", stats.probabilities
    elif stats.k > 1:
        what, n = "log-probability vectors (at most 0, log-sum-exp 0)", stats.log_probabilities
    else:
        what, n = "in [0, 1]", stats.unit
    return f"{n} of {stats.rows} rows ({_percent(n / max(stats.rows, 1))}) are {what}"


def agrees(stats: RowStats, holds: str, kind: str) -> str | None:
    """Why the data clearly contradict a stated ``holds``, or None when they do not."""
    seen = looks_like(stats, kind)
    if holds == "logits":
        return None if seen == "logits" else f"{describe(stats)}: they hold {seen}, not logits"
    field_name = {"probabilities": "probabilities" if stats.k > 1 and kind != "sigmoid" else "unit",
                  "log-probabilities": "log-probabilities"}[holds]
    if stats.share(field_name) < STATED_SHARE:
        got = getattr(stats, field_name.replace("-", "_"))
        what = {"probabilities": "probability vectors", "unit": "in [0, 1]"}.get(field_name, "log-probability vectors")
        return f"only {got} of {stats.rows} rows ({_percent(stats.share(field_name))}) are {what}"
    return None


def label_coverage(labels: np.ndarray, k: int) -> tuple[str | None, str | None]:
    """(refusal, warning) when labels cover far fewer classes than the output has values per row.

    ``labels`` are class indices (one per row). n draws spread evenly over
    K classes cover about E = K (1 - exp(-n / K)) distinct classes (the
    classical occupancy problem, common practice). The output is refused
    as the class scores when the distinct labels d are at most K / 4 *and*
    at most E / 4: far fewer than the output has classes, and far fewer
    than the sample would show even for a rare-class-rich K-class model (a
    1,000-class model on 500 samples has E = 393, so it is refused only
    when its labels hit at most 98 classes). Below half of K (or of E) it
    warns.
    """
    n = int(np.size(labels))
    d = int(np.unique(np.asarray(labels)).size)
    if k <= 2 or n == 0:
        return None, None
    expected = k * (1 - np.exp(-n / k))
    what = (f"the labels cover {d} distinct classes, but the output has {k} values per row "
            f"({n} samples would cover about {expected:.0f} of {k} equally likely classes)")
    if d <= k / 4 and d <= expected / 4:
        return what, None
    if n >= 2 * k and d < k / 2 and d < expected / 2:  # with fewer samples, missing classes are no surprise
        return None, what
    return None, None
