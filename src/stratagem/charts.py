"""Static altair charts of an Analysis, for export and reports, and offline SVG/PNG/PDF export.

Builders read the Analysis's tables and return a new chart each time; nothing is changed in place.
Colours come from the Okabe & Ito (2008) colour-blind-safe palette. Export goes through
``vl-convert`` (:func:`save_chart`), which renders in-process: no browser, no CDN, no network.

Builders
--------
:func:`interval_chart`
    Forest plot: estimate and interval per stratum, the overall estimate last, a dashed null line
    (0 for differences; 1 for ratios, on a log axis).
:func:`response_type_chart`
    Shares of the four response types per stratum: exact shares as bars, bounds as a solid bar up to
    the lower bound and a light bar up to the upper bound.
:func:`propensity_chart`
    Overlap of estimated propensity scores between exposed and unexposed, per stratum (methods that
    fit a propensity model: ``ipw``, ``aipw``, ``standardization`` keep it in
    ``analysis.extra["propensity"]``).
:func:`effect_curve_chart`
    The effect over a numeric modifier, from :func:`stratagem.modify.effect_curve`.
"""

from __future__ import annotations

from pathlib import Path

import altair as alt
import numpy as np
import pandas as pd

from .errors import DataError, SpecError
from .measures import RATIO
from .report import OKABE_ITO
from .results import MEASURE_NAMES, Analysis

__all__ = [
    "interval_chart",
    "response_type_chart",
    "propensity_chart",
    "effect_curve_chart",
    "save_chart",
    "chart_to_svg",
]

GREY = "#666666"
TYPE_ORDER = ["doomed", "causal", "preventive", "immune"]
TYPE_COLOURS = [OKABE_ITO["reddish_purple"], OKABE_ITO["blue"], OKABE_ITO["orange"],
                OKABE_ITO["bluish_green"]]
ARM_COLOURS = [OKABE_ITO["blue"], OKABE_ITO["orange"]]


def _check_analysis(analysis) -> Analysis:
    if not isinstance(analysis, Analysis):
        raise DataError(
            f"Expected an Analysis (the result of stratagem.analyze); got {type(analysis).__name__}."
        )
    return analysis


def interval_chart(analysis: Analysis, *, width: int = 420, row_height: int = 22,
                   title: str | None = None) -> alt.LayerChart:
    """Forest plot of the per-stratum and overall estimates with their intervals.

    Parameters
    ----------
    analysis : Analysis
    width : int
        Width of the plotting area in pixels.
    row_height : int
        Pixels per row; the height follows from the number of rows.
    title : str, optional
        Defaults to "<measure> of <exposure> on <outcome>".

    Returns
    -------
    altair.LayerChart
        Rows that are not estimable are listed on the axis without a marker; their status is in the
        tooltip of the table view (:attr:`Analysis.strata`).
    """
    analysis = _check_analysis(analysis)
    spec = analysis.spec
    ratio = spec.measure in RATIO
    frame = analysis.to_frame()
    rows = pd.DataFrame({
        "row": ["Overall" if s == "overall" else str(s) for s in frame["stratum"]],
        "kind": ["overall" if s == "overall" else "stratum" for s in frame["stratum"]],
        "estimate": pd.to_numeric(frame["estimate"], errors="coerce"),
        "ci_low": pd.to_numeric(frame["ci_low"], errors="coerce"),
        "ci_high": pd.to_numeric(frame["ci_high"], errors="coerce"),
        "n": pd.to_numeric(frame["n"], errors="coerce"),
        "status": frame["status"].astype(str),
    })
    ok = rows["status"].eq("ok") & np.isfinite(rows["estimate"])
    if ratio:
        ok &= rows["estimate"] > 0
    drawn = rows[ok].copy()
    order = list(rows["row"])
    measure = MEASURE_NAMES.get(spec.measure, spec.measure)
    null = 1.0 if ratio else 0.0
    values = pd.concat([drawn["ci_low"], drawn["ci_high"], drawn["estimate"]]).dropna()
    values = values[values > 0] if ratio else values
    lo = min([null, *values.tolist()])
    hi = max([null, *values.tolist()])
    scale = (alt.Scale(type="log", domain=[lo / 1.1, hi * 1.1], nice=False) if ratio
             else alt.Scale(zero=False, domain=[lo - 0.05 * (hi - lo or 1), hi + 0.05 * (hi - lo or 1)]))
    x_title = f"{measure} ({spec.level:.0%} interval{', log scale' if ratio else ''})"
    y = alt.Y("row:N", sort=order, title=None, scale=alt.Scale(domain=order))
    colour = alt.Color("kind:N", scale=alt.Scale(domain=["stratum", "overall"],
                                                 range=[OKABE_ITO["blue"], OKABE_ITO["vermillion"]]),
                       legend=None)
    tips = [alt.Tooltip("row:N", title="stratum"), alt.Tooltip("n:Q", format=",.0f"),
            alt.Tooltip("estimate:Q", format=".3f"), alt.Tooltip("ci_low:Q", format=".3f"),
            alt.Tooltip("ci_high:Q", format=".3f")]
    base = alt.Chart(drawn)
    with_ci = base.transform_filter("isValid(datum.ci_low) && isValid(datum.ci_high)")
    rules = with_ci.mark_rule(strokeWidth=2).encode(
        x=alt.X("ci_low:Q", scale=scale, title=x_title), x2="ci_high:Q", y=y, color=colour)
    points = base.mark_point(filled=True, size=80, opacity=1).encode(
        x=alt.X("estimate:Q", scale=scale, title=x_title), y=y, color=colour,
        shape=alt.Shape("kind:N", scale=alt.Scale(domain=["stratum", "overall"],
                                                  range=["square", "diamond"]), legend=None),
        tooltip=tips)
    null_rule = alt.Chart(pd.DataFrame({"null": [null]})).mark_rule(
        color="#333333", strokeDash=[4, 3]).encode(x=alt.X("null:Q", scale=scale))
    # an invisible layer over every row keeps unestimable rows on the axis
    axis_rows = alt.Chart(rows[["row"]]).mark_point(opacity=0).encode(y=y)
    if title is None:
        title = f"{measure.capitalize()} of {spec.exposure} on {spec.outcome}"
    return alt.layer(axis_rows, null_rule, rules, points).properties(
        width=width, height=row_height * len(rows), title=title)


