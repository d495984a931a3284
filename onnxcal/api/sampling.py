"""The rows ``calibrate`` checks its patched model on: a bounded sample, stratified by label.

``verify`` checks every row; ``calibrate`` has just captured the logits of
every row and fitted on them, and checks the patched model it is about to
write on a sample (``verify_rows``, by default :data:`VERIFY_ROWS`), so
that the command runs the model about once, not three times (the patched
model, the original and the patched model at the identity). Why a sample is
enough for a 1e-5 reference check is in docs/commands.md ("calibrate").
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from ..data import Dataset

VERIFY_ROWS = 256
"""Rows the patched model is checked on by ``calibrate`` unless asked for more (or all)."""
IDENTITY_SHARE = 4
"""The identity check (two more runs: the original, and the patched model at the identity) takes the
first quarter of the sample in its order: the extreme rows first, then one row of each label."""
EXTREME_SHARE = 8
"""One row in this many of the sample is among those of the largest absolute logit."""


@dataclass(frozen=True)
class Sample:
    """Positions (in the selected rows) of the rows checked, in the order they were chosen: the rows of
    largest absolute logit first, then the stratified draw; and the note saying so."""

    order: np.ndarray
    note: str

    @property
    def positions(self) -> np.ndarray:
        """Every position of the sample, sorted (the rows are read front to back)."""
        return np.sort(self.order)

    @property
    def identity_positions(self) -> np.ndarray:
        """The first ``len // IDENTITY_SHARE`` positions chosen (at least one), sorted."""
        return np.sort(self.order[: max(1, len(self.order) // IDENTITY_SHARE)])


def strata(labels: np.ndarray) -> np.ndarray:
    """A stratum per row: the label, or for multi-label rows the first positive label (-1 for none)."""
    labels = np.asarray(labels)
    if labels.ndim == 1:
        return labels.astype(np.int64)
    positive = labels.astype(bool)
    return np.where(positive.any(axis=1), positive.argmax(axis=1), -1).astype(np.int64)


def verification_sample(
    labels: np.ndarray, logits: np.ndarray, keep: np.ndarray, limit: int | None, seed: int = 0
) -> Sample | None:
    """The rows to check, or None when every row is checked (``limit`` None or at least the rows kept).

    The sample holds the ``limit // EXTREME_SHARE`` kept rows of the largest
    absolute logit (where a rounding or overflow shows first) and, for the
    rest, kept rows drawn with ``numpy.random.default_rng(seed)`` in
    proportion to their label's share, every label present getting at least
    one row while the sample has room (proportional allocation: each row's
    rank within its label over the label's size, smallest first).
    """
    kept = np.flatnonzero(keep)
    if limit is None or len(kept) <= limit:
        return None
    top = np.abs(logits[kept]).max(axis=1) if logits.ndim == 2 else np.abs(logits[kept])
    n_extreme = limit // EXTREME_SHARE
    extreme = kept[np.argsort(-top, kind="stable")[:n_extreme]]
    rest = np.setdiff1d(kept, extreme, assume_unique=True)
    order = np.random.default_rng(seed).permutation(rest)
    group = strata(labels)[order]
    _, inverse, counts = np.unique(group, return_inverse=True, return_counts=True)
    rank = np.empty(len(order), np.int64)
    sort = np.argsort(inverse, kind="stable")
    starts = np.concatenate([[0], np.cumsum(counts)[:-1]])
    rank[sort] = np.arange(len(order)) - np.repeat(starts, counts)
    pick = order[np.lexsort((rank, rank / counts[inverse]))[: limit - n_extreme]]
    chosen = np.concatenate([extreme, pick])
    note = (
        f"the patched model was checked on {len(chosen)} of the {len(keep)} rows (stratified by label, "
        f"seed {seed}, with the {n_extreme} rows of largest |logit|), the identity on "
        f"{max(1, len(chosen) // IDENTITY_SHARE)} of them; verify checks every row"
    )
    return Sample(chosen, note)


def subset(dataset: Dataset, positions: np.ndarray) -> Dataset:
    """The rows at ``positions`` of the selected rows of ``dataset``."""
    labels = None if dataset.labels is None else np.asarray(dataset.labels)[positions]
    return replace(dataset, rows=dataset.row_numbers()[positions], labels=labels)
