"""``verify``: the CI gate over a patched model (reference, decisions, record, thresholds, latency)."""

from __future__ import annotations

import os
import time
from collections.abc import Sequence
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np
import onnx

from .. import graph
from .. import guard as _guard
from .. import reading as _reading
from .._files import atomic_write_bytes
from .._limits import DEFAULT_MAX_MODEL_BYTES, MAX_BINS, check_bins_memory, check_range
from .._paths import check_output_path, one_command
from ..capture import (
    CPU,
    Capture,
    Nonfinite,
    ProgressFn,
    RunOptions,
    capture_scores,
    label_rows,
    load_captures,
    plan_run,
)
from ..data import Dataset, DataSpec, recorded_feeding
from ..errors import OnnxcalError, keyword_errors
from ..graph import Record
from ..junit import junit_xml
from ..latency import LATENCY_BUDGET, LATENCY_CHUNKS, latency_ratio
from ..metrics import DEFAULT_BINS, evaluate, scores_from_probabilities
from ..verify import (
    Check,
    VerifyResult,
    latency_check,
    reading_check,
    skipped,
    threshold_checks,
    time_alternately,
)
from . import deciding
from .checks import recover_unpatched, reference_checks, run_output, source_site
from .common import (
    DataSource,
    as_paths,
    data_spec,
    file_only_sha256,
    load_data,
    model_byte_limit,
    model_files,
    run_options,
)
from .models import models_in_memory

DEFAULT_LATENCY_RUNS = 100
MAX_LATENCY_RUNS = 100_000


@dataclass(frozen=True)
class _Reference:
    """Where verify's reference logits came from (see ``VerifyResult.reference_from``)."""

    logits: np.ndarray | None
    mode: str
    where: str
    source_sha: str | None  # the original's sha256, when known
    original_model: onnx.ModelProto | None  # to read folded parameters back against
    notes: tuple[str, ...] = ()
    file_only_sha: str | None = None  # the original's .onnx file alone, when it has external data


def _reference(
    patched: onnx.ModelProto, patched_path: str | os.PathLike[str], record: Record, dataset: Dataset,
    cap: Capture | None, original: str | os.PathLike[str] | None, base: onnx.ModelProto | None,
    score_paths: Sequence[str | os.PathLike[str]], run: RunOptions, progress: ProgressFn | None,
) -> _Reference:
    """The original's logits: captured (``--scores``), run (``--original``, loaded as ``base``), or the patched
    graph's own."""
    if cap is not None:
        return _Reference(cap.logits, "scores", ", ".join(map(str, score_paths)), cap.meta.model_sha256, None)
    if base is not None:
        assert original is not None  # base is the model loaded from original
        logits = capture_scores(base, dataset, source_site(base, record), options=run, progress=progress)
        return _Reference(logits, "original", str(original), graph.model_sha256(original), base,
                          file_only_sha=file_only_sha256(original))
    unpatched = recover_unpatched(patched, patched_path)
    logits = capture_scores(unpatched, dataset, source_site(unpatched, record), options=run, progress=progress)
    notes = [
        "no original model (--original, or the recorded original beside the patched model) and no --scores: the "
        f"reference is recomputed from the patched graph's own logits tensor '{record.scores}' (the patch undone in "
        "memory), so it checks the calibration nodes, not that the logits are the original model's"
    ]
    if graph.folds_matrix(record):
        notes.append("the matrix is folded into the weights; the patch was undone from the record's copy of the "
                     "original weight and bias, so that reference checks the parameters against that copy; give "
                     "--original or --scores to check them against the original model")
    elif record.folded:
        notes.append("the parameters are folded into the weights, so that reference only re-checks the "
                     "activation; give --original or --scores to check the parameters")
    return _Reference(logits, "patched-graph", str(patched_path), None, None, tuple(notes))


def _raw_reading_check(logits: np.ndarray, record: Record) -> Check:
    """Check (1b): an output patched as raw logits does not in fact hold probabilities (``guard``)."""
    stats = _guard.RowStats()
    stats.add(np.asarray(logits))
    seen = _guard.looks_like(stats, record.scaling.activation)
    return reading_check(None if seen == "logits" else _guard.describe(stats))


