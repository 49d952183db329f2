"""Self-contained HTML reports of an Analysis, and offline rendering of notebooks.

:func:`to_html` writes one HTML file that needs nothing else to be read: no scripts, fonts,
stylesheets or images are loaded from anywhere. The interval plot is drawn here as inline SVG
(a forest plot: one row per stratum, the overall estimate last, a null line, a log axis for ratios),
so the file opens the same way inside a data enclave without internet as on a laptop.

Every string that comes from the data or the Spec (column names, levels, notes) is escaped with
:func:`html.escape` before it is placed in the page.

:func:`render_notebook` converts a notebook with nbconvert, preferring each output's static
``text/html`` over a widget view (widgets need a kernel; their snapshot does not), and leaves out
the scripts nbconvert would fetch from CDNs.
"""

from __future__ import annotations

import datetime as _dt
import html
import math
import platform
from importlib import metadata
from pathlib import Path

import numpy as np
import pandas as pd

from .measures import RATIO
from .results import CAUTION, MEASURE_NAMES, STRATA_COLUMNS, Analysis

__all__ = ["to_html", "interval_svg", "package_versions", "render_notebook", "OKABE_ITO"]

# Okabe & Ito (2008), "Color Universal Design": a palette told apart with every common colour-vision
# deficiency.
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

_PACKAGES = ("stratagem", "numpy", "pandas", "scipy", "statsmodels", "altair")

_e = html.escape


def package_versions(names=_PACKAGES) -> dict:
    """Installed versions of stratagem and the libraries its numbers depend on (plus Python)."""
    out = {"python": platform.python_version()}
    for name in names:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "not installed"
    return out


# -- number formatting --------------------------------------------------------------------------------
def _finite(v) -> bool:
    try:
        return v is not None and math.isfinite(float(v))
    except (TypeError, ValueError):
        return False


def _num(v, digits: int = 3) -> str:
    return f"{float(v):.{digits}f}" if _finite(v) else ""


def _p(v) -> str:
    if not _finite(v):
        return ""
    return "<0.001" if float(v) < 0.001 else f"{float(v):.3f}"


def _count(v) -> str:
    if not _finite(v):
        return ""
    v = float(v)
    return f"{v:,.0f}" if v == round(v) else f"{v:,.1f}"


def _cell(v, digits: int = 3) -> str:
    """Any table value as escaped text: numbers rounded, missing values blank."""
    if isinstance(v, (bool, np.bool_)):
        return _e(str(v))
    if isinstance(v, (int, float, np.integer, np.floating)):
        if not _finite(v):
            return ""
        if float(v) == round(float(v)) and abs(float(v)) >= 1:
            return _count(v)
        return _num(v, digits)
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return ""
    return _e(str(v))


def _is_number(v) -> bool:
    return isinstance(v, (int, float, np.integer, np.floating)) and not isinstance(v, (bool, np.bool_))


def _table(frame: pd.DataFrame, columns: list[str] | None = None, headers: list[str] | None = None,
           digits: int = 3, cls: str = "") -> str:
    columns = list(frame.columns) if columns is None else columns
    headers = columns if headers is None else headers
    head = "".join(f"<th>{_e(str(h))}</th>" for h in headers)
    rows = []
    for _, row in frame.iterrows():
        cells = "".join(
            f"<td>{_cell(row[c], digits)}</td>" if _is_number(row[c])
            else f'<td class="sg-text">{_cell(row[c], digits)}</td>'
            for c in columns
        )
        rows.append(f"<tr>{cells}</tr>")
    klass = f' class="{_e(cls)}"' if cls else ""
    return f"<table{klass}><thead><tr>{head}</tr></thead><tbody>{''.join(rows)}</tbody></table>"


# -- the interval plot --------------------------------------------------------------------------------
def _nice_ticks(lo: float, hi: float, count: int = 6) -> list[float]:
    """About ``count`` round tick values covering [lo, hi] on a linear axis."""
    span = hi - lo
    if span <= 0:
        return [lo]
    raw = span / max(count - 1, 1)
    mag = 10 ** math.floor(math.log10(raw))
    step = min((m * mag for m in (1, 2, 2.5, 5, 10) if m * mag >= raw), default=10 * mag)
    first = math.ceil(lo / step - 1e-9) * step
    ticks = []
    t = first
    while t <= hi + 1e-9 * step:
        ticks.append(round(t, 12) + 0.0)
        t += step
    return ticks


