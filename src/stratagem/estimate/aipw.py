"""Augmented inverse probability weighting (AIPW), the doubly robust estimator.

Within each stratum of the modifiers, a logistic propensity model ``e(L)`` and an outcome model
``Q(a, L)`` (logistic for a binary outcome, linear for a numeric one; intercept, confounders and
exposure) are fitted, as for IPW and standardization (layout in :mod:`stratagem.estimate._adjust`:
per-stratum fits, so no stratum's effect is forced equal to another's). Each row contributes

    psi1 = Q(1, L) + a (y - Q(1, L)) / e,      psi0 = Q(0, L) + (1 - a) (y - Q(0, L)) / (1 - e)

and ``m1``, ``m0`` are their frequency-weighted means in the stratum (Robins, Rotnitzky & Zhao,
*JASA* 89, 1994; Bang & Robins, *Biometrics* 61, 2005). The estimate is consistent if either model is
right. With ``truncate`` the inverse probabilities are the truncated stabilised weights divided by
the stratum's share exposed (or unexposed), as in IPW.

Standard errors use the influence function ``psi - m`` per stratum (Lunceford & Davidian, *Stat Med*
23, 2004, eq. 21): when both models are right the estimation of the nuisance models adds nothing to
the first-order variance. The overall group is the n-weighted combination of the strata's means.
``GroupMeans.extra`` holds ``"propensity"`` and ``"weights"`` (stabilised, truncated).
"""

from __future__ import annotations

import numpy as np

from ..frame import Prepared
from ..spec import Spec
from . import _adjust
from .base import GroupMeans

__all__ = ["aipw"]

_NEEDS = dict(need_ps=True, need_om=True, ps_required=True)


def _unit_means(u: _adjust.Unit, spec: Spec, want_if: bool):
    W, a, y = u.W, u.a, u.y
    N = W.sum(axis=1)
    p1 = (_adjust._wdot(W, a) / N)[:, None]
    psi1 = u.Q1 + np.where(a == 1, (y - u.Q1) * u.sw / p1, 0.0)
    psi0 = u.Q0 + np.where(a == 0, (y - u.Q0) * u.sw / (1.0 - p1), 0.0)
    m1 = np.sum(W * psi1, axis=1) / N
    m0 = np.sum(W * psi0, axis=1) / N
    if not want_if:
        return m1, m0, None, None
    return m1, m0, psi1[0] - m1[0], psi0[0] - m0[0]


def aipw(prep: Prepared, spec: Spec) -> GroupMeans:
    """Adjusted potential-outcome means per stratum and overall by augmented IPW (doubly robust).

    Parameters
    ----------
    prep : Prepared
        From :func:`stratagem.frame.prepare`.
    spec : Spec
        Uses ``truncate`` (percentiles of the weights, or None).

    Returns
    -------
    GroupMeans
        Means on the outcome's scale (risks for a binary outcome), influence-function covariances.
    """
    return _adjust.estimate(prep, spec, _unit_means, name="aipw", **_NEEDS)


def _boot(prep: Prepared, spec: Spec, W: np.ndarray):
    """Replicates (m1, m0), each (B, G), for replicate row frequencies ``W`` (B, n): batched fits."""
    return _adjust.boot_means(prep, spec, W, _unit_means, estimator=aipw, **_NEEDS)


aipw.boot = _boot
