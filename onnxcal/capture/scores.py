"""The capture itself: run the model over a labelled set and keep the logits behind its class scores."""

from __future__ import annotations

import os
import warnings
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import onnx

from ..data import Dataset, check_labels, constant_record, match_inputs, read_npz
from ..errors import OnnxcalError, OnnxcalWarning
from ..graph import ScoreSite, expose_scores, find_scores, fit_kind, np_dtype, tensor_spec
from ..guard import PROBE_ROWS, RowStats
from .blocks import Pass, ProgressFn
from .nonfinite import InputWatch
from .plan import RunPlan, graph_inputs, plan_run
from .result import Capture, CaptureMeta, Nonfinite
from .rows import as_rows, label_rows, output_rows
from .session import RunOptions, resolve_options
from .writer import MemoryRows, NpyRows, Rows, open_archive, write_tail


@dataclass
class Probe:
    """The first rows of a pass over the set: the logits and the output's values the reading is checked
    on (:func:`probe`), and the pass itself, which :func:`capture` continues so that no row runs twice.

    ``plan`` is the session of the copy of the model that outputs the logits
    (``name``) beside its own outputs; close the probe when done with it.
    """

    site: ScoreSite
    z: np.ndarray  # the logits, as rows
    values: np.ndarray  # the output's values, as rows
    samples: int  # the samples they come from
    name: str  # the logits' output in the copy
    plan: RunPlan
    run: Pass
    watch: InputWatch
    warned: tuple[Warning, ...] = ()  # what opening the session warned about (the batching), for the capture

    def close(self) -> None:
        self.run.close()


def _fill_scores(
    model: onnx.ModelProto,
    dataset: Dataset,
    site: ScoreSite,
    sink: Rows,
    options: RunOptions,
    progress: ProgressFn | None,
    head: Probe | None = None,
) -> tuple[str, dict[str, Nonfinite], RowStats]:
    """Run the model and pass its logits to ``sink``; return the batching mode, the
    inputs whose rows held NaN or Inf, and what the rows look like (``guard``).

    With ``head`` (a probe of the same reading) its rows come first and the
    pass goes on from where it stopped; else a pass of its own runs every row.
    """
    stats = RowStats()
    tiny = float(np.finfo(np_dtype(site.dtype)).tiny)

    def take(rows: np.ndarray, count: int) -> None:
        stats.add(rows)
        if site.logits_from == "log":
            stats.add_saturated(rows, tiny)
        sink.add(rows, count)

    description = "capturing logits"
    if head is not None and head.site is site:
        for warning in head.warned:  # the capture's session is the probe's: its warnings are the capture's
            warnings.warn(warning, stacklevel=3)
        take(head.z, head.samples)
        if progress is not None and head.samples:
            progress(description, head.samples, dataset.n)
        _continue(head.run, (head.name,), site, take, progress, description)
        return head.plan.mode, head.watch.found, stats
    exposed, name = expose_scores(model, site)
    plan = plan_run(exposed, dataset, [name], options)
    watch = InputWatch(dataset)
    with Pass(plan, dataset, watch=watch) as run:
        _continue(run, (name,), site, take, progress, description)
    return plan.mode, watch.found, stats


def _continue(
    run: Pass, names: tuple[str, ...], site: ScoreSite, take: Callable[[np.ndarray, int], None],
    progress: ProgressFn | None, description: str,
) -> None:
    """The rest of the pass: every block's logits, as rows, to ``take``."""
    for start, stop, (scores, *_) in run.blocks(names, progress=progress, description=description):
        take(as_rows(scores, site.class_axis), stop - start)


def probe(
    model: onnx.ModelProto, dataset: Dataset, site: ScoreSite, options: RunOptions | None = None,
    rows: int = PROBE_ROWS,
) -> Probe:
    """The logits and the output's values of the first ``rows`` samples, as rows.

    Run before a capture to check the reading against the model's own
    output and to see what the output holds; :func:`capture` given the
    probe (``head``) goes on from there.
    """
    exposed, name = expose_scores(model, site, also=(site.tensor,))
    with warnings.catch_warnings(record=True) as caught:  # the capture that goes on from here warns, once
        warnings.simplefilter("always", OnnxcalWarning)
        plan = plan_run(exposed, dataset, [name, site.tensor], options or RunOptions())
    warned = tuple(w.message for w in caught if isinstance(w.message, OnnxcalWarning))
    for w in caught:  # any other warning as it came
        if not isinstance(w.message, OnnxcalWarning):
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
    watch = InputWatch(dataset)
    run = Pass(plan, dataset, watch=watch)
    logits: list[np.ndarray] = []
    values: list[np.ndarray] = []
    try:
        for _, _, (z, v) in run.blocks(until=min(rows, dataset.n)):
            logits.append(z)
            values.append(v)
    except BaseException:
        run.close()
        raise
    z_all = np.concatenate(logits) if len(logits) > 1 else logits[0]
    v_all = np.concatenate(values) if len(values) > 1 else values[0]
    return Probe(site, as_rows(z_all, site.class_axis), output_rows(v_all, site), run.done, name, plan, run, watch,
                 warned)


def _check_data(model: onnx.ModelProto, dataset: Dataset) -> None:
    """The set against the model's inputs (names, shapes, dtypes)."""
    match_inputs(dataset, [tensor_spec(vi) for vi in graph_inputs(model)])


def capture_scores(
    model: onnx.ModelProto,
    dataset: Dataset,
    site: ScoreSite,
    *,
    batch_size: int | None = None,
    options: RunOptions | None = None,
    progress: ProgressFn | None = None,
) -> np.ndarray:
    """The logits behind ``site`` for every selected sample, float32, shape (rows, k).

    Checks the set against the model's inputs first. The class axis is moved
    last and any other axes (e.g. pixels) are flattened into rows.
    """
    _check_data(model, dataset)
    sink = MemoryRows(dataset.n)
    _fill_scores(model, dataset, site, sink, resolve_options(options, batch_size), progress)
    return sink.array