def _log_ticks(lo: float, hi: float) -> list[float]:
    """Round ratio values in [lo, hi] (1, 2, 5 times powers of ten; finer when the range is narrow)."""
    coarse = sorted({m * 10.0 ** k for k in range(-3, 4) for m in (1, 2, 5)})
    middle = sorted(set(coarse) | {0.25, 0.75, 1.5, 3.0, 4.0})
    fine = sorted(set(middle) | {0.8, 0.9, 1.1, 1.25})
    inside = [1.0]
    for candidates in (coarse, middle, fine):
        inside = [t for t in candidates if lo <= t <= hi]
        if len(inside) >= 3:
            break
    while len(inside) > 8:  # thin out, keeping 1 (the null) when present
        keep = inside.index(1.0) if 1.0 in inside else 0
        inside = [t for k, t in enumerate(inside) if (k - keep) % 2 == 0]
    return inside or [1.0]


def _label(row: pd.Series) -> str:
    return "Overall" if row.get("stratum") == "overall" else str(row.get("stratum", ""))


def interval_svg(analysis: Analysis, *, width: int = 760, row_height: int = 24, digits: int = 2) -> str:
    """The interval (forest) plot of an Analysis as an SVG string.

    One row per stratum, then the overall estimate as a diamond. Square markers with horizontal
    interval lines; a dashed null line at 0 for differences and 1 for ratios, which use a log axis.
    Rows that are not estimable show their status instead of a marker.

    Parameters
    ----------
    analysis : Analysis
    width : int
        Width in pixels; the height follows from the number of rows.
    row_height : int
        Pixels per row.
    digits : int
        Decimals of the estimate and interval printed at the right of each row.

    Returns
    -------
    str
        ``<svg ...>...</svg>``, with every data string escaped.
    """
    frame = analysis.to_frame()
    ratio = analysis.spec.measure in RATIO
    null = 1.0 if ratio else 0.0
    ok = frame["status"].eq("ok").to_numpy()

    def fwd(v):
        return math.log(v) if ratio else v

    values = []
    for c in ("estimate", "ci_low", "ci_high"):
        for v, good in zip(frame[c], ok):
            if good and _finite(v) and (not ratio or float(v) > 0):
                values.append(float(v))
    values.append(null)
    lo, hi = min(values), max(values)
    if ratio:
        lo, hi = lo / 1.1, hi * 1.1
    else:
        pad = (hi - lo) * 0.05 or 0.05
        lo, hi = lo - pad, hi + pad
    ticks = _log_ticks(lo, hi) if ratio else _nice_ticks(lo, hi)
    if not ratio:
        lo, hi = min(lo, ticks[0]), max(hi, ticks[-1])

    label_w, value_w, top, bottom = 250, 190, 30, 46
    x0, x1 = label_w, width - value_w
    height = top + row_height * len(frame) + bottom
    a, b = fwd(lo), fwd(hi)

    def x(v):
        return x0 + (fwd(v) - a) / (b - a) * (x1 - x0)

    blue, vermillion, grey = OKABE_ITO["blue"], OKABE_ITO["vermillion"], "#6b6b6b"
    measure = MEASURE_NAMES.get(analysis.spec.measure, analysis.spec.measure)
    parts = [
        f'<svg xmlns="http://www.w3.org/2000/svg" width="{width}" height="{height}" '
        f'viewBox="0 0 {width} {height}" role="img" font-family="system-ui, sans-serif" font-size="12">',
        f"<title>{_e(f'{measure} of {analysis.spec.exposure} on {analysis.spec.outcome} by stratum')}</title>",
        '<text x="8" y="18" font-weight="bold">Stratum</text>',
        f'<text x="{width - 8}" y="18" text-anchor="end" font-weight="bold">'
        f"{_e(analysis.spec.measure)} ({analysis.spec.level:.0%} interval)</text>",
    ]
    axis_y = top + row_height * len(frame) + 4
    for t in ticks:
        tx = x(t)
        parts.append(f'<line x1="{tx:.1f}" x2="{tx:.1f}" y1="{top - 4}" y2="{axis_y}" stroke="#e3e3e3"/>')
        parts.append(f'<text x="{tx:.1f}" y="{axis_y + 16}" text-anchor="middle" fill="{grey}">'
                     f"{_e(f'{t:g}')}</text>")
    nx = x(null)
    parts.append(f'<line x1="{nx:.1f}" x2="{nx:.1f}" y1="{top - 4}" y2="{axis_y}" stroke="#333" '
                 'stroke-dasharray="4 3"/>')
    parts.append(f'<line x1="{x0}" x2="{x1}" y1="{axis_y}" y2="{axis_y}" stroke="#999"/>')
    scale = "log scale" if ratio else "linear scale"
    parts.append(f'<text x="{(x0 + x1) / 2:.1f}" y="{axis_y + 34}" text-anchor="middle" fill="{grey}">'
                 f"{_e(measure)} ({scale}; dashed line: no effect)</text>")
    for i, (_, row) in enumerate(frame.iterrows()):
        cy = top + row_height * i + row_height / 2
        overall = row["stratum"] == "overall"
        weight = ' font-weight="bold"' if overall else ""
        label = _label(row)
        if len(label) > 38:
            label = label[:37] + "…"
        parts.append(f'<text x="8" y="{cy + 4:.1f}"{weight}>{_e(label)}</text>')
        est, lo_v, hi_v = row["estimate"], row["ci_low"], row["ci_high"]
        good = row["status"] == "ok" and _finite(est) and (not ratio or float(est) > 0)
        if not good:
            why = str(row["status"]) if row["status"] != "ok" else "not estimable"
            if len(why) > 70:
                why = why[:69] + "…"
            parts.append(f'<text x="{x0}" y="{cy + 4:.1f}" fill="{grey}" font-style="italic">'
                         f"{_e(why)}</text>")
            continue
        colour = vermillion if overall else blue
        if _finite(lo_v) and _finite(hi_v) and (not ratio or float(lo_v) > 0):
            lx, hx = max(x0, x(float(lo_v))), min(x1, x(float(hi_v)))
            parts.append(f'<line x1="{lx:.1f}" x2="{hx:.1f}" y1="{cy:.1f}" y2="{cy:.1f}" '
                         f'stroke="{colour}" stroke-width="2"/>')
            interval = f"{_num(est, digits)} ({_num(lo_v, digits)} to {_num(hi_v, digits)})"
        else:
            interval = _num(est, digits)
        ex = x(float(est))
        if overall:
            parts.append(f'<polygon points="{ex - 7:.1f},{cy:.1f} {ex:.1f},{cy - 7:.1f} {ex + 7:.1f},'
                         f'{cy:.1f} {ex:.1f},{cy + 7:.1f}" fill="{colour}"/>')
        else:
            parts.append(f'<rect x="{ex - 4.5:.1f}" y="{cy - 4.5:.1f}" width="9" height="9" '
                         f'fill="{colour}"/>')
        parts.append(f'<text x="{width - 8}" y="{cy + 4:.1f}" text-anchor="end"{weight}>'
                     f"{_e(interval)}</text>")
    parts.append("</svg>")
    return "".join(parts)


