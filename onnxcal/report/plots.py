"""The plots of a report as PNG bytes, drawn with matplotlib (Agg canvas, no display, no pyplot state).

Colours are the Okabe-Ito palette; before and after also differ by hatching and panel.
"""

from __future__ import annotations

import io
from typing import TYPE_CHECKING, Any

import numpy as np

from .. import _signals
from ..metrics import METRIC_LABELS
from ..scaling import Scaling
from . import decisions as decision_figures

if TYPE_CHECKING:
    from matplotlib.axes import Axes
    from matplotlib.figure import Figure

# A report's content: the JSON-ready dictionary of :func:`onnxcal.report.build`.
Content = dict[str, Any]

PLOTS = ("reliability", "confidence", "classes")

# Okabe-Ito colours (Okabe & Ito 2008): distinct under protanopia,
# deuteranopia and tritanopia.
OKABE_ITO = {
    "black": "#000000",
    "orange": "#E69F00",
    "sky_blue": "#56B4E9",
    "bluish_green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "reddish_purple": "#CC79A7",
}
BEFORE_COLOUR = OKABE_ITO["vermillion"]
AFTER_COLOUR = OKABE_ITO["blue"]
GAP_COLOUR = OKABE_ITO["orange"]
# Every plot is FIGSIZE inches at DPI dots per inch: PLOT_PIXELS wide and high.
FIGSIZE = (10.0, 4.6)
DPI = 100
PLOT_PIXELS = (round(FIGSIZE[0] * DPI), round(FIGSIZE[1] * DPI))
MAX_CLASS_BARS = 40


# --------------------------------------------------------------------------
# Drawing


def _axis_words(quantity: str) -> tuple[str, str, str]:
    """x label, y label, and the word for a prediction, per kind of diagram."""
    if quantity == "top-label":
        return (
            "confidence: probability of the predicted class (0 to 1)",
            "accuracy: fraction of the bin predicted right (0 to 1)",
            "predictions",
        )
    return (
        "predicted probability that the label is present (0 to 1)",
        "fraction of the bin where the label is present (0 to 1)",
        "predictions (sample x label)",
    )


def _new_figure(ncols: int) -> tuple[Figure, list[Axes]]:
    with _signals.deferred():  # a signal inside an extension module's import can crash it
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure

    fig = Figure(figsize=FIGSIZE, dpi=DPI, layout="constrained")
    FigureCanvasAgg(fig)
    axes = fig.subplots(1, ncols, sharey=ncols > 1, squeeze=False)[0]
    return fig, axes


def _png(fig: Figure) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=DPI, metadata={"Software": None})
    return buf.getvalue()


def _array(values: list[float | None]) -> np.ndarray:
    return np.array([np.nan if v is None else v for v in values], dtype=np.float64)


def used_parameters(content: Content) -> str:
    """Which parameters the after-figures use, in words: the baked-in ones or the fit part's."""
    c = content["calibration"]
    t = Scaling(c["method"], c["figures_use"]).temperature
    fit_part = c["figures_use"] != c["parameters"]
    if t is not None:
        return f"T = {t:.4f} ({'fitted on the fit part alone' if fit_part else 'the T baked in'})"
    return "the parameters fitted on the fit part alone" if fit_part else "the parameters baked in"


def panel_titles(content: Content) -> tuple[str, str]:
    """First lines of the before and after panels: the rows and which T the after panel uses."""
    n = content["metrics"]["before"]["n"]
    return f"before calibration, {n} samples", f"after calibration with {used_parameters(content)}"


def diagram_metric(content: Content) -> str:
    """The row of the metrics table that a reliability diagram's binned error is.

    Multiclass: the top-label diagram's error is the ECE. Binary: the diagram of
    the positive probability has the classwise ECE (one class). Multi-label: the
    diagram pools every label's entries; the title quotes the table's classwise
    ECE, the mean of the per-label errors, and says that the bars pool the labels.
    """
    return "ece" if content["reliability"]["before"]["kind"] == "multiclass" else "classwise_ece"


def observed_words(quantity: str) -> tuple[str, str]:
    """The names of a bin's mean prediction and observed fraction (the bin table's columns)."""
    if quantity == "top-label":
        return "mean confidence", "accuracy"
    return "mean predicted probability", "fraction present"


def _metric_name(content: Content, key: str) -> str:
    return METRIC_LABELS[key].format(bins=content["metrics"]["n_bins"])


