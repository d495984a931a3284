"""Reading a model right before fitting it, and checking the reading on the data.

The score finder (``graph.find_scores``) reads the graph. Before a capture
that reading is checked against the model's own output on the first rows
(``read_model``): the logits it names must reproduce the output through the
activation and post-processing it found, an ai.onnx.ml classifier whose
raw scores do not is read through log p instead, and an output read as raw
logits whose rows are probabilities (``guard``) is read as probabilities.
After the capture the whole set is checked again (``check_capture``).
``identity_check`` runs the patched model with its parameters at the
identity against the original model: the check ``verify`` and ``calibrate``
use to catch a misreading.
"""

from __future__ import annotations

import warnings
from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
import onnx

from . import graph
from . import guard as _guard
from .capture import Probe, ProgressFn, RunOptions, RunPlan, probe, run_model, run_plan
from .data import Dataset, check_labels
from .errors import OnnxcalError, OnnxcalWarning
from .fit import FitSummary
from .graph import Record, ScoreSite
from .verify import (
    Check,
    identity_check,
    output_tolerance,
    reference_probabilities,
    skipped,
    tolerance,
)


@dataclass(frozen=True)
class Reading:
    """How the model is read, and what the first rows showed.

    ``head`` is the probe of the final reading: its rows and its pass, which
    the capture continues (:func:`onnxcal.capture.capture`); close it when done.
    """

    site: ScoreSite
    notes: tuple[str, ...] = ()
    k: int = 0
    head: Probe | None = None

    def close(self) -> None:
        if self.head is not None:
            self.head.close()


def read_model(
    model: onnx.ModelProto,
    dataset: Dataset,
    *,
    output: str | None,
    holds: str | None,
    activation: str | None,
    run: RunOptions,
    score_columns: str | None = None,
) -> Reading:
    """The reading of ``model``'s output, checked on the first rows of ``dataset``.

    Raises
    ------
    OnnxcalError
        The logits found do not reproduce the model's output, or the data
        contradict ``holds`` (what the user says the output holds).
    """
    site = graph.find_scores(model, output, score_columns=score_columns)
    kind = graph.fit_kind(site, activation)
    if holds is not None:
        site = graph.read_as(site, holds, kind, source="stated")
    probes = [probe(model, dataset, site, run)]  # the last one is the reading's

    def again(new: ScoreSite) -> Probe:
        probes[-1].close()
        probes.append(probe(model, dataset, new, run))
        return probes[-1]

    try:
        return _checked(dataset, probes[0], again, holds, kind)
    except BaseException:
        probes[-1].close()
        raise


def _checked(
    dataset: Dataset, head: Probe, again: Callable[[ScoreSite], Probe], holds: str | None, kind: str
) -> Reading:
    """The reading checked on the probe's rows (``again`` probes another reading)."""
    notes: list[str] = []
    site = head.site
    if site.logits_from == "raw-scores" and _mismatch(head.z, head.values, site) is not None:
        notes.append(
            f"the raw scores of the {site.ml_transform} classifier behind output '{site.output}' do not "
            "reproduce its probabilities, so onnxcal calibrates log p instead"
        )
        head = again(replace(site, logits_from="log"))
        site = head.site
    stats = _guard.RowStats()
    stats.add(head.values)
    if holds is not None:
        if (why := _guard.agrees(stats, holds, kind)) is not None:
            raise OnnxcalError(
                f"--output-holds {holds}: on the first {stats.rows} rows of '{dataset.source}', {why}",
                "leave out --output-holds, or check which output you chose (--output)",
            )
    elif site.activation is None:
        seen = _guard.looks_like(stats, kind)
        if seen != "logits":
            head = again(graph.read_as(site, seen, kind, source="data"))
            site = head.site
            notes.append(
                f"output '{site.output}' holds {seen}, not logits: {_guard.describe(stats)}; onnxcal "
                f"calibrates them through z = {_Z[site.logits_from]} and replaces the output's values in place "
                "(say otherwise with --output-holds)"
            )
    z = head.z
    if site.activation is not None and (why := _mismatch(z, head.values, site)) is not None:
        raise OnnxcalError(
            f"onnxcal's reading of output '{site.output}' ({graph.describe_site(site)}) does not reproduce the "
            f"model's own output on the first rows ({why})",
            "choose another output with --output, or say what it holds with --output-holds",
        )
    return Reading(site, tuple(notes), int(z.shape[1]) if z.ndim == 2 else 0, head)


