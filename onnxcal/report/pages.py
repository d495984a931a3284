"""The files of a report: report.html (self-contained), summary.md, report.json and the PNGs."""

from __future__ import annotations

import base64
import html
import json
from collections.abc import Collection, Sequence
from typing import Any

from ..metrics import METRIC_FIELDS, METRIC_LABELS
from ..scaling import Scaling
from ..verify import format_figure
from . import decisions as decision_figures
from .plots import PLOT_PIXELS, PLOTS, Content, draw, used_parameters
from .tables import MARK, bin_table, class_error_table, interval_footnote, outside_interval

FORMATS = ("html", "md", "json", "png")
FILES: dict[str, tuple[str, ...]] = {"html": ("report.html",), "md": ("summary.md",), "json": ("report.json",)}
FILES["png"] = (*(f"{p}.png" for p in PLOTS), "decisions.png")  # the last only with decision outputs


# --------------------------------------------------------------------------
# Layout


_CAPTIONS = {
    "reliability": (
        "Reliability diagrams, before and after. Each bar is one bin of predictions: its height is "
        "the fraction that came true, with its 95% Wilson interval as a black line, and the hatched "
        "box up to the mean confidence in the bin is the gap; a calibrated model keeps the bars on "
        "the dashed diagonal. A bar is the fainter the fewer predictions its bin holds (the numbers "
        "along the top): a bin of a handful says little."
    ),
    "confidence": "How the predictions spread over the bins, before and after, with the mean prediction "
    "and the observed rate.",
    "classes": "Calibration error of each class's probability, before and after.",
}

_CSS = """
body { font-family: system-ui, -apple-system, "Segoe UI", Roboto, sans-serif; color: #1b1b1b;
       max-width: 64rem; margin: 1.5rem auto; padding: 0 1rem; line-height: 1.45; }
h1 { font-size: 1.5rem; margin-bottom: .2rem; }
h2 { font-size: 1.15rem; margin-top: 2rem; border-bottom: 1px solid #c8c8c8; padding-bottom: .15rem; }
table { border-collapse: collapse; margin: .4rem 0 .8rem; font-size: .92rem; }
th, td { border: 1px solid #c8c8c8; padding: .2rem .55rem; text-align: left; vertical-align: top; }
th { background: #f2f2f2; }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
code { font-family: ui-monospace, "DejaVu Sans Mono", monospace; font-size: .88em; word-break: break-all; }
.meta { color: #555; font-size: .9rem; }
.verdict { border-left: 4px solid #0072B2; padding: .2rem 1rem; background: #f5f9fc; }
.fail { color: #a33a00; font-weight: bold; }
.cautions { border: 2px solid #E69F00; padding: .3rem 1rem; background: #fffaf0; }
figure { margin: 1rem 0 1.5rem; }
figure img { max-width: 100%; height: auto; border: 1px solid #e0e0e0; }
figcaption { font-size: .9rem; color: #333; }
.footnote { font-size: .88rem; color: #333; max-width: 52rem; }
details { margin: .4rem 0; font-size: .9rem; }
details summary { cursor: pointer; color: #0060a0; }
"""


def _e(value: object) -> str:
    return html.escape(str(value), quote=True)


def _num(v: float | None, digits: int = 4) -> str:
    return "-" if v is None else f"{v:.{digits}f}"


def _interval(pair: Sequence[float | None] | None, digits: int = 4) -> str:
    return "-" if not pair or pair[0] is None else f"{pair[0]:.{digits}f} to {pair[1]:.{digits}f}"


def _table(head: list[str], rows: list[list[str]], numeric_from: int = 1) -> str:
    out = ["<table>", "<tr>" + "".join(f"<th>{_e(h)}</th>" for h in head) + "</tr>"]
    for row in rows:
        cells = "".join(
            f'<td class="num">{_e(c)}</td>' if i >= numeric_from else f"<td>{_e(c)}</td>" for i, c in enumerate(row)
        )
        out.append(f"<tr>{cells}</tr>")
    out.append("</table>")
    return "\n".join(out)


def metric_rows(content: Content) -> tuple[list[str], list[list[str]]]:
    """Header and rows of the before/after table (HTML and Markdown).

    An interval that does not hold its own point estimate is marked (``MARK``),
    and :func:`interval_footnote` says why.
    """
    m = content["metrics"]
    marked = outside_interval(content)
    head = ["metric", "before", "after"]
    if m["after_interval"]:
        head.append("after, 95% interval")
    if m["fit_part"]:
        head += ["fit part, before", "fit part, after"]
    rows = []
    for key in METRIC_FIELDS:
        row = [METRIC_LABELS[key].format(bins=m["n_bins"]), _num(m["before"][key]), _num(m["after"][key])]
        if m["after_interval"]:
            row.append(_interval(m["after_interval"].get(key)) + (f" {MARK}" if key in marked else ""))
        if m["fit_part"]:
            row += [_num(m["fit_part"][p][key]) for p in ("before", "after")]
        rows.append(row)
    return head, rows