def _value(v: float | None) -> str:
    return "-" if v is None else f"{v:.4f}"


def _reliability_title(content: Content, part: str, first: str) -> str:
    key = diagram_metric(content)
    line = f"{first}\n{_metric_name(content, key)} = {_value(content['metrics'][part][key])}"
    if content["reliability"][part]["kind"] == "multilabel":
        line += " (mean over labels; the bars pool all labels)"
    return line + "\nbars: opacity by count, numbers along the top: predictions per bin"


def _opacity(counts: np.ndarray) -> np.ndarray:
    """Bar opacity from a bin's count: 0.15 for one prediction up to 1 for the fullest bin (square root)."""
    top = counts.max() if counts.size and counts.max() > 0 else 1.0
    return 0.15 + 0.85 * np.sqrt(counts / top)


def _reliability_figure(content: Content) -> Figure:
    from matplotlib.colors import to_rgba
    from matplotlib.legend_handler import HandlerTuple
    from matplotlib.patches import Patch

    rel = content["reliability"]
    x_label, y_label, _ = _axis_words(rel["before"]["quantity"])
    fig, axes = _new_figure(2)
    for ax, part, colour, first in zip(
        axes, ("before", "after"), (BEFORE_COLOUR, AFTER_COLOUR), panel_titles(content), strict=True
    ):
        r = rel[part]
        edges = np.array(r["edges"])
        width = np.diff(edges)
        left = edges[:-1]
        counts = np.array(r["counts"], dtype=np.float64)
        observed, confidence = _array(r["observed"]), _array(r["confidence"])
        full = counts > 0
        alpha = _opacity(counts)
        faces = [to_rgba(colour, a) for a in alpha[full]]
        ax.bar(left[full], observed[full], width=width[full], align="edge", color=faces,
               edgecolor="white", linewidth=0.8)
        gap = confidence - observed
        ax.bar(left[full], gap[full], bottom=observed[full], width=width[full], align="edge",
               facecolor="none", edgecolor=GAP_COLOUR, hatch="///", linewidth=0.8,
               label="gap to mean confidence")
        intervals = [iv for iv in r["observed_interval"] if iv is not None]
        low, high = np.array([iv[0] for iv in intervals]), np.array([iv[1] for iv in intervals])
        centre = (left + width / 2)[full]
        below, above = np.clip(observed[full] - low, 0, None), np.clip(high - observed[full], 0, None)
        ax.errorbar(centre, observed[full], yerr=[below, above], fmt="none",
                    ecolor=OKABE_ITO["black"], elinewidth=0.9, capsize=2.5, label="95% Wilson interval of the bin")
        ax.plot([0, 1], [0, 1], color=OKABE_ITO["black"], linestyle="--", linewidth=1.0,
                label="perfect calibration")
        # The band above 1 holds the number of predictions in each bin.
        ax.axhline(1.0, color="#888888", linewidth=0.6)
        for x, w, c in zip(left, width, r["counts"], strict=False):
            if c:
                ax.text(x + w / 2, 1.015, str(c), rotation=90, fontsize=6.5, ha="center", va="bottom",
                        color="#333333")
        ax.set_xlim(0, 1)
        ax.set_ylim(0, 1.14)
        ax.set_yticks(np.linspace(0, 1, 6))
        ax.set_xlabel(x_label, fontsize=8)
        ax.set_title(_reliability_title(content, part, first), fontsize=8.5)
        ax.grid(True, linewidth=0.3, color="#bbbbbb")
    # One legend under both panels, where it hides no bin.
    handles, _ = axes[1].get_legend_handles_labels()
    bars = (Patch(facecolor=BEFORE_COLOUR, edgecolor="white"), Patch(facecolor=AFTER_COLOUR, edgecolor="white"))
    fig.legend(handles=[bars, *handles], labels=[
        "observed in bin, before / after (faint: few predictions)", *(h.get_label() for h in handles)
    ], handler_map={tuple: HandlerTuple(ndivide=None)}, loc="outside lower center", ncol=4, fontsize=7.5,
        frameon=False)
    axes[0].set_ylabel(y_label, fontsize=8.5)
    return fig