_Z = {"log": "log p", "logit": "log p - log(1 - p)", "log-probabilities": "the log-probabilities themselves"}


def _mismatch(z: np.ndarray, values: np.ndarray, site: ScoreSite) -> str | None:
    """Why post(activation(z)) is not the model's output (within its tolerance), or None."""
    if site.activation is None:
        return None
    ref = reference_probabilities(z.astype(np.float64), 1.0, site.activation, site.post)
    got = np.asarray(values, dtype=np.float64)
    if ref.shape != got.shape:
        return f"{ref.shape[1]} values per row where the output has {got.shape[1]}"
    tol = output_tolerance(site.dtypes or (site.dtype,), site.post)
    diff = np.abs(got - ref)
    if site.activation == "logsoftmax":
        diff = diff / np.maximum(1.0, np.abs(ref))
    finite = np.isfinite(diff)
    err = float(np.max(diff[finite])) if finite.any() else 0.0
    return None if err <= tol else f"they differ by up to {err:.3g}, more than {tol:.3g}"


def capture_check(site: ScoreSite, kind: str) -> Callable[[_guard.RowStats], None]:
    """The check ``capture`` runs on the statistics of every captured row (before writing).

    Refuses logits behind a recognised softmax that are themselves
    probability rows, and an output read one way on the first rows that
    the whole set contradicts.
    """

    def check(stats: _guard.RowStats) -> None:
        seen = _guard.looks_like(stats, kind)
        if site.logits_from == "tensor" and site.activation in ("softmax", "logsoftmax") and seen == "probabilities":
            raise OnnxcalError(
                f"the logits '{site.scores}' behind the {site.spelling} of output '{site.output}' are themselves "
                f"probabilities ({_guard.describe(stats)}): the model applies a softmax to probabilities, and "
                "temperature scaling of those would not calibrate it",
                "calibrate the output that holds the first probabilities (--output), or re-export the model "
                "without the second softmax",
            )
        if site.activation is None and seen != "logits":
            raise OnnxcalError(
                f"output '{site.output}' was read as raw logits from its first rows, but over the whole set "
                f"{_guard.describe(stats)}",
                "say what it holds with --output-holds",
            )
        if (site.spelling == "data" and site.logits_from == "log"
                and stats.share("log-probabilities") < _guard.AUTO_SHARE):
            raise OnnxcalError(
                f"output '{site.output}' was read as probabilities from its first rows, but over the whole set only "
                f"{stats.log_probabilities} of {stats.rows} rows are probability vectors",
                "say what it holds with --output-holds",
            )

    return check


PROBABILITIES_ADVICE = "really holds logits and not probabilities"
"""The phrase of the fit's warning about a temperature far from 1 (``fit._far_warning``)."""


def fit_read_logits(summary: FitSummary) -> FitSummary:
    """``summary`` without the advice to check that the output holds logits, when onnxcal read them.

    A temperature far from 1 makes the fit warn that the output may hold
    probabilities. When the capture read the logits itself (the input of a
    Softmax or Sigmoid it recognised, or log p of probabilities it knows to
    be such, checked by the data guard), that advice is wrong: a note says
    what T far from 1 means instead.
    """
    meta = summary.capture
    if meta.get("activation") is None:
        return summary

    def keep(ws: tuple[str, ...]) -> tuple[str, ...]:
        return tuple(w for w in ws if PROBABILITIES_ADVICE not in w)

    if keep(summary.warnings) == tuple(summary.warnings):
        return summary
    t = summary.temperature
    how = ("much over-confident (T > 1 softens it)" if t is not None and t > 1 else
           "much under-confident (T < 1 sharpens it)" if t is not None else "far from calibrated")
    note = (f"the fitted scaling is far from the identity: onnxcal read the logits behind output "
            f"'{meta.get('output')}' itself ({meta.get('spelling')}, checked not to be probabilities), so the model "
            f"is {how} on this set")
    result = replace(summary.result, warnings=keep(summary.result.warnings))
    held = summary.holdout_result
    held = None if held is None else replace(held, warnings=keep(held.warnings))
    return replace(summary, result=result, holdout_result=held, warnings=keep(summary.warnings),
                   notes=(*summary.notes, note))


