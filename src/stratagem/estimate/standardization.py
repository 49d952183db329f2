"""Standardization (the parametric g-formula): outcome regression, then averaging predictions.

Within each stratum of the modifiers an outcome model is fitted: logistic regression for a binary
outcome (measures rd, rr, or), linear regression for a numeric one (md), on an intercept, the
confounders and the exposure. Fitting per stratum is the same as one model with every
exposure-by-modifier, confounder-by-modifier and modifier term, so no stratum's effect is forced equal
to another's (layout shared with IPW and AIPW: :mod:`stratagem.estimate._adjust`). For every row both
potential outcomes are predicted (exposure set to 1, then 0) and averaged within the stratum with the
frequency weights (Robins, *Math Modelling* 7, 1986; Hernán & Robins, *Causal Inference: What If*,
2020, ch. 13):

    m1 = sum(w Q(1, L)) / sum(w),     m0 = sum(w Q(0, L)) / sum(w).

Standard errors come from the influence function ``Q(a, L) - m_a`` plus the projection on the outcome
model's score (stacked estimating equations; Stefanski & Boos, *The American Statistician* 56, 2002),
so the estimation of the outcome model is accounted for. The overall group is the n-weighted
combination of the strata's means. A propensity model is also fitted (cheaply) so the diagnostics can
show positivity; it does not enter the estimate, and ``GroupMeans.extra["propensity"]`` holds it.
"""

from __future__ import annotations

import numpy as np

from ..frame import Prepared
from ..spec import Spec
from . import _adjust, glm
from .base import GroupMeans

__all__ = ["standardization"]

_NEEDS = dict(need_ps=True, need_om=True, ps_required=False)


def _unit_means(u: _adjust.Unit, spec: Spec, want_if: bool):
    W = u.W
    N = W.sum(axis=1)
    m1 = np.sum(W * u.Q1, axis=1) / N
    m0 = np.sum(W * u.Q0, axis=1) / N
    if not want_if:
        return m1, m0, None, None
    w, q1, q0, mu = W[0], u.Q1[0], u.Q0[0], u.mu[0]
    if u.binary:
        d1, d0, v = q1 * (1 - q1), q0 * (1 - q0), mu * (1 - mu)
    else:
        d1 = d0 = v = np.ones_like(w)
    s1, s0 = w * d1, w * d0
    D1 = glm.dot_cols(u.Z, s1) / N[0]
    D1[-1] = s1.sum() / N[0]  # the exposure column is 1 in every prediction of Q(1, L)
    D0 = glm.dot_cols(u.Z, s0) / N[0]
    D0[-1] = 0.0  # ... and 0 in every prediction of Q(0, L)
    r = u.y - mu
    if1 = q1 - m1[0] + glm.projection(u.Z, w, v, r, u.mask, D1)
    if0 = q0 - m0[0] + glm.projection(u.Z, w, v, r, u.mask, D0)
    return m1, m0, if1, if0


def standardization(prep: Prepared, spec: Spec) -> GroupMeans:
    """Adjusted potential-outcome means per stratum and overall by standardization (g-formula).

    Parameters
    ----------
    prep : Prepared
        From :func:`stratagem.frame.prepare`.
    spec : Spec

    Returns
    -------
    GroupMeans
        Means on the outcome's scale (risks for a binary outcome), influence-function covariances.
    """
    return _adjust.estimate(prep, spec, _unit_means, name="standardization", **_NEEDS)


def _boot(prep: Prepared, spec: Spec, W: np.ndarray):
    """Replicates (m1, m0), each (B, G), for replicate row frequencies ``W`` (B, n): batched fits."""
    return _adjust.boot_means(prep, spec, W, _unit_means, estimator=standardization, **_NEEDS)


standardization.boot = _boot
