"""Bounds on the shares of the four response types from the two potential-outcome risks.

With a binary outcome each individual is doomed (Y0=1, Y1=1), causal (0, 1), preventive (1, 0) or
immune (0, 0). Data (even a perfect randomised trial) identify only the two risks
``p1 = P(Y1=1) = doomed + causal`` and ``p0 = P(Y0=1) = doomed + preventive``; the four shares then
have one free parameter, the doomed share ``d``:

    causal = p1 - d,   preventive = p0 - d,   immune = 1 - p1 - p0 + d,

and every share must lie in [0, 1], so ``max(0, p1 + p0 - 1) <= d <= min(p1, p0)``. The sharp bounds
of each share follow (Fréchet-type bounds on the joint distribution of (Y0, Y1) with given margins):

    doomed      [max(0, p1 + p0 - 1), min(p1, p0)]
    causal      [max(0, p1 - p0),     min(p1, 1 - p0)]
    preventive  [max(0, p0 - p1),     min(p0, 1 - p1)]
    immune      [max(0, 1 - p1 - p0), min(1 - p1, 1 - p0)]

The causal share is the probability of necessity and sufficiency (PNS); its bounds are those of
Tian J, Pearl J (2000), Probabilities of causation: bounds and identification, *Annals of Mathematics
and Artificial Intelligence* 28:287-313 (experimental data only). Under monotonicity (no preventive
type) the shares are identified: doomed = p0, causal = p1 - p0, immune = 1 - p1.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from ..errors import SpecError
from ..results import RESPONSE_TYPE_COLUMNS

__all__ = ["response_type_bounds", "TYPES", "bounds_frame"]

TYPES = ("doomed", "causal", "preventive", "immune")


def _risk(name: str, value) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise SpecError(f"The {name!r} parameter must be a risk (a number in [0, 1]); got {value!r}.") from None
    if not (math.isfinite(v) and 0.0 <= v <= 1.0):
        raise SpecError(f"The {name!r} parameter must be a risk (a number in [0, 1]); got {value!r}.")
    return v


def _bounds(p1: float, p0: float) -> dict[str, tuple[float, float]]:
    return {
        "doomed": (max(0.0, p1 + p0 - 1.0), min(p1, p0)),
        "causal": (max(0.0, p1 - p0), min(p1, 1.0 - p0)),
        "preventive": (max(0.0, p0 - p1), min(p0, 1.0 - p1)),
        "immune": (max(0.0, 1.0 - p1 - p0), min(1.0 - p1, 1.0 - p0)),
    }


def response_type_bounds(risk_exposed: float, risk_unexposed: float, monotone: bool = False) -> pd.DataFrame:
    """Sharp bounds on the shares of doomed, causal, preventive and immune individuals.

    Parameters
    ----------
    risk_exposed : float
        Risk of the outcome if everyone were exposed, ``P(Y1 = 1)``, a proportion in [0, 1].
    risk_unexposed : float
        Risk if no one were exposed, ``P(Y0 = 1)``, a proportion in [0, 1].
    monotone : bool
        Assume no preventive type (exposure never prevents the outcome). The shares are then
        identified and ``lower == upper``. Requires ``risk_exposed >= risk_unexposed``.

    Returns
    -------
    DataFrame
        Columns ``type``, ``lower``, ``upper`` (proportions), one row per type in the order doomed,
        causal, preventive, immune. The causal row is the probability of necessity and sufficiency;
        its bounds are those of Tian & Pearl (2000).

    Raises
    ------
    SpecError
        When a risk is outside [0, 1], or ``monotone=True`` with ``risk_exposed < risk_unexposed``.

    Examples
    --------
    >>> response_type_bounds(0.6, 0.3)
             type  lower  upper
    0      doomed    0.0    0.3
    1      causal    0.3    0.6
    2  preventive    0.0    0.3
    3      immune    0.1    0.4
    """
    p1 = _risk("risk_exposed", risk_exposed)
    p0 = _risk("risk_unexposed", risk_unexposed)
    if monotone:
        if p1 < p0:
            raise SpecError(
                f"monotone=True assumes no preventive type, which needs risk_exposed >= risk_unexposed; "
                f"got {p1:.4g} < {p0:.4g}. Pass monotone=False for bounds."
            )
        shares = {"doomed": p0, "causal": p1 - p0, "preventive": 0.0, "immune": 1.0 - p1}
        rows = [(t, shares[t], shares[t]) for t in TYPES]
    else:
        b = _bounds(p1, p0)
        rows = [(t, *b[t]) for t in TYPES]
    return pd.DataFrame(rows, columns=["type", "lower", "upper"])


def bounds_frame(names, risk_exposed, risk_unexposed, ok, monotone: bool) -> tuple[pd.DataFrame, list[str]]:
    """Response-type bounds for several groups, in the layout of ``Analysis.response_types``.

    ``names`` are group labels; ``ok`` says which groups are estimable. Groups that are not
    estimable, or whose risks contradict monotonicity, get NaN bounds. Returns the frame and notes.
    Vectorised over groups (a handful of arithmetic operations), so it is cheap inside ``analyze``.
    """
    p1 = np.asarray(risk_exposed, dtype=float)
    p0 = np.asarray(risk_unexposed, dtype=float)
    good = np.asarray(ok, dtype=bool) & np.isfinite(p1) & np.isfinite(p0)
    p1 = np.clip(p1, 0.0, 1.0)
    p0 = np.clip(p0, 0.0, 1.0)
    notes = []
    if monotone:
        contradicted = good & (p1 < p0)
        if contradicted.any():
            bad = [str(n) for n, c in zip(names, contradicted) if c]
            notes.append(
                "monotone=True (no preventive type) is contradicted where the risk under exposure is "
                f"below the risk without exposure ({', '.join(bad)}); those response types are left blank."
            )
        good = good & ~contradicted
        lo = {"doomed": p0, "causal": p1 - p0, "preventive": np.zeros_like(p1), "immune": 1.0 - p1}
        hi = lo
    else:
        lo = {
            "doomed": np.maximum(0.0, p1 + p0 - 1.0),
            "causal": np.maximum(0.0, p1 - p0),
            "preventive": np.maximum(0.0, p0 - p1),
            "immune": np.maximum(0.0, 1.0 - p1 - p0),
        }
        hi = {
            "doomed": np.minimum(p1, p0),
            "causal": np.minimum(p1, 1.0 - p0),
            "preventive": np.minimum(p0, 1.0 - p1),
            "immune": np.minimum(1.0 - p1, 1.0 - p0),
        }
    # one row per (group, type), groups outer: built column-wise in one DataFrame call
    keep = np.asarray(good, dtype=bool)[:, None]
    lower = np.where(keep, np.column_stack([np.broadcast_to(lo[t], p1.shape) for t in TYPES]), math.nan)
    upper = np.where(keep, np.column_stack([np.broadcast_to(hi[t], p1.shape) for t in TYPES]), math.nan)
    columns = dict(zip(RESPONSE_TYPE_COLUMNS, (
        [name for name in names for _ in TYPES], [t for _ in names for t in TYPES],
        lower.ravel(), upper.ravel(),
    )))
    return pd.DataFrame(columns), notes