def warn_saturated(site: ScoreSite, stats: _guard.RowStats | None) -> None:
    """Warn when log p loses margins: probabilities rounded to 0 or 1 in the output's dtype."""
    if stats is None or site.logits_from != "log" or not stats.saturated:
        return
    why = (f"the classifier's raw scores are not available (post_transform {site.ml_transform})"
           if site.spelling == "ml-classifier" else "the model gives probabilities, not logits")
    warnings.warn(
        OnnxcalWarning(
            f"{stats.saturated} of {stats.rows} rows of output '{site.output}' hold probabilities rounded to 0 or 1 "
            f"in {site.dtype}: log p loses their margins, so the fitted T may be far from the one the true margins "
            f"give ({why})"
        ),
        stacklevel=3,
    )


def check_label_coverage(
    labels: np.ndarray, k: int, site: ScoreSite, class_names: Sequence[str] | None, source: str
) -> None:
    """Refuse (or warn about) an output with far more values per row than the labels have classes.

    The labels are checked first (class indices in [0, K)), so a bad label
    is reported as such.
    """
    if class_names is not None or np.ndim(labels) != 1 or site.takes_one or k < 2:
        return
    check_labels(labels, len(labels), k, source)
    refuse, warn = _guard.label_coverage(labels, k)
    if refuse is not None:
        raise OnnxcalError(
            f"output '{site.output}' may not be the class scores: on '{source}' {refuse}",
            "choose the class-score output with --output, or give --classes with one name per value if "
            "the labels really cover only these classes",
        )
    if warn is not None:
        warnings.warn(OnnxcalWarning(f"output '{site.output}': {warn}"), stacklevel=3)


def patch_reading(meta: dict[str, Any]) -> dict[str, Any]:
    """The keyword arguments of ``graph.patch`` that read a model as a capture read it."""
    kw: dict[str, Any] = {}
    if meta.get("spelling") in ("stated", "data") and meta.get("holds"):
        kw.update(holds=meta["holds"], holds_from=meta["spelling"])
    if meta.get("spelling") == "ml-classifier" and meta.get("logits_from") == "log":
        kw["logits_from"] = "log"
    if meta.get("score_columns"):
        kw["score_columns"] = meta["score_columns"]
    return kw


def site_reading(site: ScoreSite) -> dict[str, Any]:
    """The keyword arguments of ``graph.patch`` that read a model as ``site`` does."""
    columns = "" if site.columns is None else f"{site.columns[1]}:{site.columns[2]}"
    return patch_reading({"spelling": site.spelling, "holds": site.holds, "logits_from": site.logits_from,
                          "score_columns": columns})


def _params(records: tuple[Record, ...]) -> str:
    methods = {r.method for r in records}
    if methods == {"temperature"}:
        return "T = 1"
    if methods <= {"temperature", "vector", "platt"}:
        return "the identity (T = 1, w = 1, b = 0)"
    words = dict.fromkeys(_IDENTITY[m] for m in sorted(methods) if m in _IDENTITY)
    return f"the identity ({'; '.join(words)})"


# Each method's identity parameters, in words (graph.mapped.identity_parameters for the maps).
_IDENTITY = {
    "temperature": "T = 1", "vector": "w = 1, b = 0", "platt": "w = 1, b = 0", "matrix": "matrix W = I, b = 0",
    "dirichlet": "Dirichlet W = I, b = 0", "beta": "beta a = b = 1, c = 0",
    "ensemble-temperature": "ensemble weights (0, 1, 0)", "ovr-platt": "one-vs-rest Platt a = 1, b = 0",
}


@dataclass(frozen=True)
class IdentityRun:
    """What the identity check runs: the patched graph at the identity (``at_one``), the original's outputs it
    compares (``names``, the samples of each along ``out_axes``) and those it cannot (``others``, quoted)."""

    at_one: onnx.ModelProto
    names: tuple[str, ...]
    out_axes: tuple[int, ...]
    others: tuple[str, ...]


