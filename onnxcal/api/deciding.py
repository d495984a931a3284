"""The decision steps of calibrate, patch and verify: where the rows come from, choosing, baking, checking.

With ``--accept-error`` or ``--set-coverage`` the thresholds are chosen on
labelled rows the calibration map was not fitted on (docs/decisions.md,
"Data hygiene"):

* ``calibrate`` without ``--decision-data``: the held-out part of the
  validation set. The map baked in is then the one fitted on the other part
  (not the refit on all rows, which has seen the held-out rows), and the
  output says so; ``--holdout 0`` is refused.
* ``--decision-data SET`` (``calibrate`` and ``patch``): a labelled set of
  its own, run through the patched model; the map stays the final one.

The probabilities chosen on are the patched model's own (run with
onnxruntime), so the rows counted when choosing are the rows the graph
accepts. ``verify`` runs the decision outputs and checks them
(``decisions.gate``).
"""

from __future__ import annotations

import warnings
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np
import onnx

from .. import graph
from ..capture import CPU, ProgressFn, RunOptions, label_rows, run_model
from ..data import Dataset, DataSpec
from ..decisions import gate
from ..decisions.plan import HOLDOUT, SEPARATE, DecisionOptions, Decisions, Rows, check_decision_options, choose
from ..errors import OnnxcalError, OnnxcalWarning
from ..fit import FitOptions, FitSummary
from ..graph import Record
from ..graph.decide import add_decisions, probabilities_layout
from ..resample import split_holdout
from ..verify import Check, reference_probabilities, skipped, tolerance
from .common import load_data, run_options


def check_request(decisions: DecisionOptions, separate: bool, fit_options: FitOptions | None) -> None:
    """Before any work: the options in range, and rows to choose on.

    ``fit_options`` None: the command fits nothing (``patch``), so a
    separate set is the only source of rows.
    """
    check_decision_options(decisions)
    if not decisions.wanted or separate:
        return
    if fit_options is None:
        raise OnnxcalError(
            "--accept-error and --set-coverage choose thresholds on labelled rows, and patch has none",
            "give a labelled set the map was not fitted on with --decision-data, or use calibrate",
        )
    if fit_options.holdout == 0:
        raise OnnxcalError(
            "--accept-error and --set-coverage choose thresholds on rows the map was not fitted on, and with "
            "--holdout 0 every row is fitted on",
            "give --holdout (e.g. 0.25), or a separate labelled set with --decision-data",
        )


def check_targets(
    accept_error: float | None, accept_confidence: float | None, set_coverage: float | None
) -> DecisionOptions:
    """verify's targets, checked before any work (``accept_confidence`` None: the record's)."""
    targets = DecisionOptions(accept_error=accept_error, set_coverage=set_coverage)
    if accept_confidence is not None:
        targets = replace(targets, accept_confidence=accept_confidence)
    return check_decision_options(targets)


def baked_summary(summary: FitSummary, decisions: DecisionOptions, separate: bool) -> FitSummary:
    """The fit whose map is baked in: with thresholds from the held-out rows, the fit-part map."""
    if not decisions.wanted or separate or summary.holdout_result is None:
        return summary
    n_fit, n_held = summary.split.get("n_fit", 0), summary.split.get("n_holdout", 0)
    notes = [n for n in summary.notes if not n.startswith("the parameters baked in are refitted")]
    notes.append(
        f"the decision thresholds are chosen on the {n_held} held-out rows, so the map baked in is the one "
        f"fitted on the other {n_fit} rows (the headline figures are exactly its), not a refit on all rows, "
        "which would have seen the rows the thresholds come from"
    )
    return replace(summary, result=summary.holdout_result, notes=tuple(notes))


def _labels(labels: np.ndarray, p: np.ndarray, record: Record, source: str) -> np.ndarray:
    rows = p.reshape(len(p), -1)
    return label_rows(labels, rows.shape, "sigmoid" if record.activation == "sigmoid" else "softmax", source)


def model_probabilities(
    patched: onnx.ModelProto, record: Record, dataset: Dataset, run: RunOptions, progress: ProgressFn | None
) -> np.ndarray:
    """The patched model's own calibrated output on every row of ``dataset``."""
    probabilities_layout(patched, record)  # refuse an output the decisions cannot read, first
    (p,) = run_model(patched, dataset, [record.output], options=run, progress=progress,
                     description="running patched model (decision thresholds)")
    return p


