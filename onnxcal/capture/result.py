"""What a capture holds: the logits, the labels, where they came from (``CaptureMeta``), and the
rows holding NaN or Inf (``Nonfinite``)."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import asdict, dataclass, field
from typing import ClassVar

import numpy as np

from .. import __version__
from ..guard import RowStats


@dataclass(frozen=True)
class CaptureMeta:
    """Where a capture came from.

    Attributes
    ----------
    model_sha256, model_path : str
        The model file that was run.
    output : str
        The graph output chosen as class scores.
    scores : str
        The tensor captured (the logits behind ``output``).
    activation : str or None
        What the model applies to ``scores`` (None for raw logits;
        ``"softmax"`` for an ai.onnx.ml classifier's probabilities, whose
        logarithm is captured).
    class_axis : int
        Class axis of ``output`` in the model.
    num_classes : int
        K.
    n : int
        Number of captured rows.
    data_source : str
        The validation set.
    fit_as : str
        ``"softmax"`` (labels are class indices, one per row),
        ``"sigmoid"`` (labels are 0/1, one per logit: binary or multi-label)
        or ``"sigmoid-l1"`` (class indices; the logits enter one sigmoid per
        class, L1-normalised after: fitted as L1(sigmoid(z / T)), ``fit.l1``).
    onnxcal_version : str
    class_names : tuple of str or None
        Names of the classes, when known (``--classes`` or folder names).
    data_id : str
        Fingerprint of the validation files (see :class:`onnxcal.data.Dataset`).
    data_total : int
        Samples in the whole validation set, before ``--limit``/``--shard``.
    shard : str or None
        ``"I/N"`` when the capture is one shard of the set.
    limit, shuffle_seed : int or None
        The selection options used.
    preprocess : dict or None
        Image preprocessing, resolved against the model input.
    batching : str
        ``"batched"`` (dynamic batch dim), ``"freed"`` (a fixed batch dim made
        symbolic in a copy) or ``"fixed"`` (run at the exported batch size).
    merged_from : tuple of str
        Capture files this one was merged from.
    holds, logits_from, spelling : str
        How the output was read (``graph.ScoreSite``): what it holds, how
        the logits were obtained (e.g. ``"log"`` for log p), the pattern
        recognised. ``patch --fit`` reads the model the same way.
    score_columns : str
        ``"START:STOP"`` when only these positions of a Concat output are
        class scores (``--score-columns``); "" otherwise.
    """

    model_sha256: str
    model_path: str
    output: str
    scores: str
    activation: str | None
    class_axis: int
    num_classes: int
    n: int
    data_source: str
    fit_as: str = "softmax"
    onnxcal_version: str = __version__
    class_names: tuple[str, ...] | None = None
    data_id: str = ""
    data_total: int = 0
    shard: str | None = None
    limit: int | None = None
    shuffle_seed: int | None = None
    preprocess: dict | None = None
    batching: str = ""
    merged_from: tuple[str, ...] = ()
    holds: str = ""
    logits_from: str = "tensor"
    spelling: str = ""
    score_columns: str = ""

    def to_dict(self) -> dict:
        return asdict(self)

    @classmethod
    def from_dict(cls, data: dict) -> CaptureMeta:
        """Inverse of :meth:`to_dict` (JSON lists back to tuples)."""
        data = dict(data)
        for key in ("class_names", "merged_from"):
            if isinstance(data.get(key), list):
                data[key] = tuple(data[key])
        return cls(**data)


@dataclass
class Nonfinite:
    """Rows holding NaN or Inf, counted batch by batch: how many, and the first few row numbers."""

    count: int = 0
    first: list[int] = field(default_factory=list)
    keep: ClassVar[int] = 5

    def add(self, bad: np.ndarray, rows: np.ndarray) -> None:
        """Count the rows where ``bad`` is true; ``rows`` are their row numbers in the set."""
        idx = np.flatnonzero(bad)
        self.count += int(idx.size)
        for r in rows[idx]:
            if len(self.first) >= self.keep:
                break
            if int(r) not in self.first:
                self.first.append(int(r))

    def describe(self, total: int) -> str:
        """``'4 of 40 rows (first rows: 2, 5, 7, 11)'``."""
        return f"{self.count} of {total} rows (first rows: {', '.join(map(str, self.first))})"


@dataclass(frozen=True)
class Capture:
    """Captured logits, labels and where they came from.

    ``indices`` holds the row number in the validation set of each sample,
    or None when the samples are all rows of the set in order.
    """

    logits: np.ndarray
    labels: np.ndarray
    meta: CaptureMeta
    indices: np.ndarray | None = None
    nonfinite_inputs: Mapping[str, Nonfinite] = field(default_factory=dict)
    """Inputs whose rows held NaN or Inf in the run that made this capture (empty when read from a file)."""
    stats: RowStats | None = None
    """What the captured rows look like (``guard``), from the run that made this capture."""
    notes: tuple[str, ...] = ()
    """What the reader should know about how the output was read (e.g. read as probabilities)."""

    def sample_indices(self) -> np.ndarray:
        """``indices``, or 0..n-1 when the capture holds every row in order."""
        if self.indices is not None:
            return self.indices
        return np.arange(self.meta.data_total or len(self.labels), dtype=np.int64)