def _confidence_figure(content: Content) -> Figure:
    rel = content["reliability"]
    quantity = rel["before"]["quantity"]
    x_label, _, what = _axis_words(quantity)
    mean_word, observed_word = observed_words(quantity)
    fig, axes = _new_figure(2)
    for ax, part, colour, first in zip(
        axes, ("before", "after"), (BEFORE_COLOUR, AFTER_COLOUR), panel_titles(content), strict=True
    ):
        r = rel[part]
        edges = np.array(r["edges"])
        counts = np.array(r["counts"], dtype=np.float64)
        ax.bar(edges[:-1], counts, width=np.diff(edges), align="edge", color=colour, edgecolor="white",
               linewidth=0.8, hatch="" if part == "before" else "..", label=what)
        mean_conf = np.nan if r["mean_confidence"] is None else r["mean_confidence"]
        mean_obs = np.nan if r["mean_observed"] is None else r["mean_observed"]
        ax.axvline(mean_conf, color=OKABE_ITO["black"], linestyle="--", linewidth=1.2,
                   label=f"{mean_word} = {_value(r['mean_confidence'])}")
        ax.axvline(mean_obs, color=OKABE_ITO["bluish_green"], linestyle=":", linewidth=1.6,
                   label=f"{observed_word} = {_value(r['mean_observed'])}")
        ax.set_xlim(0, 1)
        ax.set_xlabel(x_label, fontsize=8.5)
        ax.set_title(f"{first}\ndistribution of the predictions", fontsize=8.5)
        ax.legend(loc="upper center", fontsize=7.5)  # the predictions pile up at the ends
        ax.grid(True, axis="y", linewidth=0.3, color="#bbbbbb")
    axes[0].set_ylabel(f"{what} per bin (count)", fontsize=8.5)
    return fig


def _classes_figure(content: Content) -> Figure:
    rel = content["reliability"]
    names = content["data"]["class_names"]
    before, after = _array(rel["before"]["class_error"]), _array(rel["after"]["class_error"])
    order = np.arange(len(names))
    word = "class" if rel["before"]["kind"] == "multiclass" else "label"
    m = content["metrics"]
    title = (
        f"calibration error of each {word}'s probability, {m['n_bins']} bins; their mean is the "
        f"{_metric_name(content, 'classwise_ece')}: before = {_value(m['before']['classwise_ece'])}, "
        f"after = {_value(m['after']['classwise_ece'])}"
    )
    if len(names) > MAX_CLASS_BARS:
        order = np.argsort(-np.nan_to_num(before), kind="stable")[:MAX_CLASS_BARS]
        title += f"; the {MAX_CLASS_BARS} worst of {len(names)} before calibration"
    fig, (ax,) = _new_figure(1)
    x = np.arange(len(order))
    ax.bar(x - 0.2, before[order], width=0.4, color=BEFORE_COLOUR, label="before calibration")
    ax.bar(x + 0.2, after[order], width=0.4, color=AFTER_COLOUR, hatch="..", edgecolor="white",
           label=f"after calibration with {used_parameters(content)}")
    ax.set_xticks(x, [names[i][:18] for i in order], rotation=30 if len(order) > 6 else 0,
                  ha="right" if len(order) > 6 else "center", fontsize=8)
    ax.set_xlabel("class" if rel["before"]["kind"] == "multiclass" else "label", fontsize=8.5)
    ax.set_ylabel("calibration error (probability, 0 to 1)", fontsize=8.5)
    ax.set_title(title, fontsize=9)
    ax.legend(fontsize=7.5)
    ax.grid(True, axis="y", linewidth=0.3, color="#bbbbbb")
    return fig


def figures(content: Content) -> dict[str, Figure]:
    """The plots of a report as matplotlib ``Figure`` objects, by name (see ``PLOTS``).

    Every number written on a plot is a number of the report's tables, under the
    same name (the tests read the titles and legends of these figures).
    """
    return {
        "reliability": _reliability_figure(content),
        "confidence": _confidence_figure(content),
        "classes": _classes_figure(content),
    }


def draw(content: Content) -> dict[str, bytes]:
    """The plots of a report as PNG bytes, by name (see ``PLOTS``).

    Each is ``PLOT_PIXELS`` (width, height): the reliability diagrams before
    and after side by side (each bin with its 95 % Wilson interval, its
    opacity growing with its count), the confidence histograms before and
    after, and the per-class calibration errors.
    """
    pngs = {name: _png(fig) for name, fig in figures(content).items()}
    if content.get("decisions"):  # a model with decision outputs: the risk-coverage curve and the set sizes
        pngs["decisions"] = decision_figures.plot(content, _new_figure, _png, OKABE_ITO)
    return pngs