def _table_size(value: list[Any]) -> str:
    """A nested list of numbers in words: ``10 x 10`` or ``10 tables of 4 to 12 values``."""
    sizes = [len(v) for v in value]
    if len(set(sizes)) == 1:
        return f"{len(value)} x {sizes[0]} table"
    return f"{len(value)} tables of {min(sizes)} to {max(sizes)} values"


def _parameter_table(content: Content) -> tuple[list[str], list[list[str]]]:
    """One row per parameter value: name, value baked in, 95% interval (when known), and the
    fit part's own value when the figures use it (held-out figures)."""
    c = content["calibration"]
    names = content["data"]["class_names"]
    interval = c["interval"] or {}
    fit_part = c["figures_use"] if c["figures_use"] != c["parameters"] else None
    head = ["parameter", "value baked in", "95% interval"]
    if fit_part is not None:
        head.append("fitted on the fit part alone (the figures and plots use it)")
    rows = []
    for key, value in c["parameters"].items():
        if isinstance(value, list) and value and isinstance(value[0], list):  # W, a lookup's tables
            rows.append([key, _table_size(value), "-"] + (["-"] if fit_part is not None else []))
            continue
        label = {"temperature": "T", "w": "w (scale)", "b": "b (bias)"}.get(key, key)
        iv = interval.get(key)
        own: Any = fit_part.get(key) if fit_part is not None else None  # a number or a list, like value
        if isinstance(value, list):
            for i, v in enumerate(value):
                row = [f"{label}, {names[i] if i < len(names) else i}", _num(v), _interval(iv[i]) if iv else "-"]
                rows.append(row + ([_num(own[i])] if fit_part is not None else []))
        else:
            rows.append([label, _num(value), _interval(iv) if iv else "-"]
                        + ([_num(own)] if fit_part is not None else []))
    return head, rows


def _figure_tables(content: Content, name: str) -> str:
    """The numbers a plot draws, as tables under it (folded: a reviewer opens them to check a bar)."""
    if name == "classes":
        head, rows = class_error_table(content)
        return ('<details><summary>The numbers of this chart</summary>'
                + _table(head, rows) + "</details>")
    if name != "reliability":
        return ""
    out = ['<details><summary>The numbers of these diagrams and histograms, bin by bin</summary>']
    for part, title in zip(("before", "after"), _panel_words(content), strict=True):
        head, rows = bin_table(content, part)
        out += [f"<p>{_e(title)}</p>", _table(head, rows)]
    out.append("</details>")
    return "".join(out)


def _panel_words(content: Content) -> tuple[str, str]:
    return "Before calibration", f"After calibration with {used_parameters(content)}"


def _model_rows(content: dict[str, Any]) -> list[list[str]]:
    m = content["model"]
    rows = [["original model", m["name"]], ["original model sha256", m["sha256"]],
            ["class-score output", m["output"]], ["logits tensor", m["scores"]]]
    cal = content["calibrated_model"]
    if cal:
        rows += [["calibrated model", cal["name"]], ["calibrated model sha256", cal["sha256"]]]
    return rows


def _key_table(rows: list[list[str]]) -> str:
    body = "".join(f'<tr><th scope="row">{_e(k)}</th><td><code>{_e(v)}</code></td></tr>' for k, v in rows)
    return f"<table>{body}</table>"


def _verdict_item(line: str) -> str:
    marked = ' class="fail"' if "FAILED" in line else ""
    return f"<li{marked}>{_e(line)}</li>"


def _verification_html(v: dict[str, Any]) -> str:
    rows = [[c["name"], c["status"].upper() if c["status"] == "fail" else c["status"],
             format_figure(c["value"]), format_figure(c["limit"]), c["detail"]] for c in v["checks"]]
    head = f"<p>{v['n']} samples; reference from: {_e(v['reference_from'])} ({_e(v['original'])}).</p>"
    return head + _table(["check", "result", "value", "limit", "what"], rows, numeric_from=9)


