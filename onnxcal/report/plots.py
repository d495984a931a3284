"""The plots of a report as PNG bytes, drawn with matplotlib (Agg canvas, no display, no pyplot state).

Colours are the Okabe-Ito palette; before and after also differ by hatching and panel.
"""

from __future__ import annotations

import io
from collections.abc import Iterable
from typing import TYPE_CHECKING, Any

import numpy as np

from .. import _signals
from ..scaling import Scaling

if TYPE_CHECKING:
    from matplotlib.figure import Figure

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


def _new_figure(ncols: int) -> tuple[Figure, np.ndarray]:
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


def _array(values: Iterable[float | None]) -> np.ndarray:
    return np.array([np.nan if v is None else v for v in values], dtype=np.float64)


def _panel_titles(content: dict[str, Any]) -> tuple[str, str]:
    m = content["metrics"]
    after = "after calibration"
    t = Scaling(content["calibration"]["method"], content["calibration"]["figures_use"]).temperature
    if t is not None:
        after += f" (T = {t:.3f})"
    return f"before calibration, {m['before']['n']} samples", after


def _reliability_plot(content: dict[str, Any]) -> bytes:
    rel = content["reliability"]
    x_label, y_label, _ = _axis_words(rel["before"]["quantity"])
    fig, axes = _new_figure(2)
    titles = _panel_titles(content)
    for ax, part, colour, title in zip(
        axes, ("before", "after"), (BEFORE_COLOUR, AFTER_COLOUR), titles, strict=True
    ):
        r = rel[part]
        edges = np.array(r["edges"])
        width = np.diff(edges)
        left = edges[:-1]
        observed, confidence = _array(r["observed"]), _array(r["confidence"])
        full = np.array(r["counts"]) > 0
        ax.bar(left[full], observed[full], width=width[full], align="edge", color=colour,
               edgecolor="white", linewidth=0.8, label="observed in bin")
        gap = confidence - observed
        ax.bar(left[full], gap[full], bottom=observed[full], width=width[full], align="edge",
               facecolor="none", edgecolor=GAP_COLOUR, hatch="///", linewidth=0.8,
               label="gap to mean confidence")
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
        ax.set_xlabel(x_label, fontsize=8.5)
        error = r["error"]
        shown = "-" if error is None else f"{error:.4f}"
        ax.set_title(f"{title}: binned calibration error {shown}\n(numbers along the top: predictions per bin)",
                     fontsize=9)
        ax.grid(True, linewidth=0.3, color="#bbbbbb")
        ax.legend(loc="upper left", bbox_to_anchor=(0.0, 0.87), fontsize=7.5, frameon=True)
    axes[0].set_ylabel(y_label, fontsize=8.5)
    return _png(fig)


def _confidence_plot(content: dict[str, Any]) -> bytes:
    rel = content["reliability"]
    x_label, _, what = _axis_words(rel["before"]["quantity"])
    fig, axes = _new_figure(2)
    for ax, part, colour, title in zip(
        axes, ("before", "after"), (BEFORE_COLOUR, AFTER_COLOUR), _panel_titles(content), strict=True
    ):
        r = rel[part]
        edges = np.array(r["edges"])
        counts = np.array(r["counts"], dtype=np.float64)
        ax.bar(edges[:-1], counts, width=np.diff(edges), align="edge", color=colour, edgecolor="white",
               linewidth=0.8, hatch="" if part == "before" else "..", label=what)
        total = counts.sum()
        conf, obs = _array(r["confidence"]), _array(r["observed"])
        full = counts > 0
        mean_conf = float((conf[full] * counts[full]).sum() / total) if total else np.nan
        mean_obs = float((obs[full] * counts[full]).sum() / total) if total else np.nan
        word = "accuracy" if r["quantity"] == "top-label" else "fraction present"
        ax.axvline(mean_conf, color=OKABE_ITO["black"], linestyle="--", linewidth=1.2,
                   label=f"mean prediction {mean_conf:.3f}")
        ax.axvline(mean_obs, color=OKABE_ITO["bluish_green"], linestyle=":", linewidth=1.6,
                   label=f"{word} {mean_obs:.3f}")
        ax.set_xlim(0, 1)
        ax.set_xlabel(x_label, fontsize=8.5)
        ax.set_title(f"{title}\ndistribution of the predictions", fontsize=9)
        ax.legend(loc="upper left", fontsize=7.5)
        ax.grid(True, axis="y", linewidth=0.3, color="#bbbbbb")
    axes[0].set_ylabel(f"{what} per bin (count)", fontsize=8.5)
    return _png(fig)


def _classes_plot(content: dict[str, Any]) -> bytes:
    rel = content["reliability"]
    names = content["data"]["class_names"]
    before, after = _array(rel["before"]["class_error"]), _array(rel["after"]["class_error"])
    order = np.arange(len(names))
    title = "calibration error of each class's probability (the terms of the classwise ECE)"
    if rel["before"]["kind"] != "multiclass":
        title = "calibration error of each label's probability (the terms of the classwise ECE)"
    if len(names) > MAX_CLASS_BARS:
        order = np.argsort(-np.nan_to_num(before), kind="stable")[:MAX_CLASS_BARS]
        title += f"; the {MAX_CLASS_BARS} worst of {len(names)} before calibration"
    fig, (ax,) = _new_figure(1)
    x = np.arange(len(order))
    ax.bar(x - 0.2, before[order], width=0.4, color=BEFORE_COLOUR, label="before calibration")
    ax.bar(x + 0.2, after[order], width=0.4, color=AFTER_COLOUR, hatch="..", edgecolor="white",
           label="after calibration")
    ax.set_xticks(x, [names[i][:18] for i in order], rotation=30 if len(order) > 6 else 0,
                  ha="right" if len(order) > 6 else "center", fontsize=8)
    ax.set_xlabel("class" if rel["before"]["kind"] == "multiclass" else "label", fontsize=8.5)
    ax.set_ylabel("calibration error (probability, 0 to 1)", fontsize=8.5)
    ax.set_title(f"{title}, {content['metrics']['n_bins']} bins", fontsize=9)
    ax.legend(fontsize=7.5)
    ax.grid(True, axis="y", linewidth=0.3, color="#bbbbbb")
    return _png(fig)


def draw(content: dict[str, Any]) -> dict[str, bytes]:
    """The plots of a report as PNG bytes, by name (see ``PLOTS``).

    Each is ``PLOT_PIXELS`` (width, height): the reliability diagrams before
    and after side by side, the confidence histograms before and after, and
    the per-class calibration errors.
    """
    return {
        "reliability": _reliability_plot(content),
        "confidence": _confidence_plot(content),
        "classes": _classes_plot(content),
    }