def identity_run(original: onnx.ModelProto | None, patched: onnx.ModelProto, records: tuple[Record, ...]
                 ) -> IdentityRun | Check:
    """The identity check's run (:class:`IdentityRun`), or the check skipped with the reason."""
    if original is None:
        return skipped("identity", "no original model: the patch cannot be undone exactly (folded weights), "
                                   "give --original")
    if why := graph.identity_unavailable(records):
        return skipped("identity", why)
    at_one = graph.at_identity(patched, records, original)
    if at_one is None:
        return skipped("identity", "the parameters are folded into the weights; give --original")
    kept = [o for o in original.graph.output if o.name in {p.name for p in patched.graph.output}]
    axes = {o.name: _samples_axis(graph.tensor_spec(o)) for o in kept}
    names = [o.name for o in kept if axes[o.name] is not None]
    if not names:
        return skipped("identity", "the patched model keeps none of the original's outputs")
    others = tuple(f"'{o.name}'" for o in kept if o.name not in names)
    return IdentityRun(at_one, tuple(names), tuple(axes[n] or 0 for n in names), others)


def identity(
    original: onnx.ModelProto | None,
    patched: onnx.ModelProto,
    records: tuple[Record, ...],
    dataset: Dataset,
    run: RunOptions,
    progress: ProgressFn | None = None,
    original_run: RunPlan | None = None,
    prepared: IdentityRun | Check | None = None,
    got: list[np.ndarray] | None = None,
    want: list[np.ndarray] | None = None,
) -> Check:
    """``verify.identity_check`` of the patched model at the identity against ``original``.

    ``original_run``, when given, is a session that gives the original's
    outputs unchanged (the capture's copy of it, whose added nodes compute
    the logits and touch none of the original's): it runs the original's
    side instead of a session of its own. ``prepared`` is
    :func:`identity_run` of the same arguments when already made; ``got``
    the outputs at the identity on ``dataset``'s rows (``prepared.names``,
    from :func:`onnxcal.graph.identity_rider` in the patched model's
    session), when already run; ``want`` the original's outputs on those rows, when the capture has them.
    """
    plan = identity_run(original, patched, records) if prepared is None else prepared
    if isinstance(plan, Check):
        return plan
    assert original is not None  # identity_run skips without one
    names, out_axes = list(plan.names), list(plan.out_axes)
    if want is None and original_run is not None:
        want = run_plan(replace(original_run, names=tuple(names), out_axes=tuple(out_axes)), dataset,
                        progress=progress, description="running the original")
    elif want is None:
        want = run_model(original, dataset, names, options=run, progress=progress,
                         description="running the original", out_axes=out_axes)
    if got is None:
        got = run_model(plan.at_one, dataset, names, options=run, progress=progress,
                        description="running at the identity", out_axes=out_axes)
    tols = _tolerances(patched, original, records, names)
    check = identity_check([(n, w, g, tols[n]) for n, w, g in zip(names, want, got, strict=True)], _params(records))
    if plan.others:  # a single number, or no telling which axis holds the samples
        check = replace(check, detail=f"{check.detail}; not compared: {', '.join(plan.others)} (no known samples axis)")
    return check


def _samples_axis(spec: graph.TensorSpec) -> int | None:
    """The axis of an output's samples: 0, unless the declared shape has a fixed first dim before
    dynamic ones: its only dynamic one (an LSTM's state, num_directions x N x H: 1), or None when
    there are several (which one holds the samples is unknown); None for a single number."""
    if spec.shape is None:
        return 0
    if not spec.shape:
        return None
    open_dims = [i for i, d in enumerate(spec.shape) if not (isinstance(d, int) and d > 0)]
    if not (isinstance(spec.shape[0], int) and spec.shape[0] > 0) or not open_dims:
        return 0
    return open_dims[0] if len(open_dims) == 1 else None


def _tolerances(
    patched: onnx.ModelProto, original: onnx.ModelProto, records: tuple[Record, ...], names: list[str]
) -> dict[str, float]:
    """Per output: the calibrated ones follow the dtypes their values pass through; others their own dtype."""
    specs = {vi.name: graph.tensor_spec(vi) for vi in original.graph.output}
    tols = {n: (tolerance(specs[n].dtype) if specs[n].is_float else 0.0) for n in names}
    for r in records:
        if r.output in tols:
            site = graph.find_recorded(patched, r)
            dtypes = tuple(dict.fromkeys([*site.dtypes, *(site.dtype,)]))
            tols[r.output] = max(tols[r.output], output_tolerance(dtypes, site.post))
            if specs[r.output].dtype.startswith("seq("):
                tols[r.output] = output_tolerance(dtypes, site.post)
    return tols