def response_type_chart(analysis: Analysis, *, width: int = 320, title: str | None = None) -> alt.Chart:
    """Shares of the response types (doomed, causal, preventive, immune) in every stratum.

    Exact shares (``lower == upper``) show as one bar; bounds show as a solid bar up to the lower
    bound and a light bar on to the upper bound.

    Parameters
    ----------
    analysis : Analysis
        Needs a non-empty :attr:`Analysis.response_types` (binary outcome).
    width : int
        Width of each panel in pixels.
    title : str, optional

    Returns
    -------
    altair.FacetChart
        One row of bars per type, one panel per stratum (overall last).
    """
    analysis = _check_analysis(analysis)
    rt = analysis.response_types
    if rt is None or len(rt) == 0:
        raise DataError(
            "This Analysis has no response types: they need a binary outcome (and, for exact shares, "
            "method='exact' with potential_outcomes=(y0, y1)). Check analysis.response_types."
        )
    data = rt[["stratum", "type", "lower", "upper"]].copy()
    data["lower"] = pd.to_numeric(data["lower"], errors="coerce")
    data["upper"] = pd.to_numeric(data["upper"], errors="coerce")
    data["zero"] = 0.0
    strata_order = list(dict.fromkeys(data["stratum"].astype(str)))
    data["stratum"] = data["stratum"].astype(str)
    colour = alt.Color("type:N", scale=alt.Scale(domain=TYPE_ORDER, range=TYPE_COLOURS),
                       legend=alt.Legend(title="response type"))
    y = alt.Y("type:N", sort=TYPE_ORDER, title=None)
    x = alt.X("zero:Q", scale=alt.Scale(domain=[0, 1]), title="share of the stratum",
              axis=alt.Axis(format="%"))
    tips = [alt.Tooltip("stratum:N"), alt.Tooltip("type:N"),
            alt.Tooltip("lower:Q", format=".3f"), alt.Tooltip("upper:Q", format=".3f")]
    base = alt.Chart()
    possible = base.mark_bar(opacity=0.3).encode(x=x, x2="upper:Q", y=y, color=colour, tooltip=tips)
    certain = base.mark_bar().encode(x=x, x2="lower:Q", y=y, color=colour, tooltip=tips)
    layered = alt.layer(possible, certain, data=data).properties(width=width, height=90)
    what = "exact shares" if np.allclose(data["lower"], data["upper"], equal_nan=True) else \
        "bounds: solid up to the lower bound, light up to the upper bound"
    if title is None:
        title = f"Response types by stratum ({what})"
    return layered.facet(
        row=alt.Row("stratum:N", sort=strata_order, title=None, header=alt.Header(labelAngle=0,
                                                                                   labelAlign="left")),
    ).properties(title=title)


