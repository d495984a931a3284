"""Reports for people: report.html, summary.md, report.json and the plots as PNG files.

``build`` gathers every number of a report into one JSON-ready dictionary
(the content of report.json), computing them with ``metrics`` (``evaluate``,
``reliability``); ``draw`` turns that dictionary into PNG plots with
matplotlib (Agg canvas, no display, no global pyplot state);
``render_html`` and ``render_markdown`` lay it out. Nothing here computes
a metric of its own.

What the figures are computed on (``evaluation``):

* a fit summary and the capture it was made on: the held-out part of the
  fit's split, calibrated with the parameters fitted on the other part,
  exactly as FIT.json's headline (the split is redrawn from its fraction
  and seed, and the before-figures must reproduce FIT.json's);
* a fit summary and another capture: every sample, calibrated with the
  parameters baked into the model;
* a temperature given by hand: every sample.

Colours are the Okabe–Ito palette (Okabe & Ito, "Color Universal Design",
2008), chosen to stay distinct for the common forms of colour blindness;
before and after also differ by hatching and panel, never by colour alone.

The modules, each importing only those above it:

* ``content``: :func:`build` (every number, the dictionary report.json holds),
  :func:`evaluation`, :func:`describe_scaling`, ``CAUTIONS``, :class:`ReportResult`;
* ``plots``: :func:`draw` (the PNGs), the colours and sizes of the plots;
* ``pages``: :func:`render` (every file by name), :func:`render_html`,
  :func:`render_markdown`, :func:`render_json`, :func:`outputs`.

(The modules are not named after the functions ``build``, ``draw`` and ``render``,
which this package exports: a function of that name here would hide the module.)
"""

from .content import (
    CAUTIONS,
    FORMAT,
    Evaluation,
    ReportResult,
    build,
    describe_scaling,
    evaluation,
)
from .pages import (
    FILES,
    FORMATS,
    metric_rows,
    outputs,
    render,
    render_html,
    render_json,
    render_markdown,
)
from .plots import (
    AFTER_COLOUR,
    BEFORE_COLOUR,
    DPI,
    FIGSIZE,
    GAP_COLOUR,
    MAX_CLASS_BARS,
    OKABE_ITO,
    PLOT_PIXELS,
    PLOTS,
    draw,
)

__all__ = [
    "AFTER_COLOUR",
    "BEFORE_COLOUR",
    "CAUTIONS",
    "DPI",
    "FIGSIZE",
    "FILES",
    "FORMAT",
    "FORMATS",
    "GAP_COLOUR",
    "MAX_CLASS_BARS",
    "OKABE_ITO",
    "PLOTS",
    "PLOT_PIXELS",
    "Evaluation",
    "ReportResult",
    "build",
    "describe_scaling",
    "draw",
    "evaluation",
    "metric_rows",
    "outputs",
    "render",
    "render_html",
    "render_json",
    "render_markdown",
]