def on_holdout(
    p: np.ndarray, labels: np.ndarray, options: FitOptions, decisions: DecisionOptions
) -> Decisions:
    """Choose on the held-out rows of the fit's split (the same split ``fit.summarize`` made)."""
    fit_rows, held = split_holdout(labels, options.holdout, options.seed)
    where = Rows(
        HOLDOUT, len(held),
        f"{len(held)} held-out rows ({options.holdout:g} of the set, stratified, seed {options.seed}); "
        f"the map baked in was fitted on the other {len(fit_rows)}",
        {"fraction": options.holdout, "seed": options.seed, "n_fit": len(fit_rows)},
    )
    return choose(p, labels, held, decisions, where, other_rows=fit_rows)


def on_separate(
    patched: onnx.ModelProto, record: Record, dataset: Dataset, run: RunOptions, progress: ProgressFn | None,
    decisions: DecisionOptions,
) -> Decisions:
    """Choose on every row of a separate labelled set, run through the patched model."""
    if dataset.labels is None:
        raise OnnxcalError(f"--decision-data '{dataset.source}' has no labels", "add a 'labels' array")
    p = model_probabilities(patched, record, dataset, run, progress)
    labels = _labels(dataset.labels, p, record, dataset.source)
    where = Rows(SEPARATE, len(p), f"the {len(p)} rows of '{dataset.source}' (a separate labelled set)",
                 {"data": Path(dataset.source).name, "data_id": dataset.data_id})
    return choose(p, labels, np.arange(len(p)), decisions, where)


def bake(patched: onnx.ModelProto, record: Record, chosen: Decisions) -> onnx.ModelProto:
    """The patched model with the decision outputs the thresholds call for."""
    return add_decisions(patched, output=record.output, accept_threshold=chosen.accept_threshold,
                         sets=chosen.sets, section=chosen.section())


def _in_graph(model: onnx.ModelProto, section: dict[str, Any]) -> dict[str, np.ndarray | None]:
    inits = {i.name: i for i in model.graph.initializer}
    names = section.get("initializers", {})
    return {role: graph.tensor_array(inits[name]) if name in inits else None
            for role, name in names.items() if name}


def exact_checks(
    patched: onnx.ModelProto, record: Record, dataset: Dataset, run: RunOptions, progress: ProgressFn | None,
    reference: np.ndarray | None, keep: np.ndarray | None,
) -> tuple[list[Check], np.ndarray, dict[str, np.ndarray]]:
    """``decision-record``, ``decision-outputs`` and (with ``reference``) ``decision-reference``.

    Returns the checks, the model's probabilities and its decision outputs (rows in ``keep``).
    """
    section = record.decisions
    names = [record.output, *section.get("outputs", [])]
    values = run_model(patched, dataset, names, options=run, progress=progress,
                       description="running patched model (decision outputs)")
    if keep is not None:
        values = [v[keep] for v in values]
    p, got = values[0], dict(zip(names[1:], values[1:], strict=True))
    checks = [gate.record_check(section, _in_graph(patched, section)), gate.outputs_check(got, p, section)]
    if reference is not None:
        tol = tolerance(section.get("compute_dtype", "float32"))
        checks.append(gate.reference_check(got, reference, section, tol))
    return checks, p, got


def gates(
    record: Record, p: np.ndarray, got: dict[str, np.ndarray], labels: np.ndarray | None, source: str,
    targets: DecisionOptions, level: float | None,
) -> list[Check]:
    """``accept-error`` and ``set-coverage`` on labelled rows, against ``targets`` or the record's.

    ``level``: that of the intervals (``--accept-confidence``); by default the record's 1 - delta.
    """
    section = record.decisions
    options = section.get("options", {})
    level = gate.gate_level(section, level)
    checks: list[Check] = []
    if "accept" in got:
        error = targets.accept_error if targets.accept_error is not None else options.get("accept_error")
        if labels is None:
            checks.append(skipped("accept-error", f"'{source}' has no labels"))
        else:
            checks.append(gate.error_gate(got, p, labels, section.get("kind", "multiclass"), float(error), level))
    sets = gate.set_threshold(section)
    if sets is not None:
        coverage = targets.set_coverage if targets.set_coverage is not None else sets.coverage
        if labels is None:
            checks.append(skipped("set-coverage", f"'{source}' has no labels"))
        else:
            checks.append(gate.coverage_gate(got, labels, sets, float(coverage), level))
    return checks


