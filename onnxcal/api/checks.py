"""The patched model's outputs against the reference, and its record against the graph: the checks
``verify`` and ``calibrate`` share.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from typing import cast

import numpy as np
import onnx
from numpy.typing import ArrayLike

from .. import graph
from .. import reading as _reading
from ..capture import (
    ProgressFn,
    RunOptions,
    output_rows,
    plan_run,
    run_batches,
    run_model,
)
from ..data import Dataset
from ..errors import OnnxcalError
from ..graph import MatrixFoldError, Record, ScoreSite
from ..graph.rider import Rider
from ..verify import (
    FOLD_LIMIT,
    Check,
    Comparison,
    compare,
    folded_record_check,
    record_check,
    skipped,
    source_check,
)


def run_output(
    model: onnx.ModelProto, site: ScoreSite, dataset: Dataset, run: RunOptions, progress: ProgressFn | None
) -> np.ndarray:
    """The values of ``site``'s output for every sample, class axis last: (rows, k)."""
    (values,) = run_model(
        graph.expose(model, [site.tensor]),
        dataset,
        [site.tensor],
        options=run,
        progress=progress,
        description="running patched model",
    )
    return output_rows(values, site)


def reference_checks(
    rows: np.ndarray, site: ScoreSite, record: Record, logits: np.ndarray, patched: onnx.ModelProto,
    original_model: onnx.ModelProto | None, source_sha: str | None, file_only_sha: str | None = None,
) -> list[Check]:
    """Checks (1)-(3): the outputs against the reference, the record against the graph and the source.

    The reference is post(activation(scale(logits))) with the post-processing
    the record noted when the model was patched; the tolerance follows every
    dtype the values pass through in the patched graph (``site.dtypes``).
    """
    checks = list(compare(rows, logits, record.scaling, record.activation, site_dtypes(site),
                                  graph.post.from_json(record.post)))
    return checks + record_checks(record, patched, original_model, source_sha, file_only_sha)


def site_dtypes(site: ScoreSite) -> tuple[str, ...]:
    """Every dtype the calibrated values pass through (the tolerance follows the coarsest)."""
    return tuple(dict.fromkeys([site.dtype, site.output_dtype or site.dtype, *site.dtypes]))


def record_checks(
    record: Record, patched: onnx.ModelProto, original_model: onnx.ModelProto | None, source_sha: str | None,
    file_only_sha: str | None = None,
) -> list[Check]:
    """Check (3): the record against the graph's parameters, and the original's sha256 against the record's."""
    checks: list[Check] = []
    if record.folded and original_model is None:
        checks.append(
            skipped(
                "record", "the parameters are folded into the weights; reading them back needs the "
                "original model (--original)"
            )
        )
    elif record.folded and graph.folds_matrix(record):
        assert original_model is not None  # the first branch took a folded record without one
        checks.append(folded_matrix_check(graph.matrix_fold_error(patched, record, original_model)))
    elif record.folded:
        assert original_model is not None  # the branch above took a folded record without one
        found = graph.folded_values(patched, record, original_model)
        checks.append(folded_record_check(record.scaling, found))
    else:
        in_graph = graph.parameter_values(patched, record)
        expected = graph.recorded_values(patched, record)
        # dict is invariant: the graph's dict[str, ndarray] is the dict[str, ArrayLike] record_check reads
        checks.append(record_check(expected, cast("dict[str, ArrayLike] | None", in_graph),
                                   graph.temperature_dtype(patched, record)))
    if source_sha is None:
        checks.append(
            skipped(
                "source",
                f"no original model or scores to compare with the record's sha256 {record.source_sha256[:12]}...",
            )
        )
    else:
        checks.append(source_check(record.source_sha256, source_sha, file_only_sha))
    return checks


def folded_matrix_check(found: MatrixFoldError | None) -> Check:
    """Check that a matrix fold's weights are the record's W and b folded into the original's.

    ``found`` (``graph.matrix_fold_error``) is the largest difference, each
    relative to the sum of the absolute terms it is made of (one rounding
    to the dtype: at most its unit roundoff), or None when a folded tensor
    is missing. Limit: :data:`onnxcal.verify.FOLD_LIMIT` of the weights' dtype, times
    (r + 1) / 2 for weights rounded r times.
    """
    if found is None:
        return Check("record", False, float("nan"), float("nan"), "folded weights not found in both models")
    limit = FOLD_LIMIT.get(found.dtype, FOLD_LIMIT["float32"]) * (found.roundings + 1) / 2
    ok = bool(found.difference <= limit)
    return Check("record", ok, found.difference, limit, f"{found.detail} ({found.dtype}; max relative difference)")


