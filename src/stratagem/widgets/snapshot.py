"""Static HTML snapshot of an Explorer result: effects table, inline SVG interval plot, caution.

The snapshot travels as the ``text/html`` part of the widget's display, so a notebook opened without a
kernel or widget support (nbconvert, a repository viewer, an untrusted notebook) still shows the
result. It is built from the same payload the live view draws (:func:`~.payload.analysis_payload`),
with every data string escaped by :func:`html.escape`, plain presentation attributes (no scripts, no
external resources, no ``<style>`` element: sanitisers strip those) and the Okabe-Ito colours.

:func:`axis` is the plot geometry shared with the front end (``js/explorer.js`` implements the same
rules and its tests check the same figures): a linear axis for differences, a log axis for ratios,
padded by 5% of the span, with "nice" ticks.
"""

from __future__ import annotations

import html
import math

__all__ = ["snapshot_html", "axis", "nice_ticks", "fmt", "placeholder_html", "target_row"]

# Okabe-Ito colours (Okabe & Ito 2008, "Color Universal Design"): blue for strata, vermillion for
# the overall row, reddish purple for the effect transported to a target population; grey for the
# null line.
BLUE = "#0072B2"
VERMILLION = "#D55E00"
PURPLE = "#CC79A7"
GREY = "#767676"

ROW_H = 24
HEAD_H = 24
LABEL_W = 190
PLOT_W = 320
VALUE_W = 170
PAD = 8


def fmt(value, digits: int = 3) -> str:
    """A number for reading: fixed decimals, or ``—`` for a missing value."""
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "—"
    if isinstance(value, int) or float(value).is_integer() and abs(value) >= 1000:
        return f"{value:,.0f}"
    return f"{value:.{digits}f}"


def nice_ticks(lo: float, hi: float, count: int = 5) -> list[float]:
    """Round tick values in [lo, hi]: steps of 1, 2 or 5 times a power of ten."""
    if not (math.isfinite(lo) and math.isfinite(hi)) or hi <= lo:
        return []
    raw = (hi - lo) / count
    mag = 10 ** math.floor(math.log10(raw))
    step = next(m * mag for m in (1, 2, 5, 10) if m * mag >= raw * (1 - 1e-12))
    first = math.ceil(lo / step - 1e-9)
    last = math.floor(hi / step + 1e-9)
    return [round(k * step, 12) for k in range(first, last + 1)]


def axis(rows: list[dict], ratio: bool, null: float, left: float, right: float) -> dict:
    """Domain, pixel mapping and ticks of the interval plot.

    Parameters
    ----------
    rows : list of dict
        Payload rows; only rows with ``status == "ok"`` and finite values set the domain.
    ratio : bool
        Log axis (risk or odds ratio) when true.
    null : float
        The no-effect value (0 or 1); always inside the domain.
    left, right : float
        Pixel range.

    Returns
    -------
    dict with ``domain`` (transformed scale: log for ratios), ``x`` (value -> pixel), ``ticks``.
    """
    def t(v):
        return math.log(v) if ratio else v

    values = [null]
    for row in rows:
        if row.get("status") != "ok":
            continue
        for key in ("estimate", "ci_low", "ci_high"):
            v = row.get(key)
            if v is not None and math.isfinite(v) and (v > 0 or not ratio):
                values.append(v)
    tv = [t(v) for v in values]
    lo, hi = min(tv), max(tv)
    if hi - lo < 1e-12:
        lo, hi = lo - (0.5 if ratio else 1.0), hi + (0.5 if ratio else 1.0)
    pad = 0.05 * (hi - lo)
    d0, d1 = lo - pad, hi + pad

    def x(v):
        return left + (t(v) - d0) / (d1 - d0) * (right - left)

    if ratio:
        ticks = []
        for k in range(math.floor(d0 / math.log(10)) - 1, math.ceil(d1 / math.log(10)) + 1):
            for m in (1, 2, 5):
                v = m * 10.0**k
                if d0 <= math.log(v) <= d1:
                    ticks.append(round(v, 12))
        if len(ticks) < 3:
            ticks = [v for v in nice_ticks(math.exp(d0), math.exp(d1)) if v > 0]
    else:
        ticks = nice_ticks(d0, d1)
    return {"domain": (d0, d1), "x": x, "ticks": ticks}