def _head_checks(
    patched: onnx.ModelProto, patched_path: str | os.PathLike[str], records: tuple[Record, ...], dataset: Dataset,
    cap: Capture | None, original: str | os.PathLike[str] | None, base: onnx.ModelProto | None,
    score_paths: Sequence[str | os.PathLike[str]], run: RunOptions, progress: ProgressFn | None, drop: bool,
) -> tuple[list[Check], np.ndarray, graph.ScoreSite, np.ndarray | None, _Reference]:
    """Checks (1)-(3) of every calibrated output; the last head's rows, site and keep mask; the reference."""
    several = len(records) > 1
    checks: list[Check] = []
    ref = None
    for record in records:
        own = cap if cap is not None and (not several or cap.meta.output == record.source_output) else None
        ref = _reference(patched, patched_path, record, dataset, own, original, base, score_paths, run, progress)
        assert ref.logits is not None  # _reference gives the captured or the run logits, never None
        site = graph.find_recorded(patched, record)
        rows = run_output(patched, site, dataset, run, progress)
        if len(rows) != len(ref.logits):
            raise OnnxcalError(
                f"the reference holds {len(ref.logits)} rows of scores but the patched model gives {len(rows)} "
                f"rows on '{dataset.source}'",
                "capture the original model on the same data file",
            )
        keep, dropped = _finite_outputs(rows, ref.logits, dataset, drop)
        kept = (rows, ref.logits) if keep is None else (rows[keep], ref.logits[keep])
        head = reference_checks(
            kept[0], site, record, kept[1], patched, ref.original_model, ref.source_sha, ref.file_only_sha
        )
        if record.rewrite.startswith("append-"):
            head.append(_raw_reading_check(kept[1], record))
        checks += [replace(c, name=f"{c.name} ({record.source_output})") for c in head] if several else head
        notes = [*ref.notes, *([dropped] if dropped else [])]
        if record.fitted_on_sha256:
            notes.append(
                f"output '{record.output}': the parameters were fitted on a twin of the original (sha256 "
                f"{record.fitted_on_sha256[:12]}..., stated with --fitted-on-twin when patching); the original's "
                f"sha256 is {record.source_sha256[:12]}..."
            )
        ref = replace(ref, notes=tuple(dict.fromkeys([*(ref.notes or ()), *notes])))
    assert ref is not None  # records is never empty: only a model with a record gets here
    return checks, rows, site, keep, ref


def _default_original(
    patched_path: str | os.PathLike[str], records: tuple[Record, ...]
) -> tuple[Path | None, str | None]:
    """The recorded original beside the patched model, when its sha256 is the record's; else a note why not."""
    if not records:
        return None, None
    candidate = Path(patched_path).parent / records[0].source_name
    if not records[0].source_name or not candidate.is_file() or candidate.resolve() == Path(patched_path).resolve():
        return None, None
    if records[0].source_sha256 not in (graph.model_sha256(candidate), file_only_sha256(candidate)):
        return None, (f"'{candidate}' beside the patched model is not the recorded original (its sha256 differs "
                      "from the record's), so it was not used")
    return candidate, None


def _unrecorded_checks(site: graph.ScoreSite) -> list[Check]:
    """A model without a calibration record: the record check fails, the reference checks cannot run."""
    decision = "decisions" if site.activation == "sigmoid" else "argmax"
    return [
        skipped("reference", "no calibration record: no parameters to build a reference from"),
        skipped(decision, "no calibration record: no reference to compare the decisions with"),
        Check(
            "record",
            False,
            None,
            None,
            f"the model carries no onnxcal calibration record (metadata key '{graph.RECORD_KEY}'); "
            "tools that re-save a model may drop it",
        ),
        skipped("source", "no calibration record"),
    ]


def _check_gate(
    max_ece: float | None, max_nll: float | None, min_accuracy: float | None, n_bins: int,
    max_latency_ratio: float | None, latency_runs: int,
) -> None:
    for option, value in (("--max-ece", max_ece), ("--min-accuracy", min_accuracy)):
        if value is not None and not (np.isfinite(value) and 0 <= value <= 1):
            raise OnnxcalError(f"{option} {value!r} is not a number between 0 and 1")
    if max_nll is not None and not (np.isfinite(max_nll) and max_nll >= 0):
        raise OnnxcalError(f"--max-nll {max_nll!r} is not a non-negative number")
    if max_latency_ratio is not None and not (np.isfinite(max_latency_ratio) and max_latency_ratio > 0):
        raise OnnxcalError(
            f"--max-latency-ratio {max_latency_ratio!r} is not a positive number", "use e.g. 1.05 for 5 % slower"
        )
    check_range(latency_runs, 1, MAX_LATENCY_RUNS, "--latency-runs", "a number of runs")
    check_range(n_bins, 2, MAX_BINS, "--bins", "a number of bins")