# -- the report ---------------------------------------------------------------------------------------
_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",sans-serif;margin:2rem auto;max-width:980px;
color:#1b1b1b;line-height:1.45;padding:0 1rem}
h1{font-size:1.5rem;margin-bottom:.2rem}h2{font-size:1.15rem;margin-top:2rem;border-bottom:1px solid #ddd}
table{border-collapse:collapse;margin:.5rem 0;font-size:.9rem}
th,td{padding:.25rem .6rem;border-bottom:1px solid #e5e5e5;text-align:right;vertical-align:top}
th:first-child,td:first-child,td.sg-text{text-align:left}
td.sg-nowrap{white-space:nowrap}
th{background:#f4f4f4}
dl.sg-summary{display:grid;grid-template-columns:max-content 1fr;gap:.2rem 1rem}
dl.sg-summary dt{font-weight:600}dl.sg-summary dd{margin:0}
pre{background:#f6f6f6;padding:.8rem;overflow:auto;border-radius:4px}
.sg-caution{border-left:4px solid #D55E00;background:#fff6ef;padding:.6rem .9rem}
.sg-warning{color:#8a3b00}
.sg-muted{color:#666;font-size:.9rem}
svg{max-width:100%;height:auto}
@media (prefers-color-scheme: dark){body{background:#111;color:#eee}th{background:#222}
pre{background:#1c1c1c}.sg-caution{background:#2a1a10}svg{background:#fff}}
"""


def _summary(analysis: Analysis) -> str:
    s = analysis.spec
    o = analysis.overall
    items = [
        ("Exposure", s.exposure),
        ("Outcome", s.outcome),
        ("Confounders", ", ".join(s.confounders) or "none"),
        ("Strata (modifiers)", ", ".join(s.strata) or "none (overall effect only)"),
        ("Method", s.method),
        ("Measure", f"{MEASURE_NAMES.get(s.measure, s.measure)} ({s.measure})"),
        ("Interval", f"{s.level:.0%} {s.interval}" + (f", {s.n_boot} replicates, random state {s.seed}"
                                                       if s.interval == "bootstrap" else "")),
        ("Individuals analysed", _count(o.get("n"))),
        ("Rows read", _count(analysis.n_input)),
        ("Rows dropped", _count(analysis.n_dropped) or "0"),
    ]
    if s.bins:
        items.append(("Bins", "; ".join(f"{k}: {v}" for k, v in s.bins.items())))
    if s.counts:
        items.append(("Frequencies column", s.counts))
    body = "".join(f"<dt>{_e(k)}</dt><dd>{_e(str(v))}</dd>" for k, v in items)
    return f'<dl class="sg-summary">{body}</dl>'


def _effects_table(analysis: Analysis, digits: int) -> str:
    frame = analysis.to_frame()
    m = analysis.spec.measure
    rows = []
    for _, r in frame.iterrows():
        ok = r["status"] == "ok"
        if ok and _finite(r["ci_low"]):
            eff = f"{_num(r['estimate'], digits)} ({_num(r['ci_low'], digits)} to {_num(r['ci_high'], digits)})"
        else:
            eff = _num(r["estimate"], digits)
        label = "Overall" if r["stratum"] == "overall" else str(r["stratum"])
        rows.append(
            "<tr>"
            f"<td>{_e(label)}</td><td>{_count(r['n'])}</td><td>{_count(r['n_exposed'])}</td>"
            f"<td>{_count(r['n_unexposed'])}</td><td>{_num(r['mean_exposed'], digits)}</td>"
            f"<td>{_num(r['mean_unexposed'], digits)}</td><td class=\"sg-nowrap\">{_e(eff)}</td>"
            f"<td>{_num(r['se'], digits)}</td><td>{_p(r['p_value'])}</td><td>{_e(str(r['status']))}</td>"
            "</tr>"
        )
    headers = ["Stratum", "n", "n exposed", "n unexposed", "mean if exposed", "mean if unexposed",
               f"{m} (interval)", "se" + (" (log)" if m in RATIO else ""), "p", "status"]
    head = "".join(f"<th>{_e(h)}</th>" for h in headers)
    return f'<table class="sg-effects"><thead><tr>{head}</tr></thead><tbody>{"".join(rows)}</tbody></table>'


def _extra_strata_table(analysis: Analysis, digits: int) -> str:
    """Columns the toolkit adds to the strata table (adjusted p-values, simultaneous intervals,
    E-values), whatever they are."""
    strata = analysis.strata
    extra = [c for c in strata.columns if c not in analysis.modifiers + STRATA_COLUMNS]
    if not extra or len(strata) == 0:
        return ""
    return _table(strata, ["stratum", *extra], digits=digits)


def _diagnostics(analysis: Analysis, digits: int) -> str:
    d = analysis.diagnostics
    if d is None or len(d) == 0:
        return '<p class="sg-muted">No checks were reported for this method.</p>'
    out = []
    if "warning" in d.columns:
        warnings = [w for w in d["warning"] if isinstance(w, str) and w.strip()]
        if warnings:
            unique = list(dict.fromkeys(warnings))
            items = "".join(f'<li class="sg-warning">{_e(w)}</li>' for w in unique)
            out.append(f"<p><strong>{len(unique)} warning(s):</strong></p><ul>{items}</ul>")
        else:
            out.append("<p>No check raised a warning.</p>")
    out.append(f"<details><summary>All {len(d)} checks</summary>{_table(d, digits=digits)}</details>")
    return "".join(out)


def _response_types(analysis: Analysis, digits: int) -> str:
    r = analysis.response_types
    if r is None or len(r) == 0:
        return ('<p class="sg-muted">Not computed for this analysis (binary outcomes; exact shares need '
                "both potential outcomes, bounds need the toolkit).</p>")
    return _table(r, digits=digits)


def to_html(analysis: Analysis, path: str | Path | None = None, *, title: str | None = None,
            data_name: str = "df", digits: int = 3) -> str:
    """A self-contained HTML report of ``analysis``; written to ``path`` when given.

    The page holds the job summary (exposure, outcome, confounders, strata, method, measure, n,
    rows dropped), the per-stratum table, the interval plot as inline SVG, heterogeneity and
    multiplicity results, warnings from the checks, response types, the ``recipe()`` code, package
    versions and the caution. It loads nothing from the network.

    Parameters
    ----------
    analysis : Analysis
    path : str or Path, optional
        File to write (UTF-8). The HTML is returned either way.
    title : str, optional
        Page heading; defaults to "Effect of <exposure> on <outcome>".
    data_name : str
        Name the recipe gives the table (default ``df``); non-identifiers fall back to ``df``.
    digits : int
        Decimals of estimates, means and intervals.

    Returns
    -------
    str
        The HTML document.
    """
    s = analysis.spec
    title = title or f"Effect of {s.exposure} on {s.outcome}"
    name = data_name if str(data_name).isidentifier() else "df"
    versions = package_versions()
    notes = "".join(f"<li>{_e(n)}</li>" for n in analysis.notes)
    het = analysis.heterogeneity
    sections = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{_e(title)}</title><style>{_CSS}</style></head><body>",
        f"<h1>{_e(title)}</h1>",
        f'<p class="sg-muted">{_e(analysis.scale_note)}. Report written by stratagem '
        f"{_e(versions.get('stratagem', ''))} on {_dt.date.today().isoformat()}.</p>",
        f'<p class="sg-caution">{_e(CAUTION)}</p>',
        "<h2>Summary</h2>",
        _summary(analysis),
        "<h2>Effects by stratum</h2>",
        interval_svg(analysis),
        _effects_table(analysis, digits),
        "<h2>Heterogeneity and multiplicity</h2>",
        (_table(het, digits=digits) if het is not None and len(het)
         else '<p class="sg-muted">No tests of modification were reported (they need two or more '
              "estimable strata).</p>"),
        _extra_strata_table(analysis, digits),
        "<h2>Checks</h2>",
        _diagnostics(analysis, digits),
        "<h2>Response types</h2>",
        _response_types(analysis, digits),
    ]
    if notes:
        sections += ["<h2>Notes</h2>", f"<ul>{notes}</ul>"]
    sections += [
        "<h2>Code</h2>",
        f"<p>Run with the same table bound to <code>{_e(name)}</code>, this reproduces every number "
        "above:</p>",
        f"<pre><code>{_e(analysis.recipe(name))}</code></pre>",
        "<h2>Software</h2>",
        "<p>" + ", ".join(f"{_e(k)} {_e(v)}" for k, v in versions.items()) + "</p>",
        "</body></html>",
    ]
    text = "\n".join(sections)
    if path is not None:
        Path(path).write_text(text, encoding="utf-8")
    return text


# -- rendered notebooks -------------------------------------------------------------------------------
# Static outputs first: a widget view needs a kernel (or a widget manager from a CDN); the text/html
# snapshot stored beside it does not.
DISPLAY_PRIORITY = [
    "text/html",
    "image/svg+xml",
    "image/png",
    "image/jpeg",
    "text/markdown",
    "text/latex",
    "application/javascript",
    "text/plain",
]

# The lab template with every block that loads a script from a CDN emptied (require.js, the widget
# manager, MathJax, mermaid).
_OFFLINE_TEMPLATE = """{%- extends 'lab/index.html.j2' -%}
{%- block html_head_js -%}{%- endblock html_head_js -%}
{%- block jupyter_widgets -%}{%- endblock jupyter_widgets -%}
{%- block html_head_js_mathjax -%}{%- endblock html_head_js_mathjax -%}
{%- block html_head_js_mermaidjs -%}{%- endblock html_head_js_mermaidjs -%}
"""


def render_notebook(src: str | Path, out: str | Path | None = None) -> str:
    """Render a notebook to one offline HTML page that shows widgets as their static snapshots.

    Parameters
    ----------
    src : str or Path
        The ``.ipynb`` file (not executed; its stored outputs are used).
    out : str or Path, optional
        HTML file to write.

    Returns
    -------
    str
        The HTML page. Outputs are chosen in the order of :data:`DISPLAY_PRIORITY`, so a widget's
        ``text/html`` snapshot replaces its live view; saved widget state is left out, and no script
        is loaded from a CDN (maths shows as its TeX source).
    """
    import jinja2
    import nbformat
    from nbconvert import HTMLExporter
    from traitlets.config import Config

    nb = nbformat.read(str(src), as_version=4)
    nb.metadata.pop("widgets", None)
    config = Config()
    config.NbConvertBase.display_data_priority = DISPLAY_PRIORITY
    exporter = HTMLExporter(
        config=config,
        extra_loaders=[jinja2.DictLoader({"stratagem_offline.html.j2": _OFFLINE_TEMPLATE})],
        template_file="stratagem_offline.html.j2",
    )
    body, _ = exporter.from_notebook_node(nb, resources={"metadata": {"name": Path(src).stem}})
    if out is not None:
        Path(out).write_text(body, encoding="utf-8")
    return body
