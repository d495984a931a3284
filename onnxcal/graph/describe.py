"""What the score finder found, in words a user can check, and ``inspect``'s summary of a model."""

from __future__ import annotations

import os
from dataclasses import asdict, dataclass
from typing import Any

import onnx

from ..errors import OnnxcalError
from . import post as _post
from .find import ScoreSite, find_scores
from .record import Record, read_records
from .rewrite import find_recorded
from .site import COMPOSED_WORDS, _words_of
from .tensors import TensorSpec, opset_version, tensor_spec


@dataclass(frozen=True)
class ModelInfo:
    """What ``inspect`` reports about a model."""

    path: str
    sha256: str
    opset: int
    inputs: tuple[TensorSpec, ...]
    outputs: tuple[TensorSpec, ...]
    site: ScoreSite | None
    batch_fixed: bool
    record: Record | None = None
    external_data: tuple[str, ...] = ()
    site_problem: str | None = None
    records: tuple[Record, ...] = ()
    opsets: dict[str, int] | None = None
    reading: str = ""

    def to_dict(self) -> dict[str, Any]:
        d = asdict(self)
        d["record"] = self.record.to_dict() if self.record else None
        d["records"] = [r.to_dict() for r in self.records]
        if self.site is not None:
            d["site"]["post"] = _post.to_json(self.site.post)
        return d



def describe_site(site: ScoreSite) -> str:
    """What was found, in words a user can check against the model.

    e.g. "output 'probs' holds probabilities: Softmax over axis 1 of tensor
    'fc_out' (the logits), then x100 (percent)".
    """
    k = _classes(site)
    then = _post.describe(site.post)
    if site.activation is None:
        return (f"output '{site.output}' holds raw logits (no activation found): class axis "
                f"{site.class_axis}, {k}, {site.dtype}")
    if site.spelling in ("stated", "data"):
        how = "as stated with --output-holds" if site.spelling == "stated" else "as the data show"
        return (f"output '{site.output}' holds {site.holds} ({how}): calibrated through z = {_Z[site.logits_from]}, "
                f"class axis {site.class_axis}, {k}, {site.dtype}")
    if site.spelling == "ml-classifier":
        route = ("its raw scores (a copy with post_transform NONE) are the logits"
                 if site.logits_from == "raw-scores" else "calibrated through z = log p")
        return (f"output '{site.output}' holds probabilities of an ai.onnx.ml classifier, tensor "
                f"'{site.scores}' (post_transform {site.ml_transform}): {route}, {k}{then}")
    if site.spelling in COMPOSED_WORDS:  # a mean of probabilities, probabilities computed in subgraphs
        return (f"output '{site.output}' holds {site.holds}: {site.composed}; calibrated in place through "
                f"z = {_Z[site.logits_from]}, class axis {site.class_axis}, {k}, {site.dtype}{then}")
    logits = {
        "tensor": f"tensor '{site.scores}' (the logits)",
        "dequantized": f"the dequantized tensor '{site.scores}' (the logits)",
        "log-sigmoid": f"log sigmoid of tensor '{site.scores}' (the logits of the normalised scores)",
    }.get(site.logits_from, f"tensor '{site.scores}'")
    if site.branches:
        others = [f"'{b.site.scores}' in the {b.where}" for b in site.branches[1:]]
        logits += f" in the {site.branches[0].where}" + "".join(f", and {o}" for o in others)
    moved = (f", moved by {len(site.layout)} layout op(s) to class axis {site.class_axis} of the output"
             if site.layout else "")
    where = f"{site.holds}"
    if site.columns is not None:
        where += (f" at {site.composed} (the other positions are left as they are)")
    return (f"output '{site.output}' holds {where}: {_words_of(site)} over axis {site.scores_axis} "
            f"of {logits}, {k}, {site.dtype}{moved}{then}")


_Z = {"log": "log p", "logit": "log p - log(1 - p)", "log-probabilities": "the values"}


def _classes(site: ScoreSite) -> str:
    if site.num_classes is None:
        return "classes of unknown count"
    if site.num_classes == 1:
        return "1 class (one binary score per " + ("row)" if site.rank == 1 else "value)")
    return f"{site.num_classes} classes"


def describe(
    model: onnx.ModelProto,
    path: str | os.PathLike[str],
    sha256: str,
    external_data: tuple[str, ...] = (),
) -> ModelInfo:
    """Summarise a model for ``inspect``."""
    graph = model.graph
    init_names = {i.name for i in graph.initializer}
    inputs = tuple(tensor_spec(vi) for vi in graph.input if vi.name not in init_names)
    records = read_records(model)
    record = records[-1] if records else None
    problem = None
    try:  # a patched model: describe the calibrated output
        site = find_recorded(model, record) if record else find_scores(model)
    except OnnxcalError as exc:
        site, problem = None, str(exc)
    batch_fixed = any(
        s.shape is not None and len(s.shape) > 0 and isinstance(s.shape[0], int) for s in inputs
    )
    return ModelInfo(
        path=str(path),
        sha256=sha256,
        opset=opset_version(model),
        inputs=inputs,
        outputs=tuple(tensor_spec(vi) for vi in graph.output),
        site=site,
        batch_fixed=batch_fixed,
        record=record,
        external_data=tuple(external_data),
        site_problem=problem,
        records=records,
        opsets={imp.domain or "ai.onnx": int(imp.version) for imp in model.opset_import},
        reading=describe_site(site) if site is not None else "",
    )