def verify_checks(
    patched: onnx.ModelProto, records: tuple[Record, ...], dataset: Dataset, run: RunOptions,
    progress: ProgressFn | None, reference: np.ndarray | None, keep: np.ndarray | None, targets: DecisionOptions,
    level: float | None, labels: np.ndarray | None,
) -> list[Check]:
    """Every decision check of ``verify``.

    ``reference``: the last head's float64 reference probabilities (rows in
    ``keep``); ``labels``: the data's, for every row (``keep`` is applied here).
    """
    with_decisions = [r for r in records if r.decisions]
    if targets.wanted and not with_decisions:
        raise OnnxcalError(
            "--accept-error and --set-coverage hold the model's decision outputs to targets, and it has none",
            "add them with calibrate or patch (--accept-error, --set-coverage)",
        )
    checks: list[Check] = []
    for record in with_decisions:
        ref = reference if record is records[-1] else None
        head, p, got = exact_checks(patched, record, dataset, run, progress, ref, keep)
        y = None
        if labels is not None:
            n = len(keep) if keep is not None else len(p)
            y = label_rows(labels, (n, p.reshape(len(p), -1).shape[1]),
                           "sigmoid" if record.activation == "sigmoid" else "softmax", dataset.source)
            y = y[keep] if keep is not None else y
        named = head + gates(record, p, got, y, dataset.source, targets, level)
        checks += [replace(c, name=f"{c.name} ({record.source_output})") for c in named] if len(records) > 1 else named
    return checks


def warn_unmet(chosen: Decisions) -> None:
    """Warn when no acceptance threshold meets the target (the model then accepts nothing)."""
    if chosen.unmet:
        labels = f" for labels {list(chosen.unmet)}" if chosen.kind == "multilabel" else ""
        warnings.warn(OnnxcalWarning(
            f"no acceptance threshold meets an error of at most {chosen.options.accept_error:g} with confidence "
            f"{chosen.options.accept_confidence:g} on {chosen.rows.description}: the model's 'accept' output "
            f"accepts nothing{labels}"
        ), stacklevel=3)


def decision_spec(decisions: DecisionOptions, decision_data: Any, like: DataSpec | None) -> DataSpec | None:
    """The separate labelled set to choose on (with ``like``'s options, for calibrate), or None."""
    if not decisions.wanted or decision_data is None:
        return None
    if isinstance(decision_data, DataSpec):
        return decision_data
    return replace(like, path=decision_data) if like is not None else DataSpec(path=decision_data)


def for_patch(patched: onnx.ModelProto, output: str | None, spec: DataSpec, decisions: DecisionOptions
              ) -> tuple[onnx.ModelProto, Decisions]:
    """``patch``: choose on the separate labelled set and add the decision outputs."""
    record = _record(patched, output)
    dataset = load_data(patched, spec)
    chosen = on_separate(patched, record, dataset, run_options(None, 0, "all", CPU), None,
                         decisions)
    warn_unmet(chosen)
    return bake(patched, record, chosen), chosen


def for_calibrate(
    patched: onnx.ModelProto, record: Record, labels: np.ndarray, keep: np.ndarray, dataset: Dataset,
    separate: DataSpec | None, options: FitOptions, decisions: DecisionOptions, run: RunOptions,
    progress: ProgressFn | None,
) -> tuple[onnx.ModelProto, Record, Decisions]:
    """``calibrate``: choose on the held-out rows (``labels``: the kept rows'), or on every row of
    ``separate``; add the outputs. Returns the model, its record and the thresholds."""
    if separate is None:
        p = model_probabilities(patched, record, dataset, run, progress)
        chosen = on_holdout(p[keep], labels, options, decisions)
    else:
        other = load_data(patched, separate, batch_size=run.batch_size)
        chosen = on_separate(patched, record, other, run, progress, decisions)
    warn_unmet(chosen)
    patched = bake(patched, record, chosen)
    return patched, _record(patched, record.output), chosen


def _record(model: onnx.ModelProto, output: str | None) -> Record:
    """The record of ``output`` in a model onnxcal has just patched (so there is one)."""
    record = graph.read_record(model, output)
    if record is None:  # not reached: the patch wrote it
        raise OnnxcalError(f"no calibration record for output '{output}' after patching")
    return record


def for_verify(
    patched: onnx.ModelProto, records: tuple[Record, ...], dataset: Dataset, cap_labels: np.ndarray | None,
    ref_logits: np.ndarray | None, keep: np.ndarray | None, targets: DecisionOptions, level: float | None,
    run: RunOptions, progress: ProgressFn | None, path: Any,
) -> list[Check]:
    """``verify``'s decision checks (none for a model without decision outputs and without targets).

    ``ref_logits``: the last head's reference logits, every row (``keep`` is applied here).
    """
    if not records:
        if targets.wanted:
            raise OnnxcalError(f"'{path}' has no calibration record, so no decision outputs to hold to targets",
                               "add them with calibrate or patch (--accept-error, --set-coverage)")
        return []
    if not targets.wanted and not any(r.decisions for r in records):
        return []
    record = records[-1]
    reference = None
    if ref_logits is not None:
        logits = ref_logits if keep is None else ref_logits[keep]
        reference = reference_probabilities(logits, record.scaling, record.activation)
    labels = dataset.labels if dataset.labels is not None else cap_labels
    return verify_checks(patched, records, dataset, run, progress, reference, keep, targets, level, labels)
