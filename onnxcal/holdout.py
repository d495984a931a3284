"""The stratified holdout split of a fit: rows, or whole samples when a sample gives several rows.

Split out of :mod:`onnxcal.resample`, which re-exports every public name here.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import OnnxcalError


def _strata(labels: np.ndarray) -> np.ndarray:
    """One stratum per row: the class, or for multi-label rows the rarest label present."""
    labels = np.asarray(labels)
    if labels.ndim == 1:
        return labels.astype(np.int64)
    freq = labels.sum(axis=0).astype(np.float64)
    masked = np.where(labels > 0, freq[None, :], np.inf)
    strata: np.ndarray = masked.argmin(axis=1)
    strata[~(labels > 0).any(axis=1)] = labels.shape[1]  # rows with no label present
    return strata


def strata_name(labels: np.ndarray) -> str:
    """What the split is stratified by, for the record."""
    return "class" if np.ndim(labels) == 1 else "rarest label present"


@dataclass(frozen=True)
class Samples:
    """The samples of a run of score rows: each one's first row and its number of rows.

    Built by :func:`samples_of` from the sample number of each row (sorted:
    a capture's rows are sample-major).
    """

    starts: np.ndarray
    sizes: np.ndarray

    @property
    def count(self) -> int:
        return len(self.starts)

    def rows(self, drawn: np.ndarray) -> np.ndarray:
        """The row positions of the samples ``drawn`` (with repeats), sample after sample."""
        sizes = self.sizes[drawn]
        ends = np.cumsum(sizes)
        first = np.repeat(self.starts[drawn] - ends + sizes, sizes)  # each row's sample start, less its place
        return np.asarray(np.arange(int(ends[-1]) if len(ends) else 0) + first, dtype=np.int64)


def samples_of(groups: np.ndarray) -> Samples:
    """The :class:`Samples` of rows whose sample numbers are ``groups`` (non-decreasing).

    >>> samples_of(np.array([0, 0, 0, 4, 4, 7])).sizes.tolist()
    [3, 2, 1]
    """
    g = np.asarray(groups)
    if len(g) > 1 and bool(np.any(g[1:] < g[:-1])):
        raise ValueError("groups must be sorted: the rows of each sample together, samples in order")
    first = np.ones(len(g), dtype=bool)
    first[1:] = g[1:] != g[:-1]
    starts = np.flatnonzero(first).astype(np.int64)
    return Samples(starts, np.diff(np.append(starts, len(g))).astype(np.int64))


def _sample_strata(labels: np.ndarray, samples: Samples) -> np.ndarray:
    """One stratum per sample: its most frequent class over its rows; for multi-label rows,
    the rarest label present in any of its rows."""
    labels = np.asarray(labels)
    if labels.ndim == 1:
        k = int(labels.max()) + 1 if len(labels) else 1
        owner = np.repeat(np.arange(samples.count), samples.sizes)
        counts = np.bincount(owner * k + labels.astype(np.int64), minlength=samples.count * k)
        return np.asarray(counts.reshape(samples.count, k).argmax(axis=1), dtype=np.int64)
    present = np.add.reduceat((labels > 0).astype(np.int64), samples.starts, axis=0) > 0
    return _strata(present.astype(np.uint8))


def split_holdout(
    labels: np.ndarray, fraction: float, seed: int, groups: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """Stratified split into (fit rows, held-out rows), both sorted.

    From each stratum (class; for multi-label rows, the rarest label
    present, a simple form of stratification common in practice) a random
    round(fraction * size) rows are held out, so every class keeps its share
    in both parts. With ``groups`` (the sample of each row, sorted) whole
    samples are split: a sample's stratum is its most frequent class (or
    the rarest label present in any of its rows), the rounding applies to
    samples, and each part holds every row of its samples, so no sample is
    in both. One row per sample gives the split of ``groups=None``.

    Raises
    ------
    OnnxcalError
        The fraction leaves no rows in one of the parts.

    Examples
    --------
    >>> fit_rows, held = split_holdout(np.array([0, 0, 0, 0, 1, 1, 1, 1]), 0.25, seed=0)
    >>> len(held), sorted(np.array([0, 0, 0, 0, 1, 1, 1, 1])[held].tolist())
    (2, [0, 1])
    """
    if groups is None:
        held = _held_out(_strata(labels), fraction, seed)
        return np.flatnonzero(~held), np.flatnonzero(held)
    samples = samples_of(groups)
    held_samples = _held_out(_sample_strata(labels, samples), fraction, seed)
    held = np.repeat(held_samples, samples.sizes)
    return np.flatnonzero(~held), np.flatnonzero(held)


def split_samples(groups: np.ndarray | None, fit_rows: np.ndarray, eval_rows: np.ndarray) -> dict[str, object]:
    """For the record of a split of rows grouped by sample: how many samples each part holds and
    how many rows a sample has (empty for one row per sample)."""
    if groups is None:
        return {}
    g = np.asarray(groups)
    per = np.bincount(g)
    sizes = sorted(set(per[per > 0].tolist()))
    return {
        "grouped_by": "sample",
        "rows_per_sample": sizes[0] if len(sizes) == 1 else sizes,
        "samples_fit": samples_of(g[fit_rows]).count,
        "samples_holdout": samples_of(g[eval_rows]).count if eval_rows is not fit_rows else 0,
    }


def rows_of_samples(rows: int, samples: int | None) -> str:
    """A count for the notes: ``'1920 rows of 30 samples'``, or ``'30 samples'`` when each sample
    is one row.

    >>> rows_of_samples(1920, 30), rows_of_samples(30, None)
    ('1920 rows of 30 samples', '30 samples')
    """
    if samples is None or samples == rows:
        return f"{rows} samples"
    return f"{rows} rows of {samples} samples"


def _held_out(strata: np.ndarray, fraction: float, seed: int) -> np.ndarray:
    """Which units (rows, or samples) are held out: round(fraction * size) random ones of each stratum."""
    n = len(strata)
    rng = np.random.default_rng(seed)
    perm = rng.permutation(n)
    order = perm[np.argsort(strata[perm], kind="stable")]  # a random order within each stratum
    del perm
    sizes = np.bincount(strata)
    starts = np.concatenate([[0], np.cumsum(sizes)[:-1]])
    take = np.floor(fraction * sizes + 0.5).astype(np.int64)
    held = np.zeros(n, dtype=bool)
    for start, count in zip(starts[take > 0], take[take > 0], strict=True):  # the first rows of each stratum
        held[order[start : start + count]] = True
    if not held.any() or held.all():
        raise OnnxcalError(
            f"--holdout {fraction:g} leaves {'no' if not held.any() else 'all'} of the {n} samples "
            "held out",
            "use a larger set, a fraction between 0.1 and 0.5, or --holdout 0 (in-sample figures)",
        )
    return held
