"""An altair chart of an effect curve from :func:`stratagem.modify.effect_curve`.

Layers, back to front: the simultaneous band (light), the pointwise band (darker), the estimated
curve, and a dashed line at no effect (0 on the difference scale). Colour from the Okabe-Ito
colour-blind-safe palette. The builder returns a new chart and never changes the frame.
"""

from __future__ import annotations

import altair as alt
import pandas as pd

from ..errors import DataError

__all__ = ["curve_chart"]

BLUE = "#0072B2"  # Okabe-Ito blue
GREY = "#666666"
_NEEDED = ("estimate", "ci_low", "ci_high", "ci_low_simultaneous", "ci_high_simultaneous")
_MEASURE = {"rd": "risk difference", "md": "mean difference"}


def curve_chart(curve: pd.DataFrame, *, title: str | None = None, width: int = 420,
                height: int = 260) -> alt.LayerChart:
    """Chart of the effect over the modifier with pointwise and simultaneous bands.

    Parameters
    ----------
    curve : DataFrame
        The frame returned by :func:`~stratagem.modify.effect_curve.effect_curve`: the modifier's
        column first, then ``estimate``, ``ci_low``, ``ci_high``, ``ci_low_simultaneous``,
        ``ci_high_simultaneous``.
    title : str, optional
        Chart title; by default it names the exposure, outcome and scale from ``curve.attrs``.
    width, height : int
        Size in pixels.

    Returns
    -------
    altair.LayerChart
    """
    if not isinstance(curve, pd.DataFrame) or len(curve.columns) == 0:
        raise DataError("curve must be the DataFrame returned by effect_curve(); got "
                        f"{type(curve).__name__}.")
    missing = [c for c in _NEEDED if c not in curve.columns]
    if missing:
        raise DataError(f"curve lacks column(s) {missing}; pass the frame returned by effect_curve().")
    modifier = str(curve.columns[0])
    attrs = dict(curve.attrs)
    measure = _MEASURE.get(attrs.get("measure"), "effect")
    level = attrs.get("level", 0.95)
    data = curve.rename(columns={curve.columns[0]: "modifier_value"})[["modifier_value", *_NEEDED]].copy()
    if title is None:
        who = f"{attrs['exposure']} on {attrs['outcome']}" if "exposure" in attrs else "exposure"
        title = f"Effect of {who} by {modifier} ({measure}, {level:.0%} bands)"
    x = alt.X("modifier_value:Q", title=modifier, scale=alt.Scale(zero=False))
    base = alt.Chart(data)
    tips = [alt.Tooltip("modifier_value:Q", title=modifier, format=".4g"),
            alt.Tooltip("estimate:Q", format=".3f"),
            alt.Tooltip("ci_low:Q", format=".3f"), alt.Tooltip("ci_high:Q", format=".3f")]
    simultaneous = base.mark_area(color=BLUE, opacity=0.15).encode(
        x=x, y=alt.Y("ci_low_simultaneous:Q", title=measure), y2="ci_high_simultaneous:Q")
    pointwise = base.mark_area(color=BLUE, opacity=0.3).encode(x=x, y="ci_low:Q", y2="ci_high:Q")
    line = base.mark_line(color=BLUE, strokeWidth=2).encode(x=x, y="estimate:Q", tooltip=tips)
    null = alt.Chart(pd.DataFrame({"null": [0.0]})).mark_rule(color=GREY, strokeDash=[4, 4]).encode(
        y="null:Q")
    return alt.layer(simultaneous, pointwise, line, null).properties(
        title=title, width=width, height=height)