def _e(value) -> str:
    return html.escape("" if value is None else str(value), quote=True)


def target_row(transport: dict | None) -> dict | None:
    """The row of the transported effect (same rules as ``targetRow`` in the JS), or None.

    ``transport`` is the Explorer's ``_transport`` (:func:`~.payload.transport_payload`). The row has
    ``label`` ("target: <name>"), ``status`` ("ok" or "error"), ``message`` and, when ok, the
    ``target`` row's numbers (estimate, ci_low, ci_high, p_value, mean_exposed, mean_unexposed).
    """
    if not transport or not transport.get("state"):
        return None
    label = f"target: {transport.get('name', 'target')}"
    if transport["state"] != "ok":
        return {"population": "target", "label": label, "status": "error",
                "message": transport.get("message") or "The effect could not be transported."}
    found = [r for r in transport.get("rows") or [] if r.get("population") == "target"]
    if not found:
        return None
    return {**found[0], "label": label, "status": "ok", "message": ""}


def _label(row: dict) -> str:
    return "overall" if row.get("stratum") == "overall" else str(row.get("stratum", ""))


def _svg(payload: dict, target: dict | None = None) -> str:
    rows = payload["rows"]
    left, right = LABEL_W + PAD, LABEL_W + PLOT_W - PAD
    ax = axis(rows + ([target] if target else []), payload["ratio"], payload["null"], left, right)
    x = ax["x"]
    shown = len(rows) + (1 if target else 0)
    height = HEAD_H + ROW_H * shown + 28
    width = LABEL_W + PLOT_W + VALUE_W
    parts = [
        f'<svg xmlns="http://www.w3.org/2000/svg" class="sg-forest" width="{width}" height="{height}" '
        f'viewBox="0 0 {width} {height}" role="img" font-family="sans-serif" font-size="12" '
        f'aria-label="{_e(payload["measure_name"])} by stratum with {payload["level"]:.0%} intervals">',
        f'<text x="{LABEL_W + PLOT_W + 6}" y="{HEAD_H - 8}" fill="currentColor" font-weight="bold">'
        f'{_e(payload["measure"])} ({payload["level"]:.0%} interval)</text>',
    ]
    bottom = HEAD_H + ROW_H * shown
    xn = x(payload["null"])
    parts.append(
        f'<line class="sg-null" x1="{xn:.2f}" x2="{xn:.2f}" y1="{HEAD_H - 4}" y2="{bottom}" '
        f'stroke="{GREY}" stroke-dasharray="4 3"/>'
    )
    for tick in ax["ticks"]:
        xt = x(tick)
        parts.append(
            f'<line x1="{xt:.2f}" x2="{xt:.2f}" y1="{bottom}" y2="{bottom + 4}" stroke="{GREY}"/>'
            f'<text x="{xt:.2f}" y="{bottom + 16}" text-anchor="middle" fill="currentColor">'
            f"{_e(f'{tick:g}')}</text>"
        )
    for i, row in enumerate(rows):
        cy = HEAD_H + ROW_H * i + ROW_H / 2
        overall = row.get("stratum") == "overall"
        colour = VERMILLION if overall else BLUE
        weight = ' font-weight="bold"' if overall else ""
        parts.append(f'<g class="sg-row" data-stratum="{_e(row.get("stratum"))}">')
        parts.append(
            f'<text x="4" y="{cy + 4:.1f}" fill="currentColor"{weight}>{_e(_label(row))}</text>'
        )
        est, lo, hi = row.get("estimate"), row.get("ci_low"), row.get("ci_high")
        drawable = row.get("status") == "ok" and est is not None and (est > 0 or not payload["ratio"])
        if drawable:
            if lo is not None and hi is not None and (lo > 0 or not payload["ratio"]):
                parts.append(
                    f'<line class="sg-ci" x1="{x(lo):.2f}" x2="{x(hi):.2f}" y1="{cy:.1f}" y2="{cy:.1f}" '
                    f'stroke="{colour}" stroke-width="2"/>'
                )
            shape = (
                f'<rect class="sg-point" x="{x(est) - 5:.2f}" y="{cy - 5:.1f}" width="10" height="10" '
                f'fill="{colour}" transform="rotate(45 {x(est):.2f} {cy:.1f})"/>'
                if overall
                else f'<circle class="sg-point" cx="{x(est):.2f}" cy="{cy:.1f}" r="4" fill="{colour}"/>'
            )
            parts.append(shape)
            text = f"{fmt(est)} ({fmt(lo)} to {fmt(hi)})" if lo is not None else fmt(est)
        else:
            text = ""
            parts.append(
                f'<text class="sg-reason" x="{left}" y="{cy + 4:.1f}" fill="{GREY}" font-style="italic">'
                f"{_e(row.get('status'))}</text>"
            )
        parts.append(
            f'<text x="{LABEL_W + PLOT_W + 6}" y="{cy + 4:.1f}" fill="currentColor"{weight}>{_e(text)}</text>'
        )
        parts.append("</g>")
    if target:
        parts.append(_svg_target(payload, target, x, HEAD_H + ROW_H * len(rows) + ROW_H / 2, left))
    parts.append("</svg>")
    return "".join(parts)


