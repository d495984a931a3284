"""What the score finder returns: ``ScoreSite`` (and ``Branch`` for a head inside subgraphs),
reading a site as holding probabilities (``read_as``), and how its scores are fitted (``fit_kind``)."""

from __future__ import annotations

from dataclasses import dataclass, replace

from ..errors import OnnxcalError
from ..scaling import SIGMOID_L1
from . import post as _post
from .patterns import BY_NAME
from .tensors import ACTIVATION_CHOICES

HOLDS = ("logits", "probabilities", "log-probabilities")
"""What an output may hold (``--output-holds``)."""


@dataclass(frozen=True)
class ScoreSite:
    """Where a model's class scores are and what turns them into the output.

    The public contract of the score finder (``find_scores``).

    Attributes
    ----------
    output : str
        The graph output chosen.
    holds : str
        What the output holds: ``"logits"``, ``"probabilities"`` or
        ``"log-probabilities"``.
    spelling : str
        The pattern recognised (``patterns.SPELLINGS``: ``"softmax"``,
        ``"softmax-written-out"``, ``"qlinear-softmax"``,
        ``"ml-classifier"``, ...), ``"raw-logits"`` when none matched, or
        ``"stated"`` / ``"data"`` when the output was read as probabilities
        by ``--output-holds`` or by the data (``read_as``).
    scores : str
        The logits tensor z when ``logits_from`` is ``"tensor"``; else the
        tensor the logits are computed from (see ``logits_from``).
    logits_from : str
        How the logits come from ``scores``: ``"tensor"`` (they are it),
        ``"log"`` (log(max(p, tiny)) of probabilities), ``"logit"``
        (log p - log(1 - p)), ``"log-probabilities"`` (the values are
        log-probabilities already), ``"log-sigmoid"`` (log sigmoid(x), for
        L1-normalised sigmoids), ``"dequantized"`` (DequantizeLinear of a
        quantized input) or ``"raw-scores"`` (an ai.onnx.ml classifier's
        scores before its post_transform). ``expose_scores`` builds them.
    activation : str or None
        What turns the logits into the values: ``"softmax"``,
        ``"logsoftmax"``, ``"sigmoid"``, or None for raw logits.
    post : tuple of post.PostOp
        What the model does to the values between the activation and the
        output, in order (``x100``, a clip, one class taken, a
        quantization round trip, an L1 normalisation).
    node : int or None
        Index in ``graph.node`` of the activation (or classifier) node.
    nodes : tuple of int
        Every node of the recognised pattern.
    rewire : tuple of (int, int)
        (node index, input slot) of every place the pattern reads the
        logits (two for a softmax written out with the max subtracted);
        the scaling is inserted there. Empty unless ``logits_from`` is
        ``"tensor"`` and there is an activation.
    values : str
        The tensor the activation produces (before post-processing).
    tensor : str
        The tensor holding the output's values: the output itself, or the
        probabilities a ZipMap turns into a sequence of maps.
    class_axis : int
        The class axis of the logits as captured (laid out like the output
        by replaying ``layout``); also the output's when no class is taken.
    rank : int
        Rank of the captured logits.
    num_classes : int or None
        K, when fixed in the graph.
    dtype : str
        numpy dtype name of the logits (of ``scores``).
    layout : tuple of int
        Layout nodes (Transpose, Reshape, ...) between the activation and
        the output, replayed on the logits when they are captured.
    output_dtype : str
        numpy dtype name of ``tensor``.
    scores_axis, scores_rank : int
        Class axis and rank of the logits where the scaling applies.
    dtypes : tuple of str
        Every float dtype the values pass through, logits to output
        (verify's tolerance follows the coarsest).
    ml_transform : str
        An ai.onnx.ml classifier's ``post_transform``, else "".
    path : tuple of int
        Every node between the logits and the output (the pattern's, the
        layout ops' and the post-processing's).
    branches : tuple of Branch
        When the activation sits inside subgraphs (the branches of an
        ``If``, the body of a ``Loop`` or ``Scan``): the reading inside each
        one. ``node`` is then the ``If``/``Loop``/``Scan`` node, ``values``
        its output, ``scores`` the logits of the first branch, and the
        scaling is inserted in every branch.
    columns : tuple of int or None
        (axis, start, stop) when the class scores are the positions
        start..stop-1 along ``axis`` of the output only (a ``Concat`` of
        boxes and scores, ``--score-columns``); the other positions are left
        as they are.
    composed : str
        What the finder put together, in words (a mean over frames, a head
        inside subgraphs, a part of a Concat); "" for a single spelling.
    """

    output: str
    scores: str
    activation: str | None
    node: int | None
    class_axis: int
    rank: int
    num_classes: int | None
    dtype: str
    tensor: str = ""
    layout: tuple[int, ...] = ()
    output_dtype: str = ""
    scores_axis: int = 1
    scores_rank: int = 2
    holds: str = "logits"
    spelling: str = "raw-logits"
    logits_from: str = "tensor"
    post: tuple[_post.PostOp, ...] = ()
    nodes: tuple[int, ...] = ()
    rewire: tuple[tuple[int, int], ...] = ()
    values: str = ""
    dtypes: tuple[str, ...] = ()
    ml_transform: str = ""
    path: tuple[int, ...] = ()
    branches: tuple[Branch, ...] = ()
    columns: tuple[int, int, int] | None = None
    composed: str = ""

    @property
    def from_probabilities(self) -> bool:
        """True when the logits are computed from the model's values, not read off a tensor."""
        return self.logits_from != "tensor"

    @property
    def inserts(self) -> bool:
        """True when the scaling goes in where an activation reads the logits (in this graph or in
        every branch): the ``insert-before-activation`` rewrite."""
        return self.activation is not None and self.logits_from == "tensor" and bool(self.rewire or self.branches)

    @property
    def takes_one(self) -> bool:
        """True when the output holds one class's value (a class taken by Gather or Slice)."""
        return _post.takes_one(self.post)


