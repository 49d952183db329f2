"""Inverse probability weighting (IPW): Hajek (normalised) weighted means per stratum.

Within each stratum of the modifiers a logistic propensity model ``e(L) = P(A = 1 | L, stratum)`` is
fitted on an intercept and the confounders (the modifiers are constant in a stratum, so fitting per
stratum is the propensity model with every confounder-by-modifier interaction; see
:mod:`stratagem.estimate._adjust` for the layout, shared with standardization and AIPW). Each row gets
the stabilised weight ``P(A=1 | stratum) / e`` if exposed and ``P(A=0 | stratum) / (1 - e)`` if not
(Robins, Hernán & Brumback, *Epidemiology* 11, 2000), optionally truncated at the ``truncate``
percentiles of all rows' weights (Cole & Hernán, *Am J Epidemiol* 168, 2008). The potential-outcome
means are the Hajek (ratio) estimators

    m1 = sum(w a sw y) / sum(w a sw),     m0 = sum(w (1-a) sw y) / sum(w (1-a) sw)

with frequency weights ``w``. Stabilisation does not change these means (a constant factor cancels in
each ratio) but keeps the reported weights near 1.

Standard errors account for the estimated propensity model: the influence function of each mean is
that of its estimating equation plus the projection on the propensity score
(stacked estimating equations, i.e. the sandwich; Lunceford & Davidian, *Stat Med* 23, 2004, sec. 3.2;
Stefanski & Boos 2002). Truncation bounds are treated as fixed in the influence function; the
bootstrap re-computes them in every replicate.

The overall group is the n-weighted combination of the strata's means (see ``_adjust``).
``GroupMeans.extra`` holds ``"propensity"`` (fitted e per row, user's row order) and ``"weights"``
(the stabilised, truncated weights used).
"""

from __future__ import annotations

import numpy as np

from ..frame import Prepared
from ..spec import Spec
from . import _adjust, glm
from .base import GroupMeans

__all__ = ["ipw"]

_NEEDS = dict(need_ps=True, need_om=False, ps_required=True)


def _unit_means(u: _adjust.Unit, spec: Spec, want_if: bool):
    W, a, y, sw = u.W, u.a, u.y, u.sw
    d1 = W * a * sw
    d0 = W * (1.0 - a) * sw
    with np.errstate(invalid="ignore", divide="ignore"):
        m1 = _adjust._wdot(d1, y) / d1.sum(axis=1)
        m0 = _adjust._wdot(d0, y) / d0.sum(axis=1)
    if not want_if:
        return m1, m0, None, None
    w, s, e, free = W[0], sw[0], u.E[0], u.free[0]
    N = w.sum()
    v, r = e * (1.0 - e), a - e
    # exposed: g1 = a sw (y - m1); d sw / d beta = -sw (1 - e) z where the weight was not truncated
    c1 = d1[0].sum() / N
    G1 = glm.dot_cols(u.Z, w * a * (y - m1[0]) * (-s * (1.0 - e)) * free) / N
    if1 = (a * s * (y - m1[0]) + glm.projection(u.Z, w, v, r, u.ps_mask, G1)) / c1
    # unexposed: g0 = (1 - a) sw (y - m0); d sw / d beta = sw e z
    c0 = d0[0].sum() / N
    G0 = glm.dot_cols(u.Z, w * (1.0 - a) * (y - m0[0]) * (s * e) * free) / N
    if0 = ((1.0 - a) * s * (y - m0[0]) + glm.projection(u.Z, w, v, r, u.ps_mask, G0)) / c0
    return m1, m0, if1, if0


def ipw(prep: Prepared, spec: Spec) -> GroupMeans:
    """Adjusted potential-outcome means per stratum and overall by inverse probability weighting.

    Parameters
    ----------
    prep : Prepared
        From :func:`stratagem.frame.prepare`; confounders are coded by
        :func:`stratagem.estimate.design.confounder_design`.
    spec : Spec
        Uses ``truncate`` (percentiles of the weights, or None).

    Returns
    -------
    GroupMeans
        Means on the outcome's scale (risks for a binary outcome), influence-function covariances.
    """
    return _adjust.estimate(prep, spec, _unit_means, name="ipw", **_NEEDS)


def _boot(prep: Prepared, spec: Spec, W: np.ndarray):
    """Replicates (m1, m0), each (B, G), for replicate row frequencies ``W`` (B, n): batched fits."""
    return _adjust.boot_means(prep, spec, W, _unit_means, estimator=ipw, **_NEEDS)


ipw.boot = _boot