def choice_rows(choice: dict[str, Any]) -> tuple[list[str], list[list[str]]]:
    """The comparison table of ``--method auto``: head and rows (figure and 95% interval per metric)."""
    head = ["method", "parameters", "NLL", "ECE", "Brier score", "accuracy", "NLL − best (paired)", ""]
    rows = []
    for cand in choice["candidates"]:
        marks = (("chosen", cand["method"] == choice["chosen"]), ("lowest NLL", cand["method"] == choice["best"]),
                 ("did not converge", not cand["converged"]),
                 (f"smoothed targets on {cand.get('smoothed_folds', 0)} of "
                  f"{choice.get('folds', 5) * choice.get('repeats', 1)} fold fits",
                  bool(cand.get("smoothed_folds")) and not choice.get("smoothed_targets")))
        figures = [
            f"{_num(cand['metrics'][f])} ({_interval(cand['intervals'][f])})" if cand["intervals"].get(f)
            else _num(cand["metrics"][f])
            for f in ("nll", "ece", "brier", "accuracy")
        ]
        diff = cand.get("difference")
        paired = "" if diff is None else _interval(diff)
        rows.append([cand["method"], str(cand["n_parameters"]), *figures, paired,
                     ", ".join(w for w, on in marks if on)])
    return head, rows


def _choice_html(choice: dict[str, Any] | None) -> list[str]:
    if choice is None:
        return []
    head, rows = choice_rows(choice)
    folds = choice.get("folds", 5)
    repeats = int(choice.get("repeats", 1))
    again = "" if repeats == 1 else (f", {repeats} times with different folds (each row's NLL averaged over the "
                                      "repeats)")
    targets = (" Every calibration row is classified correctly, or smoothed targets were asked for: every map "
               "was fitted to Platt's smoothed targets, (N+1)/(N+2) for a row's own class, not to the 0/1 labels."
               if choice.get("smoothed_targets") else "")
    return [
        '<h3 id="choice">How the method was chosen (--method auto)</h3>',
        f"<p>Every applicable method was cross-fitted on {folds} folds of all the rows: fitted on all folds but "
        f"one and scored on that one, so every row is held out once{again} (figures with their 95% intervals; "
        "the last column: the interval of the mean per-row NLL difference to the map with the lowest one, on the "
        "same rows; 'uncalibrated': the model as it is, its own probabilities). "
        f"Rule: {_e(choice['rule'])}. {_e(choice['reason'])}.{_e(targets)}</p>",
        _table(head, rows, numeric_from=1),
    ]


def render_html(content: dict[str, Any], pngs: dict[str, bytes]) -> str:
    """The self-contained report.html: inline CSS, plots as base64 PNG, no external links."""
    d, c, m = content["data"], content["calibration"], content["metrics"]
    title = f"Calibration report: {content['model']['name']}"
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en">',
        '<head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{_e(title)}</title>",
        f"<style>{_CSS}</style></head>",
        "<body>",
        f"<h1>{_e(title)}</h1>",
        f'<p class="meta">onnxcal {_e(content["onnxcal_version"])}, {_e(content["created"])}</p>',
        '<h2 id="verdict">Verdict</h2><div class="verdict"><ul>',
        *[_verdict_item(line) for line in content["verdict"]],
        "</ul></div>",
        '<h2 id="model">Model</h2>',
        _key_table(_model_rows(content)),
        '<h2 id="data">Data</h2>',
        f"<p>{d['n']} samples from <code>{_e(d['source'])}</code>; {d['num_classes']} "
        f"{'classes' if d['kind'] == 'multiclass' else 'logit(s)'} ({_e(d['kind'])}). "
        f"The figures below are on {_e(m['description'])}.</p>",
        _table(["class" if d["kind"] == "multiclass" else "label", "samples", "fraction"],
               [[b["name"], str(b["count"]), _num(b["fraction"], 3)] for b in d["balance"]]),
        '<h2 id="calibration">Calibration map</h2>',
        f"<p>{_e(c['description'])}"
        + (" (given by hand, not fitted: no interval)." if c["given"] else ".")
        + "</p>",
        _table(*_parameter_table(content)),
        *_choice_html(c.get("choice")),
    ]
    if c["figures_use"] != c["parameters"]:
        t = Scaling(c["method"], c["figures_use"]).temperature
        used = f"T = {t:.4f}" if t is not None else "the parameters"
        parts.append(f"<p>The held-out figures use {_e(used)} as fitted on the fit part alone, "
                     "without the held-out samples.</p>")
    head, rows = metric_rows(content)
    footnote = interval_footnote(content)
    parts += [
        '<h2 id="metrics">Metrics before and after</h2>',
        f"<p>On {_e(m['description'])}. Lower is better for every row except accuracy; the gap is "
        "mean confidence minus accuracy (positive: overconfident).</p>",
        _table(head, rows),
        *([f'<p class="footnote" id="outside-interval">{_e(footnote)}</p>'] if footnote else []),
        '<h2 id="plots">Plots</h2>',
        f"<p>The after panels use {_e(used_parameters(content))}.</p>",
    ]
    for name in PLOTS:
        data = base64.b64encode(pngs[name]).decode("ascii")
        parts.append(
            f'<figure id="plot-{name}"><img src="data:image/png;base64,{data}" width="{PLOT_PIXELS[0]}" '
            f'height="{PLOT_PIXELS[1]}" alt="{_e(_CAPTIONS[name])}">'
            f"<figcaption>{_e(_CAPTIONS[name])}</figcaption>{_figure_tables(content, name)}</figure>"
        )
    if content.get("decisions"):
        parts.append(decision_figures.html(content["decisions"], pngs["decisions"], PLOT_PIXELS))
    if content["verification"] is not None:
        parts += ['<h2 id="verification">Verification</h2>', _verification_html(content["verification"])]
    parts.append('<h2 id="warnings">Warnings</h2>')
    parts.append(
        "<ul>" + "".join(f"<li>{_e(w)}</li>" for w in content["warnings"]) + "</ul>" if content["warnings"]
        else "<p>None.</p>"
    )
    parts += [
        '<h2 id="notes">Notes</h2>',
        "<ul>" + "".join(f"<li>{_e(n)}</li>" for n in content["notes"]) + "</ul>" if content["notes"]
        else "<p>None.</p>",
        '<h2 id="cautions">Cautions</h2><div class="cautions"><ul>',
        *[f"<li>{_e(x)}</li>" for x in content["cautions"]],
        "</ul></div>",
        "</body></html>",
        "",
    ]
    return "\n".join(parts)