@dataclass(frozen=True)
class Branch:
    """The reading inside one subgraph of an ``If``, ``Loop`` or ``Scan`` node.

    Attributes
    ----------
    node : int
        Index of the ``If``/``Loop``/``Scan`` node in the graph around the
        subgraph.
    attribute : str
        ``"then_branch"``, ``"else_branch"`` or ``"body"``.
    slot : int
        The subgraph output the values leave by.
    site : ScoreSite
        What was found inside, its node indices counting the subgraph's
        nodes (it may have branches of its own: nested subgraphs).
    where : str
        In words: ``"then_branch of If 'rate_if'"``.
    """

    node: int
    attribute: str
    slot: int
    site: ScoreSite
    where: str = ""


def read_as(site: ScoreSite, holds: str, kind: str | None = None, *, source: str = "stated") -> ScoreSite:
    """``site`` read as holding ``holds`` (what the user states, or what the data show).

    A recognised activation must agree. A raw output read as probabilities
    is calibrated through z = log p (softmax; ``kind`` "sigmoid" or one value
    per row: z = logit p) and as log-probabilities through z = the values;
    the rewrite then replaces the output's values in place (drop-in).
    ``source`` ("stated" or "data") is kept in ``spelling``.

    Raises
    ------
    OnnxcalError
        ``holds`` is not one of ``HOLDS``, or contradicts the graph.
    """
    if holds not in HOLDS:
        raise OnnxcalError(f"--output-holds {holds!r} is not one of: {', '.join(HOLDS)}")
    if site.activation is not None:
        if holds != site.holds:
            raise OnnxcalError(
                f"output '{site.output}' comes from {_words_of(site)}, so it holds {site.holds}, not {holds}",
                "leave out --output-holds, or choose another output with --output",
            )
        return site
    if holds == "logits":
        return site
    single = site.num_classes == 1 or site.rank == 1
    sigmoid = kind == "sigmoid" or (kind is None and single)
    if holds == "log-probabilities":
        activation, logits_from = "logsoftmax", "log-probabilities"
    else:
        activation, logits_from = ("sigmoid", "logit") if sigmoid else ("softmax", "log")
    return replace(site, activation=activation, logits_from=logits_from, holds=holds, spelling=source)


def fit_kind(site: ScoreSite, requested: str | None = None) -> str:
    """How the calibrated scores become probabilities: ``"softmax"``, ``"sigmoid"`` or ``"sigmoid-l1"``.

    An activation in the model decides (a Sigmoid whose values are then
    L1-normalised: ``"sigmoid-l1"``, fitted against class labels as
    L1(sigmoid(z / T)), see ``onnxcal.l1_sigmoid``); for raw logits ``requested`` (the
    ``--activation`` option) does, else one logit means a sigmoid and more
    mean a softmax (common practice).

    Raises
    ------
    OnnxcalError
        ``requested`` is not a known choice or contradicts the model.
    """
    if requested is not None and requested not in ACTIVATION_CHOICES:
        raise OnnxcalError(
            f"--activation {requested!r} is not one of: {', '.join(ACTIVATION_CHOICES)}"
        )
    if site.activation is not None:
        kind = "sigmoid" if site.activation == "sigmoid" else "softmax"
        if kind == "sigmoid" and _post.normalises(site.post):
            kind = SIGMOID_L1
        if requested is not None and requested != kind:
            what = "an ai.onnx.ml classifier" if site.spelling == "ml-classifier" else site.activation
            raise OnnxcalError(
                f"output '{site.output}' already comes from {what}, so --activation "
                f"{requested} does not apply",
                "leave out --activation",
            )
        return kind
    single = site.num_classes == 1 or site.rank == 1
    if requested == "softmax" and single:
        raise OnnxcalError(
            f"output '{site.output}' holds one logit per sample; a softmax over one value is always 1",
            "use --activation sigmoid (or leave it out)",
        )
    return requested or ("sigmoid" if single else "softmax")


# --------------------------------------------------------------------------
# In words


def _words_of(site: ScoreSite) -> str:
    return words_for(site.spelling)


def words_for(name: str) -> str:
    """A spelling's name in words (``"Softmax"``, ``"a mean (ReduceMean) of probabilities"``)."""
    spelling = BY_NAME.get(name)
    return spelling.words if spelling is not None else COMPOSED_WORDS.get(name, name)


# Spellings the finder composes itself (not a pattern of ``SPELLINGS``), in words.
COMPOSED_WORDS = {
    "mean-of-probabilities": "a mean (ReduceMean) of probabilities",
    "probabilities-in-subgraphs": "probabilities computed inside subgraphs",
}
