"""The decisions part of a report: the risk-coverage curve with the chosen threshold, the set sizes.

``section`` computes the numbers (report.json's ``decisions``) from the
logits and labels of the rows the figures are on, calibrated with the map
the figures use, and the record's ``decisions`` section (the thresholds);
``plot`` draws them; ``html`` and ``markdown`` lay them out.
"""

from __future__ import annotations

import base64
import html as _html
from typing import Any

import numpy as np

from ..decisions import class_set, class_set_size, proportion, risk_coverage
from ..decisions.gate import accept_threshold, set_threshold
from ..scaling import Scaling
from ..verify import reference_probabilities

MAX_CURVE_POINTS = 400
CAPTION = (
    "Left: the risk-coverage curve: for every threshold on the confidence, the error among the rows "
    "accepted against the fraction accepted, with the target error and the chosen threshold. Right: how "
    "many classes the prediction sets hold. Both on the rows the figures are on."
)
CAUTION = (
    "The acceptance threshold and the set thresholds hold their guarantees only for data like the rows they "
    "were chosen on; they are marginal (an average over inputs, not per input or per subgroup), drift under "
    "distribution shift, and decisions about people need review under local rules and by licensed professionals."
)


def _thin(values: np.ndarray) -> list[float]:
    """At most MAX_CURVE_POINTS points, evenly spread, the last kept."""
    if len(values) <= MAX_CURVE_POINTS:
        return [float(v) for v in values]
    pick = np.unique(np.linspace(0, len(values) - 1, MAX_CURVE_POINTS).round().astype(int))
    return [float(v) for v in values[pick]]


def section(
    logits: np.ndarray, labels: np.ndarray, rows: np.ndarray, scaling: Scaling, activation: str,
    decisions: dict[str, Any], description: str,
) -> dict[str, Any] | None:
    """report.json's ``decisions``: None without decision outputs, or for a multi-label head."""
    if not decisions or decisions.get("kind") == "multilabel":
        return None
    p = reference_probabilities(logits[rows], scaling, activation)
    y = np.asarray(labels)[rows]
    out: dict[str, Any] = {"description": description, "rows": decisions.get("rows", {}), "n": int(len(rows))}
    tau = accept_threshold(decisions)
    if tau is not None:
        rc = risk_coverage(p, y, np.arange(len(p)))
        chosen = decisions["accept"]
        t = float(tau[0])
        at = int(np.searchsorted(-rc.thresholds, -t, side="right")) - 1  # last threshold >= tau
        out["accept"] = {
            "threshold": None if not np.isfinite(t) else t,
            "error_target": chosen["error_target"], "confidence": chosen["confidence"],
            "curve": {"coverage": _thin(rc.coverage), "risk": _thin(rc.risk)},
            "at_threshold": None if at < 0 else {"coverage": float(rc.coverage[at]), "risk": float(rc.risk[at])},
            "chosen_on": {"accepted": chosen["accepted"], "errors": chosen["errors"]},
        }
    sets = set_threshold(decisions)
    if sets is not None:
        member = class_set(p, sets)
        sizes = class_set_size(member)
        k = member.shape[1]
        covered = int(np.take_along_axis(member, y.astype(np.int64)[:, None], axis=1).sum())
        out["class_set"] = {
            "score": sets.score, "coverage_target": sets.coverage, "per_class": sets.class_conditional,
            "sizes": np.bincount(sizes, minlength=k + 1).tolist(), "mean_size": float(sizes.mean()),
            "covered": proportion(covered, len(y)).to_dict(),
        }
    return out


def plot(content: dict[str, Any], new_figure: Any, png: Any, colours: dict[str, str]) -> bytes:
    """The decisions figure (one or two panels)."""
    d = content["decisions"]
    panels = [p for p in ("accept", "class_set") if p in d]
    fig, _ = new_figure(1)
    fig.clear()  # panels with their own y axes (the report's figures share theirs)
    axes = fig.subplots(1, len(panels), squeeze=False)[0]
    for ax, name in zip(axes, panels, strict=True):
        if name == "accept":
            _risk_panel(ax, d["accept"], colours)
        else:
            _sizes_panel(ax, d["class_set"], colours)
    drawn: bytes = png(fig)
    return drawn