def _md(text: object) -> str:
    return str(text).replace("|", "\\|")


def render_markdown(content: dict[str, Any]) -> str:
    """summary.md: a short before/after table and the verdict, for a pull-request comment."""
    c, m = content["calibration"], content["metrics"]
    head, rows = metric_rows(content)
    keep = [i for i, h in enumerate(head) if not h.startswith("fit part")]
    lines = [
        f"### Calibration of `{_md(content['model']['name'])}`",
        "",
        f"{_md(c['description'])}" + (" (given, not fitted)." if c["given"] else "."),
        f"Figures on {_md(m['description'])}.",
        "",
        "| " + " | ".join(head[i] for i in keep) + " |",
        "|---|" + "---:|" * (len(keep) - 1),
        *["| " + " | ".join(_md(row[i]) for i in keep) + " |" for row in rows],
        "",
        *[f"- {_md(line)}" for line in content["verdict"]],
    ]
    footnote = interval_footnote(content)
    if footnote:
        lines += ["", _md(footnote)]
    if content.get("decisions"):
        lines += ["", "Decisions:", *[f"- {_md(x)}" for x in decision_figures.lines(content["decisions"])]]
    if c.get("choice") is not None:
        chead, crows = choice_rows(c["choice"])
        lines += ["", f"`--method auto`: {_md(c['choice']['reason'])}.", "",
                  "| " + " | ".join(chead) + " |", "|---|" + "---:|" * (len(chead) - 2) + "---|",
                  *["| " + " | ".join(_md(x) for x in row) + " |" for row in crows]]
    if content["warnings"]:
        lines += ["", "Warnings:", *[f"- {_md(w)}" for w in content["warnings"]]]
    lines += ["", "> **Cautions.** " + " ".join(content["cautions"]), ""]
    return "\n".join(lines)


def render_json(content: dict[str, Any]) -> str:
    return json.dumps(content, indent=2, sort_keys=True, allow_nan=False) + "\n"


def outputs(formats: Collection[str]) -> list[str]:
    """File names written for ``formats``, in order."""
    return [name for f in FORMATS if f in formats for name in FILES[f]]


def _utf8(text: str) -> bytes:
    r"""UTF-8 bytes of a page; a path that is not UTF-8 (its bytes kept as lone surrogates) shows as ``\xNN``.

    >>> _utf8("model in 'caf\udce9/'")
    b"model in 'caf\\xe9/'"
    """
    try:
        return text.encode()
    except UnicodeEncodeError:
        escaped = all(not 0xD800 <= ord(c) <= 0xDFFF or 0xDC80 <= ord(c) <= 0xDCFF for c in text)
        raw = text.encode("utf-8", "surrogateescape" if escaped else "backslashreplace")
        return raw.decode("utf-8", "backslashreplace").encode()


def render(content: dict[str, Any], formats: Collection[str]) -> dict[str, bytes]:
    """Every file of the report for ``formats``, by file name, in memory."""
    pngs = draw(content)
    files: dict[str, bytes] = {}
    if "html" in formats:
        files["report.html"] = _utf8(render_html(content, pngs))
    if "md" in formats:
        files["summary.md"] = _utf8(render_markdown(content))
    if "json" in formats:
        files["report.json"] = render_json(content).encode()
    if "png" in formats:
        files.update({f"{name}.png": png for name, png in pngs.items()})
    return files