def capture(
    model: onnx.ModelProto,
    dataset: Dataset,
    *,
    model_path: str | os.PathLike[str],
    model_sha256: str,
    output: str | None = None,
    batch_size: int | None = None,
    options: RunOptions | None = None,
    progress: ProgressFn | None = None,
    out: str | os.PathLike[str] | None = None,
    activation: str | None = None,
    site: ScoreSite | None = None,
    check: Callable[[RowStats], None] | None = None,
    head: Probe | None = None,
) -> Capture:
    """Run the model over a labelled set and return its logits.

    Parameters
    ----------
    model : onnx.ModelProto
        The model, as loaded by :func:`onnxcal.graph.load_model`.
    dataset : Dataset
        Must carry labels.
    model_path, model_sha256 : str
        Recorded in the capture's metadata.
    output : str, optional
        The class-score output (the likeliest float output by default).
    batch_size : int, optional
        Samples per onnxruntime call (overrides ``options.batch_size``).
    options : RunOptions, optional
    progress : callable, optional
        See :data:`ProgressFn`.
    out : path, optional
        Stream the capture into this file (written atomically); the returned
        capture's logits are then a memory map of it.
    activation : {"softmax", "sigmoid"}, optional
        How raw logits become probabilities (see ``graph.fit_kind``); decides
        the labels' form.
    site : graph.ScoreSite, optional
        How to read the model (default: ``graph.find_scores(model, output)``).
    check : callable, optional
        Called with the statistics of every captured row (``guard.RowStats``)
        before anything is written; it raises to refuse the capture.
    head : Probe, optional
        The first rows, already run by :func:`probe` for this reading: the
        capture goes on from there (its pass is not closed here).

    Returns
    -------
    Capture
    """
    if dataset.labels is None:
        raise OnnxcalError(f"'{dataset.source}' has no labels", "add a 'labels' array")
    given: np.ndarray = dataset.labels
    options = resolve_options(options, batch_size)
    site = site if site is not None else find_scores(model, output)
    kind = fit_kind(site, activation)
    labels = _labels_before_the_run(dataset, site, kind)
    _check_data(model, dataset)

    def fill(sink: Rows) -> tuple[str, dict[str, Nonfinite], RowStats]:
        found = _fill_scores(model, dataset, site, sink, options, progress, head)
        if check is not None:
            check(found[2])
        return found

    def finish(sink: Rows, mode: str) -> tuple[np.ndarray, CaptureMeta]:
        if labels is not None and (len(labels), site.num_classes) == (sink.total, sink.k):
            final = labels  # checked before the run
        else:
            final = label_rows(given, (sink.total, sink.k), kind, dataset.source)
        _check_class_names(dataset, sink.k, kind)
        return final, _meta(dataset, site, sink, mode, kind, model_path, model_sha256)

    if out is None:
        sink = MemoryRows(dataset.n)
        mode, watch, stats = fill(sink)
        final, meta = finish(sink, mode)
        return Capture(sink.array, final, meta, dataset.rows, watch, stats)
    with open_archive(out) as zf:
        streamed = NpyRows(dataset.n, zf)
        mode, watch, stats = streamed.filled_by(fill)
        final, meta = finish(streamed, mode)
        write_tail(zf, final, dataset.rows, meta)
    logits = read_npz(Path(out), "")["logits"]  # a memory map of what was just written
    return Capture(logits, final, meta, dataset.rows, watch, stats)


def _labels_before_the_run(dataset: Dataset, site: ScoreSite, kind: str) -> np.ndarray | None:
    """Class-index labels checked against the model's K before anything runs (None when the rows
    must be seen first), and the class list against K."""
    labels, given = None, dataset.labels
    if site.num_classes is not None and kind != "sigmoid" and given is not None and np.ndim(given) == 1:  # indices
        labels = check_labels(given, dataset.n, site.num_classes, dataset.source)
    if site.num_classes is not None:
        _check_class_names(dataset, site.num_classes, kind)
    return labels


def _check_class_names(dataset: Dataset, k: int, kind: str) -> None:
    names = dataset.class_names
    want = 2 if kind == "sigmoid" and k == 1 else k  # one logit: negative and positive class
    if names is not None and len(names) != want:
        raise OnnxcalError(
            f"the class list of '{dataset.source}' has {len(names)} classes but the model has {want}",
            "give one class name per model class, in the model's order",
        )


def _meta(
    dataset: Dataset, site: ScoreSite, sink: Rows, mode: str, kind: str, path: str | os.PathLike[str], sha: str
) -> CaptureMeta:
    sel = dataset.selection
    return CaptureMeta(
        model_sha256=sha,
        model_path=str(path),
        output=site.output,
        scores=site.scores,
        activation=site.activation,
        class_axis=site.class_axis,
        num_classes=sink.k,
        n=sink.total,
        data_source=dataset.source,
        fit_as=kind,
        class_names=dataset.class_names,
        data_id=dataset.data_id,
        data_total=dataset.total,
        shard=sel.shard_text,
        limit=sel.limit,
        shuffle_seed=sel.shuffle_seed,
        preprocess=dataset.preprocess,
        batching=mode,
        holds=site.holds,
        logits_from=site.logits_from,
        spelling=site.spelling,
        score_columns="" if site.columns is None else f"{site.columns[1]}:{site.columns[2]}",
        constants=constant_record(dataset),
        batch_axes=dict(sorted(dataset.batch_axes.items())),
    )
