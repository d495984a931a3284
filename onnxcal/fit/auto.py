"""``--method auto``: fit every applicable method the way ``fit`` fits one, and choose.

Each candidate method is summarised exactly as ``--method NAME`` would be
(the same stratified split, the same seed, so the same bootstrap draws for
every method: their intervals are paired), its held-out figures and
intervals become a :class:`~onnxcal.choose.Candidate`, and
:func:`onnxcal.choose.choose` applies the rule. The summary of the chosen
method is returned with the :class:`~onnxcal.choose.Choice` attached: its
parameters are baked in, the comparison table goes to FIT.json, the
record and the report.

The per-method summariser is passed in (``summarize_one``), as
:mod:`onnxcal.resample` is given its refit, so this module does not import
the one that calls it.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import replace
from typing import Any

import numpy as np

from ..choose import Choice, candidate, candidate_methods, choose

# summarize_one(logits, labels, capture_meta, options, threads) -> FitSummary
SummarizeOne = Callable[[np.ndarray, np.ndarray, dict[str, Any], Any, Any], Any]


def fit_all(
    logits: np.ndarray,
    labels: np.ndarray,
    capture_meta: dict[str, Any],
    options: Any,
    kind: str,
    summarize_one: SummarizeOne,
    threads: int | None = None,
    progress: Callable[[str], None] | None = None,
) -> tuple[Any, Choice]:
    """Summarise every candidate method; the chosen one's summary (with ``choice``) and the choice.

    ``options`` is a ``FitOptions`` with ``method="auto"``; each candidate
    gets a copy with its own method. ``progress`` hears each method's name
    before its fit.
    """
    k = logits.shape[1]
    summaries = {}
    for method in candidate_methods(kind):
        if progress is not None:
            progress(method)
        summaries[method] = summarize_one(logits, labels, capture_meta, replace(options, method=method), threads)
    return with_choice(summaries, k, options)


def with_choice(summaries: dict[str, Any], num_classes: int, options: Any) -> tuple[Any, Choice]:
    """Choose among per-method summaries; the chosen summary carries the choice and a note."""
    candidates = [
        candidate(s.scaling, num_classes, s.after.to_dict(), s.intervals, bool(s.result.converged))
        for s in summaries.values()
    ]
    first = next(iter(summaries.values()))
    choice = choose(candidates, first.basis)
    chosen = summaries[choice.chosen]
    note = f"--method auto compared {len(candidates)} methods: {choice.reason}"
    return replace(chosen, choice=choice, options=options, notes=(*chosen.notes, note)), choice


def describe_candidates(choice: Choice) -> Sequence[str]:
    """The comparison as plain lines (the report's Markdown, logs)."""
    lines = []
    for c in choice.candidates:
        span = c.intervals.get("nll")
        interval = "" if span is None else f" [{span[0]:.4f}, {span[1]:.4f}]"
        mark = " (chosen)" if c.method == choice.chosen else ""
        lines.append(f"{c.method}: {c.n_parameters} parameters, NLL {c.nll:.4f}{interval}{mark}")
    return lines