def _risk_panel(ax: Any, a: dict[str, Any], colours: dict[str, str]) -> None:
    curve = a["curve"]
    ax.plot(curve["coverage"], curve["risk"], color=colours["blue"], linewidth=1.4, label="error among accepted")
    ax.axhline(a["error_target"], color=colours["vermillion"], linestyle="--", linewidth=1.0,
               label=f"target error {a['error_target']:g}")
    at = a["at_threshold"]
    if a["threshold"] is not None and at is not None:
        ax.plot([at["coverage"]], [at["risk"]], marker="o", markersize=7, color=colours["black"], linestyle="none",
                label=f"chosen threshold {a['threshold']:.4g}: {at['coverage']:.1%} accepted")
    ax.set_xlim(0, 1)
    ax.set_ylim(bottom=0)
    ax.set_xlabel("fraction of rows accepted (coverage)", fontsize=8.5)
    ax.set_ylabel("error among accepted rows (selective risk)", fontsize=8.5)
    title = "risk-coverage curve\n(error among the rows accepted at each threshold)"
    if a["threshold"] is None:
        title += ": no threshold met the target (nothing accepted)"
    ax.set_title(title, fontsize=9)
    ax.legend(loc="upper left", fontsize=7.5)
    ax.grid(True, linewidth=0.3, color="#bbbbbb")


def _sizes_panel(ax: Any, s: dict[str, Any], colours: dict[str, str]) -> None:
    counts = np.asarray(s["sizes"])
    x = np.arange(len(counts))
    ax.bar(x, counts, color=colours["bluish_green"], edgecolor="white")
    for xi, count in zip(x, counts, strict=True):
        if count:
            ax.text(xi, count, str(int(count)), ha="center", va="bottom", fontsize=7.5)
    c = s["covered"]
    ax.set_xlabel("classes in the prediction set", fontsize=8.5)
    ax.set_ylabel("rows", fontsize=8.5)
    ax.set_xticks(x)
    ax.set_title(f"{s['score'].upper()} prediction sets: mean size {s['mean_size']:.2f}\ntrue class in its set "
                 f"{c['rate']:.1%} [{c['interval'][0]:.1%}, {c['interval'][1]:.1%}], target {s['coverage_target']:g}",
                 fontsize=9)
    ax.grid(True, axis="y", linewidth=0.3, color="#bbbbbb")


def lines(d: dict[str, Any]) -> list[str]:
    """The figures in words (HTML and Markdown)."""
    where = d["rows"].get("description", "labelled rows")
    out = [f"Decision thresholds chosen on {where}; figures on {d['description']}."]
    if "accept" in d:
        a = d["accept"]
        if a["threshold"] is None:
            out.append(f"accept: no threshold met an error of at most {a['error_target']:g} with confidence "
                       f"{a['confidence']:g}; the model accepts nothing.")
        else:
            at = a["at_threshold"] or {"coverage": 0.0, "risk": float("nan")}
            out.append(f"accept: confidence >= {a['threshold']:.6g}; here {at['coverage']:.1%} of rows accepted, "
                       f"{at['risk']:.2%} of them wrong (target at most {a['error_target']:g} with confidence "
                       f"{a['confidence']:g}).")
    if "class_set" in d:
        s = d["class_set"]
        out.append(f"class_set: {s['score'].upper()}{' per class' if s['per_class'] else ''}, mean size "
                   f"{s['mean_size']:.2f}; true class in the set {s['covered']['rate']:.1%} (target "
                   f"{s['coverage_target']:g}, marginal).")
    return [*out, CAUTION]


def html(d: dict[str, Any], png: bytes, size: tuple[int, int]) -> str:
    data = base64.b64encode(png).decode("ascii")
    items = "".join(f"<li>{_html.escape(x)}</li>" for x in lines(d))
    caption = _html.escape(CAPTION)
    return (f'<h2 id="decisions">Decisions</h2><ul>{items}</ul>'
            f'<figure id="plot-decisions"><img src="data:image/png;base64,{data}" width="{size[0]}" '
            f'height="{size[1]}" alt="{caption}"><figcaption>{caption}</figcaption></figure>')