def propensity_chart(analysis: Analysis, data: pd.DataFrame, *, bins: int = 30, width: int = 320,
                     title: str | None = None) -> alt.FacetChart:
    """Overlap of the estimated propensity between exposed and unexposed, per stratum.

    Parameters
    ----------
    analysis : Analysis
        From a method that fits a propensity model (``analysis.extra["propensity"]``).
    data : pandas.DataFrame
        The table the analysis was run on (only read): it tells each row's arm and stratum.
    bins : int
        Histogram bins over [0, 1].
    width : int
        Width of each panel in pixels.
    title : str, optional

    Returns
    -------
    altair.FacetChart
        Per stratum, the share of each arm in every propensity bin; little overlap means weak
        positivity (few comparable people) in that stratum.
    """
    from .frame import prepare

    analysis = _check_analysis(analysis)
    score = analysis.extra.get("propensity")
    if score is None:
        raise DataError(
            f"This Analysis (method={analysis.spec.method!r}) has no propensity scores; use "
            "method='ipw' or 'aipw' with confounders to see their overlap."
        )
    if not isinstance(bins, int) or bins < 2:
        raise SpecError(f"The 'bins' parameter must be an integer >= 2; got {bins!r}.")
    prep, _ = prepare(data, analysis.spec)
    score = np.asarray(score, dtype=float)
    if len(score) != len(prep.a):
        raise DataError(
            f"data has {len(prep.a)} usable rows but the analysis has {len(score)} propensity scores; "
            "pass the same table the analysis was run on."
        )
    groups = [(None, "Overall")] if not analysis.modifiers else \
        [(k, str(lbl)) for k, lbl in enumerate(prep.labels["stratum"])] + [(None, "Overall")]
    edges = np.linspace(0, 1, bins + 1)
    parts = []
    for code, label in groups:
        mask = np.ones(len(score), bool) if code is None else prep.stratum == code
        for arm_value, arm in ((1.0, "exposed"), (0.0, "unexposed")):
            sel = mask & (prep.a == arm_value)
            w = prep.w[sel]
            counts, _ = np.histogram(np.clip(score[sel], 0, 1), bins=edges, weights=w)
            total = counts.sum()
            parts.append(pd.DataFrame({
                "stratum": label, "arm": arm, "bin_start": edges[:-1], "bin_end": edges[1:],
                "share": counts / total if total > 0 else np.zeros_like(counts),
            }))
    frame = pd.concat(parts, ignore_index=True)
    order = list(dict.fromkeys(frame["stratum"]))
    colour = alt.Color("arm:N", scale=alt.Scale(domain=["exposed", "unexposed"], range=ARM_COLOURS),
                       legend=alt.Legend(title=None))
    bars = alt.Chart().mark_bar(opacity=0.55, binSpacing=0).encode(
        x=alt.X("bin_start:Q", bin="binned", scale=alt.Scale(domain=[0, 1]),
                title="estimated propensity of exposure"),
        x2="bin_end:Q",
        y=alt.Y("share:Q", stack=None, title="share of arm", axis=alt.Axis(format="%")),
        color=colour,
        tooltip=[alt.Tooltip("stratum:N"), alt.Tooltip("arm:N"), alt.Tooltip("bin_start:Q", format=".2f"),
                 alt.Tooltip("share:Q", format=".1%")],
    )
    layered = alt.layer(bars, data=frame).properties(width=width, height=110)
    if title is None:
        title = f"Propensity overlap by stratum ({analysis.spec.method})"
    return layered.facet(row=alt.Row("stratum:N", sort=order, title=None,
                                     header=alt.Header(labelAngle=0, labelAlign="left"))
                         ).properties(title=title)


def effect_curve_chart(curve: pd.DataFrame, **options):
    """The effect over a numeric modifier; see :func:`stratagem.modify.curve_chart.curve_chart`."""
    from .modify.curve_chart import curve_chart

    return curve_chart(curve, **options)


_FORMATS = ("svg", "png", "pdf")


def chart_to_svg(chart) -> str:
    """SVG text of a chart, rendered in-process by vl-convert (no network)."""
    import vl_convert as vlc

    return vlc.vegalite_to_svg(chart.to_dict(), vl_version=_vl_version())


def _vl_version() -> str:
    major, minor = alt.SCHEMA_VERSION.lstrip("v").split(".")[:2]
    return f"{major}.{minor}"


def save_chart(chart, path: str | Path, *, scale: float = 2.0) -> Path:
    """Write ``chart`` to an SVG, PNG or PDF file (by the file's extension) without network access.

    Parameters
    ----------
    chart : altair chart
    path : str or Path
        Ends in ``.svg``, ``.png`` or ``.pdf``.
    scale : float
        Pixel density of PNG output (2 = twice the chart's size in pixels).

    Returns
    -------
    Path
        The file written.
    """
    import vl_convert as vlc

    path = Path(path)
    kind = path.suffix.lower().lstrip(".")
    if kind not in _FORMATS:
        raise SpecError(
            f"save_chart writes {', '.join(_FORMATS)} files; got {path.name!r}. "
            "Give a path ending in .svg, .png or .pdf."
        )
    spec = chart.to_dict()
    version = _vl_version()
    if kind == "svg":
        path.write_text(vlc.vegalite_to_svg(spec, vl_version=version), encoding="utf-8")
    elif kind == "png":
        path.write_bytes(vlc.vegalite_to_png(spec, vl_version=version, scale=scale))
    else:
        path.write_bytes(vlc.vegalite_to_pdf(spec, vl_version=version))
    return path