@dataclass(frozen=True)
class RiderRun:
    """The identity's outputs to take from the patched model's session: the rider (its model is run instead
    of the patched one), their samples' axes (``out_axes``, in ``rider.outputs``' order) and which rows of
    the set checked the identity check compares (``rows``, a mask)."""

    rider: Rider
    out_axes: tuple[int, ...]
    rows: np.ndarray


def compare_as_it_runs(
    patched: onnx.ModelProto, record: Record, dataset: Dataset, run: RunOptions, progress: ProgressFn | None,
    logits: np.ndarray, keep: np.ndarray, riding: RiderRun | None = None,
) -> tuple[list[Check], list[np.ndarray] | None]:
    """Checks (1)-(2) of ``calibrate``: the patched model run batch by batch, each batch compared
    with the captured logits of its rows (those in ``keep``) as it comes; and with ``riding``, the
    identity's outputs on the rows of ``riding.rows`` (one array per output, else None).

    Nothing of the patched outputs is kept beyond a batch, so the command
    holds the logits and little else (docs/benchmarks.md, calibrate's memory).
    With ``riding`` the session runs ``riding.rider.model``: the patched
    graph unchanged, with the nodes the identity computes differently beside
    it (:func:`onnxcal.graph.identity_rider`).
    """
    site = graph.find_recorded(patched, record)
    extra = () if riding is None else tuple(riding.rider.outputs.values())
    ran = patched if riding is None else riding.rider.model
    # the calibrated output is an output of the written graph: then the graph itself runs, not a copy of it
    model = ran if site.tensor in {o.name for o in ran.graph.output} else graph.expose(ran, [site.tensor])
    axes = () if riding is None else (0, *riding.out_axes)
    plan = plan_run(model, dataset, [site.tensor, *extra], run, out_axes=axes)
    post = graph.post.from_json(record.post)
    comparison = Comparison(record.scaling, record.activation, site_dtypes(site), post)
    done = 0
    taken: list[list[np.ndarray]] = [[] for _ in extra]
    batches = run_batches(plan, dataset, progress=progress, description="running patched model")
    for start, stop, (values, *others) in batches:
        rows = output_rows(values, site)
        span = slice(done, done + len(rows))
        done += len(rows)
        if done > len(logits):
            break
        mask = keep[span]
        if mask.all():
            comparison.add(rows, logits[span])
        else:
            comparison.add(rows[mask], logits[span][mask])
        if riding is not None:
            wanted = riding.rows[start:stop]
            for part, out, axis in zip(taken, others, riding.out_axes, strict=True):
                part.append(np.compress(wanted, out, axis=axis))
    if done != len(logits):
        raise OnnxcalError(
            f"the patched model gives {done} rows of scores but the original gave {len(logits)} on '{dataset.source}'",
            "report this with the model's inspect output",
        )
    got = None if riding is None else [
        np.concatenate(part, axis=axis) for part, axis in zip(taken, riding.out_axes, strict=True)
    ]
    return list(comparison.checks()), got


def source_site(base: onnx.ModelProto, record: Record) -> ScoreSite:
    """The class-score site of the uncalibrated model the record was made from, read as then."""
    kw = _reading.patch_reading({"spelling": record.spelling, "holds": record.holds, "logits_from": record.logits_from,
                                 "score_columns": record.score_columns})
    if record.rewrite == "ml-log-probabilities":  # format 2: ai.onnx.ml probabilities were read through log p
        kw["logits_from"] = "log"
    # records written before source_output existed name the output or the scores
    output = record.source_output or (record.output if record.rewrite == "insert-before-activation" else record.scores)
    site = graph.find_scores(base, output, logits_from=kw.get("logits_from"), score_columns=kw.get("score_columns"))
    if "holds" in kw:
        site = graph.read_as(site, kw["holds"], record.scaling.activation, source=kw["holds_from"])
    return site


def recover_unpatched(patched: onnx.ModelProto, patched_path: str | os.PathLike[str]) -> onnx.ModelProto:
    try:
        return graph.unpatch(patched)
    except OnnxcalError as exc:
        raise OnnxcalError(
            f"cannot recover the uncalibrated graph from '{patched_path}': {exc.message}",
            "pass --original MODEL or --scores CAPTURE",
        ) from exc
