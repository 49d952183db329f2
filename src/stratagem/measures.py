"""Effect measures from the two potential-outcome means of each group, with delta-method intervals.

Every estimator reports, per group, the means ``m1`` (everyone exposed) and ``m0`` (no one exposed)
and the sampling covariance of the pair (``v11``, ``v00``, ``v10``). This module turns them into the
risk difference, risk ratio, odds ratio or mean difference with a Wald interval:

* rd, md:  d = m1 - m0,                     Var = v11 + v00 - 2 v10
* rr:      log(m1 / m0),                    gradient (1/m1, -1/m0)
* or:      logit(m1) - logit(m0),           gradient (1/(m1(1-m1)), -1/(m0(1-m0)))

Ratios are estimated on the log scale; ``se`` is on that scale and the interval is exponentiated back.
For the crude 2x2 table these reduce to the standard large-sample formulas (common practice; e.g.
Rothman, Greenland & Lash, *Modern Epidemiology*, 3rd ed., ch. 14): Var(log RR) = 1/a - 1/n1 + 1/c - 1/n0
and Var(log OR) = 1/a + 1/b + 1/c + 1/d.
"""

from __future__ import annotations

import numpy as np
from scipy import stats

__all__ = ["RATIO", "on_analysis_scale", "wald", "null_value"]

RATIO = ("rr", "or")


def null_value(measure: str) -> float:
    """The no-effect value on the reported scale: 1 for ratios, 0 for differences."""
    return 1.0 if measure in RATIO else 0.0


def on_analysis_scale(measure: str, m1, m0, v11, v00, v10):
    """Point estimate and standard error on the analysis scale (log for ratios).

    All inputs are arrays of the same shape; returns ``(theta, se)`` arrays. Where a mean sits at a
    boundary that makes the measure undefined (a zero risk for rr, 0 or 1 for or), ``theta`` is NaN.
    """
    m1, m0 = np.asarray(m1, dtype=float), np.asarray(m0, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        if measure in ("rd", "md"):
            theta = m1 - m0
            g1, g0 = np.ones_like(m1), -np.ones_like(m0)
        elif measure == "rr":
            ok = (m1 > 0) & (m0 > 0)
            theta = np.where(ok, np.log(np.where(ok, m1, 1.0)) - np.log(np.where(ok, m0, 1.0)), np.nan)
            g1, g0 = 1.0 / m1, -1.0 / m0
        elif measure == "or":
            ok = (m1 > 0) & (m1 < 1) & (m0 > 0) & (m0 < 1)
            safe1, safe0 = np.where(ok, m1, 0.5), np.where(ok, m0, 0.5)
            theta = np.where(ok, np.log(safe1 / (1 - safe1)) - np.log(safe0 / (1 - safe0)), np.nan)
            g1, g0 = 1.0 / (m1 * (1 - m1)), -1.0 / (m0 * (1 - m0))
        else:  # pragma: no cover - the Spec rejects other measures first
            raise ValueError(measure)
        var = g1 * g1 * v11 + g0 * g0 * v00 + 2 * g1 * g0 * v10
        se = np.sqrt(np.where(var >= 0, var, np.nan))
    se = np.where(np.isnan(theta), np.nan, se)
    return theta, se


def wald(measure: str, theta, se, level: float):
    """Estimate, interval and two-sided p-value on the reported scale from analysis-scale values.

    Returns ``(estimate, ci_low, ci_high, p_value)``. For ratios, estimate and limits are
    exponentiated; the p-value tests the null (0 on the analysis scale).
    """
    theta, se = np.asarray(theta, dtype=float), np.asarray(se, dtype=float)
    z = stats.norm.ppf(0.5 + level / 2)
    lo, hi = theta - z * se, theta + z * se
    with np.errstate(divide="ignore", invalid="ignore"):
        p = np.where(se > 0, 2 * stats.norm.sf(np.abs(theta / se)), np.nan)
    if measure in RATIO:
        return np.exp(theta), np.exp(lo), np.exp(hi), p
    return theta, lo, hi, p