def _svg_target(payload: dict, row: dict, x, cy: float, left: float) -> str:
    """The transported effect: a triangle in its own colour on the same axis, or the reason."""
    parts = ['<g class="sg-target" data-population="target">',
             f'<text x="4" y="{cy + 4:.1f}" fill="currentColor" font-style="italic">{_e(row["label"])}</text>']
    est, lo, hi = row.get("estimate"), row.get("ci_low"), row.get("ci_high")
    ratio = payload["ratio"]
    if row["status"] == "ok" and est is not None and (est > 0 or not ratio):
        if lo is not None and hi is not None and (lo > 0 or not ratio):
            parts.append(
                f'<line class="sg-ci" x1="{x(lo):.2f}" x2="{x(hi):.2f}" y1="{cy:.1f}" y2="{cy:.1f}" '
                f'stroke="{PURPLE}" stroke-width="2"/>'
            )
        xe = x(est)
        parts.append(
            f'<path class="sg-point" d="M{xe:.2f} {cy - 6:.1f}L{xe + 6:.2f} {cy + 5:.1f}'
            f'L{xe - 6:.2f} {cy + 5:.1f}Z" fill="{PURPLE}"/>'
        )
        text = f"{fmt(est)} ({fmt(lo)} to {fmt(hi)})"
    else:
        text = ""
        parts.append(
            f'<text class="sg-reason" x="{left}" y="{cy + 4:.1f}" fill="{GREY}" font-style="italic">'
            "not transported (see below)</text>"
        )
    parts.append(
        f'<text x="{LABEL_W + PLOT_W + 6}" y="{cy + 4:.1f}" fill="currentColor">{_e(text)}</text></g>'
    )
    return "".join(parts)


_TABLE_COLUMNS = [
    ("stratum", "stratum"),
    ("n", "n"),
    ("n_exposed", "exposed"),
    ("n_unexposed", "unexposed"),
    ("mean_exposed", "mean if exposed"),
    ("mean_unexposed", "mean if unexposed"),
    ("estimate", "estimate"),
    ("ci_low", "lower"),
    ("ci_high", "upper"),
    ("status", "status"),
]


def _table(payload: dict, target: dict | None = None) -> str:
    head = "".join(f'<th style="text-align:left;padding:2px 8px">{_e(t)}</th>' for _, t in _TABLE_COLUMNS)
    body = []
    for row in payload["rows"]:
        cells = []
        for key, _ in _TABLE_COLUMNS:
            v = row.get(key)
            if key in ("n", "n_exposed", "n_unexposed") and v is not None:
                text = f"{v:,.0f}"
            elif key in ("stratum", "status"):
                text = _label(row) if key == "stratum" else str(v)
            else:
                text = fmt(v)
            cells.append(f'<td style="padding:2px 8px">{_e(text)}</td>')
        style = ' style="font-weight:bold"' if row.get("stratum") == "overall" else ""
        body.append(f'<tr data-stratum="{_e(row.get("stratum"))}"{style}>{"".join(cells)}</tr>')
    if target:
        body.append(_table_target(target))
    return (
        '<table class="sg-effects" style="border-collapse:collapse;font-size:12px">'
        f"<thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"
    )