def _latency(
    base: onnx.ModelProto, patched: onnx.ModelProto, dataset: Dataset, run: RunOptions, runs: int,
    max_ratio: float | None, against: str,
) -> Check:
    """Check (5): both models on the first batch of the data, timed alternately."""
    # without spinning: the idle threads of one session would hold the cores the other's next call needs,
    # which no deployment (one model) sees
    plans = [plan_run(m, dataset, [o.name for o in m.graph.output], run, spinning=False) for m in (base, patched)]
    size = min(plans[1].step, dataset.n)
    feeds = []
    for plan in plans:
        feed = dataset.batch(0, size, plan.dtypes)
        if plan.pad is not None and size < plan.pad:  # a fixed batch dim: pad as the runs do
            feed = {k: np.concatenate([v, np.repeat(v[-1:], plan.pad - size, axis=0)]) for k, v in feed.items()}
        feeds.append(dataset.feed(feed))  # constants and batch axes as the model takes them
    calls = [lambda p=p, f=f: p.session.run(None, f) for p, f in zip(plans, feeds, strict=True)]
    started = time.perf_counter()
    times = time_alternately(calls, runs, warmup=max(3, runs // 10))
    # with a limit: more rounds until the ratio's interval decides, or the budget is spent (then undecided)
    while (not latency_ratio(times[0], times[1]).decided(max_ratio) and times.shape[1] < LATENCY_CHUNKS * runs
           and time.perf_counter() - started < LATENCY_BUDGET):
        times = np.concatenate([times, time_alternately(calls, runs, warmup=0, start=times.shape[1])], axis=1)
    return latency_check(times[0], times[1], max_ratio, batch=size, against=against)


def _threshold_checks(
    rows: np.ndarray, activation: str | None, site: graph.ScoreSite, dataset: Dataset, cap: Capture | None,
    n_bins: int, limits: dict[str, float | None], keep: np.ndarray | None = None, record: Record | None = None,
) -> tuple[Any, ...]:
    """Check (4): metrics of the patched model's own outputs against the labels (the rows ``keep`` only).

    Post-processing the output carries (x100, one class of two) is undone
    first (``graph.post.invert``).
    """
    post = graph.post.from_json(record.post) if record is not None else ()
    if post:
        inverted = graph.post.invert(rows, post, site.num_classes or 0)
        if inverted is None:
            raise OnnxcalError(
                f"--max-ece, --max-nll and --min-accuracy need every class's probability, and output "
                f"'{site.output}' holds one class's of {site.num_classes}",
                "leave out the thresholds, or verify an output that holds every class",
            )
        rows = inverted
    if activation is None:  # raw logits (a model without a record)
        logits, kind = rows, graph.fit_kind(site)
    else:
        if activation == "sigmoid" and graph.post.normalises(post):  # L1-normalised sigmoids: probability rows
            activation = "softmax"
        logits, kind = scores_from_probabilities(rows, activation), "sigmoid" if activation == "sigmoid" else "softmax"
    if dataset.labels is not None:
        labels = label_rows(dataset.labels, rows.shape, kind, dataset.source)
    else:
        assert cap is not None  # thresholds without labels in the data need --scores (_check_can_compare)
        labels = cap.labels
        if len(labels) != len(rows):
            raise OnnxcalError(
                f"the labels of --scores hold {len(labels)} rows but the patched model gives {len(rows)} rows",
                "capture the original model on the same data file",
            )
    if keep is not None:
        logits, labels = logits[keep], labels[keep]
    check_bins_memory(n_bins, logits.shape[1])
    return threshold_checks(evaluate(logits, labels, 1.0, n_bins), **limits)


def _finite_outputs(
    rows: np.ndarray, reference: np.ndarray | None, dataset: Dataset, drop: bool
) -> tuple[np.ndarray | None, str | None]:
    """The rows where the patched outputs (and the reference logits) are finite; None when all are.

    Refused, with the count and first rows of the set, unless ``drop``; then a note says how many.
    """
    bad = ~np.isfinite(rows).all(axis=1)
    if reference is not None:
        bad |= ~np.isfinite(reference).all(axis=1)
    if not bad.any():
        return None, None
    found = Nonfinite()
    found.add(bad, np.repeat(dataset.row_numbers(), max(1, len(rows) // dataset.n)))
    what = (
        f"the patched model's outputs{'' if reference is None else ' or the reference logits'} on "
        f"'{dataset.source}' hold NaN or Inf in {found.describe(len(rows))}"
    )
    if bad.all():  # a check over no rows is no pass
        raise OnnxcalError(
            f"{what}: every row, so there is nothing left to check ({len(rows)} of {len(rows)} rows would be dropped)",
            "check the patched model (its parameters, its dtype) and the data",
        )
    if not drop:
        raise OnnxcalError(what, "check those rows of the data, or pass --drop-nonfinite to leave them out")
    return ~bad, f"dropped {int(bad.sum())} rows: {what}"


@dataclass(frozen=True)
class _Gate:
    """Check (4)'s bounds and check (5)'s timing, as given (checked by ``_check_gate``)."""

    max_ece: float | None
    max_nll: float | None
    min_accuracy: float | None
    n_bins: int
    latency: bool  # measure: ``latency`` or a ``max_latency_ratio``
    max_latency_ratio: float | None
    latency_runs: int

    @property
    def limits(self) -> dict[str, float | None]:
        return {"max_ece": self.max_ece, "max_nll": self.max_nll, "min_accuracy": self.min_accuracy}

    @property
    def thresholds(self) -> bool:
        return any(v is not None for v in self.limits.values())


@dataclass(frozen=True)
class _Target:
    """What verify checks and against what: the patched model, its records, the data, the reference's source."""

    path: str | os.PathLike[str]
    model: onnx.ModelProto
    records: tuple[Record, ...]
    dataset: Dataset
    cap: Capture | None  # --scores, loaded
    score_paths: tuple[str | os.PathLike[str], ...]
    original: str | os.PathLike[str] | None  # --original, or the recorded original beside the patched model
    why_not: str | None  # why a file beside the patched model was not taken for the original
    limit: int

    @property
    def record(self) -> Record | None:
        """The last head's record (None: the model carries none)."""
        return self.records[-1] if self.records else None


@dataclass(frozen=True)
class _Heads:
    """Checks (1)-(3), and what checks (4)-(5) need: the last head's rows, site, keep mask and activation."""

    checks: tuple[Check, ...]
    rows: np.ndarray
    site: graph.ScoreSite
    keep: np.ndarray | None
    ref: _Reference
    activation: str | None


def _recorded_capture(records: tuple[Record, ...]) -> dict[str, object] | None:
    """The capture meta of the last calibration's fit: its constants and batch axes are re-used
    when verify is given none (inputs that are not samples, issue 12)."""
    fit = records[-1].fit if records else None
    capture = fit.get("capture") if isinstance(fit, dict) else None
    return capture if isinstance(capture, dict) else None


def _load_target(
    patched_path: str | os.PathLike[str], spec: DataSpec, original: str | os.PathLike[str] | None,
    score_paths: list[Any],
    junit: str | os.PathLike[str] | None, force: bool, max_model_bytes: int | str, run: RunOptions,
) -> _Target:
    """The patched model, its data and the reference's source, loaded; ``junit`` checked before any run."""
    if original is not None and score_paths:
        raise OnnxcalError(
            "give --original or --scores, not both", "--scores stands in for running the original model"
        )
    limit = model_byte_limit(max_model_bytes)
    patched = graph.load_model(patched_path, max_bytes=limit)
    records = graph.read_records(patched)
    spec = recorded_feeding(spec, _recorded_capture(records), f"'{patched_path}'")
    beside, why_not = (None, None) if original is not None or score_paths else _default_original(patched_path, records)
    if junit is not None:
        models = [patched_path, *([original] if original is not None else []), *([beside] if beside else [])]
        inputs = [f for m in models for f in model_files(m, limit)] + [*spec.files(), *score_paths]
        check_output_path(junit, inputs, force=force, option="--junit")
    dataset = load_data(patched, spec, require_labels=False, batch_size=run.batch_size)
    cap = load_captures(score_paths) if score_paths else None
    return _Target(patched_path, patched, records, dataset, cap, tuple(score_paths),
                   original if original is not None else beside, why_not, limit)


def _check_can_compare(target: _Target, gate: _Gate) -> None:
    """The thresholds need labels; the latency, an uncalibrated graph."""
    if gate.thresholds and target.dataset.labels is None and target.cap is None:
        raise OnnxcalError(
            f"--max-ece, --max-nll and --min-accuracy need labels, and '{target.dataset.source}' has none",
            "add a 'labels' array, or give --scores with a capture of the same data",
        )
    if target.record is None and gate.latency and target.original is None:
        raise OnnxcalError(
            f"--latency: '{target.path}' has no calibration record, so there is no uncalibrated graph "
            "to compare its speed with",
            "pass --original MODEL",
        )


def _unrecorded(target: _Target, run: RunOptions, progress: ProgressFn | None, drop: bool) -> _Heads:
    """A model without a record: its outputs are run (for the thresholds), the reference checks cannot be."""
    site = graph.find_scores(target.model)
    rows = run_output(target.model, site, target.dataset, run, progress)
    note = f"'{target.path}' carries no onnxcal calibration record, so there is no reference to compare with"
    ref = _Reference(None, "none", str(target.original or ""), None, None, (note,))
    keep, dropped = _finite_outputs(rows, None, target.dataset, drop)
    if dropped is not None:
        ref = replace(ref, notes=(*ref.notes, dropped))
    return _Heads(tuple(_unrecorded_checks(site)), rows, site, keep, ref, site.activation)


def _recorded_checks(target: _Target, run: RunOptions, progress: ProgressFn | None, drop: bool) -> _Heads:
    """Checks (1)-(3) of every head, and the patched model at the identity against the original."""
    patched, path = target.model, target.path
    base = graph.load_model(target.original, max_bytes=target.limit) if target.original is not None else None
    checks, rows, site, keep, ref = _head_checks(
        patched, path, target.records, target.dataset, target.cap, target.original, base, target.score_paths, run,
        progress, drop,
    )
    checks.append(_reading.identity(base or recover_unpatched(patched, path), patched, target.records, target.dataset,
                                    run, progress))
    return _Heads(tuple(checks), rows, site, keep, ref, target.records[-1].activation)


def _gate_checks(target: _Target, heads: _Heads, ref: _Reference, gate: _Gate, run: RunOptions) -> list[Check]:
    """Checks (4) and (5), when asked for."""
    checks: list[Check] = []
    if gate.thresholds:
        checks += _threshold_checks(heads.rows, heads.activation, heads.site, target.dataset, target.cap, gate.n_bins,
                                    gate.limits, heads.keep, target.record)
    if gate.latency:
        against = "original" if target.original is not None else "uncalibrated copy"
        checks.append(_latency(_latency_reference(target, ref), target.model, target.dataset, run, gate.latency_runs,
                               gate.max_latency_ratio, against))
    return checks


def _latency_reference(target: _Target, ref: _Reference) -> onnx.ModelProto:
    """The model to time the patched one against: the original (already loaded, or loaded now) or the unpatched copy."""
    if ref.original_model is not None:
        return ref.original_model
    if target.original is not None:
        return graph.load_model(target.original, max_bytes=target.limit)
    return recover_unpatched(target.model, target.path)


@keyword_errors
@models_in_memory("patched_path", "original")
@one_command
def verify(
    patched_path: str | os.PathLike[str] | onnx.ModelProto,
    data: DataSource,
    *,
    original: str | os.PathLike[str] | onnx.ModelProto | None = None,
    scores: str | os.PathLike[str] | Sequence[str | os.PathLike[str]] | None = None,
    max_ece: float | None = None,
    max_nll: float | None = None,
    min_accuracy: float | None = None,
    n_bins: int = DEFAULT_BINS,
    latency: bool = False,
    max_latency_ratio: float | None = None,
    latency_runs: int = DEFAULT_LATENCY_RUNS,
    junit: str | os.PathLike[str] | None = None,
    force: bool = False,
    batch_size: int | None = None,
    threads: int = 0,
    optimization: str = "all",
    provider: str = CPU,
    progress: ProgressFn | None = None,
    max_model_bytes: int | str = DEFAULT_MAX_MODEL_BYTES,
    drop_nonfinite: bool = False,
    accept_error: float | None = None,
    accept_confidence: float | None = None,
    set_coverage: float | None = None,
) -> VerifyResult:
    """Check a patched model for CI: reference, decisions, record, thresholds, latency.

    The checks, each with its figure (see ``docs/ci.md``):

    1. ``reference`` (and ``row-sums`` for softmax outputs): the patched
       outputs against the NumPy reference, e.g. softmax(original logits / T),
       within the tolerance of the dtype the graph computes in.
    2. ``argmax`` (softmax) or ``decisions`` (sigmoid): every row decides
       as the reference does.
    3. ``record``: the calibration record is present and its parameters are
       the graph's; ``source``: the original's sha256 is the record's.
    4. ``max-ece``, ``max-nll``, ``min-accuracy``, when a bound is given:
       metrics of the patched model's outputs against the labels.
    5. ``latency``, with ``latency`` or ``max_latency_ratio``: median
       latency of the patched model over the original's (or, without one,
       over the uncalibrated graph recovered from the patched one),
       measured alternately in this process.

    Parameters
    ----------
    patched_path : path
        A model written by :func:`patch` or :func:`calibrate`.
    data : path or DataSpec
        The inputs, in any form :func:`capture` takes (labels needed for
        the thresholds, unless ``scores`` carry them).
    original : path, optional
        The uncalibrated model; by default the path in the record, if that
        file exists.
    scores : path or list of paths, optional
        Capture file(s) of the original model on the same data, used
        instead of running it. With neither ``original`` (nor the recorded
        path) nor ``scores``, the reference is recomputed from the patched
        graph's own logits tensor, and the result says so.
    max_ece, max_nll, min_accuracy : float, optional
        Bounds for check 4; ``n_bins`` bins for the ECE.
    latency, max_latency_ratio, latency_runs
        Check 5: measure (``latency_runs`` runs of each model on one batch
        of ``batch_size`` samples), and fail above ``max_latency_ratio``.
    junit : path, optional
        Also write the checks as JUnit XML here (``force`` to replace it).
    batch_size, threads, optimization, provider
        As for :func:`capture` (the latency runs use them too).
    max_model_bytes : int or str, default 8 GiB
        Larger model files (with external data) are refused unread.
    drop_nonfinite : bool
        Leave out the rows where the patched outputs or the reference
        logits hold NaN or Inf (a note says how many); by default they are
        refused.
    accept_error, accept_confidence, set_coverage : float, optional
        For a model with decision outputs (docs/decisions.md): the targets of
        the gates ``accept-error`` and ``set-coverage`` on labelled data
        (default: the record's) and the level of their intervals. The checks
        ``decision-record``, ``decision-outputs`` and ``decision-reference``
        run whenever the model has decision outputs.

    Returns
    -------
    VerifyResult
        ``passed`` is False when a check failed (the CLI exits 1).

    Raises
    ------
    OnnxcalError
        Bad input (the CLI exits 2): unreadable files, options out of
        range, ``original`` and ``scores`` together, thresholds without
        labels, scores that do not line up with the data.
    """
    started = time.perf_counter()
    spec = data_spec(data)
    run = run_options(batch_size, threads, optimization, provider)
    _check_gate(max_ece, max_nll, min_accuracy, n_bins, max_latency_ratio, latency_runs)
    targets = deciding.check_targets(accept_error, accept_confidence, set_coverage)
    gate = _Gate(max_ece, max_nll, min_accuracy, n_bins, latency or max_latency_ratio is not None, max_latency_ratio,
                 latency_runs)
    target = _load_target(patched_path, spec, original, as_paths(scores), junit, force, max_model_bytes, run)
    _check_can_compare(target, gate)
    step = _recorded_checks if target.record is not None else _unrecorded
    heads = step(target, run, progress, drop_nonfinite)
    ref = heads.ref if target.why_not is None else replace(heads.ref, notes=(target.why_not, *heads.ref.notes))
    checks = [*heads.checks, *_gate_checks(target, heads, ref, gate, run)]
    checks += deciding.for_verify(target.model, target.records, target.dataset, None if target.cap is None else
                                  target.cap.labels, ref.logits, heads.keep, targets, accept_confidence, run, progress,
                                  patched_path)
    result = VerifyResult(
        checks=tuple(checks), n=target.dataset.n, original=ref.where, reference_from=ref.mode, notes=ref.notes
    )
    if junit is not None:
        xml = junit_xml(
            result, suite=f"onnxcal verify {Path(patched_path).name}", elapsed=time.perf_counter() - started
        )
        atomic_write_bytes(junit, xml)
    return result
