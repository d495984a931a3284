"""The tables behind the plots, and the footnote on point estimates outside their interval.

Every number a plot writes (a panel's binned error, T, the mean prediction and the
observed rate) and every bar it draws (a bin's observed fraction and its Wilson
interval, a class's calibration error) is a cell of a table of the report, under the
name the plot gives it. Nothing here computes a metric: the figures come from the
report's content (:func:`onnxcal.report.build`).
"""

from __future__ import annotations

from ..metrics import METRIC_LABELS
from .plots import Content, observed_words

# Rows of the metrics table whose point estimate lies outside its own interval get this mark.
MARK = "†"
# The binned estimators: biased upward, the more so in bootstrap replicates.
BINNED = ("ece", "mce", "adaptive_ece", "classwise_ece")


def _num(v: float | None, digits: int = 4) -> str:
    return "-" if v is None else f"{v:.{digits}f}"


def outside_interval(content: Content) -> list[str]:
    """Metric fields whose after-calibration point estimate lies outside its own 95 % interval."""
    intervals = content["metrics"]["after_interval"] or {}
    after = content["metrics"]["after"]
    keys = []
    for key, pair in intervals.items():
        value = after.get(key)
        if value is None or not pair or pair[0] is None or pair[1] is None:
            continue
        if value < pair[0] or value > pair[1]:
            keys.append(key)
    return keys


def interval_footnote(content: Content) -> str | None:
    """The footnote under the metrics table when a row is marked (None when no row is)."""
    keys = outside_interval(content)
    if not keys:
        return None
    bins = content["metrics"]["n_bins"]
    names = ", ".join(METRIC_LABELS[k].format(bins=bins) for k in keys)
    binned = [k for k in keys if k in BINNED]
    text = (
        f"{MARK} The point estimate lies outside its own 95% interval ({names}). This is not an error."
    )
    if binned:
        text += (
            " Binned calibration errors are biased upward: with few predictions in a bin, the noise in "
            "its accuracy adds to |accuracy - confidence| instead of cancelling. A bootstrap replicate "
            "repeats some rows and drops others, so it has fewer distinct predictions per bin and a "
            "larger bias than the estimate itself; its errors, and the percentile interval made of them, "
            "then lie above the estimate. Read the interval as the spread of the estimate, shifted up by "
            "that bias; more samples or fewer bins make the bias smaller (docs/maths.md, Honest evaluation)."
        )
    if len(binned) < len(keys):
        text += (
            " A percentile interval of a skewed statistic need not contain its point estimate either, "
            "when the replicates are lopsided around it."
        )
    return text


def bin_table(content: Content, part: str) -> tuple[list[str], list[list[str]]]:
    """Header and rows of one reliability diagram (``part``: before or after), bin by bin.

    The columns are named as the plots name the figures; the last row, ``all bins``,
    holds the mean prediction and observed rate the histograms draw as lines.
    """
    r = content["reliability"][part]
    mean_word, observed_word = observed_words(r["quantity"])
    head = ["bin", "predictions", mean_word, observed_word, f"{observed_word}, 95% Wilson interval"]
    edges = r["edges"]
    rows = []
    for i, count in enumerate(r["counts"]):
        iv = r["observed_interval"][i]
        rows.append([
            f"{edges[i]:.3f} to {edges[i + 1]:.3f}",
            str(count),
            _num(r["confidence"][i]),
            _num(r["observed"][i]),
            "-" if iv is None else f"{iv[0]:.4f} to {iv[1]:.4f}",
        ])
    rows.append(["all bins", str(sum(r["counts"])), _num(r["mean_confidence"]), _num(r["mean_observed"]), ""])
    return head, rows


def class_error_table(content: Content) -> tuple[list[str], list[list[str]]]:
    """Header and rows of the per-class calibration errors the bar chart draws (every class)."""
    rel = content["reliability"]
    word = "class" if rel["before"]["kind"] == "multiclass" else "label"
    head = [word, "calibration error before", "calibration error after"]
    names = content["data"]["class_names"]
    rows = [
        [str(name), _num(b), _num(a)]
        for name, b, a in zip(names, rel["before"]["class_error"], rel["after"]["class_error"], strict=True)
    ]
    return head, rows