def _table_target(row: dict) -> str:
    """The table row of the transported effect: its numbers, or the reason it has none."""
    cells = [f'<td style="padding:2px 8px;font-style:italic">{_e(row["label"])}</td>']
    if row["status"] != "ok":
        cells.append(f'<td class="sg-transport-message" colspan="{len(_TABLE_COLUMNS) - 1}" '
                     f'style="padding:2px 8px;color:{VERMILLION}">{_e(row["message"])}</td>')
    else:
        for key, _ in _TABLE_COLUMNS[1:]:
            text = "" if key in ("n", "n_exposed", "n_unexposed") else (
                "transported" if key == "status" else fmt(row.get(key)))
            cells.append(f'<td style="padding:2px 8px">{_e(text)}</td>')
    return f'<tr class="sg-target" data-population="target">{"".join(cells)}</tr>'


TEST_NAMES = {
    "cochran_q": "Cochran's Q",
    "i2": "I²",
    "interaction_wald": "interaction Wald",
    "interaction_lr": "interaction LR",
    "breslow_day": "Breslow-Day",
    "gail_simon": "Gail-Simon qualitative",
}
_HEADLINE = ("cochran_q", "i2", "gail_simon")


def _test_piece(t: dict) -> str:
    name = TEST_NAMES.get(str(t.get("test")), str(t.get("test")).replace("_", " "))
    stat = t.get("statistic")
    if t.get("test") == "i2":
        return f"I² = {stat * 100:.0f}%" if stat is not None else ""
    if stat is None and t.get("p_value") is None:
        return ""
    piece = f"{name} {fmt(stat, 2)}"
    if t.get("df") is not None:
        piece += f" on {t['df']:.0f} df"
    p = t.get("p_value")
    if p is not None:
        piece += ", p < 0.001" if p < 0.001 else f", p = {p:.3f}"
    return piece


def heterogeneity_line(payload: dict) -> str:
    """One line of the tests of effect modification, or why there is none (same rules as the JS)."""
    tests = payload.get("heterogeneity") or []
    if not payload.get("modifiers"):
        return "Add a modifier to test for effect modification."
    head = [t for t in tests if t.get("test") in _HEADLINE] or tests
    pieces = [p for p in (_test_piece(t) for t in head) if p]
    if not pieces:
        return "No test of effect modification for this analysis."
    return "Effect modification: " + " · ".join(pieces)


def snapshot_html(payload: dict, transport: dict | None = None) -> str:
    """Self-contained HTML (no scripts, no external resources) showing one result.

    ``transport`` is the Explorer's ``_transport`` (:func:`~.payload.transport_payload`): when a
    target population is picked, its row follows the overall row in the table and the plot, with
    its notes (or the reason it could not be transported) under them.
    """
    target = target_row(transport)
    moved = ""
    if target is not None:
        items = [target["message"]] if target["status"] != "ok" else list(transport.get("notes") or [])
        moved = (f'<ul class="sg-transport-notes">{"".join(f"<li>{_e(n)}</li>" for n in items)}</ul>'
                 if items else "")
    title = (
        f"{payload['title']}: {payload['measure_name']} by "
        f"{', '.join(payload['modifiers']) or 'no modifier (overall only)'}; method {payload['method']}, "
        f"{payload['level']:.0%} {payload['interval']} interval"
    )
    notes = "".join(f"<li>{_e(n)}</li>" for n in payload["notes"])
    return (
        '<div class="sg-snapshot" style="font-family:sans-serif;font-size:12px">'
        f"<p><strong>{_e(title)}</strong></p>"
        f"{_table(payload, target)}"
        f"<div>{_svg(payload, target)}</div>"
        f"{moved}"
        f'<p class="sg-het">{_e(heterogeneity_line(payload))}</p>'
        + (f"<ul>{notes}</ul>" if notes else "")
        + f"<p><em>{_e(payload['caution'])}</em></p>"
        f'<p style="color:{GREY}">Static snapshot of a stratagem Explorer '
        f"({_e(payload['scale_note'])}). Reproduce it with:</p>"
        f'<pre class="sg-code">{_e(payload["recipe"])}</pre>'
        "</div>"
    )


def placeholder_html(message: str) -> str:
    """Snapshot shown before the first result (or when the first computation failed)."""
    return f'<div class="sg-snapshot"><p>stratagem Explorer: {_e(message)}</p></div>'
